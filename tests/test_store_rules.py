"""The store's verification rules against crafted files: continuity, order, CRCs, blob bounds, recovery.

A real store is written, then one segment is edited with h5py (the HDF5 project's Python binding, an
independent writer) the way damage or a bug would leave it. Row CRCs of crafted rows are recomputed with
zlib's CRC-32 (ISO 3309 / RFC 1952 polynomial) over the row's bytes before its last field, as the store
format states (DEVELOPERS.md, "The store"), so only the rule under test is broken. The rules: a reader
trusts a row only if its CRC matches, everything it points to lies inside the file, and its record index
continues the previous row's by exactly one; the first row that fails hides itself and every later row
of that segment, and the reader says which row it was.
"""

from __future__ import annotations

import os
import subprocess
import sys
import zlib
from pathlib import Path

import h5py
import numpy as np
import pytest

from acqd.store import open_records
from acqd.store.naming import CREATING, DAMAGED, LIVE, RECOVERING, StorePaths
from acqd.store.recovery import recover_store
from acqd.store.schema import BLOB_PARTS
from test_store import crc_of, make_record, write_store

TESTS = Path(__file__).resolve().parent


def reseal(rows: np.ndarray) -> None:
    """Give each crafted row a matching CRC-32 (zlib) over all its bytes but the trailing 4-byte CRC."""
    for k in range(len(rows)):
        rows["row_crc"][k] = zlib.crc32(rows[k : k + 1].tobytes()[:-4])


def craft(segment: Path, edit) -> None:
    """Read the index rows of a finished segment, let ``edit`` change them, and write them back."""
    with h5py.File(segment, "r+") as f:
        rows = f["index"][:]
        edit(rows)
        f["index"][:] = rows


@pytest.fixture
def store(tmp_path: Path) -> tuple[Path, Path]:
    """A closed store of five records in one finished segment: (store path, segment path)."""
    path = tmp_path / "night.h5"
    assert write_store(path, [10, 11, 12, 13, 14]) == [0, 1, 2, 3, 4]
    return path, tmp_path / "night.000000.h5"


def visible(path: Path) -> tuple[list[int], list[str]]:
    with open_records(path) as reader:
        indices = [summary.index for summary in reader.index()]
        assert [crc_of(r) for r in reader] == [crc_of(make_record(10 + i)) for i in indices]
        return indices, list(reader.notes)


def test_the_untouched_store_shows_every_record(store):
    assert visible(store[0]) == ([0, 1, 2, 3, 4], [])


def test_a_gap_in_the_record_indices_ends_the_verified_prefix(store):
    def gap(rows: np.ndarray) -> None:  # record 2 claims to be record 7: indices 0, 1, 7, 8, 9
        rows["index"][2:] += 5
        reseal(rows)

    craft(store[1], gap)
    indices, notes = visible(store[0])
    assert indices == [0, 1]
    assert len(notes) == 1 and "row 2 fails its check; 3 row(s) from there are not read" in notes[0]


def test_rows_out_of_order_end_the_verified_prefix(store):
    def swap(rows: np.ndarray) -> None:  # rows 1 and 2 exchanged, each with a valid CRC
        rows[[1, 2]] = rows[[2, 1]]
        reseal(rows)

    craft(store[1], swap)
    indices, notes = visible(store[0])
    assert indices == [0] and "row 1 fails its check" in notes[0]


def test_a_segment_may_start_at_any_index_but_then_runs_on(store):
    # The first row of a segment sets where its indices start (a later segment continues the store).
    def shift(rows: np.ndarray) -> None:
        rows["index"] += 100
        reseal(rows)

    craft(store[1], shift)
    with open_records(store[0]) as reader:
        assert [s.index for s in reader.index()] == [100, 101, 102, 103, 104] and reader.notes == []


def test_a_row_whose_crc_does_not_match_is_not_read(store):
    def corrupt(rows: np.ndarray) -> None:  # one bit of record 3's row flipped after sealing
        rows["index"][3] ^= 1 << 40

    craft(store[1], corrupt)
    indices, notes = visible(store[0])
    assert indices == [0, 1, 2] and "row 3 fails its check; 2 row(s)" in notes[0]


@pytest.mark.parametrize("part", BLOB_PARTS)
def test_a_row_pointing_past_the_blobs_is_not_read(store, part):
    with h5py.File(store[1], "r") as f:
        blob_end = f["blobs"].shape[0]

    def past_the_end(rows: np.ndarray) -> None:  # record 4's blob now ends one byte beyond the dataset
        rows[f"{part}_offset"][4] = blob_end - rows[f"{part}_length"][4] + 1
        reseal(rows)

    craft(store[1], past_the_end)
    indices, notes = visible(store[0])
    assert indices == [0, 1, 2, 3] and "row 4 fails its check" in notes[0]


def test_a_row_ending_exactly_at_the_last_blob_byte_is_read(store):
    # Bounds are inclusive of the last byte: offset + length == size of the blob dataset is inside.
    with h5py.File(store[1], "r") as f:
        rows, blob_end = f["index"][:], f["blobs"].shape[0]
    ends = {part: int(rows[f"{part}_offset"][-1] + rows[f"{part}_length"][-1]) for part in BLOB_PARTS}
    assert max(ends.values()) == blob_end  # the last record's newest blob closes the dataset
    assert visible(store[0])[0] == [0, 1, 2, 3, 4]


def test_writing_resumes_after_the_last_record_of_every_segment(tmp_path: Path):
    path = tmp_path / "night.h5"
    write_store(path, [1, 2, 3], rotate_records=2)
    assert write_store(path, [4, 5], rotate_records=2) == [3, 4]
    with open_records(path) as reader:
        assert [s.index for s in reader.index()] == [0, 1, 2, 3, 4]


