"""The simulated bench's slow parameter drift (``[bench.simulated.drift]``), over real TCP through pyvisa-py.

With noise, jitter, bandwidth, edge time, clipping and quantisation off, the scope shows the plant's exact
capacitor voltage, so the capacitance the plant had at each capture can be read back by fitting the
series-RLC step response (Nilsson & Riedel, Electric Circuits ch. 8) with C free. It must follow the
stated linear drift at the times the captures were taken.
"""

from __future__ import annotations

import math
import time
from collections.abc import Iterator
from contextlib import contextmanager
from datetime import UTC, datetime, timedelta

import numpy as np
import pytest
from scipy.optimize import least_squares

from acqd.errors import ConfigError, InstrumentError
from acqd.instruments import open_instrument
from acqd.record import Stimulus
from acqd.instruments import Scope
from acqd.sim.bench import DEMO_DUT, SimBench, SimBenchConfig

# The demo DUT behind the generator's 50 ohm: R, L fixed; C drifts.
R_OHM, L_H, C0_F = DEMO_DUT["r_ohm"] + 50.0, DEMO_DUT["l_h"], DEMO_DUT["c_f"]
PER_HOUR, TIME_SCALE = 0.02, 3600.0  # +2 %/h, one simulated hour per real second: +2 % per real second
WINDOW_S, N, SHARE = 400e-6, 4000, 0.1
EXACT = {"noise_v_rms": 0.0, "jitter_s": 0.0, "bandwidth_hz": 0.0, "edge_time_s": 0.0, "quantise": False,
         "clip": False}


def v_c_step(t: np.ndarray, c_f: float, volts: float = 1.0) -> np.ndarray:
    """Underdamped series RLC from rest, step of ``volts`` at t = 0 (Nilsson & Riedel, Electric Circuits ch. 8):
    v_C = V[1 − e^{−σt}(cos ω_d t + σ/ω_d sin ω_d t)], σ = R/2L, ω_d = √(1/LC − σ²)."""
    sigma = R_OHM / (2 * L_H)
    omega_d = math.sqrt(1 / (L_H * c_f) - sigma ** 2)
    tt = np.clip(t, 0, None)
    v = volts * (1 - np.exp(-sigma * tt) * (np.cos(omega_d * tt) + sigma / omega_d * np.sin(omega_d * tt)))
    return np.where(t >= 0, v, 0.0)


def fitted_c_ratio(t: np.ndarray, v: np.ndarray) -> tuple[float, float]:
    """C / nominal C that makes the closed form match the capture (scipy least squares, one free value),
    and how far the REAL,32 transfer's rounding alone can move it.

    The bound is derived, not measured: each sample is off by at most half a float32 step (IEEE 754 single
    precision, 24-bit significand), so the residual norm is at most ‖r‖ ≤ √N·2⁻²⁴·max|v|, and for one
    linearised parameter the least-squares shift is Δk = Jᵀr/JᵀJ, |Δk| ≤ ‖r‖/‖J‖ (Cauchy–Schwarz), with J
    = ∂v_C/∂k from central differences of the closed form. Twice that covers the linearisation.
    """
    fit = least_squares(lambda k: v - v_c_step(t, C0_F * k[0]), x0=[1.0], bounds=([0.5], [2.0]),
                        xtol=1e-15, ftol=1e-15, gtol=1e-15)
    # the closed form fits the exact plant to the REAL,32 transfer's rounding: half a float32 step (IEEE 754
    # single precision, 24-bit significand) at the largest value
    rounding = 2.0 ** -24 * np.max(np.abs(v))
    assert fit.success and np.max(np.abs(fit.fun)) <= rounding * (1 + 1e-6)
    k, h = float(fit.x[0]), 1e-6
    jac = (v_c_step(t, C0_F * (k + h)) - v_c_step(t, C0_F * (k - h))) / (2 * h)
    return k, 2 * math.sqrt(len(v)) * rounding / float(np.linalg.norm(jac))


@contextmanager
def capturing(bench: SimBench) -> Iterator[Scope]:
    """The scope of ``bench`` set to capture v_C (CH2 on the demo bench), a 0 → 1 V, 100 Hz square wave on
    (half period 5 ms ≫ 8L/R = 0.34 ms)."""
    with open_instrument(bench.resources["generator"], "scpi-generator") as gen, \
            open_instrument(bench.resources["scope"], "scpi-digitiser") as scope:
        gen.apply_stimulus(Stimulus("square", 0.0, 1.0, 100.0, "rising"))
        gen.output(True)
        scope.configure_timebase(WINDOW_S, N, SHARE)
        scope.configure_channel("CH2", 1.0, 0.5, "dc")
        scope.configure_trigger("external", "rising", 0.5)
        yield scope


