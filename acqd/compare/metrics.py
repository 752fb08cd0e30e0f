"""Per-channel agreement between a measured and a simulated trace, and the measured trace's noise level.

NRMSE is the RMS error divided by the peak-to-peak range (max − min) of the *simulated* trace: always
defined (a current that starts and ends at zero has no step amplitude, but it has a range), independent of
the measurement's noise, and equal to |A|·(1 + overshoot) for an ordinary step.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..record import Record
from .ieee181 import StepError, StepParameters, code_step_of, step_parameters
from .memo import Memo

NRMSE_BASIS = "peak-to-peak range (max - min) of the simulated trace"
MIN_BASELINE_SAMPLES = 16
BASELINE_WARN_SHARE = 0.02  # a pre-trigger baseline off by more than 2 % of the range gets a warning


@dataclass(frozen=True)
class ChannelResult:
    """How one measured channel compares with its model signal; step parameters where the signal steps."""

    channel: str
    signal: str
    unit: str
    gain: float
    offset: float
    rms_error: float
    nrmse: float
    max_abs_error: float
    max_abs_error_time_s: float
    noise_rms: float
    baseline_error: float | None  # measured pre-trigger mean − simulated rest value; None without baseline
    measured: StepParameters | None
    simulated: StepParameters | None
    step_note: str = ""  # why step parameters are missing, when they are


def noise_rms(times: np.ndarray, y: np.ndarray, quiet_until_s: float) -> float:
    """Noise RMS from the pre-trigger baseline (samples before ``quiet_until_s``) when there is one.

    Without a baseline of at least 16 samples, the median absolute first difference / (0.6745·√2) over the
    whole record: the MAD of white noise's differences scales that way (common practice), and the few
    large differences at the edge barely move a median.
    """
    quiet = y[times < quiet_until_s]
    if len(quiet) >= MIN_BASELINE_SAMPLES:
        return float(np.std(quiet, ddof=1))
    diffs = np.diff(y)
    return float(np.median(np.abs(diffs - np.median(diffs))) / (0.6745 * np.sqrt(2.0))) if len(diffs) else 0.0


def quantisation_rms(y: np.ndarray, code_step: float | None = None) -> float:
    """The RMS of the error a quantiser with this trace's code step makes: step / √12 (uniform quantisation
    noise, common practice), with the step read from the data (``ieee181.code_step_of``; 0 when the trace
    shows too few distinct values to tell its step: an ideal step sits on two codes whatever the step is).

    Why: a quiet channel's baseline can sit on one ADC code, so its measured noise is zero, yet every sample
    of the transient still carries up to half a code of error. Unquantised data gives a tiny step and so a
    negligible value. ``code_step``: ``code_step_of(y)`` when the caller has read it already (it sorts
    every sample).
    """
    return (code_step_of(y) if code_step is None else code_step) / float(np.sqrt(12.0))


def record_code_step(record: Record, channel: str) -> float | None:
    """The code step of a channel as the record's scope reported it, per capture: ``volts_per_code`` in
    the read-back settings of the scope input the channel came from, divided by the number of captures
    averaged (an average of N is N times finer). None when the record does not carry it (a driver's
    ``[channel_readback]`` may read it back; none of the shipped ones can), or for a math channel.
    """
    inputs = (record.settings.get("scope") or {}).get("channels") or {}
    value = inputs.get(record.channel(channel).source, {}).get("volts_per_code")
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not value > 0:
        return None
    return float(value) / max(1, record.averages)


_SIMULATED_STEPS = Memo()  # a simulated trace's step parameters depend on nothing the record measured


def _steps(times: np.ndarray, measured: np.ndarray, simulated: np.ndarray, polarity: str | None,
           band_pct: float, noise: float, code_step: float | None, remember: bool
           ) -> tuple[StepParameters | None, StepParameters | None, str]:
    if polarity is None:
        return None, None, "no step: the model's rest values before and after the edge are equal"

    def simulated_steps() -> StepParameters:
        return step_parameters(times, simulated, polarity, band_pct=band_pct, code_step=0.0)  # a model has no ADC

    try:
        sim = (_SIMULATED_STEPS.get((times, simulated, polarity, band_pct), simulated_steps) if remember
               else simulated_steps())
    except StepError as exc:
        return None, None, f"simulated trace: {exc}"
    try:
        return step_parameters(times, measured, polarity, band_pct=band_pct, noise_rms=noise,
                               code_step=code_step), sim, ""
    except StepError as exc:
        return None, sim, f"measured trace: {exc}"


def channel_result(channel: str, signal: str, unit: str, gain: float, offset: float, times: np.ndarray,
                   measured: np.ndarray, simulated: np.ndarray, polarity: str | None, quiet_until_s: float,
                   band_pct: float, code_step: float | None = None, remember: bool = True) -> ChannelResult:
    """Errors, noise, baseline check and IEEE 181 step parameters of one mapped channel.

    ``code_step`` is the measured channel's resolution when the record says it (``record_code_step``);
    None reads it from the samples' spacing. ``remember``: keep the simulated trace's step parameters for
    the next record (``_SIMULATED_STEPS``); not worth hashing the trace for after a fit, whose simulated
    traces differ from record to record.
    """
    error = measured - simulated
    span = float(np.ptp(simulated))
    k = int(np.argmax(np.abs(error)))
    rms = float(np.sqrt(np.mean(error**2)))
    noise = noise_rms(times, measured, quiet_until_s)
    quiet = times < quiet_until_s
    baseline = float(np.mean(error[quiet])) if quiet.sum() >= MIN_BASELINE_SAMPLES else None
    meas_step, sim_step, note = _steps(times, measured, simulated, polarity, band_pct, noise, code_step, remember)
    return ChannelResult(channel, signal, unit, gain, offset, rms, rms / span if span > 0 else float("inf"),
                         float(abs(error[k])), float(times[k]), noise, baseline, meas_step, sim_step, note)
