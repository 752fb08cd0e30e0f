"""Parameter identification on synthetic records (textbook closed forms + noise + 8-bit quantisation)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.linalg import toeplitz
from scipy.optimize import least_squares
from scipy.signal import lfilter
from scipy.stats import binom
from scipy.stats import t as student_t

import acqd.compare.fit as fit_module
from acqd.compare.levmar import Solution
from acqd.compare import compare, compare_spec, spec_from_parts
from acqd.compare.fit import Free, autocovariance, bartlett_lag, bartlett_noise_term, fit_parameters, noise_covariance
from acqd.compare.metrics import quantisation_rms
from acqd.record import Stimulus, TimeBase
from test_compare_synthetic import difference_channel, make_record, series_rlc_nodes

TRUE = {"r_ohm": 22.0, "l_h": 3.3e-3, "c_f": 100e-9}  # the KT-9 input filter's parts (our demo scenario)
STIMULUS = Stimulus("square", 0.0, 1.0, 200.0, "rising")
TWO_CHANNELS = {"v_c": "v_c", "v_r": "v_src - v_rl"}


SCOPE_BANDWIDTH_SHARE = 0.03  # first-order bandwidth limit at 3 % of the sample rate
SCOPE_CHANNELS = {"v_c": "v_c", "v_src": "v_src", "v_rl": "v_rl"}


def lowpassed_noise(rng: np.random.Generator, n: int, noise_v: float, bandwidth_share: float) -> np.ndarray:
    """White noise through a first-order low-pass (the sampled RC, common practice):
    y_k = y_(k−1) + a·(x_k − y_(k−1)), a = 1 − e^(−2π·f_c·Δt); started 20 time constants early so that it
    is stationary throughout."""
    a = 1 - np.exp(-2 * np.pi * bandwidth_share)
    early = int(20 / a)
    return lfilter([a], [1, a - 1], rng.normal(0.0, noise_v, n + early))[early:]


def kt9_record(seed: int, n: int = 2000, noise_v: float = 0.008, values: dict | None = None,
               bandwidth_share: float | None = None):
    """v_c plus the resistor drop v_src − v_rl from two quantised earth-referenced channels.

    With ``bandwidth_share`` the noise passes the scope's bandwidth limit (a first-order low-pass at that
    share of the sample rate) before the 8-bit conversion, so neighbouring samples share it: 8 mV white at
    3 % becomes about 2.4 mV, below the 8 mV code step, which makes the quantisation error itself follow
    the trace for several samples."""
    tb = TimeBase(1.2e-3 / n, n // 5, n)
    nodes = series_rlc_nodes(tb.times(), **(values or TRUE))
    if bandwidth_share is None:
        record = make_record(nodes, tb, STIMULUS, SCOPE_CHANNELS, noise_v=noise_v, seed=seed, quantise=True)
    else:
        rng = np.random.default_rng(seed)
        noisy = {k: nodes[k] + lowpassed_noise(rng, n, noise_v, bandwidth_share) for k in SCOPE_CHANNELS}
        record = make_record(noisy, tb, STIMULUS, SCOPE_CHANNELS, quantise=True)
    return difference_channel(record, "v_src", "v_rl", "v_r")


def _coverage(make_record_of_seed, seeds, monkeypatch) -> tuple[dict, dict, np.ndarray]:
    """Trials whose 95 % interval holds the truth, as reported and as the white-noise s²·(JᵀJ)⁻¹ would have
    had it from the same Jacobian and residuals, and each fit's width ratio reported / white-noise."""
    seen = {}

    def spy(jac, residuals, channels):
        seen.update(jac=jac, residuals=residuals)
        return noise_covariance(jac, residuals, channels)

    monkeypatch.setattr(fit_module, "noise_covariance", spy)
    hits, white_hits, ratios = dict.fromkeys(TRUE, 0), dict.fromkeys(TRUE, 0), []
    for seed in seeds:
        fit = compare(make_record_of_seed(seed), {"model": "series_rlc", **TRUE}, TWO_CHANNELS,
                      fit={"free": list(TRUE)}).fit
        assert fit.held_fixed == {} and fit.fitted == tuple(TRUE)  # columns of J in TRUE's order, all ln
        jac, r = seen["jac"], seen["residuals"]
        dof = jac.shape[0] - jac.shape[1]
        white_se = np.sqrt(np.diag(r @ r / dof * np.linalg.inv(jac.T @ jac)))
        tq = student_t.ppf(0.975, dof)
        for i, (name, true) in enumerate(TRUE.items()):
            lo, hi = fit.ci95[name]
            hits[name] += lo <= true <= hi
            white_hits[name] += abs(np.log(fit.values[name] / true)) <= tq * white_se[i]
        ratios.append([np.log(fit.ci95[n][1] / fit.ci95[n][0]) / (2 * tq * se) for n, se in zip(TRUE, white_se)])
    return hits, white_hits, np.array(ratios)


