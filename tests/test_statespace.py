"""acqd.models.statespace against outside references: scipy.signal.cont2discrete for the exact
discretisation, scipy.signal.lsim for the sampled response, the defining recursion
x[k+1] = Ad x[k] + B0 u[k] + B1 u[k+1] stepped in plain Python, closed forms of first-order circuits and of
their derivative by the time constant, and numpy.linalg for equilibria.

Inputs are chosen to reach each path of ``propagate``: long constant runs (the closed-form path, up to a
million samples), many changes (the general recursion), runs too short to set up, an integrator (an
eigenvalue of Ad at 1), a critically damped circuit (a defective Ad, the plain loop), several inputs, and
jumps on a sample instant.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import signal

from acqd.models.statespace import Discrete, StateSpace, discretise, propagate, simulate, with_sensitivities


def rc(tau_s: float = 1e-3) -> StateSpace:
    """dv/dt = (u − v)/τ: a first-order low-pass, output v."""
    return StateSpace(np.array([[-1 / tau_s]]), np.array([[1 / tau_s]]), np.array([[1.0]]), np.array([[0.0]]),
                      states=("v_c",), inputs=("u",), outputs=("v_c",), output_units=("V",))


def rlc(r_ohm: float, l_h: float = 1e-3, c_f: float = 1e-6) -> StateSpace:
    """Series RLC, states (v_C, i_L): dv/dt = i/C, di/dt = (u − v − R i)/L (Kirchhoff's voltage law)."""
    a = np.array([[0.0, 1 / c_f], [-1 / l_h, -r_ohm / l_h]])
    return StateSpace(a, np.array([[0.0], [1 / l_h]]), np.eye(2), np.zeros((2, 1)), states=("v_c", "i_l"),
                      inputs=("u",), outputs=("v_c", "i_l"))


def plain(disc: Discrete, u: np.ndarray, x0: np.ndarray, u_left: np.ndarray | None = None) -> np.ndarray:
    """The defining recursion, one sample at a time; interval k is driven from u[k] to u_left[k+1]."""
    u = u.reshape(len(u), -1)
    ends = u if u_left is None else u_left.reshape(len(u), -1)
    x = np.empty((len(u), len(x0)))
    x[0] = x0
    for k in range(len(u) - 1):
        x[k + 1] = disc.Ad @ x[k] + disc.B0 @ u[k] + disc.B1 @ ends[k + 1]
    return x


def close(x: np.ndarray, ref: np.ndarray, rel: float = 1e-9) -> bool:
    return bool(np.all(np.abs(x - ref) <= rel * np.abs(ref).max(axis=0) + 1e-300))


def test_zoh_discretisation_is_scipys():
    model = rlc(22.0)
    disc = discretise(model, 1e-6, "zoh")
    ad, bd, *_ = signal.cont2discrete((model.A, model.B, model.C, model.D), 1e-6, method="zoh")
    assert np.allclose(disc.Ad, ad, rtol=1e-12, atol=0) and np.allclose(disc.B0, bd, rtol=1e-12, atol=1e-18)
    assert not disc.B1.any() and disc.dt == 1e-6


def test_foh_response_to_a_ramp_is_lsims_linear_interpolation():
    # scipy.signal.lsim with interp=True treats the input as linear between samples: the same hold.
    model = rlc(22.0)
    t = np.arange(400) * 2e-6
    u = np.clip((t - 1e-4) / 3e-4, 0.0, 1.0) + 0.2 * np.sin(2 * np.pi * 2e3 * t)
    _, y_ref, x_ref = signal.lsim((model.A, model.B, model.C, model.D), u, t, interp=True)
    x, y = simulate(model, u, 2e-6, hold="foh")
    assert close(x, x_ref, 1e-7) and close(y, y_ref, 1e-7)
    assert discretise(model, 2e-6, "foh").dt == 2e-6
    # the same ramp with a zero-order hold is lsim with interp=False
    _, y_zoh, _ = signal.lsim((model.A, model.B, model.C, model.D), u, t, interp=False)
    assert close(simulate(model, u, 2e-6, hold="zoh")[1], y_zoh, 1e-7)


def test_discretise_refuses_a_hold_or_interval_it_cannot_use():
    for dt in (0.0, -1e-6, float("nan"), float("inf")):
        with pytest.raises(ValueError, match="sample interval must be a positive number of seconds"):
            discretise(rc(), dt)
    with pytest.raises(ValueError, match="hold must be one of"):
        discretise(rc(), 1e-6, "linear")


def test_a_model_checks_its_shapes_and_values_and_keeps_its_own_copy():
    a = np.array([[-1.0]])
    with pytest.raises(ValueError, match=r"matrix B has shape \(1, 2\), expected \(1, 1\)"):
        StateSpace(a, np.ones((1, 2)), np.ones((1, 1)), np.zeros((1, 1)), ("x",), ("u",), ("y",))
    with pytest.raises(ValueError, match=r"matrix C has shape \(2, 1\), expected \(1, 1\)"):
        StateSpace(a, np.ones((1, 1)), np.ones((2, 1)), np.zeros((1, 1)), ("x",), ("u",), ("y",))
    with pytest.raises(ValueError, match="matrix A holds a value that is not finite"):
        StateSpace(np.array([[np.nan]]), np.ones((1, 1)), np.ones((1, 1)), np.zeros((1, 1)), ("x",), ("u",), ("y",))
    with pytest.raises(ValueError, match="matrix D holds a value that is not finite"):
        StateSpace(a, np.ones((1, 1)), np.ones((1, 1)), np.array([[np.inf]]), ("x",), ("u",), ("y",))
    integers = np.array([[-1]])  # integer matrices become float ones
    model = StateSpace(integers, np.ones((1, 1)), np.ones((1, 1)), np.zeros((1, 1)), ("x",), ("u",), ("y",))
    integers[0, 0] = -5  # the caller's array changes; the model does not
    assert model.A[0, 0] == -1.0 and model.A.dtype == np.float64 and not model.A.flags.writeable


def test_outputs_by_name_and_unit():
    model = rlc(22.0)
    assert model.output_index("i_l") == 1 and model.output_unit("i_l") == ""  # no units given
    assert rc().output_unit("v_c") == "V"
    with pytest.raises(KeyError, match=r"no output 'v_r'; outputs are \['v_c', 'i_l'\]"):
        model.output_index("v_r")


def test_steady_state_solves_a_x_plus_b_u_equals_zero():
    # Series RLC at DC: the inductor is a short, the capacitor open, so i = 0 and v_C = u.
    assert rlc(22.0).steady_state(1.5) == pytest.approx([1.5, 0.0], abs=1e-12)
    # An integrator's A is singular: the least-squares solution (numpy.linalg.lstsq) of 0·x = 0 is x = 0.
    integrator = StateSpace(np.zeros((1, 1)), np.ones((1, 1)), np.ones((1, 1)), np.zeros((1, 1)), ("x",), ("u",), ("y",))
    assert integrator.steady_state(0.0) == pytest.approx([0.0])


@pytest.mark.parametrize("hold", ["zoh", "foh"])
def test_a_step_from_rest_is_the_first_order_closed_form(hold):
    # v = 1 − e^{−t/τ} at the samples, exact for a constant input whatever the hold; 5000 samples in two
    # constant runs take the closed-form path, a length that is no multiple of its block size (⌈√N⌉).
    # The step is on sample 1: its left limit there is still 0 (u_left), so v = 1 − e^{−(t − dt)/τ} from it.
    tau, dt = 1e-3, 1e-6
    u = np.r_[0.0, np.ones(4999)]
    x = propagate(discretise(rc(tau), dt, hold), u, np.zeros(1), u_left=np.r_[0.0, 0.0, np.ones(4998)])
    t = np.arange(5000) * dt
    assert x[0, 0] == 0.0 and x[1, 0] == pytest.approx(0.0, abs=1e-15)
    assert np.max(np.abs(x[1:, 0] - (1 - np.exp(-(t[1:] - dt) / tau)))) < 1e-12
    # starting away from rest on a constant input: x = u + (x0 − u)·e^{−t/τ}
    x = propagate(discretise(rc(tau), dt, hold), np.full(5000, 2.0), np.array([-1.0]))
    assert np.max(np.abs(x[:, 0] - (2.0 - 3.0 * np.exp(-t / tau)))) < 1e-12
    assert x[0, 0] == -1.0  # the caller's start, not a rounded copy


@pytest.mark.parametrize("name, u", [
    ("two long runs", np.r_[np.zeros(200), np.ones(300)]),
    ("a ramp between runs", np.r_[np.zeros(300), np.linspace(0, 1, 7), np.ones(500), np.full(200, 0.25), [0.5]]),
    ("runs shorter than 64", np.repeat([0.0, 1.0, -0.5, 0.3, 0.9, 0.1], 40)),
    ("a short pulse back to the first level", np.r_[np.zeros(100), np.ones(10), np.zeros(300)]),
    ("more than 16 runs", np.repeat(np.arange(30) % 3 - 1.0, 70)),
    ("sampled noise", np.random.default_rng(4).normal(size=900)),
])
@pytest.mark.parametrize("hold", ["zoh", "foh"])
@pytest.mark.parametrize("r_ohm", [22.0, 2 * np.sqrt(1e-3 / 1e-6)])  # underdamped; critically damped (defective Ad)
def test_propagate_is_the_defining_recursion(name, u, hold, r_ohm):
    disc = discretise(rlc(r_ohm), 1e-6, hold)
    x0 = np.array([0.3, -2e-3])
    assert close(propagate(disc, u, x0), plain(disc, u, x0)), name


def test_an_integrator_accumulates_its_input():
    # dx/dt = u: with u = 1 from rest, x = t exactly (Ad = 1, an eigenvalue at 1: no equilibrium, which
    # the closed form for a constant run does not need).
    integrator = StateSpace(np.zeros((1, 1)), np.ones((1, 1)), np.ones((1, 1)), np.zeros((1, 1)), ("x",), ("u",), ("y",))
    x, y = simulate(integrator, np.ones(3000), 1e-3)
    assert np.allclose(x[:, 0], np.arange(3000) * 1e-3, rtol=0, atol=1e-12) and np.array_equal(x, y)


def test_two_inputs_and_a_jump_on_a_sample_instant():
    # Two sources into one RC node through equal resistors: dv/dt = (u1 + u2 − 2v)/τ. u_left carries the
    # left limit where an input jumps exactly on a sample (interval k runs from u[k] to u_left[k+1]).
    tau = 1e-3
    model = StateSpace(np.array([[-2 / tau]]), np.array([[1 / tau, 1 / tau]]), np.ones((1, 1)), np.zeros((1, 2)),
                       ("v",), ("u1", "u2"), ("v",))
    u = np.zeros((600, 2))
    u[100:, 0] = 1.0
    u[350:, 1] = -0.5
    left = u.copy()
    left[100, 0], left[350, 1] = 0.0, 0.0  # the left limits before the two jumps
    for hold in ("zoh", "foh"):
        disc = discretise(model, 1e-6, hold)
        assert close(propagate(disc, u, np.zeros(1), left), plain(disc, u, np.zeros(1), left)), hold
    assert propagate(discretise(model, 1e-6), u[:1], np.array([0.7])).tolist() == [[0.7]]  # one sample: the start
    for hold in ("zoh", "foh"):  # two samples: one interval
        disc = discretise(model, 1e-6, hold)
        assert close(propagate(disc, u[99:101], np.array([0.7])), plain(disc, u[99:101], np.array([0.7]))), hold


def test_sensitivity_states_are_the_derivative_by_the_time_constant():
    # v = 1 − e^{−t/τ} from rest, so ∂v/∂τ = −(t/τ²)·e^{−t/τ} (differentiating the closed form). For
    # dv/dt = (u − v)/τ: ∂A/∂τ = 1/τ², ∂B/∂τ = −1/τ².
    tau, dt = 1e-3, 1e-6
    model = with_sensitivities(rc(tau), [np.array([[1 / tau**2]])], [np.array([[-1 / tau**2]])])
    assert model.states == ("v_c", "dv_c/dp1") and model.outputs == () and model.C.shape == (0, 2)
    t = np.arange(6000) * dt
    x = propagate(discretise(model, dt, "zoh"), np.ones(len(t)), np.zeros(2))
    assert np.max(np.abs(x[:, 0] - (1 - np.exp(-t / tau)))) < 1e-12
    expected = -(t / tau**2) * np.exp(-t / tau)
    assert np.max(np.abs(x[:, 1] - expected)) < 1e-9 * np.max(np.abs(expected))


def test_sensitivities_of_two_parameters_match_central_differences():
    # Series RLC by R and by L; reference: central differences of the plain recursion, (y(p+h) − y(p−h))/2h.
    r, l_h, c_f, dt = 22.0, 1e-3, 1e-6, 1e-6
    d_a = [np.array([[0.0, 0.0], [0.0, -1 / l_h]]),  # ∂A/∂R
           np.array([[0.0, 0.0], [1 / l_h**2, r / l_h**2]])]  # ∂A/∂L
    d_b = [np.zeros((2, 1)), np.array([[0.0], [-1 / l_h**2]])]
    model = with_sensitivities(rlc(r, l_h, c_f), d_a, d_b)
    u = np.ones(800)
    x = propagate(discretise(model, dt, "foh"), u, np.zeros(6))

    def states(rr: float, ll: float) -> np.ndarray:
        return plain(discretise(rlc(rr, ll, c_f), dt, "foh"), u, np.zeros(2))

    for j, (hr, hl) in enumerate([(1e-4, 0.0), (0.0, 1e-9)], start=1):
        fd = (states(r + hr, l_h + hl) - states(r - hr, l_h - hl)) / (2 * (hr or hl))
        assert close(x[:, 2 * j:2 * j + 2], fd, 1e-5), j


def plain_floats(disc: Discrete, u: np.ndarray, x0: np.ndarray) -> np.ndarray:
    """The defining recursion for two states and one input in Python floats (IEEE 754 double precision,
    as numpy's float64), one sample at a time: fast enough for a million samples."""
    (a00, a01), (a10, a11) = disc.Ad.tolist()
    (b00,), (b10,) = disc.B0.tolist()
    (c00,), (c10,) = disc.B1.tolist()
    v, i = x0.tolist()
    vs, is_ = [v], [i]
    for u0, u1 in zip(u[:-1].tolist(), u[1:].tolist()):
        v, i = a00 * v + a01 * i + b00 * u0 + c00 * u1, a10 * v + a11 * i + b10 * u0 + c10 * u1
        vs.append(v)
        is_.append(i)
    return np.column_stack([vs, is_])


def test_a_million_samples_of_a_step_are_the_recursion_to_its_rounding():
    # A series RLC (τ = 2L/R = 91 µs) over 250 µs, started away from rest, the step on sample 100: two
    # constant runs of the closed-form path, the longer one 1e6 samples (not a square: a part-block at the
    # end). Each step of the recursion rounds, by about ε = 2.2e-16 of the state, and a stable Ad carries
    # those errors on without growing them, so after N steps the recursion may be off by up to about
    # N·ε of each state's scale (the linear bound on accumulated rounding, common practice); the closed
    # form rounds only some log2 N times.
    n = 1_000_003
    disc = discretise(rlc(22.0), 2.5e-10, "zoh")
    u = np.r_[np.zeros(100), np.ones(n - 100)]
    x0 = np.array([0.3, -2e-3])
    x, ref = propagate(disc, u, x0), plain_floats(disc, u, x0)
    assert np.all(np.abs(x - ref) <= n * np.finfo(float).eps * np.abs(ref).max(axis=0))
    assert x[0].tolist() == x0.tolist()


def test_a_model_without_inputs_decays_freely():
    # dv/dt = −v/τ with no input: v = v0·e^{−t/τ} (the first-order closed form), over a long run.
    tau, dt = 1e-3, 1e-6
    model = StateSpace(np.array([[-1 / tau]]), np.zeros((1, 0)), np.ones((1, 1)), np.zeros((1, 0)), ("v",), (), ("v",))
    x = propagate(discretise(model, dt, "zoh"), np.zeros((3000, 0)), np.array([2.0]))
    assert np.max(np.abs(x[:, 0] - 2.0 * np.exp(-np.arange(3000) * dt / tau))) < 1e-12


def test_a_left_limit_that_changes_where_the_input_does_not():
    # u is 1 throughout, but its left limit at sample 300 is 0: over interval 299 the input ramps from 1
    # down to 0 and jumps back to 1 on sample 300. Only the left limits show that change.
    disc = discretise(rlc(22.0), 1e-6, "foh")
    u = np.ones(700)
    left = u.copy()
    left[300] = 0.0
    x0 = np.array([0.3, -2e-3])
    assert close(propagate(disc, u, x0, left), plain(disc, u, x0, left))


@pytest.mark.parametrize("second", [np.random.default_rng(5).normal(size=600),  # sampled noise
                                    np.r_[np.zeros(100), np.ones(10), np.zeros(490)]])  # a pulse back to 0
def test_the_second_of_two_inputs_changing_alone(second):
    # The first input is constant throughout: every change of the drive is in the second column.
    tau = 1e-3
    model = StateSpace(np.array([[-2 / tau]]), np.array([[1 / tau, 1 / tau]]), np.ones((1, 1)), np.zeros((1, 2)),
                       ("v",), ("u1", "u2"), ("v",))
    u = np.column_stack([np.ones(600), second])
    for hold in ("zoh", "foh"):
        disc = discretise(model, 1e-6, hold)
        assert close(propagate(disc, u, np.zeros(1)), plain(disc, u, np.zeros(1))), hold
