"""Model-guided set-up: from the nominal model and the stimulus, the acquisition that shows the response.

The first hour at a new DUT goes into finding a time base, ranges and a trigger level that show its step
response. The nominal model already knows the answer: this module predicts every mapped channel's
response to the profile's stimulus and proposes the acquisition by fixed, stated rules —

- window: the pre-trigger share the profile asks for (``pretrigger_fraction``), and after the trigger
  ``SETTLING_MARGIN`` × the longest settling time (IEEE 181-2011 settling into the ``[dut.tolerances]``
  band, 2 % by default) of any mapped channel, measured from the trigger;
- sample interval: ``SAMPLES_PER_TIME_CONSTANT`` samples in the fastest pole's time constant 1/|λ| and
  ``SAMPLES_PER_PERIOD`` in the fastest ringing period 2π/|Im λ| (well above Nyquist's 2, so peaks and
  crossings are placed to a few per cent of a period), and never fewer than ``MIN_SAMPLES`` in the window;
- ranges: the predicted extremes (baseline, overshoot and final level) of each channel with
  ``RANGE_MARGIN`` of the swing above and below, no wider, so the swing spans most of the ADC's codes;
- trigger level: half-way between the stimulus's settled levels at the generator terminal (IEEE 181's
  50 % reference level), where the scope's external trigger sees the edge;
- stimulus period: the next edge no sooner than the pre-trigger baseline plus ``SETTLED_BETWEEN_EDGES``
  settling times after this one, so each edge starts from rest.

Every number is clamped to the driver's and the profile's limits, and the plan says so. ``check`` lists
where the profile as written would clip, alias, cut the settling off or never trigger; ``ready_profile``
loads a profile and, with ``[acquisition] auto = true``, replaces its acquisition by the proposal.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np

from .compare import CompareSpec, Edge, edge_response, parse_dut_table
from .compare.stimulus import steady_state
from .display import si
from .errors import ConfigError
from .instruments import find_driver, load_driver
from .models import Signal, StateSpace
from .profile import MAX_WINDOW_S, AcquisitionPlan, Profile, load_profile

SETTLING_MARGIN = 1.5
MIN_SAMPLES = 2000  # common practice: a few thousand points resolve levels, rise and settling finely
SAMPLES_PER_TIME_CONSTANT = 10
SAMPLES_PER_PERIOD = 20
RANGE_MARGIN = 0.10
SETTLED_BETWEEN_EDGES = 2.0
FINE_STEPS = 40  # prediction grid: this many steps in the fastest time constant or ringing period
HORIZON_TIME_CONSTANTS = 12  # e^-12 ≈ 6e-6: far inside any settling band
MAX_FINE_POINTS = 400_000


@dataclass(frozen=True)
class Proposal:
    """One setting: the profile's value (None when it leaves it to the plan), the proposed one, and why."""

    key: str
    current: float | None
    proposed: float
    unit: str
    reason: str


@dataclass(frozen=True)
class ChannelPrediction:
    """A scope input's predicted trace around the captured edge."""

    input: str
    name: str
    signal: str
    low: float
    high: float
    settling_s: float | None  # None: the channel does not step


@dataclass(frozen=True)
class Plan:
    proposals: tuple[Proposal, ...]
    channels: tuple[ChannelPrediction, ...]
    terminal_v: tuple[float, float]  # the stimulus's settled low and high at the generator terminal
    warnings: tuple[str, ...]  # where the profile as written would fail to show the response
    notes: tuple[str, ...]     # clamps to limits, channels the model cannot predict

    def value(self, key: str) -> float:
        return next(p.proposed for p in self.proposals if p.key == key)

    def to_dict(self) -> dict[str, object]:
        return {"proposals": [vars(p) for p in self.proposals], "channels": [vars(c) for c in self.channels],
                "terminal_v": list(self.terminal_v), "warnings": list(self.warnings), "notes": list(self.notes)}


@dataclass(frozen=True)
class _Dynamics:
    fastest_time_constant_s: float
    ringing_period_s: float | None
    slowest_time_constant_s: float


def dynamics(model: StateSpace, source: str) -> _Dynamics:
    """Time scales of the model's poles; a pole on or right of the imaginary axis never settles."""
    poles = np.linalg.eigvals(model.A)
    if len(poles) == 0:
        raise ConfigError(source, "dut.model", "has no states: a memoryless DUT needs no planned time base")
    if np.any(poles.real >= 0):
        worst = poles[np.argmax(poles.real)]
        raise ConfigError(source, "dut.model", f"has a pole at {worst:.4g} rad/s, not in the left half-plane: "
                                               "its step response never settles, so there is nothing to plan")
    ringing = np.abs(poles.imag)
    return _Dynamics(1.0 / float(np.max(np.abs(poles))),
                     2 * math.pi / float(ringing.max()) if ringing.max() > 0 else None,
                     1.0 / float(np.min(-poles.real)))