def test_95_percent_intervals_cover_the_truth_in_at_least_90_of_100_trials(monkeypatch):
    # Statistics (any regression text): with white noise and a correct model, a 95 % interval contains the
    # true value in about 95 % of repeated experiments; ≥ 90 of 100 allows for the binomial spread
    # (σ ≈ 2.2 trials) and for the 8-bit quantisation, which is not Gaussian.
    hits, _, ratios = _coverage(kt9_record, range(100), monkeypatch)
    assert all(count >= 90 for count in hits.values()), hits
    # Newey & West (1987): with uncorrelated noise the lag-weighted covariance estimates what s²·(JᵀJ)⁻¹
    # does, so on white noise the intervals stay as wide as before, within the estimates' scatter.
    assert np.all(np.abs(np.median(ratios, axis=0) - 1) < 0.05), np.median(ratios, axis=0)


def test_intervals_hold_with_band_limited_quantised_noise_where_white_noise_ones_do_not(monkeypatch):
    # Common practice: a 95 % interval must hold the truth in ≥ 90 of 100 seeded trials (binomial spread
    # σ ≈ 2.2 trials at 95 %). Noise low-passed by the scope's bandwidth and then 8-bit quantised is
    # correlated over tens of samples; the covariance with Bartlett-weighted residual autocovariance
    # (Newey & West 1987) must cover, and s²·(JᵀJ)⁻¹ from the same fits must not: ≤ 80 of 100 is below
    # 95 % by more than 6 σ (it holds about 57), so this test fails if the correction is lost.
    hits, white_hits, _ = _coverage(lambda seed: kt9_record(seed, bandwidth_share=SCOPE_BANDWIDTH_SHARE),
                                    range(100), monkeypatch)
    assert all(count >= 90 for count in hits.values()), hits
    assert all(count <= 80 for count in white_hits.values()), white_hits


def test_noise_covariance_is_the_bartlett_weighted_sum_within_each_channel():
    # Newey & West (1987) Bartlett weights 1 − l/(L+1) on the residual autocovariance, written out as a
    # Toeplitz matrix; the FFT version must give the same J'ΣJ, and two channels must add, not mix.
    rng = np.random.default_rng(0)
    jac = rng.normal(size=(2 * 300, 3))
    residuals = lfilter([0.3], [1, -0.7], rng.normal(size=2 * 300))
    cov, lags = noise_covariance(jac, residuals, channels=2)
    meat = np.zeros((3, 3))
    for block, (j, r) in enumerate(zip(np.split(jac, 2), np.split(residuals, 2))):
        gamma = np.array([r[lag:] @ r[:300 - lag] for lag in range(300)]) / 300
        assert autocovariance(r) == pytest.approx(gamma, abs=1e-12)
        assert lags[block] == bartlett_lag(gamma) > 0
        weights = np.clip(1 - np.arange(300) / (lags[block] + 1), 0, None)
        explicit = j.T @ toeplitz(weights * gamma) @ j
        assert bartlett_noise_term(j, gamma, lags[block]) == pytest.approx(explicit, rel=1e-10)
        meat += explicit
    bread = np.linalg.inv(jac.T @ jac)
    assert cov == pytest.approx(600 / 597 * bread @ meat @ bread, rel=1e-10)
    assert np.all(np.linalg.eigvalsh(cov) > 0)


