"""acqd's own driver hooks: quirks common enough to ship, named in a driver file as
``hooks = { after_fetch = "acqd.instruments.hooks:invert" }``.

A driver file may name hooks only from here or from a module the operator allows in
``ACQD_HOOK_MODULES`` (see ``driver.allowed_hook_modules``), because a hook is code that runs in acqd.
"""

from __future__ import annotations

from typing import Any

import numpy as np


def invert(volts: np.ndarray, timebase: Any, *, channel: str, session: Any) -> tuple[np.ndarray, Any]:
    """For an input behind an inverting amplifier or a probe fitted the wrong way round: −v."""
    return -volts, timebase
