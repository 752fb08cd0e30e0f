"""A record from a CSV file: acqd's own export, or traces that did not come through acqd (another scope's
export, a simulation). The header names a time column (seconds, t = 0 at the stimulus edge) and one column
per channel, optionally with a unit in brackets: ``t [s],v_c [V],i_l [A]``.

A foreign CSV carries no stimulus, so the caller supplies it. acqd's export writes the record's metadata
beside the CSV (``OUT.csv.json``); ``read_exported_record`` takes the stimulus, DUT, identities and settings
from there, so an exported record compares as the stored one did. Every problem is one line naming the
file, the line and the column (or the JSON field).
"""

from __future__ import annotations

import csv
import json
import math
from pathlib import Path
from typing import Any

import numpy as np

from ..config import finite_float
from ..errors import ConfigError
from ..record import EDGES, LOADS, TIMING_SETTING, Channel, Record, Stimulus, TimeBase, split_column_header

GRID_TOLERANCE = 0.01  # share of a sample interval a time may stray from the uniform grid

# Sanity bound on every CSV value (seconds, volts, amperes): far beyond any bench signal, far below where the
# comparator's sums of squares overflow float64 (a CSV of values near 1e308 gave an NRMSE of inf).
MAX_MAGNITUDE = 1e9

def metadata_path(csv_path: str | Path) -> Path:
    """Where ``acqd export`` puts a CSV's metadata: the same name with ``.json`` added."""
    path = Path(csv_path)
    return path.with_name(path.name + ".json")


def _columns(header: list[str], path: str) -> list[tuple[str, str | None]]:
    columns = []
    for i, cell in enumerate(header, start=1):
        name, unit = split_column_header(cell)
        if not name:
            raise ConfigError(path, f"line 1, column {i}", "the header names no column here")
        columns.append((name, unit))
    names = [c[0] for c in columns]
    if len(set(names)) != len(names):
        raise ConfigError(path, "line 1", f"column names must be unique, got {', '.join(names)}")
    return columns


def _read_table(path: str) -> tuple[list[tuple[str, str | None]], np.ndarray]:
    try:
        with open(path, newline="", encoding="utf-8") as f:
            rows = list(csv.reader(f))
    except FileNotFoundError:
        raise ConfigError(path, "", "file not found") from None
    except (OSError, UnicodeDecodeError, csv.Error) as exc:
        raise ConfigError(path, "", f"cannot be read as CSV ({exc})") from None
    rows = [r for r in rows if any(cell.strip() for cell in r)]
    if len(rows) < 4:
        raise ConfigError(path, "", "needs a header row and at least 3 rows of samples")
    columns = _columns(rows[0], path)
    data = np.empty((len(rows) - 1, len(columns)))
    for line, row in enumerate(rows[1:], start=2):
        if len(row) != len(columns):
            raise ConfigError(path, f"line {line}", f"has {len(row)} values; the header names {len(columns)} columns")
        for j, cell in enumerate(row):
            where = f"line {line}, column {columns[j][0]}"
            value = finite_float(path, where, cell)
            if abs(value) > MAX_MAGNITUDE:
                raise ConfigError(path, where, f"{cell.strip()!r} is beyond ±{MAX_MAGNITUDE:g}: no sampled time, "
                                               f"voltage or current is that large (their squares would overflow)")
            data[line - 2, j] = value
    return columns, data


def _timebase(times: np.ndarray, path: str, column: str) -> TimeBase:
    steps = np.diff(times)
    if np.any(steps <= 0):
        k = int(np.flatnonzero(steps <= 0)[0])
        raise ConfigError(path, f"column {column}", f"time must increase from row to row; line {k + 3} "
                                                    f"({times[k + 1]:g} s) does not follow line {k + 2} "
                                                    f"({times[k]:g} s)")
    n = len(times)
    dt = (times[-1] - times[0]) / (n - 1)
    stray = np.abs(times - (times[0] + np.arange(n) * dt)).max() / dt
    if stray > GRID_TOLERANCE:
        raise ConfigError(path, f"column {column}", f"samples must be evenly spaced; one is {stray:.2g} of a "
                                                    f"sample interval ({dt:g} s) off the grid: resample first")
    pretrigger = int(round(-times[0] / dt))
    if abs(times[0] + pretrigger * dt) > GRID_TOLERANCE * dt:
        raise ConfigError(path, f"column {column}", "t = 0 (the stimulus edge) must fall on a sample, as on a "
                                                    "triggered scope; shift the time column")
    return TimeBase(float(dt), pretrigger, n)


def read_csv_record(path: str | Path, stimulus: Stimulus, time_column: str | None = None) -> Record:
    """The CSV's channels on its time axis, with ``stimulus`` as the record's stimulus (a unit not in the
    header is V)."""
    path = str(path)
    timebase, columns = _csv_samples(path, time_column)
    channels = [Channel(name, unit or "V", samples, f"{Path(path).name}:{name}") for name, unit, samples in columns]
    timing = f"t = 0 of {Path(path).name}'s time column taken as the edge (t50)"
    return Record(channels, timebase, stimulus, settings={"source_file": path, TIMING_SETTING: timing})


