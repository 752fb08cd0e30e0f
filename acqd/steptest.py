"""One step test: set up the generator and scope, arm on the stimulus edge, capture, scale, combine.

The order matters for the DUT's sake: every value is checked against the driver's and the profile's limits
before the first command goes out, the generator output is off while it is being configured, and it is
switched off again at the end and on any error or interrupt (the caller's signal handler raises into here).
"""

from __future__ import annotations

import copy
import time
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field, replace
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
    def setup(self) -> None: ...
    def status_changed(self) -> bool: ...


class ScopeRole(Protocol):
    identity: str

    def configure_timebase(self, window_s: float, n_samples: int, pretrigger_fraction: float) -> None: ...
    def configure_channel(self, channel: str, range_v: float, offset_v: float, coupling: str) -> None: ...
    def configure_trigger(self, source: str, slope: str, level_v: float) -> None: ...
    def arm(self) -> None: ...
    def wait(self, timeout_s: float) -> None: ...
    def fetch(self, channel: str) -> tuple[np.ndarray, TimeBase]: ...
    def read_settings(self) -> dict[str, Any]: ...
    def setup(self) -> None: ...
    def status_changed(self) -> bool: ...


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
        _output_off(generator)


def _output_off(generator: GeneratorRole) -> None:
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


def capture(profile: Profile, scope: ScopeRole, edge: str, applied: Applied) -> tuple[dict[str, np.ndarray], TimeBase]:
    """Arm on the stimulus edge ``averages`` times and average the captures (each is aligned on its trigger)."""
    acq = profile.acquisition
    if applied.changes("trigger", (edge, trigger_level(profile))):
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


def run_step_test(profile: Profile, generator: GeneratorRole, scope: ScopeRole,
                  applied: Applied | None = None) -> list[Record]:
    """Every edge the profile asks for, as one record each (rising before falling).

    Alone, it sets everything up, and the output is off again on the way out. With ``applied``, a run's
    memory of what it set (see ``Applied``), what the plan leaves as it was for the previous step test is
    neither sent nor read back again, and the output stays on for the next one: the caller holds the
    ``output_guard``. Any error switches the output off and makes the next step test verify everything.
    """
    check_limits(profile, generator)
    if applied is None:
        with output_guard(generator):
            return _edges(profile, generator, scope, Applied())
    try:
        return _edges(profile, generator, scope, applied)
    except BaseException:
        applied.forget()
        _output_off(generator)
        raise


def _edges(profile: Profile, generator: GeneratorRole, scope: ScopeRole, applied: Applied) -> list[Record]:
    applied.verify(generator, scope)
    if applied.changes("acquisition", profile.acquisition):
        configure_scope(profile, scope)
    return [_one_edge(profile, profile.stimulus, edge, generator, scope, applied)
            for edge in profile.stimulus.edges]


def _one_edge(profile: Profile, plan: StimulusPlan, edge: str, generator: GeneratorRole,
              scope: ScopeRole, applied: Applied) -> Record:
    stimulus = plan.stimulus(edge)
    if applied.changes("stimulus", (stimulus.shape, stimulus.frequency_hz, stimulus.load, stimulus.low_v,
                                    stimulus.high_v)):  # what the generator is sent; the edge is the scope's
        generator.output(False)
        generator.apply_stimulus(stimulus)
        generator.output(True)
        applied.generator_settings = generator.read_settings()
    stimulus = as_applied(stimulus, applied.generator_settings)
    utc = datetime.now(UTC).isoformat(timespec="microseconds")
    started = time.monotonic()
    values, timebase = capture(profile, scope, edge, applied)
    if applied.scope_settings is None:
        applied.scope_settings = scope.read_settings()
    channels = [Channel(ch.name, "V", values[ch.name], ch.input) for ch in profile.acquisition.channels]
    for m in profile.math:
        channels.append(Channel(m.name, m.unit, m.evaluate(values), m.source))
    return Record(
        channels=channels, timebase=timebase, stimulus=stimulus,
        identities={"generator": generator.identity, "scope": scope.identity},
        settings={"generator": copy.deepcopy(applied.generator_settings),
                  "scope": copy.deepcopy(applied.scope_settings), "trigger_level_v": trigger_level(profile)},
        dut=profile.dut, utc=utc, monotonic_s=started, profile_text=profile.text,
        profile_sha256=profile.sha256, averages=profile.acquisition.averages, bench_id=profile.bench.bench_id)


@dataclass
class Applied:
    """What a run last set on its instruments, taken from the plan, and what they read back then.

    Why: a run repeats one step test, and set-up plus read-back was most of its queries (about 40 round
    trips per record). Changes are detected from the plan — the acquisition, the trigger, what the
    generator is sent — never by asking the instruments; what they cannot tell us without asking (a
    power cycle, an error from a neighbour's command) is one ``*ESR?`` per instrument per step test
    (``verify``). Any fault, timeout or reconnect goes through ``forget``: the next step test clears the
    status and error queues, repeats the drivers' set-up, and sends and reads back everything again.
    """

    keys: dict[str, Any] = field(default_factory=dict)  # "acquisition", "trigger", "stimulus" → last plan
    generator_settings: dict[str, Any] = field(default_factory=dict)
    scope_settings: dict[str, Any] | None = None  # None: to be read back after the next capture
    fresh: bool = True  # the roles' own set-up has just run (they were opened, or ``verify`` ran it)

    def changes(self, what: str, key: Any) -> bool:
        """Whether ``what`` must be sent, its plan being ``key``; remembers it as sent. A scope change means
        its settings are read back again."""
        if self.keys.get(what, _UNSET) == key:
            return False
        self.keys[what] = key
        if what != "stimulus":
            self.scope_settings = None
        return True

    def verify(self, generator: GeneratorRole, scope: ScopeRole) -> None:
        """Before a step test: after a fault, or when either instrument flags an event (both are read, so
        both are cleared), clear and set up both again and forget what was set."""
        if not self.fresh and not self.keys:
            generator.setup()
            scope.setup()
        elif self.keys and (generator.status_changed() | scope.status_changed()):
            self.forget()
            generator.setup()
            scope.setup()
        self.fresh = False

    def forget(self) -> None:
        self.keys.clear()
        self.generator_settings, self.scope_settings = {}, None


_UNSET = object()
