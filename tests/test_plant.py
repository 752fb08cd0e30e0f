"""The simulated bench's plant against outside references: the textbook closed form and scipy.signal."""

import numpy as np
import pytest
from scipy import signal

from acqd.models import Signal, series_rlc
from acqd.sim.plant import Plant

# Values of our own choosing for an under-damped series RLC (zeta about 0.3).
R_OHM, L_H, C_F, RS_OHM = 12.0, 1.5e-3, 0.68e-6, 50.0


def closed_form_step(t: np.ndarray, v: float, r_total: float) -> tuple[np.ndarray, np.ndarray]:
    """Series RLC step from rest (Nilsson & Riedel, Electric Circuits ch. 8)."""
    wn = 1 / np.sqrt(L_H * C_F)
    zeta = r_total / 2 * np.sqrt(C_F / L_H)
    wd = wn * np.sqrt(1 - zeta**2)
    sigma = zeta * wn
    tp = np.clip(t, 0, None)
    vc = v * (1 - np.exp(-sigma * tp) * (np.cos(wd * tp) + sigma / wd * np.sin(wd * tp)))
    il = v / (L_H * wd) * np.exp(-sigma * tp) * np.sin(wd * tp)
    return np.where(t >= 0, vc, 0.0), np.where(t >= 0, il, 0.0)


@pytest.mark.parametrize("first_offset_s", [0.0, 3.7e-8])
def test_step_from_rest_matches_closed_form(first_offset_s: float) -> None:
    plant = Plant(series_rlc(R_OHM, L_H, C_F, RS_OHM))
    dt, n, pre = 2e-7, 4000, 500
    first = -pre * dt + first_offset_s  # a trigger between samples (jitter) must not break exactness
    vc, il = plant.window(emf_before=0.0, emf_after=2.0, half_period_s=None, sample_interval_s=dt,
                          n_samples=n, first_sample_s=first, edge_time_s=0.0,
                          signals=[Signal("v_c"), Signal("i_l")])
    t = first + np.arange(n) * dt
    vc_ref, il_ref = closed_form_step(t, 2.0, R_OHM + RS_OHM)  # the 50 ohm source is in series with R (KVL)
    assert np.max(np.abs(vc - vc_ref)) < 1e-9
    assert np.max(np.abs(il - il_ref)) < 1e-12


def test_difference_probe_is_resistor_voltage() -> None:
    """v_src - v_rl is the drop across R, i.e. R·i (Ohm's law, common practice for current sensing)."""
    plant = Plant(series_rlc(R_OHM, L_H, C_F, RS_OHM))
    vr, il = plant.window(emf_before=0.0, emf_after=1.0, half_period_s=None, sample_interval_s=1e-7,
                          n_samples=2000, first_sample_s=-1e-5, edge_time_s=0.0,
                          signals=[Signal.parse("v_src - v_rl"), Signal("i_l")])
    np.testing.assert_allclose(vr, R_OHM * il, atol=1e-12)


def test_square_wave_steady_state_matches_lsim() -> None:
    """A falling edge in periodic steady state against scipy.signal.lsim run over many periods."""
    model = series_rlc(R_OHM, L_H, C_F, RS_OHM)
    plant = Plant(model)
    half = 1.2e-4  # short enough that the response has not settled: the periodic state matters
    dt = 1e-7
    steps_per_half = round(half / dt)
    periods = 40
    t = np.arange(2 * periods * steps_per_half + 1) * dt
    u = np.where((np.arange(len(t)) // steps_per_half) % 2 == 0, 1.0, 0.0)  # high first, then low ...
    sys = signal.StateSpace(model.A, model.B, model.C, model.D)
    _, y, _ = signal.lsim(sys, u, t, interp=False)  # reference: scipy.signal.lsim, zero-order hold
    k_edge = (2 * periods - 1) * steps_per_half  # the last high→low edge
    pre = 300
    (vc,) = plant.window(emf_before=1.0, emf_after=0.0, half_period_s=half, sample_interval_s=dt,
                         n_samples=1000, first_sample_s=-pre * dt, edge_time_s=0.0, signals=[Signal("v_c")])
    ref = y[k_edge - pre:k_edge - pre + 1000, model.output_index("v_c")]
    assert np.max(np.abs(vc - ref)) < 1e-6  # 40 periods of lsim converge to the periodic state


def test_edge_ramp_is_followed_exactly() -> None:
    """A finite edge against scipy.signal.lsim on a grid fine enough to hold the ramp corners (FOH is exact)."""
    model = series_rlc(R_OHM, L_H, C_F, RS_OHM)
    plant = Plant(model)
    edge = 3.3e-7  # deliberately not a multiple of the sample interval
    dt = 1e-7
    fine = 100
    t_fine = np.arange(0, 2e-4, dt / fine)  # lsim's clock starts at 0: the edge starts at 1e-5 on it
    u = np.clip((t_fine - 1e-5) / edge, 0, 1)
    sys = signal.StateSpace(model.A, model.B, model.C, model.D)
    _, y, _ = signal.lsim(sys, u, t_fine, interp=True)  # reference: scipy.signal.lsim, linear interpolation
    (vs,) = plant.window(emf_before=0.0, emf_after=1.0, half_period_s=None, sample_interval_s=dt,
                         n_samples=2000, first_sample_s=-1e-5, edge_time_s=edge, signals=[Signal("v_src")])
    ref = y[::fine, model.output_index("v_src")][:2000]
    assert np.max(np.abs(vs - ref)) < 1e-9


def test_probe_parse_rejects_malformed() -> None:
    with pytest.raises(ValueError):
        Signal.parse("v_c - ")
    with pytest.raises(ValueError):
        Signal.parse("a - b - c")
