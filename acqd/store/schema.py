"""What one segment file holds, and how a Record maps onto it (no file access here).

A segment is an HDF5 file with three datasets under the root group, all chunked and resizable along
their first axis so that appending never creates a new object (see ``acqd.store`` for why):

``samples``  float64 (or float32), shape (records, channels, samples), one chunk per channel of a record
``index``    compound ``INDEX_DTYPE``, one row per record: everything fixed-size that ``acqd ls`` needs
``blobs``    uint8, the variable-size metadata as UTF-8 JSON byte runs, each stored once per segment

A row points at its blobs by (offset, length, crc) for every part in ``BLOB_PARTS``; identical blobs
(the profile text, the settings of a campaign, the channel list) are written once per segment and shared.
Every row ends with ``row_crc``, the CRC-32 of the row's other bytes, and carries ``samples_crc``, which
is ``Record.checksum()``; so a torn or unwritten row, blob or sample chunk is always detected.
"""

from __future__ import annotations

import json
import zlib
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..errors import ConfigError
from ..record import Channel, Record, Stimulus, TimeBase, bench_id_problem

FORMAT_NAME = "acqd-records"
# Version 2 added the index column ``bench_id``; version 1 files (without it) are still read, as bench "".
FORMAT_VERSION = 2
# Oldest library version whose readers must open every file: Debian's h5dump is HDF5 1.10, and 1.10 is
# also the first version with SWMR; the upper bound stops a newer h5py from writing newer structures.
LIBVER = ("v110", "v110")

BLOB_PARTS = ("channels", "identities", "settings", "dut", "profile_text", "analysis")
_BLOB_REF = (("offset", "<i8"), ("length", "<i8"), ("crc", "<u4"))

# Fixed-width text fields and their size in bytes (UTF-8); a longer value is refused, never truncated.
TEXT_SIZES = {
    "utc": 40,
    "stim_shape": 16,
    "stim_edge": 8,
    "stim_load": 8,
    "acqd_version": 32,
    "profile_sha256": 64,
    "verdict": 32,
    "bench_id": 64,
}

_INDEX_FIELDS_V1 = (
    [
        ("index", "<i8"),
        ("utc", f"S{TEXT_SIZES['utc']}"),
        ("monotonic_s", "<f8"),
        ("n_channels", "<i4"),
        ("n_samples", "<i8"),
        ("sample_interval_s", "<f8"),
        ("pretrigger_samples", "<i8"),
        ("stim_shape", f"S{TEXT_SIZES['stim_shape']}"),
        ("stim_low_v", "<f8"),
        ("stim_high_v", "<f8"),
        ("stim_frequency_hz", "<f8"),
        ("stim_edge", f"S{TEXT_SIZES['stim_edge']}"),
        ("stim_load", f"S{TEXT_SIZES['stim_load']}"),
        ("stim_source_resistance_ohm", "<f8"),
        ("stim_edge_time_s", "<f8"),
        ("averages", "<i8"),
        ("acqd_version", f"S{TEXT_SIZES['acqd_version']}"),
        ("profile_sha256", f"S{TEXT_SIZES['profile_sha256']}"),
        ("verdict", f"S{TEXT_SIZES['verdict']}"),
        ("samples_crc", "<u4"),
        *[(f"{part}_{key}", dtype) for part in BLOB_PARTS for key, dtype in _BLOB_REF],
    ]
)
_ROW_CRC = [("row_crc", "<u4")]  # last field: CRC-32 of every byte before it
# The row layout of each format version. A new column goes before row_crc, so that a reader (or h5dump)
# that names the fields it wants reads either version alike.
INDEX_DTYPES = {
    1: np.dtype(_INDEX_FIELDS_V1 + _ROW_CRC),
    2: np.dtype(_INDEX_FIELDS_V1 + [("bench_id", f"S{TEXT_SIZES['bench_id']}")] + _ROW_CRC),
}
INDEX_DTYPE = INDEX_DTYPES[FORMAT_VERSION]

