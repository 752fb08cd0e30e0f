"""Step parameters of one sampled edge after IEEE 181-2011 (transitions, pulses and related waveforms).

State levels come from the histogram method (clause 5, from memory): histogram the samples between their
minimum and maximum, split the histogram at mid-range, and take the mode of each half. We then take the
median of the samples in the modal bin and its two neighbours (within the same half): that removes the
half-bin quantisation of a bare bin centre without changing which bin is the mode, a noisy level is not
cut off by bin edges, and the few samples of the edge that share those bins with a flat level do not
pull it. Reference levels are S_low + x %·A with A = S_high − S_low; crossing instants are interpolated
linearly between samples. A falling edge is mirrored (y → −y) so one rising-edge routine serves both, and
the levels are mirrored back.

Our choices where the standard leaves one to the user (bins, band and noise level are arguments):
- 100 histogram bins;
- the post-transition region runs from the 90 % instant to the end of the record;
- undershoot is the deepest excursion below S_high *after the overshoot peak*, so a first-order step
  (which is still at 90 % when the region starts) does not report a 10 % undershoot;
- settling duration is counted from the 50 % instant (as IEEE 181 does, not from the stimulus edge);
- the damped (ringing) frequency comes from successive crossings of the final level, counting only lobes
  that leave a hysteresis band of max(5 × noise RMS, 1 % of |A|), so noise is not taken for ringing, and
  weighting each crossing by its lobes' size.
"""

from __future__ import annotations

import statistics
from dataclasses import dataclass

import numpy as np

DEFAULT_BINS = 100
RINGING_MIN_SHARE = 0.01  # lobes smaller than 1 % of |A| are not counted as ringing
RINGING_NOISE_FACTOR = 5.0


class StepError(ValueError):
    """The waveform has no measurable edge of the expected polarity (the reason says what is missing)."""


@dataclass(frozen=True)
class StepParameters:
    """IEEE 181 parameters of one edge; times are on the record's axis (t = 0 at the trigger)."""

    polarity: str  # "rising" or "falling"
    state_before: float
    state_after: float
    amplitude: float  # state_after − state_before (negative for a falling edge)
    t10_s: float
    t50_s: float
    t90_s: float
    transition_duration_s: float
    overshoot_pct: float
    undershoot_pct: float
    settling_band_pct: float
    settling_duration_s: float | None  # None: it never stays inside the band within the record
    peak_time_s: float
    peak_value: float
    damped_frequency_hz: float | None  # None: fewer than two crossings of the final level


def histogram_levels(y: np.ndarray, bins: int = DEFAULT_BINS) -> tuple[float, float]:
    """(S_low, S_high): the mode of each half of the histogram split at mid-range (IEEE 181, from memory)."""
    lo, hi = float(np.min(y)), float(np.max(y))
    if not hi > lo:
        raise StepError("the waveform is flat, so it has no transition")
    bins += bins % 2  # an even count puts the mid-range exactly on a bin edge
    counts, edges = np.histogram(y, bins=bins, range=(lo, hi))
    half = bins // 2
    levels = []
    for first in (0, half):
        mode = first + int(np.argmax(counts[first:first + half]))
        lower, upper = edges[max(mode - 1, first)], edges[min(mode + 2, first + half)]
        levels.append(float(np.median(y[(y >= lower) & (y <= upper)])))
    return levels[0], levels[1]


def _crossing(t: np.ndarray, y: np.ndarray, k: int, level: float) -> float:
    """Instant between samples k and k+1 where the straight line through them meets ``level``."""
    y0, y1 = y[k], y[k + 1]
    share = 0.5 if y1 == y0 else (level - y0) / (y1 - y0)
    return float(t[k] + share * (t[k + 1] - t[k]))


