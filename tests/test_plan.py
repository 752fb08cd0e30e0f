"""Model-guided set-up (``acqd plan``, ``[acquisition] auto = true``), issue 13 part 2.

References: the series RLC's poles −ζω_n ± jω_d and its step response from scipy.signal.step on the
textbook transfer function V_C/U = 1/(LC s² + (R+Rs)C s + 1) (any circuits text, e.g. Nilsson & Riedel,
Electric Circuits, ch. 8); the proposals are then checked by running them on the simulated bench.
"""

from __future__ import annotations

import json
import math
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
import scipy.signal

from acqd.benchsession import open_bench
from acqd.cli import main
from acqd.compare import compare_spec, parse_dut_table
from acqd.errors import ConfigError
from acqd.models import build_model
from acqd.plan import SAMPLES_PER_PERIOD, SETTLING_MARGIN, dynamics, make_plan, planned_acquisition, ready_profile
from acqd.profile import load_profile
from acqd.steptest import run_step_test

ROOT = Path(__file__).resolve().parent.parent
BRIDGE = ROOT / "profiles" / "demo-bridge-filter.toml"
LADDER = ROOT / "profiles" / "demo-sensor-ladder.toml"


def copy_profile(tmp_path: Path, source: Path, *replacements: tuple[str, str]) -> Path:
    text = source.read_text()
    for old, new in replacements:
        assert old in text, f"demo profile changed: {old!r} not found"
        text = text.replace(old, new, 1)
    path = tmp_path / source.name
    path.write_text(text)
    (tmp_path / "sl2-ladder.cir").write_text((ROOT / "profiles" / "sl2-ladder.cir").read_text())
    return path


def test_time_scales_are_the_textbook_poles():
    # Series RLC with the generator's 50 Ω: ω_n = 1/√(LC), ζ = (R+Rs)/2·√(C/L), ω_d = ω_n√(1−ζ²).
    r, l, c = 22.0 + 50.0, 3.3e-3, 100e-9
    wn, zeta = 1 / math.sqrt(l * c), r / 2 * math.sqrt(c / l)
    dyn = dynamics(build_model({"model": "series_rlc", "r_ohm": 22.0, "l_h": l, "c_f": c}, "t"), "t")
    assert dyn.fastest_time_constant_s == pytest.approx(1 / wn, rel=1e-9)  # |λ| = ω_n for a complex pair
    assert dyn.ringing_period_s == pytest.approx(2 * math.pi / (wn * math.sqrt(1 - zeta**2)), rel=1e-9)
    assert dyn.slowest_time_constant_s == pytest.approx(1 / (zeta * wn), rel=1e-9)


def test_predicted_settling_and_extremes_match_scipy_step():
    plan = make_plan(load_profile(BRIDGE))
    v_c = next(c for c in plan.channels if c.name == "v_c")
    l, c = 3.3e-3, 100e-9
    t, y = scipy.signal.step(([1.0], [l * c, 72.0 * c, 1.0]), T=np.linspace(0, 2e-3, 400001))
    outside = np.flatnonzero(np.abs(y - 1.0) > 0.02)  # the [dut.tolerances] band, 2 % (IEEE 181)
    assert v_c.settling_s == pytest.approx(t[outside[-1] + 1], abs=0.5e-6)
    assert v_c.high == pytest.approx(y.max(), rel=1e-4) and v_c.low == pytest.approx(0.0, abs=1e-12)
    window = plan.value("acquisition.window_s")
    assert window * 0.8 >= SETTLING_MARGIN * v_c.settling_s  # the rule, after rounding up
    ringing = dynamics(build_model({"model": "series_rlc", "r_ohm": 22.0, "l_h": l, "c_f": c}, "t"), "t")
    assert window / plan.value("acquisition.samples") <= ringing.ringing_period_s / SAMPLES_PER_PERIOD


def screen_violations(record, settings) -> dict[str, int]:
    """Samples on or past the scope's top or bottom code, from the ranges the scope read back."""
    out = {}
    for ch in record.channels:
        setup = settings["channels"].get(ch.source)
        if setup is None:
            continue
        step = setup["range_v"] / 128  # an 8-bit span of ±range_v (common practice)
        low, high = setup["offset_v"] - setup["range_v"], setup["offset_v"] + setup["range_v"] - step
        out[ch.name] = int(np.count_nonzero((ch.samples <= low + step / 4) | (ch.samples >= high - step / 4)))
    return out


