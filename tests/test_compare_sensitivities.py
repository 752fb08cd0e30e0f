"""The fit's exact parameter sensitivities against central differences of the simulated response, on
every model of the registry.

Reference: the central difference (f(θ + h) − f(θ − h)) / 2h, whose error is O(h²) (textbook, e.g.
Nocedal & Wright 2006, Numerical Optimization, §8.1), of the comparator's own prediction of the channels;
with a relative step of 1e-5 its error is far below the 1e-5 the check allows.
"""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest

from acqd.benchsession import open_bench
from acqd.compare import compare_spec, parse_dut_table
import acqd.compare.core as core
from acqd.compare.core import EDGE_PARAMETER, _setup, _Setup
from acqd.compare.memo import Memo
from acqd.compare.spec import spec_from_parts
from acqd.compare.stimulus import Edge
from acqd.models import BUILDERS
from acqd.profile import load_profile
from acqd.record import Channel, Record, Stimulus, TimeBase
from acqd.steptest import run_step_test
from test_run import profile_file

ROOT = Path(__file__).resolve().parent.parent
LADDER = (ROOT / "profiles" / "sl2-ladder.cir").read_text()
RELATIVE_STEP = 1e-5
TOLERANCE = 1e-5  # relative to each column's norm, as the issue asks

# One table per model of the registry (our own part values), the model outputs the channels show, and the
# parameters to differentiate by; the matrix model has no scalar parameter, only the edge instant.
CASES = {
    "series_rlc": ({"model": "series_rlc", "r_ohm": 22.0, "l_h": 3.3e-3, "c_f": 68e-9},
                   ("v_src", "v_rl", "v_c"), ("r_ohm", "l_h", "c_f", "source_resistance_ohm"), 1.2e-3),
    "parallel_rlc": ({"model": "parallel_rlc", "r_ohm": 470.0, "l_h": 1e-3, "c_f": 220e-9},
                     ("v_c", "i_src"), ("r_ohm", "l_h", "c_f", "source_resistance_ohm"), 1.5e-3),
    "rc_lowpass": ({"model": "rc_lowpass", "r_ohm": 1000.0, "c_f": 330e-9}, ("v_src", "v_c"),
                   ("r_ohm", "c_f", "source_resistance_ohm"), 2e-3),
    "series_rl": ({"model": "series_rl", "r_ohm": 100.0, "l_h": 10e-3}, ("v_rl", "i_l"),
                  ("r_ohm", "l_h", "source_resistance_ohm"), 5e-4),
    "second_order": ({"model": "second_order", "wn_rad_s": 2 * np.pi * 2e3, "zeta": 0.3, "gain": 2.5},
                     ("y", "dy_dt"), ("wn_rad_s", "zeta", "gain"), 2e-3),
    "netlist": ({"model": "netlist", "netlist": LADDER, "source": "V1"}, ("v(out)", "v(n1)"),
                ("L1", "C1", "L2", "C2", "R2"), 5e-4),
    "state_space": ({"model": "state_space", "A": [[0.0, 1.0], [-4e8, -4e3]], "B": [[0.0], [4e8]],
                     "C": [[1.0, 0.0]], "D": [[0.0]], "states": ["y", "v"], "outputs": ["y"]},
                    ("y",), (), 1e-3),
}


def test_every_model_of_the_registry_is_covered():
    assert set(CASES) == set(BUILDERS)


