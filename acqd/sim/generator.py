"""The simulated function generator ``acqd-sim,FG``: SCPI-1999 SOURce/OUTPut subset, 50 Ω source.

Levels are stored as the user set them — as they would appear across the load the generator is set for
(``OUTPut:LOADing``). The DUT sees the open-circuit voltage (EMF) behind the 50 Ω source resistance: equal
to the set level with ``HIGHz``, twice it with ``MATChed`` (a 50 Ω load halves the EMF), which is the
classic bench surprise this simulation must reproduce.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable
from dataclasses import dataclass

from .engine import Boolean, Choice, Cmd, LimitQuery, Number, SCPIError, SCPIInstrument, setting

SOURCE_RESISTANCE_OHM = 50.0
LEVEL_LIMIT_HIGHZ_V = 10.0  # |level| limit into high impedance; halved for a matched load
MIN_AMPLITUDE_VPP = 1e-3

SHAPES = ("SQUare", "SINusoid", "PULSe", "DC")
LOADS = ("HIGHz", "MATChed")
FREQUENCY = Number("HZ", 1e-3, 1e6, default=1e3)
AMPLITUDE = Number("V", MIN_AMPLITUDE_VPP, 2 * LEVEL_LIMIT_HIGHZ_V, default=1.0)
LEVEL = Number("V", -LEVEL_LIMIT_HIGHZ_V, LEVEL_LIMIT_HIGHZ_V, default=0.0)

_SOURCE = "[SOURce<1>:]"
_VOLTAGE = _SOURCE + "VOLTage[:LEVel][:IMMediate]"


@dataclass
class GeneratorSettings:
    """The ``*RST`` state: a 1 kHz, 1 Vpp square wave around 0 V, output relay open."""

    shape: str = "SQUare"
    frequency_hz: float = 1e3
    amplitude_vpp: float = 1.0
    offset_v: float = 0.0
    load: str = "HIGHz"
    output_on: bool = False
    sync_on: bool = False
    phase_origin_s: float = 0.0  # monotonic instant of a rising edge (waveform restarted there)

    @property
    def high_v(self) -> float:
        return self.offset_v + self.amplitude_vpp / 2

    @property
    def low_v(self) -> float:
        return self.offset_v - self.amplitude_vpp / 2

    @property
    def open_circuit_scale(self) -> float:
        """EMF per volt of set level: 2 when set for a matched (50 Ω) load."""
        return 2.0 if self.load == "MATChed" else 1.0

    @property
    def level_limit_v(self) -> float:
        return LEVEL_LIMIT_HIGHZ_V / self.open_circuit_scale

    def emf_levels(self) -> tuple[float, float]:
        """(low, high) open-circuit voltage; a DC shape has both at the offset."""
        if self.shape == "DC":
            return (self.offset_v * self.open_circuit_scale,) * 2
        return self.low_v * self.open_circuit_scale, self.high_v * self.open_circuit_scale

    def half_period_s(self) -> float:
        return 0.5 / self.frequency_hz


def _level_cmd(leaf: str, setter: str, attr: str, param: Number) -> Cmd:
    """A level command: a custom setter (levels move together) and a query with MIN|MAX|DEF."""
    def query(inst: Generator, *limit: float) -> str:
        return param.format(limit[0] if limit else getattr(inst.settings, attr))
    return Cmd(_VOLTAGE + leaf, set=setter, params=(param,), query=query, query_params=(LimitQuery(param),))


class Generator(SCPIInstrument):
    MODEL = "FG"
    COMMANDS = (
        setting(_SOURCE + "FUNCtion[:SHAPe]", "shape", Choice(SHAPES)),
        Cmd(_SOURCE + "FUNCtion:TRANsition", query="_transition"),
        setting(_SOURCE + "FREQuency[:CW|:FIXed]", "frequency_hz", FREQUENCY),
        _level_cmd("[:AMPLitude]", "_set_amplitude", "amplitude_vpp", AMPLITUDE),
        _level_cmd(":OFFSet", "_set_offset", "offset_v", LEVEL),
        _level_cmd(":HIGH", "_set_high", "high_v", LEVEL),
        _level_cmd(":LOW", "_set_low", "low_v", LEVEL),
        setting("OUTPut<1>[:STATe]", "output_on", Boolean()),
        Cmd("OUTPut<1>:IMPedance", query=lambda inst: Number().format(SOURCE_RESISTANCE_OHM)),
        setting("OUTPut<1>:LOADing", "load", Choice(LOADS), check="_check_load"),
        setting("OUTPut<1>:SYNC[:STATe]", "sync_on", Boolean()),
    )

    def __init__(self, *, edge_time_s: float = 20e-9, log_path: str | None = None) -> None:
        self.edge_time_s = edge_time_s  # 10-90 % transition time, a property of the hardware
        self.listeners: list[Callable[[], None]] = []
        self._waveform = None
        super().__init__(log_messages=True, log_path=log_path)

    def make_settings(self) -> GeneratorSettings:
        return GeneratorSettings(phase_origin_s=time.monotonic())

    def settings_changed(self) -> None:
        """Restart the waveform's phase when what shapes it changes, then tell the scopes."""
        s = self.settings
        waveform = (s.shape, s.frequency_hz, s.output_on)
        if waveform != self._waveform:
            s.phase_origin_s = time.monotonic()
            self._waveform = waveform
        for listener in list(self.listeners):
            listener()

    # -- levels: amplitude/offset and high/low are two views of one pair ------------------------
    def _store_levels(self, low_v: float, high_v: float) -> None:
        """Accept a level pair only if both are inside the load-dependent limit (else −222, no change)."""
        limit = self.settings.level_limit_v
        for name, value in (("low", low_v), ("high", high_v)):
            if abs(value) > limit * (1 + 1e-12):
                raise SCPIError(-222, f"{name} level {value:g} V beyond +/-{limit:g} V for load "
                                      f"{self.settings.load.upper()}")
        if high_v - low_v < MIN_AMPLITUDE_VPP * (1 - 1e-12):
            raise SCPIError(-221, f"high level must exceed low level by at least {MIN_AMPLITUDE_VPP:g} V")
        self.settings.amplitude_vpp = high_v - low_v
        self.settings.offset_v = (high_v + low_v) / 2
        self.settings_changed()

    def _set_amplitude(self, amplitude: float) -> None:
        s = self.settings
        self._store_levels(s.offset_v - amplitude / 2, s.offset_v + amplitude / 2)

    def _set_offset(self, offset: float) -> None:
        s = self.settings
        self._store_levels(offset - s.amplitude_vpp / 2, offset + s.amplitude_vpp / 2)

    def _set_high(self, high: float) -> None:
        self._store_levels(self.settings.low_v, high)

    def _set_low(self, low: float) -> None:
        self._store_levels(low, self.settings.high_v)

    def _check_load(self, load: str) -> None:
        limit = LEVEL_LIMIT_HIGHZ_V / (2.0 if load == "MATChed" else 1.0)
        worst = max(abs(self.settings.low_v), abs(self.settings.high_v))
        if worst > limit:
            raise SCPIError(-221, f"levels up to {worst:g} V exceed +/-{limit:g} V allowed with load {load.upper()}")

    def _transition(self) -> str:
        return Number().format(self.edge_time_s)

    # -- for the scopes ---------------------------------------------------------------------------
    @property
    def ramp_s(self) -> float:
        """Duration of the linear edge ramp whose 10-90 % time is ``edge_time_s``."""
        return self.edge_time_s / 0.8

    def next_edge_s(self, after_s: float, rising: bool) -> float:
        """Monotonic instant of the first rising (or falling) edge start at or after ``after_s``."""
        s = self.settings
        period = 1.0 / s.frequency_hz
        first = s.phase_origin_s + (0.0 if rising else period / 2)
        k = max(0, math.ceil((after_s - first) / period))
        return first + k * period