@pytest.mark.parametrize("source", [BRIDGE, LADDER], ids=["bridge", "ladder"])
def test_the_proposal_shows_the_response_on_the_simulated_bench(tmp_path: Path, source: Path):
    profile = load_profile(copy_profile(tmp_path, source, ('edge = "rising"', 'edge = "both"')))
    plan = make_plan(profile)
    planned = replace(profile, acquisition=planned_acquisition(profile, plan),
                      stimulus=replace(profile.stimulus, frequency_hz=plan.value("stimulus.frequency_hz")))
    spec = parse_dut_table(planned.dut, planned.source, planned.text)
    with open_bench(planned) as bench:
        records = run_step_test(planned, bench.generator, bench.scope)
    after_trigger = planned.acquisition.window_s * (1 - planned.acquisition.pretrigger_fraction)
    for record in records:
        assert screen_violations(record, record.settings["scope"]) == {ch.name: 0 for ch in record.channels
                                                                        if ch.source.startswith("CH")}
        result = compare_spec(record, spec)
        for channel in result.channels:
            step = channel.measured  # IEEE 181: the settling duration runs from the 50 % instant
            assert step.settling_duration_s is not None, (record.stimulus.edge, channel.channel)
            assert step.t50_s + step.settling_duration_s < after_trigger, (record.stimulus.edge, channel.channel)
        assert not [w for w in result.warnings if "span" in w]


def test_a_bad_profile_gets_every_warning(tmp_path: Path, capsys: pytest.CaptureFixture):
    path = copy_profile(tmp_path, BRIDGE,
                        ("window_s = 1.5e-3", "window_s = 2e-4"),            # ends before v_c settles
                        ("samples = 15000", "samples = 16"),                 # 12.5 µs per sample: coarse
                        ("range_v = 1.2 ", "range_v = 0.3 "),                # v_c's overshoot off screen
                        ("frequency_hz = 200.0", "frequency_hz = 5000.0"),   # next edge after 0.1 ms
                        ("averages = 1", "averages = 1\ntrigger_level_v = 1.5"))  # above the 1 V level
    warnings = make_plan(load_profile(path)).warnings
    kinds = sorted({w.split(":")[0] for w in warnings})
    assert kinds == ["clip", "coarse", "period", "settling cut off", "trigger"], warnings
    assert any(w.startswith("clip: CH3 (v_c)") for w in warnings)
    assert main(["plan", str(path)]) == 1
    out = capsys.readouterr().out
    assert "warning: clip" in out and "warning: trigger" in out


@pytest.mark.parametrize("samples, kind", [(200, "coarse"), (16, "alias")])
def test_a_coarse_or_aliased_interval_is_named(tmp_path: Path, samples: int, kind: str):
    # The ringing period 2π/ω_d is 116 µs: 1.5 ms / 200 = 7.5 µs is over T/20 and under T/2; 1.5 ms / 16
    # = 94 µs is more than half a period, under Nyquist's two samples a period.
    path = copy_profile(tmp_path, BRIDGE, ("samples = 15000", f"samples = {samples}"))
    assert [w.split(":")[0] for w in make_plan(load_profile(path)).warnings] == [kind]


def test_the_demo_profiles_need_no_warning(capsys: pytest.CaptureFixture):
    for profile in (BRIDGE, LADDER):
        assert main(["plan", str(profile), "--json"]) == 0
        plan = json.loads(capsys.readouterr().out)
        assert plan["warnings"] == []
        assert {p["key"] for p in plan["proposals"]} >= {"acquisition.window_s", "acquisition.samples",
                                                         "acquisition.channels.CH3.range_v"}


def test_the_driver_limit_clamps_samples_and_says_so(tmp_path: Path):
    driver = (ROOT / "drivers" / "scpi-digitiser.toml").read_text().replace("max_samples = 10_000_000",
                                                                             "max_samples = 1000")
    (tmp_path / "small-scope.toml").write_text(driver)
    path = copy_profile(tmp_path, BRIDGE, ('driver = "scpi-digitiser"', f'driver = "{tmp_path / "small-scope.toml"}"'))
    plan = make_plan(load_profile(path))
    assert plan.value("acquisition.samples") == 1000
    assert any("clamped to the driver's max_samples 1000" in n for n in plan.notes)


def test_auto_fills_the_acquisition_when_the_profile_is_readied(tmp_path: Path):
    profile = ready_profile(copy_profile(tmp_path, LADDER))
    plan = make_plan(load_profile(copy_profile(tmp_path, LADDER)))
    assert profile.acquisition.window_s == plan.value("acquisition.window_s")
    assert [ch.range_v for ch in profile.acquisition.channels] == [
        plan.value(f"acquisition.channels.CH{k}.range_v") for k in (1, 2, 3)]


def test_an_unmapped_channel_under_auto_needs_its_range(tmp_path: Path):
    path = copy_profile(tmp_path, LADDER, ('name = "v_out"', 'name = "v_out"\n\n[acquisition.channels.CH4]\nname = "spare"'))
    with pytest.raises(ConfigError) as info:
        ready_profile(path)
    assert "acquisition.channels.CH4.range_v: missing" in str(info.value)
    assert any(n.startswith("CH4 (spare) is not mapped") for n in make_plan(load_profile(path)).notes)


def test_a_profile_without_a_model_is_one_line(tmp_path: Path, capsys: pytest.CaptureFixture):
    text = BRIDGE.read_text()
    path = tmp_path / "no-model.toml"
    path.write_text(text[: text.index("\n[dut]\n")] + '\n[dut]\nname = "KT-9"\n\n' + text[text.index("[output]"):])
    assert main(["plan", str(path)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "dut.model: missing" in err
