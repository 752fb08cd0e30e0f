"""A simulated fixture of N units behind the simulated switch: one batch, parts scattered within tolerance.

Unit k (1-based) is reached through switch channel 100 + k (generator to its input) and 200 + k (its
output to the scope); the scopes see unit k only while both are closed and no other unit's are. Each unit
is the bench's DUT with every scattered part drawn uniformly within ± its tolerance (seeded, so a batch is
the same batch every run); ``out_of_tolerance`` makes one unit's part a fixed factor off nominal, the unit
the demo's comparator must find. A relay that has just closed bounces: for ``bounce_s`` after a close the
captured signals carry a burst of disturbance that dies out linearly, so a missing settling wait shows.

Profile table ``[bench.simulated.fixture]`` (all optional):

units             int     how many units the fixture holds (default: the [batch]'s count), 1 – 32
seed              int     seeds the parts' scatter and the bounce
tolerance_pct     number  scatter of every numeric part of [bench.simulated.dut] (± %), or a table per part
out_of_tolerance  table   { unit = k, parameter = "c_f", factor = 1.3 }: unit k's part is factor × nominal
bounce_s          ≥ 0     how long a closed relay bounces
bounce_v          ≥ 0     rms disturbance at the moment of closing
"""

from __future__ import annotations

import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..config import Table
from ..errors import ConfigError
from ..models import build_model, parameter_infos
from ..models.signal import Signal
from .plant import Plant
from .engine import SCPIError
from .switch import BANKS, RELAYS_PER_BANK

TABLE = "bench.simulated.fixture"
DEFAULT_TOLERANCE_PCT = 1.0


@dataclass(frozen=True)
class OutOfTolerance:
    unit: int
    parameter: str
    factor: float


@dataclass(frozen=True)
class FixtureConfig:
    units: int
    seed: int = 1
    tolerance_pct: Mapping[str, float] | float = DEFAULT_TOLERANCE_PCT
    out_of_tolerance: OutOfTolerance | None = None
    bounce_s: float = 0.02
    bounce_v: float = 0.2

    @classmethod
    def from_table(cls, t: Table, default_units: int | None) -> FixtureConfig:
        units = t.integer("units", default_units if default_units is not None else ..., min=1, max=RELAYS_PER_BANK)
        tolerance: Mapping[str, float] | float
        if isinstance(t.raw("tolerance_pct", None), dict):
            table = t.table("tolerance_pct")
            tolerance = {name: table.number(name, min=0, max=50, unit="%") for name in list(table.data)}
            table.done()
        else:
            tolerance = t.number("tolerance_pct", DEFAULT_TOLERANCE_PCT, min=0, max=50, unit="%")
        faulty = None
        if t.has("out_of_tolerance"):
            ft = t.table("out_of_tolerance")
            faulty = OutOfTolerance(ft.integer("unit", min=1, max=units), ft.string("parameter"),
                                    ft.number("factor", positive=True))
            ft.done()
        config = cls(units, t.integer("seed", 1, min=0), tolerance, faulty,
                     t.number("bounce_s", 0.02, min=0, unit="s"), t.number("bounce_v", 0.2, min=0, unit="V rms"))
        t.done()
        return config


def unit_path(unit: int) -> tuple[int, int]:
    """The switch channels that connect unit ``unit`` (1-based): generator side, scope side."""
    return BANKS[0] + unit, BANKS[1] + unit


@dataclass
class Fixture:
    """The units' DUT tables and plants, and which unit the switch connects now."""

    config: FixtureConfig
    duts: list[dict[str, Any]]
    plants: list[Plant]
    rng: np.random.Generator = field(repr=False)

    @classmethod
    def build(cls, config: FixtureConfig, dut: Mapping[str, Any], source: str) -> Fixture:
        """Scatter the parts of ``dut`` per unit; a bad part name is a ConfigError naming the fixture key."""
        scattered = _scattered_parts(config, dut, source)
        rng = np.random.default_rng(config.seed)
        duts = []
        for unit in range(1, config.units + 1):
            table = dict(dut)
            for name, pct in scattered.items():
                table[name] = float(dut[name]) * (1 + rng.uniform(-pct, pct) / 100)
            faulty = config.out_of_tolerance
            if faulty is not None and faulty.unit == unit:
                table[faulty.parameter] = float(dut[faulty.parameter]) * faulty.factor
            duts.append(table)
        plants = [Plant(build_model(d, f"{source} [{TABLE}]")) for d in duts]
        return cls(config, duts, plants, rng)

    def connected_unit(self, closed: set[int]) -> int:
        """The one unit whose whole path is closed; −300 when none is or when two are (a wrong path)."""
        units = [k for k in range(1, self.config.units + 1) if set(unit_path(k)) <= closed]
        if len(units) != 1:
            raise SCPIError(-300, "the switch connects no unit of the fixture" if not units else
                            f"the switch connects units {units} at once")
        return units[0]

    def plant(self, closed: set[int], last_close_s: float) -> BouncingPlant:
        unit = self.connected_unit(closed)
        return BouncingPlant(self.plants[unit - 1], lambda: time.monotonic() - last_close_s, self.config, self.rng)


class BouncingPlant:
    """A unit's plant seen through a relay that may still be bouncing (an added, dying disturbance)."""

    def __init__(self, plant: Plant, age_s: Callable[[], float], config: FixtureConfig,
                 rng: np.random.Generator) -> None:
        self.model = plant.model
        self._plant, self._age_s, self._config, self._rng = plant, age_s, config, rng

    def window(self, *, signals: Sequence[Signal], **window: Any) -> list[np.ndarray]:
        values = self._plant.window(signals=signals, **window)
        left = 1.0 - self._age_s() / self._config.bounce_s if self._config.bounce_s > 0 else 0.0
        if left <= 0:
            return values
        return [v + self._config.bounce_v * left * self._rng.standard_normal(len(v)) for v in values]


def _scattered_parts(config: FixtureConfig, dut: Mapping[str, Any], source: str) -> dict[str, float]:
    """Part → ± % to scatter: the tolerance table's parts, or every numeric part the DUT table gives."""
    allowed = [name for name in parameter_infos(dut, source) if name != "source_resistance_ohm"]
    present = [name for name in allowed if isinstance(dut.get(name), (int, float))]
    if isinstance(config.tolerance_pct, Mapping):
        parts = dict(config.tolerance_pct)
    else:
        parts = {name: float(config.tolerance_pct) for name in present}
    faulty = config.out_of_tolerance
    named = [*parts, *([faulty.parameter] if faulty else [])]
    for name in named:
        if name not in present:
            raise ConfigError(source, f"{TABLE}.{'tolerance_pct.' + name if name in parts else 'out_of_tolerance'}",
                              f"{name!r} is not a part given in [bench.simulated.dut]; allowed: "
                              f"{', '.join(present) or '(none)'}")
    return parts
