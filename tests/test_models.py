"""Circuit models and their simulation against outside references: textbook closed forms and circuit
equations, and scipy.signal's lsim and step for every model type."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import signal

from acqd.compare.stimulus import Edge, edge_response
from acqd.errors import ConfigError
from acqd.models import BUILDERS, build_model, simulate
from test_compare_synthetic import series_rlc_nodes

# One table per model type; values of our own (a bench's worth of parts), each model underdamped or
# first order, so every code path (2 states, 1 state, D ≠ 0) is exercised.
MODEL_TABLES = {
    "series_rlc": {"model": "series_rlc", "r_ohm": 22.0, "l_h": 3.3e-3, "c_f": 100e-9},
    "parallel_rlc": {"model": "parallel_rlc", "r_ohm": 1.5e3, "l_h": 1e-3, "c_f": 220e-9,
                     "source_resistance_ohm": 600.0},
    "rc_lowpass": {"model": "rc_lowpass", "r_ohm": 1e3, "c_f": 47e-9},
    "series_rl": {"model": "series_rl", "r_ohm": 10.0, "l_h": 2.2e-3},
    "second_order": {"model": "second_order", "wn_rad_s": 2 * np.pi * 4e3, "zeta": 0.25, "gain": -2.0},
    "state_space": {"model": "state_space", "A": [[-3e3, 1e4], [-1e4, -3e3]], "B": [[0.0], [1e4]],
                    "C": [[1.0, 0.0], [0.0, 1.0], [1.0, -1.0]], "D": [[0.0], [0.0], [0.5]],
                    "states": ["x1", "x2"], "outputs": ["x1", "x2", "mix"]},
    "netlist": {"model": "netlist", "netlist": "V1 in 0\nR1 in a 33\nL1 a b 2.2m\nC1 b 0 68n\nR2 b 0 4.7k",
                "source": "V1"},
}


def test_every_registered_model_is_covered_here():
    # The scipy.signal checks below must run for every model type the registry offers (issue 4).
    assert set(MODEL_TABLES) == set(BUILDERS)


def _grid(n: int = 4001, dt: float = 1e-6, pre: int = 400) -> np.ndarray:
    return (np.arange(n) - pre) * dt


@pytest.mark.parametrize("name", sorted(MODEL_TABLES))
def test_simulate_matches_scipy_lsim(name):
    # Reference: scipy.signal.lsim, which interpolates the input linearly between samples, i.e. the same
    # first-order hold that acqd's exact discretisation assumes; any input shape and initial state.
    model = build_model(MODEL_TABLES[name], "test")
    t = np.arange(3000) * 2e-6
    rng = np.random.default_rng(3)
    u = np.cumsum(rng.normal(0, 0.05, len(t)))
    x0 = rng.normal(0, 0.1, len(model.states))
    _, y = simulate(model, u, 2e-6, x0=x0, hold="foh")
    _, y_ref, _ = signal.lsim((model.A, model.B, model.C, model.D), u, t, X0=x0)
    y_ref = y_ref.reshape(y.shape)
    assert np.max(np.abs(y - y_ref)) <= 1e-9 * max(1.0, np.max(np.abs(y_ref)))


@pytest.mark.parametrize("name", sorted(MODEL_TABLES))
def test_step_from_rest_matches_scipy_step(name):
    # Reference: scipy.signal.step (unit step from rest at t = 0), scaled to a 0 → 1.7 V EMF step.
    model = build_model(MODEL_TABLES[name], "test")
    t = _grid()
    _, y, _ = edge_response(model, t, Edge(0.0, 1.7))
    after = t >= 0
    for k in range(len(model.outputs)):
        _, ref = signal.step((model.A, model.B, model.C[k:k + 1], model.D[k:k + 1]), T=t[after])
        scale = max(1.0, np.max(np.abs(ref)))
        assert np.max(np.abs(y[after, k] - 1.7 * ref)) <= 1e-9 * 1.7 * scale, model.outputs[k]
        assert np.all(y[~after, k] == 0.0)


@pytest.mark.parametrize("name", sorted(MODEL_TABLES))
def test_ramp_edge_between_levels_matches_scipy_lsim(name):
    # A ramped edge from a non-zero rest level; corners on samples so that lsim's linear interpolation of
    # the sampled EMF is the same input. Reference: scipy.signal.lsim started from the rest state of the
    # 'before' level (x = −A⁻¹B·u, numpy.linalg.solve).
    model = build_model(MODEL_TABLES[name], "test")
    t = _grid()
    edge = Edge(0.4, -0.6, t50_s=15e-6, duration_s=30e-6)
    _, y, u = edge_response(model, t, edge)
    x0 = np.linalg.solve(model.A, -model.B[:, 0] * 0.4)
    _, y_ref, _ = signal.lsim((model.A, model.B, model.C, model.D), u, t - t[0], X0=x0)
    assert np.max(np.abs(y - y_ref.reshape(y.shape))) <= 1e-9 * max(1.0, np.max(np.abs(y_ref)))


def test_series_rlc_closed_form_vc_and_il():
    # Closed form (Nilsson & Riedel, Electric Circuits ch. 8): v_C and i_L of an underdamped series RLC from
    # rest.
    model = build_model(MODEL_TABLES["series_rlc"], "test")  # Rs = 50 ohm inside
    t = _grid(20001, 1e-7, 2000)
    _, y, _ = edge_response(model, t, Edge(0.0, 1.0))
    ref = series_rlc_nodes(t, 22.0, 3.3e-3, 100e-9, 50.0)
    for node in ("v_c", "v_src", "v_rl"):
        assert np.max(np.abs(y[:, model.output_index(node)] - ref[node])) < 1e-12
    assert np.max(np.abs(y[:, model.output_index("i_l")] - ref["i_l"])) < 1e-14


def test_long_step_matches_the_closed_form():
    # Closed form (Nilsson & Riedel, Electric Circuits ch. 8), over 1,000,003 samples: the constant-run path
    # builds the states from powers of Ad found by repeated squaring, and its blocks do not divide this length
    # evenly.
    from acqd.models import discretise, propagate

    model = build_model(MODEL_TABLES["series_rlc"], "test")
    t = np.arange(1_000_003) * 1.5e-9
    x = propagate(discretise(model, 1.5e-9, "zoh"), np.ones(len(t)), np.zeros(2))
    ref = series_rlc_nodes(t, 22.0, 3.3e-3, 100e-9, 50.0)
    assert np.max(np.abs(x[:, 0] - ref["v_c"])) < 1e-11  # volts, of a 1 V step
    assert np.max(np.abs(x[:, 1] - ref["i_l"])) < 1e-13  # amperes, of a 4 mA peak


def test_edge_between_samples_is_exact():
    # An ideal step 0.37 of a sample after the trigger: the closed form shifted by the same delay.
    model = build_model(MODEL_TABLES["series_rlc"], "test")
    t = _grid(5001, 2e-7, 500)
    _, y, _ = edge_response(model, t, Edge(0.0, 1.0, t50_s=0.37 * 2e-7))
    ref = series_rlc_nodes(t, 22.0, 3.3e-3, 100e-9, 50.0, delay_s=0.37 * 2e-7)
    assert np.max(np.abs(y[:, model.output_index("v_c")] - ref["v_c"])) < 1e-12


def test_rc_and_rl_time_constants_and_final_values():
    # Textbook first-order circuits: v_C = V(1 − e^{−t/((Rs+R)C)}); i_L = V/(Rs+R)·(1 − e^{−t(Rs+R)/L});
    # the RC's terminal voltage jumps to V·R/(Rs+R) at the edge (voltage divider, capacitor at 0 V).
    t = _grid(4001, 1e-6, 100)
    tp = np.clip(t, 0, None)
    rc = build_model(MODEL_TABLES["rc_lowpass"], "test")
    _, y, _ = edge_response(rc, t, Edge(0.0, 2.0))
    assert np.allclose(y[:, rc.output_index("v_c")], 2.0 * (1 - np.exp(-tp / (1050.0 * 47e-9))), atol=1e-12)
    assert y[100, rc.output_index("v_src")] == pytest.approx(2.0 * 1000 / 1050, rel=1e-12)  # t = 0
    rl = build_model(MODEL_TABLES["series_rl"], "test")
    _, y, _ = edge_response(rl, t, Edge(0.0, 2.0))
    assert np.allclose(y[:, rl.output_index("i_l")], 2.0 / 60.0 * (1 - np.exp(-tp * 60.0 / 2.2e-3)), atol=1e-14)


def test_parallel_rlc_characteristic_polynomial_and_rest_states():
    # Textbook parallel RLC driven through Rs (Norton: R_p = R ∥ Rs): s² + s/(R_p C) + 1/(LC); at rest the
    # inductor shorts DC, so v = 0 and i_L = u/Rs.
    p = MODEL_TABLES["parallel_rlc"]
    model = build_model(p, "test")
    r_par = 1 / (1 / p["r_ohm"] + 1 / p["source_resistance_ohm"])
    expected = np.roots([1, 1 / (r_par * p["c_f"]), 1 / (p["l_h"] * p["c_f"])])
    assert np.allclose(np.sort_complex(np.linalg.eigvals(model.A)), np.sort_complex(expected), rtol=1e-12)
    x = model.steady_state(1.2)
    assert x == pytest.approx([0.0, 1.2 / 600.0], abs=1e-15)


def test_second_order_transfer_function():
    # The section is H(s) = gain·ω_n²/(s² + 2ζω_n s + ω_n²) by definition; scipy.signal.ss2tf as reference.
    p = MODEL_TABLES["second_order"]
    model = build_model(p, "test")
    num, den = signal.ss2tf(model.A, model.B, model.C[:1], model.D[:1])
    wn, z = p["wn_rad_s"], p["zeta"]
    assert np.allclose(den, [1, 2 * z * wn, wn**2], rtol=1e-12)
    assert np.allclose(num[0], [0, 0, p["gain"] * wn**2], rtol=1e-12, atol=1e-6)


@pytest.mark.parametrize("table, key, fragment", [
    ({"model": "series_rlk"}, "model", "unknown model"),
    ({"model": "series_rlc", "r_ohm": -5.0, "l_h": 1e-3, "c_f": 1e-6}, "r_ohm", "greater than 0"),
    ({"model": "series_rlc", "r_ohm": "ten", "l_h": 1e-3, "c_f": 1e-6}, "r_ohm", "finite number"),
    ({"model": "series_rlc", "l_h": 1e-3, "c_f": 1e-6}, "r_ohm", "missing"),
    ({"model": "rc_lowpass", "r_ohm": 1.0, "c_f": 1e-6, "l_h": 1e-3}, "l_h", "not a parameter"),
    ({"model": "parallel_rlc", "r_ohm": 1.0, "l_h": 1.0, "c_f": 1.0, "source_resistance_ohm": 0.0},
     "source_resistance_ohm", "greater than 0"),
])
def test_bad_model_tables_name_the_key(table, key, fragment):
    # House rule: one ConfigError naming the source and the key, with what is allowed.
    with pytest.raises(ConfigError) as err:
        build_model(table, "bench.toml [dut]")
    assert err.value.field == key and fragment in err.value.problem
    assert str(err.value).startswith("bench.toml [dut]: ")


def test_propagate_matches_the_plain_recursion_for_steps_and_ramps() -> None:
    """Reference: the defining recursion x[k+1] = Ad x[k] + B0 u[k] + B1 u[k+1] stepped in plain Python,
    for inputs with long constant runs (the closed-form path) and jumps/ramps between them, ZOH and FOH."""
    from acqd.models import discretise, propagate, series_rlc

    model = series_rlc(22.0, 3.3e-3, 100e-9)
    u = np.concatenate([np.zeros(300), np.linspace(0, 1, 7), np.ones(500), np.full(200, 0.25), [0.5]])
    for hold in ("zoh", "foh"):
        disc = discretise(model, 1e-7, hold)
        x = propagate(disc, u, np.array([0.1, -1e-3]))
        ref = np.empty_like(x)
        ref[0] = [0.1, -1e-3]
        for k in range(len(u) - 1):
            ref[k + 1] = disc.Ad @ ref[k] + disc.B0[:, 0] * u[k] + disc.B1[:, 0] * u[k + 1]
        assert np.all(np.abs(x - ref) <= 1e-9 * np.abs(ref).max(axis=0)), hold
    assert propagate(disc, u[:1], np.zeros(2)).shape == (1, 2)
