"""Which parameters a fit holds fixed, from Jacobians built by hand whose rank and null space are known.

Reference: linear algebra. A Jacobian J (m × p) has full column rank when no combination of its columns
vanishes; a vector v with J·v = 0 is a direction along which the residuals do not change, and its entries
say how much each parameter takes part (the right singular vectors of the zero singular values span that
null space; numpy.linalg.svd is used only by the code under test, the null vectors below are written out).
The rule under test, as acqd/compare/fit.py states it: drop parameters until J has full column rank, the
first of ``hold_order`` that takes part in a null direction (a share above 0.1) first, otherwise the one
that takes the largest part, and say for each held one along which direction nothing changes.
"""

from __future__ import annotations

import numpy as np
import pytest

from acqd.compare.fit import (Free, FitError, _Coordinates, _hold_unidentifiable, _usable, bartlett_lag, fit_parameters,
                              noise_covariance)

NOMINAL = {"r_ohm": 22.0, "l_h": 3.123456e-3, "c_f": 100e-9}  # L to 7 figures: shown to 6


def coords(*names: str, log: bool = True) -> _Coordinates:
    return _Coordinates(names, tuple(log for _ in names), tuple(1.0 for _ in names))


def columns(*cols: np.ndarray) -> np.ndarray:
    return np.column_stack(cols)


A = np.sin(np.linspace(0, 7, 200))
B = np.exp(-np.linspace(0, 3, 200))
C = np.linspace(-1, 1, 200) ** 2


def test_full_rank_holds_nothing():
    keep, held = _hold_unidentifiable(columns(A, B, C), coords("r_ohm", "l_h", "c_f"), (), NOMINAL)
    assert keep == ["r_ohm", "l_h", "c_f"] and held == {}


def test_three_parameters_of_rank_two_hold_one_and_name_the_direction():
    # J = [a, b, a + b]: J·(1, 1, −1) = 0, so the null direction is (1, 1, −1)/√3 ≈ (0.58, 0.58, −0.58) up
    # to sign; every parameter takes an equal part, and the first of hold_order that takes part is held.
    jac = columns(A, B, A + B)
    keep, held = _hold_unidentifiable(jac, coords("r_ohm", "l_h", "c_f"), ("c_f", "r_ohm"), NOMINAL)
    assert keep == ["r_ohm", "l_h"] and list(held) == ["c_f"]
    reason = held["c_f"]
    assert reason.startswith("not identifiable from the mapped channels: the residuals do not change along ")
    direction = reason.split(" along ")[1].split(";")[0]
    assert direction in ("+0.58·Δln R +0.58·Δln L -0.58·Δln C", "-0.58·Δln R -0.58·Δln L +0.58·Δln C")
    assert reason.endswith("; held at 100 nF")  # the nominal value, as it was set


def test_without_a_preference_the_parameter_taking_the_largest_part_is_held():
    # J = [a, b, 2b]: null direction (0, 2, −1)/√5 ≈ (0, 0.89, −0.45): R takes no part, L the largest. A
    # preference for R (no part in it) does not apply.
    jac = columns(A, B, 2 * B)
    keep, held = _hold_unidentifiable(jac, coords("r_ohm", "l_h", "c_f"), ("r_ohm",), NOMINAL)
    assert keep == ["r_ohm", "c_f"] and list(held) == ["l_h"]
    direction = held["l_h"].split(" along ")[1].split(";")[0]
    assert direction in ("+0.89·Δln L -0.45·Δln C", "-0.89·Δln L +0.45·Δln C")  # |0| < 0.01: R not named
    assert held["l_h"].endswith("; held at 3.12346 mH")  # as set, to six figures (our convention)


def test_a_small_share_does_not_make_a_parameter_a_candidate():
    # J = [a, b, 20a]: null direction (20, 0, −1)/√401 ≈ (0.999, 0, −0.050): C takes part with 0.05, below the
    # 0.1 a candidate needs, so the preference for C gives way to R, which carries the direction.
    jac = columns(A, B, 20 * A)
    keep, held = _hold_unidentifiable(jac, coords("r_ohm", "l_h", "c_f"), ("c_f",), NOMINAL)
    assert list(held) == ["r_ohm"] and keep == ["l_h", "c_f"]
    direction = held["r_ohm"].split(" along ")[1].split(";")[0]
    assert direction in ("+1.00·Δln R -0.05·Δln C", "-1.00·Δln R +0.05·Δln C")


