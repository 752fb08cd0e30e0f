"""The comparator's API: stimulus handling, mapping, verdicts, the JSON result and the [dut] schema."""

from __future__ import annotations

import json

import numpy as np
import pytest

from acqd.compare import compare, compare_spec, parse_dut_table
from acqd.errors import ConfigError
from acqd.record import Stimulus, TimeBase
from test_compare_synthetic import difference_channel, make_record, series_rlc_nodes

KT9 = {"model": "series_rlc", "r_ohm": 22.0, "l_h": 3.3e-3, "c_f": 100e-9}
TB = TimeBase(1e-7, 3000, 15000)  # 1.5 ms at 10 MS/s, 20 % pre-trigger: the demo profile's capture


def kt9(edge="rising", low=0.0, high=1.0, load="high_z", delay_s=0.0, noise_v=0.0, quantise=False, seed=0):
    stim = Stimulus("square", low, high, 200.0, edge, load)
    before, after = stim.levels_emf()
    nodes = series_rlc_nodes(TB.times(), 22.0, 3.3e-3, 100e-9, 50.0, before, after, delay_s)
    rec = make_record(nodes, TB, stim, {"v_src": "v_src", "v_rl": "v_rl", "v_c": "v_c"}, noise_v, seed, quantise)
    return difference_channel(rec, "v_src", "v_rl", "v_r")


def test_matching_record_has_tiny_error_and_the_textbook_step_parameters():
    # The record is the series-RLC closed form (Nilsson & Riedel, Electric Circuits ch. 8; R_total = 72 Ω):
    # simulation must agree to rounding, and the simulated step parameters must be PO = e^{−ζπ/√(1−ζ²)}, t_p =
    # π/ω_d (Nise, Control Systems Engineering §4.6).
    result = compare(kt9(), KT9, {"v_c": "v_c", "v_r": "v_src - v_rl"})
    assert result.channel("v_c").nrmse < 1e-10 and result.channel("v_r").nrmse < 1e-9
    zeta, wn = 36.0 * np.sqrt(100e-9 / 3.3e-3), 1 / np.sqrt(3.3e-3 * 100e-9)
    wd = wn * np.sqrt(1 - zeta**2)
    sim = result.channel("v_c").simulated
    assert sim.overshoot_pct == pytest.approx(100 * np.exp(-zeta * np.pi / np.sqrt(1 - zeta**2)), abs=0.02)
    assert sim.peak_time_s == pytest.approx(np.pi / wd, rel=1e-4)
    assert sim.damped_frequency_hz == pytest.approx(wd / (2 * np.pi), rel=1e-3)
    assert result.channel("v_r").measured is None and "no step" in result.channel("v_r").step_note
    assert result.verdict.status == "untested" and result.verdict.passed


def test_falling_edge_and_matched_load():
    # A falling edge starts from the rest state of the high level; with the generator set for a matched
    # (50 Ω) load its EMF is twice the set level (a 50 Ω source's divider into a matched load halves its EMF;
    # common practice), so v_C falls from 1.6 V.
    result = compare(kt9(edge="falling", low=0.0, high=0.8, load="matched"), KT9, {"v_c": "v_c"})
    assert result.stimulus["before_v"] == 1.6 and result.stimulus["after_v"] == 0.0
    assert result.channel("v_c").nrmse < 1e-10
    step = result.channel("v_c").measured
    assert step.polarity == "falling"
    assert (step.state_before, step.state_after) == pytest.approx((1.6, 0.0), abs=1e-3)


def test_default_mapping_uses_channels_named_like_model_outputs():
    # DEVELOPERS.md contract: the series RLC's nodes are v_src, v_rl, v_c, i_l; channels named like them
    # need no mapping (v_r is not a node, so it is left out).
    result = compare(kt9(), KT9)
    assert [c.channel for c in result.channels] == ["v_src", "v_rl", "v_c"]