# Rows per index chunk and bytes per blob chunk: small, because each flush rewrites the current chunk.
INDEX_CHUNK_ROWS = 16
BLOB_CHUNK_BYTES = 8192


@dataclass(frozen=True)
class Layout:
    """The shape of a record's sample block; a segment holds records of one layout only."""

    n_channels: int
    n_samples: int
    dtype: str  # "<f8" or "<f4"


@dataclass
class Encoded:
    """A record ready to be written: its index row (blob references still empty), blobs and samples."""

    row: np.ndarray  # shape (1,), INDEX_DTYPE
    blobs: dict[str, bytes]
    samples: list[np.ndarray]  # one contiguous little-endian array per channel, all of ``layout``
    layout: Layout


def crc32(data: Any) -> int:
    """CRC-32 (the zlib/ISO 3309 polynomial) of a bytes-like object, as an unsigned int."""
    return zlib.crc32(data) & 0xFFFFFFFF


def seal(row: np.ndarray) -> None:
    """Set ``row_crc`` of each row to the CRC-32 of the row's other bytes."""
    for k in range(len(row)):
        row["row_crc"][k] = crc32(row[k : k + 1].tobytes()[:-4])


def sealed(rows: np.ndarray) -> np.ndarray:
    """A boolean per row: True where ``row_crc`` matches (a torn or never-written row gives False); rows
    of any format version, checked in the layout they were written in."""
    raw = np.ascontiguousarray(rows).view(np.uint8).reshape(len(rows), rows.dtype.itemsize)
    return np.array([crc32(r[:-4]) == int(c) for r, c in zip(raw, rows["row_crc"], strict=True)], dtype=bool)


def upgraded(rows: np.ndarray) -> np.ndarray:
    """Verified rows of an older format version in the current layout (new columns empty; row_crc kept
    as read, so it is only meaningful in the old layout: check with ``sealed`` before upgrading)."""
    if rows.dtype == INDEX_DTYPE:
        return rows
    out = np.zeros(len(rows), dtype=INDEX_DTYPE)
    for name in rows.dtype.names:
        out[name] = rows[name]
    return out


def _json_default(value: Any) -> Any:
    """numpy scalars and arrays are common in analysis results; store them as plain JSON numbers/lists."""
    if isinstance(value, (np.generic, np.ndarray)):
        return value.tolist()
    raise TypeError(f"{type(value).__name__} is not JSON-serialisable")


def _to_json(source: str, part: str, value: Any) -> bytes:
    try:
        return json.dumps(value, ensure_ascii=False, separators=(",", ":"), default=_json_default).encode()
    except (TypeError, ValueError) as exc:
        raise ConfigError(source, f"record.{part}", f"must be JSON-serialisable: {exc}") from None


def _text(source: str, field: str, value: str) -> bytes:
    raw = str(value).encode("utf-8")
    if len(raw) > TEXT_SIZES[field]:
        raise ConfigError(source, f"record.{field}", f"{len(raw)} bytes; at most {TEXT_SIZES[field]} allowed")
    return raw


def verdict_of(analysis: dict[str, Any] | None) -> str:
    """The comparator's verdict, when its analysis carries one as text under the key ``verdict``."""
    verdict = analysis.get("verdict") if isinstance(analysis, dict) else None
    return verdict if isinstance(verdict, str) else ""


def _channel_arrays(source: str, record: Record) -> list[np.ndarray]:
    """Each channel as a contiguous array, float32 if every channel is float32, else float64.

    Both are lossless for what a record carries (float64 holds float32 and 8/16/32-bit codes exactly), so
    ``Record.checksum()`` - defined over float64 - verifies after a round trip. float64 input is not copied.
    """
    n = record.timebase.n_samples
    if not record.channels or n < 1:
        raise ConfigError(source, "record.channels", "a record needs at least one channel of at least one sample")
    for ch in record.channels:
        if np.ndim(ch.samples) != 1 or len(ch.samples) != n:
            problem = f"shape {np.shape(ch.samples)}; must be ({n},) = timebase.n_samples"
            raise ConfigError(source, f"record.channels[{ch.name}]", problem)
    dtype = "<f4" if all(np.asarray(ch.samples).dtype == np.float32 for ch in record.channels) else "<f8"
    return [np.ascontiguousarray(ch.samples, dtype=dtype) for ch in record.channels]