def test_a_column_below_the_rank_tolerance_counts_as_zero():
    # A singular value of 1e-7 of the largest is below the stated tolerance (1e-6): that parameter is held;
    # at 1e-5 it is kept.
    for share, held_names in ((1e-7, ["c_f"]), (1e-5, [])):
        jac = columns(A, B, share * np.linalg.norm(A) * C / np.linalg.norm(C))
        jac[:, 1] *= np.linalg.norm(A) / np.linalg.norm(B)
        _, held = _hold_unidentifiable(jac, coords("r_ohm", "l_h", "c_f"), (), NOMINAL)
        assert list(held) == held_names, share


def test_a_jacobian_of_zeros_holds_every_parameter():
    # No residual changes along any direction: every parameter is held, the preferred ones first.
    keep, held = _hold_unidentifiable(np.zeros((200, 3)), coords("r_ohm", "l_h", "c_f"), ("l_h",), NOMINAL)
    assert keep == [] and list(held)[0] == "l_h" and sorted(held) == ["c_f", "l_h", "r_ohm"]
    assert all(reason.startswith("not identifiable") for reason in held.values())


def test_a_linear_coordinate_is_named_without_ln():
    jac = columns(A, A)
    _, held = _hold_unidentifiable(jac, coords("r_ohm", "l_h", log=False), ("l_h",), NOMINAL)
    direction = held["l_h"].split(" along ")[1].split(";")[0]
    assert direction in ("+0.71·ΔR -0.71·ΔL", "-0.71·ΔR +0.71·ΔL")  # (1, −1)/√2
    assert held["l_h"].endswith("; held at 3.12346 mH")


def linear_fit(basis: np.ndarray, truth: np.ndarray, names: tuple[str, ...], **kwargs):
    """fit_parameters on y = basis·θ (a linear model, linear coordinates of scale 1, every start 1): its
    Jacobian in the fit's coordinates is −basis, whose singular values numpy.linalg.svd gives independently."""
    y = basis @ truth
    free = {n: Free(1.0, False) for n in names}
    return fit_parameters(lambda v: y - basis @ np.array([v.get(n, 1.0) for n in names]),  # held: at start
                          lambda v: -basis[:, [names.index(n) for n in v]], free, **kwargs)


def test_rank_and_condition_number_are_those_of_the_starting_jacobian():
    # Full rank: rank 3 and the 2-norm condition number σ_max/σ_min (numpy.linalg.cond); the fit recovers a
    # linear model's parameters exactly.
    basis = columns(A, B, C)
    fit = linear_fit(basis, np.array([2.0, -1.0, 0.5]), ("a", "b", "c"), hold_order=(), weighting="none")
    s = np.linalg.svd(basis, compute_uv=False)
    assert fit.rank == 3 and fit.held_fixed == {}
    assert fit.condition_number == pytest.approx(np.linalg.cond(basis), rel=1e-12)
    assert fit.relative_singular_values == pytest.approx(list(s / s[0]), rel=1e-12)
    assert np.allclose([fit.values[n] for n in "abc"], [2.0, -1.0, 0.5], rtol=1e-9)


def test_three_parameters_of_rank_two_are_reported_as_such_and_fitted_without_one():
    # [a, b, a + b]: σ₃ is zero to rounding, so the rank is 2 and the condition number at least 10^12; c is
    # held at its start (1), and a, b take up the rest: y = 2a − b + 0.5(a + b) = 2.5a − 0.5b with c = 1.
    basis = columns(A, B, A + B)
    fit = linear_fit(basis, np.array([2.0, -1.0, 0.5]), ("a", "b", "c"), hold_order=("c",), weighting="none")
    assert fit.rank == 2 and fit.condition_number > 1e12 and fit.fitted == ("a", "b") and list(fit.held_fixed) == ["c"]
    assert np.allclose([fit.values["a"], fit.values["b"]], [2.5 - 1.0, -0.5 - 1.0], rtol=1e-9)