def test_one_channel_at_lag_zero_is_the_white_noise_covariance(monkeypatch):
    # Regression textbook: for uncorrelated residuals the covariance is s²·(JᵀJ)⁻¹, s² = SSR / (m − p).
    # With the lag held at 0, noise_covariance (its factor m/(m − p) included) must give exactly that.
    rng = np.random.default_rng(1)
    jac, residuals = rng.normal(size=(500, 2)), rng.normal(size=500)
    white = residuals @ residuals / 498 * np.linalg.inv(jac.T @ jac)
    monkeypatch.setattr(fit_module, "bartlett_lag", lambda gamma: 0)
    cov, lags = noise_covariance(jac, residuals, channels=1)
    assert lags == (0,) and cov == pytest.approx(white, rel=1e-12)


def _same_optimum(result, reference) -> None:
    """Both fits ended at the same least-squares optimum: within a hundredth of a standard error."""
    for name in reference.fit.fitted:
        diff = abs(result.fit.values[name] - reference.fit.values[name])
        assert diff <= 0.01 * reference.fit.standard_errors[name], (name, result.fit.values[name])


@pytest.mark.parametrize("factors", [(1.5, 1.5, 1.5), (0.5, 0.5, 0.5), (1.5, 0.5, 1.5), (0.5, 1.5, 0.5),
                                     (1.5, 1.5, 0.5), (0.5, 0.5, 1.5)])
def test_converges_from_fifty_percent_off(factors):
    # Started ±50 % from the truth in every direction, the fit must reach the optimum a fit started at the
    # truth reaches (the least-squares minimum is a property of the data, not of the start).
    record = kt9_record(seed=7)
    reference = compare(record, {"model": "series_rlc", **TRUE}, TWO_CHANNELS, fit={"free": list(TRUE)})
    start = {name: value * f for (name, value), f in zip(TRUE.items(), factors)}
    result = compare(record, {"model": "series_rlc", **start}, TWO_CHANNELS, fit={"free": list(TRUE)})
    assert result.fit.success
    _same_optimum(result, reference)


def test_a_warm_start_reaches_the_cold_optimum_and_reports_the_same_nominal():
    # The least-squares minimum is a property of the data (as above): a fit begun at another record's
    # fitted values (and at values 3 % off every way) ends within a hundredth of its 95 % interval of the
    # fit begun at the nominal values, with the same rank test, holds and nominal values for tolerances.
    record, spec = kt9_record(seed=7), spec_from_parts({"model": "series_rlc", **TRUE}, TWO_CHANNELS,
                                                       fit={"free": list(TRUE)})
    cold = compare_spec(record, spec)
    other = compare_spec(kt9_record(seed=8), spec).fit.values
    for warm_start in (other, {k: v * 1.03 for k, v in TRUE.items()}, {k: v * 0.97 for k, v in TRUE.items()}):
        warm = compare_spec(record, spec, warm_start=warm_start)
        assert warm.fit.success and warm.fit.fitted == cold.fit.fitted
        for name in cold.fit.fitted:
            lo, hi = cold.fit.ci95[name]
            assert abs(warm.fit.values[name] - cold.fit.values[name]) <= (hi - lo) / 100, name
        assert warm.fit.nominal == cold.fit.nominal and warm.fit.held_fixed == cold.fit.held_fixed
        assert warm.fit.relative_singular_values == cold.fit.relative_singular_values
        assert warm.verdict == cold.verdict


def test_a_warm_start_that_cannot_start_a_fit_is_ignored():
    # A negative or non-finite value cannot start a log coordinate; the fit then begins at the nominal value.
    record, spec = kt9_record(seed=7), spec_from_parts({"model": "series_rlc", **TRUE}, TWO_CHANNELS,
                                                       fit={"free": list(TRUE)})
    cold = compare_spec(record, spec)
    warm = compare_spec(record, spec, warm_start={"r_ohm": -1.0, "l_h": float("nan"), "c_f": 0.0})
    assert warm.fit.values == cold.fit.values