def samples_crc(channels: list[np.ndarray]) -> int:
    """``Record.checksum()`` of these channels: CRC-32 over each as float64 little-endian, in order."""
    crc = 0
    for samples in channels:
        f8 = samples if samples.dtype == np.dtype("<f8") else samples.astype("<f8")
        crc = zlib.crc32(memoryview(f8).cast("B"), crc)
    return crc


def encode(record: Record, index: int, source: str) -> Encoded:
    """Validate ``record`` and turn it into a row, blobs and a sample block; errors name ``source``."""
    channels = _channel_arrays(source, record)
    if record.bench_id and bench_id_problem(record.bench_id):
        raise ConfigError(source, "record.bench_id", bench_id_problem(record.bench_id))
    stim, tb = record.stimulus, record.timebase
    texts = {
        "utc": record.utc,
        "stim_shape": stim.shape,
        "stim_edge": stim.edge,
        "stim_load": stim.load,
        "acqd_version": record.acqd_version,
        "profile_sha256": record.profile_sha256,
        "verdict": verdict_of(record.analysis),
        "bench_id": record.bench_id,
    }
    fields = {
        "index": index,
        "monotonic_s": record.monotonic_s,
        "n_channels": len(channels),
        "n_samples": tb.n_samples,
        "sample_interval_s": tb.sample_interval_s,
        "pretrigger_samples": tb.pretrigger_samples,
        "stim_low_v": stim.low_v,
        "stim_high_v": stim.high_v,
        "stim_frequency_hz": stim.frequency_hz,
        "stim_source_resistance_ohm": stim.source_resistance_ohm,
        "stim_edge_time_s": stim.edge_time_s,
        "averages": record.averages,
        "samples_crc": samples_crc(channels),
        **{field: _text(source, field, value) for field, value in texts.items()},
    }
    # One tuple in field order: numpy fills a structured row far faster than field by field.
    row = np.array([tuple(fields.get(name, 0) for name in INDEX_DTYPE.names)], dtype=INDEX_DTYPE)
    values = {
        "channels": [{"name": c.name, "unit": c.unit, "source": c.source} for c in record.channels],
        "identities": record.identities,
        "settings": record.settings,
        "dut": record.dut,
        "profile_text": record.profile_text,
        "analysis": record.analysis,
    }
    blobs = {part: _to_json(source, part, values[part]) for part in BLOB_PARTS}
    layout = Layout(len(channels), tb.n_samples, channels[0].dtype.str)
    return Encoded(row, blobs, channels, layout)


def _decode_text(row: np.void, field: str) -> str:
    return bytes(row[field]).decode("utf-8")


def row_summary(row: np.void) -> dict[str, Any]:
    """The fixed-size fields of a row as plain Python values (no blob is read)."""
    return {
        "index": int(row["index"]),
        "utc": _decode_text(row, "utc"),
        "monotonic_s": float(row["monotonic_s"]),
        "acqd_version": _decode_text(row, "acqd_version"),
        "averages": int(row["averages"]),
        "checksum": int(row["samples_crc"]),
        "verdict": _decode_text(row, "verdict"),
        "profile_sha256": _decode_text(row, "profile_sha256"),
        "bench_id": _decode_text(row, "bench_id"),
        "timebase": {
            "sample_interval_s": float(row["sample_interval_s"]),
            "pretrigger_samples": int(row["pretrigger_samples"]),
            "n_samples": int(row["n_samples"]),
        },
        "stimulus": {
            "shape": _decode_text(row, "stim_shape"),
            "low_v": float(row["stim_low_v"]),
            "high_v": float(row["stim_high_v"]),
            "frequency_hz": float(row["stim_frequency_hz"]),
            "edge": _decode_text(row, "stim_edge"),
            "load": _decode_text(row, "stim_load"),
            "source_resistance_ohm": float(row["stim_source_resistance_ohm"]),
            "edge_time_s": float(row["stim_edge_time_s"]),
        },
    }


