"""The record: one step response with everything needed to interpret it years later.

A record is plain data (dataclasses + numpy arrays) so that the step test can build it, the store can
persist it, the comparator can read it and replay can serve it, without any of them importing another.
Units are SI throughout; every channel carries its unit.
"""

from __future__ import annotations

import hashlib
import re
import zlib
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from . import __version__

EDGES = ("rising", "falling")
LOADS = ("high_z", "matched")  # generator load setting: high impedance or a 50 ohm ("matched") load

# Column headers of a record as a table (CSV): the name, then the unit in brackets, as on a plot's axis.
# Written by the store's export and read by the comparator's CSV input, so the two cannot drift apart.
TIME_COLUMN = "t [s]"
_COLUMN_HEADER = re.compile(r"^\s*(.*?)\s*(?:\[\s*([^\]]*?)\s*\])?\s*$")

# settings key that says where t = 0 of a record came from, for records not triggered by acqd (a CSV).
TIMING_SETTING = "timing"
BATCH_SETTING = "batch"  # settings key of a batch record: the unit serial and the switch path that connected it


def unit_serial_of(settings: Mapping[str, Any] | None, dut: Mapping[str, Any] | None) -> str | None:
    """A record's unit serial from its stored ``settings`` and ``dut`` (what readers of metadata have):
    the batch's serial when a switch chose the unit, else the [dut] table's."""
    batch = (settings or {}).get(BATCH_SETTING) or {}
    return batch.get("serial") or (dut or {}).get("serial")

# A bench's name (``[bench] bench_id``, ``acqd daemon --bench-id``): safe as a file name and an object key.
BENCH_ID = re.compile(r"^[A-Za-z0-9._-]{1,64}$")
BENCH_ID_RULE = "1 to 64 letters, digits, '.', '_' or '-'"


def bench_id_problem(text: str) -> str:
    """Why ``text`` is not a bench id ("" when it is one); the callers raise their own ConfigError with it.
    ``.`` and ``..`` alone are refused: as a path component they would not name a folder of their own."""
    if not isinstance(text, str) or not BENCH_ID.match(text) or text in (".", ".."):
        return f"{text!r} is not a bench id; allowed: {BENCH_ID_RULE} (not '.' or '..')"
    return ""


@dataclass(frozen=True)
class Channel:
    """One sampled waveform: ``samples[k]`` is the value at ``timebase.times()[k]``.

    ``source`` says where it came from: a scope input ("CH1"), or a math expression over other channels
    ("(CH1-CH2)/10"), so nobody has to guess later whether a current was measured or inferred.
    """

    name: str
    unit: str
    samples: np.ndarray
    source: str = ""


@dataclass(frozen=True)
class TimeBase:
    """The time axis, stored as three numbers instead of an array: t = 0 is the trigger (the stimulus edge)."""

    sample_interval_s: float
    pretrigger_samples: int
    n_samples: int

    def times(self) -> np.ndarray:
        """Sample instants in seconds; the first ``pretrigger_samples`` are negative (the baseline)."""
        return (np.arange(self.n_samples) - self.pretrigger_samples) * self.sample_interval_s


@dataclass(frozen=True)
class Stimulus:
    """The stimulus as applied by the generator (levels are what the generator was *set* to show).

    ``load`` is the generator's load setting: with ``matched`` the generator assumes a 50 ohm load and
    its open-circuit voltage is twice the set level, as on a real bench. ``source_resistance_ohm`` is its
    output resistance, which is part of the circuit the DUT sees.
    """

    shape: str
    low_v: float
    high_v: float
    frequency_hz: float
    edge: str
    load: str = "high_z"
    source_resistance_ohm: float = 50.0
    edge_time_s: float = 0.0

    @property
    def open_circuit_scale(self) -> float:
        """Ratio of the generator's open-circuit voltage to its set level (2 with a matched-load setting)."""
        return 2.0 if self.load == "matched" else 1.0

    def levels_emf(self) -> tuple[float, float]:
        """(before, after) open-circuit voltage around the captured edge."""
        lo, hi = self.low_v * self.open_circuit_scale, self.high_v * self.open_circuit_scale
        return (lo, hi) if self.edge == "rising" else (hi, lo)


@dataclass
class Record:
    """One acquisition. ``index`` is assigned by the store; ``analysis`` holds the comparator's result."""

    channels: list[Channel]
    timebase: TimeBase
    stimulus: Stimulus
    identities: dict[str, str] = field(default_factory=dict)
    settings: dict[str, Any] = field(default_factory=dict)
    dut: dict[str, Any] = field(default_factory=dict)
    utc: str = ""
    monotonic_s: float = 0.0
    profile_text: str = ""
    profile_sha256: str = ""
    acqd_version: str = __version__
    averages: int = 1
    analysis: dict[str, Any] | None = None
    index: int | None = None
    bench_id: str = ""  # which bench took it (the profile's [bench] bench_id); "" in stores made before it

    @property
    def unit_serial(self) -> str | None:
        """The unit this record is of: the batch's serial (a switch chose it), else the [dut] table's."""
        return unit_serial_of(self.settings, self.dut)

    @property
    def switch_path(self) -> str | None:
        """The switch channels that connected the unit, as a channel list ``(@101,201)``; None without a switch."""
        return (self.settings.get(BATCH_SETTING) or {}).get("path")

    def channel(self, name: str) -> Channel:
        """The channel called ``name``; a KeyError lists the names that exist."""
        for ch in self.channels:
            if ch.name == name:
                return ch
        raise KeyError(f"no channel {name!r}; channels are {[c.name for c in self.channels]}")

    @property
    def channel_names(self) -> list[str]:
        return [c.name for c in self.channels]

    def checksum(self) -> int:
        """CRC-32 over every channel's samples as float64 little-endian, in channel order.

        float64 so that the checksum does not depend on the dtype a store chooses, as long as it is lossless.
        """
        crc = 0
        for ch in self.channels:
            crc = zlib.crc32(np.ascontiguousarray(ch.samples, dtype="<f8").tobytes(), crc)
        return crc


def column_header(name: str, unit: str) -> str:
    """``v_c [V]``; a channel without a unit (a ratio) is its bare name."""
    return f"{name} [{unit}]" if unit else name


def split_column_header(cell: str) -> tuple[str, str | None]:
    """``"v_c [V]"`` → ``("v_c", "V")``; ``"v_c"`` → ``("v_c", None)`` (the header gave no unit)."""
    name, unit = _COLUMN_HEADER.match(cell).groups()  # the pattern matches any text
    return name, unit


def profile_hash(text: str) -> str:
    """SHA-256 of the profile text, so a record says exactly which profile produced it."""
    return hashlib.sha256(text.encode("utf-8")).hexdigest()
