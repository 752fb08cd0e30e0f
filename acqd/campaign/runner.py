"""One campaign at work: decide which slot is due, and run its step tests.

Each step (one stimulus setting and edge, so one record) is acquired here - retried with back-off after
reconnecting the bench when an attempt fails - and handed to the campaign's ``Keeper``, which has it
compared (by the ``ComparatorProcess``), stores and books it in its own thread while the next step test
already runs. A kill at any point loses nothing acknowledged and doubles nothing: see ``reconcile``,
``Keeper`` and ``Ledger``.

Stopping is cooperative: SIGTERM sets a flag (``StopFlag``) that is looked at between steps and during
back-off, so the step test in progress finishes - the generator output goes off at its end, as after every
step test - the records acquired are stored, and the slot is left ``running`` to be completed when the
daemon starts again.
"""

from __future__ import annotations

import threading
import time
import traceback
from collections.abc import Callable
from contextlib import ExitStack
from datetime import datetime
from pathlib import Path
from typing import Any

from .. import scpi
from ..batch import check_batch_limits, open_left_closed, run_unit
from ..benchsession import Bench, open_bench
from ..judge import make_judge
from ..errors import ConfigError
from ..profile import Profile
from ..record import Record
from ..steptest import check_limits, run_step_test
from ..store import RecordStore, open_records
from .comparing import ComparatorProcess
from .grid import Grid, make_grid
from .keeper import Acquired, Keeper, SlotEnd
from .ledger import CampaignRow, Ledger, SlotRow, verdict_text
from .runlog import RunLog, describe, iso, utc_now
from .spec import CampaignSpec, Step

STOP_POLL_S = 0.05


class StopFlag:
    """Set from a signal handler: a plain attribute, because a handler must not take a lock the
    interrupted thread may hold. Workers look at it between steps and while waiting."""

    def __init__(self) -> None:
        self.signal: int | None = None
        self._requested = False

    @property
    def requested(self) -> bool:
        return self._requested

    def request(self, signum: int | None = None) -> None:
        if not self._requested:
            self.signal = signum
        self._requested = True

    def sleep(self, seconds: float) -> bool:
        """Wait ``seconds``; False as soon as a stop is requested."""
        deadline = time.monotonic() + seconds
        while not self._requested:
            left = deadline - time.monotonic()
            if left <= 0:
                return True
            time.sleep(min(STOP_POLL_S, left))
        return False


class _Stopped(Exception):
    """A stop was requested in the middle of a slot."""


class _SlotFailed(Exception):
    """The slot's retries are used up (or the failure is not one a retry can mend)."""


class BenchSession:
    """The bench, opened on first use and kept open between slots that are close together; closed (and so
    reconnected on next use) after a fault or when the next slot is far away."""

    def __init__(self, profile: Profile, log: Callable[..., Any]) -> None:
        self.profile, self._log = profile, log
        self._stack: ExitStack | None = None
        self.bench: Bench | None = None
        self.opened = 0

    def get(self) -> Bench:
        if self.bench is None:
            stack = ExitStack()
            try:
                self.bench = stack.enter_context(open_bench(self.profile))
            except BaseException:
                stack.close()
                raise
            self._stack = stack
            self.opened += 1
            self._log("bench_open", count=self.opened)
        return self.bench

    def close(self, reason: str) -> None:
        """Output off and every relay open first (belt and braces: every step test already ends so), then close."""
        if self.bench is None:
            return
        bench, stack = self.bench, self._stack
        self.bench, self._stack = None, None
        for safe in (lambda: bench.generator.output(False), lambda: bench.switch and bench.switch.open_all()):
            try:
                safe()
            except Exception:  # noqa: BLE001 - the link may be the thing that failed; closing still matters
                pass
        try:
            stack.close()
        except Exception as exc:  # noqa: BLE001 - a bench that fails to close is logged, the campaign goes on
            self._log("fault", what="bench_close", error=describe(exc))
        self._log("bench_close", reason=reason)


