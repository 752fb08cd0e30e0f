"""Step parameters of one sampled edge after IEEE 181-2011 (transitions, pulses and related waveforms).

State levels come from the histogram method (clause 5, from memory): histogram the samples between their
minimum and maximum, split the histogram at mid-range, and take the mode of each half. We then take the
median of the samples in the modal bin and its two neighbours (within the same half): that removes the
half-bin quantisation of a bare bin centre without changing which bin is the mode, a noisy level is not
cut off by bin edges, and the few samples of the edge that share those bins with a flat level do not
pull it. Reference levels are S_low + x %·A with A = S_high − S_low; crossing instants are interpolated
linearly between samples; overshoot is 100·(peak − S_high)/|A|. A falling edge is mirrored (y → −y) so
one rising-edge routine serves both, and the levels are mirrored back.

Where acqd goes beyond the standard (it assumes a settled record, or leaves the method open), and why:
- **Final state level.** The histogram finds S_high only where the record ends settled, and even then
  the slow end of an exponential approach shares its modal bins. So the last quarter of the samples
  after the 50 % instant is tested for a trend (a straight line through them; settled when its change
  over that stretch is within 3 standard errors, or below 0.01 % of |A|). Settled: S_high is the mean
  of that tail (the standard's histogram-mean variant, over the settled samples only). Not settled:
  S_high is the level the trace is heading for, from a fit (``transient``): the damped sinusoid's when
  it rings (below), otherwise an exponential approach S + D·e^(−t/τ) fitted from the 90 % instant. On a
  first-order step that ends at 7τ, the whole-record histogram put S_high 0.44 % below 1 − e^(−t/RC)'s
  final value and so reported 0.35 % of overshoot that is not there. S_low stays the histogram's.
- **Peak and overshoot.** The maximum is located on a running mean (half the transition duration wide)
  and measured as the maximum of a decaying oscillation fitted to the top 95 % of its lobe above S_high
  (``transient.lobe_peak``), so an 8-bit flat top gives its middle, not its first sample, and noise does
  not raise the peak (a parabola through the top misplaced a lopsided peak by up to 5 % of its time).
  A maximum counts only if it stands above S_high by more than 5 × the running mean's noise, one code
  and 0.01 % of |A|; otherwise the trace has no overshoot (0 %) and no peak time. The overshoot's
  quantisation uncertainty is one code as a share of |A| (the code step is an argument: the record's,
  or the smallest spacing between distinct sample values).
- **Ringing (damped) frequency**, not an IEEE 181 parameter. Lobes are counted beyond a hysteresis
  band of max(5 × noise RMS, 2 codes, 1 % of |A|) around S_high; with at least three, the crossings of
  the final level between lobes seed a least-squares fit of a damped sinusoid to every sample from the
  first peak on, and the fit gives the frequency. Crossings alone came out up to 3.4 % high on 8-bit
  records with 0.2–1 % noise: noise multiplies the crossings, and a level a fraction of a code off
  shifts the late, small lobes' crossings. With fewer lobes it is undefined, and ``ringing_method``
  says why.
- **Our choices where the standard leaves one to the user** (bins, band and noise level are
  arguments): 100 histogram bins; the post-transition region runs from the 90 % instant to the end of
  the record; undershoot is the deepest excursion below S_high *after the overshoot peak* (none without
  one), so a first-order step, still at 90 % when the region starts, shows no 10 % undershoot; settling
  duration is counted from the 50 % instant (as IEEE 181 does, not from the stimulus edge), against
  S_high as found above.
"""

from __future__ import annotations

import math
import statistics
from dataclasses import dataclass

import numpy as np

from .transient import fit_approach, fit_damped_sinusoid, lobe_peak, plateau_middle, run_around, smooth

