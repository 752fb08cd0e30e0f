"""``acqd run PROFILE``: N step tests back to back, each stored durably before its line is printed."""

from __future__ import annotations

import argparse
import signal
import time
from collections.abc import Iterator
from concurrent.futures import Future, ThreadPoolExecutor
from contextlib import contextmanager
from pathlib import Path
from types import FrameType
from typing import Any

from rich.console import Console
from rich.progress import Progress
from rich.text import Text

from .. import scpi
from ..batch import open_left_closed, run_batch, summarise, unit_judges
from ..benchsession import Bench, Replay, open_bench
from ..errors import AcqdError, ConfigError, InstrumentError
from ..campaign.comparing import ComparatorProcess
from ..judge import Judge, make_judge
from ..plan import ready_profile
from ..display import label, si
from ..profile import Profile
from ..record import Record
from ..steptest import Applied, check_limits, output_guard, run_step_test
from ..store import RecordStore
from .common import (SAFETY_NOTE, add_command, add_count, add_out, console, made_folder, progress_bar, record_line,
                     verdict_text, written_file)
from .sim import parse_selection


class Terminated(KeyboardInterrupt):
    """SIGTERM, raised where the program is so the output guard switches the generator off on the way out."""


@contextmanager
def sigterm_raises() -> Iterator[None]:
    def handler(signum: int, frame: FrameType | None) -> None:
        raise Terminated()

    previous = signal.signal(signal.SIGTERM, handler)
    try:
        yield
    finally:
        signal.signal(signal.SIGTERM, previous)


def register(sub: argparse._SubParsersAction) -> None:
    p = add_command(sub, "run", help="run step tests from a profile and store every record",
                    description="Run N step tests from PROFILE on its bench, compare each record with the "
                                "profile's [dut] table and store it in HDF5 before its line is printed. "
                                + SAFETY_NOTE)
    p.add_argument("profile", type=Path, metavar="PROFILE", help="bench profile (TOML)")
    add_count(p)
    add_out(p, "the record store to append to (default: the profile's output.file)")
    p.add_argument("--replay", type=Path, default=None, metavar="FILE",
                   help="serve the records stored in FILE as the scope instead of the profile's bench")
    p.add_argument("--records", type=parse_selection, default=None, metavar="LIST",
                   help="with --replay: which stored records, in order (e.g. 0,2,5-9)")
    p.set_defaults(func=run_command)


def run_command(args: argparse.Namespace) -> int:
    if args.records is not None and args.replay is None:
        raise ConfigError("command line", "--records", "only has a meaning with --replay FILE")
    profile = ready_profile(args.profile)
    if profile.batch is not None:
        return _batch_command(args, profile)
    judge = make_judge(profile)  # validates [dut] before anything is started
    out = _store_path(args, profile)
    screen = console(soft_wrap=True)
    replay = Replay(args.replay, args.records) if args.replay is not None else None
    with sigterm_raises(), _comparator(profile, judge, args.count) as judge, open_bench(profile, replay) as bench:
        check_limits(profile, bench.generator)
        _open_switch(bench, screen)
        if isinstance(judge, ComparatorProcess):  # as the daemon does: the worker's start belongs to the run's
            judge.wait_ready()                    # start-up, not to a stall after its first record
        if replay is None:  # after every check of the profile and the bench, before any output is driven;
            screen.print(Text(SAFETY_NOTE))  # a replay drives none: the caution would teach people to skip it
        with RecordStore(out, fsync=profile.output.fsync, rotate_records=profile.output.rotate_records) as store, \
                progress_bar(screen) as progress, _Keeper(judge, store, progress.console) as keeper, \
                output_guard(bench.generator):  # left first: the output goes off before the last records are kept
            failed, aborted = _step_tests(profile, bench, args.count, keeper, progress)
        stored = keeper.stored
    screen.print(Text(f"{stored} record(s) stored in {out}; {failed} step test(s) not acquired"))
    if aborted:
        raise InstrumentError("acqd run", aborted)
    return 1 if failed else 0


RUN_WORKER_NICENESS = 0  # added to the run's own niceness: the same priority as the run


@contextmanager
def _comparator(profile: Profile, judge: Judge | None, count: int) -> Iterator[Judge | None]:
    """Where a run's records are compared: for more than one record, in a worker process like the
    daemon's (``campaign.comparing``), started now so its imports overlap the bench opening; for one
    record, or with nothing to compare, here.

    Why a process: in the keeper's thread the fit holds the interpreter lock in bursts, and the step test
    beside it — this process's client and, on the simulated bench, the instruments' own work — waits for
    them, so on two cores the two halves of the pipeline ran mostly one after the other. In a process of
    its own the fit takes the other core. One record has nothing to overlap and would only wait for the
    worker's start. The worker's judge keeps its own warm start, record after record, as the judge here
    would, so the analyses are the same. It runs at the run's own priority (``RUN_WORKER_NICENESS``), not
    the daemon's nice 19: a run's pipeline is one step test deep, so the capture waits for the fit
    anyway, and at nice 19 any other job on the machine took the fit's core (measured: slower than
    comparing in the thread, at a load average of 1–2 from other jobs).
    """
    if judge is None or count < 2:
        yield judge
        return
    worker = ComparatorProcess(profile, niceness=RUN_WORKER_NICENESS)
    try:
        yield worker
    finally:
        worker.close()


