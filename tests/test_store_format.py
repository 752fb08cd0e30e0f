"""The read side of the store against its documented format: segments made by the store, then read or
edited with h5py, CRCs recomputed with zlib, as README.md's "Inside a segment" describes them.

The references: the README's segment layout (root attributes ``acqd_format = "acqd-records"`` and
``format_version`` 1 or 2, the three datasets with their types and shapes, the index fields in order with
their text widths, ``row_crc`` last), its h5py-only recipe for reading record ``k``, zlib's CRC-32 (the
ISO 3309 / RFC 1952 polynomial) for every row, blob and sample block, the HDF5 File Format Specification's
file signature, and the project's rule for bad input (one line naming the file, the field and what is
allowed; never a traceback). A file that is not a segment this acqd writes is refused before any row is
read, and left closed; a blob is checked for the shape of the part that refers to it; the reader names
every ``.damaged`` segment beside a store, and which records a store holds when one is asked for that it
does not. The kill points of an append are armed in a forked copy of this process, which really dies.
"""

from __future__ import annotations

import errno
import io
import json
import os
import signal
import subprocess
import sys
import zlib
from pathlib import Path

import h5py
import numpy as np
import pytest

from acqd.errors import ConfigError
from acqd.record import Channel
from acqd.store import RecordStore, faults, open_records
from acqd.store.naming import DAMAGED, LIVE, Segment, StorePaths
from acqd.store.schema import Layout
from acqd.store.segment import SegmentView, create_segment
from test_bench_id import downgrade_to_version_1
from test_store import crc_of, make_record, write_store
from test_store_rules import live_segment_of
from test_tampered_files import tamper_blob

TESTS = Path(__file__).resolve().parent

# README.md, "Inside a segment": the fields of an index row in order (bench_id since version 2, row_crc
# last) and the fixed widths of its text fields in bytes.
BLOB_PARTS = ("channels", "identities", "settings", "dut", "profile_text", "analysis")
README_FIELDS = (
    "index", "utc", "monotonic_s", "n_channels", "n_samples", "sample_interval_s", "pretrigger_samples",
    "stim_shape", "stim_low_v", "stim_high_v", "stim_frequency_hz", "stim_edge", "stim_load",
    "stim_source_resistance_ohm", "stim_edge_time_s", "averages", "acqd_version", "profile_sha256", "verdict",
    "samples_crc", *(f"{part}_{key}" for part in BLOB_PARTS for key in ("offset", "length", "crc")),
    "bench_id", "row_crc",
)
README_TEXT_WIDTHS = {"utc": 40, "stim_shape": 16, "stim_edge": 8, "stim_load": 8, "acqd_version": 32,
                      "profile_sha256": 64, "verdict": 32, "bench_id": 64}


@pytest.fixture
def segment(tmp_path: Path) -> Path:
    """A finished segment of three records (seeds 10, 11, 12), closed by its writer."""
    assert write_store(tmp_path / "night.h5", [10, 11, 12]) == [0, 1, 2]
    return tmp_path / "night.000000.h5"


def is_closed(path: Path) -> bool:
    """HDF5 refuses to open a file for writing while this process holds it open for reading."""
    try:
        h5py.File(path, "r+").close()
    except OSError:
        return False
    return True


def reseal_all(rows: np.ndarray) -> None:
    """row_crc of every row = zlib CRC-32 of the row's bytes before its last 4 (README: "of all the row's
    other bytes")."""
    raw = np.ascontiguousarray(rows).view(np.uint8).reshape(len(rows), rows.dtype.itemsize)
    rows["row_crc"] = [zlib.crc32(r[:-4].tobytes()) for r in raw]


# --- a new segment is laid out as the README says -------------------------------------------------------

def test_a_segment_is_laid_out_as_the_readme_states(segment: Path) -> None:
    with h5py.File(segment, "r") as f:  # h5py's own view of the file
        assert f.attrs["acqd_format"] == "acqd-records" and int(f.attrs["format_version"]) == 2
        samples, index, blobs = f["samples"], f["index"], f["blobs"]
        assert samples.dtype == np.dtype("<f8") and samples.shape == (3, 2, 64)
        assert samples.maxshape == (None, 2, 64) and samples.attrs["axes"] == "record, channel, sample"
        assert samples.chunks == (1, 1, 64)  # "one HDF5 chunk per channel of a record"
        assert index.maxshape == (None,) and blobs.maxshape == (None,)  # "all growing along their first axis"
        assert blobs.dtype == np.uint8 and blobs.ndim == 1
        assert index.dtype.names == README_FIELDS
        for name, width in README_TEXT_WIDTHS.items():
            assert index.dtype[name] == np.dtype(f"S{width}"), name


