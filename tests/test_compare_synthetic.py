"""Synthetic records for the comparator tests, built from textbook closed forms (not from acqd's simulator),
with white noise and 8-bit quantisation as a bench scope adds them. The tests here check the generator
itself against the same textbook, so the other files can trust it."""

from __future__ import annotations

import numpy as np

from acqd.record import Channel, Record, Stimulus, TimeBase


def series_rlc_nodes(t: np.ndarray, r_ohm: float, l_h: float, c_f: float, rs_ohm: float = 50.0,
                     before_v: float = 0.0, after_v: float = 1.0, delay_s: float = 0.0) -> dict[str, np.ndarray]:
    """Node voltages and loop current of a series RLC driven through Rs by an ideal EMF step at ``delay_s``.

    Nilsson & Riedel, Electric Circuits ch. 8; underdamped, R_total = Rs + R:
    v_C = V[1 − e^{−σt}(cos ω_d t + (σ/ω_d) sin ω_d t)], i = V/(L ω_d) e^{−σt} sin ω_d t.
    """
    r_total = rs_ohm + r_ohm
    sigma, wn = r_total / (2 * l_h), 1 / np.sqrt(l_h * c_f)
    assert sigma < wn, "the closed form here is for an underdamped circuit"
    wd = np.sqrt(wn**2 - sigma**2)
    tau = np.clip(t - delay_s, 0.0, None)
    step = after_v - before_v
    env = np.exp(-sigma * tau)
    v_c = before_v + step * (1 - env * (np.cos(wd * tau) + sigma / wd * np.sin(wd * tau)))
    i_l = step / (l_h * wd) * env * np.sin(wd * tau)
    u = np.where(t >= delay_s, after_v, before_v)
    return {"v_src": u - rs_ohm * i_l, "v_rl": u - r_total * i_l, "v_c": v_c, "i_l": i_l, "u": u}


def quantise_8bit(y: np.ndarray, lo: float, hi: float) -> np.ndarray:
    """A scope's 8-bit conversion over [lo, hi]: 256 codes, clipped at the ends (common practice)."""
    lsb = (hi - lo) / 256
    return lo + (np.clip(np.floor((y - lo) / lsb), 0, 255) + 0.5) * lsb


def make_record(nodes: dict[str, np.ndarray], timebase: TimeBase, stimulus: Stimulus, names: dict[str, str],
                noise_v: float = 0.0, seed: int = 0, quantise: bool = False, dut: dict | None = None) -> Record:
    """A record with channels ``names`` (record name → node), each with its own noise and 8-bit range."""
    rng = np.random.default_rng(seed)
    channels = []
    for name, node in names.items():
        y = nodes[node] + rng.normal(0.0, noise_v, len(nodes[node])) if noise_v else nodes[node].copy()
        if quantise:
            lo, hi = float(nodes[node].min()), float(nodes[node].max())
            margin = 0.15 * (hi - lo) + 1e-3
            y = quantise_8bit(y, lo - margin, hi + margin)
        channels.append(Channel(name, "A" if node.startswith("i") else "V", y, node))
    return Record(channels, timebase, stimulus, dut=dict(dut or {}), utc="2026-12-02T10:00:00+00:00")


def difference_channel(record: Record, a: str, b: str, name: str) -> Record:
    """The record plus a math channel a − b (a floating voltage measured as two earth-referenced probes)."""
    y = record.channel(a).samples - record.channel(b).samples
    record.channels.append(Channel(name, "V", y, f"{a} - {b}"))
    return record


def test_closed_form_satisfies_kirchhoff():
    # KVL round the loop (Kirchhoff's voltage law): L di/dt = u − (Rs+R) i − v_C and C dv_C/dt = i;
    # checked with numpy's gradient on a fine grid after the step.
    t = np.linspace(0, 2e-3, 200001)
    n = series_rlc_nodes(t, 22.0, 3.3e-3, 100e-9)
    didt, dvdt = np.gradient(n["i_l"], t), np.gradient(n["v_c"], t)
    inner = slice(10, -10)
    kvl = 3.3e-3 * didt - (n["u"] - 72.0 * n["i_l"] - n["v_c"])
    assert np.max(np.abs(kvl[inner])) < 1e-3
    assert np.max(np.abs(100e-9 * dvdt - n["i_l"])[inner]) < 1e-7


def test_quantiser_has_256_codes_and_half_lsb_error():
    # An ideal 8-bit converter: 256 distinct codes, error within ±LSB/2 inside the range (common practice).
    y = np.linspace(-1, 1, 100001)
    q = quantise_8bit(y, -1.0, 1.0)
    assert len(np.unique(q)) == 256
    assert np.max(np.abs(q - y)) <= (2.0 / 256) / 2 + 1e-12