def test_only_vc_leaves_l_c_and_r_c_identifiable_and_l_is_held():
    # Our own derivation: v_C/u = 1/(LC·s² + (Rs+R)C·s + 1) from KVL, so v_C alone fixes only the
    # coefficients LC and (Rs+R)C; the fit
    # must hold one of R, L, C and say so. The default holds L; R and C then come out right.
    start = {"r_ohm": 30.0, "l_h": 3.3e-3, "c_f": 80e-9}
    result = compare(kt9_record(seed=3), {"model": "series_rlc", **start}, {"v_c": "v_c"},
                     fit={"free": ["r_ohm", "l_h", "c_f"]})
    fit = result.fit
    assert list(fit.held_fixed) == ["l_h"] and "not identifiable" in fit.held_fixed["l_h"]
    assert fit.fitted == ("r_ohm", "c_f") and fit.rank == 2
    assert fit.relative_singular_values[-1] < 1e-6  # the structural null direction (R·C, L·C fixed)
    for name in ("r_ohm", "c_f"):
        lo, hi = fit.ci95[name]
        assert lo <= TRUE[name] <= hi


def test_the_user_chooses_which_parameter_to_hold():
    result = compare(kt9_record(seed=4), {"model": "series_rlc", **TRUE}, {"v_c": "v_c"},
                     fit={"free": ["r_ohm", "l_h", "c_f"], "hold": ["c_f"]})
    assert list(result.fit.held_fixed) == ["c_f"] and result.fit.fitted == ("r_ohm", "l_h")
    assert result.to_dict()["fit"]["held_fixed"]["c_f"].startswith("not identifiable")


def test_fitting_a_parameter_with_no_effect_is_refused_with_a_reason():
    # The source resistance and R appear only as their sum in v_C (KVL: v_C/u = 1/(LC·s² + (Rs+R)C·s + 1)):
    # fitting both from v_C alone holds one of them rather than splitting the sum arbitrarily.
    result = compare(kt9_record(seed=5), {"model": "series_rlc", **TRUE}, {"v_c": "v_c"},
                     fit={"free": ["r_ohm", "source_resistance_ohm"]})
    assert len(result.fit.held_fixed) == 1 and len(result.fit.fitted) == 1


def test_first_and_second_order_sections_fit_from_fifty_percent_off():
    # RC low-pass from its closed form v_C = V(1 − e^{−t/((Rs+R)C)}) (textbook): only (Rs+R)·C shows, so R is
    # held (as asked) and C fitted from half its value. A second-order section from the normalised step (Nise,
    # Control Systems Engineering §4.6): ω_n, ζ and gain within 4 standard errors of the truth, and the same
    # optimum reached from ±50 % off.
    tb = TimeBase(2e-6, 200, 2000)
    t = tb.times()
    tp = np.clip(t, 0, None)
    v_c = np.where(t >= 0, 1 - np.exp(-tp / (1050.0 * 330e-9)), 0.0)
    rec = make_record({"v_c": v_c}, tb, STIMULUS, {"v_c": "v_c"}, noise_v=0.004, seed=1, quantise=True)
    result = compare(rec, {"model": "rc_lowpass", "r_ohm": 1000.0, "c_f": 165e-9}, {"v_c": "v_c"},
                     fit={"free": ["r_ohm", "c_f"], "hold": ["r_ohm"]})
    lo, hi = result.fit.ci95["c_f"]
    assert "r_ohm" in result.fit.held_fixed and lo <= 330e-9 <= hi

    wn, zeta, gain = 2 * np.pi * 2e3, 0.3, 2.5
    wd = wn * np.sqrt(1 - zeta**2)
    y = gain * (1 - np.exp(-zeta * wn * tp) * (np.cos(wd * tp) + zeta * wn / wd * np.sin(wd * tp)))
    rec = make_record({"y": y}, tb, STIMULUS, {"out": "y"}, noise_v=0.01, seed=2, quantise=True)
    free = {"free": ["wn_rad_s", "zeta", "gain"]}
    reference = compare(rec, {"model": "second_order", "wn_rad_s": wn, "zeta": zeta, "gain": gain}, {"out": "y"},
                        fit=free)
    for name, true in (("wn_rad_s", wn), ("zeta", zeta), ("gain", gain)):
        assert reference.fit.values[name] == pytest.approx(true, abs=4 * reference.fit.standard_errors[name])
    for factors in ((1.5, 0.5, 1.5), (0.5, 1.5, 0.5)):
        start = dict(zip(("wn_rad_s", "zeta", "gain"), np.multiply((wn, zeta, gain), factors)))
        _same_optimum(compare(rec, {"model": "second_order", **start}, {"out": "y"}, fit=free), reference)


