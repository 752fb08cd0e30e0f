"""A scope channel's front end: what turns the plant's exact node voltage into what a scope reports.

The chain, in signal order: coupling (AC removes the window's mean — a simplification of the real input
high-pass, adequate when its corner is far below the window's lowest frequency), amplifier bandwidth
(one pole, applied exactly on the sample grid), additive gaussian noise, clipping at the edges of the
span, and an 8-bit ADC over the span (common practice for bench scopes). Trigger jitter shifts the sample
instants and is drawn by the scope. Each stage can be switched off so tests can isolate the others.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np
from scipy.signal import lfilter

from ..models import Discrete, StateSpace, discretise

ADC_BITS = 8


@dataclass(frozen=True)
class FrontEndSettings:
    """Imperfections shared by all channels of a simulated scope; zero / False switches one off."""

    bandwidth_hz: float = 0.0
    noise_v_rms: float = 0.0
    jitter_s: float = 0.0
    quantise: bool = True
    clip: bool = True


@dataclass(frozen=True)
class ChannelSetup:
    """One channel's vertical setting at capture time: the span is ``centre_v ± half_span_v``."""

    centre_v: float
    half_span_v: float
    coupling: str = "DC"  # "DC" or "AC"

    def volts_per_code(self, bits: int) -> float:
        return 2 * self.half_span_v / 2 ** bits


def trigger_jitter_s(settings: FrontEndSettings, rng: np.random.Generator) -> float:
    """This acquisition's random trigger time error (gaussian, rms ``jitter_s``)."""
    return float(rng.normal(0.0, settings.jitter_s)) if settings.jitter_s > 0 else 0.0


@functools.lru_cache(maxsize=32)
def _pole_step(sample_interval_s: float, bandwidth_hz: float) -> Discrete:
    """The single pole's exact first-order-hold step over one sample interval: the same for every capture
    of a setting, so it is worked out (a matrix exponential) once, not per channel and record."""
    omega = 2 * np.pi * bandwidth_hz
    pole = StateSpace(np.array([[-omega]]), np.array([[omega]]), np.eye(1), np.zeros((1, 1)),
                      states=("v_out",), inputs=("v_in",), outputs=("v_out",))
    return discretise(pole, sample_interval_s, "foh")


def _low_pass(volts: np.ndarray, sample_interval_s: float, bandwidth_hz: float) -> np.ndarray:
    """Single-pole low-pass (−3 dB at ``bandwidth_hz``), discretised exactly for a signal that is linear
    between samples, starting settled at the first sample (the models' first-order hold).

    With one state the step is y[k+1] = λ·y[k] + b0·u[k] + b1·u[k+1] (λ = e^(−ω·dt)), one first-order IIR
    filter run by ``scipy.signal.lfilter`` in C. Why not ``models.simulate``: its general path for a
    sampled input works in complex modal coordinates, which for one real pole costs several times as much
    (it ran about a quarter of a capture) and gives the same numbers.
    """
    step = _pole_step(float(sample_interval_s), float(bandwidth_hz))
    lam, b0, b1 = step.Ad[0, 0], step.B0[0, 0], step.B1[0, 0]
    out = np.empty_like(volts)
    out[0] = volts[0]
    out[1:], _ = lfilter([1.0, 0.0], [1.0, -lam], volts[:-1] * b0 + volts[1:] * b1, zi=[lam * volts[0]])
    return out


def analogue(volts: np.ndarray, sample_interval_s: float, setup: ChannelSetup, settings: FrontEndSettings,
             rng: np.random.Generator) -> np.ndarray:
    """The signal at the ADC input: coupling, bandwidth and noise applied, not yet clipped or quantised."""
    out = np.asarray(volts, dtype=float)
    if setup.coupling == "AC":
        out = out - out.mean()
    if settings.bandwidth_hz > 0 and len(out) > 1:
        out = _low_pass(out, sample_interval_s, settings.bandwidth_hz)
    if settings.noise_v_rms > 0:
        out = out + rng.normal(0.0, settings.noise_v_rms, size=out.shape)
    return out


def adc_codes(analog: np.ndarray, setup: ChannelSetup, bits: int) -> np.ndarray:
    """Signed codes of a ``bits``-bit converter over the span: code 0 at the centre, clipped at the ends."""
    lsb = setup.volts_per_code(bits)
    top = 2 ** (bits - 1)
    return np.clip(np.round((analog - setup.centre_v) / lsb), -top, top - 1).astype(np.int64)


def digitise(analog: np.ndarray, setup: ChannelSetup, settings: FrontEndSettings, word_bits: int) -> np.ndarray:
    """Signed codes in an 8- or 16-bit word; volts = code × ``setup.volts_per_code(word_bits)`` + centre.

    With quantisation on, a 16-bit word carries the 8-bit code × 256, as an 8-bit ADC left-justified in a
    16-bit word does (common practice); with it off, 16 bits are used in full.
    """
    adc_bits = ADC_BITS if (settings.quantise or word_bits == ADC_BITS) else word_bits
    return adc_codes(analog, setup, adc_bits) << (word_bits - adc_bits)


def volts(analog: np.ndarray, setup: ChannelSetup, settings: FrontEndSettings) -> np.ndarray:
    """What a floating-point format carries: the ADC's volts, or the (clipped) analogue value unquantised."""
    if settings.quantise:
        return adc_codes(analog, setup, ADC_BITS) * setup.volts_per_code(ADC_BITS) + setup.centre_v
    if settings.clip:
        return np.clip(analog, setup.centre_v - setup.half_span_v, setup.centre_v + setup.half_span_v)
    return analog