def capture(bench: SimBench, scope: Scope) -> tuple[float, float]:
    """One capture's fitted C ratio and its rounding bound, checked against the stated drift at the instants
    around it: the plant was built between them, C = C0·(1 + per_hour·hours), hours = simulated seconds / 3600."""
    before = bench.simulated_elapsed_s()
    scope.arm()
    scope.wait(5.0)
    after = bench.simulated_elapsed_s()
    volts, timebase = scope.fetch("CH2")
    ratio, fit_tol = fitted_c_ratio(timebase.times(), volts)
    per_hour = bench.config.drift.per_hour if bench.config.drift else 0.0
    low, high = (1 + per_hour * s / 3600.0 for s in (before, after))
    assert low - fit_tol <= ratio <= high + fit_tol, (ratio, low, high, fit_tol)
    return ratio, fit_tol


def test_capacitance_follows_the_stated_drift_at_the_capture_times(sim_bench):
    bench = sim_bench({**EXACT, "drift": {"parameter": "c_f", "per_hour": PER_HOUR, "time_scale": TIME_SCALE}})
    ratios = []
    with capturing(bench) as scope:
        for pause_s in (0.0, 0.25, 0.25):
            time.sleep(pause_s)
            ratios.append(capture(bench, scope)[0])
    # half a real second is half a simulated hour: C grew by about 1 %, far beyond the fit's resolution
    assert ratios[0] < ratios[1] < ratios[2]
    assert ratios[2] - ratios[0] > 0.5 * PER_HOUR * 0.5


def test_drift_counted_from_since_carries_on_across_a_restarted_bench(sim_bench):
    # The drift started two simulated hours ago (time_scale 3600: two real seconds); a bench started now, and
    # one started again after it, capture the part as it is by then, not a new one: C ≥ C0·(1 + 0.02·2).
    since = datetime.now(UTC) - timedelta(seconds=2.0)
    table = {**EXACT, "drift": {"parameter": "c_f", "per_hour": PER_HOUR, "time_scale": TIME_SCALE,
                                "since": since.isoformat()}}
    for _ in range(2):
        bench = sim_bench(table)
        with capturing(bench) as scope:
            ratio, fit_tol = capture(bench, scope)
            assert ratio >= 1 + PER_HOUR * 2 - fit_tol


def test_without_drift_the_plant_keeps_its_nominal_capacitance(sim_bench):
    bench = sim_bench(EXACT)
    with capturing(bench) as scope:
        time.sleep(0.1)
        capture(bench, scope)  # with no drift its check is C = C0 within the fit's resolution


def test_a_parameter_drifted_out_of_its_range_stops_the_captures_with_300(sim_bench):
    # −100 %/h at 36000 simulated s per real s: C reaches zero after 0.1 real seconds
    bench = sim_bench({**EXACT, "drift": {"parameter": "c_f", "per_hour": -1.0, "time_scale": 36000.0}})
    with capturing(bench) as scope:
        time.sleep(0.2)
        with pytest.raises(InstrumentError) as caught:
            scope.arm()
    text = str(caught.value)
    assert "\n" not in text and "-300" in text and "c_f" in text


@pytest.mark.parametrize("drift, field, words", [
    ({"parameter": "q_f", "per_hour": 0.02}, "bench.simulated.drift.parameter",
     "allowed: r_ohm, l_h, c_f, source_resistance_ohm"),
    ({"per_hour": 0.02}, "bench.simulated.drift.parameter", "missing"),
    ({"parameter": "c_f"}, "bench.simulated.drift.per_hour", "missing"),
    ({"parameter": "c_f", "per_hour": "2 %"}, "bench.simulated.drift.per_hour", "finite number"),
    ({"parameter": "c_f", "per_hour": 0.02, "time_scale": 0}, "bench.simulated.drift.time_scale", "greater than 0"),
    ({"parameter": "c_f", "per_hour": 0.02, "rate": 1}, "bench.simulated.drift.rate", "allowed here"),
    ({"parameter": "c_f", "per_hour": 0.02, "since": "last night"}, "bench.simulated.drift.since", "ISO 8601"),
    (3, "bench.simulated.drift", "must be a table"),
])
def test_bad_drift_tables_are_one_line_naming_the_key(drift, field, words):
    with pytest.raises(ConfigError) as caught:
        SimBenchConfig.from_mapping({"drift": drift}, "bench.toml")
    assert "\n" not in str(caught.value)
    assert caught.value.source.startswith("bench.toml") and caught.value.field == field
    assert words in caught.value.problem


def test_the_allowed_parameters_are_those_of_the_dut_model():
    table = {"dut": {"model": "rc_lowpass", "r_ohm": 1e3, "c_f": 1e-9}, "wiring": {"CH1": "v_c"},
             "drift": {"parameter": "l_h", "per_hour": 0.01}}
    with pytest.raises(ConfigError) as caught:
        SimBenchConfig.from_mapping(table, "bench.toml")
    assert caught.value.problem.endswith("allowed: r_ohm, c_f, source_resistance_ohm")
    table["drift"]["parameter"] = "source_resistance_ohm"  # not in the table: the model's default is nominal
    assert SimBenchConfig.from_mapping(table, "bench.toml").drift_nominal == 50.0