def make_plan(profile: Profile) -> Plan:
    """The proposal for ``profile``, and what would go wrong with its own acquisition."""
    spec = _dut_spec(profile)
    stimulus = profile.stimulus.stimulus(profile.stimulus.edges[0])
    model = spec.build({"source_resistance_ohm": stimulus.source_resistance_ohm}
                       if "source_resistance_ohm" in spec.parameters and "source_resistance_ohm" not in spec.nominal
                       else None)
    dyn = dynamics(model, profile.source)
    edges = [Edge.from_stimulus(profile.stimulus.stimulus(edge)) for edge in profile.stimulus.edges]
    channels, notes = _predict(profile, spec, model, edges, dyn)
    if not channels:
        raise ConfigError(profile.source, "dut.channels", "maps no captured channel to a model output, so no "
                                                          "response can be predicted")
    settling = max((c.settling_s for c in channels if c.settling_s is not None), default=None)
    if settling is None:
        raise ConfigError(profile.source, "dut.channels", "no mapped channel steps in the model's response")
    terminal = _terminal_levels(model, profile)
    proposals, clamp_notes = _proposals(profile, channels, settling, dyn, terminal)
    plan = Plan(tuple(proposals), tuple(channels), terminal, (), tuple(notes + clamp_notes))
    return replace(plan, warnings=tuple(check(profile, plan, settling, dyn)))


def ready_profile(path: str | Path) -> Profile:
    """The profile at ``path``, with its acquisition set up from the model when it says ``auto = true``."""
    profile = load_profile(path)
    if not profile.acquisition.auto:
        return profile
    return replace(profile, acquisition=planned_acquisition(profile, make_plan(profile)))


def planned_acquisition(profile: Profile, plan: Plan) -> AcquisitionPlan:
    acq = profile.acquisition
    channels = []
    for ch in acq.channels:
        key = f"acquisition.channels.{ch.input}"
        if any(p.key == f"{key}.range_v" for p in plan.proposals):
            ch = replace(ch, range_v=plan.value(f"{key}.range_v"), offset_v=plan.value(f"{key}.offset_v"))
        elif ch.range_v is None:
            raise ConfigError(profile.source, f"{key}.range_v", "missing: the model does not predict this "
                                                                "channel (map it in [dut.channels]), so give it")
        channels.append(ch)
    return replace(acq, window_s=plan.value("acquisition.window_s"), samples=int(plan.value("acquisition.samples")),
                   pretrigger_fraction=plan.value("acquisition.pretrigger_fraction"), channels=tuple(channels),
                   trigger_level_v=plan.value("acquisition.trigger_level_v"))


def _dut_spec(profile: Profile) -> CompareSpec:
    if "model" not in profile.dut:
        raise ConfigError(profile.source, "dut.model", "missing: the set-up is planned from the DUT's nominal "
                                                       "model; give [dut] a model")
    return parse_dut_table(profile.dut, profile.source, profile.text)


def _fine_times(dyn: _Dynamics) -> np.ndarray:
    fastest = min(dyn.fastest_time_constant_s, dyn.ringing_period_s or math.inf)
    horizon = HORIZON_TIME_CONSTANTS * dyn.slowest_time_constant_s
    dt = max(fastest / FINE_STEPS, horizon / MAX_FINE_POINTS)
    return np.arange(-2, int(horizon / dt) + 1) * dt  # two samples of rest before the edge


def _predict(profile: Profile, spec: CompareSpec, model: StateSpace, edges: list[Edge],
             dyn: _Dynamics) -> tuple[list[ChannelPrediction], list[str]]:
    """Each captured channel the model predicts, over every edge the profile captures (extremes and
    settling are the worst of them: a rising and a falling edge overshoot on opposite sides)."""
    times = _fine_times(dyn)
    responses = [edge_response(model, times, edge) for edge in edges]
    mapped = {m.channel: m for m in spec.channels} if spec.channels is not None else None
    band = spec.tolerances.settling_band_pct / 100
    predictions, notes = [], []
    for ch in profile.acquisition.channels:
        m = mapped.get(ch.name) if mapped is not None else None
        signal = m.signal if m is not None else (Signal(ch.name) if mapped is None and ch.name in model.outputs
                                                 else None)
        if signal is None:
            notes.append(f"{ch.input} ({ch.name}) is not mapped to a model output in [dut.channels]: its range "
                         "stays as the profile gives it")
            continue
        c, d = signal.row(model)
        gain, offset = (m.gain, m.offset) if m is not None else (1.0, 0.0)
        traces = [gain * (x @ c + d * u) + offset for x, _, u in responses]
        settling = [t for y in traces if (t := _settling_s(times, y, band)) is not None]
        predictions.append(ChannelPrediction(ch.input, ch.name, signal.text, float(min(y.min() for y in traces)),
                                             float(max(y.max() for y in traces)), max(settling, default=None)))
    return predictions, notes