def test_stimulus_channel_places_a_resolved_edge_between_samples():
    # Trigger delay and jitter: the generator's edge (10–90 % in 4 samples, so a 5-sample linear ramp) had
    # its half-way point 2.42 samples after t = 0. Reference record: scipy.signal.lsim of the series RLC
    # on a 50× finer grid, where the ramp's corners fall on grid points, then every 50th sample kept.
    from scipy import signal
    from acqd.models import build_model

    dt, n, pre, fine = 1e-7, 3000, 300, 50
    model = build_model(KT9, "test")
    t_fine = (np.arange(n * fine) - pre * fine) * dt / fine
    delay = 2.42 * dt
    u = np.clip((t_fine - (delay - 2.5 * dt)) / (5 * dt), 0.0, 1.0)
    _, y, _ = signal.lsim((model.A, model.B, model.C, model.D), u, t_fine - t_fine[0])
    tb = TimeBase(dt, pre, n)
    nodes = {name: y[::fine, i] for i, name in enumerate(model.outputs)}
    stim = Stimulus("square", 0.0, 1.0, 200.0, "rising", edge_time_s=4 * dt)
    rec = make_record(nodes, tb, stim, {"v_src": "v_src", "v_c": "v_c"})
    plain = compare(rec, KT9, {"v_src": "v_src", "v_c": "v_c"})
    aligned = compare(rec, KT9, {"v_src": {"signal": "v_src", "stimulus": True}, "v_c": "v_c"})
    assert aligned.stimulus["t50_s"] == pytest.approx(delay, abs=0.01 * dt)
    assert aligned.channel("v_src").nrmse < 1e-4 < plain.channel("v_src").nrmse
    assert "placed by channel v_src" in aligned.stimulus["timing"]
    fitted = compare(rec, {**KT9, "r_ohm": 30.0}, {"v_src": {"signal": "v_src", "stimulus": True}, "v_c": "v_c"},
                     fit={"free": ["r_ohm"]})  # the edge instant is fitted with R, and only R is judged
    assert fitted.fit.nuisance == ("edge_t50_s",) and fitted.fit.values["r_ohm"] == pytest.approx(22.0, rel=1e-4)
    assert fitted.stimulus["t50_s"] == pytest.approx(delay, abs=0.01 * dt)


def test_an_unresolved_edge_is_placed_to_the_whole_sample():
    # An ideal step's samples only say between which two samples it happened (IEEE 181 has no sub-sample
    # information without a transition): a 3-sample trigger offset is found, to the sample.
    rec = kt9(delay_s=3 * TB.sample_interval_s)
    aligned = compare(rec, KT9, {"v_src": {"signal": "v_src", "stimulus": True}, "v_c": "v_c"})
    assert aligned.stimulus["t50_s"] == pytest.approx(3 * TB.sample_interval_s, abs=1e-15)
    assert aligned.channel("v_c").nrmse < 1e-10


def test_measured_states_include_the_current_from_the_resistor_drop():
    # i_L = v_R / R (Ohm's law): mapping v_src − v_rl lets the comparator rebuild the current; the
    # reference is the textbook closed form of i_L.
    result = compare(kt9(), KT9, {"v_c": "v_c", "v_r": "v_src - v_rl"})
    states = result.traces.states_measured
    ref = series_rlc_nodes(TB.times(), 22.0, 3.3e-3, 100e-9)
    assert np.max(np.abs(states["i_l"] - ref["i_l"])) < 1e-12
    assert np.max(np.abs(states["v_c"] - ref["v_c"])) < 1e-12
    only_vc = compare(kt9(), KT9, {"v_c": "v_c"})
    assert list(only_vc.traces.states_measured) == ["v_c"]  # the current is not determined by v_C alone


def test_gain_and_offset_map_a_scaled_channel():
    # A ×10 probe divides the node voltage by ten (common practice), here with a 50 mV offset on top:
    # measured = 0.1 × v_c + 0.05 V; modelled with gain 0.1 and offset 0.05 it must match to rounding.
    rec = kt9()
    rec.channels[2] = type(rec.channels[2])("v_c", "V", 0.1 * rec.channels[2].samples + 0.05, "CH3")
    result = compare(rec, KT9, {"v_c": {"signal": "v_c", "gain": 0.1, "offset": 0.05}})
    assert result.channel("v_c").nrmse < 1e-9


