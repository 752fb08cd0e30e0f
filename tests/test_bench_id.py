"""Bench identity: ``[bench] bench_id`` (or ``acqd daemon --bench-id``) in every record and in the store's
index; stores written before the column (format version 1) still read, with an empty id.

Checked against h5py's own reading of the index (field by name), Debian's h5dump 1.10 (an HDF5 reader
independent of h5py's bundled library) and zlib's CRC-32 for the version-1 rows made by hand.
"""

from __future__ import annotations

import shutil
import subprocess
import zlib
from pathlib import Path

import h5py
import numpy as np
import pytest

from acqd.cli import main
from acqd.profile import load_profile
from acqd.store import RecordStore, open_records
from test_campaign_daemon import write_profile
from test_store import make_record

H5DUMP = shutil.which("h5dump")
# The version-1 row layout, as the README's "The record file" listed it before bench_id: every field of
# today's row except bench_id, in the same order.
V1_EXCLUDED = "bench_id"


def bench_profile(tmp_path: Path, bench_id: str | None) -> Path:
    """The daemon tests' simulated-bench profile with a ``bench_id`` line in ``[bench]`` (or none)."""
    path = write_profile(tmp_path / "bench.toml", "every_s = 1\nslots = 1")
    text = path.read_text()
    if bench_id is not None:
        text = text.replace('kind = "simulated"', f'kind = "simulated"\nbench_id = "{bench_id}"', 1)
    path.write_text(text)
    return path


def test_every_record_of_a_run_carries_the_profiles_bench_id(tmp_path: Path, capsys) -> None:
    profile = bench_profile(tmp_path, "line2.b-07")
    store = tmp_path / "kt9.h5"
    assert main(["run", str(profile), "-n", "2", "-o", str(store)]) == 0
    capsys.readouterr()
    with open_records(store) as reader:
        assert [reader.read(i).bench_id for i in range(2)] == ["line2.b-07"] * 2
        assert reader.metadata(1)["bench_id"] == "line2.b-07"
    segment = tmp_path / "kt9.000000.h5"
    with h5py.File(segment, "r") as h5:  # the column by name, as any HDF5 reader sees it
        assert [bytes(b) for b in h5["index"]["bench_id"]] == [b"line2.b-07"] * 2
        assert int(h5.attrs["format_version"]) == 2
    if H5DUMP:
        header = subprocess.run([H5DUMP, "-H", str(segment)], capture_output=True, text=True, timeout=60).stdout
        assert '"bench_id"' in header and 'STRSIZE 64' in header


@pytest.mark.parametrize("bench_id", ["", "a/b", "x" * 65, "..", "bench 7"])
def test_a_bad_bench_id_is_one_line_naming_the_file_and_key(tmp_path: Path, bench_id: str) -> None:
    profile = bench_profile(tmp_path, bench_id)
    with pytest.raises(Exception) as error:
        load_profile(profile)
    text = str(error.value)
    assert str(profile) in text and "bench.bench_id" in text and "\n" not in text
    assert "letters, digits" in text or "non-empty" in text


def test_a_bad_bench_id_on_the_daemons_command_line_is_one_error_line(tmp_path: Path, capsys) -> None:
    profile = bench_profile(tmp_path, None)
    assert main(["daemon", str(profile), "-d", str(tmp_path / "data"), "--bench-id", "b/7"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "--bench-id" in err and "letters, digits" in err
    assert not (tmp_path / "data").exists()


def downgrade_to_version_1(segment: Path) -> None:
    """Rewrite a finished segment's index in the version-1 layout: the same fields without bench_id, each
    row's CRC-32 (zlib) recomputed over its other bytes, format_version 1."""
    with h5py.File(segment, "r+") as h5:
        rows = h5["index"][...]
        names = [n for n in rows.dtype.names if n != V1_EXCLUDED]
        old = np.dtype([(n, rows.dtype.fields[n][0]) for n in names])
        v1 = np.zeros(len(rows), dtype=old)
        for name in names:
            v1[name] = rows[name]
        raw = v1.view(np.uint8).reshape(len(v1), old.itemsize)
        v1["row_crc"] = [zlib.crc32(r[:-4].tobytes()) for r in raw]
        del h5["index"]
        h5.create_dataset("index", data=v1, maxshape=(None,), chunks=(16,))
        h5.attrs["format_version"] = 1


def test_a_store_from_before_bench_id_reads_with_an_empty_id_and_can_be_continued(tmp_path: Path) -> None:
    store = tmp_path / "old.h5"
    with RecordStore(store, fsync=False) as writer:
        for seed in range(3):
            writer.append(make_record(seed))
    downgrade_to_version_1(tmp_path / "old.000000.h5")
    with open_records(store) as reader:
        assert [reader.read(i).bench_id for i in range(3)] == ["", "", ""]
        assert [s.index for s in reader.index()] == [0, 1, 2] and not reader.notes
    with RecordStore(store, fsync=False) as writer:  # a newer acqd continues the old store
        record = make_record(3)
        record.bench_id = "b7"
        assert writer.append(record) == 3
    with open_records(store) as reader:
        assert [reader.read(i).bench_id for i in range(4)] == ["", "", "", "b7"]
    with h5py.File(store, "r") as h5:  # the overview cannot stack two row layouts, and says so
        assert "index" not in h5 and "layout" in h5.attrs["index_note"]
        assert list(h5["segments/000001/index"]["bench_id"]) == [b"b7"]