def _ringing_frequency_hz(t: np.ndarray, y: np.ndarray, level: float, hysteresis: float) -> float | None:
    """From crossings of ``level`` between lobes that leave ±hysteresis: half a period between crossings.

    Noise makes a slow crossing cross the level several times; the median of those instants is the
    crossing, since noise scatters them on both sides of it. The half period is the slope of crossing time
    against crossing number, weighted by the square of the smaller neighbouring lobe: a crossing's timing
    error (from noise, or from a final level misjudged by part of a quantisation step) scales as
    1 / (lobe amplitude), so the small late lobes must not dominate.
    """
    side = np.where(y > level + hysteresis, 1, np.where(y < level - hysteresis, -1, 0))
    outside = np.flatnonzero(side)
    flips = np.flatnonzero(np.diff(side[outside]) != 0)
    if len(flips) < 2:
        return None
    amplitude = np.maximum.reduceat(np.abs(y[outside] - level), np.r_[0, flips + 1])  # per lobe
    # Every crossing of the level, interpolated at once; each flip takes the median of those between its lobes.
    above = y > level
    ks = np.flatnonzero(above[:-1] != above[1:])
    y0, y1 = y[ks], y[ks + 1]
    share = np.divide(level - y0, y1 - y0, out=np.full(len(ks), 0.5), where=y1 != y0)
    instants = t[ks] + share * (t[ks + 1] - t[ks])
    firsts = np.searchsorted(ks, outside[flips])
    lasts = np.searchsorted(ks, outside[flips + 1])
    crossings = [statistics.median(instants[a:b].tolist()) for a, b in zip(firsts, lasts)]
    weights = np.minimum(amplitude[:-1], amplitude[1:]) ** 2
    half_period = np.polyfit(np.arange(len(crossings)), crossings, 1, w=np.sqrt(weights))[0]
    return float(1.0 / (2.0 * half_period))


def _peak(t: np.ndarray, y: np.ndarray, k: int) -> float:
    """Time of the maximum near sample k from a parabola through it and its neighbours."""
    if k == 0 or k == len(y) - 1:
        return float(t[k])
    a, b, c = y[k - 1], y[k], y[k + 1]
    curvature = a - 2 * b + c
    shift = 0.0 if curvature == 0 else 0.5 * (a - c) / curvature
    return float(t[k] + shift * (t[k + 1] - t[k]))


def step_parameters(t: np.ndarray, y: np.ndarray, polarity: str = "rising", *, band_pct: float = 2.0,
                    bins: int = DEFAULT_BINS, noise_rms: float = 0.0) -> StepParameters:
    """IEEE 181 step parameters of a waveform holding one edge of the given polarity."""
    sign = 1.0 if polarity == "rising" else -1.0
    t, yy = np.asarray(t, dtype=float), sign * np.asarray(y, dtype=float)
    low, high = histogram_levels(yy, bins)
    amp = high - low
    ref10, ref50, ref90 = (low + share * amp for share in (0.1, 0.5, 0.9))
    up50 = np.flatnonzero((yy[:-1] < ref50) & (yy[1:] >= ref50))
    if len(up50) == 0:
        raise StepError(f"no {polarity} crossing of the 50 % reference level")
    k50 = int(up50[0])
    below10 = np.flatnonzero(yy[:k50 + 1] < ref10)
    above90 = np.flatnonzero(yy[k50 + 1:] >= ref90)
    if len(below10) == 0 or len(above90) == 0:
        raise StepError("the edge does not pass both the 10 % and the 90 % reference levels")
    k10, k90 = int(below10[-1]), k50 + int(above90[0])  # k90: the sample before the 90 % crossing
    t10, t50, t90 = _crossing(t, yy, k10, ref10), _crossing(t, yy, k50, ref50), _crossing(t, yy, k90, ref90)
    region = slice(k90 + 1, len(yy))
    k_peak = k90 + 1 + int(np.argmax(yy[region]))
    overshoot = max(0.0, 100.0 * float(yy[k_peak] - high) / amp)
    undershoot = max(0.0, 100.0 * (high - float(np.min(yy[k_peak:]))) / amp)
    band = band_pct / 100.0 * amp
    outside = np.flatnonzero(np.abs(yy - high) > band)
    last_out = int(outside[-1]) if len(outside) else k50
    settling = None
    if last_out < len(yy) - 1:
        edge_level = high + band if yy[last_out] > high else high - band
        settling = max(0.0, _crossing(t, yy, last_out, edge_level) - t50)
    hysteresis = max(RINGING_NOISE_FACTOR * noise_rms, RINGING_MIN_SHARE * amp)
    ringing = _ringing_frequency_hz(t[k50:], yy[k50:], high, hysteresis)
    return StepParameters(polarity, sign * low, sign * high, sign * amp, t10, t50, t90, t90 - t10,
                          overshoot, undershoot, band_pct, settling, _peak(t, yy, k_peak),
                          float(sign * yy[k_peak]), ringing)