def test_quantisation_rms_is_the_code_step_over_root_12():
    # Common practice (uniform quantisation noise): an ideal quantiser with step Δ errs with RMS Δ/√12.
    step = 2.0 / 256
    ramp = np.round(np.linspace(-0.3, 0.7, 5000) / step) * step  # an 8-bit code sequence, every code used
    assert quantisation_rms(ramp) == pytest.approx(step / np.sqrt(12), rel=1e-9)
    assert quantisation_rms(np.random.default_rng(0).normal(size=5000)) < 1e-3  # unquantised: negligible
    assert quantisation_rms(np.zeros(10)) == 0.0
    # A fast first-order edge (τ = 3 samples) visits a few scattered codes; every gap is whole steps.
    edge = np.round((1 - np.exp(-np.arange(200) / 3.0)) / step) * step
    assert quantisation_rms(edge) == pytest.approx(step / np.sqrt(12), rel=1e-9)
    # An ideal step sits on two codes whatever the step is: too few to tell, so no floor from it.
    assert quantisation_rms(np.repeat([0.0, 128 * step], 500)) == 0.0


def test_a_quiet_8_bit_channel_is_weighted_by_its_quantisation_noise():
    # With no noise an 8-bit baseline sits on one code and its standard deviation is 0; weighted by that (or a
    # tiny floor) one channel would swamp the fit. Weighted by Δ/√12, the residual scale of a correct model is
    # about 1 (the quantisation error is all that is left; common practice), and the fit lands on the truth. The
    # closed form (Nilsson & Riedel, Electric Circuits ch. 8) generated the record; v_src = E − 50 Ω·i_L gives
    # the current, so R, L and C are all determined.
    tb = TimeBase(1.2e-3 / 2000, 400, 2000)
    record = make_record(series_rlc_nodes(tb.times(), **TRUE), tb, STIMULUS, {"v_c": "v_c", "v_src": "v_src"},
                         quantise=True)
    result = compare(record, {"model": "series_rlc", **TRUE}, {"v_c": "v_c", "v_src": "v_src"},
                     fit={"free": list(TRUE)})
    assert 0.3 < result.fit.residual_scale < 3.0, result.fit.residual_scale
    for name, true in TRUE.items():
        assert result.fit.values[name] == pytest.approx(true, rel=0.01)


# --- the lag rule and the interval level against their published definitions ----------------------------

@pytest.mark.parametrize("samples, pre_lag", [(100, 4), (1000, 6), (10_000, 11), (100_000, 18)])
def test_bartlett_pre_lag_is_newey_west_1994(samples, pre_lag):
    # Newey & West (1994, Review of Economic Studies 61(4), §3, the automatic procedure for the Bartlett
    # kernel; from memory): pre-lag n = ⌊4·(T/100)^(2/9)⌋, so n = 4, 6, 11, 18 for T = 10², 10³, 10⁴, 10⁵
    # (4·10^(2/9) = 6.67, 4·100^(2/9) = 11.13, 4·1000^(2/9) = 18.57). An autocovariance that is zero except
    # at one lag k enters ŝ¹ only when k ≤ n, so the lag rule gives L = 0 just past the pre-lag.
    def lag_with_spike_at(k: int) -> int:
        gamma = np.zeros(samples)
        gamma[0], gamma[k] = 1.0, 0.1
        return bartlett_lag(gamma)

    assert lag_with_spike_at(pre_lag) > 0 and lag_with_spike_at(pre_lag + 1) == 0


