"""Random faults at stated rates: the ``[bench.simulated.faults]`` table (and ``acqd sim --faults FILE``), so
anyone can rehearse a bad night on the simulated bench before trusting acqd with a real one.

Each key is the probability (0 to 1) that the fault strikes at each chance it has; ``seed`` makes the
sequence repeatable (each instrument draws its own stream from it). The chances:

reply_delay       each reply       it waits ``reply_delay_s`` (default 2 s) first: a slow instrument, or a
                                   late reply when that is over the client's timeout
slow_opc          each ``*OPC?``   its reply waits ``reply_delay_s`` too: an operation that takes long
short_read        each reply       it is sent in two parts a moment apart (a correct client reads on): two
                                   TCP segments, HiSLIP Data then DataEnd, a VXI-11 read short of END
cut_block         each block reply cut half-way, the connection closed
garble_block      each block reply the header's digit count replaced by a non-digit
trigger_never     each arming      the acquisition never sees its trigger
power_cycle       each message     the instrument resets first (defaults, empty queue, PON): a power cycle
connection_reset  each message     the connection is reset before the message is read (between messages)
error_entry       each message     an execution error (-200) is queued after it, as a neighbour's fault would

``Faults`` (acqd.sim.engine) asks ``FaultPlan.draw(kind)`` at those points; the plain switches of
``Faults`` (set from Python by the tests) still work as before.
"""

from __future__ import annotations

from collections import Counter
from dataclasses import dataclass

import numpy as np

from ..config import Table

TABLE = "bench.simulated.faults"
KINDS = ("reply_delay", "slow_opc", "short_read", "cut_block", "garble_block", "trigger_never", "power_cycle",
         "connection_reset", "error_entry")


@dataclass(frozen=True)
class FaultRates:
    """A validated faults table: a probability per kind, the delay of a delayed reply, and the seed."""

    seed: int = 0
    reply_delay_s: float = 2.0
    reply_delay: float = 0.0
    slow_opc: float = 0.0
    short_read: float = 0.0
    cut_block: float = 0.0
    garble_block: float = 0.0
    trigger_never: float = 0.0
    power_cycle: float = 0.0
    connection_reset: float = 0.0
    error_entry: float = 0.0

    @classmethod
    def from_table(cls, table: Table) -> FaultRates:
        d = cls()
        values = {"seed": table.integer("seed", d.seed, min=0),
                  "reply_delay_s": table.number("reply_delay_s", d.reply_delay_s, min=0.0, max=60.0, unit="s")}
        values.update({kind: table.number(kind, 0.0, min=0.0, max=1.0, unit="probability") for kind in KINDS})
        table.done()
        return cls(**values)

    @property
    def any(self) -> bool:
        return any(getattr(self, kind) > 0 for kind in KINDS)


class FaultPlan:
    """One instrument's draws from ``rates``: ``stream`` tells instruments apart under one seed. ``counts``
    says how often each kind struck (what a soak reports as injected)."""

    def __init__(self, rates: FaultRates, stream: int) -> None:
        self.rates = rates
        self._rng = np.random.default_rng([rates.seed, stream])
        self.counts: Counter[str] = Counter()

    def draw(self, kind: str) -> bool:
        rate = getattr(self.rates, kind)
        if rate <= 0 or self._rng.random() >= rate:
            return False
        self.counts[kind] += 1
        return True