def _settling_s(times: np.ndarray, y: np.ndarray, band: float) -> float | None:
    """Time from the trigger to the last exit from the band of ±band·|A| around the final level."""
    before, final = y[0], y[-1]
    amplitude = abs(final - before)
    if amplitude <= 1e-9 * max(abs(final), abs(before), 1e-12):
        return None
    outside = np.flatnonzero(np.abs(y - final) > band * amplitude)
    return float(times[outside[-1] + 1]) if len(outside) else 0.0


def _ceil2(value: float) -> float:
    """Up to two significant figures: 251e-6 → 260e-6 (a setting a person reads at a glance)."""
    step = 10.0 ** (math.floor(math.log10(value)) - 1)
    return float(f"{math.ceil(value / step - 1e-9) * step:.2g}")


def _floor125(value: float) -> float:
    """Down to 1, 2 or 5 × 10^k: 833 Hz → 500 Hz."""
    decade = 10.0 ** math.floor(math.log10(value))
    return next(m * decade for m in (5, 2, 1) if m * decade <= value * (1 + 1e-9))


def _terminal_levels(model: StateSpace, profile: Profile) -> tuple[float, float]:
    """The stimulus's settled low and high levels at the generator terminal (v_src), or the set levels."""
    low_emf, high_emf = sorted(profile.stimulus.stimulus("rising").levels_emf())
    if "v_src" not in model.outputs:
        return low_emf, high_emf
    row = model.output_index("v_src")

    def level(u: float) -> float:
        return float(model.C[row] @ steady_state(model, u) + model.D[row, 0] * u)

    return level(low_emf), level(high_emf)


def _proposals(profile: Profile, channels: list[ChannelPrediction], settling: float, dyn: _Dynamics,
               terminal: tuple[float, float]) -> tuple[list[Proposal], list[str]]:
    acq, notes = profile.acquisition, []
    fraction = acq.pretrigger_fraction
    slowest = max((c for c in channels if c.settling_s is not None), key=lambda c: c.settling_s)
    window = _ceil2(SETTLING_MARGIN * settling / (1 - fraction))
    if window > MAX_WINDOW_S:  # a mode that hardly settles: a node reached only through capacitors, say
        raise ConfigError(profile.source, "dut.model", f"{slowest.name} ({slowest.signal}) settles in "
                                                       f"{si(settling, 's', 3)}, so the window would be "
                                                       f"{si(window, 's', 3)}, over the {MAX_WINDOW_S:g} s one "
                                                       f"capture may last; look for a node without a path to "
                                                       f"ground but through capacitors")
    interval = _interval_rule(dyn)
    limits = load_driver(find_driver(profile.bench.scope.driver, profile.source)).limits
    samples = max(int(_ceil2(window / interval[0])), MIN_SAMPLES, int(limits["min_samples"]))
    if samples > limits["max_samples"]:
        notes.append(f"samples clamped to the driver's max_samples {limits['max_samples']}: the sample interval "
                     f"is {si(window / limits['max_samples'], 's', 3)}, coarser than the rule's "
                     f"{si(interval[0], 's', 3)}")
        samples = int(limits["max_samples"])
    low, high = terminal
    half = fraction * window + SETTLED_BETWEEN_EDGES * settling
    frequency = _floor125(1 / (2 * half))
    if frequency > profile.limits.max_frequency_hz:
        notes.append(f"stimulus frequency clamped to limits.max_frequency_hz {si(profile.limits.max_frequency_hz, 'Hz')}")
        frequency = profile.limits.max_frequency_hz
    proposals = [
        Proposal("acquisition.window_s", acq.window_s, window, "s",
                 f"{SETTLING_MARGIN:g} × the {si(settling, 's', 3)} settling of {slowest.name} "
                 f"({slowest.signal}) after the trigger, {fraction:g} of the window before it"),
        Proposal("acquisition.pretrigger_fraction", acq.pretrigger_fraction, fraction, "",
                 "the profile's share of the window before the trigger (the baseline)"),
        Proposal("acquisition.samples", acq.samples, samples, "",
                 f"a sample every {si(window / samples, 's', 3)}: {interval[1]} asks for "
                 f"{si(interval[0], 's', 3)}" + (f", and at least {MIN_SAMPLES} in the window"
                                                 if samples == MIN_SAMPLES else "")),
        Proposal("acquisition.trigger_level_v", acq.trigger_level_v, round((low + high) / 2, 6), "V",
                 f"50 % between the stimulus's {si(low, 'V', 3)} and {si(high, 'V', 3)} at the generator terminal"),
        Proposal("stimulus.frequency_hz", profile.stimulus.frequency_hz, frequency, "Hz",
                 f"each edge after the {si(fraction * window, 's', 3)} baseline plus {SETTLED_BETWEEN_EDGES:g} × "
                 f"the settling, so it starts from rest"),
    ]
    for c in channels:
        swing = max(c.high - c.low, 1e-3)
        half_span = _ceil2((c.high - c.low) / 2 + RANGE_MARGIN * swing)
        key = f"acquisition.channels.{c.input}"
        current = next(ch for ch in acq.channels if ch.input == c.input)
        extremes = f"predicted {si(c.low, 'V', 3)} … {si(c.high, 'V', 3)}"
        proposals.append(Proposal(f"{key}.range_v", current.range_v, half_span, "V",
                                  f"{extremes} and {RANGE_MARGIN:.0%} of the swing either side (half the span)"))
        proposals.append(Proposal(f"{key}.offset_v", current.offset_v, round((c.low + c.high) / 2, 6), "V",
                                  "the middle of the predicted extremes"))
    return proposals, notes


