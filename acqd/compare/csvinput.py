"""A record from a CSV file, for traces that did not come through acqd (another scope's export, a
simulation). The header names a time column (seconds, t = 0 at the stimulus edge) and one column per
channel, optionally with a unit in brackets: ``t_s,v_c [V],i_l [A]``. The stimulus cannot be read from a
CSV, so the caller supplies it. Every problem is one line naming the file, the line and the column.
"""

from __future__ import annotations

import csv
import math
import re
from pathlib import Path

import numpy as np

from ..errors import ConfigError
from ..record import Channel, Record, Stimulus, TimeBase

GRID_TOLERANCE = 0.01  # share of a sample interval a time may stray from the uniform grid
_HEADER = re.compile(r"^\s*(.*?)\s*(?:\[\s*([^\]]*?)\s*\])?\s*$")


def _columns(header: list[str], path: str) -> list[tuple[str, str]]:
    columns = []
    for i, cell in enumerate(header, start=1):
        name, unit = _HEADER.match(cell).groups()  # the pattern matches any text
        if not name:
            raise ConfigError(path, f"line 1, column {i}", "the header names no column here")
        columns.append((name, unit or "V"))
    names = [c[0] for c in columns]
    if len(set(names)) != len(names):
        raise ConfigError(path, "line 1", f"column names must be unique, got {', '.join(names)}")
    return columns


def _read_table(path: str) -> tuple[list[tuple[str, str]], np.ndarray]:
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
            try:
                value = float(cell)
            except ValueError:
                raise ConfigError(path, where, f"{cell.strip()!r} is not a number") from None
            if not math.isfinite(value):
                raise ConfigError(path, where, f"{cell.strip()!r} is not a finite number")
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
    """The CSV's channels on its time axis, with ``stimulus`` as the record's stimulus."""
    path = str(path)
    columns, data = _read_table(path)
    names = [c[0] for c in columns]
    time_name = time_column or names[0]
    if time_name not in names:
        raise ConfigError(path, "--time-column", f"no column {time_name!r}; columns are {', '.join(names)}")
    if len(names) < 2:
        raise ConfigError(path, "line 1", "needs a time column and at least one channel column")
    t_index = names.index(time_name)
    timebase = _timebase(data[:, t_index], path, time_name)
    channels = [Channel(name, unit, data[:, j].copy(), f"{Path(path).name}:{name}")
                for j, (name, unit) in enumerate(columns) if j != t_index]
    return Record(channels, timebase, stimulus, settings={"source_file": path})