def _record(outputs: tuple[str, ...], window_s: float) -> Record:
    """Channels named like the outputs (their samples do not enter the derivatives), with an edge of 12
    samples' duration so that the edge instant is a fit parameter too."""
    n = 3000
    tb = TimeBase(window_s / n, n // 5, n)
    channels = [Channel(f"ch{i}", "V", np.zeros(n), name) for i, name in enumerate(outputs)]
    stimulus = Stimulus("square", 0.0, 1.0, 100.0, "rising", edge_time_s=12 * 0.8 * tb.sample_interval_s)
    return Record(channels, tb, stimulus, utc="2026-12-04T10:00:00+00:00")


@pytest.mark.parametrize("name", sorted(CASES))
def test_sensitivities_match_central_differences(name):
    table, outputs, parameters, window_s = CASES[name]
    record = _record(outputs, window_s)
    mapping = {f"ch{i}": {"signal": out, "gain": 1.5 - 0.25 * i, "offset": 0.1 * i} for i, out in enumerate(outputs)}
    setup = _setup(record, spec_from_parts(table, mapping), "test")
    dt = record.timebase.sample_interval_s
    edge = replace(setup.edge, t50_s=0.37 * dt)  # between samples, no ramp corner on a sample
    values = {p: setup.nominal[p] for p in parameters}
    values[EDGE_PARAMETER] = edge.t50_s
    scale = np.array([2.0, 0.5, 3.0][:len(outputs)])
    exact = setup.sensitivities(values, edge, EDGE_PARAMETER, scale)
    differences = central_differences(setup, values, edge, EDGE_PARAMETER, scale)
    for j, p in enumerate(values):
        column = differences[:, j]
        assert np.linalg.norm(column) > 0, p
        error = np.linalg.norm(exact[:, j] - column) / np.linalg.norm(column)
        assert error < TOLERANCE, (name, p, error)


def central_differences(setup: _Setup, values: dict[str, float], edge: Edge, edge_parameter: str,
                        channel_scale: np.ndarray) -> np.ndarray:
    """What ``_Setup.sensitivities`` returns, by central differences of ``_Setup.predict`` (the reference)."""
    def predicted(v: dict[str, float]) -> np.ndarray:
        params = {k: x for k, x in v.items() if k != edge_parameter}
        moved = replace(edge, t50_s=v.get(edge_parameter, edge.t50_s))
        _, channels, _ = setup.predict(setup.model(params), moved)
        return (channels * np.reshape(channel_scale, (-1, 1))).ravel()

    dt = setup.times[1] - setup.times[0]
    columns = []
    for p, value in values.items():
        h = RELATIVE_STEP * (dt if p == edge_parameter else abs(value))
        columns.append((predicted({**values, p: value + h}) - predicted({**values, p: value - h})) / (2 * h))
    return np.column_stack(columns)


def test_the_demo_fit_is_the_one_finite_differences_give(tmp_path: Path, monkeypatch: pytest.MonkeyPatch):
    # A demo record from the simulated bench, fitted once with the exact sensitivities and once with the
    # central-difference Jacobian in their place: the same optimum within a hundredth of each interval.
    profile = load_profile(profile_file(tmp_path))
    with open_bench(profile) as bench:
        (record,) = run_step_test(profile, bench.generator, bench.scope)
    spec = parse_dut_table(profile.dut, profile.source, profile.text)
    exact = compare_spec(record, spec)

    def predicted_and_central_differences(setup: _Setup, values: dict[str, float], edge: Edge,
                                          edge_parameter: str, channel_scale: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        params = {k: x for k, x in values.items() if k != edge_parameter}
        moved = replace(edge, t50_s=values.get(edge_parameter, edge.t50_s))
        return (setup.predict(setup.model(params), moved)[1],
                central_differences(setup, values, edge, edge_parameter, channel_scale))

    # the fit takes its residuals and Jacobian from this one method: with it replaced (and the start's
    # remembered exact pair forgotten), nothing exact is left
    monkeypatch.setattr(_Setup, "response_and_sensitivities", predicted_and_central_differences)
    monkeypatch.setattr(core, "_NOMINAL_SENSITIVITIES", Memo())
    reference = compare_spec(record, spec)
    assert exact.fit.fitted == reference.fit.fitted and {"r_ohm", "l_h", "c_f"} <= set(exact.fit.fitted)
    for name in exact.fit.fitted:
        lo, hi = reference.fit.ci95[name]
        assert abs(exact.fit.values[name] - reference.fit.values[name]) <= (hi - lo) / 100, name
        assert exact.fit.ci95[name] == pytest.approx(reference.fit.ci95[name], rel=1e-6)
    assert exact.verdict.status == reference.verdict.status
    assert [c.passed for c in exact.verdict.checks] == [c.passed for c in reference.verdict.checks]