DEFAULT_BINS = 100
MIN_LEVELS = 8  # distinct values a trace needs before its code step is read from it
RINGING_MIN_SHARE = 0.01  # lobes smaller than 1 % of |A| are not counted as ringing
RINGING_NOISE_FACTOR = 5.0
RINGING_CODE_FACTOR = 2.0
RINGING_MIN_LOBES = 3
TAIL_SHARE = 0.25  # the share of the samples after the 50 % instant tested for a settled final state
TAIL_MIN_SAMPLES = 16
CREEP_STANDARD_ERRORS = 3.0
RESOLUTION_FLOOR_SHARE = 1e-4  # changes below 0.01 % of |A| are taken as none
PEAK_NOISE_FACTOR = 5.0
PEAK_LOBE_SHARE = 0.95  # the peak is fitted to the top 95 % of its lobe above S_high


class StepError(ValueError):
    """The waveform has no measurable edge of the expected polarity (the reason says what is missing)."""


@dataclass(frozen=True)
class StepParameters:
    """IEEE 181 parameters of one edge; times are on the record's axis (t = 0 at the trigger)."""

    polarity: str  # "rising" or "falling"
    state_before: float
    state_after: float
    final_level_method: str  # how state_after was found (histogram of the settled tail, or a fit)
    amplitude: float  # state_after − state_before (negative for a falling edge)
    t10_s: float
    t50_s: float
    t90_s: float
    transition_duration_s: float
    overshoot_pct: float
    overshoot_uncertainty_pct: float  # ± one code as a share of |A|
    undershoot_pct: float
    settling_band_pct: float
    settling_duration_s: float | None  # None: it never stays inside the band within the record
    peak_time_s: float | None  # None: no maximum above the final level (a monotone approach)
    peak_value: float | None
    damped_frequency_hz: float | None  # None: fewer than three lobes of ringing (ringing_method says)
    ringing_method: str
    ringing_lobes: int
    code_step: float  # the resolution used for the uncertainty (0 when not known)


def code_step_of(y: np.ndarray) -> float:
    """A trace's code step read from its samples: the smallest gap between distinct values (every gap is
    a whole number of steps: an 8-bit channel shows its code step, an average of N captures a step N
    times finer). 0 when the trace shows fewer than ``MIN_LEVELS`` distinct values, too few to tell."""
    levels = np.unique(y)
    return float(np.min(np.diff(levels))) if len(levels) >= MIN_LEVELS else 0.0


def _modal_median(y: np.ndarray, counts: np.ndarray, edges: np.ndarray, first: int, last: int) -> float:
    """Median of the samples in the modal bin of counts[first:last] and its neighbours within that range."""
    mode = first + int(np.argmax(counts[first:last]))
    lower, upper = edges[max(mode - 1, first)], edges[min(mode + 2, last)]
    return float(np.median(y[(y >= lower) & (y <= upper)]))


def histogram_levels(y: np.ndarray, bins: int = DEFAULT_BINS) -> tuple[float, float]:
    """(S_low, S_high): the mode of each half of the histogram split at mid-range (IEEE 181, from memory)."""
    lo, hi = float(np.min(y)), float(np.max(y))
    if not hi > lo:
        raise StepError("the waveform is flat, so it has no transition")
    bins += bins % 2  # an even count puts the mid-range exactly on a bin edge
    counts, edges = np.histogram(y, bins=bins, range=(lo, hi))
    half = bins // 2
    return _modal_median(y, counts, edges, 0, half), _modal_median(y, counts, edges, half, bins)


def _crossing(t: np.ndarray, y: np.ndarray, k: int, level: float) -> float:
    """Instant between samples k and k+1 where the straight line through them meets ``level``."""
    y0, y1 = y[k], y[k + 1]
    share = 0.5 if y1 == y0 else (level - y0) / (y1 - y0)
    return float(t[k] + share * (t[k + 1] - t[k]))


@dataclass(frozen=True)
class _Edge:
    """Sample indices before the 10/50/90 % crossings, and the interpolated instants."""

    k10: int
    k50: int
    k90: int
    t10: float
    t50: float
    t90: float


