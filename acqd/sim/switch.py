"""The simulated switch ``acqd-sim,SW``: a relay multiplexer speaking the SCPI-1999 ROUTe subsystem.

Two banks of 32 relays, channels 101–132 and 201–232 (the fixture routes the generator to unit k through
channel 100 + k and unit k's output to the scope through 200 + k). ``*RST`` opens every relay.

| command | meaning |
|---|---|
| ``ROUTe:CLOSe <channel list>`` | close every listed relay; ``ROUTe:CLOSe? <channel list>`` answers 1/0 per channel |
| ``ROUTe:OPEN <channel list>`` | open every listed relay; ``ROUTe:OPEN? <channel list>`` answers 1/0 per channel |
| ``ROUTe:OPEN:ALL`` | open every relay |

A list naming a channel the switch does not have is −222 and changes nothing (the whole list is checked
before any relay moves). Fault injection: ``stuck_open`` holds channels whose relay never closes (a
broken coil or a welded-open contact), so ``CLOSe?`` reports them open — the path cannot be verified.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field

from .. import scpi
from .engine import Cmd, Param, SCPIError, SCPIInstrument

BANKS = (100, 200)
RELAYS_PER_BANK = 32
CHANNELS = tuple(bank + n for bank in BANKS for n in range(1, RELAYS_PER_BANK + 1))


@dataclass(frozen=True)
class ChannelListParam(Param):
    """A channel list program data element (``(@101,201)``, ``(@101:108)``), parsed by acqd.scpi."""

    optional: bool = False

    def parse(self, text: str) -> tuple[int, ...]:
        if not text.lstrip().startswith("("):
            raise SCPIError(-104, f"expected a channel list (@...), got {text[:20]}")
        try:
            channels = scpi.parse_channel_list(text)
        except ValueError as exc:
            raise SCPIError(-102, str(exc)) from None
        unknown = [c for c in channels if c not in CHANNELS]
        if unknown:
            raise SCPIError(-222, f"channel {unknown[0]} does not exist")
        return channels


@dataclass
class SwitchSettings:
    closed: set[int] = field(default_factory=set)
    last_close_s: float = -1e9  # monotonic instant of the last relay closing (bounce starts there)


class SimSwitch(SCPIInstrument):
    MODEL = "SW"
    COMMANDS = (
        Cmd("ROUTe:CLOSe", set="_close", params=(ChannelListParam(),), query="_closed_states",
            query_params=(ChannelListParam(),)),
        Cmd("ROUTe:OPEN", set="_open", params=(ChannelListParam(),), query="_open_states",
            query_params=(ChannelListParam(),)),
        Cmd("ROUTe:OPEN:ALL", set="_open_all"),
    )

    def __init__(self, *, log_path: str | None = None) -> None:
        self.stuck_open: set[int] = set()
        super().__init__(log_messages=True, log_path=log_path)

    def make_settings(self) -> SwitchSettings:
        return SwitchSettings()

    def _close(self, channels: tuple[int, ...]) -> None:
        moving = set(channels) - self.stuck_open - self.settings.closed
        self.settings.closed |= set(channels) - self.stuck_open
        if moving:
            self.settings.last_close_s = time.monotonic()

    def _open(self, channels: tuple[int, ...]) -> None:
        self.settings.closed -= set(channels)

    def _open_all(self) -> None:
        self.settings.closed.clear()

    def _closed_states(self, channels: tuple[int, ...]) -> str:
        return ",".join("1" if c in self.settings.closed else "0" for c in channels)

    def _open_states(self, channels: tuple[int, ...]) -> str:
        return ",".join("0" if c in self.settings.closed else "1" for c in channels)