def test_verdict_lists_every_failed_check_with_its_reason():
    # Nise, Control Systems Engineering §4.6: with R_total = 72 Ω the KT-9 filter overshoots by e^{−ζπ/√(1−ζ²)}
    # ≈ 53 % and settles in ≈ 4/(ζω_n) = 8L/R ≈ 0.37 ms, so a 10–20 % band and a 10 µs ceiling must both fail,
    # and nothing else.
    tolerances = {"nrmse_max": 0.05, "parameter_pct": 5.0,
                  "channels": {"v_c": {"overshoot_pct": [10.0, 20.0], "settling_s_max": 1e-5}}}
    result = compare(kt9(noise_v=0.004, quantise=True), KT9, {"v_c": "v_c", "v_r": "v_src - v_rl"},
                     tolerances, fit={"free": ["r_ohm", "l_h", "c_f"]})
    assert result.verdict.status == "fail" and not result.verdict.passed
    failed = {(c.check, c.subject) for c in result.verdict.checks if not c.passed}
    assert failed == {("overshoot", "v_c"), ("settling", "v_c")}
    assert len(result.verdict.reasons) == 2 and any("overshoot" in r for r in result.verdict.reasons)
    passed = {(c.check, c.subject) for c in result.verdict.checks if c.passed}
    assert {("nrmse", "v_c"), ("nrmse", "v_r"), ("parameter", "r_ohm")} <= passed


def test_pass_verdict_and_json_round_trip():
    tolerances = {"nrmse_max": 0.05, "channels": {"v_c": {"overshoot_pct": [40.0, 65.0], "settling_s_max": 6e-4}}}
    result = compare(kt9(noise_v=0.004, quantise=True), KT9, {"v_c": "v_c"}, tolerances)
    assert result.verdict.status == "pass"
    # RFC 8259 JSON has no NaN or infinity; to_json uses allow_nan=False, so any left would raise here.
    data = json.loads(result.to_json())
    assert data["verdict"] == "pass" and data["passed"] is True and len(data["checks"]) == 3
    assert data["channels"][0]["measured"]["overshoot_pct"] == pytest.approx(
        result.channel("v_c").measured.overshoot_pct)
    assert data["fit"] is None and "traces" not in data
    assert data["nrmse_normalised_by"].startswith("peak-to-peak")


def test_a_dut_not_at_rest_before_the_edge_gets_a_warning():
    # IEEE Std 181-2011 cl. 5.2 (state levels from the waveform's own samples; from memory): the
    # pre-trigger baseline is the initial state level; one 0.1 V (≈ 6 % of
    # the range) away from the model's rest value must be reported, not silently fitted around.
    rec = kt9()
    v_c = rec.channel("v_c").samples
    v_c[: TB.pretrigger_samples] += 0.1  # the capacitor still held 0.1 V when the edge came
    result = compare(rec, KT9, {"v_c": "v_c"})
    assert any("pre-trigger baseline" in w and "v_c" in w for w in result.warnings)


def test_profile_table_with_line_numbers_and_unknown_keys():
    # House rule: bad input is one line naming the file (with line), the key and what is allowed.
    text = """[dut]
name = "KT-9 input filter"
model = "series_rlc"
r_ohm = 22.0
l_h = 3.3e-3
c_f = 100e-9
[dut.channels]
v_c = "v_c"
[dut.tolerances]
nrmse_max = 0.05
[dut.tolerances.channels.v_c]
overshoot_pct = [40.0, 65.0]
"""
    import tomllib
    spec = parse_dut_table(tomllib.loads(text)["dut"], "kt9.toml", text)
    assert compare_spec(kt9(), spec).verdict.status == "pass"
    bad = text.replace("overshoot_pct = [40.0, 65.0]", "overshot_pct = [40.0, 65.0]")
    with pytest.raises(ConfigError) as err:
        parse_dut_table(tomllib.loads(bad)["dut"], "kt9.toml", bad)
    assert str(err.value).startswith("kt9.toml line 12: dut.tolerances.channels.v_c.overshot_pct: unknown key")