def _edge(t: np.ndarray, yy: np.ndarray, low: float, high: float, polarity: str) -> _Edge:
    amp = high - low
    ref10, ref50, ref90 = (low + share * amp for share in (0.1, 0.5, 0.9))
    up50 = np.flatnonzero((yy[:-1] < ref50) & (yy[1:] >= ref50))
    if len(up50) == 0:
        raise StepError(f"no {polarity} crossing of the 50 % reference level")
    k50 = int(up50[0])
    below10 = np.flatnonzero(yy[:k50 + 1] < ref10)
    above90 = np.flatnonzero(yy[k50 + 1:] >= ref90)
    if len(below10) == 0 or len(above90) == 0 or k50 + int(above90[0]) >= len(yy) - 1:
        raise StepError("the edge does not pass both the 10 % and the 90 % reference levels")
    k10, k90 = int(below10[-1]), k50 + int(above90[0])  # k90: the sample before the 90 % crossing
    return _Edge(k10, k50, k90, _crossing(t, yy, k10, ref10), _crossing(t, yy, k50, ref50),
                 _crossing(t, yy, k90, ref90))


def _settled(t: np.ndarray, y: np.ndarray, amp: float) -> bool:
    """Whether the samples show no trend: the straight line through them changes over their span by no
    more than ``CREEP_STANDARD_ERRORS`` of its standard error (or than 0.01 % of |A|)."""
    x = t - t.mean()
    sxx = float(np.sum(x**2))
    slope = float(np.sum(x * (y - y.mean()))) / sxx
    residual = y - y.mean() - slope * x
    slope_se = math.sqrt(float(np.sum(residual**2)) / (len(y) - 2) / sxx)
    span = float(t[-1] - t[0])
    return abs(slope) * span <= max(CREEP_STANDARD_ERRORS * slope_se * span, RESOLUTION_FLOOR_SHARE * abs(amp))


@dataclass(frozen=True)
class _Ringing:
    frequency_hz: float | None
    level: float | None  # the fitted sinusoid's level, when it was fitted
    lobes: int
    method: str


def _lobes(y: np.ndarray, level: float, hysteresis: float) -> tuple[np.ndarray, np.ndarray]:
    """(outside, flips): indices of the samples beyond ±hysteresis of ``level``, and the positions in
    ``outside`` after which the side changes. The stretch before the first flip is the edge itself; every
    flip starts a lobe on the other side."""
    side = np.where(y > level + hysteresis, 1, np.where(y < level - hysteresis, -1, 0))
    outside = np.flatnonzero(side)
    return outside, np.flatnonzero(np.diff(side[outside]) != 0)


def _slope(x: np.ndarray, y: np.ndarray, weights: np.ndarray) -> float:
    """The slope of the weighted least-squares line through (x, y), minimising Σ wᵢ·(yᵢ − a − b·xᵢ)²:
    b = Σw(x − x̄)(y − ȳ) / Σw(x − x̄)² with weighted means (any regression text; ``numpy.polyfit`` with
    w = √weights gives the same, through a general solver's set-up)."""
    x_mean, y_mean = float(weights @ x) / float(weights.sum()), float(weights @ y) / float(weights.sum())
    dx = x - x_mean
    return float((weights * dx) @ (y - y_mean)) / float((weights * dx) @ dx)


def _crossing_seeds(t: np.ndarray, y: np.ndarray, level: float, outside: np.ndarray,
                    flips: np.ndarray) -> tuple[float, float]:
    """(ω, σ) first guesses from the crossings of ``level`` between lobes and the lobes' heights.

    Noise makes a slow crossing cross the level several times; the median of those instants is the
    crossing. The half period is the slope of crossing instant against crossing number, weighted by the
    square of the smaller neighbouring lobe (a crossing's timing error scales as 1 / lobe amplitude); σ is
    the slope of the log lobe height against the lobe's mid-time.
    """
    starts = np.r_[0, flips + 1]
    amplitude = np.maximum.reduceat(np.abs(y[outside] - level), starts)  # per lobe; [0] is the edge
    above = y > level
    ks = np.flatnonzero(above[:-1] != above[1:])
    y0, y1 = y[ks], y[ks + 1]
    share = np.divide(level - y0, y1 - y0, out=np.full(len(ks), 0.5), where=y1 != y0)
    instants = t[ks] + share * (t[ks + 1] - t[ks])
    firsts, lasts = np.searchsorted(ks, outside[flips]), np.searchsorted(ks, outside[flips + 1])
    crossings = np.array([statistics.median(instants[a:b].tolist()) for a, b in zip(firsts, lasts)])
    weights = np.minimum(amplitude[:-1], amplitude[1:]) ** 2
    half_period = _slope(np.arange(len(crossings), dtype=float), crossings, weights)
    mids = 0.5 * (crossings[:-1] + crossings[1:])  # lobes 1 .. n−1 lie between successive crossings
    decay = -_slope(mids, np.log(amplitude[1:-1]), np.ones(len(mids))) if len(mids) >= 2 else 0.0
    return math.pi / half_period, max(decay, 0.0)