# --- recovery: every branch of recover_store ------------------------------------------------------------

DYING_WRITER = """
import os, sys
sys.path.insert(0, sys.argv[1])
from test_store import make_record
from acqd.store import RecordStore
store, corrupt_row = RecordStore(sys.argv[2], rotate_records=100), int(sys.argv[3])
for seed in sys.argv[4:]:
    store.append(make_record(int(seed)))
if corrupt_row >= 0:
    index = store._live._h5["index"]
    row = index[corrupt_row:corrupt_row + 1]
    row["index"] ^= 1 << 40
    index[corrupt_row:corrupt_row + 1] = row
    store._live._h5.flush()
os._exit(0)
"""


def live_segment_of(tmp_path: Path, seeds: list[int], *, kill_at: str = "", corrupt_row: int = -1) -> Path:
    """A store whose writer died with ``seeds`` appended: a child process appends them and leaves with
    ``os._exit`` (no close, no finish, no rename; the kernel releases its lock), or is SIGKILLed at the
    store's named step ``kill_at`` (``ACQD_STORE_KILL_AT``). With ``corrupt_row``, the child first flips
    one bit of that index row through its own open file, as a torn write would leave it (a dead SWMR
    writer's file cannot be reopened for writing by anyone else)."""
    path = tmp_path / "night.h5"
    env = {**os.environ, "ACQD_STORE_KILL_AT": kill_at}
    done = subprocess.run([sys.executable, "-c", DYING_WRITER, str(TESTS), str(path), str(corrupt_row), *map(str, seeds)],
                          env=env, timeout=120, check=False)
    assert done.returncode == (-9 if kill_at else 0)
    assert StorePaths(path).with_state(0, LIVE).exists()
    return path


def test_recovery_keeps_every_record_of_a_clean_live_segment(tmp_path: Path):
    path = live_segment_of(tmp_path, [1, 2, 3])
    notes = recover_store(StorePaths(path))
    assert len(notes) == 1 and "recovered 3 record(s) into night.000000.h5" in notes[0]
    assert "dropped" not in notes[0] and not list(tmp_path.glob("*.part")) and not list(tmp_path.glob("*.damaged"))
    with open_records(path) as reader:
        assert [crc_of(r) for r in reader] == [crc_of(make_record(s)) for s in (1, 2, 3)]


def test_recovery_drops_only_an_unacknowledged_last_record(tmp_path: Path):
    # Killed after the 4th record's samples reached the file but before its index row: append() had not
    # returned, so that record may go, and nothing else.
    path = live_segment_of(tmp_path, [1, 2, 3, 4], kill_at="append:data-flushed@4")
    notes = recover_store(StorePaths(path))
    assert "recovered 3 record(s)" in notes[0] and "dropped the unacknowledged last record" in notes[0]
    assert not list(tmp_path.glob(f"*{DAMAGED}"))
    with open_records(path) as reader:
        assert [crc_of(r) for r in reader] == [crc_of(make_record(s)) for s in (1, 2, 3)]


def test_recovery_keeps_the_original_when_more_than_the_last_row_fails(tmp_path: Path):
    path = live_segment_of(tmp_path, [1, 2, 3, 4], corrupt_row=2)
    part = StorePaths(path).with_state(0, LIVE)
    notes = recover_store(StorePaths(path))
    assert "recovered 2 record(s)" in notes[0] and "2 row(s) failed verification" in notes[0]
    assert (tmp_path / f"night.000000.h5{DAMAGED}").exists() and not part.exists()
    with open_records(path) as reader:
        assert [crc_of(r) for r in reader] == [crc_of(make_record(s)) for s in (1, 2)]


def test_recovery_moves_an_unreadable_segment_aside(tmp_path: Path):
    path = live_segment_of(tmp_path, [1])
    part = StorePaths(path).with_state(0, LIVE)
    part.write_bytes(b"not an HDF5 file at all")
    notes = recover_store(StorePaths(path))
    assert "cannot be read" in notes[0] and "moved aside to night.000000.h5.damaged" in notes[0]
    assert (tmp_path / f"night.000000.h5{DAMAGED}").read_bytes() == b"not an HDF5 file at all"


def test_recovery_of_a_live_segment_that_never_held_a_record(tmp_path: Path):
    path = live_segment_of(tmp_path, [1], kill_at="append:data-flushed@1")
    part = StorePaths(path).with_state(0, LIVE)
    notes = recover_store(StorePaths(path))
    assert "held no complete record" in notes[0]
    assert not part.exists() and not (tmp_path / "night.000000.h5").exists()


def test_recovery_removes_leftovers_of_creation_and_of_an_earlier_recovery(tmp_path: Path):
    path = tmp_path / "night.h5"
    write_store(path, [1, 2])
    paths = StorePaths(path)
    creating, recovering = paths.with_state(1, CREATING), paths.with_state(1, RECOVERING)
    creating.write_bytes(b"")
    recovering.write_bytes(b"")
    stale = paths.with_state(0, LIVE)  # a .part whose records were already recovered into the finished file
    stale.write_bytes(b"")
    notes = recover_store(paths)
    assert sorted(n.split(": ", 1)[1] for n in notes) == sorted([
        "removed a new segment that never held a record", "removed an interrupted recovery copy",
        f"removed; its records were already recovered into {paths.finished(0)}"])
    assert not creating.exists() and not recovering.exists() and not stale.exists()
