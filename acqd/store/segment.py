"""One segment file: create it and append to it (``SegmentWriter``), or open and read it (``SegmentView``).

The order of a write is the crash-safety argument, so it lives here in one place:

1. the record's new blobs and its sample chunks (one per channel) are written, then ``flush()``;
2. only then its index row (whose CRC covers the blob references), then ``flush()`` and, with fsync on,
   ``os.fsync`` of the file descriptor (HDF5's flush only calls ``pwrite``).

A reader - in another process under SWMR, or recovery after a crash - trusts a row only if its CRC
matches, and a row can only be complete after everything it points to reached the file.
"""

from __future__ import annotations

import hashlib
import os
from pathlib import Path
from typing import Any, BinaryIO

import h5py
import numpy as np

from ..errors import ConfigError
from ..record import Record
from . import faults
from .naming import os_reason
from .schema import (
    BLOB_CHUNK_BYTES,
    BLOB_PARTS,
    FORMAT_NAME,
    FORMAT_VERSION,
    INDEX_CHUNK_ROWS,
    INDEX_DTYPE,
    INDEX_DTYPES,
    LIBVER,
    Encoded,
    Layout,
    blob_problem,
    build_record,
    crc32,
    decode_blob,
    row_summary,
    rows_fit,
    samples_crc,
    seal,
    sealed,
    upgraded,
)


def create_segment(path: Path, layout: Layout, *, swmr: bool) -> SegmentWriter:
    """A new, empty segment at ``path`` (which must not exist), in SWMR mode if ``swmr``."""
    h5 = h5py.File(path, "w-", libver=LIBVER)
    h5.attrs["acqd_format"] = FORMAT_NAME
    h5.attrs["format_version"] = FORMAT_VERSION
    shape = (layout.n_channels, layout.n_samples)
    samples = h5.create_dataset(
        "samples", shape=(0, *shape), maxshape=(None, *shape), chunks=(1, 1, layout.n_samples), dtype=layout.dtype
    )
    samples.attrs["axes"] = "record, channel, sample"
    h5.create_dataset("index", shape=(0,), maxshape=(None,), chunks=(INDEX_CHUNK_ROWS,), dtype=INDEX_DTYPE)
    h5.create_dataset("blobs", shape=(0,), maxshape=(None,), chunks=(BLOB_CHUNK_BYTES,), dtype=np.uint8)
    if swmr:
        h5.swmr_mode = True
    return SegmentWriter(h5, layout)


class _Appender:
    """Appends to a 1-D chunked dataset by writing its last chunk whole with ``write_direct_chunk``.

    Why: a partial write through ``ds[a:b] = x`` converts the compound type field by field and goes via
    the chunk cache (measured here: 175-650 us per index row); a whole-chunk direct write takes ~40 us.
    The chunk's earlier rows are rewritten with the same bytes, so a torn rewrite cannot alter them.
    Only for datasets created empty by this process, whose tail chunk it therefore knows.
    """

    def __init__(self, ds: h5py.Dataset) -> None:
        self._ds = ds
        self._tail = np.zeros(ds.chunks[0], dtype=ds.dtype)
        self.length = 0

    def append(self, values: np.ndarray) -> None:
        start, end, width = self.length, self.length + len(values), len(self._tail)
        self._ds.resize(end, axis=0)
        done = 0
        while done < len(values):
            at = (start + done) % width
            take = min(width - at, len(values) - done)
            if at == 0:
                self._tail[:] = 0
            self._tail[at : at + take] = values[done : done + take]
            self._ds.id.write_direct_chunk((start + done - at,), self._tail)
            done += take
        self.length = end


