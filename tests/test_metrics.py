"""acqd.compare.metrics against outside references: numpy's sample standard deviation and the MAD estimate of
σ for the noise, the uniform-quantiser RMS step/√12, the RMS and range definitions for NRMSE, and the
first-order closed form for the step parameters it hands on.

Sources: the sample standard deviation with Bessel's correction (``statistics.stdev``, Python's standard
library, as an independent implementation); for Gaussian noise the median absolute deviation is
0.6745·σ, and the difference of two independent samples has σ·√2 (common practice); the RMS of uniform
quantisation error is q/√12 (Widrow & Kollár, Quantization Noise, 2008, ch. 4, from memory).
"""

from __future__ import annotations

import math
import statistics

import numpy as np
import pytest

from acqd.compare import metrics
from acqd.compare.memo import Memo
from acqd.compare.metrics import MIN_BASELINE_SAMPLES, channel_result, noise_rms, quantisation_rms, record_code_step
from acqd.record import Channel, Record, Stimulus, TimeBase
from test_compare_ieee181 import first_order


@pytest.fixture(autouse=True)
def fresh_memory(monkeypatch):
    """Each test computes the simulated traces' step parameters itself: the comparator remembers them by
    trace, edge and band, and an entry left by an earlier test (or by an earlier run in the same process)
    would answer for the computation under test."""
    monkeypatch.setattr(metrics, "_SIMULATED_STEPS", Memo())


def test_the_baseline_needs_sixteen_samples_before_the_trigger():
    # 16 baseline samples: their sample standard deviation (Bessel-corrected); 15: the MAD estimate over the
    # whole record instead, which for this made-up trace is a different number.
    y = np.r_[np.arange(16.0) % 4, np.zeros(200)]
    t = np.arange(len(y)) - 16.0  # t < 0 before the trigger
    assert MIN_BASELINE_SAMPLES == 16
    assert noise_rms(t, y, 0.0) == pytest.approx(statistics.stdev(y[:16].tolist()), rel=1e-12)
    fifteen = noise_rms(t, y, -1.0)
    diffs = np.diff(y)
    mad = statistics.median(abs(d - statistics.median(diffs.tolist())) for d in diffs.tolist())
    assert fifteen == pytest.approx(mad / (0.6745 * math.sqrt(2.0)), rel=1e-12)
    assert fifteen != pytest.approx(statistics.stdev(y[:15].tolist()))


def test_without_a_baseline_the_mad_of_differences_estimates_sigma():
    # Gaussian white noise on a steep ramp (0.05 a sample, more than the noise of a difference, 0.028):
    # the differences turn the ramp into a constant shift, which subtracting their median removes, and the
    # estimate is σ within a few per cent for 20000 samples.
    rng = np.random.default_rng(11)
    t = np.arange(20000) * 1e-6
    y = 0.05 * np.arange(len(t)) + rng.normal(0.0, 0.02, len(t))
    assert noise_rms(t, y, -1.0) == pytest.approx(0.02, rel=0.03)
    assert noise_rms(np.zeros(1), np.ones(1), 1.0) == 0.0  # one sample: no difference, no estimate


def test_quantisation_rms_is_the_code_step_over_root_twelve():
    q = 2.0 / 256  # an 8-bit span of 2 V
    y = np.round(np.sin(np.linspace(0, 6, 4000)) / q) * q
    assert quantisation_rms(y) == pytest.approx(q / math.sqrt(12.0), rel=1e-9)
    assert quantisation_rms(np.r_[np.zeros(10), np.ones(10)]) == 0.0  # two codes: the step cannot be told


def record(settings: dict, averages: int = 1, source: str = "CH2") -> Record:
    tb = TimeBase(1e-6, 10, 100)
    return Record([Channel("y", "V", np.zeros(100), source)], tb, Stimulus("square", 0.0, 1.0, 10.0, "rising"),
                  settings=settings, averages=averages)


def test_the_records_code_step_is_per_capture_of_an_average():
    told = {"scope": {"channels": {"CH2": {"volts_per_code": 0.02}}}}
    assert record_code_step(record(told), "y") == 0.02
    assert record_code_step(record(told, averages=8), "y") == pytest.approx(0.0025)  # 8 averaged: 8 × finer
    assert record_code_step(record(told, averages=0), "y") == 0.02  # no averaging recorded: one capture
    assert record_code_step(record(told, source="CH1 - CH2"), "y") is None  # a math channel has no input
    for value in (0, -0.02, True, "0.02", None):
        assert record_code_step(record({"scope": {"channels": {"CH2": {"volts_per_code": value}}}}), "y") is None
    assert record_code_step(record({}), "y") is None and record_code_step(record({"scope": None}), "y") is None
    assert record_code_step(record({"scope": {"channels": None}}), "y") is None


def test_errors_nrmse_and_where_the_largest_error_is():
    # RMS error = √(mean of squared errors); NRMSE = RMS / (max − min) of the simulated trace (the module's
    # stated basis); the largest |error| and its time; a negative error counts by its size.
    t = np.arange(-100, 900) * 1e-6
    sim = first_order(t, 1e-4, 0.0, 0.5)  # a range below 1: NRMSE divides by it, whatever its size
    meas = sim.copy()
    meas[300] -= 0.4
    meas[700] += 0.3
    ch = channel_result("v_c", "v_c", "V", 2.0, 0.1, t, meas, sim, "rising", 0.0, 2.0)
    rms = math.sqrt((0.4**2 + 0.3**2) / 1000)
    assert (ch.channel, ch.signal, ch.unit, ch.gain, ch.offset) == ("v_c", "v_c", "V", 2.0, 0.1)
    assert ch.rms_error == pytest.approx(rms, rel=1e-12)
    assert ch.nrmse == pytest.approx(rms / (sim.max() - sim.min()), rel=1e-12)
    assert ch.max_abs_error == pytest.approx(0.4) and ch.max_abs_error_time_s == t[300]
    assert ch.baseline_error == 0.0  # 100 quiet samples, no error there
    assert ch.noise_rms == 0.0 and ch.step_note == ""