def test_a_model_that_no_parameter_moves_cannot_be_fitted():
    basis = np.zeros((200, 2))
    with pytest.raises(FitError, match="no free parameter is identifiable from the mapped channels"):
        linear_fit(basis, np.zeros(2), ("a", "b"), hold_order=(), weighting="none")


def test_only_fitted_nuisance_quantities_are_named_nuisance():
    # "t0" stands for the edge instant: a nuisance when fitted, not when held; names not fitted at all are left out.
    basis = columns(A, B, 2 * B)
    fit = linear_fit(basis, np.array([1.0, 1.0, 1.0]), ("a", "t0", "b"), hold_order=("b",), weighting="none",
                     nuisance=("t0", "gone"))
    assert fit.nuisance == ("t0",) and fit.fitted == ("a", "t0")
    held_t0 = linear_fit(basis, np.array([1.0, 1.0, 1.0]), ("a", "t0", "b"), hold_order=("t0",), weighting="none",
                         nuisance=("t0",))
    assert held_t0.nuisance == () and held_t0.fitted == ("a", "b")


def test_values_that_are_not_finite_stop_the_fit_with_a_reason():
    free = {"a": Free(1.0, False)}
    with pytest.raises(FitError, match=r"fit: the model gave values that are not finite at \{'a': 1.0\}"):
        fit_parameters(lambda v: np.full(10, np.nan), lambda v: np.ones((10, 1)), free, (), "none")
    with pytest.raises(FitError, match=r"fit: the model's sensitivities are not finite at \{'a': 1.0\}"):
        fit_parameters(lambda v: np.ones(10), lambda v: np.full((10, 1), np.inf), free, (), "none")


def test_a_small_jacobian_of_full_rank_holds_nothing():
    # Rank is relative to the largest singular value: a Jacobian a thousandth the size is as identifiable.
    basis = 1e-3 * columns(A, B, C)
    fit = linear_fit(basis, np.array([2.0, -1.0, 0.5]), ("a", "b", "c"), hold_order=(), weighting="none")
    assert fit.rank == 3 and fit.held_fixed == {}
    assert fit.condition_number == pytest.approx(np.linalg.cond(basis), rel=1e-12)


def test_a_column_of_zeros_is_held_and_makes_the_condition_number_infinite():
    # A parameter the residuals do not depend on at all: a singular value of exactly 0, so the condition
    # number of the starting Jacobian is infinite and its rank 2 of 3.
    basis = columns(A, B, np.zeros(200))
    fit = linear_fit(basis, np.array([2.0, -1.0, 0.0]), ("a", "b", "c"), hold_order=(), weighting="none")
    assert fit.relative_singular_values[-1] == 0.0 and fit.relative_singular_values[-2] > 0
    assert fit.condition_number == float("inf") and fit.rank == 2 and list(fit.held_fixed) == ["c"]


def test_a_warm_start_uses_only_values_its_coordinates_can_take():
    c = _Coordinates(("a", "b", "c", "d"), (False, True, True, False), (1.0, 1.0, 1.0, 1.0))
    # a linear coordinate takes any finite value; a log coordinate only a positive one (0.5 as well as 5)
    assert _usable({"a": -2.0, "b": 0.5, "c": -1.0, "d": float("nan"), "e": 1.0}, c) == {"a": -2.0, "b": 0.5}


def test_the_pre_lag_of_a_two_sample_channel_reaches_lag_one():
    # Newey & West (1994), T = 2: n = ⌊4·(2/100)^(2/9)⌋ = 1 (capped at T − 1 = 1); with γ = (1, 0.9),
    # ŝ⁰ = 1 + 2·0.9 = 2.8, ŝ¹ = 2·0.9 = 1.8, L = ⌊1.1447·(1.8/2.8)^(2/3)·2^(1/3)⌋ = ⌊1.07⌋ = 1.
    assert bartlett_lag(np.array([1.0, 0.9])) == 1
    assert bartlett_lag(np.array([1.0])) == 0  # one sample: no lag to sum over


