"""The store's write and recovery side against its stated rules, on files real writers left behind.

The rules are the README's ("What survives a crash") and ``acqd/store/recovery.py``'s: the next writer
copies the verified prefix of a dead writer's ``.part`` into a plain finished file; the ``.part`` is
deleted when all it lost was the one unacknowledged record, kept as ``.damaged`` when more failed, and
moved aside whole when it cannot be read; a copy that cannot be written refuses the store and leaves the
``.part`` alone; a record index is never given out twice; a failed write refuses every later append and
keeps every acknowledged record. Recovery's child side (``recovery.main``: ``examine`` and ``copy``) is
called here in this process as well as through the child, so the checks reach it directly.

The damage is real: writers are child processes that die (``os._exit`` without closing, or SIGKILL at a
named step), some after flipping one bit of their own file; a full disk is the kernel's file-size limit
(RLIMIT_FSIZE, POSIX setrlimit(2): a write past it fails with EFBIG, "File too large", since Python
ignores SIGXFSZ and a child of it inherits the limit). Every file is read back with h5py (the HDF5
project's binding) and every record checked against its samples regenerated from its seed, with the
CRC-32 recomputed by zlib (``test_store.crc_of``).
"""

from __future__ import annotations

import json
import logging
import os
import resource
import shutil
import signal
import subprocess
import sys
import threading
import time
from contextlib import contextmanager
from pathlib import Path

import h5py
import numpy as np
import pytest

from acqd.errors import ConfigError
from acqd.record import Channel
from acqd.store import RecordStore, faults, open_records, recovery
from acqd.store.faults import ENV as KILL_ENV
from acqd.store.naming import DAMAGED, LIVE, RECOVERING, StorePaths
from test_store import crc_of, make_record, write_store
from test_store_rules import craft, reseal

TESTS = Path(__file__).resolve().parent

# A writer that appends the seeds, optionally flips one bit of its own open file (a torn or decayed
# write, through the writer's own handle: nobody else may open a SWMR writer's file for writing), and
# dies without closing anything (os._exit), or is SIGKILLed at a named step by ACQD_STORE_KILL_AT.
DYING_WRITER = """
import json, os, sys
spec = json.loads(sys.argv[1])
sys.path.insert(0, spec["tests"])
import numpy as np
from test_store import make_record
from acqd.store import RecordStore
store = RecordStore(spec["store"], rotate_records=spec["rotate"])
for seed in spec["seeds"]:
    store.append(make_record(seed))
h5 = store._live._h5
for dataset, position in spec["flips"]:
    if dataset == "index":  # a bit of the row's record index: its CRC no longer matches
        row = h5["index"][position:position + 1]
        row["index"] ^= 1 << 40
        h5["index"][position:position + 1] = row
    elif dataset == "samples":  # the lowest mantissa bit of the record's first sample
        block = h5["samples"][position]
        block.view(np.uint64)[0, 0] ^= 1
        h5["samples"][position] = block
    else:  # the first byte of the record's analysis blob
        at = int(h5["index"][position]["analysis_offset"])
        h5["blobs"][at] = h5["blobs"][at] ^ 0xFF
h5.flush()
os._exit(0)
"""


def dead_writer(store: Path, seeds: list[int], *, rotate: int = 100, flips: tuple = (), kill_at: str = "") -> int:
    """Run a writer that dies as described above; its exit status (-9 when killed at ``kill_at``)."""
    spec = {"tests": str(TESTS), "store": str(store), "rotate": rotate, "seeds": seeds, "flips": list(flips)}
    env = {k: v for k, v in os.environ.items() if k != KILL_ENV}
    if kill_at:
        env[KILL_ENV] = kill_at
    done = subprocess.run([sys.executable, "-c", DYING_WRITER, json.dumps(spec)], env=env, timeout=120, check=False)
    return done.returncode


def stored(path: Path) -> list[tuple[int, int]]:
    """(index, CRC-32 of the samples) of every record the reader lists, read in full."""
    with open_records(path) as reader:
        return [(r.index, r.checksum()) for r in reader]


def expected(first_index: int, seeds: list[int]) -> list[tuple[int, int]]:
    """The same for records regenerated from their seeds, CRC-32 recomputed with zlib."""
    return [(first_index + k, crc_of(make_record(s))) for k, s in enumerate(seeds)]


def h5_indices(path: Path, *, swmr: bool = False) -> list[int]:
    """The record index of every row of a segment's /index, as h5py reads it (verified or not)."""
    with h5py.File(path, "r", swmr=swmr) as f:
        return [int(i) for i in f["index"]["index"]]