def _store_path(args: argparse.Namespace, profile: Profile) -> Path:
    """The store to append to, checked and its folder made before the bench is opened: a folder that
    cannot be made (under /proc) or a device where the store should be is one line, and nothing is sent."""
    if args.out is not None:
        where, field, out = "acqd run", "--out", args.out
    else:
        where, field, out = profile.source, "output.file", profile.output.file
        written_file(where, field)(str(out))
    made_folder(out.parent, where, f"{field} {out}")
    return out


def _step_tests(profile: Profile, bench: Bench, count: int, keeper: _Keeper, progress: Progress) -> tuple[int, str]:
    """``count`` step tests, configured once (``Applied``), each kept by ``keeper``; after a failed one the bench
    is reached again first. Returns (step tests not acquired, why the run stopped early or "")."""
    applied = Applied()  # the run configures once: later step tests send only what the plan changes
    task = progress.add_task(profile.name, total=count)
    failed = in_a_row = 0
    for _ in range(count):
        try:
            records = run_step_test(profile, bench.generator, bench.scope, applied)
        except InstrumentError as exc:
            failed, in_a_row = failed + 1, in_a_row + 1
            keeper.wait()  # the lines stay in the order of the step tests
            progress.console.print(Text(f"not acquired: {exc}"))
            progress.advance(task)
            if in_a_row >= MAX_FAILURES_IN_A_ROW:
                return failed, f"{in_a_row} step tests in a row not acquired; the run is stopped"
            aborted = _reach_again(bench, progress.console)
            if aborted:
                return failed, aborted
            continue
        in_a_row = 0
        keeper.keep(records)
        progress.advance(task)
    return failed, ""


# A dropped link: after a step test fails, both instruments are reached again before the next one, the
# generator first (its output off is the first command it gets), waiting 0.5 s, 1 s, 2 s, ... (doubling,
# as the daemon's retry_backoff_s does) up to 4 s between attempts, 10 attempts (about 30 s) in all.
RECONNECT_FIRST_DELAY_S, RECONNECT_MAX_DELAY_S, RECONNECT_ATTEMPTS = 0.5, 4.0, 10
MAX_FAILURES_IN_A_ROW = 5  # step tests not acquired one after another (each reached again) stop the run


def _reach_again(bench: Bench, out: Console) -> str:
    """After a failed step test: the generator's output off as the first thing it is sent once it answers
    again, then the scope answering; "" when both do, else why the run stops (the attempts used up).
    Said on the console when it took more than one attempt, so a dropped link is visible in the run's log."""
    delays_s = [min(RECONNECT_FIRST_DELAY_S * 2 ** k, RECONNECT_MAX_DELAY_S) for k in range(RECONNECT_ATTEMPTS)]
    last: InstrumentError | None = None
    for attempt, delay_s in enumerate([0.0, *delays_s]):
        time.sleep(delay_s)
        try:
            bench.generator.output(False)  # reopens a closed session: *IDN? (who answers), then output off
            bench.scope.status_changed()
        except InstrumentError as exc:
            if last is None:
                out.print(Text(f"lost the bench ({exc}); reconnecting, up to {RECONNECT_ATTEMPTS} attempts"))
            last = exc
            bench.generator.close()  # a fresh connection for the next attempt: a broken one never recovers
            bench.scope.close()
            continue
        if last is not None:
            out.print(Text(f"the bench answers again after {sum(delays_s[:attempt]):g} s; "
                           f"generator output switched off first"))
        return ""
    return (f"the bench did not answer again within {sum(delays_s):g} s ({RECONNECT_ATTEMPTS} attempts; last: "
            f"{last}); the run is stopped and the generator output may still be on")