def test_a_flat_simulation_has_an_infinite_nrmse_and_no_step():
    t = np.arange(-100, 400) * 1e-6
    flat = np.zeros(len(t))
    ch = channel_result("i", "i_l", "A", 1.0, 0.0, t, flat + 0.001, flat, None, 0.0, 2.0)
    assert ch.nrmse == math.inf and ch.rms_error == pytest.approx(0.001)
    assert (ch.measured, ch.simulated) == (None, None)
    assert ch.step_note == "no step: the model's rest values before and after the edge are equal"


def test_a_short_baseline_gives_no_baseline_error():
    t = np.arange(-15, 500) * 1e-6  # 15 samples before the trigger: fewer than 16
    sim = first_order(t, 1e-4)
    ch = channel_result("v", "v", "V", 1.0, 0.0, t, sim + 0.01, sim, "rising", 0.0, 2.0)
    assert ch.baseline_error is None
    t = np.arange(-16, 500) * 1e-6
    sim = first_order(t, 1e-4)
    assert channel_result("v", "v", "V", 1.0, 0.0, t, sim + 0.01, sim, "rising", 0.0, 2.0).baseline_error == (
        pytest.approx(0.01))


def test_step_parameters_of_both_traces_and_why_one_is_missing():
    # A first-order step: 10-90 % transition τ·ln 9 (IEEE Std 181-2011 cl. 5.3.3 reference levels; the
    # first-order closed form) on both traces; a measured trace without the edge is named as the missing one.
    t = np.arange(-1000, 9000) * 1e-7
    tau = 5e-5
    sim = first_order(t, tau)
    ch = channel_result("v", "v", "V", 1.0, 0.0, t, sim.copy(), sim, "rising", 0.0, 2.0)
    for p in (ch.measured, ch.simulated):
        assert p.transition_duration_s == pytest.approx(tau * math.log(9), rel=2e-3)
        assert p.settling_band_pct == 2.0
    assert ch.simulated.code_step == 0.0  # a model has no ADC, whatever the record's code step
    no_edge = channel_result("v", "v", "V", 1.0, 0.0, t, np.zeros(len(t)), sim, "rising", 0.0, 2.0)
    assert no_edge.measured is None and no_edge.simulated is not None
    assert no_edge.step_note.startswith("measured trace: ")
    falling = first_order(t, tau, 1.0, 0.0)  # the same edge downwards: both traces judged as falling
    down = channel_result("v", "v", "V", 1.0, 0.0, t, falling.copy(), falling, "falling", 0.0, 2.0)
    assert (down.measured.polarity, down.simulated.polarity) == ("falling", "falling")
    assert down.measured.amplitude == pytest.approx(-1.0, abs=1e-3)
    flat_sim = channel_result("v", "v", "V", 1.0, 0.0, t, sim, np.zeros(len(t)), "rising", 0.0, 2.0)
    assert (flat_sim.measured, flat_sim.simulated) == (None, None)
    assert flat_sim.step_note.startswith("simulated trace: ")


def test_the_settling_band_and_code_step_are_passed_on():
    t = np.arange(-1000, 9000) * 1e-7
    sim = first_order(t, 5e-5)
    # The samples sit on a 1/64 grid, but the record says its code step is half that (an average of two
    # captures): the step the record gives is the one used.
    q = 1.0 / 64
    meas = np.round(sim / q) * q
    wide = channel_result("v", "v", "V", 1.0, 0.0, t, meas, sim, "rising", 0.0, 10.0, code_step=q / 2)
    narrow = channel_result("v", "v", "V", 1.0, 0.0, t, meas, sim, "rising", 0.0, 2.0, code_step=q / 2)
    assert wide.measured.settling_band_pct == 10.0 and wide.measured.code_step == q / 2
    # IEEE Std 181-2011 (from memory): settling duration runs from the 50 % reference level instant (τ·ln 2
    # for a first-order step) to entering the band for good: τ·ln 10 for ±10 %, τ·ln 50 for ±2 %.
    assert wide.simulated.settling_duration_s == pytest.approx(5e-5 * math.log(10 / 2), rel=0.01)
    assert narrow.simulated.settling_duration_s == pytest.approx(5e-5 * math.log(50 / 2), rel=0.01)
    assert wide.measured.overshoot_uncertainty_pct == pytest.approx(100 * q / 2 / wide.measured.amplitude, rel=1e-6)
    assert channel_result("v", "v", "V", 1.0, 0.0, t, meas, sim, "rising", 0.0, 2.0).measured.code_step == q


def test_the_baseline_noise_keeps_noise_from_passing_for_ringing():
    # A first-order step under white noise (σ = 10 mV, numpy RNG) has no peak and no ringing (it approaches
    # its final level monotonically); the measured baseline's noise, handed to the step parameters, is what
    # keeps noise crossings from being counted as lobes.
    rng = np.random.default_rng(3)
    t = np.arange(-2000, 18000) * 1e-7
    sim = first_order(t, 5e-5)
    ch = channel_result("v", "v", "V", 1.0, 0.0, t, sim + rng.normal(0.0, 0.01, len(t)), sim, "rising", 0.0, 2.0)
    assert ch.noise_rms == pytest.approx(0.01, rel=0.1)
    assert ch.measured.peak_time_s is None and ch.measured.damped_frequency_hz is None
    assert ch.measured.ringing_lobes == 0