class CampaignRunner:
    """One campaign: start-up checks in the main thread, then ``fire`` from the scheduler's worker."""

    def __init__(self, spec: CampaignSpec, data_dir: Path, ledger: Ledger, runlog: RunLog, stop: StopFlag) -> None:
        self.spec, self.name = spec, spec.name
        self.store_path = data_dir / f"{spec.name}.h5"
        self.ledger, self.runlog, self.stop = ledger, runlog, stop
        self.judges = make_judge(spec.profile) is not None  # validates [dut] before anything is started
        self.comparator: ComparatorProcess | None = None
        self.session = BenchSession(spec.profile, self._log)
        self.keeper: Keeper | None = None
        self.grid: Grid | None = None
        self.finished = False
        self.activity = "waiting"  # what the live view shows
        self._lock = threading.Lock()
        self._wanted = False
        self._faults = 0  # failed attempts in the slot in progress

    def _log(self, event: str, **fields: Any) -> dict[str, Any]:
        return self.runlog.write(event, self.name, **fields)

    # -- start-up (main thread) ---------------------------------------------------------------------
    def previous(self) -> CampaignRow | None:
        """This campaign's row from an earlier start, refused if its [campaign] table has changed since."""
        row = self.ledger.campaign(self.name)
        if row is not None and row.spec_json != self.spec.table_json:
            raise ConfigError(self.spec.source, "campaign", f"campaign {self.name!r} already exists in "
                              f"{self.ledger.path} with a different [campaign] table; give this one a new name "
                              "(campaign.name) to start a new campaign")
        return row

    def open(self) -> None:
        """Open the store (recovering what a killed writer left), reconcile it with the ledger, open the
        bench and check every step's stimulus against the instruments' limits - before anything is scheduled."""
        row = self.previous()
        if row is not None and row.finished_utc is not None:
            self.finished = True
            return
        if row is None:
            self._check_not_over(utc_now())
        store = self._open_store()
        for note in store.notes:
            self._log("store_recovered", note=str(note))
        if self.judges:
            self.comparator = ComparatorProcess(self.spec.profile)  # its start-up overlaps the bench opening
        self.keeper = Keeper(self.name, store, self._open_store, self.ledger, self.runlog, self.comparator)
        self.reconcile(new=row is None)
        bench = self.session.get()
        for step in self.spec.steps:
            if bench.switch is None:
                check_limits(step.profile, bench.generator)
            else:
                check_batch_limits(step.profile, bench.generator, bench.switch)
        if bench.switch is not None and (found := open_left_closed(bench.switch)):
            self._log("switch_found_closed", channels=scpi.format_channel_list(found))
        if self.comparator is not None:
            self.comparator.wait_ready()  # a worker that cannot start is a start-up error, not a nightly fault

    def _open_store(self) -> RecordStore:
        output = self.spec.profile.output
        return RecordStore(self.store_path, fsync=output.fsync, rotate_records=output.rotate_records)

    def _check_not_over(self, now: datetime) -> None:
        """A new campaign whose `until` has already passed would schedule nothing: say so instead."""
        grid = make_grid(self.spec, self.spec.start or now)
        if grid.total == 0 or grid.finished(0, now):
            raise ConfigError(self.spec.source, "campaign.until", f"{iso(self.spec.until)} has already passed, "
                              "so the campaign has no slot left; give a later time")

    def reconcile(self, *, new: bool) -> None:
        """Enter in the ledger every record the store holds but the ledger does not (a kill between the
        durable append and the ledger entry), from the campaign tag the record carries."""
        known = self.ledger.record_indices(self.name)
        try:
            reader = open_records(self.store_path)
        except ConfigError:
            return  # no segment yet: nothing stored
        with reader:
            if len(reader) == len(known):
                return
            if new:
                raise ConfigError(str(self.store_path), "", f"holds {len(reader)} record(s), but {self.ledger.path} "
                                  f"has no campaign {self.name!r}; move the record files away or give the campaign "
                                  "a new name (campaign.name)")
            for summary in reader.index():
                if summary.index in known:
                    continue
                meta = reader.metadata(summary.index)
                tag = (meta.get("settings") or {}).get("campaign") or {}
                if tag.get("name") != self.name:
                    self._log("store_foreign_record", index=summary.index)
                    continue
                verdict = verdict_text(meta.get("analysis"))
                self.ledger.add_record(self.name, tag["slot"], tag["step"], summary.index, summary.utc, verdict)
                if not any(s.slot == tag["slot"] for s in self.ledger.slots(self.name)):
                    scheduled = _parse(tag.get("scheduled_utc"))
                    self.ledger.begin_slot(self.name, tag["slot"], scheduled, _parse(summary.utc) or utc_now())
                self._log("record_reconciled", slot=tag["slot"], step=tag["step"], index=summary.index)

    def register(self, now: datetime) -> None:
        """Enter the campaign in the ledger on its first start (its anchor fixes the slot grid for good)."""
        row = self.ledger.campaign(self.name)
        if row is None:
            anchor = self.spec.start or now
            grid = make_grid(self.spec, anchor)
            row = CampaignRow(self.name, str(self.spec.profile.path.resolve()), self.spec.profile.sha256,
                              self.spec.table_json, self.spec.schedule, str(self.store_path.resolve()), iso(anchor),
                              grid.total, len(self.spec.steps), iso(now), None)
            self.ledger.add_campaign(row)
            self._log("campaign_start", profile=row.profile, schedule=self._schedule_text(), slots=grid.total,
                      steps_per_slot=len(self.spec.steps), late_slots=self.spec.late_slots, store=row.store)
        else:
            if row.profile_sha256 != self.spec.profile.sha256:
                self.ledger.update_profile(self.name, self.spec.profile.sha256)
                self._log("profile_changed", sha256=self.spec.profile.sha256)
            last = self.ledger.last_slot(self.name)
            self._log("campaign_resume", last_slot=last.slot if last else 0,
                      interrupted=bool(last and last.state == "running"))
        last = self.ledger.last_slot(self.name)
        seed = (last.slot, datetime.fromisoformat(last.scheduled_utc)) if last and last.scheduled_utc else None
        self.grid = make_grid(self.spec, datetime.fromisoformat(row.anchor_utc), seed)

    def _schedule_text(self) -> str:
        spec = self.spec
        if spec.schedule == "interval":
            how = f"every {spec.every_s:g} s"
        elif spec.schedule == "cron":
            how = f"cron '{spec.cron}' ({spec.timezone})"
        else:
            how = "back to back"
        return how + (f", {spec.slots} slots" if spec.slots else f", until {iso(spec.until)}")

    # -- the job body (a scheduler worker thread) ---------------------------------------------------
    def fire(self) -> None:
        """Run whatever is due. Two wake-ups at once (the start-up one and a scheduled one) never run two
        slots together: the second only asks the first to look again before it returns."""
        self._wanted = True
        while self._wanted and not self.finished:
            if not self._lock.acquire(blocking=False):
                return
            try:
                self._wanted = False
                self._run_due()
            except Exception as exc:  # noqa: BLE001 - logged where the user looks; the watchdog wakes it again
                self._log("fault", what="daemon", error=describe(exc),
                          traceback=traceback.format_exc(limit=6).splitlines()[-6:])
                return
            finally:
                self._lock.release()

    def _position(self) -> tuple[int, SlotRow | None]:
        """(highest slot handled, the oldest interrupted slot to complete or None). A slot whose end the keeper
        has queued counts as handled: the pending set is read before the ledger, and the keeper books the
        end in the ledger before it leaves that set, so a slot is never taken for interrupted by mistake.
        A kill can leave two slots running (the runner had begun the next one while the keeper still held
        the end of the last), so every running slot is looked at, not only the newest."""
        pending = set(self.keeper.pending_end)
        last = self.ledger.last_slot(self.name)
        if last is None:
            return 0, None
        interrupted = [row for row in self.ledger.running_slots(self.name) if row.slot not in pending]
        return last.slot, (interrupted[0] if interrupted else None)

    def overdue(self, now: datetime, grace_s: float) -> bool:
        """True when a slot (or the end) is due for more than ``grace_s`` and no wake-up is handling it:
        the watchdog's test, so that a lost wake-up delays a slot by seconds instead of forever."""
        if self.finished or self.stop.requested or self._lock.locked():
            return False
        done, interrupted = self._position()
        if interrupted is not None or self.grid.finished(done, now):
            return True
        due = self.grid.due(now, done)
        moment = self.grid.time_of(due)
        return due > done and (moment is None or (now - moment).total_seconds() > grace_s)

    def _run_due(self) -> None:
        assert self.grid is not None
        while not self.stop.requested and not self.finished:
            now = utc_now()
            done, interrupted = self._position()
            if interrupted is not None:
                self._run_slot(interrupted.slot, _parse(interrupted.scheduled_utc), resumed=True)
                continue
            if self.grid.finished(done, now):
                self._finish(now)
                return
            due = self.grid.due(now, done)
            if due <= done:
                break
            if self._apply_late_slots(done, due, now):
                self._run_slot(due, self.grid.time_of(due), resumed=False)
        self._idle()

    def _apply_late_slots(self, done: int, due: int, now: datetime) -> bool:
        """Record slots ``done+1 .. due-1`` missed; with ``skip``, ``due`` too when it is too late. True
        when ``due`` is to run now."""
        scheduled = self.grid.time_of(due)
        late_s = (now - scheduled).total_seconds() if scheduled else 0.0
        run = not (self.spec.late_slots == "skip" and late_s > self.spec.lateness_limit_s)
        last_missed = due if not run else due - 1
        if last_missed > done:
            first = done + 1
            why = (f"run late as slot {due}" if run else
                   f"skipped: {late_s:.3g} s late, over lateness_limit_s = {self.spec.lateness_limit_s:g} s")
            self.ledger.mark_missed(self.name, first, last_missed, self.grid.time_of(first), now, why)
            self._log("slot_missed", first_slot=first, last_slot=last_missed, count=last_missed - first + 1,
                      policy=self.spec.late_slots, note=why)
        return run

    def _run_slot(self, slot: int, scheduled: datetime | None, *, resumed: bool) -> None:
        started = utc_now()
        stored = self.ledger.steps_stored(self.name, slot) if resumed else set()
        if resumed:
            self._log("slot_resume", slot=slot, steps_stored=sorted(stored))
        else:
            self.ledger.begin_slot(self.name, slot, scheduled, started)
            self._log("slot_start", slot=slot, scheduled_utc=iso(scheduled),
                      late_s=(started - scheduled).total_seconds() if scheduled else None,
                      steps=len(self.spec.steps))
        self._faults = 0
        try:
            for step in self.spec.steps:
                if step.number in stored:
                    continue
                self.activity = f"slot {slot}, {step.label}"
                record = self._acquire(slot, step)
                if record is not None:
                    self.keeper.put(Acquired(record, slot, step, scheduled))
        except _Stopped:
            self.keeper.put(SlotEnd(slot, started, self._faults, interrupted=True))
        except _SlotFailed as failure:
            self.keeper.put(SlotEnd(slot, started, self._faults, error=str(failure)))
        else:
            self.keeper.put(SlotEnd(slot, started, self._faults))
        finally:
            self.activity = "waiting"

    def _acquire(self, slot: int, step: Step) -> Record | None:
        """One record of ``step``: each failed attempt is logged, the bench reconnected, and the attempt
        retried after ``retry_backoff_s`` (doubling), until the slot's ``retries`` are used up. None when
        the step's unit was skipped (its switch path did not verify): logged, never measured elsewhere."""
        while True:
            if self.stop.requested:
                raise _Stopped()
            attempt = self._faults + 1
            self._log("attempt", slot=slot, step=step.number, setting=step.label, attempt=attempt)
            try:
                bench = self.session.get()
                if step.unit is None:
                    return run_step_test(step.profile, bench.generator, bench.scope)[0]
                result = run_unit(step.profile, step.unit, bench.generator, bench.scope, bench.switch)
                if result.skipped is not None:
                    self._log("unit_skipped", slot=slot, step=step.number, serial=step.unit.serial,
                              reason=result.skipped)
                    return None
                return result.records[0]
            except Exception as exc:  # noqa: BLE001 - any failed attempt is logged and retried; the daemon goes on
                self._faults += 1
                self._log("fault", slot=slot, step=step.number, attempt=attempt, error=describe(exc))
                self.session.close("fault")
                if isinstance(exc, ConfigError) or self._faults > self.spec.retries:
                    raise _SlotFailed(describe(exc)) from None
                delay = self.spec.retry_backoff_s * 2 ** (self._faults - 1)
                self._log("retry", slot=slot, step=step.number, attempt=attempt + 1, delay_s=delay)
                if not self.stop.sleep(delay):
                    raise _Stopped() from None

    def _idle(self) -> None:
        """Close the bench if the next slot is further away than keep_open_s."""
        if self.finished or self.stop.requested:
            return
        done, _ = self._position()
        upcoming = self.grid.time_of(done + 1)
        if upcoming is not None and (upcoming - utc_now()).total_seconds() > self.spec.keep_open_s:
            self.session.close(f"next slot at {iso(upcoming)}, over keep_open_s = {self.spec.keep_open_s:g} s away")

    def _finish(self, now: datetime) -> None:
        """Every slot handled: book the end once the keeper has stored everything, then close."""
        self.keeper.drain()
        self.ledger.finish_campaign(self.name, now)
        self.close("campaign finished")
        self._log("campaign_finished")
        self.runlog.sync()
        self.finished = True  # last: the daemon shuts down once every campaign says so

    def close(self, reason: str) -> None:
        """Bench output off and closed, queued records stored, store closed; safe to call twice."""
        try:
            self.session.close(reason)
            if self.keeper is not None:
                self.keeper.stop()
                self.keeper.store.close()
        finally:
            if self.comparator is not None:
                self.comparator.close()  # whatever failed above: a worker left running would hold the exit


def _parse(text: str | None) -> datetime | None:
    return datetime.fromisoformat(text) if text else None
