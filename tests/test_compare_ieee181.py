"""IEEE 181-2011 step parameters and the per-channel metrics, on waveforms known in closed form."""

from __future__ import annotations

import numpy as np
import pytest

from acqd.compare import StepError, histogram_levels, step_parameters
from acqd.compare.metrics import channel_result, noise_rms
from test_compare_synthetic import series_rlc_nodes


def first_order(t, tau, lo=0.0, hi=1.0):
    return np.where(t > 0, lo + (hi - lo) * (1 - np.exp(-np.clip(t, 0, None) / tau)), lo)


def second_order_unit(t, zeta, wn):
    """Underdamped unit step response (Nise, Control Systems Engineering §4.6): 1 − e^{−ζω_n t}(cos ω_d t + ...)."""
    wd, s = wn * np.sqrt(1 - zeta**2), zeta * wn
    tp = np.clip(t, 0, None)
    return 1 - np.exp(-s * tp) * (np.cos(wd * tp) + s / wd * np.sin(wd * tp))


@pytest.mark.parametrize("polarity", ["rising", "falling"])
def test_first_order_transition_duration_is_tau_ln9(polarity):
    # Textbook: a first-order step crosses 10 % at τ·ln(10/9) and 90 % at τ·ln 10, so t90 − t10 = τ·ln 9;
    # the 50 % instant is τ·ln 2 and settling into ±2 % happens at τ·ln 50, i.e. τ·ln 25 after t50.
    tau = 1e-3
    t = np.arange(-2000, 20000) * 1e-6
    y = first_order(t, tau, 1.0, 6.0) if polarity == "rising" else first_order(t, tau, 6.0, 1.0)
    p = step_parameters(t, y, polarity)
    assert p.transition_duration_s == pytest.approx(tau * np.log(9), rel=2e-3)
    assert p.t50_s == pytest.approx(tau * np.log(2), rel=2e-3)
    assert p.settling_duration_s == pytest.approx(tau * np.log(25), rel=2e-3)
    assert (p.state_before, p.state_after) == pytest.approx((1.0, 6.0) if polarity == "rising" else (6.0, 1.0),
                                                            abs=1e-3)
    assert p.overshoot_pct < 0.01 and p.undershoot_pct < 0.01
    assert p.damped_frequency_hz is None  # nothing rings


@pytest.mark.parametrize("zeta", [0.1, 0.3, 0.5, 0.7])
def test_second_order_overshoot_peak_time_damped_frequency(zeta):
    # Second-order formulas (Nise, Control Systems Engineering §4.6): PO = 100·e^{−ζπ/√(1−ζ²)}, t_p = π/ω_d, ω_d
    # = ω_n√(1−ζ²); the first undershoot after the peak is the second extremum, 100·e^{−2ζπ/√(1−ζ²)}.
    wn = 2 * np.pi * 1e3
    wd = wn * np.sqrt(1 - zeta**2)
    t = np.arange(-4000, 60000) * 0.5e-6
    p = step_parameters(t, second_order_unit(t, zeta, wn), "rising")
    k = zeta * np.pi / np.sqrt(1 - zeta**2)
    assert p.overshoot_pct == pytest.approx(100 * np.exp(-k), abs=0.02)
    assert p.undershoot_pct == pytest.approx(100 * np.exp(-2 * k), abs=0.02)
    assert p.peak_time_s == pytest.approx(np.pi / wd, rel=1e-4)
    if zeta <= 0.3:  # the third lobe, 100·e^{−3ζπ/√(1−ζ²)}, is 5.1 % at ζ = 0.3, beyond the 1 % hysteresis
        assert p.damped_frequency_hz == pytest.approx(wd / (2 * np.pi), rel=1e-3)
    else:  # 0.43 % at ζ = 0.5: too few lobes to call it ringing, and the reason is given
        assert p.damped_frequency_hz is None and "3 needed" in p.ringing_method


def test_series_rlc_values_computed_from_the_closed_forms():
    # Our own derived values (not a published example), from the closed forms of Nise §4.6 (from memory):
    # 20 Ω, 1 mH, 1 µF, no source resistance: ω_n = 1/√(LC) = 31 623 rad/s, ζ = (R/2)·√(C/L) = 0.3162,
    # ω_d = ω_n·√(1−ζ²) = 30 000 rad/s, so PO = 100·e^{−πζ/√(1−ζ²)} = 35.09 % and t_p = π/ω_d = 104.7 µs;
    # the exact 2 % settling, 354 µs from the stimulus edge, is the last root of |v_C − 1| = 0.02 found
    # numerically (IEEE 181 counts from the 50 % instant: add t50).
    t = np.arange(-1000, 20000) * 0.1e-6
    v_c = series_rlc_nodes(t, 20.0, 1e-3, 1e-6, 0.0)["v_c"]
    p = step_parameters(t, v_c, "rising")
    assert p.overshoot_pct == pytest.approx(35.09, abs=0.01)
    assert p.peak_time_s == pytest.approx(104.7e-6, abs=0.1e-6)
    assert p.t50_s + p.settling_duration_s == pytest.approx(354e-6, abs=1e-6)


