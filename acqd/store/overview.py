"""The file at the name the user gave (``data/night.h5``): one HDF5 file that presents the whole store.

The records live in segment files beside it (``night.000000.h5`` …) because one growing file is neither
crash-safe nor quick to verify. But ``h5dump data/night.h5``, ``h5py.File("data/night.h5")`` or any HDF5
tool should open the name the user gave. So that name is an overview file of HDF5 virtual datasets (VDS,
HDF5 ≥ 1.10, so Debian's h5dump 1.10 reads it) over the finished segments, rewritten whenever a segment is
finished. It holds no samples of its own: it is rebuilt from the segments at any time, and losing it
loses nothing. The live segment is not in it (a VDS over a file being written under SWMR would show a
reader rows whose data has not been flushed); ``acqd ls`` and the Python reader see the live records too.

Layout (the segments' own dataset names, so what one knows of a segment applies here)::

    /index               every finished segment's index rows, in record order (VDS); absent, with the
                         attribute ``index_note``, when segments of two format versions are mixed
    /segment, /row       for each row: which segment file holds it, and its row there (plain datasets)
    /samples             (records, channels, samples), when every segment has the same shape (VDS)
    /segments/NNNNNN/    samples, index, blobs of segment NNNNNN (VDS); attribute ``file``

An index row's blob references (offset, length, crc) point into its own segment's ``blobs``.
"""

from __future__ import annotations

import os
from pathlib import Path

import h5py
import numpy as np

from .naming import StorePaths, replace_durably
from .schema import LIBVER

OVERVIEW_FORMAT = "acqd-store-overview"
OVERVIEW_VERSION = 1
_WRITING = ".overview"  # suffix of the overview while it is written; renamed over the old one when complete


def is_overview(path: Path) -> bool:
    """Whether ``path`` is an overview file (and so not a segment given by its own name)."""
    try:
        with h5py.File(path, "r") as h5:
            fmt = h5.attrs.get("acqd_format")  # a hostile file's attribute may be an array: compare text only
            return isinstance(fmt, str) and fmt == OVERVIEW_FORMAT
    except (OSError, ValueError):
        return False


def write_overview(paths: StorePaths, tag: str = "") -> None:
    """Rewrite ``paths.path`` over the finished segments now present; with none, remove a stale one.

    Written under a temporary name and renamed, so a reader never opens a half-written overview; not
    fsynced, because it is derived: after a power cut the next writer rewrites it. ``tag`` goes in the
    temporary name, for a process other than the store's writer (``acqd sync --prune``), so that two
    never write one temporary file."""
    finished = [s for s in paths.segments() if s.state == ""]
    if not finished:
        if paths.path.is_file() and is_overview(paths.path):
            paths.path.unlink()
        return
    temporary = paths.directory / f"{paths.path.name}{tag}{_WRITING}"
    try:
        with h5py.File(temporary, "w", libver=LIBVER) as out:
            _fill(out, paths, [s.path for s in finished], [s.number for s in finished])
        replace_durably(temporary, paths.path, fsync=False)
    finally:
        if temporary.exists():
            os.unlink(temporary)


def _fill(out: h5py.File, paths: StorePaths, files: list[Path], numbers: list[int]) -> None:
    shapes = []
    for number, path in zip(numbers, files):
        group = out.create_group(f"segments/{number:06d}")
        group.attrs["file"] = path.name
        with h5py.File(path, "r") as seg:
            for name in ("samples", "index", "blobs"):
                group.create_virtual_dataset(name, _whole(seg[name], path.name))
            shapes.append((seg["samples"].shape, seg["samples"].dtype, seg["index"].dtype))
    rows = [shape[0][0] for shape in shapes]
    out["segment"] = np.repeat(np.asarray(numbers, dtype=np.int64), rows)
    out["row"] = np.concatenate([np.arange(n, dtype=np.int64) for n in rows])
    index_layouts = {shape[2] for shape in shapes}
    if len(index_layouts) == 1:
        out.create_virtual_dataset("index", _stacked([(f.name, "index", (n,)) for f, n in zip(files, rows)],
                                                     shapes[0][2]))
    else:  # a store begun before format version 2 (no bench_id column) and continued after it
        out.attrs["index_note"] = ("no /index: the segments' index rows have more than one layout (format "
                                   "versions); read /segments/NNNNNN/index")
    record_shapes = {(shape[1:], dtype) for (shape, dtype, _) in shapes}
    if len(record_shapes) == 1:
        (shape, dtype), = record_shapes
        out.create_virtual_dataset("samples", _stacked([(f.name, "samples", (n, *shape))
                                                        for f, n in zip(files, rows)], dtype))
    else:
        out.attrs["samples_note"] = ("no /samples: the segments hold records of different shapes; "
                                     "read /segments/NNNNNN/samples")
    out.attrs.update({"acqd_format": OVERVIEW_FORMAT, "acqd_format_version": OVERVIEW_VERSION,
                      "segments": len(files), "records": sum(rows),
                      "note": f"virtual datasets over the finished segments {paths.stem}.NNNNNN.h5 beside this file, "
                              "rewritten by acqd when a segment is finished; the live segment is not included"})


def _whole(dataset: h5py.Dataset, file_name: str) -> h5py.VirtualLayout:
    """A virtual view of a whole dataset of another file, by a file name relative to this one."""
    layout = h5py.VirtualLayout(shape=dataset.shape, dtype=dataset.dtype)
    layout[...] = h5py.VirtualSource(file_name, dataset.name, shape=dataset.shape)
    return layout


def _stacked(sources: list[tuple[str, str, tuple[int, ...]]], dtype: np.dtype) -> h5py.VirtualLayout:
    """The datasets one after another along their first axis."""
    total = sum(shape[0] for _, _, shape in sources)
    layout = h5py.VirtualLayout(shape=(total, *sources[0][2][1:]), dtype=dtype)
    start = 0
    for file_name, name, shape in sources:
        if not shape[0]:
            continue  # an empty segment (recovery can leave one) maps nothing
        layout[start:start + shape[0]] = h5py.VirtualSource(file_name, name, shape=shape)
        start += shape[0]
    return layout
