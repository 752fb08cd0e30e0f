"""A kill switch at named steps of a write, so crash tests can stop the writer exactly where it hurts.

Kills at random moments almost never land between two steps of a write (measured; DEVELOPERS.md, "The store"),
so the store calls ``step(name)`` between the steps that matter. With the environment variable
``ACQD_STORE_KILL_AT=NAME@K`` set, the K-th time (default 1) the process reaches step NAME it sends
itself SIGKILL: no cleanup, no flush, exactly like a crash. The variable is read once, when this module
is imported (crash tests set it for a fresh child process); unset, a step costs one comparison.
"""

from __future__ import annotations

import os
import signal
from collections import Counter

ENV = "ACQD_STORE_KILL_AT"
_TARGET, _, _NTH = os.environ.get(ENV, "").partition("@")
_reached: Counter[str] = Counter()


def step(name: str) -> None:
    """Mark that the writer reached step ``name``; die here if ``ACQD_STORE_KILL_AT`` says so."""
    if name != _TARGET:
        return
    _reached[name] += 1
    if _reached[name] == int(_NTH or 1):
        os.kill(os.getpid(), signal.SIGKILL)
