"""The second scope dialect ``acqd-sim,DIVSCOPE``: per-division settings, integer codes only, its own
arming and a state poll (``CATCh:STATe?``) instead of ``*OPC?``.

It is deliberately unlike the SCPI-1999 digitiser, so that the driver layer is exercised on a dialect it
cannot map one to one. Underneath it is the same acquisition engine and front end, so the same capture
through either dialect gives the same volts.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .frontend import ChannelSetup
from .scope import (MAX_POINTS, N_CHANNELS, Acquisition, Bench, CaptureRequest, channel_data, number_list,
                    trace_axes)
from .engine import Choice, Cmd, Integer, Number, SCPIInstrument, setting

VERTICAL_DIVISIONS = 8
HORIZONTAL_DIVISIONS = 10
WIDTHS = {8: "INT,8", 16: "INT,16"}


@dataclass
class DivChannel:
    volts_per_division: float = 0.1
    centre_v: float = 0.0
    coupling: str = "DC"


@dataclass
class DivSettings:
    """The ``*RST`` state."""

    seconds_per_division: float = 1e-4
    points: int = 1000
    lead: float = 0.1
    channels: list[DivChannel] = field(default_factory=lambda: [DivChannel() for _ in range(N_CHANNELS)])
    source: str = "EXTernal"
    edge: str = "UP"
    threshold_v: float = 0.0
    width: int = 8


class DivScope(SCPIInstrument):
    MODEL = "DIVSCOPE"
    COMMANDS = (
        setting("LANE<1-4>:PERDiv", "volts_per_division", Number("V", 1e-4, 20.0, default=0.1)),
        setting("LANE<1-4>:CENTer", "centre_v", Number("V", -100.0, 100.0, default=0.0)),
        setting("LANE<1-4>:COUPling", "coupling", Choice(("DC", "AC"))),
        setting("SPAN:PERDiv", "seconds_per_division", Number("S", 1e-10, 100.0, default=1e-4)),
        setting("SPAN:POINts", "points", Integer(minimum=16, maximum=MAX_POINTS, default=1000)),
        setting("SPAN:LEAD", "lead", Number("", 0.0, 0.9, default=0.1)),
        setting("CATCh:SOURce", "source", Choice(("EXTernal", "FREE"))),
        setting("CATCh:EDGE", "edge", Choice(("UP", "DOWN"))),
        setting("CATCh:THReshold", "threshold_v", Number("V", -100.0, 100.0, default=0.0)),
        Cmd("CATCh:ONCE", set="_arm"),
        Cmd("CATCh:HALT", set=lambda inst: inst.acquisition.abort()),
        Cmd("CATCh:STATe", query=lambda inst: inst.acquisition.state),
        setting("BLOCk:WIDTh", "width", Integer(minimum=8, maximum=16, default=8, allowed=tuple(WIDTHS))),
        Cmd("BLOCk:LANE<1-4>:CODes", query="_codes"),
        Cmd("BLOCk:LANE<1-4>:SCALing", query="_scaling"),
    )

    def __init__(self, bench: Bench, rng: np.random.Generator) -> None:
        super().__init__()
        self.bench = bench
        self.acquisition = Acquisition(bench, rng, lambda: self.faults.hit("trigger_never"), self.operation_complete)

    def make_settings(self) -> DivSettings:
        return DivSettings()

    def reset(self) -> None:
        self.acquisition.abort()
        super().reset()

    def _arm(self) -> None:
        s = self.settings
        self.acquisition.arm(CaptureRequest(
            sample_interval_s=HORIZONTAL_DIVISIONS * s.seconds_per_division / s.points, n_samples=s.points,
            first_index=-round(s.lead * s.points), external=s.source == "EXTernal", rising=s.edge == "UP",
            level_v=s.threshold_v,
            channels=tuple(ChannelSetup(c.centre_v, VERTICAL_DIVISIONS / 2 * c.volts_per_division, c.coupling)
                           for c in s.channels)))

    def _codes(self, channel: int) -> bytes:
        """Signed codes, little-endian when 16 bits wide."""
        return channel_data(self.acquisition.record, channel, self.bench.front_end, WIDTHS[self.settings.width],
                            "SWAPped")

    def _scaling(self, channel: int) -> str:
        """``volts_per_code,volts_at_code_0,seconds_per_sample,seconds_at_first_sample``."""
        dt, t_first, per_code, at_zero = trace_axes(self.acquisition.record, channel, WIDTHS[self.settings.width])
        return number_list((per_code, at_zero, dt, t_first))