def _ringing(t: np.ndarray, y: np.ndarray, level: float, hysteresis: float, band_share: float) -> _Ringing:
    """The damped frequency of the samples after the 50 % instant, ringing around ``level``."""
    outside, flips = _lobes(y, level, hysteresis)
    lobes = len(flips)
    band = f"±{100 * band_share:.2g} % of the step around the final level"
    if lobes < RINGING_MIN_LOBES:
        return _Ringing(None, None, lobes, f"undefined: {lobes} lobe(s) of ringing beyond {band} (the largest "
                                           f"of 5 × noise RMS, 2 codes and 1 % of the step); "
                                           f"{RINGING_MIN_LOBES} needed")
    omega, sigma = _crossing_seeds(t, y, level, outside, flips)
    first_lobe = outside[flips[0] + 1:flips[1] + 1]
    k_first = int(first_lobe[np.argmax(np.abs(y[first_lobe] - level))])
    fit = fit_damped_sinusoid(t[k_first:], y[k_first:], omega, sigma)
    if fit is None:
        return _Ringing(None, None, lobes, f"undefined: the damped-sinusoid fit did not converge near the "
                                           f"crossings' estimate {omega / (2 * math.pi):.4g} Hz")
    return _Ringing(fit.frequency_hz, fit.level, lobes,
                    f"least-squares fit of a damped sinusoid from the first peak, seeded by the crossings "
                    f"between {lobes} lobes beyond {band}")


def _tail_level(t: np.ndarray, yy: np.ndarray, k50: int, amp: float) -> float | None:
    """The mean of the last quarter of the samples after the 50 % instant when they are settled; None
    when they still move (or are too few to tell)."""
    n_tail = int(TAIL_SHARE * (len(yy) - k50))
    if n_tail < TAIL_MIN_SAMPLES:
        return None
    tail_t, tail = t[-n_tail:], yy[-n_tail:]
    return float(np.mean(tail)) if _settled(tail_t, tail, amp) else None