class SegmentWriter:
    """Appends encoded records to a new segment; shares identical blobs within the segment."""

    def __init__(self, h5: h5py.File, layout: Layout) -> None:
        self._h5 = h5
        self.layout = layout
        self._samples = h5["samples"]
        self._index, self._blobs = _Appender(h5["index"]), _Appender(h5["blobs"])
        self.count = 0
        # SHA-256 of each blob this segment holds → its reference. Keyed by digest, not by the bytes: a
        # record's settings and analysis differ every time, and keeping them as keys held 3 KB per record
        # (3.5 MB a 1000-record segment) in the writer until rotation. A digest identifies content as
        # content-addressed stores do (common practice): no collision of SHA-256 is known.
        self._blob_refs: dict[bytes, tuple[int, int, int]] = {}

    def write(self, enc: Encoded, *, fsync: bool) -> None:
        """Write one record so that it survives a kill (and a power cut if ``fsync``) once this returns."""
        row = enc.row.copy()
        self._write_blobs(row, enc.blobs)
        faults.step("append:blobs")
        n = self.count
        self._samples.resize(n + 1, axis=0)
        for k, channel in enumerate(enc.samples):
            self._samples.id.write_direct_chunk((n, k, 0), channel)
        faults.step("append:samples")
        self._h5.flush()
        faults.step("append:data-flushed")
        seal(row)
        self._index.append(row)
        faults.step("append:index")
        self._h5.flush()
        faults.step("append:flushed")
        if fsync:
            self.sync()
            faults.step("append:synced")
        self.count = n + 1

    def _write_blobs(self, row: np.ndarray, blobs: dict[str, bytes]) -> None:
        """Fill the row's blob references, appending only blobs this segment does not hold yet."""
        end = self._blobs.length
        new: list[bytes] = []
        for part in BLOB_PARTS:
            raw = blobs[part]
            digest = hashlib.sha256(raw).digest()
            ref = self._blob_refs.get(digest)
            if ref is None:
                ref = self._blob_refs[digest] = (end, len(raw), crc32(raw))
                end += len(raw)
                new.append(raw)
            row[0][f"{part}_offset"], row[0][f"{part}_length"], row[0][f"{part}_crc"] = ref
        if new:
            self._blobs.append(np.frombuffer(b"".join(new), dtype=np.uint8))

    def sync(self) -> None:
        os.fsync(self._h5.id.get_vfd_handle())

    def close(self) -> None:
        self._h5.close()


def _open_h5(path: Path, *, swmr: bool, source: BinaryIO | None = None) -> h5py.File:
    try:
        return h5py.File(path if source is None else source, "r", swmr=swmr)
    except FileNotFoundError:
        raise
    except OSError as exc:
        raise ConfigError(str(path), "", f"not an acqd record file: HDF5 cannot open it ({_hdf5_reason(exc)})") from None


def _hdf5_reason(exc: OSError) -> str:
    """The system's words for an errno (HDF5's report of one runs over lines); else HDF5's own reason, the text
    inside its message's outer parentheses (a file name in it may hold parentheses too), or the whole message."""
    if exc.errno:
        return os_reason(exc)
    text = str(exc)
    return text.partition("(")[2].rstrip(")") or text


def _root_attribute(h5: h5py.File, name: str) -> Any:
    """A root attribute as a plain Python value (None if absent): h5py gives numpy scalars and arrays, whose
    comparisons and conversions raise on a hostile file's values (an array, a string) instead of answering."""
    value = h5.attrs.get(name)
    return value.tolist() if isinstance(value, (np.generic, np.ndarray)) else value


def _check_format(path: Path, h5: h5py.File) -> None:
    """Refuse any HDF5 file that is not a segment this version understands, naming what is wrong."""
    fmt = _root_attribute(h5, "acqd_format")
    if isinstance(fmt, bytes):  # a fixed-length string attribute
        fmt = fmt.decode("utf-8", errors="replace")
    if fmt != FORMAT_NAME:
        problem = f"not an acqd record file: root attribute acqd_format is {fmt!r}, not {FORMAT_NAME!r}"
        raise ConfigError(str(path), "", problem)
    version = _root_attribute(h5, "format_version")
    if isinstance(version, bool) or not isinstance(version, int) or not 1 <= version <= FORMAT_VERSION:
        raise ConfigError(str(path), "format_version", f"{version!r}; this acqd reads the integers 1 to {FORMAT_VERSION}")
    for name in ("samples", "index", "blobs"):
        if not isinstance(h5.get(name), h5py.Dataset):
            raise ConfigError(str(path), name, "dataset missing: not an acqd record file")
    if h5["index"].dtype != INDEX_DTYPES[version]:
        raise ConfigError(str(path), "index", f"unexpected row layout for format_version {version}: "
                                              "not an acqd record file")
    samples, blobs = h5["samples"], h5["blobs"]
    if samples.ndim != 3 or samples.dtype.str not in ("<f8", "<f4") or samples.shape[1] < 1 or samples.shape[2] < 1:
        raise ConfigError(str(path), "samples", f"{samples.dtype.str} of shape {samples.shape}; an acqd record file "
                                                f"holds float64 or float32 as (records, channels, samples)")
    if blobs.ndim != 1 or blobs.dtype != np.uint8:
        raise ConfigError(str(path), "blobs", "must be bytes (uint8, one dimension): not an acqd record file")


