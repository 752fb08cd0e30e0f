"""Netlist models in the comparator and on the simulated bench: element values as fit parameters and
tolerances, the netlist in a file beside the profile, and the second demo profile (issue 13).

References: the step response of a linear system from the matrix exponential, x(t) = A⁻¹(e^{At} − I)B
for a unit step from rest (textbook state-space theory, e.g. Ogata, Modern Control Engineering, ch. 9),
computed with scipy.linalg.expm — not with acqd's own discretisation; the model itself is checked against
ngspice in test_netlist.py.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
import scipy.linalg

from acqd.cli import main
from acqd.compare import compare
from acqd.errors import ConfigError
from acqd.models import build_model, parameter_infos
from acqd.profile import load_profile
from acqd.record import Stimulus, TimeBase
from acqd.sim.bench import SimBenchConfig
from test_compare_synthetic import make_record

ROOT = Path(__file__).resolve().parent.parent
LADDER = (ROOT / "profiles" / "sl2-ladder.cir").read_text()
TRUE = {"L1": 1.47e-3, "C1": 48e-9, "L2": 1.53e-3, "C2": 46.5e-9, "R2": 182.0}  # a unit off the nominal parts
TB = TimeBase(5e-8, 2000, 10000)
STIMULUS = Stimulus("square", 0.0, 1.0, 1000.0, "rising")


def step_from_expm(values: dict[str, float], times: np.ndarray) -> dict[str, np.ndarray]:
    """Every output's exact response to a unit step at t = 0 from rest, by the matrix exponential."""
    model = build_model({"model": "netlist", "netlist": LADDER, "source": "V1", **values}, "reference")
    dt = times[1] - times[0]
    phi = scipy.linalg.expm(model.A * dt)
    gamma = np.linalg.solve(model.A, (phi - np.eye(len(phi))) @ model.B[:, 0])  # exact for a held input
    x, states = np.zeros(len(phi)), []
    for t in times:
        states.append(x.copy() if t >= 0 else np.zeros(len(phi)))
        if t >= 0:
            x = phi @ x + gamma
    y = np.array(states) @ model.C.T + np.where(times >= 0, 1.0, 0.0)[:, None] * model.D[:, 0]
    return {name: y[:, k] for k, name in enumerate(model.outputs)}


def test_element_values_are_the_parameters_with_their_units():
    infos = parameter_infos({"model": "netlist", "netlist": LADDER, "source": "V1"}, "sl2.toml [dut]")
    assert list(infos) == ["L1", "C1", "L2", "C2", "R2", "source_resistance_ohm"]
    assert [infos[n].unit for n in ("L1", "C1", "R2")] == ["H", "F", "ohm"]
    assert all(infos[n].sign == "positive" for n in TRUE)


def test_a_fit_of_the_elements_recovers_the_unit_within_its_intervals():
    # The record: the exact step response of the unit's values (scipy.linalg.expm), 2 mV noise, 8 bits.
    nodes = step_from_expm(TRUE, TB.times())
    record = make_record(nodes, TB, STIMULUS, {"v_src": "v_src", "v_mid": "v(n1)", "v_out": "v(out)"},
                         noise_v=0.002, seed=31, quantise=True)
    result = compare(record, {"model": "netlist", "netlist": LADDER, "source": "V1"},
                     {"v_src": "v_src", "v_mid": "v(n1)", "v_out": "v(out)"},
                     tolerances={"parameter_pct": {"L1": 5.0, "C2": 5.0}}, fit={"free": list(TRUE)})
    fit = result.fit
    assert fit.success and fit.fitted == tuple(TRUE) and not fit.held_fixed
    for name, true in TRUE.items():
        lo, hi = fit.ci95[name]
        assert lo <= true <= hi, (name, lo, true, hi)
        assert fit.nominal[name] == build_model({"model": "netlist", "netlist": LADDER, "source": "V1"},
                                                "x").parameters[name]  # the netlist's own value starts it
    assert result.verdict.status == "pass" and [c.subject for c in result.verdict.checks] == ["L1", "C2"]


def test_an_unknown_element_is_refused_naming_the_elements():
    with pytest.raises(ConfigError) as info:
        compare(make_record(step_from_expm({}, TB.times()), TB, STIMULUS, {"v_out": "v(out)"}),
                {"model": "netlist", "netlist": LADDER, "source": "V1"}, {"v_out": "v(out)"},
                fit={"free": ["L3"]})
    assert "'L3' is not one of the scalar parameters of netlist: L1, C1, L2, C2, R2" in str(info.value)


def ladder_profile(tmp_path: Path, dut_lines: str) -> Path:
    text = (ROOT / "profiles" / "demo-sensor-ladder.toml").read_text()
    head, _, tail = text.partition("[dut]\n")
    _, _, rest = tail.partition("\n[dut.fit]")
    body = head + "[dut]\n" + dut_lines + "\n[dut.fit]" + rest
    body = body.replace('file = "data/sl2-demo.h5"', f'file = "{tmp_path / "sl2.h5"}"')
    path = tmp_path / "sl2.toml"
    path.write_text(body)
    (tmp_path / "sl2-ladder.cir").write_text(LADDER)
    return path


def test_the_netlist_file_is_read_in_beside_the_profile(tmp_path: Path):
    profile = load_profile(ladder_profile(tmp_path, 'model = "netlist"\nnetlist_file = "sl2-ladder.cir"\nsource = "V1"'))
    assert profile.dut["netlist"] == LADDER and "netlist_file" not in profile.dut
    assert profile.bench.simulated["dut"]["netlist"] == LADDER  # the simulated unit's schematic too


@pytest.mark.parametrize("lines, problem", [
    ('model = "netlist"\nnetlist_file = "nowhere.cir"\nsource = "V1"', "cannot read"),
    ('model = "netlist"\nnetlist_file = "sl2-ladder.cir"\nnetlist = "V1 a 0"\nsource = "V1"', "not both"),
])
def test_a_netlist_file_problem_is_one_line_naming_the_key(tmp_path: Path, lines: str, problem: str):
    with pytest.raises(ConfigError) as info:
        load_profile(ladder_profile(tmp_path, lines))
    assert "dut.netlist_file" in str(info.value) and problem in str(info.value)


def test_a_netlist_element_can_drift_on_the_simulated_bench():
    config = SimBenchConfig.from_mapping({"dut": {"model": "netlist", "netlist": LADDER, "source": "V1"},
                                          "wiring": {"CH3": "v(out)"},
                                          "drift": {"parameter": "C2", "per_hour": 0.01}}, "test")
    assert config.drift_nominal == 47e-9  # the netlist's own value: "47n"


def test_the_second_demo_profile_passes_on_the_simulated_bench(tmp_path: Path, capsys: pytest.CaptureFixture):
    path = tmp_path / "sl2.toml"
    path.write_text((ROOT / "profiles" / "demo-sensor-ladder.toml").read_text())
    (tmp_path / "sl2-ladder.cir").write_text(LADDER)
    assert main(["run", str(path), "--count", "1", "--out", str(tmp_path / "sl2.h5")]) == 0
    capsys.readouterr()
    assert main(["compare", str(tmp_path / "sl2.h5"), "--json"]) == 0
    result = json.loads(capsys.readouterr().out)
    assert result["verdict"] == "pass" and result["record"]["dut"]["serial"] == "SL2-0031"
    for name, true in TRUE.items():  # the bench's 20 MHz front end and 8-bit codes bias by well under 1 %
        assert result["parameters"][name] == pytest.approx(true, rel=0.01), name