def read_exported_record(path: str | Path, time_column: str | None = None) -> Record:
    """The record ``acqd export`` wrote: samples from the CSV, everything else from the JSON beside it."""
    timebase, columns = _csv_samples(str(path), time_column)
    meta_file = metadata_path(path)
    meta, where = _metadata(meta_file), str(meta_file)
    timebase = _stored_timebase(timebase, meta, where)
    channels = _exported_channels(columns, meta, where)
    settings = {**_table(meta, "settings", where), TIMING_SETTING: f"from {meta_file.name} (t50 at the trigger)"}
    return Record(channels, timebase, _stimulus(meta, where), identities=_table(meta, "identities", where),
                  settings=settings, dut=_table(meta, "dut", where), utc=str(meta.get("utc", "")),
                  profile_text=str(meta.get("profile_text", "")), profile_sha256=str(meta.get("profile_sha256", "")),
                  index=meta.get("index") if isinstance(meta.get("index"), int) else None)


def _metadata(path: Path) -> dict[str, Any]:
    try:
        meta = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(str(path), "", f"cannot be read: {exc}") from None
    except json.JSONDecodeError as exc:
        raise ConfigError(str(path), f"line {exc.lineno}", f"is not JSON ({exc.msg})") from None
    if not isinstance(meta, dict):
        raise ConfigError(str(path), "", "must hold one JSON object, as acqd export writes it")
    return meta


def _table(meta: dict[str, Any], key: str, where: str) -> dict[str, Any]:
    value = meta.get(key) or {}
    if not isinstance(value, dict):
        raise ConfigError(where, key, f"must be a JSON object, not {type(value).__name__}")
    return dict(value)


def _exported_channels(columns: list[tuple[str, str | None, np.ndarray]], meta: dict[str, Any],
                       where: str) -> list[Channel]:
    """The CSV's columns with the units and sources the JSON lists; the JSON must describe these columns."""
    listed = meta.get("channels")
    if not isinstance(listed, list) or not all(isinstance(c, dict) and isinstance(c.get("name"), str) for c in listed):
        raise ConfigError(where, "channels", "missing or not a list of {name, unit, source}, as acqd export writes it")
    names, csv_names = [c["name"] for c in listed], [name for name, _, _ in columns]
    if names != csv_names:
        raise ConfigError(where, "channels", f"lists {', '.join(names)} but the CSV has columns "
                                             f"{', '.join(csv_names)}: the JSON is not this CSV's")
    channels = []
    for (name, header_unit, samples), entry in zip(columns, listed):
        unit = str(entry.get("unit", ""))
        if header_unit is not None and header_unit != unit:
            raise ConfigError(where, f"channels.{name}.unit", f"is {unit!r}; the CSV header says {header_unit!r}")
        channels.append(Channel(name, unit, samples, str(entry.get("source", ""))))
    return channels


def _stored_timebase(timebase: TimeBase, meta: dict[str, Any], where: str) -> TimeBase:
    """The stored time base if it is the CSV's: its interval is exact, the one from the time column is not."""
    stored = meta.get("timebase")
    try:
        dt, pre = float(stored["sample_interval_s"]), int(stored["pretrigger_samples"])
    except (KeyError, TypeError, ValueError):
        raise ConfigError(where, "timebase", "missing sample_interval_s or pretrigger_samples") from None
    if pre != timebase.pretrigger_samples or not math.isclose(dt, timebase.sample_interval_s, rel_tol=1e-6):
        raise ConfigError(where, "timebase", f"says {dt:g} s with {pre} samples before the trigger; the CSV has "
                                             f"{timebase.sample_interval_s:g} s with {timebase.pretrigger_samples}")
    return TimeBase(dt, pre, timebase.n_samples)


_STIMULUS_NUMBERS = ("low_v", "high_v", "frequency_hz", "source_resistance_ohm", "edge_time_s")


def _stimulus(meta: dict[str, Any], where: str) -> Stimulus:
    """The stimulus as stored, checked field by field (a hand-edited JSON must not reach the model)."""
    stored = meta.get("stimulus")
    if not isinstance(stored, dict):
        raise ConfigError(where, "stimulus", "missing: the JSON beside an export gives the generator's stimulus")
    for key in _STIMULUS_NUMBERS:
        value = stored.get(key)
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
            raise ConfigError(where, f"stimulus.{key}", f"must be a finite number, not {value!r}")
    for key, allowed in (("edge", EDGES), ("load", LOADS)):
        if stored.get(key) not in allowed:
            raise ConfigError(where, f"stimulus.{key}", f"must be one of {', '.join(allowed)}, not {stored.get(key)!r}")
    return Stimulus(shape=str(stored.get("shape", "square")), edge=stored["edge"], load=stored["load"],
                    **{key: float(stored[key]) for key in _STIMULUS_NUMBERS})


def _csv_samples(path: str, time_column: str | None) -> tuple[TimeBase, list[tuple[str, str | None, np.ndarray]]]:
    """The checked time axis and each channel column as (name, unit from the header or None, samples)."""
    columns, data = _read_table(path)
    names = [c[0] for c in columns]
    time_name = time_column or names[0]
    if time_name not in names:
        raise ConfigError(path, "--time-column", f"no column {time_name!r}; columns are {', '.join(names)}")
    if len(names) < 2:
        raise ConfigError(path, "line 1", "needs a time column and at least one channel column")
    t_index = names.index(time_name)
    timebase = _timebase(data[:, t_index], path, time_name)
    return timebase, [(name, unit, data[:, j].copy()) for j, (name, unit) in enumerate(columns) if j != t_index]