@pytest.mark.parametrize("samples, k", [(1000, 6), (100_000, 3)])
def test_bartlett_lag_has_the_published_constant(samples, k):
    # Newey & West (1994), Bartlett kernel: ŝ⁰ = γ₀ + 2Σ_{j≤n} γ_j, ŝ¹ = 2Σ_{j≤n} j·γ_j, and
    # L = ⌊1.1447·((ŝ¹/ŝ⁰)²·T)^(1/3)⌋ (c_γ = 1.1447 for the Bartlett kernel; from memory). With γ₀ = 1 and
    # γ_k = 0.1: ŝ⁰ = 1.2, ŝ¹ = 0.2k. Worked by hand: T = 1000, k = 6: ŝ¹/ŝ⁰ = 1, L = ⌊1.1447·10⌋ = 11;
    # T = 10⁵, k = 3: ŝ¹/ŝ⁰ = 0.5, L = ⌊1.1447·(25 000)^(1/3)⌋ = ⌊1.1447·29.24⌋ = 33.
    gamma = np.zeros(samples)
    gamma[0], gamma[k] = 1.0, 0.1
    assert bartlett_lag(gamma) == {1000: 11, 100_000: 33}[samples]
    assert bartlett_lag(np.zeros(samples)) == 0  # no residual at all: nothing to correlate


def _decay_fit(seed: int, t: np.ndarray):
    """One least-squares fit of y = a·e^(−t/τ) to white Gaussian noise of known σ (a linear, τ on ln)."""
    rng = np.random.default_rng(seed)
    y = DECAY_A * np.exp(-t / DECAY_TAU_S) + rng.normal(0.0, DECAY_SIGMA, t.size)
    def jacobian(v: dict[str, float]) -> np.ndarray:  # ∂r/∂a, ∂r/∂τ of r = (y − a·e^(−t/τ))/σ, by hand
        decay = np.exp(-t / v["tau_s"])
        return np.column_stack([-decay, -v["a"] * decay * t / v["tau_s"] ** 2]) / DECAY_SIGMA

    return fit_parameters(lambda v: (y - v["a"] * np.exp(-t / v["tau_s"])) / DECAY_SIGMA, jacobian,
                          {"a": Free(1.9, log=False, scale=DECAY_A_SCALE), "tau_s": Free(0.85, log=True, unit="s")},
                          (), "noise")


DECAY_A, DECAY_TAU_S, DECAY_SIGMA = 2.0, 0.8, 0.05
DECAY_A_SCALE = 4.0  # a linear coordinate fitted as a / 4: the result must not depend on the scale


def test_standard_errors_are_the_textbook_least_squares_ones_at_lag_zero(monkeypatch):
    # Regression textbook (Seber & Wild 1989, Nonlinear Regression, §2.1, from memory): for white noise
    # cov(θ̂) = s²·(JᵀJ)⁻¹, s² = SSR/(m − p), with J written out by hand here: r = (y − a·e^(−t/τ))/σ,
    # ∂r/∂a = −e^(−t/τ)/σ, ∂r/∂ln τ = −a·e^(−t/τ)·(t/τ)/σ; se(τ) = τ·se(ln τ) (delta method). With the
    # Bartlett lag held at 0 the fit must report exactly these (to the solver's finite-difference Jacobian).
    monkeypatch.setattr(fit_module, "bartlett_lag", lambda gamma: 0)
    t = np.linspace(0.0, 4.0, 400)
    fit = _decay_fit(3, t)
    a, tau = fit.values["a"], fit.values["tau_s"]
    assert a == pytest.approx(DECAY_A, rel=0.02) and tau == pytest.approx(DECAY_TAU_S, rel=0.02)
    decay = np.exp(-t / tau)
    jac = np.column_stack([-decay / DECAY_SIGMA, -a * decay * (t / tau) / DECAY_SIGMA])
    y = DECAY_A * np.exp(-t / DECAY_TAU_S) + np.random.default_rng(3).normal(0.0, DECAY_SIGMA, t.size)
    r = (y - a * decay) / DECAY_SIGMA
    cov = r @ r / (t.size - 2) * np.linalg.inv(jac.T @ jac)
    se_a, se_ln_tau = np.sqrt(np.diag(cov))
    assert fit.standard_errors["a"] == pytest.approx(se_a, rel=1e-3)
    assert fit.standard_errors["tau_s"] == pytest.approx(tau * se_ln_tau, rel=1e-3)
    assert fit.residual_scale == pytest.approx(np.sqrt(r @ r / (t.size - 2)), rel=1e-6)
    rho = cov[0, 1] / (se_a * se_ln_tau)
    assert fit.correlations["a"]["tau_s"] == pytest.approx(rho, abs=1e-3) == fit.correlations["tau_s"]["a"]
    assert fit.correlations["a"]["a"] == pytest.approx(1.0) and fit.noise_lags == (0,)