def test_ten_ninety_rise_time_against_the_published_fit():
    # Nise §4.6, the curve fit of normalised 10–90 % rise time (from memory): ω_n·t_r ≈ 1 + 1.039ζ − 0.417ζ²
    # + 1.768ζ³; within 0.3 % for ζ = 0.1–0.9 by our own comparison with the exact closed form.
    wn = 2 * np.pi * 1e3
    t = np.arange(-4000, 80000) * 0.25e-6
    for zeta in (0.2, 0.5, 0.8):
        p = step_parameters(t, second_order_unit(t, zeta, wn), "rising")
        assert wn * p.transition_duration_s == pytest.approx(1 + 1.039 * zeta - 0.417 * zeta**2 + 1.768 * zeta**3,
                                                             rel=4e-3)


def test_histogram_levels_of_a_noisy_two_level_waveform():
    # IEEE 181 histogram method: a waveform spending most of its time at two levels returns those levels
    # (here within a tenth of the noise RMS, from 10^5 samples; numpy's RNG as the noise source).
    rng = np.random.default_rng(5)
    y = np.r_[np.full(40000, -0.2), np.linspace(-0.2, 3.1, 200), np.full(60000, 3.1)] + rng.normal(0, 0.01, 100200)
    lo, hi = histogram_levels(y)
    assert lo == pytest.approx(-0.2, abs=1e-3) and hi == pytest.approx(3.1, abs=1e-3)


def test_noise_does_not_fake_ringing_but_settling_counts_noise():
    # A noisy first-order step: no damped frequency is reported (hysteresis 5σ or 1 % of |A|).
    rng = np.random.default_rng(11)
    t = np.arange(-2000, 20000) * 1e-6
    y = first_order(t, 1e-3) + rng.normal(0, 0.002, len(t))
    p = step_parameters(t, y, "rising", noise_rms=0.002)
    assert p.damped_frequency_hz is None
    assert p.transition_duration_s == pytest.approx(1e-3 * np.log(9), rel=0.02)


def test_no_edge_is_a_step_error():
    t = np.arange(1000) * 1e-6
    with pytest.raises(StepError):
        step_parameters(t, np.full(1000, 0.3))
    with pytest.raises(StepError):  # a falling waveform asked for as rising has no rising 50 % crossing
        step_parameters(t, 1 - first_order(t - 1e-4, 1e-4), "rising")


def test_noise_rms_from_baseline_and_from_differences():
    # White noise of known σ (numpy RNG): the baseline estimate is the sample standard deviation; without
    # a baseline the MAD of first differences / (0.6745·√2) estimates σ for Gaussian noise (common practice).
    rng = np.random.default_rng(2)
    t = np.arange(-5000, 20000) * 1e-6
    y = first_order(t, 2e-3) + rng.normal(0, 0.01, len(t))
    assert noise_rms(t, y, 0.0) == pytest.approx(0.01, rel=0.05)
    assert noise_rms(t, y, t[0]) == pytest.approx(0.01, rel=0.05)


def test_channel_result_errors_and_nrmse_definition():
    # NRMSE = RMS error / (max − min of the simulated trace); a constant 0.01 offset has RMS error 0.01.
    t = np.arange(-1000, 9000) * 1e-6
    sim = first_order(t, 1e-3, 0.0, 2.0)
    meas = sim + 0.01
    meas[5000] += 0.5
    ch = channel_result("v_c", "v_c", "V", 1.0, 0.0, t, meas, sim, "rising", 0.0, 2.0)
    expected_rms = np.sqrt((0.01**2 * 9999 + 0.51**2) / 10000)
    assert ch.rms_error == pytest.approx(expected_rms, rel=1e-12)
    assert ch.nrmse == pytest.approx(expected_rms / np.ptp(sim), rel=1e-12)
    assert (ch.max_abs_error, ch.max_abs_error_time_s) == pytest.approx((0.51, t[5000]))
    assert ch.baseline_error == pytest.approx(0.01)


def test_damped_frequency_of_a_noisy_quantised_record():
    # A bench-like v_C: the series RLC step (Nilsson & Riedel, Electric Circuits ch. 8; 22 + 50 Ω, 3.3 mH, 100
    # nF) with 2 mV of noise through an 8-bit converter spanning ±1 V around 0.75 V (7.8 mV steps, as the demo
    # profile's channel). The ringing frequency must stay within 0.5 % of the textbook ω_d/2π, although the late
    # lobes are only a few quantisation steps tall.
    from test_compare_synthetic import quantise_8bit

    t = np.arange(-3000, 12000) * 1e-7
    v_c = series_rlc_nodes(t, 22.0, 3.3e-3, 100e-9)["v_c"]
    sigma, wn = 72.0 / (2 * 3.3e-3), 1 / np.sqrt(3.3e-3 * 100e-9)
    f_d = np.sqrt(wn**2 - sigma**2) / (2 * np.pi)
    for seed in range(5):
        y = quantise_8bit(v_c + np.random.default_rng(seed).normal(0, 0.002, len(t)), -0.25, 1.75)
        p = step_parameters(t, y, "rising", noise_rms=noise_rms(t, y, 0.0))
        assert p.damped_frequency_hz == pytest.approx(f_d, rel=5e-3), seed
