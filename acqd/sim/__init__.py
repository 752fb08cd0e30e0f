"""Simulated instruments: SCPI servers on 127.0.0.1 standing in for a generator and two scopes.

``sim`` sits beside the data path: it imports ``scpi`` and ``models`` and nothing imports it except the
CLI, the profile's bench opener and tests. Start here: ``SimBench`` in ``bench.py``. The names below are
loaded on first use, so importing ``acqd.sim.plant`` alone does not start up the servers' machinery.
"""

from __future__ import annotations

from typing import Any

__all__ = ["SimBench", "SimBenchConfig"]


def __getattr__(name: str) -> Any:
    if name in __all__:
        from . import bench

        return getattr(bench, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