def test_residuals_that_do_not_split_into_the_channels_are_refused():
    with pytest.raises(FitError, match="fit: 10 residuals do not split into 3 channels of equal length"):
        noise_covariance(np.ones((10, 1)), np.ones(10), 3)


def test_no_residual_is_spent_on_finite_differences_and_a_linear_fit_lands_on_least_squares():
    # fit_parameters hands its solver the exact Jacobian (its docstring: "no residual is spent on finite
    # differences"), so every residual the fit asks for is one of the solver's counted evaluations, and on
    # a model linear in its parameters the first Gauss–Newton step is the least-squares solution itself
    # (Nocedal & Wright 2006, Numerical Optimization §10.3, from memory): the fit needs fewer evaluations
    # than the p + 1 = 4 that a single forward-difference Jacobian would take on its own. Its values are
    # numpy.linalg.lstsq's.
    basis = columns(A, B, C)
    y = basis @ np.array([2.0, -1.0, 0.5]) + 0.01 * np.cos(np.linspace(0, 40, 200))  # not fitted exactly
    calls = []

    def residuals(values):
        calls.append(dict(values))
        return y - basis @ np.array([values[n] for n in "abc"])

    free = {n: Free(1.0, False) for n in "abc"}
    fit = fit_parameters(residuals, lambda v: -basis, free, (), "none")
    assert len(calls) == fit.evaluations
    assert fit.evaluations < 4
    assert fit.success and fit.message
    reference, *_ = np.linalg.lstsq(basis, y, rcond=None)
    assert [fit.values[n] for n in "abc"] == pytest.approx(list(reference), rel=1e-9)


def test_one_degree_of_freedom_gives_the_ordinary_least_squares_covariance():
    # m = 3 samples, p = 2 parameters: m − p = 1. Residuals (1, 0, −1) have γ̂(1) = 0, so Newey & West's lag is
    # 0 and the covariance must be the classical s²·(JᵀJ)⁻¹ with s² = rᵀr/(m − p) = 2 (ordinary least
    # squares: Seber & Wild 1989, Nonlinear Regression §2.1, from memory), here written out with numpy's
    # inverse; the factor m/(m − p) = 3 is what turns γ̂(0)·JᵀJ into it.
    jac = np.array([[1.0, 0.0], [1.0, 1.0], [1.0, 2.0]])
    residuals = np.array([1.0, 0.0, -1.0])
    cov, lags = noise_covariance(jac, residuals, 1)
    assert lags == (0,)
    s2 = float(residuals @ residuals) / (3 - 2)
    assert cov == pytest.approx(s2 * np.linalg.inv(jac.T @ jac), rel=1e-12)


def test_a_trial_point_the_model_refuses_is_a_refused_step_not_the_end_of_the_fit():
    # r(p) = p² − 1/4 from p = 0.05: the Gauss–Newton step −r/r' = 0.2475/0.1 = 2.475 lands at 2.525, where this
    # model cannot be evaluated (it raises, as a circuit with a negative or infinite part does). scipy's
    # trust-region solvers shrink the step after a trial that gives no finite cost (scipy.optimize's
    # least_squares 'trf'); acqd's loop must likewise damp the step and go on to the root p = 1/2
    # (elementary algebra), not hand the error to the caller.
    from acqd.compare.levmar import levenberg_marquardt

    def evaluate(p):
        if p[0] > 1:
            raise ValueError("outside the model's range")
        return np.array([p[0] ** 2 - 0.25]), np.array([[2 * p[0]]]), None

    solution = levenberg_marquardt(evaluate, np.array([0.05]), tolerance=1e-12, max_evaluations=100,
                                   damping_start=1e-6, refused=(ValueError,))
    assert solution.converged
    assert solution.p[0] == pytest.approx(0.5, rel=1e-6)
    with pytest.raises(ValueError):  # only the caller's chosen exceptions are a refused step
        levenberg_marquardt(evaluate, np.array([0.05]), tolerance=1e-12, max_evaluations=100, damping_start=1e-6)