def _final_state(t: np.ndarray, yy: np.ndarray, low: float, histogram_high: float, noise: float, code: float,
                 polarity: str) -> tuple[float, str, _Ringing]:
    """(S_high, how it was found, the ringing): the settled tail's mean, else the level the trace is
    heading for (the damped sinusoid's when it rings, else an exponential approach's)."""
    rough = _edge(t, yy, low, histogram_high, polarity)
    settled = _tail_level(t, yy, rough.k50, histogram_high - low)
    guess = settled if settled is not None else float(np.mean(yy[-max(2, (len(yy) - rough.k50) // 10):]))
    if not guess > low:
        raise StepError("the waveform does not end beyond the level it started from")
    hysteresis = max(RINGING_NOISE_FACTOR * noise, RINGING_CODE_FACTOR * code, RINGING_MIN_SHARE * (guess - low))
    ringing = _ringing(t[rough.k50:], yy[rough.k50:], guess, hysteresis, hysteresis / (guess - low))
    if settled is not None:
        return settled, "mean of the settled tail (IEEE 181-2011 histogram-mean variant)", ringing
    if ringing.level is not None:
        return ringing.level, "level of the fitted damped sinusoid (the record ends still ringing)", ringing
    approach = fit_approach(t[rough.k90 + 1:], yy[rough.k90 + 1:], (rough.t90 - rough.t10) / math.log(9.0))
    if approach is not None:
        return approach[0], "level of a fitted exponential approach (the record ends before it settles)", ringing
    return histogram_high, "histogram mode (IEEE 181-2011): too few samples to tell whether it settled", ringing


@dataclass(frozen=True)
class _Peak:
    time_s: float | None
    value: float | None
    overshoot_pct: float
    undershoot_pct: float


def _peak(t: np.ndarray, yy: np.ndarray, edge: _Edge, high: float, amp: float, noise: float,
          code: float) -> _Peak:
    """The post-transition maximum, if one stands above ``high``; overshoot and undershoot from it."""
    dt = float(t[1] - t[0])
    width = max(1, int(round(0.5 * (edge.t90 - edge.t10) / dt)))
    first = edge.k90 + 1
    smoothed = smooth(yy, width)
    k = first + int(np.argmax(smoothed[first:]))
    height = float(smoothed[k]) - high
    threshold = max(PEAK_NOISE_FACTOR * noise / math.sqrt(width), code, RESOLUTION_FLOOR_SHARE * abs(amp))
    if height <= threshold or k >= len(yy) - width:
        return _Peak(None, None, 0.0, 0.0)  # the trace approaches its final level from below
    a, b = run_around(smoothed[first:] >= high + (1 - PEAK_LOBE_SHARE) * height, k - first)
    lobe = slice(first + a, first + b)
    t_peak, value = lobe_peak(t[lobe], yy[lobe], high) or plateau_middle(t[lobe], yy[lobe])
    k_after = min(len(yy) - 1, int(np.searchsorted(t, t_peak)))
    return _Peak(t_peak, value, max(0.0, 100.0 * (value - high) / amp),
                 max(0.0, 100.0 * (high - float(np.min(yy[k_after:]))) / amp))


def _settling(t: np.ndarray, yy: np.ndarray, k50: int, t50: float, high: float, band: float) -> float | None:
    """From the 50 % instant to the last exit from the ±band around ``high``; None if it ends outside."""
    outside = np.flatnonzero(np.abs(yy - high) > band)
    last_out = int(outside[-1]) if len(outside) else k50
    if last_out >= len(yy) - 1:
        return None
    edge_level = high + band if yy[last_out] > high else high - band
    return max(0.0, _crossing(t, yy, last_out, edge_level) - t50)


def step_parameters(t: np.ndarray, y: np.ndarray, polarity: str = "rising", *, band_pct: float = 2.0,
                    bins: int = DEFAULT_BINS, noise_rms: float = 0.0,
                    code_step: float | None = None) -> StepParameters:
    """IEEE 181 step parameters of a waveform holding one edge of the given polarity.

    ``noise_rms`` (the baseline's) sets how far a lobe or a peak must stand out; ``code_step`` is the
    record's resolution (None: read from the samples' spacing).
    """
    sign = 1.0 if polarity == "rising" else -1.0
    t, yy = np.asarray(t, dtype=float), sign * np.asarray(y, dtype=float)
    code = code_step_of(yy) if code_step is None else float(code_step)
    low, histogram_high = histogram_levels(yy, bins)
    high, how, ringing = _final_state(t, yy, low, histogram_high, noise_rms, code, polarity)
    amp = high - low
    if not amp > 0:
        raise StepError("the final level is not beyond the initial one")
    edge = _edge(t, yy, low, high, polarity)
    peak = _peak(t, yy, edge, high, amp, noise_rms, code)
    settling = _settling(t, yy, edge.k50, edge.t50, high, band_pct / 100.0 * amp)
    return StepParameters(polarity, sign * low, sign * high, how, sign * amp, edge.t10, edge.t50, edge.t90,
                          edge.t90 - edge.t10, peak.overshoot_pct, 100.0 * code / amp, peak.undershoot_pct,
                          band_pct, settling, peak.time_s, None if peak.value is None else sign * peak.value,
                          ringing.frequency_hz, ringing.method, ringing.lobes, code)