def test_fit_result_reports_what_it_was_given_and_the_rank_it_found():
    # numpy's SVD of the hand-written Jacobian at the start (as above) is the reference for the relative
    # singular values and the condition number (largest / smallest singular value; any linear algebra text).
    t = np.linspace(0.0, 4.0, 400)
    fit = _decay_fit(4, t)
    assert fit.nominal == {"a": 1.9, "tau_s": 0.85} and fit.units == {"a": "", "tau_s": "s"}
    assert fit.fitted == ("a", "tau_s") and fit.held_fixed == {} and fit.nuisance == ()
    assert fit.weighting == "noise" and fit.success and fit.message and fit.evaluations >= 2
    decay = np.exp(-t / 0.85)
    jac = np.column_stack([-decay * DECAY_A_SCALE, -1.9 * decay * (t / 0.85)]) / DECAY_SIGMA  # coordinates a/4, ln τ
    sv = np.linalg.svd(jac, compute_uv=False)
    assert fit.relative_singular_values == pytest.approx((sv / sv[0]).tolist(), rel=1e-6)
    assert fit.condition_number == pytest.approx(sv[0] / sv[-1], rel=1e-6) and fit.rank == 2


def test_the_lag_never_exceeds_the_sample():
    # Newey & West (1994): the lag is a count of autocovariances, at most T − 1 of them exist. An
    # autocovariance sequence whose ŝ⁰ almost cancels drives the plug-in value far past that.
    gamma = np.zeros(10)
    gamma[:3] = 1.0, -0.25, -0.2499
    assert bartlett_lag(gamma) == 9


@pytest.mark.parametrize("samples", [40, 3])
def test_intervals_are_students_t_at_97_5_percent(samples):
    # The stated construction: value ± t_(0.975, m−p)·se on a linear coordinate, exp(ln p ± t·se/p) on a
    # log one (Student's t from scipy as the reference quantile); with 3 samples and 2 parameters, one
    # degree of freedom (t = 12.7).
    t = np.linspace(0.0, 4.0, samples)
    fit = _decay_fit(0, t)
    tq = student_t.ppf(0.975, samples - 2)
    assert fit.ci95["a"] == pytest.approx((fit.values["a"] - tq * fit.standard_errors["a"],
                                           fit.values["a"] + tq * fit.standard_errors["a"]), rel=1e-12)
    rel = fit.standard_errors["tau_s"] / fit.values["tau_s"]
    assert fit.ci95["tau_s"] == pytest.approx((fit.values["tau_s"] * np.exp(-tq * rel),
                                               fit.values["tau_s"] * np.exp(tq * rel)), rel=1e-12)


def test_95_percent_intervals_pass_a_binomial_test_that_90_percent_ones_fail():
    # Binomial test (scipy.stats.binom): in N = 1000 independent trials a true 95 % interval misses the
    # truth so rarely that fewer than k = binom.ppf(0.001, N, 0.95) hits happen with probability ≤ 0.1 %;
    # a 90 % interval reaches k with probability < 0.5 %, so intervals built with the 0.95 quantile (90 %
    # labelled 95 %) fail here, as do intervals without the t factor (68 %).
    trials = 1000
    k = binom.ppf(0.001, trials, 0.95)
    assert binom.sf(k - 1, trials, 0.90) < 0.005
    t = np.linspace(0.0, 4.0, 400)
    hits = dict.fromkeys(("a", "tau_s"), 0)
    for seed in range(trials):
        fit = _decay_fit(seed, t)
        for name, true in (("a", DECAY_A), ("tau_s", DECAY_TAU_S)):
            lo, hi = fit.ci95[name]
            hits[name] += lo <= true <= hi
    assert all(count >= k for count in hits.values()), (hits, k)


