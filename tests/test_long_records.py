"""A record longer than a comparison uses (``MAX_COMPARED_SAMPLES`` per channel) is compared on one sample in
k, the trigger's sample among them, and says so; the fitted parts still come out right.

Reference: the series RLC step response of the capacitor voltage, underdamped (Nilsson & Riedel, *Electric
Circuits*, ch. 8): v_c(t) = V (1 − e^(−αt) (cos ω_d t + α/ω_d sin ω_d t)), α = R/2L, ω_d = √(1/LC − α²),
with R the DUT's resistor plus the generator's 50 Ω source resistance.
"""

from __future__ import annotations

import dataclasses

import numpy as np

from acqd.compare import compare
from acqd.compare.core import MAX_COMPARED_SAMPLES, _every_kth_sample
from acqd.record import Channel, Stimulus, TimeBase
from test_store import make_record

R_OHM, L_H, C_F, SOURCE_OHM = 22.0, 3.3e-3, 100e-9, 50.0


def closed_form_v_c(t: np.ndarray) -> np.ndarray:
    alpha = (R_OHM + SOURCE_OHM) / (2 * L_H)
    omega_d = np.sqrt(1 / (L_H * C_F) - alpha ** 2)
    after = 1 - np.exp(-alpha * t) * (np.cos(omega_d * t) + alpha / omega_d * np.sin(omega_d * t))
    return np.where(t >= 0, after, 0.0)


def test_a_record_past_the_bound_is_compared_on_one_sample_in_k() -> None:
    n, pre, dt = MAX_COMPARED_SAMPLES * 2 + 1, 100_001, 1.5e-3 / (MAX_COMPARED_SAMPLES * 2)
    timebase = TimeBase(dt, pre, n)
    record = dataclasses.replace(make_record(1), channels=[Channel("v_c", "V", closed_form_v_c(timebase.times()), "CH1")],
                                 timebase=timebase, stimulus=Stimulus("square", 0.0, 1.0, 200.0, "rising"))
    result = compare(record, {"model": "series_rlc", "r_ohm": 20.0, "l_h": L_H, "c_f": 110e-9}, {"v_c": "v_c"},
                     fit={"free": ["r_ohm", "c_f"]})
    assert f"compared on one sample in 3 ({n:,} per channel" in " ".join(result.warnings)
    # 100,001 pre-trigger samples: 100,001 % 3 = 2, so the kept samples are indices 2, 5, ..., t = 0 (index
    # 100,001) among them, on the original instants
    thinned, every = _every_kth_sample(record)
    assert every == 3 and np.allclose(thinned.timebase.times(), timebase.times()[2::3], rtol=0, atol=dt * 1e-6)
    assert np.array_equal(thinned.channels[0].samples, record.channels[0].samples[2::3])
    assert 0.0 in thinned.timebase.times()
    assert abs(result.parameters["r_ohm"] / R_OHM - 1) < 1e-3 and abs(result.parameters["c_f"] / C_F - 1) < 1e-3
