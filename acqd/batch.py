"""A batch: the step test on every unit of a fixture, a switch stepping from unit to unit.

For each unit, in the profile's order: generator output off, open every relay (break before make),
close the unit's path, verify it (the switch must report every channel of the path closed), wait for the
relays to settle (the switch role waits its driver's ``settle_s`` after every change), run the ordinary
step test (``acqd.steptest.run_step_test``, with the unit's own nominal values in its [dut]), open every
relay. A path that does not verify skips the unit with the reason — never a measurement on the wrong path.
The generator output is off whenever a relay moves, and every relay is opened at the end, on any error and
on SIGINT/SIGTERM (the caller's handler raises into here). Each record carries the unit's serial and
switch path in ``settings["batch"]`` (``Record.unit_serial``, ``Record.switch_path``).
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field, replace
from typing import Any, Protocol

from . import scpi
from .errors import AcqdError, InstrumentError
from .judge import Judge, make_judge
from .profile import Batch, BatchUnit, Profile
from .record import BATCH_SETTING, Record, Stimulus
from .steptest import GeneratorRole, ScopeRole, check_limits, run_step_test
from .units import Spread, UnitSummary, summarise_units


class SwitchRole(Protocol):
    identity: str
    settle_s: float

    def check_stimulus(self, stimulus: Stimulus) -> None: ...
    def close_channels(self, channels: tuple[int, ...]) -> None: ...
    def open_all(self) -> None: ...
    def closed(self, channels: tuple[int, ...]) -> tuple[bool, ...]: ...
    def closed_channels(self) -> tuple[int, ...]: ...


@dataclass
class UnitResult:
    """One unit's outcome: its records, or why it was skipped."""

    unit: BatchUnit
    records: list[Record] = field(default_factory=list)
    skipped: str | None = None


def unit_profile(profile: Profile, unit: BatchUnit) -> Profile:
    """The profile as it applies to one unit: its serial and its own nominal values in [dut]."""
    return replace(profile, dut={**profile.dut, **unit.nominal, "serial": unit.serial})


def unit_judges(profile: Profile, batch: Batch) -> dict[str, Judge | None]:
    """Each unit's comparator, built before the bench is touched so a bad nominal value costs nothing."""
    return {unit.serial: make_judge(unit_profile(profile, unit)) for unit in batch.units}


def batch_judge(profile: Profile) -> Judge | None:
    """One judge for a profile's records: with a batch, each record is judged by its own unit's comparator."""
    if profile.batch is None:
        return make_judge(profile)
    judges = unit_judges(profile, profile.batch)
    if all(judge is None for judge in judges.values()):
        return None
    return lambda record: judges[record.unit_serial](record)


def check_batch_limits(profile: Profile, generator: GeneratorRole, switch: SwitchRole) -> None:
    """The step test's limits and the switch's rated voltage and current, before any relay closes."""
    check_limits(profile, generator)
    for edge in profile.stimulus.edges:
        switch.check_stimulus(profile.stimulus.stimulus(edge))


def open_left_closed(switch: SwitchRole) -> tuple[int, ...]:
    """At start-up: the channels an earlier run left closed (a crash, a pulled plug), then all opened."""
    found = switch.closed_channels()
    switch.open_all()
    return found


@contextmanager
def switch_guard(generator: GeneratorRole, switch: SwitchRole) -> Iterator[None]:
    """Output off and every relay open on the way out, whatever happened."""
    try:
        yield
    finally:
        for safe in (lambda: generator.output(False), switch.open_all):
            try:
                safe()
            except AcqdError:
                pass  # the instrument is gone; there is nothing more we can switch off


def run_unit(profile: Profile, unit: BatchUnit, generator: GeneratorRole, scope: ScopeRole,
             switch: SwitchRole) -> UnitResult:
    """One unit: output off, break before make, close, verify, (settle), test, open."""
    generator.output(False)
    switch.open_all()
    try:
        switch.close_channels(unit.channels)
        states = switch.closed(unit.channels)
        if not all(states):
            still_open = [c for c, on in zip(unit.channels, states) if not on]
            return UnitResult(unit, skipped=f"path {scpi.format_channel_list(unit.channels)} did not verify: "
                                            f"the switch reports {scpi.format_channel_list(still_open)} open")
        records = run_step_test(unit_profile(profile, unit), generator, scope)
    finally:
        generator.output(False)
        switch.open_all()
    for record in records:
        record.identities["switch"] = switch.identity
        record.settings[BATCH_SETTING] = {"serial": unit.serial, "path": scpi.format_channel_list(unit.channels),
                                          "channels": list(unit.channels), "settle_s": switch.settle_s}
    return UnitResult(unit, records)


def run_batch(profile: Profile, generator: GeneratorRole, scope: ScopeRole, switch: SwitchRole,
              units: Iterable[BatchUnit] | None = None) -> Iterator[UnitResult]:
    """Every unit (or those given) in turn; each result is yielded so it can be stored before the next. An
    instrument error on one unit (a capture that timed out) skips that unit, not the batch."""
    check_batch_limits(profile, generator, switch)
    with switch_guard(generator, switch):
        for unit in profile.batch.units if units is None else units:
            try:
                yield run_unit(profile, unit, generator, scope, switch)
            except InstrumentError as exc:
                yield UnitResult(unit, skipped=f"not acquired: {exc}")


def summarise(results: Iterable[UnitResult], dut: dict[str, Any]) -> tuple[list[UnitSummary], list[Spread]]:
    """The batch summary of a run's results (every pass over a unit merged; see ``acqd.units``)."""
    grouped: dict[str, tuple[list[dict[str, Any]], list[str]]] = {}
    for result in results:
        analyses, reasons = grouped.setdefault(result.unit.serial, ([], []))
        analyses.extend(r.analysis or {} for r in result.records)
        if result.skipped is not None:
            reasons.append(result.skipped)
    return summarise_units(((serial, a, r) for serial, (a, r) in grouped.items()), dut)