@pytest.mark.parametrize("n", [38, 300, 513])
def test_autocovariance_is_numpys_linear_correlation_at_every_lag(n):
    # γ̂(l) = (1/n)·Σ r_i·r_(i+l): numpy.correlate (direct sums, an independent implementation) is the
    # reference at every lag up to n − 1. n = 513 makes 2n − 2 = 1024 a fast FFT length, where a transform
    # one sample too short would wrap the last lag onto itself.
    r = np.random.default_rng(n).normal(size=n)
    expected = np.correlate(r, r, mode="full")[n - 1:] / n
    assert autocovariance(r) == pytest.approx(expected, abs=1e-12)


def scipy_trf(evaluate, p0, *, tolerance, max_evaluations, **_ignored) -> Solution:
    """The way the fit was solved before its own loop, kept here: ``scipy.optimize.least_squares``
    (method 'trf', MINPACK's tolerances of 1e-8, x_scale 1) on the same residuals and exact Jacobian, with
    ``levmar.levenberg_marquardt``'s signature."""
    solution = least_squares(lambda p: evaluate(p)[0], p0, lambda p: evaluate(p)[1], method="trf", x_scale=1.0,
                             ftol=tolerance, xtol=tolerance, gtol=tolerance, max_nfev=max_evaluations)
    return Solution(solution.x, solution.fun, solution.jac, None, int(solution.nfev), bool(solution.success),
                    str(solution.message))


@pytest.mark.parametrize("make", [lambda: kt9_record(seed=11),
                                  lambda: kt9_record(seed=12, bandwidth_share=SCOPE_BANDWIDTH_SHARE)])
def test_the_fit_reaches_the_optimum_scipys_least_squares_reaches(monkeypatch, make):
    # scipy.optimize.least_squares (trf) as the independent solver of the same problem: the fitted values
    # within a thousandth of their 95 % interval of its optimum (both stop within a relative change of 1e-8;
    # our loop's last Gauss–Newton step is at most 0.02 standard errors, what it leaves of the order of
    # 1e-5 of one), each end of the intervals within a thousandth of their width (the covariance takes the
    # Jacobian of the last point evaluated, that step away: on these 2,000-sample records, where a standard
    # error is 3 % of R, the ends moved by up to 1e-4 of the width), and the same lags (Newey & West).
    record = make()
    spec = spec_from_parts({"model": "series_rlc", **{k: v * 1.04 for k, v in TRUE.items()}}, TWO_CHANNELS,
                           fit={"free": list(TRUE)})
    ours = compare_spec(record, spec).fit
    monkeypatch.setattr(fit_module, "levenberg_marquardt", scipy_trf)
    reference = compare_spec(record, spec).fit
    assert ours.success and reference.success and ours.fitted == reference.fitted == tuple(TRUE)
    for name in TRUE:
        lo, hi = reference.ci95[name]
        assert abs(ours.values[name] - reference.values[name]) <= (hi - lo) / 1000, name
        assert ours.ci95[name] == pytest.approx(reference.ci95[name], abs=(hi - lo) / 1000), name
    assert ours.noise_lags == reference.noise_lags
    assert ours.evaluations <= reference.evaluations


@pytest.mark.parametrize("lags", [0, 1, 7, 100, 101, 250])
def test_autocovariance_up_to_a_lag_is_numpys_and_leaves_the_rest_unknown(lags):
    # numpy.correlate (direct sums) as the reference up to the lag asked for, on both sides of the switch
    # from dot products to the FFT at DIRECT_LAGS_MAX = 100; lags not computed are NaN, never zeros.
    r = np.random.default_rng(lags).normal(size=400)
    expected = np.correlate(r, r, mode="full")[399:] / 400
    gamma = autocovariance(r, lags)
    assert len(gamma) == 400 and gamma[:lags + 1] == pytest.approx(expected[:lags + 1], abs=1e-12)
    assert np.all(np.isnan(gamma[lags + 1:]))