def child_main(argv: list[str], capsys: pytest.CaptureFixture) -> tuple[int, dict | None, str]:
    """Recovery's child side called in this process: (exit status, its JSON report or None, its stderr)."""
    status = recovery.main(argv)
    out, err = capsys.readouterr()
    return status, (json.loads(out) if out.strip() else None), err


@contextmanager
def file_size_limit(limit_bytes: int):
    """A full disk for this process and its children: writes past ``limit_bytes`` fail with EFBIG."""
    soft, hard = resource.getrlimit(resource.RLIMIT_FSIZE)
    resource.setrlimit(resource.RLIMIT_FSIZE, (limit_bytes, hard))
    try:
        yield
    finally:
        resource.setrlimit(resource.RLIMIT_FSIZE, (soft, hard))


def segment_files(folder: Path) -> set[str]:
    """The names in ``folder`` but the lock file (a dead writer leaves it; the kernel released its flock)."""
    return {p.name for p in folder.iterdir() if not p.name.endswith(".lock")}


def part_of(path: Path, number: int = 0) -> Path:
    return StorePaths(path).with_state(number, LIVE)


# --- the child side: examine ---------------------------------------------------------------------------

def test_examine_reports_what_a_dead_writers_segment_holds(tmp_path: Path, capsys):
    path = tmp_path / "night.h5"
    write_store(path, [1, 2, 3], rotate_records=3)  # segment 0 holds records 0-2
    assert dead_writer(path, [4, 5], rotate=3) == 0  # segment 1, live, records 3-4
    part = part_of(path, 1)
    status, report, err = child_main(["examine", str(part)], capsys)
    # h5py (opened as a SWMR reader, the README's rule for a .part) is the reference for the counts
    assert h5_indices(part, swmr=True) == [3, 4]
    assert (status, report, err) == (0, {"rows": 2, "first_index": 3, "index_rows": 2}, "")
    assert recovery.examine(part) == "" and recovery.damaged_extent(part) == (3, 2)


def test_examine_of_a_segment_whose_first_row_fails_has_no_first_index(tmp_path: Path, capsys):
    path = tmp_path / "night.h5"
    assert dead_writer(path, [1, 2, 3], flips=[("index", 0)]) == 0
    status, report, _ = child_main(["examine", str(part_of(path))], capsys)
    assert status == 0 and report == {"rows": 0, "first_index": None, "index_rows": 3}
    assert recovery.damaged_extent(part_of(path)) == (None, 3)


@pytest.mark.parametrize("command", ["examine", "copy"])
@pytest.mark.parametrize("content", ["not HDF5", "HDF5 of another program"])
def test_the_child_refuses_a_file_that_is_not_a_segment(tmp_path: Path, capsys, command, content):
    part = tmp_path / "night.000000.h5.part"
    if content == "not HDF5":
        part.write_bytes(b"not an HDF5 file at all")
    else:
        with h5py.File(part, "w") as f:  # valid HDF5 (h5py) without acqd's format attribute
            f["x"] = np.arange(3)
    dest = tmp_path / "copy.h5"
    status, report, err = child_main([command, str(part), str(dest)], capsys)
    assert status == recovery.NOT_A_STORE == 3 and report is None and not dest.exists()
    assert err.count("\n") == 1 and err.startswith(f"{part}: not an acqd record file")
    why = recovery.examine(part)  # the same line, through a real child process
    assert why == err.strip() and recovery.damaged_extent(part) == why


# --- the child side: copy ------------------------------------------------------------------------------

@pytest.mark.parametrize("flip, kept", [
    (None, 4),
    (("index", 2), 2),  # row 2's CRC fails: rows 0-1 are the verified prefix
    (("samples", 1), 1),  # record 1's samples fail their CRC-32
    (("blobs", 3), 3),  # record 3's analysis fails its CRC-32
])
def test_copy_keeps_the_verified_prefix_in_a_plain_file(tmp_path: Path, capsys, flip, kept):
    path, dest = tmp_path / "night.h5", tmp_path / "copy.h5"
    seeds = [1, 2, 3, 4]
    assert dead_writer(path, seeds, flips=[flip] if flip else []) == 0
    status, report, err = child_main(["copy", str(part_of(path)), str(dest)], capsys)
    assert (status, err) == (0, "") and report == {"kept": kept, "index_rows": 4, "sample_chunks": 4}
    # The copy is a closed, plain HDF5 file: h5py opens it without SWMR and it holds the prefix exactly.
    assert h5_indices(dest) == list(range(kept))
    with h5py.File(dest, "r") as f:
        for k, seed in enumerate(seeds[:kept]):
            np.testing.assert_array_equal(f["samples"][k], [c.samples for c in make_record(seed).channels])
    assert stored(dest) == expected(0, seeds[:kept])


