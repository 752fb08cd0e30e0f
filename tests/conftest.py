"""Shared fixtures: a simulated bench on 127.0.0.1 and VISA sessions to it through pyvisa-py.

``sim_bench(config_or_table, **keys)`` starts a bench (servers on ports the OS picks) and the fixture stops
it after the test; ``visa(resource)`` opens a pyvisa session with the bench's line terminations and closes
it after the test. Both are factories, so a test can start several benches or sessions. ``transport``
runs a test once per transport the simulated bench serves.
"""

from __future__ import annotations

import os

# The simulated bench does many tiny matrix operations (4×4 exponentials); with BLAS worker threads on a
# shared 2-core machine each one spun for milliseconds (measured: 63 ms → 2 ms per plant window). Set
# before numpy is imported; a value given in the environment wins.
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

from collections.abc import Callable, Iterator, Mapping  # noqa: E402
from typing import Any  # noqa: E402

import pytest  # noqa: E402

from acqd.sim.bench import TRANSPORTS, SimBench, SimBenchConfig  # noqa: E402

# Front-end imperfections off: exact plant values through the 8-bit ADC only (quantisation stays on).
QUIET: dict[str, Any] = {"noise_v_rms": 0.0, "jitter_s": 0.0, "bandwidth_hz": 0.0, "edge_time_s": 0.0}


@pytest.fixture(params=TRANSPORTS)
def transport(request: pytest.FixtureRequest) -> str:
    """Each transport the simulated bench serves (raw socket, HiSLIP, VXI-11 without a portmapper): a test
    that takes it runs once per transport, through pyvisa-py's client for each."""
    return request.param


@pytest.fixture
def quiet_table() -> dict[str, Any]:
    """A ``[bench.simulated]`` table with noise, jitter, bandwidth and edge time off (the ADC stays on)."""
    return dict(QUIET)


@pytest.fixture
def sim_bench() -> Iterator[Callable[..., SimBench]]:
    """Factory: ``sim_bench()`` the demo bench; ``sim_bench({"seed": 3})`` or ``sim_bench(seed=3)`` a
    ``[bench.simulated]`` table; ``sim_bench(SimBenchConfig(...))`` a ready config."""
    started: list[SimBench] = []

    def start(config: SimBenchConfig | Mapping[str, Any] | None = None, **keys: Any) -> SimBench:
        if not isinstance(config, SimBenchConfig):
            table = {**(config or {}), **keys}
            config = SimBenchConfig.from_mapping(table, "test fixture") if table else SimBenchConfig()
        bench = SimBench(config).start()
        started.append(bench)
        return bench

    yield start
    for bench in reversed(started):
        bench.stop()


@pytest.fixture
def visa() -> Iterator[Callable[..., Any]]:
    """Factory: ``visa(resource, timeout_ms=2000)`` → an open pyvisa session (``\\n`` terminations)."""
    import pyvisa

    rm = pyvisa.ResourceManager("@py")
    sessions = []

    def open_session(resource: str, timeout_ms: int = 2000) -> Any:
        session = rm.open_resource(resource, read_termination="\n", write_termination="\n", timeout=timeout_ms)
        sessions.append(session)
        return session

    yield open_session
    for session in sessions:
        try:
            session.close()
        except Exception:  # already closed by the test, or the server dropped it on purpose
            pass
    rm.close()