class _Keeper:
    """Compares and stores a step test's records on one worker thread while the next step test captures
    (comparing there means waiting for the comparator's process when the run has one, see ``_comparator``).

    The pipeline is one step test deep: ``keep`` first waits until the previous step test's records are
    durable (their lines printed), so at most one step test's records are not yet stored, they are stored
    in order, and an error storing them is raised in the run, as before. Leaving waits for the last ones
    whatever ended the run (an interrupt included): a captured record is never dropped.
    """

    def __init__(self, judge: Judge | None, store: RecordStore,
                 console: Console) -> None:
        self._judge, self._store, self._console = judge, store, console
        self._pool = ThreadPoolExecutor(max_workers=1, thread_name_prefix="acqd-keeper")
        self._pending: Future[None] | None = None
        self.stored = 0

    def keep(self, records: list[Record]) -> None:
        self.wait()
        self._pending = self._pool.submit(self._keep, records)

    def wait(self) -> None:
        pending, self._pending = self._pending, None
        if pending is not None:
            pending.result()

    def _keep(self, records: list[Record]) -> None:
        for record in records:
            record.analysis = _judged(self._judge, record, self._console)
            index = self._store.append(record)
            self.stored += 1
            self._console.print(record_line(index, record))

    def __enter__(self) -> _Keeper:
        return self

    def __exit__(self, *exc: object) -> None:
        try:
            self.wait()
        finally:
            self._pool.shutdown(wait=True)


def _open_switch(bench: Bench, screen: Console) -> None:
    """A bench with a switch starts with every relay open, saying so if an earlier run left some closed."""
    if bench.switch is None:
        return
    found = open_left_closed(bench.switch)
    if found:
        screen.print(Text(f"switch: {scpi.format_channel_list(found)} found closed at start-up; all opened"))


def _batch_command(args: argparse.Namespace, profile: Profile) -> int:
    """``-n`` passes over the batch: every unit in turn, each record stored before its line, then the summary."""
    if args.replay is not None:
        raise ConfigError("command line", "--replay", "a batch profile steps a switch; replay a single-unit profile")
    judges = unit_judges(profile, profile.batch)
    out = _store_path(args, profile)
    screen = console(soft_wrap=True)
    results, stored, skipped = [], 0, 0
    with sigterm_raises(), open_bench(profile) as bench:
        _open_switch(bench, screen)
        screen.print(Text(SAFETY_NOTE))
        with RecordStore(out, fsync=profile.output.fsync, rotate_records=profile.output.rotate_records) as store, \
                progress_bar(screen) as progress:
            task = progress.add_task(f"{profile.name}: batch {profile.batch.name}",
                                     total=args.count * len(profile.batch.units))
            for _ in range(args.count):
                for result in run_batch(profile, bench.generator, bench.scope, bench.switch):
                    serial, path = result.unit.serial, scpi.format_channel_list(result.unit.channels)
                    if result.skipped is not None:
                        skipped += 1
                        progress.console.print(Text(f"{serial} {path} skipped: {result.skipped}"))
                    for record in result.records:
                        record.analysis = _judged(judges[serial], record, progress.console)
                        index = store.append(record)
                        stored += 1
                        progress.console.print(Text(f"{serial} {path} ").append_text(record_line(index, record)))
                    results.append(result)
                    progress.advance(task)
    print_batch_summary(screen, results, profile.dut)
    screen.print(Text(f"{stored} record(s) stored in {out}; {skipped} unit(s) skipped"))
    return 1 if skipped else 0


def print_batch_summary(screen: Console, results: list[Any], dut: dict[str, Any]) -> None:
    """Pass/fail and fitted values per unit, then each parameter's spread over the batch against its tolerance."""
    units, spreads = summarise(results, dut)
    names = [s.parameter for s in spreads]
    screen.print(Text(f"batch summary: {sum(u.verdict == 'pass' for u in units)} of {len(units)} unit(s) pass"))
    for u in units:
        line = Text(f"  {u.serial:<14} ").append_text(verdict_text(u.verdict) if u.verdict != "skipped"
                                                       else Text("skipped"))
        fitted = "  ".join(f"{label(n)} {si(u.fitted[n], _unit(spreads, n))}" for n in names if n in u.fitted)
        line.append(f"  {fitted}" if fitted else "")
        if u.verdict in ("fail", "skipped") and u.reason:
            line.append(f"  ({u.reason})")
        screen.print(line, soft_wrap=True)
    for s in spreads:
        tolerance = f"tolerance ±{s.tolerance_pct:g} %" if s.tolerance_pct is not None else "no tolerance"
        screen.print(Text(f"  {label(s.parameter)}: nominal {si(s.nominal, s.unit)}, {si(s.minimum, s.unit)} – "
                          f"{si(s.maximum, s.unit)}, mean {si(s.mean, s.unit)}, s.d. {100 * s.std / abs(s.nominal):.2g} %,"
                          f" worst {s.worst_deviation_pct:.2g} % off nominal; {tolerance}"), soft_wrap=True)


def _unit(spreads: list[Any], name: str) -> str:
    return next((s.unit for s in spreads if s.parameter == name), "")


def _judged(judge: Judge | None, record: Record,
            console: Console) -> dict[str, Any] | None:
    """The comparator's result; a comparator failure is reported but never costs the record itself."""
    if judge is None:
        return None
    try:
        return judge(record)
    except AcqdError as exc:
        console.print(Text(f"not compared: {exc}"))
        return None