def _interval_rule(dyn: _Dynamics) -> tuple[float, str]:
    by_pole = dyn.fastest_time_constant_s / SAMPLES_PER_TIME_CONSTANT
    if dyn.ringing_period_s is not None and dyn.ringing_period_s / SAMPLES_PER_PERIOD < by_pole:
        return (dyn.ringing_period_s / SAMPLES_PER_PERIOD,
                f"{SAMPLES_PER_PERIOD} per period of the fastest ringing ({si(1 / dyn.ringing_period_s, 'Hz', 3)})")
    return by_pole, (f"{SAMPLES_PER_TIME_CONSTANT} per fastest time constant "
                     f"({si(dyn.fastest_time_constant_s, 's', 3)})")


def check(profile: Profile, plan: Plan, settling: float, dyn: _Dynamics) -> list[str]:
    """Where the profile's own settings would fail to show the response (nothing for what it leaves to the plan)."""
    acq, warnings = profile.acquisition, []
    for c in plan.channels:
        ch = next(ch for ch in acq.channels if ch.input == c.input)
        if ch.range_v is not None:
            bottom, top = ch.offset_v - ch.range_v, ch.offset_v + ch.range_v
            if c.low < bottom or c.high > top:
                warnings.append(f"clip: {c.input} ({c.name}) is predicted at {si(c.low, 'V', 3)} … "
                                f"{si(c.high, 'V', 3)}, outside its screen {si(bottom, 'V', 3)} … {si(top, 'V', 3)}")
    if acq.window_s is not None and acq.samples is not None:
        interval, rule = acq.window_s / acq.samples, _interval_rule(dyn)
        if dyn.ringing_period_s is not None and interval >= dyn.ringing_period_s / 2:
            warnings.append(f"alias: a sample every {si(interval, 's', 3)} is not two per period of the "
                            f"{si(1 / dyn.ringing_period_s, 'Hz', 3)} ringing (Nyquist)")
        elif interval > rule[0] * (1 + 1e-9):
            warnings.append(f"coarse: a sample every {si(interval, 's', 3)}; the response needs "
                            f"{si(rule[0], 's', 3)} ({rule[1]})")
        after = acq.window_s * (1 - acq.pretrigger_fraction)
        if after < settling:
            warnings.append(f"settling cut off: the window ends {si(after, 's', 3)} after the trigger; the "
                            f"response settles at {si(settling, 's', 3)}")
    half = 1 / (2 * profile.stimulus.frequency_hz)
    if half < settling:
        warnings.append(f"period: the next edge comes {si(half, 's', 3)} after this one, before the response "
                        f"settles at {si(settling, 's', 3)}")
    level = acq.trigger_level_v if acq.trigger_level_v is not None else (
        (profile.stimulus.low_v + profile.stimulus.high_v) / 2)
    if acq.trigger_level_v is not None or not acq.auto:
        low, high = plan.terminal_v
        if not low < level < high:
            warnings.append(f"trigger: level {si(level, 'V', 3)} is outside the stimulus's {si(low, 'V', 3)} … "
                            f"{si(high, 'V', 3)} at the generator terminal; the scope would never trigger")
    return warnings