@pytest.mark.parametrize("change, field, fragment", [
    ({"r_ohm": -1.0}, "r_ohm", "greater than 0"),
    ({"model": "series_lcr"}, "model", "must be one of"),
    ({"channels": {"v_c": "v_x"}}, "channels.v_c", "model output"),
    ({"channels": {"v_c": {"signal": "v_c", "gain": 0.0}}}, "channels.v_c.gain", "must not be 0"),
    ({"fit": {"free": ["r_ohm"], "hold": ["c_f"]}}, "fit.hold", "free parameters"),
    ({"tolerances": {"channels": {"v_r": {"nrmse_max": 0.1}}}, "channels": {"v_c": "v_c"}},
     "tolerances.channels.v_r", "not a mapped channel"),
    ({"tolerances": {"parameter_pct": {"q_h": 5}}}, "tolerances.parameter_pct.q_h", "not a scalar parameter"),
    ({"colour": "blue"}, "colour", "unknown key"),
])
def test_bad_dut_tables_name_the_key(change, field, fragment):
    # House rule: every bad [dut] value is a ConfigError naming the key and what is allowed.
    with pytest.raises(ConfigError) as err:
        parse_dut_table({**KT9, **change}, "kt9.toml", path="")
    assert err.value.field == field and fragment in err.value.problem


def test_record_without_the_mapped_channel_names_what_it_has():
    # House rule: the error names the missing channel and lists the ones the record has.
    with pytest.raises(ConfigError) as err:
        compare(kt9(), KT9, {"CH4": "v_c"})
    assert "CH4" in str(err.value) and "v_src, v_rl, v_c, v_r" in str(err.value)


def test_a_model_without_a_rest_state_is_refused_with_a_reason():
    # An integrator (A = 0) has no steady state for a constant input (A x = −B u has no solution), so the
    # pre-trigger rest state the comparison starts from does not exist (linear algebra).
    table = {"model": "state_space", "A": [[0.0]], "B": [[1.0]], "C": [[1.0]], "D": [[0.0]],
             "states": ["q"], "outputs": ["v_c"]}
    with pytest.raises(ConfigError) as err:
        compare(kt9(low=0.2), table, {"v_c": "v_c"})
    assert err.value.field == "model" and "no steady state" in err.value.problem


def test_remembered_simulations_never_serve_another_model() -> None:
    """The comparator remembers the nominal model's traces between records; alternating two models on the
    same record must still give each its own overshoot PO = e^{−ζπ/√(1−ζ²)} (Nise, Control Systems Engineering
    §4.6)."""
    record = kt9()
    for r_ohm in (22.0, 47.0, 22.0, 47.0):
        result = compare(record, {**KT9, "r_ohm": r_ohm}, {"v_c": "v_c"})
        zeta = (r_ohm + 50.0) / 2 * np.sqrt(100e-9 / 3.3e-3)
        expected = 100 * np.exp(-zeta * np.pi / np.sqrt(1 - zeta**2))
        assert result.channel("v_c").simulated.overshoot_pct == pytest.approx(expected, abs=0.02)
        # t_p = π/ω_d (Nise §4.6), ω_d = ω_n·√(1−ζ²): the third and fourth rounds are served from memory
        # and must still match the closed form of their own model, not the record's other model.
        omega_d = np.sqrt(1 / (3.3e-3 * 100e-9)) * np.sqrt(1 - zeta**2)
        peak_s = result.channel("v_c").simulated.peak_time_s - result.stimulus["t50_s"]
        assert peak_s == pytest.approx(np.pi / omega_d, rel=0.01)