def test_copy_of_a_segment_without_a_complete_record_writes_nothing(tmp_path: Path, capsys):
    # Killed after the first record's samples were flushed, before its index row: no row at all.
    path, dest = tmp_path / "night.h5", tmp_path / "copy.h5"
    assert dead_writer(path, [1], kill_at="append:data-flushed@1") == -signal.SIGKILL
    status, report, _ = child_main(["copy", str(part_of(path)), str(dest)], capsys)
    assert status == 0 and report == {"kept": 0, "index_rows": 0, "sample_chunks": 1} and not dest.exists()


@pytest.mark.parametrize("limit", ["nothing", "about half"])
def test_a_copy_that_cannot_be_written_says_why(tmp_path: Path, capsys, limit):
    path, dest = tmp_path / "night.h5", tmp_path / "copy.h5"
    assert dead_writer(path, list(range(1, 11))) == 0
    size = part_of(path).stat().st_size
    with file_size_limit(0 if limit == "nothing" else size // 2):
        status, report, err = child_main(["copy", str(part_of(path)), str(dest)], capsys)
    assert status == recovery.CANNOT_WRITE == 4 and report is None
    assert err == f"{os.strerror(27)}\n"  # EFBIG (errno 27 on Linux, asm-generic/errno-base.h): "File too large"


# --- the parent side: the child process and what recovery does with its answer ---------------------------

def test_a_child_that_does_not_finish_is_given_up(tmp_path: Path, monkeypatch):
    # A FIFO in place of the .part: opening it for reading blocks until a writer comes, which none does
    # (fifo(7)), as a file on a hung network mount would.
    monkeypatch.setattr(recovery, "CHILD_TIMEOUT_S", 2.0)
    path = tmp_path / "night.h5"
    os.mkfifo(part_of(path))
    assert recovery.examine(part_of(path)) == "opening it did not finish within 2 s"
    notes = recovery.recover_store(StorePaths(path))
    assert notes == [f"{part_of(path)}: cannot be read (opening it did not finish within 2 s); moved aside to "
                     f"night.000000.h5{DAMAGED}, its records are not listed"]
    assert not part_of(path).exists() and (tmp_path / f"night.000000.h5{DAMAGED}").exists()


def _kill_the_child_that_opens(target: Path, found: list[int]) -> None:
    """SIGKILL (by its id) the recovery child of this process whose command line names ``target``."""
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline and not found:
        for entry in Path("/proc").iterdir():
            if not entry.name.isdigit():
                continue
            try:
                stat = (entry / "stat").read_text()
                argv = (entry / "cmdline").read_bytes().split(b"\0")
            except OSError:
                continue
            parent = int(stat.rsplit(")", 1)[1].split()[1])  # proc(5): field 4 of /proc/PID/stat is the ppid
            if parent == os.getpid() and str(target).encode() in argv:
                os.kill(int(entry.name), signal.SIGKILL)
                found.append(int(entry.name))
                return
        time.sleep(0.05)


def test_a_child_killed_by_a_signal_is_named(tmp_path: Path):
    # The child blocks on a FIFO (as above) and is SIGKILLed meanwhile, as the kernel's OOM killer would.
    path = tmp_path / "night.h5"
    os.mkfifo(part_of(path))
    found: list[int] = []
    killer = threading.Thread(target=_kill_the_child_that_opens, args=(part_of(path), found))
    killer.start()
    notes = recovery.recover_store(StorePaths(path))
    killer.join()
    assert found and notes == [
        f"{part_of(path)}: cannot be read (the process opening it died of signal {int(signal.SIGKILL)}); "
        f"moved aside to night.000000.h5{DAMAGED}, its records are not listed"]


@pytest.mark.parametrize("damage", ["not HDF5", "an HDF5 signature, then zeros"])
def test_an_unreadable_segment_is_moved_aside_whole_with_the_childs_reason(tmp_path: Path, damage):
    path = tmp_path / "night.h5"
    assert dead_writer(path, [1, 2, 3]) == 0
    part = part_of(path)
    # (A .part cut short is not used here: HDF5's SWMR open of one ran past 40 s, so it is given up only
    # after CHILD_TIMEOUT_S, as in the FIFO test below.) The signature is HDF5's format specification's.
    content = b"not an HDF5 file at all" if damage == "not HDF5" else b"\x89HDF\r\n\x1a\n" + b"\0" * 100
    part.write_bytes(content)
    notes = recovery.recover_store(StorePaths(path))
    assert len(notes) == 1 and notes[0].startswith(f"{part}: cannot be read (")
    assert notes[0].endswith(f"); moved aside to night.000000.h5{DAMAGED}, its records are not listed")
    if damage == "not HDF5":  # the child's one line, as it said it
        assert f"cannot be read ({part}: not an acqd record file: HDF5 cannot open it (" in notes[0]
    assert (tmp_path / f"night.000000.h5{DAMAGED}").read_bytes() == content
    assert not part.exists() and not list(tmp_path.glob(f"*{RECOVERING}"))


@pytest.mark.parametrize("flip, outcome", [
    (None, "recovered 4 record(s) into night.000000.h5"),
    # The last row fails: that record's append had not returned (its row is written last), so it may go.
    (("index", 3), "recovered 3 record(s) into night.000000.h5; dropped the unacknowledged last record"),
    (("index", 2), f"recovered 2 record(s) into night.000000.h5; 2 row(s) failed verification, the original "
                   f"is kept as night.000000.h5{DAMAGED}"),
    (("index", 0), f"held no complete record; 4 row(s) failed verification, the original is kept as "
                   f"night.000000.h5{DAMAGED}"),
])
def test_each_outcome_of_recovering_a_live_segment(tmp_path: Path, caplog, flip, outcome):
    path = tmp_path / "night.h5"
    seeds = [1, 2, 3, 4]
    assert dead_writer(path, seeds, flips=[flip] if flip else []) == 0
    with caplog.at_level(logging.WARNING, logger="acqd.store"):
        notes = recovery.recover_store(StorePaths(path))
    assert notes == [f"{part_of(path)}: {outcome}"]
    assert [(r.name, r.levelno, r.getMessage()) for r in caplog.records] == [("acqd.store", logging.WARNING, notes[0])]
    kept = int(outcome.split()[1]) if outcome.startswith("recovered") else 0
    assert not part_of(path).exists() and not list(tmp_path.glob(f"*{RECOVERING}"))
    damaged = tmp_path / f"night.000000.h5{DAMAGED}"
    assert damaged.exists() == ("kept as" in outcome)
    if damaged.exists():  # the original, every row of it, as the dead writer left it (h5py)
        assert len(h5_indices(damaged, swmr=True)) == 4
    assert (tmp_path / "night.000000.h5").exists() == (kept > 0)
    if kept:
        assert stored(path) == expected(0, seeds[:kept])


@pytest.mark.parametrize("step, left", [
    ("recover:copied", {f"night.000000.h5{RECOVERING}", f"night.000000.h5{LIVE}"}),
    ("recover:renamed", {"night.000000.h5", f"night.000000.h5{LIVE}"}),
])
def test_a_recovery_killed_midway_is_finished_by_the_next(tmp_path: Path, step, left):
    path = tmp_path / "night.h5"
    assert dead_writer(path, [1, 2, 3]) == 0
    env = {**os.environ, KILL_ENV: step}
    script = "import sys; from acqd.store import recovery; from acqd.store.naming import StorePaths; recovery.recover_store(StorePaths(sys.argv[1]))"
    done = subprocess.run([sys.executable, "-c", script, str(path)], env=env, timeout=120, check=False)
    assert done.returncode == -signal.SIGKILL
    assert segment_files(tmp_path) == left
    notes = recovery.recover_store(StorePaths(path))
    assert len(notes) == (2 if step == "recover:copied" else 1)
    assert segment_files(tmp_path) == {"night.000000.h5"}
    assert stored(path) == expected(0, [1, 2, 3])


def test_the_copy_child_is_never_given_the_writers_kill_point(tmp_path: Path):
    # The copy child writes records with the writer's own code, which passes the append kill points; a
    # process told to die at one (a crash test's restarted writer) must still recover, not lose its .part
    # to a child that killed itself.
    path = tmp_path / "night.h5"
    assert dead_writer(path, [1, 2, 3]) == 0
    env = {**os.environ, KILL_ENV: "append:blobs"}
    script = "import sys; from acqd.store import recovery; from acqd.store.naming import StorePaths; " \
             "print(recovery.recover_store(StorePaths(sys.argv[1])))"
    done = subprocess.run([sys.executable, "-c", script, str(path)], env=env, timeout=120, check=False,
                          capture_output=True, text=True)
    assert done.returncode == 0 and "recovered 3 record(s) into night.000000.h5" in done.stdout
    assert recovery.recover_store(StorePaths(path)) == []  # nothing left to do
    assert segment_files(tmp_path) == {"night.000000.h5"} and stored(path) == expected(0, [1, 2, 3])


def test_a_full_disk_during_recovery_refuses_the_store_and_keeps_the_part(tmp_path: Path):
    path = tmp_path / "night.h5"
    assert dead_writer(path, list(range(1, 11))) == 0
    before = part_of(path).read_bytes()
    with file_size_limit(len(before) // 2), pytest.raises(ConfigError) as refused:
        RecordStore(path)  # the recovery child inherits the limit
    assert str(refused.value) == (f"{path}: night.000000.h5{LIVE} cannot be recovered: writing its copy failed "
                                  f"(File too large); it is kept as it is (acqd ls reads it); free space and open "
                                  f"the store again")
    assert part_of(path).read_bytes() == before and not list(tmp_path.glob(f"*{RECOVERING}"))
    assert not list(tmp_path.glob(f"*{DAMAGED}")) and not StorePaths(path).lock.exists()
    assert stored(path) == expected(0, list(range(1, 11)))  # acqd ls reads the .part meanwhile
    with RecordStore(path) as store:  # room again: the next writer recovers everything and continues
        assert store.append(make_record(11)) == 10
    assert stored(path) == expected(0, list(range(1, 12)))


# --- the writer: where it resumes --------------------------------------------------------------------

def test_a_damaged_segment_keeps_every_index_its_rows_held(tmp_path: Path):
    path = tmp_path / "night.h5"
    assert dead_writer(path, [1, 2, 3, 4], flips=[("index", 2)]) == 0
    with RecordStore(path) as store:
        assert any("kept as night.000000.h5.damaged" in n for n in store.notes)
        assert store.append(make_record(5)) == 4  # rows 2-3 of the .damaged held records 2 and 3
    assert h5_indices(tmp_path / f"night.000000.h5{DAMAGED}", swmr=True) == [0, 1, 2 + (1 << 40), 3]
    assert h5_indices(tmp_path / "night.000001.h5") == [4]  # the next segment number


def test_a_damaged_segment_without_a_verified_row_counts_from_the_segment_before(tmp_path: Path):
    path = tmp_path / "night.h5"
    write_store(path, [1, 2, 3], rotate_records=3)  # records 0-2 in segment 0
    assert dead_writer(path, [4, 5], rotate=3, flips=[("index", 0)]) == 0  # records 3-4, row 0 torn
    with RecordStore(path, rotate_records=3) as store:
        assert store.append(make_record(6)) == 5
    assert h5_indices(tmp_path / "night.000002.h5") == [5]


def test_an_unreadable_damaged_segment_is_assumed_full(tmp_path: Path):
    path = tmp_path / "night.h5"
    write_store(path, [1, 2, 3], rotate_records=3)
    (tmp_path / f"night.000001.h5{DAMAGED}").write_bytes(b"not HDF5")
    with RecordStore(path, rotate_records=4) as store:
        assert store.append(make_record(4)) == 3 + 4
    assert store.notes[-1].startswith(f"{tmp_path / 'night.000001.h5.damaged'}: cannot be opened (")
    assert store.notes[-1].endswith("); indices 3 to 6 are left unused in case it held them")
    assert h5_indices(tmp_path / "night.000002.h5") == [7]


@pytest.mark.parametrize("row", [0, 1])
def test_a_finished_segment_with_a_failing_row_keeps_every_index_its_rows_held(tmp_path: Path, row):
    # README: "the next writer continues after every index any segment ever held". A row of a finished
    # segment that decays later (one bit flipped with h5py) still held its record.
    path = tmp_path / "night.h5"
    write_store(path, [1, 2, 3, 4, 5, 6], rotate_records=3)
    with h5py.File(tmp_path / "night.000001.h5", "r+") as f:
        rows = f["index"][:]
        rows["index"][row] ^= 1 << 40
        f["index"][:] = rows
    with RecordStore(path, rotate_records=3) as store:
        assert store.append(make_record(7)) == 6
    with open_records(path) as reader:
        assert [s.index for s in reader.index()] == [0, 1, 2, *range(3, 3 + row), 6]


# --- the writer: failures while appending and finishing ---------------------------------------------------

def test_a_full_disk_while_appending_refuses_every_later_append_and_keeps_the_acknowledged(tmp_path: Path):
    path = tmp_path / "night.h5"
    store = RecordStore(path)
    acknowledged = [store.append(make_record(s)) for s in (1, 2, 3)]
    with file_size_limit(part_of(path).stat().st_size), pytest.raises(ConfigError) as refused:
        for seed in range(4, 40):
            acknowledged.append(store.append(make_record(seed)))
    failure = (f"{path}: record {len(acknowledged)} was not stored: writing failed (File too large); every "
               f"record acknowledged before it is kept, the next writer recovers them")
    assert str(refused.value) == failure
    with pytest.raises(ConfigError) as again:  # room again, but this writer's live file is in an unknown state
        store.append(make_record(99))
    assert str(again.value) == failure
    store.close()
    assert part_of(path).exists() and not StorePaths(path).lock.exists()
    seeds = [1, 2, 3, *range(4, 4 + len(acknowledged) - 3)]
    assert stored(path) == expected(0, seeds)  # readable at once, before any recovery
    with RecordStore(path) as store:
        assert store.append(make_record(50)) == len(acknowledged)
    assert stored(path) == expected(0, [*seeds, 50])


def test_a_full_disk_when_a_segment_is_created_leaves_no_file_behind(tmp_path: Path):
    path = tmp_path / "night.h5"
    store = RecordStore(path, rotate_records=1)
    assert store.append(make_record(1)) == 0  # finished at once: the next append creates segment 1
    with file_size_limit(0), pytest.raises(ConfigError, match=r"record 1 was not stored: writing failed \(File"):
        store.append(make_record(2))
    store.close()
    assert {p.name for p in tmp_path.iterdir()} == {"night.000000.h5", "night.h5"}  # no .init, no .part


def test_an_interrupted_append_refuses_later_ones_until_the_store_is_reopened(tmp_path: Path, monkeypatch):
    # Ctrl-C arriving after the record's samples were written, before its index row (through the store's
    # own fault-injection hook, here raising where a crash test would SIGKILL).
    path = tmp_path / "night.h5"
    store = RecordStore(path)
    store.append(make_record(1))

    def interrupt(name: str) -> None:
        if name == "append:samples":
            raise KeyboardInterrupt

    monkeypatch.setattr(faults, "step", interrupt)
    with pytest.raises(KeyboardInterrupt):
        store.append(make_record(2))
    monkeypatch.undo()
    with pytest.raises(ConfigError) as refused:
        store.append(make_record(3))
    assert str(refused.value) == (f"{path}: an earlier append was interrupted; reopen the store to recover it; "
                                  "every record acknowledged before it is kept, the next writer recovers them")
    store.close()
    with RecordStore(path) as again:
        assert again.notes == [f"{part_of(path)}: recovered 1 record(s) into night.000000.h5; dropped the "
                               "unacknowledged last record"]
        assert again.append(make_record(3)) == 1
    assert stored(path) == expected(0, [1, 3])


def test_a_segment_that_cannot_be_finished_keeps_its_records(tmp_path: Path):
    path = tmp_path / "night.h5"
    store = RecordStore(path, rotate_records=2)
    assert store.append(make_record(1)) == 0
    (tmp_path / "night.000000.h5").mkdir()  # a directory in the way of the finished name: rename(2) fails
    assert store.append(make_record(2)) == 1  # durable in the .part, so acknowledged
    with pytest.raises(ConfigError) as refused:
        store.append(make_record(3))
    assert str(refused.value) == (f"{path}: segment 0 was not finished (Is a directory); every record "
                                  "acknowledged before it is kept, the next writer recovers them")
    store.close()
    (tmp_path / "night.000000.h5").rmdir()
    with RecordStore(path, rotate_records=2) as store:
        assert store.append(make_record(3)) == 2
    assert stored(path) == expected(0, [1, 2, 3])


def test_closing_a_segment_that_cannot_be_finished_is_one_line_and_releases_the_store(tmp_path: Path):
    path = tmp_path / "night.h5"
    store = RecordStore(path)
    store.append(make_record(1))
    (tmp_path / "night.000000.h5").mkdir()
    with pytest.raises(ConfigError) as refused:
        store.close()
    assert str(refused.value) == (f"{path}: the live segment was not finished (Is a directory); the next writer "
                                  "recovers its records")
    assert not StorePaths(path).lock.exists()
    store.close()  # a second close does nothing
    (tmp_path / "night.000000.h5").rmdir()
    with RecordStore(path) as store:
        assert store.append(make_record(2)) == 1
    assert stored(path) == expected(0, [1, 2])


def test_an_overview_that_cannot_be_written_is_a_note_not_a_failure(tmp_path: Path):
    path = tmp_path / "night.h5"
    store = RecordStore(path, rotate_records=1)
    (tmp_path / "night.h5.overview").mkdir()  # the overview's temporary name is taken by a directory
    assert store.append(make_record(1)) == 0
    assert len(store.notes) == 1 and store.notes[0].startswith(f"{path}: the overview was not rewritten (")
    assert store.notes[0].endswith("); the segments hold every record")
    assert store.append(make_record(2)) == 1
    store.close()
    assert h5_indices(tmp_path / "night.000000.h5") == [0] and h5_indices(tmp_path / "night.000001.h5") == [1]


def test_segments_rotate_after_exactly_rotate_records(tmp_path: Path):
    path = tmp_path / "night.h5"
    with RecordStore(path, rotate_records=2) as store:
        for seed in (1, 2):
            store.append(make_record(seed))
        assert {p.name for p in tmp_path.iterdir()} == {"night.000000.h5", "night.h5", "night.h5.lock"}
        store.append(make_record(3))
        assert part_of(path, 1).exists() and h5_indices(part_of(path, 1), swmr=True) == [2]
    assert [h5_indices(tmp_path / f"night.00000{k}.h5") for k in (0, 1)] == [[0, 1], [2]]


def test_a_closed_store_refuses_appends(tmp_path: Path):
    path = tmp_path / "night.h5"
    store = RecordStore(path)
    store.close()
    with pytest.raises(ConfigError) as refused:
        store.append(make_record(1))
    assert str(refused.value) == f"{path}: this store is closed"
    assert not list(tmp_path.iterdir())  # no segment was made for a store that never held a record


@pytest.mark.parametrize("rotate", [True, 1.0, -1, "5"])
def test_rotate_records_must_be_a_whole_number_from_one(tmp_path: Path, rotate):
    with pytest.raises(ConfigError) as refused:
        RecordStore(tmp_path / "night.h5", rotate_records=rotate)
    assert str(refused.value) == f"{tmp_path / 'night.h5'}: rotate_records: {rotate!r}; must be an integer >= 1"


def test_a_store_path_that_is_not_a_regular_file_is_refused(tmp_path: Path):
    os.mkfifo(tmp_path / "night.h5")
    with pytest.raises(ConfigError, match=r"night\.h5: is not a regular file \(a device, a pipe or a socket\)"):
        RecordStore(tmp_path / "night.h5")


def test_a_store_where_no_lock_file_can_be_made_is_refused(tmp_path: Path):
    # /proc accepts no new files (proc(5)), whoever asks, root included.
    with pytest.raises(ConfigError) as refused:
        RecordStore("/proc/night.h5")
    assert str(refused.value).startswith("/proc/night.h5: cannot be written: its lock file /proc/night.h5.lock "
                                         "cannot be made (")


def test_a_failed_recovery_releases_the_lock(tmp_path: Path):
    path = tmp_path / "night.h5"
    write_store(path, [1])
    (tmp_path / "night.000001.h5").write_bytes(b"not HDF5")  # a finished name that is no segment
    with pytest.raises(ConfigError, match="not an acqd record file"):
        RecordStore(path)
    assert not StorePaths(path).lock.exists()


# --- the writer: what it asks the disk to make durable ----------------------------------------------------

FSYNC_WRITER = """
import sys
sys.path.insert(0, sys.argv[1])
from test_store import make_record
from acqd.store import RecordStore
with RecordStore(sys.argv[2], rotate_records=2, **({} if sys.argv[3] == "on" else {"fsync": False})) as store:
    for seed in (1, 2, 3):
        store.append(make_record(seed))
"""


@pytest.mark.skipif(shutil.which("strace") is None, reason="strace not installed")
@pytest.mark.parametrize("fsync", ["on", "off"])
def test_fsync_on_makes_every_rename_and_record_durable_and_off_asks_for_nothing(tmp_path: Path, fsync):
    # The rule (POSIX fsync(2), rename(2); common practice on ext4): a file is fsynced before a rename
    # gives it a new name, and a rename survives a power cut only after an fsync of its directory. With
    # fsync on, each segment is fsynced once when created, once per record and once before it is finished;
    # each of the four renames (two segments created, two finished) is followed by an fsync of the folder.
    # With fsync off, nothing is fsynced. strace(1) -y names the file behind each descriptor. "on" is the
    # default (README: fsync = true unless the profile says otherwise), so it is not passed.
    path, log = tmp_path / "store" / "night.h5", tmp_path / "fsync.log"
    path.parent.mkdir()
    done = subprocess.run(["strace", "-f", "-y", "-e", "trace=fsync,fdatasync", "-o", str(log), sys.executable,
                           "-c", FSYNC_WRITER, str(TESTS), str(path), fsync], timeout=120, check=False)
    assert done.returncode == 0
    calls = [line for line in log.read_text().splitlines() if "sync(" in line and "resumed" not in line]
    synced = [line.split("<", 1)[1].split(">", 1)[0] for line in calls]
    per_file = {name: sum(1 for s in synced if Path(s).name.startswith(name)) for name in
                ("night.000000.h5", "night.000001.h5")}
    if fsync == "on":
        assert synced.count(str(path.parent)) == 4 and per_file == {"night.000000.h5": 4, "night.000001.h5": 3}
    else:
        assert calls == []
    # The traced writer stored what this process stores from the same records (zlib CRC-32 of each).
    assert write_store(tmp_path / "here.h5", [1, 2, 3], rotate_records=2, fsync=fsync == "on") == [0, 1, 2]
    assert stored(path) == stored(tmp_path / "here.h5") == expected(0, [1, 2, 3])


def test_a_segment_holds_1000_records_by_default(tmp_path: Path):
    # README, "The store": a segment is finished after rotate_records records, "1000 by default".
    path = tmp_path / "night.h5"
    with RecordStore(path, fsync=False) as store:
        for seed in range(1000):
            store.append(make_record(seed, n_samples=8))
        assert not part_of(path).exists() and len(h5_indices(tmp_path / "night.000000.h5")) == 1000
        store.append(make_record(1000, n_samples=8))
        assert h5_indices(part_of(path, 1), swmr=True) == [1000]


@pytest.mark.parametrize("kill_at", ["rotate:created@2", "rotate:closed@1", "rotate:renamed@1"])
def test_a_writer_killed_while_rotating_loses_nothing(tmp_path: Path, kill_at):
    # Killed while segment 1 is created (the 3rd append), or while segment 0 is closed or renamed (the 2nd
    # append, whose record is already in the .part): records 0 and 1 survive, and the next writer goes on.
    path = tmp_path / "night.h5"
    assert dead_writer(path, [1, 2, 3], rotate=2, kill_at=kill_at) == -signal.SIGKILL
    with RecordStore(path, rotate_records=2) as store:
        assert store.append(make_record(9)) == 2
    assert segment_files(tmp_path) == {"night.000000.h5", "night.000001.h5", "night.h5"}
    assert stored(path) == [*expected(0, [1, 2]), (2, crc_of(make_record(9)))]
    with h5py.File(path, "r") as overview:  # the overview (HDF5 virtual datasets) lists both segments
        assert [int(i) for i in overview["index"]["index"]] == [0, 1, 2]


def test_every_refusal_of_the_writer_names_the_store(tmp_path: Path):
    # The rule for bad input: one line naming the file. Each refusal starts with the store's path.
    path = tmp_path / "night.h5"
    with pytest.raises(ConfigError) as missing:
        RecordStore(tmp_path / "no" / "night.h5")
    assert str(missing.value) == f"{tmp_path / 'no' / 'night.h5'}: directory {tmp_path / 'no'} does not exist"
    with RecordStore(path) as store:
        with pytest.raises(ConfigError) as second:
            RecordStore(path)
        assert str(second.value) == f"{path}: another process is writing this store (it holds {path}.lock)"
        short = make_record(1)
        short.channels[0] = Channel("v_c", "V", np.zeros(10))
        with pytest.raises(ConfigError) as refused:
            store.append(short)
        assert str(refused.value).startswith(f"{path}: record.channels[v_c]: shape (10,)")


def test_writing_resumes_after_a_segment_that_starts_anywhere(tmp_path: Path):
    # A segment's first row sets where its indices start (test_store_rules.py); the next writer continues
    # after its last, not after the count of rows. Indices moved to 100-104, CRCs recomputed with zlib.
    path = tmp_path / "night.h5"
    write_store(path, [1, 2, 3, 4, 5])

    def shift(rows: np.ndarray) -> None:
        rows["index"] += 100
        reseal(rows)

    craft(tmp_path / "night.000000.h5", shift)
    with RecordStore(path) as store:
        assert store.append(make_record(6)) == 105