class SegmentView:
    """Read access to one segment; under SWMR, ``refresh()`` picks up rows appended since.

    Only a *verified prefix* of rows is visible: rows whose CRC matches, whose blobs and sample chunk lie
    inside the file, and whose record indices run on without a gap. A live segment's incomplete last row is
    simply not visible yet; in a finished segment a bad row is damage and ``damage`` says so. ``rows`` are
    in the current layout whatever the file's format version (a version 1 file's ``bench_id`` is "").

    ``source``: an open binary file object to read instead of ``path`` (an object in an archive, through
    fsspec); ``path`` then only names it in messages.
    """

    def __init__(self, path: Path, *, live: bool, source: BinaryIO | None = None) -> None:
        self.path, self.live = path, live
        self._h5 = _open_h5(path, swmr=live, source=source)
        try:
            _check_format(path, self._h5)
        except ConfigError:
            self._h5.close()
            raise
        self._samples, self._index, self._blobs = self._h5["samples"], self._h5["index"], self._h5["blobs"]
        self.rows = np.zeros(0, dtype=INDEX_DTYPE)
        self.damage = ""
        self._blob_cache: dict[tuple[str, int, int], Any] = {}
        self.refresh()

    def refresh(self) -> None:
        """Extend ``rows`` with newly verified rows (SWMR readers must refresh before each poll)."""
        if self.live:
            for ds in (self._samples, self._index, self._blobs):
                ds.refresh()
        seen = len(self.rows)
        new = self.raw_rows(seen)
        good = self.row_ok(new, seen)
        bad = np.flatnonzero(~good)
        keep = new if bad.size == 0 else new[: bad[0]]
        self.rows = np.concatenate([self.rows, upgraded(keep)])
        if bad.size and not self.live:
            self.damage = (
                f"{self.path}: row {seen + bad[0]} fails its check; {len(new) - bad[0]} row(s) from there are not read"
            )

    @property
    def index_rows(self) -> int:
        return self._index.shape[0]

    @property
    def sample_chunks(self) -> int:
        return self._samples.shape[0]

    def raw_rows(self, start: int) -> np.ndarray:
        """Rows from ``start`` up to the shorter of index and samples, unchecked (none, of the file's row
        layout, when there is nothing new: h5py reads an empty slice as an empty array of the dataset's type)."""
        return self._index[start:min(self.index_rows, self.sample_chunks)]

    def row_ok(self, rows: np.ndarray, first_position: int) -> np.ndarray:
        """Per row: CRC matches, blobs inside the blob dataset, index continues the previous row's."""
        _, n_channels, n_samples = self._samples.shape
        ok = sealed(rows) & rows_fit(rows, n_channels, n_samples, self._blobs.shape[0])
        if len(rows):
            before = self.rows["index"][first_position - 1] + 1 if first_position else rows["index"][0]
            ok &= rows["index"] == before + np.arange(len(rows))
        return ok

    def blob_values(self, part: str, rows: np.ndarray) -> list[Any]:
        """The decoded ``part`` of each row, reading the span they occupy once; identical blobs decode once."""
        if len(rows) == 0:
            return []
        offsets, lengths = rows[f"{part}_offset"], rows[f"{part}_length"]
        lo, hi = int(offsets.min()), int((offsets + lengths).max())
        span: bytes | None = None
        values = []
        for row, off, length in zip(rows, offsets.tolist(), lengths.tolist(), strict=True):
            key = (part, off, length)
            if key not in self._blob_cache:
                if span is None:
                    span = self._blobs[lo:hi].tobytes()
                raw = span[off - lo : off - lo + length]
                where = f"record {int(row['index'])}"
                if crc32(raw) != int(row[f"{part}_crc"]):
                    raise ConfigError(str(self.path), where, f"{part} fails its CRC-32: the file is damaged")
                try:
                    value = decode_blob(raw)
                except ValueError:
                    raise ConfigError(str(self.path), where, f"{part} is not UTF-8 JSON: the file is damaged "
                                                             f"or was not written by acqd") from None
                problem = blob_problem(part, value, int(row["n_channels"]))
                if problem:
                    raise ConfigError(str(self.path), where, f"{part} {problem}: the file was not written by acqd")
                self._blob_cache[key] = value
            values.append(self._blob_cache[key])
        return values

    def metadata(self, position: int) -> dict[str, Any]:
        """Everything about the record at ``position`` except its samples, as JSON-able values."""
        row = self.rows[position : position + 1]
        meta = row_summary(row[0])
        for part in BLOB_PARTS:
            meta[part] = self.blob_values(part, row)[0]
        return meta

    def record(self, position: int) -> Record:
        """The full record at ``position``; its samples must match the stored CRC-32."""
        meta = self.metadata(position)
        samples = self._samples[position]
        if samples_crc(list(samples)) != meta["checksum"]:
            where = f"record {meta['index']}"
            raise ConfigError(str(self.path), where, "samples fail their CRC-32: the file is damaged")
        return build_record(meta, samples)

    def close(self) -> None:
        self._h5.close()