def test_a_new_segment_holds_nothing_and_never_replaces_a_file(tmp_path: Path) -> None:
    path = tmp_path / "night.000000.h5.init"
    create_segment(path, Layout(2, 64, "<f8"), swmr=False).close()
    with h5py.File(path, "r") as f:  # every dataset starts empty and grows per record (README)
        assert (f["samples"].shape, f["index"].shape, f["blobs"].shape) == ((0, 2, 64), (0,), (0,))
    path.write_bytes(b"someone else's file")
    with pytest.raises(FileExistsError):
        create_segment(path, Layout(2, 64, "<f8"), swmr=False)
    assert path.read_bytes() == b"someone else's file"


def test_the_readmes_h5py_recipe_reads_what_the_store_wrote(tmp_path: Path) -> None:
    # 40 records cross index chunks, and settings of ~1 kB each cross blob chunks: every row, blob and
    # sample block is checked here with h5py, json and zlib alone, as the README's recipe reads them.
    records = []
    for seed in range(40):
        record = make_record(seed)
        record.settings = {"seed": seed, "pad": "x" * (900 + seed)}
        records.append(record)
    with RecordStore(tmp_path / "r.h5", fsync=False) as store:
        for record in records:
            store.append(record)
    with h5py.File(tmp_path / "r.000000.h5", "r") as f:
        rows, blobs = f["index"][:], f["blobs"][:].tobytes()
        raw = rows.view(np.uint8).reshape(len(rows), rows.dtype.itemsize)
        for k, record in enumerate(records):
            assert zlib.crc32(raw[k][:-4].tobytes()) == rows["row_crc"][k]  # row_crc: the other bytes
            assert rows["index"][k] == k
            for part in BLOB_PARTS:
                start, length = int(rows[f"{part}_offset"][k]), int(rows[f"{part}_length"][k])
                piece = blobs[start:start + length]
                assert zlib.crc32(piece) == rows[f"{part}_crc"][k], (k, part)
                value = json.loads(piece)
                expected = getattr(record, part) if part != "channels" else [
                    {"name": c.name, "unit": c.unit, "source": c.source} for c in record.channels]
                assert value == expected, (k, part)
            assert zlib.crc32(f["samples"][k].astype("<f8").tobytes()) == rows["samples_crc"][k] == crc_of(record)


# --- files that are not segments this acqd reads: one line, the file left closed ------------------------

def _drop(name: str):
    def edit(segment: Path) -> None:
        with h5py.File(segment, "r+") as f:
            del f[name]
    return edit


def _attr(name: str, value: object):
    def edit(segment: Path) -> None:
        with h5py.File(segment, "r+") as f:
            if value is None:
                del f.attrs[name]
            else:
                f.attrs[name] = value
    return edit


def _replace(name: str, make):
    def edit(segment: Path) -> None:
        with h5py.File(segment, "r+") as f:
            old = f[name][...]
            del f[name]
            f.create_dataset(name, data=make(old))
    return edit


def _group_instead(name: str):
    def edit(segment: Path) -> None:
        with h5py.File(segment, "r+") as f:
            del f[name]
            f.create_group(name)
    return edit


def _version_1_rows_marked_2(segment: Path) -> None:
    downgrade_to_version_1(segment)  # version-1 rows, resealed with zlib; then the attribute says 2
    _attr("format_version", 2)(segment)