def rows_fit(rows: np.ndarray, n_channels: int, n_samples: int, blob_end: int) -> np.ndarray:
    """Per row: its numbers fit the segment it is in - the sample block's shape, blobs inside the blob
    dataset, a pre-trigger count within the record, text fields in UTF-8.

    Why beside the CRCs: a CRC-32 catches damage, but anyone can recompute it; a hostile or hand-edited
    file must still fail here with a note, not claim 10^12 samples and make a reader allocate them."""
    ok = (rows["n_channels"] == n_channels) & (rows["n_samples"] == n_samples)
    ok &= (rows["pretrigger_samples"] >= 0) & (rows["pretrigger_samples"] <= rows["n_samples"])
    ok &= (rows["averages"] >= 1) & np.isfinite(rows["sample_interval_s"]) & (rows["sample_interval_s"] > 0)
    for part in BLOB_PARTS:
        offset, length = rows[f"{part}_offset"], rows[f"{part}_length"]
        ok &= (offset >= 0) & (length >= 0) & (length <= blob_end) & (offset <= blob_end - length)
    for name in TEXT_SIZES.keys() & set(rows.dtype.names):  # a version-1 row has no bench_id
        ok &= np.array([_is_utf8(bytes(v)) for v in rows[name]], dtype=bool)
    return ok


def _is_utf8(raw: bytes) -> bool:
    try:
        raw.decode("utf-8")
    except UnicodeDecodeError:
        return False
    return True


def decode_blob(raw: bytes) -> Any:
    """The JSON value of a blob; ``ValueError`` (JSON's and UTF-8's errors both are) if it is not one."""
    return json.loads(raw.decode("utf-8"))


_TEXT_KEYS = ("name", "unit", "source")


def blob_problem(part: str, value: Any, n_channels: int) -> str:
    """What is wrong with the decoded ``part`` of a record for ``build_record``, or "" - the shapes the
    writer stores: a list of ``n_channels`` channels with text name, unit and source; text identities;
    objects for settings and (or null) dut and analysis; text for the profile."""
    if part == "channels":
        if not isinstance(value, list) or len(value) != n_channels:
            return f"must be a list of {n_channels} channel(s) (the sample block's), not {_kind(value)}"
        if not all(isinstance(c, dict) and all(isinstance(c.get(k), str) for k in _TEXT_KEYS) for c in value):
            return "every channel must have text name, unit and source"
    elif part == "identities":
        if not isinstance(value, dict) or not all(isinstance(v, str) for v in value.values()):
            return f"must be an object of texts, not {_kind(value)}"
    elif part == "profile_text":
        if not isinstance(value, str):
            return f"must be text, not {_kind(value)}"
    elif not isinstance(value, dict) and not (value is None and part in ("dut", "analysis")):
        return f"must be an object, not {_kind(value)}"
    return ""


def _kind(value: Any) -> str:
    return f"a list of {len(value)}" if isinstance(value, list) else type(value).__name__.replace("NoneType", "null")


def build_record(meta: dict[str, Any], samples: np.ndarray) -> Record:
    """A Record from ``metadata`` (``row_summary`` plus the decoded blobs) and its sample block."""
    channels = [
        Channel(c["name"], c["unit"], samples[k], c["source"]) for k, c in enumerate(meta["channels"])
    ]
    return Record(
        channels=channels,
        timebase=TimeBase(**meta["timebase"]),
        stimulus=Stimulus(**meta["stimulus"]),
        identities=meta["identities"],
        settings=meta["settings"],
        dut=meta["dut"],
        utc=meta["utc"],
        monotonic_s=meta["monotonic_s"],
        profile_text=meta["profile_text"],
        profile_sha256=meta["profile_sha256"],
        acqd_version=meta["acqd_version"],
        averages=meta["averages"],
        analysis=meta["analysis"],
        index=meta["index"],
        bench_id=meta.get("bench_id", ""),
    )
