"""One step test: set up the generator and scope, arm on the stimulus edge, capture, scale, combine.

The order matters for the DUT's sake: every value is checked against the driver's and the profile's limits
before the first command goes out, the generator output is off while it is being configured, and it is
switched off again at the end and on any error or interrupt (the caller's signal handler raises into here).
"""

from __future__ import annotations

import time
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import replace
from datetime import UTC, datetime
from typing import Any, Protocol

import numpy as np

from .errors import AcqdError, ConfigError, SafetyError
from .profile import Profile, StimulusPlan
from .record import Channel, Record, Stimulus, TimeBase


class GeneratorRole(Protocol):
    identity: str

    def check_stimulus(self, stimulus: Stimulus) -> None: ...
    def apply_stimulus(self, stimulus: Stimulus) -> None: ...
    def output(self, on: bool) -> None: ...
    def read_settings(self) -> dict[str, Any]: ...


class ScopeRole(Protocol):
    identity: str

    def configure_timebase(self, window_s: float, n_samples: int, pretrigger_fraction: float) -> None: ...
    def configure_channel(self, channel: str, range_v: float, offset_v: float, coupling: str) -> None: ...
    def configure_trigger(self, source: str, slope: str, level_v: float) -> None: ...
    def arm(self) -> None: ...
    def wait(self, timeout_s: float) -> None: ...
    def fetch(self, channel: str) -> tuple[np.ndarray, TimeBase]: ...
    def read_settings(self) -> dict[str, Any]: ...


def check_limits(profile: Profile, generator: GeneratorRole) -> None:
    """Refuse, before anything is sent, every edge's stimulus that breaks the driver's or the profile's limits."""
    for edge in profile.stimulus.edges:
        stimulus = profile.stimulus.stimulus(edge)
        peak = max(abs(stimulus.low_v), abs(stimulus.high_v))
        if peak > profile.limits.max_level_v:
            raise SafetyError(profile.source, "stimulus", f"level {peak:g} V is over limits.max_level_v "
                                                          f"= {profile.limits.max_level_v:g} V; nothing was sent")
        generator.check_stimulus(stimulus)


def trigger_level(profile: Profile) -> float:
    """Half-way between the set levels unless the profile says otherwise (IEEE 181's 50 % reference level)."""
    if profile.acquisition.trigger_level_v is not None:
        return profile.acquisition.trigger_level_v
    return (profile.stimulus.low_v + profile.stimulus.high_v) / 2


def wait_timeout_s(profile: Profile) -> float:
    """Long enough for the next edge of either direction plus the window, with slack for a slow link."""
    if profile.acquisition.timeout_s is not None:
        return profile.acquisition.timeout_s
    return 2.0 + 2.0 / profile.stimulus.frequency_hz + 2.0 * profile.acquisition.window_s


@contextmanager
def output_guard(generator: GeneratorRole) -> Iterator[None]:
    """Output off on the way out, whatever happened (an error, SIGTERM turned into an exception, Ctrl-C)."""
    try:
        yield
    finally:
        try:
            generator.output(False)
        except AcqdError:
            pass  # the instrument is gone; there is nothing more we can switch off


def configure_scope(profile: Profile, scope: ScopeRole) -> None:
    acq = profile.acquisition
    if acq.window_s is None or acq.samples is None or any(ch.range_v is None for ch in acq.channels):
        raise ConfigError(profile.source, "acquisition.auto", "the acquisition is not set up yet: a profile with "
                                                              "auto = true is loaded with acqd.plan.ready_profile")
    scope.configure_timebase(acq.window_s, acq.samples, acq.pretrigger_fraction)
    for ch in acq.channels:
        scope.configure_channel(ch.input, ch.range_v, ch.offset_v, ch.coupling)


def capture(profile: Profile, scope: ScopeRole, edge: str) -> tuple[dict[str, np.ndarray], TimeBase]:
    """Arm on the stimulus edge ``averages`` times and average the captures (each is aligned on its trigger)."""
    acq = profile.acquisition
    scope.configure_trigger("external", edge, trigger_level(profile))
    sums: dict[str, np.ndarray] = {}
    timebase: TimeBase | None = None
    for _ in range(acq.averages):
        scope.arm()
        scope.wait(wait_timeout_s(profile))
        for ch in acq.channels:
            samples, timebase = scope.fetch(ch.input)
            sums[ch.name] = sums.get(ch.name, 0.0) + np.asarray(samples, dtype=float)
    assert timebase is not None
    return {name: total / acq.averages for name, total in sums.items()}, timebase


def as_applied(stimulus: Stimulus, settings: dict[str, Any]) -> Stimulus:
    """The stimulus with what only the instrument knows: its edge time and source resistance, read back."""
    known = {k: float(settings[k]) for k in ("edge_time_s", "source_resistance_ohm") if k in settings}
    return replace(stimulus, **known)


def run_step_test(profile: Profile, generator: GeneratorRole, scope: ScopeRole) -> list[Record]:
    """Every edge the profile asks for, as one record each (rising before falling)."""
    check_limits(profile, generator)
    records = []
    with output_guard(generator):
        configure_scope(profile, scope)
        for edge in profile.stimulus.edges:
            records.append(_one_edge(profile, profile.stimulus, edge, generator, scope))
    return records


def _one_edge(profile: Profile, plan: StimulusPlan, edge: str, generator: GeneratorRole,
              scope: ScopeRole) -> Record:
    generator.output(False)
    generator.apply_stimulus(plan.stimulus(edge))
    generator.output(True)
    generator_settings = generator.read_settings()
    stimulus = as_applied(plan.stimulus(edge), generator_settings)
    utc = datetime.now(UTC).isoformat(timespec="microseconds")
    started = time.monotonic()
    values, timebase = capture(profile, scope, edge)
    channels = [Channel(ch.name, "V", values[ch.name], ch.input) for ch in profile.acquisition.channels]
    for m in profile.math:
        channels.append(Channel(m.name, m.unit, m.evaluate(values), m.source))
    return Record(
        channels=channels, timebase=timebase, stimulus=stimulus,
        identities={"generator": generator.identity, "scope": scope.identity},
        settings={"generator": generator_settings, "scope": scope.read_settings(),
                  "trigger_level_v": trigger_level(profile)},
        dut=profile.dut, utc=utc, monotonic_s=started, profile_text=profile.text,
        profile_sha256=profile.sha256, averages=profile.acquisition.averages, bench_id=profile.bench.bench_id)