# (edit, field, words the message must hold). What is allowed comes from the README: acqd_format
# "acqd-records", format_version 1 or 2 (an integer), the datasets samples (float64 or float32, records x
# channels x samples), index (the row layout of the version), blobs (uint8, one dimension).
REFUSALS = {
    "no acqd_format": (_attr("acqd_format", None), "", "root attribute acqd_format is None, not 'acqd-records'"),
    "another format": (_attr("acqd_format", "acqd-recordz"), "", "acqd_format is 'acqd-recordz', not 'acqd-records'"),
    "acqd_format a list": (_attr("acqd_format", ["acqd-records", "x"]), "", "acqd_format is ['acqd-records', 'x']"),
    "acqd_format a number": (_attr("acqd_format", 5), "", "acqd_format is 5, not 'acqd-records'"),
    "no format_version": (_attr("format_version", None), "format_version", "None; this acqd reads the integers 1 to 2"),
    "format_version 0": (_attr("format_version", 0), "format_version", "0; this acqd reads the integers 1 to 2"),
    "format_version 3": (_attr("format_version", 3), "format_version", "3; this acqd reads the integers 1 to 2"),
    "format_version text": (_attr("format_version", "two"), "format_version", "'two'; this acqd reads"),
    "format_version digits as text": (_attr("format_version", "2"), "format_version", "'2'; this acqd reads"),
    "format_version 2.5": (_attr("format_version", 2.5), "format_version", "2.5; this acqd reads"),
    "format_version a list": (_attr("format_version", [1, 2]), "format_version", "[1, 2]; this acqd reads"),
    "format_version true": (_attr("format_version", True), "format_version", "True; this acqd reads"),
    "no samples": (_drop("samples"), "samples", "dataset missing: not an acqd record file"),
    "no index": (_drop("index"), "index", "dataset missing: not an acqd record file"),
    "no blobs": (_drop("blobs"), "blobs", "dataset missing: not an acqd record file"),
    "blobs a group": (_group_instead("blobs"), "blobs", "dataset missing"),
    "version 1 rows in a version 2 file": (_version_1_rows_marked_2, "index",
                                           "unexpected row layout for format_version 2"),
    "version 2 rows in a version 1 file": (_attr("format_version", 1), "index",
                                           "unexpected row layout for format_version 1"),
    "samples of two dimensions": (_replace("samples", lambda a: a.reshape(3, -1)), "samples",
                                  "<f8 of shape (3, 128); an acqd record file holds float64 or float32 as "
                                  "(records, channels, samples)"),
    "samples big-endian": (_replace("samples", lambda a: a.astype(">f8")), "samples", ">f8 of shape (3, 2, 64)"),
    "samples float16": (_replace("samples", lambda a: a.astype("<f2")), "samples", "<f2 of shape (3, 2, 64)"),
    "samples integers": (_replace("samples", lambda a: a.astype("<i4")), "samples", "<i4 of shape"),
    "samples without channels": (_replace("samples", lambda a: np.zeros((3, 0, 64))), "samples", "(3, 0, 64)"),
    "samples without samples": (_replace("samples", lambda a: np.zeros((3, 2, 0))), "samples", "(3, 2, 0)"),
    "blobs signed": (_replace("blobs", lambda a: a.astype(np.int8)), "blobs",
                     "must be bytes (uint8, one dimension): not an acqd record file"),
    "blobs of two dimensions": (_replace("blobs", lambda a: a[: len(a) // 2 * 2].reshape(-1, 2)), "blobs",
                                "must be bytes (uint8, one dimension)"),
}


@pytest.mark.parametrize("case", sorted(REFUSALS))
def test_a_file_that_is_not_a_segment_of_this_format_is_refused_in_one_line(segment: Path, case: str) -> None:
    edit, field, words = REFUSALS[case]
    edit(segment)
    with pytest.raises(ConfigError) as refused:
        open_records(segment)
    message = str(refused.value)
    where = f"{segment}: {field}: " if field else f"{segment}: not an acqd record file: "
    assert message.startswith(where) and words in message and "\n" not in message, message
    assert is_closed(segment)  # refused, and not left open


def test_a_fixed_length_format_name_is_the_same_text(segment: Path) -> None:
    # An HDF5 string attribute may be fixed-length (h5py writes numpy bytes so); it is the same name.
    with h5py.File(segment, "r+") as f:
        f.attrs["acqd_format"] = np.bytes_(b"acqd-records")
        f.attrs["format_version"] = np.uint8(2)  # any integer type holds a version
    with open_records(segment) as reader:
        assert [crc_of(r) for r in reader] == [crc_of(make_record(s)) for s in (10, 11, 12)]


def test_a_fixed_length_format_name_that_is_not_utf8_is_refused(segment: Path) -> None:
    with h5py.File(segment, "r+") as f:
        f.attrs["acqd_format"] = np.bytes_(b"\xff\xfe")
    with pytest.raises(ConfigError, match="root attribute acqd_format is '\ufffd\ufffd', not 'acqd-records'"):
        open_records(segment)


def test_version_1_is_the_oldest_read_and_single_channel_single_sample_records_are_read(tmp_path: Path) -> None:
    # The smallest record the format allows (README: at least one channel of at least one sample), in a
    # version-1 file: the lower bounds of every check are inside.
    records = [make_record(seed, n_channels=1, n_samples=1) for seed in range(3)]
    with RecordStore(tmp_path / "one.h5", fsync=False) as store:
        for record in records:
            store.append(record)
    downgrade_to_version_1(tmp_path / "one.000000.h5")
    with open_records(tmp_path / "one.000000.h5") as reader:
        assert [crc_of(r) for r in reader] == [crc_of(r) for r in records] and reader.notes == []
        assert [r.bench_id for r in reader] == ["", "", ""]


def test_a_file_hdf5_cannot_open_is_refused_with_hdf5s_reason(tmp_path: Path) -> None:
    # Without the 8-byte signature \x89HDF\r\n\x1a\n (HDF5 File Format Specification, "Format Signature")
    # a file is not HDF5; the reason given is HDF5's own, as h5py reports it, without its call stack.
    path = tmp_path / "notes.h5"
    path.write_bytes(b"bench notes, not HDF5\n" * 100)
    with pytest.raises(OSError) as hdf5:
        h5py.File(path, "r")
    reason = str(hdf5.value).rsplit("(", 1)[1].rstrip(")")
    with pytest.raises(ConfigError) as refused:
        open_records(path)
    assert str(refused.value) == f"{path}: not an acqd record file: HDF5 cannot open it ({reason})"


class _FailingFile(io.RawIOBase):
    """A file object whose every read fails, as a dropped network share's would."""

    def readable(self) -> bool:
        return True

    def seekable(self) -> bool:
        return True

    def seek(self, offset: int, whence: int = 0) -> int:
        return 0

    def __init__(self, why: str) -> None:
        super().__init__()
        self.why = why

    def readinto(self, buffer) -> int:
        raise OSError(self.why)


def test_a_file_object_that_cannot_be_read_is_refused_with_its_reason() -> None:
    with pytest.raises(ConfigError) as refused:
        SegmentView(Path("archive/x.h5"), live=False, source=_FailingFile("the share went away"))
    assert str(refused.value) == "archive/x.h5: not an acqd record file: HDF5 cannot open it (the share went away)"
    # the reason is what the outer parentheses hold, parentheses inside it kept
    with pytest.raises(ConfigError) as refused:
        SegmentView(Path("archive/x.h5"), live=False, source=_FailingFile("read failed (share nas-2 (archive) gone)"))
    assert str(refused.value).endswith("HDF5 cannot open it (share nas-2 (archive) gone)")


def test_a_folder_where_a_segment_should_be_is_one_line_with_the_systems_words(tmp_path: Path) -> None:
    write_store(tmp_path / "night.h5", [1])
    (tmp_path / "night.000001.h5").mkdir()
    with pytest.raises(ConfigError) as refused:
        open_records(tmp_path / "night.h5")
    # the C library's words for EISDIR (os.strerror), not HDF5's report of the failed read over several lines
    assert str(refused.value) == (f"{tmp_path / 'night.000001.h5'}: not an acqd record file: HDF5 cannot open it "
                                  f"({os.strerror(errno.EISDIR)})")


def test_a_missing_segment_is_not_found_rather_than_refused(tmp_path: Path) -> None:
    # The reader tells a segment renamed or removed under it (FileNotFoundError) from one that is damaged.
    with pytest.raises(FileNotFoundError):
        SegmentView(tmp_path / "night.000007.h5", live=False)


def test_a_segment_reads_alike_from_a_file_object(segment: Path, tmp_path: Path) -> None:
    # An archive hands the reader an open file object; the path then only names it in messages.
    name = Path("archive/bench-1/night/night.000000.h5")
    with open(segment, "rb") as fh:
        view = SegmentView(name, live=False, source=fh)
        try:
            assert [crc_of(view.record(k)) for k in range(3)] == [crc_of(make_record(s)) for s in (10, 11, 12)]
        finally:
            view.close()
    junk = tmp_path / "junk.bin"
    junk.write_bytes(b"\0" * 4096)
    with open(junk, "rb") as fh, pytest.raises(ConfigError, match=r"^archive/x\.h5: not an acqd record file: HDF5"):
        SegmentView(Path("archive/x.h5"), live=False, source=fh)


# --- blobs and samples: each checked against its CRC-32 and the shape of its part -----------------------

def _change(segment: Path, dataset: str, at) -> None:
    """One value changed in place, its CRC left as it was: a byte's lowest bit flipped, a sample negated."""
    with h5py.File(segment, "r+") as f:
        ds = f[dataset]
        ds[at] = ds[at] ^ 0x01 if ds.dtype == np.uint8 else -ds[at]


def test_a_blob_that_fails_its_crc_names_the_record_and_the_part(segment: Path) -> None:
    with h5py.File(segment, "r") as f:
        row = f["index"][1]
    _change(segment, "blobs", int(row["analysis_offset"]) + 3)  # record 1's analysis, its own bytes
    with open_records(segment) as reader:
        assert reader.metadata(0)["analysis"] == make_record(10).analysis
        assert [s.index for s in reader.index()] == [0, 1, 2]  # the listing reads channels only
        with pytest.raises(ConfigError, match=rf"^{segment}: record 1: analysis fails its CRC-32: the file is damaged$"):
            reader.metadata(1)
        with pytest.raises(ConfigError, match="record 1: analysis fails its CRC-32"):
            reader.analyses()


@pytest.mark.parametrize("raw, words", [
    (b"\xff\xfe{}", "dut is not UTF-8 JSON: the file is damaged or was not written by acqd"),
    (b'{"name": "series', "dut is not UTF-8 JSON: the file is damaged or was not written by acqd"),
    (b"[1, 2]", "dut must be an object, not a list of 2: the file was not written by acqd"),
])
def test_a_blob_that_is_not_what_acqd_writes_is_one_line(segment: Path, raw: bytes, words: str) -> None:
    tamper_blob(segment, "dut", raw)  # record 0's dut replaced, with the CRC-32 of the new bytes
    with open_records(segment) as reader:
        with pytest.raises(ConfigError) as refused:
            reader.read(0)
        assert str(refused.value) == f"{segment}: record 0: {words}"
        assert reader.read(1).dut == make_record(11).dut


def test_shared_bytes_are_checked_for_each_part_that_points_at_them(tmp_path: Path) -> None:
    # The writer stores identical bytes once: a record without dut and analysis holds one "null" for both.
    # A hand-made row pointing its profile_text at those bytes has matching CRCs, but a profile is text.
    record = make_record(3)
    record.dut, record.analysis = None, None
    with RecordStore(tmp_path / "n.h5") as store:
        store.append(record)
    segment = tmp_path / "n.000000.h5"
    with h5py.File(segment, "r+") as f:
        rows = f["index"][:]
        assert rows["dut_offset"][0] == rows["analysis_offset"][0]  # one copy of b"null"
        for key in ("offset", "length", "crc"):
            rows[f"profile_text_{key}"] = rows[f"dut_{key}"]
        reseal_all(rows)
        f["index"][:] = rows
    with open_records(segment) as reader:
        with pytest.raises(ConfigError, match=r"record 0: profile_text must be text, not null"):
            reader.read(0)


def test_one_changed_sample_fails_the_records_crc(segment: Path) -> None:
    _change(segment, "samples", (1, 1, 5))  # one sample of record 1 negated
    with open_records(segment) as reader:
        assert [s.checksum for s in reader.index()] == [crc_of(make_record(s)) for s in (10, 11, 12)]
        assert crc_of(reader.read(2)) == crc_of(make_record(12))
        with pytest.raises(ConfigError, match=rf"^{segment}: record 1: samples fail their CRC-32: the file is damaged$"):
            reader.read(1)


def test_each_record_gets_its_own_blobs_from_one_span(tmp_path: Path) -> None:
    # Channel names differ per record, so each row's channels lie at their own offset in the blob dataset.
    records = []
    for seed in range(5):
        record = make_record(seed)
        record.channels = [Channel(f"{c.name}_{seed}", c.unit, c.samples, c.source) for c in record.channels]
        records.append(record)
    with RecordStore(tmp_path / "c.h5", fsync=False) as store:
        for record in records:
            store.append(record)
    with open_records(tmp_path / "c.h5") as reader:
        assert [s.channel_names for s in reader.index()] == [tuple(c.name for c in r.channels) for r in records]
        assert [reader.metadata(k)["channels"][1]["name"] for k in range(5)] == [f"i_l_{k}" for k in range(5)]


# --- the reader over a store: segments, records, damaged files, ranges ----------------------------------

def test_records_are_found_across_segments_at_their_first_and_last_index(tmp_path: Path) -> None:
    write_store(tmp_path / "s.h5", list(range(7)), rotate_records=3)  # segments hold 0-2, 3-5, 6
    with open_records(tmp_path / "s.h5") as reader:
        assert len(reader) == 7
        assert [crc_of(reader.read(k)) for k in range(7)] == [crc_of(make_record(s)) for s in range(7)]
        assert [reader.metadata(k)["index"] for k in range(7)] == list(range(7))
        assert reader.metadata(5)["segment"] == str(tmp_path / "s.000001.h5")
        assert [s.segment for s in reader.index()] == ["s.000000.h5"] * 3 + ["s.000001.h5"] * 3 + ["s.000002.h5"]
        assert reader.refresh() == 7 and reader.refresh() == 7 and reader.notes == []  # nothing new, no damage
        assert [crc_of(r) for r in reader] == [crc_of(make_record(s)) for s in range(7)]
        with pytest.raises(ConfigError, match=r"s\.h5: record: 7 is not in this store; it holds records 0-6$"):
            reader.read(7)
        with pytest.raises(ConfigError, match=r"record: -1 is not in this store"):
            reader.metadata(-1)


def test_a_reader_that_is_closed_holds_no_file_open(tmp_path: Path) -> None:
    write_store(tmp_path / "s.h5", [1, 2, 3], rotate_records=2)
    reader = open_records(tmp_path / "s.h5")
    assert not is_closed(tmp_path / "s.000000.h5")
    with reader:
        assert len(reader) == 3
    assert len(reader) == 0 and list(reader) == []
    assert is_closed(tmp_path / "s.000000.h5") and is_closed(tmp_path / "s.000001.h5")


@pytest.fixture
def damaged_store(tmp_path: Path) -> Path:
    """Segments 0-4 of two records each (0-1, 2-3, 4-5, 6-7, 8-9); then segment 1 a .damaged file that is not
    HDF5 at all, segment 2 set aside as .damaged whole, and segment 3 .damaged with its first row failing."""
    path = tmp_path / "night.h5"
    write_store(path, list(range(10)), rotate_records=2)
    paths = StorePaths(path)
    paths.finished(1).unlink()
    paths.with_state(1, DAMAGED).write_bytes(b"half a segment")
    paths.finished(2).rename(paths.with_state(2, DAMAGED))
    with h5py.File(paths.finished(3), "r+") as f:
        rows = f["index"][:]
        rows["index"][0] ^= 1 << 40  # a flipped bit, CRC not recomputed
        f["index"][:] = rows
    paths.finished(3).rename(paths.with_state(3, DAMAGED))
    return path


def test_every_damaged_segment_is_noted_with_what_its_index_holds(damaged_store: Path) -> None:
    paths = StorePaths(damaged_store)
    with open_records(damaged_store) as reader:
        assert [s.index for s in reader.index()] == [0, 1, 8, 9]
        notes = reader.notes
        with pytest.raises(ConfigError, match=r"record: 2 is not in this store; it holds records 0-1, 8-9$"):
            reader.read(2)
    assert notes[0].startswith(f"{paths.with_state(1, DAMAGED)}: damaged segment, not listed; it cannot be opened (")
    assert notes[1] == f"{paths.with_state(2, DAMAGED)}: damaged segment, not listed; its index holds 2 record(s) (records 4-5)"
    # the first row fails, so no first record index is known: only how many rows the index holds
    assert notes[2] == f"{paths.with_state(3, DAMAGED)}: damaged segment, not listed; its index holds 2 record(s)"
    assert len(notes) == 3


def test_a_segment_read_by_its_own_name_notes_no_other_file(damaged_store: Path) -> None:
    with open_records(damaged_store.with_name("night.000004.h5")) as reader:
        assert [s.index for s in reader.index()] == [8, 9] and reader.notes == []


def test_a_store_of_one_damaged_segment_opens_with_its_note(tmp_path: Path) -> None:
    path = tmp_path / "night.h5"
    write_store(path, [1, 2])
    path.unlink()  # no overview, no finished segment: only the .damaged file is left
    StorePaths(path).finished(0).rename(StorePaths(path).with_state(0, DAMAGED))
    with open_records(path) as reader:
        assert len(reader) == 0 and len(reader.notes) == 1 and "its index holds 2 record(s) (records 0-1)" in reader.notes[0]
        with pytest.raises(ConfigError, match=r"record: 0 is not in this store; it holds no records$"):
            reader.read(0)


def test_an_empty_damaged_segment_shows_no_record_span(tmp_path: Path) -> None:
    path = tmp_path / "night.h5"
    write_store(path, [1, 2])
    paths = StorePaths(path)
    with h5py.File(paths.finished(0), "r+") as f:
        f["index"].resize(0, axis=0)
    paths.finished(0).rename(paths.with_state(0, DAMAGED))
    with open_records(path) as reader:
        assert reader.notes == [f"{paths.with_state(0, DAMAGED)}: damaged segment, not listed; its index holds 0 record(s)"]


def test_a_store_whose_writer_has_not_written_yet_is_empty_not_missing(tmp_path: Path) -> None:
    path = tmp_path / "night.h5"
    with RecordStore(path):  # holds the lock file; no segment until the first append
        with open_records(path) as reader:
            assert len(reader) == 0 and reader.notes == [] and reader.index() == []
    with pytest.raises(ConfigError, match=r"night\.h5: no such record store: no file and no segments "
                                          r"night\.NNNNNN\.h5\[\.part\] there$"):
        open_records(path)


def test_a_live_segment_that_cannot_be_opened_is_skipped_with_a_note(tmp_path: Path) -> None:
    path = tmp_path / "night.h5"
    write_store(path, [1, 2])
    part = StorePaths(path).with_state(1, LIVE)
    part.write_bytes(b"\x89HDF\r\n\x1a\n" + b"\0" * 64)  # an HDF5 signature and nothing after it
    with open_records(path) as reader:
        assert [s.index for s in reader.index()] == [0, 1]
        assert len(reader.notes) == 1 and reader.notes[0].startswith(f"{part}: skipped, ")


def test_a_live_segment_finished_between_listing_and_opening_is_read_finished(tmp_path: Path) -> None:
    # The writer renames .part to the finished name at any moment; a reader that listed the .part then
    # finds it gone and the finished file there. The listing is replayed here by hand, after the rename.
    path = tmp_path / "night.h5"
    write_store(path, [1, 2, 3], rotate_records=2)
    paths = StorePaths(path)
    with open_records(path) as reader:
        view = reader._open(Segment(1, paths.with_state(1, LIVE), LIVE))
        assert view is not None and view.path == paths.finished(1) and not view.live
        assert [crc_of(view.record(0))] == [crc_of(make_record(3))]
        view.close()
        assert reader._open(Segment(5, paths.finished(5), "")) is None  # removed meanwhile: nothing to read
        assert reader._open(Segment(6, paths.with_state(6, LIVE), LIVE)) is None  # a .part removed by recovery
        assert reader.notes == []


WRITER = """
import sys, zlib
sys.path.insert(0, sys.argv[1])
from test_store import make_record
from acqd.store import RecordStore
store = RecordStore(sys.argv[2], rotate_records=100)
for line in sys.stdin:
    word, _, seed = line.strip().partition(" ")
    if word == "close":
        break
    index = store.append(make_record(int(seed)))
    if word == "gap":  # the row just written renumbered +5, with a CRC-32 that matches (zlib, as the README says)
        h5 = store._live._h5
        row = h5["index"][index:index + 1]
        row["index"] += 5
        row["row_crc"] = zlib.crc32(row.tobytes()[:-4])
        h5["index"][index:index + 1] = row
        h5.flush()
    print(index, flush=True)
store.close()
print("closed", flush=True)
"""


def test_a_reader_follows_a_live_segment_as_another_process_appends(tmp_path: Path) -> None:
    # README, "Reading while acqd writes": the .part is SWMR; refresh() picks up the rows appended since,
    # and the segment's records stay readable after its writer finishes and renames it.
    path = tmp_path / "night.h5"
    writer = subprocess.Popen([sys.executable, "-c", WRITER, str(TESTS), str(path)], stdin=subprocess.PIPE,
                              stdout=subprocess.PIPE, text=True)

    def ask(line: str) -> str:
        writer.stdin.write(line + "\n")
        writer.stdin.flush()
        return writer.stdout.readline().strip()

    try:
        assert ask("add 20") == "0" and ask("add 21") == "1"
        with open_records(path) as reader:
            assert len(reader) == 2 and reader.notes == []
            assert ask("add 22") == "2" and ask("add 23") == "3"
            assert reader.refresh() == 4
            seeds = (20, 21, 22, 23)
            assert [crc_of(reader.read(k)) for k in range(4)] == [crc_of(make_record(s)) for s in seeds]
            # README: a row is trusted only if its index continues the one before, across refreshes too
            assert ask("gap 24") == "4"  # the last row: the writer's next append would rewrite its chunk
            assert reader.refresh() == 4 and reader.notes == []  # live: perhaps still being written, no note
            assert ask("close") == "closed"
            assert reader.refresh() == 4
    finally:
        writer.stdin.close()
        writer.wait(timeout=60)
    with open_records(path) as reader:  # finished: the rows before the gap, and a note for the rest
        assert [crc_of(r) for r in reader] == [crc_of(make_record(s)) for s in seeds]
        assert len(reader.notes) == 1 and "row 4 fails its check; 1 row(s) from there are not read" in reader.notes[0]


def test_a_live_segments_bad_row_hides_the_rest_without_a_damage_note(tmp_path: Path) -> None:
    # While a segment is live, a row that fails may be one being written: the reader shows what verifies
    # before it and says nothing; only in a finished segment is a bad row damage.
    path = live_segment_of(tmp_path, [1, 2, 3], corrupt_row=1)  # a writer that died after flipping a bit
    with open_records(StorePaths(path).with_state(0, LIVE)) as reader:  # the .part by its own name: live
        assert [crc_of(r) for r in reader] == [crc_of(make_record(1))] and reader.notes == []


# --- the kill points of an append, armed in a forked copy of this process ---------------------------------

# (step, records visible after the kill at the 3rd append): before the row is flushed the record is not
# there; once flushed it survives a kill even though append() had not returned (the store's write order:
# data, flush, row, flush, fsync; README "What survives a crash").
KILL_POINTS = [("append:blobs", 2), ("append:samples", 2), ("append:data-flushed", 2), ("append:index", 2),
               ("append:flushed", 3), ("append:synced", 3)]


def _append_and_die_at(path: Path, step: str) -> int:
    """Fork; the child appends two records, arms ``step`` as ``ACQD_STORE_KILL_AT=step@1`` would at import,
    and appends a third. Returns the child's wait status."""
    pid = os.fork()
    if pid == 0:
        code = 1
        try:
            store = RecordStore(path, rotate_records=100)
            store.append(make_record(1))
            store.append(make_record(2))
            faults._TARGET, faults._NTH = step, "1"
            store.append(make_record(3))
            code = 0  # the step was never reached
        finally:
            os._exit(code)
    _, status = os.waitpid(pid, 0)
    return status


@pytest.mark.parametrize("step, visible", KILL_POINTS)
def test_a_writer_killed_at_each_step_of_an_append_keeps_every_acknowledged_record(tmp_path: Path, step: str,
                                                                                   visible: int) -> None:
    path = tmp_path / "night.h5"
    status = _append_and_die_at(path, step)
    assert os.WIFSIGNALED(status) and os.WTERMSIG(status) == signal.SIGKILL, f"{step} was not reached: {status}"
    with RecordStore(path) as store:  # recovery finishes the dead writer's segment; indices run on
        assert store.append(make_record(4)) == visible
    with open_records(path) as reader:
        assert [crc_of(r) for r in reader] == [crc_of(make_record(s)) for s in (1, 2, 3)[:visible] + (4,)]
        assert [s.index for s in reader.index()] == list(range(visible + 1)) and reader.notes == []
    assert not list(tmp_path.glob("*" + DAMAGED))
