"""The store's own name (night.h5) is a real HDF5 file presenting every finished segment: read it with
plain h5py and with Debian's h5dump (HDF5 1.10, a reader independent of h5py's bundled library)."""

from __future__ import annotations

import os
import re
import shutil
import subprocess
from pathlib import Path

import h5py
import numpy as np
import pytest

from acqd.store import RecordStore, open_records
from test_store import make_record

H5DUMP = shutil.which("h5dump")


def stored(path: Path, shapes: list[int], rotate: int = 3) -> list[np.ndarray]:
    """Append one record per entry (its sample count); returns each record's samples as written."""
    written = []
    with RecordStore(path, rotate_records=rotate) as store:
        for seed, n in enumerate(shapes):
            record = make_record(seed, n_samples=n)
            store.append(record)
            written.append(np.stack([c.samples for c in record.channels]))
    return written


def test_plain_h5py_reads_the_whole_store_at_its_own_name(tmp_path: Path) -> None:
    path = tmp_path / "night.h5"
    written = stored(path, [64] * 7)
    with h5py.File(path, "r") as h5:  # h5py's own documented File API, nothing of acqd's
        assert h5["samples"].shape == (7, 2, 64) and h5.attrs["records"] == 7 and h5.attrs["segments"] == 3
        for k in range(7):
            assert np.array_equal(h5["samples"][k], written[k])
        assert list(h5["index"]["index"]) == list(range(7))
        assert list(h5["segment"]) == [0, 0, 0, 1, 1, 1, 2] and list(h5["row"]) == [0, 1, 2, 0, 1, 2, 0]
        for number in range(3):  # each segment's own datasets, exactly as in its file
            with h5py.File(tmp_path / f"night.{number:06d}.h5", "r") as seg:
                for name in ("samples", "index", "blobs"):
                    assert np.array_equal(h5[f"segments/{number:06d}/{name}"][()], seg[name][()])


def test_segments_of_different_shapes_are_each_presented(tmp_path: Path) -> None:
    path = tmp_path / "night.h5"
    written = stored(path, [64, 64, 32])
    with h5py.File(path, "r") as h5:
        assert "samples" not in h5 and "different shapes" in h5.attrs["samples_note"]
        assert np.array_equal(h5["segments/000001/samples"][0], written[2])
        assert len(h5["index"]) == 3


def test_the_live_segment_is_left_out_until_it_is_finished(tmp_path: Path) -> None:
    path = tmp_path / "night.h5"
    with RecordStore(path, rotate_records=2) as store:
        for seed in range(3):
            store.append(make_record(seed))
        with h5py.File(path, "r") as h5:
            assert len(h5["index"]) == 2  # the third record is in the live .part
        with open_records(path) as reader:
            assert len(reader.index()) == 3  # acqd's reader sees the live record too
    with h5py.File(path, "r") as h5:
        assert len(h5["index"]) == 3


def test_the_store_opens_and_grows_by_its_name_and_a_lost_overview_is_rebuilt(tmp_path: Path) -> None:
    path = tmp_path / "night.h5"
    stored(path, [64] * 4)
    with open_records(path) as reader:
        assert [s.index for s in reader.index()] == [0, 1, 2, 3]
    path.unlink()
    with RecordStore(path) as store:
        assert store.append(make_record(9)) == 4  # indices carry on; the overview comes back at the start
        assert path.is_file()
    with h5py.File(path, "r") as h5:
        assert list(h5["index"]["index"]) == [0, 1, 2, 3, 4]


@pytest.mark.skipif(H5DUMP is None, reason="h5dump (Debian hdf5-tools) not installed")
def test_h5dump_reads_the_named_store_from_another_directory(tmp_path: Path) -> None:
    path = tmp_path / "data" / "night.h5"
    path.parent.mkdir()
    written = stored(path, [64] * 5)
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()  # the segments are found beside the overview, not in the working directory
    proc = subprocess.run([H5DUMP, "-m", "%.17g", "-d", "/samples", "-s", "4,1,10", "-c", "1,1,3", str(path)], capture_output=True,
                          text=True, timeout=60, cwd=elsewhere, env={**os.environ, "HDF5_VDS_PREFIX": ""})
    assert proc.returncode == 0, proc.stderr
    values = [float(v) for v in re.findall(r"\(4,1,1[012]\): ([^,\n]+)", proc.stdout)]
    assert values == list(written[4][1, 10:13])  # 17 significant figures print a float64 exactly (IEEE 754)
    header = subprocess.run([H5DUMP, "-H", str(path)], capture_output=True, text=True, timeout=60).stdout
    assert all(f'DATASET "{name}"' in header for name in ("index", "samples", "segment", "row"))
