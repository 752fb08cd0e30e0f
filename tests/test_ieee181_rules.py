"""The branches of acqd.compare.ieee181 that a well-behaved step does not reach, each against a closed form
or a stated rule: how the final state level is found (a settled tail, an exponential approach, a damped
sinusoid), a falling edge mirrored back, a record that ends outside the settling band, the code step read
from the samples, and every refusal.

Closed forms: a first-order step v = A·(1 − e^{−t/τ}) and the underdamped second-order step
1 − e^{−ζω_n t}(cos ω_d t + (ζω_n/ω_d) sin ω_d t) with peak 1 + e^{−ζπ/√(1−ζ²)} at t_p = π/ω_d (Nise,
Control Systems Engineering §4.6). Reference levels at 10, 50 and 90 % of the amplitude, crossings
interpolated linearly between samples (IEEE Std 181-2011, from memory).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from acqd.compare.ieee181 import StepError, _crossing_seeds, _lobes, code_step_of, histogram_levels, step_parameters
from test_compare_ieee181 import first_order, second_order_unit
from test_compare_synthetic import quantise_8bit

WN = 2 * np.pi * 1e3


def test_a_record_that_ends_settled_takes_its_tail_mean():
    t = np.arange(-2000, 20000) * 1e-6  # 20 ms of a τ = 1 ms step: settled to e^{−20}
    p = step_parameters(t, first_order(t, 1e-3, 0.0, 2.0))
    assert p.final_level_method == "mean of the settled tail (IEEE 181-2011 histogram-mean variant)"
    assert p.state_after == pytest.approx(2.0, abs=1e-6) and p.amplitude == pytest.approx(2.0, abs=1e-6)


def test_a_record_that_ends_before_settling_takes_the_level_it_heads_for():
    # Cut at 4τ the trace is at 98.2 % of its final value and still rising: the fitted exponential gives the
    # final value, where the tail's mean or the histogram would give less.
    t = np.arange(-500, 4000) * 1e-6
    p = step_parameters(t, first_order(t, 1e-3, 0.0, 2.0))
    assert p.final_level_method == "level of a fitted exponential approach (the record ends before it settles)"
    assert p.state_after == pytest.approx(2.0, rel=1e-4)
    assert p.t50_s == pytest.approx(1e-3 * math.log(2), rel=2e-3)  # the 50 % of the true amplitude


def test_a_record_that_ends_ringing_takes_the_fitted_sinusoids_level():
    # Cut at 2.3 ms the envelope e^{−ζω_n t} is still 48 %, and the last quarter after the 50 % instant
    # (about half a period) shows a trend, so the level comes from the damped sinusoid fitted to the lobes.
    zeta = 0.05
    t = np.arange(-400, 2300) * 1e-6
    p = step_parameters(t, 3.0 * second_order_unit(t, zeta, WN))
    assert p.final_level_method == "level of the fitted damped sinusoid (the record ends still ringing)"
    assert p.state_after == pytest.approx(3.0, rel=1e-4)
    wd = WN * math.sqrt(1 - zeta**2)
    assert p.damped_frequency_hz == pytest.approx(wd / (2 * math.pi), rel=1e-3)
    assert p.peak_time_s == pytest.approx(math.pi / wd, rel=1e-3)
    assert p.overshoot_pct == pytest.approx(100 * math.exp(-zeta * math.pi / math.sqrt(1 - zeta**2)), abs=0.05)


def test_a_falling_ringing_edge_is_mirrored_back():
    # 1 V → −1 V through a ζ = 0.2 section: the peak is the minimum, −1 − 2·e^{−ζπ/√(1−ζ²)}, and the
    # amplitude −2 V; overshoot and the peak time are those of the rising edge.
    zeta = 0.2
    t = np.arange(-4000, 60000) * 0.5e-6
    y = 1.0 - 2.0 * second_order_unit(t, zeta, WN)
    p = step_parameters(t, y, "falling")
    k = math.exp(-zeta * math.pi / math.sqrt(1 - zeta**2))
    assert (p.polarity, p.state_before, p.state_after) == ("falling", pytest.approx(1.0, abs=1e-4),
                                                           pytest.approx(-1.0, abs=1e-4))
    assert p.amplitude == pytest.approx(-2.0, abs=1e-4) and p.peak_value == pytest.approx(-1.0 - 2.0 * k, abs=1e-3)
    assert p.overshoot_pct == pytest.approx(100 * k, abs=0.02)
    assert p.undershoot_pct == pytest.approx(100 * k**2, abs=0.02)  # the second extremum, as a share of |A|
    assert p.peak_time_s == pytest.approx(math.pi / (WN * math.sqrt(1 - zeta**2)), rel=1e-4)
    assert p.t10_s < p.t50_s < p.t90_s  # the 10 % instant is 10 % of the way down


def test_settling_is_undefined_when_the_record_ends_outside_the_band():
    # ζ = 0.05 cut at 8 ms still rings by ±8 %: it never stays inside ±2 %, but it does inside ±10 %...
    zeta = 0.05
    t = np.arange(-400, 8000) * 1e-6
    y = second_order_unit(t, zeta, WN)
    assert step_parameters(t, y, band_pct=2.0).settling_duration_s is None
    # ... whose last exit is where the envelope e^{−ζω_n t} falls to 10 %, give or take half a period
    inside = step_parameters(t, y, band_pct=10.0)
    envelope_s = math.log(10) / (zeta * WN)
    assert inside.settling_band_pct == 10.0
    assert abs(inside.t50_s + inside.settling_duration_s - envelope_s) < 0.5 / 1e3


def test_the_code_step_is_read_from_the_samples_or_taken_as_given():
    q = 1 / 128
    t = np.arange(-1000, 9000) * 1e-6
    y = np.round(first_order(t, 1e-3) / q) * q
    assert code_step_of(y) == q
    assert code_step_of(np.repeat(np.arange(7) * q, 10)) == 0.0  # seven levels: too few to tell
    assert code_step_of(np.repeat(np.arange(8) * q, 10)) == q
    p = step_parameters(t, y)
    assert p.code_step == q and p.overshoot_uncertainty_pct == pytest.approx(100 * q / p.amplitude, rel=1e-9)
    given = step_parameters(t, y, code_step=q / 4)  # an average of four captures moves in quarter codes
    assert given.code_step == q / 4 and given.overshoot_uncertainty_pct == pytest.approx(25 * q / given.amplitude)


def test_histogram_levels_split_at_mid_range_and_take_each_halfs_mode():
    # 70 % of the samples at 0, 30 % at 5, a few in between: the modes of the two halves are 0 and 5
    # whatever the bin count (odd counts are made even so that mid-range is a bin edge).
    y = np.r_[np.zeros(700), np.linspace(0, 5, 9)[1:-1], np.full(300, 5.0)]
    for bins in (10, 11, 100):
        assert histogram_levels(y, bins) == (0.0, 5.0)
    with pytest.raises(StepError, match="the waveform is flat, so it has no transition"):
        histogram_levels(np.full(100, 2.5))


@pytest.mark.parametrize("y, polarity, reason", [
    (np.r_[np.zeros(500), np.ones(500)], "falling", "no falling crossing of the 50 % reference level"),
    (np.r_[np.zeros(500), np.linspace(0, 1, 400), np.zeros(100)], "rising",
     "does not end beyond the level it started from"),
    # the record begins part-way up its first edge (0.4 of a 0 → 1 step): no sample below 10 % precedes
    # the first rising 50 % crossing, so that crossing has no 10 % instant
    (np.r_[np.full(3, 0.4), np.ones(300), np.zeros(500), np.ones(700)], "rising",
     "the edge does not pass both the 10 % and the 90 % reference levels"),
])
def test_every_refusal_says_what_is_missing(y, polarity, reason):
    t = np.arange(len(y)) * 1e-6
    with pytest.raises(StepError, match=reason):
        step_parameters(t, y, polarity)


def test_the_crossing_seeds_of_a_textbook_ringing_are_its_omega_d_and_sigma():
    # y − 1 = −(ω_n/ω_d)·e^{−σt}·cos(ω_d t − φ), φ = atan(σ/ω_d) (Nise §4.6 rearranged): the crossings of the
    # final level are exactly π/ω_d apart and the k-th lobe's extremum, at kπ/ω_d, is e^{−σkπ/ω_d} high, so
    # the slope of crossing instant against crossing number is π/ω_d and that of ln(lobe height) against
    # the lobes' mid-times −σ. 100 samples a period, crossings interpolated linearly between samples.
    zeta = 0.1
    wd, sigma = WN * math.sqrt(1 - zeta**2), zeta * WN
    t = np.arange(0, 6e-3, 1e-5)
    y = second_order_unit(t, zeta, WN)
    outside, flips = _lobes(y, 1.0, 0.01)
    # lobes beyond ±1 %: every extremum kπ/ω_d inside the record (heights e^{−kπζ/√(1−ζ²)} ≥ 3 % up to 5.5
    # ms), and the twelfth, already past the band when the record ends before its extremum
    assert len(flips) == 12
    omega, decay = _crossing_seeds(t, y, 1.0, outside, flips)
    assert omega == pytest.approx(wd, rel=1e-6) and decay == pytest.approx(sigma, rel=1e-4)


@pytest.mark.parametrize("zeta, lobes", [(0.3, 4), (0.5, 2)])
def test_the_lobes_counted_are_the_extrema_beyond_one_percent(zeta, lobes):
    # Lobe k of the textbook step stands e^{−kπζ/√(1−ζ²)} from the final level (Nise §4.6): at ζ = 0.3
    # 37.2, 13.8, 5.1, 1.9 and then 0.71 %, four beyond the ±1 % band (noise-free, unquantised: the band is
    # 1 % of the step); at ζ = 0.5 16.3, 2.7 and then 0.43 %, two, too few for a ringing frequency.
    t = np.arange(-4000, 60000) * 0.5e-6
    p = step_parameters(t, second_order_unit(t, zeta, WN))
    assert p.ringing_lobes == lobes
    assert "beyond ±1 % of the step around the final level" in p.ringing_method
    if lobes < 3:
        assert p.ringing_method.startswith(f"undefined: {lobes} lobe(s) of ringing") and p.damped_frequency_hz is None
    else:
        assert f"between {lobes} lobes" in p.ringing_method and p.damped_frequency_hz is not None


def test_a_maximum_within_one_code_of_the_final_level_is_not_overshoot():
    # An 8-bit record of a first-order step (no overshoot: 1 − e^{−t/τ} never passes 1) with 0.2 % noise and
    # no noise estimate given: the rounding puts samples a code above the final level, and their running
    # mean stands a fraction of a code above it. One code is the finest step the record can show, so that
    # is no overshoot; told a finer resolution than the record has, the same samples do show a maximum.
    t = np.arange(-2000, 20000) * 1e-6
    y = quantise_8bit(first_order(t, 1e-3) + np.random.default_rng(0).normal(0, 0.002, len(t)), -0.15, 1.15)
    p = step_parameters(t, y)
    assert p.code_step == pytest.approx(1.3 / 256, rel=1e-9)
    assert (p.overshoot_pct, p.peak_time_s, p.peak_value) == (0.0, None, None)
    assert step_parameters(t, y, code_step=1e-9).overshoot_pct > 0  # the floor was the code, not the noise


def test_a_bump_below_a_ten_thousandth_of_the_step_is_not_overshoot():
    # A 2 V first-order step, unquantised and noise-free, with a Gaussian bump 10 ms after the edge: 0.5e-4
    # of the step is below the 0.01 % floor and shows no peak, 3e-4 of it is a peak there.
    t = np.arange(-2000, 20000) * 1e-6
    bump = np.exp(-((t - 10e-3) / 1e-3) ** 2)
    below = step_parameters(t, first_order(t, 1e-3, 0.0, 2.0) + 2.0 * 0.5e-4 * bump)
    assert (below.overshoot_pct, below.peak_time_s) == (0.0, None)
    above = step_parameters(t, first_order(t, 1e-3, 0.0, 2.0) + 2.0 * 3e-4 * bump)
    assert above.overshoot_pct > 0.01 and above.peak_time_s == pytest.approx(10e-3, abs=0.1e-3)


def test_a_lobe_too_short_for_the_lobe_fit_peaks_at_its_largest_sample():
    # Ten samples a period (ζ = 0.3): the overshoot lobe holds fewer samples than the lobe fit needs, so the
    # peak is the largest sample (one, not a flat run), at its own instant. The true peak, at t_p = π/ω_d
    # (Nise §4.6), lies between that sample's neighbours, and no sample exceeds the true
    # 1 + e^{−ζπ/√(1−ζ²)}.
    zeta = 0.3
    dt = 1e-4
    t = (np.arange(-10, 300) + 0.37) * dt
    y = second_order_unit(t, zeta, WN)
    p = step_parameters(t, y)
    k = int(np.argmax(y))
    assert (p.peak_time_s, p.peak_value) == (t[k], y[k])
    assert abs(p.peak_time_s - math.pi / (WN * math.sqrt(1 - zeta**2))) < dt
    assert p.overshoot_pct == pytest.approx(100 * (y[k] - p.state_after) / p.amplitude, rel=1e-12)
    assert p.overshoot_pct < 100 * math.exp(-zeta * math.pi / math.sqrt(1 - zeta**2))


def test_each_level_is_the_median_of_its_modal_bin_and_the_two_beside_it():
    # 100 bins over 0 .. 100 V, one volt each (numpy.histogram's bins: [a, b), the last one closed). Lower
    # half: the mode is bin [20, 21) (60 samples); with its neighbours [19, 20) and [21, 22) the samples are
    # 19.0 ×20, 19.5 ×10, 20.25 ×30, 20.75 ×30, 21.5 ×30, whose median (the 60th and 61st of 120) is 20.5 by
    # hand. Bins [18, 19) (45) and [22, 23) (20) lie outside it: either would move the median. Upper half:
    # the mode is the last bin, [99, 100], 51 samples at 100 V (the maximum) and 20 at 99.5; with [98, 99)
    # (30 at 98.5) the median of 101 is 100 V; [97, 98) (40 at 97.5) would make it 99.5.
    lower = np.r_[np.full(45, 18.5), np.full(20, 19.0), np.full(10, 19.5), np.full(30, 20.25), np.full(30, 20.75),
                  np.full(30, 21.5), np.full(20, 22.5)]
    upper = np.r_[np.full(40, 97.5), np.full(30, 98.5), np.full(20, 99.5), np.full(51, 100.0)]
    y = np.r_[0.0, lower, upper]  # 0 V: the minimum
    assert histogram_levels(y) == (20.5, 100.0)
    # An odd bin count is made even by one more bin, never one fewer: the histogram is never coarser than
    # asked (11 bins → 12, the same levels as 12; on two noisy levels (numpy's seeded normal noise) 10 differ).
    noisy = np.r_[np.zeros(400), np.ones(600)] + np.random.default_rng(1).normal(0, 0.1, 1000)
    assert histogram_levels(noisy, 11) == histogram_levels(noisy, 12) != histogram_levels(noisy, 10)


def test_an_overshoot_below_one_percent_under_noise_is_measured_on_the_running_mean():
    # ζ = 0.85, a 2 V step (Nise §4.6): PO = 100·e^{−ζπ/√(1−ζ²)} = 0.63 % at t_p = π/ω_d, and the first
    # undershoot the second extremum, 100·e^{−2ζπ/√(1−ζ²)} = 0.004 %. With 10 mV RMS of noise (numpy's seeded
    # normal noise), nearly the overshoot's own 12.6 mV, the peak is still found, on the running mean of the
    # samples: within 0.05 % of the step and 2 % of t_p.
    zeta = 0.85
    k = math.exp(-zeta * math.pi / math.sqrt(1 - zeta**2))
    tp = math.pi / (WN * math.sqrt(1 - zeta**2))
    t = np.arange(-4000, 60000) * 0.5e-6
    y = 2.0 * second_order_unit(t, zeta, WN)
    clean = step_parameters(t, y)
    assert clean.overshoot_pct == pytest.approx(100 * k, abs=1e-4) and clean.peak_time_s == pytest.approx(tp, rel=1e-4)
    assert clean.undershoot_pct == pytest.approx(100 * k**2, abs=1e-5)
    for seed in range(3):
        noisy = step_parameters(t, y + np.random.default_rng(seed).normal(0, 0.01, len(t)), noise_rms=0.01)
        assert noisy.overshoot_pct == pytest.approx(100 * k, abs=0.05), seed
        assert noisy.peak_time_s == pytest.approx(tp, rel=0.02), seed


def test_a_record_that_enters_the_band_at_its_last_sample_has_settled_there():
    # A first-order step enters ±2 % of its final value at τ·ln 50 (textbook RC step): a record whose last
    # sample interval holds that instant settles there, τ·ln 25 after t50 (linear interpolation between the
    # last two samples, IEEE 181-2011).
    tau, dt = 1e-3, 1e-6
    t = np.arange(-500, int(tau * math.log(50) / dt) + 1) * dt + 0.3e-6
    assert t[-2] < tau * math.log(50) < t[-1]
    p = step_parameters(t, first_order(t, tau))
    assert p.settling_duration_s == pytest.approx(tau * math.log(25), abs=1e-8)


def test_float32_samples_give_the_parameters_of_the_same_values_in_float64():
    # A scope's record holds float32 samples: measured on them, the parameters are those of the same values
    # held as float64 (every float32 is exactly a float64, IEEE 754), not float32 arithmetic's.
    t = np.arange(-400, 8000) * 1e-6
    y = second_order_unit(t, 0.2, WN).astype(np.float32)
    t32 = t.astype(np.float32)
    assert step_parameters(t32, y) == step_parameters(t32.astype(np.float64), y.astype(np.float64))
