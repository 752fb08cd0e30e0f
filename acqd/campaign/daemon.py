"""``acqd daemon``: run one or more campaigns until they are finished or the daemon is told to stop.

Start-up checks everything it can before anything is scheduled - every profile and [campaign] table, no
two campaigns claiming one bench (refused, not serialised: see ``bench_claims``), the data directory and
its database, each store (recovered), each bench (opened, and every step's stimulus checked against the
instruments' limits) - so bad input is one line and exit status 2 with nothing scheduled.

SIGTERM and SIGINT ask the campaigns to stop: the step test in progress finishes (its generator output
goes off at its end), every bench is switched off and closed, every store closed, and the exit status is 0.
The slot that was interrupted is completed when the daemon starts again.
"""

from __future__ import annotations

import json
import os
import signal
import time
from collections.abc import Callable, Iterator, Sequence
from contextlib import ExitStack, contextmanager
from dataclasses import replace
from pathlib import Path
from types import FrameType
from typing import Any

from apscheduler.schedulers.background import BackgroundScheduler
from rich.console import Console, Group
from rich.live import Live
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TaskID, TextColumn
from rich.text import Text

from ..errors import ConfigError
from ..plan import ready_profile
from ..profile import Profile
from ..store.lockfile import release_lock, take_lock
from .ledger import FILENAME, Ledger, open_database
from .runlog import RunLog, utc_now
from .runner import CampaignRunner, StopFlag
from .scheduler import build_scheduler, forget_runners, install_jobs, remove_jobs, wake
from .spec import CampaignSpec, load_campaign
from .status import LOCKFILE, RUNLOG, campaign_statuses, next_run_times, status_table

REFRESH_S = 0.25
WATCHDOG_GRACE_S = 2.0
# Events worth a line on the console (the run log has them all).
SHOWN_EVENTS = ("campaign_start", "campaign_resume", "campaign_finished", "slot_done", "slot_failed",
                "slot_missed", "slot_interrupted", "slot_resume", "fault", "retry", "daemon_stop", "sync_failed")
LIVE_HIDDEN = ("slot_done",)  # the live table shows progress; only what needs a look scrolls above it


def load_specs(profiles: Sequence[Path]) -> list[CampaignSpec]:
    """Every profile's campaign, refused in one line if two share a name or a bench."""
    specs = [load_campaign(ready_profile(path)) for path in profiles]
    names: dict[str, CampaignSpec] = {}
    for spec in specs:
        if spec.name in names:
            raise ConfigError(spec.source, "campaign.name", f"{spec.name!r} is also the campaign of "
                              f"{names[spec.name].source}; each campaign needs its own name")
        names[spec.name] = spec
    bench_claims(specs)
    return specs


def with_bench_id(spec: CampaignSpec, bench_id: str) -> CampaignSpec:
    """The campaign with ``bench_id`` in place of its profile's (``acqd daemon --bench-id``): one profile
    can then serve every bench of a line, each daemon naming its own."""
    def named(profile: Profile) -> Profile:
        return replace(profile, bench=replace(profile.bench, bench_id=bench_id))

    return replace(spec, profile=named(spec.profile),
                   steps=tuple(replace(step, profile=named(step.profile)) for step in spec.steps))


def bench_claims(specs: Sequence[CampaignSpec]) -> None:
    """Refuse two campaigns driving the same instrument: interleaved step tests would reconfigure each
    other's generator and scope mid-capture. A simulated bench is each campaign's own (its own servers)."""
    owner: dict[str, CampaignSpec] = {}
    for spec in specs:
        for resource in _resources(spec.profile):
            key = resource.strip().upper()  # VISA resource names are case-insensitive
            if key in owner and owner[key].name != spec.name:
                raise ConfigError(spec.source, "bench", f"campaign {spec.name!r} claims {resource}, which campaign "
                                  f"{owner[key].name!r} ({owner[key].source}) already drives; one bench runs one "
                                  "campaign: sweep both settings in one campaign instead")
            owner[key] = spec


def _resources(profile: Profile) -> list[str]:
    """The VISA resources a profile drives, generator first; none for the simulated bench (its own)."""
    if profile.bench.kind == "simulated":
        return []
    return [p.resource for p in (profile.bench.generator, profile.bench.scope) if p.resource]


@contextmanager
def daemon_lock(data_dir: Path) -> Iterator[None]:
    """One daemon per data directory: the ledger and the stores have one writer each."""
    path = data_dir / LOCKFILE
    fd = take_lock(path)
    if fd is None:
        holder = path.read_text().strip() or "?"
        raise ConfigError(str(data_dir), "", f"another acqd daemon (pid {holder}) is using this data directory; "
                                             "stop it first or give another --data-dir directory")
    try:
        os.ftruncate(fd, 0)
        os.write(fd, f"{os.getpid()}\n".encode())
        yield
    finally:
        release_lock(path, fd)


@contextmanager
def stop_on_signals(stop: StopFlag) -> Iterator[None]:
    """SIGTERM and SIGINT set the stop flag (no exception: the step test in progress runs to its end)."""
    def handler(signum: int, frame: FrameType | None) -> None:
        stop.request(signum)

    previous = {sig: signal.signal(sig, handler) for sig in (signal.SIGTERM, signal.SIGINT)}
    try:
        yield
    finally:
        for sig, old in previous.items():
            signal.signal(sig, old)


class Daemon:
    def __init__(self, profiles: Sequence[Path], data_dir: Path, console: Console, *, live: bool,
                 bench_id: str = "", sync_url: str | None = None, endpoint_url: str | None = None,
                 sync_verify: str = "upload") -> None:
        self.profiles, self.data_dir, self.console, self.live = list(profiles), Path(data_dir), console, live
        self.bench_id, self.sync_url, self.endpoint_url = bench_id, sync_url, endpoint_url
        self.sync_verify = sync_verify
        self.stop = StopFlag()
        self._removed: set[str] = set()  # campaigns whose jobs were removed once finished

    def run(self) -> int:
        specs = load_specs(self.profiles)
        if self.bench_id:
            specs = [with_bench_id(spec, self.bench_id) for spec in specs]
        unnamed = [spec for spec in specs if not spec.profile.bench.bench_id]
        if self.sync_url and unnamed:
            raise ConfigError(unnamed[0].source, "bench.bench_id", "missing: --sync files records under the "
                              "bench's id; give [bench] bench_id or --bench-id ID")
        try:
            self.data_dir.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise ConfigError(str(self.data_dir), "", f"cannot be created ({exc.strerror})") from None
        with ExitStack() as stack:
            stack.enter_context(daemon_lock(self.data_dir))
            stack.enter_context(stop_on_signals(self.stop))
            ledger = Ledger(self.data_dir / FILENAME)
            stack.callback(ledger.close)
            runlog = RunLog(self.data_dir / RUNLOG)
            stack.callback(runlog.close)
            runlog.listeners.append(self._echo)
            if self.sync_url:  # stopped after the stores close (callbacks run last-in first-out)
                stack.callback(self._start_sync(runlog).stop)
            runners = [CampaignRunner(spec, self.data_dir, ledger, runlog, self.stop) for spec in specs]
            for runner in runners:
                runner.previous()
            for runner in runners:
                stack.callback(runner.close, "daemon stopped")
                runner.open()
            active = [r for r in runners if not r.finished]
            if not active:
                self.console.print(f"every campaign given is already finished (see acqd status {self.data_dir})")
                return 0
            now = utc_now()
            for runner in active:
                runner.register(now)
            runlog.write("daemon_start", pid=os.getpid(), profiles=[str(p) for p in self.profiles],
                         data=str(self.data_dir))
            self._schedule_and_wait(runners)
            for runner in runners:
                runner.close("daemon stopped")  # outputs off, files closed before the last line says so
            runlog.write("daemon_stop", reason="signal" if self.stop.signal else "every campaign finished",
                         signal=signal.Signals(self.stop.signal).name if self.stop.signal else None)
        return 0

    def _start_sync(self, runlog: RunLog) -> Any:
        """The archive sync in its own thread (acqd.fleet, imported only when asked for)."""
        from ..fleet import start_background_sync

        return start_background_sync(self.data_dir, self.sync_url, lambda event, **fields: runlog.write(event, **fields),
                                     bench_id=self.bench_id, endpoint_url=self.endpoint_url,
                                     verify=self.sync_verify)

    def _schedule_and_wait(self, runners: list[CampaignRunner]) -> None:
        scheduler = build_scheduler(self.data_dir / FILENAME, len(runners))
        scheduler.start(paused=True)
        try:
            install_jobs(scheduler, runners)
            scheduler.resume()
            self._wait(scheduler, runners)
        finally:
            self.stop.request()  # workers stop after their step test in progress
            self._remove_finished(scheduler, runners)
            scheduler.shutdown(wait=True)
            forget_runners()

    def _remove_finished(self, scheduler: BackgroundScheduler, runners: list[CampaignRunner]) -> None:
        for runner in runners:
            if runner.finished and runner.name not in self._removed:
                remove_jobs(scheduler, runner.name)
                self._removed.add(runner.name)

    def _wait(self, scheduler: BackgroundScheduler, runners: list[CampaignRunner]) -> None:
        """Refresh the view until stopped or finished; wake a campaign whose due slot nobody picked up."""
        with self._view(runners) as refresh:
            while not self.stop.requested and not all(r.finished for r in runners):
                time.sleep(REFRESH_S)
                refresh()
                self._remove_finished(scheduler, runners)
                for runner in runners:
                    if runner.overdue(utc_now(), WATCHDOG_GRACE_S):
                        runner.runlog.write("wake", runner.name, note="a due slot was not picked up; woken")
                        wake(scheduler, runner.name)

    @contextmanager
    def _view(self, runners: list[CampaignRunner]) -> Iterator[Callable[[], None]]:
        """A rich live table with a progress bar per campaign in a terminal; nothing extra otherwise."""
        if not self.live:
            yield lambda: None
            return
        conn = open_database(self.data_dir / FILENAME, readonly=True)
        progress = Progress(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(),
                            console=self.console)
        tasks: dict[str, TaskID] = {r.name: progress.add_task(r.name, total=None) for r in runners}

        def render() -> Group:
            statuses = campaign_statuses(conn, next_run_times(conn))
            for s in statuses:
                if s.name in tasks:
                    progress.update(tasks[s.name], total=s.total_slots, completed=s.slots_handled)
            activity = {r.name: ("finished" if r.finished else r.activity) for r in runners}
            return Group(status_table([s for s in statuses if s.name in tasks], activity), progress)

        try:
            with Live(render(), console=self.console, refresh_per_second=4, transient=False) as live:
                yield lambda: live.update(render())
        finally:
            conn.close()

    def _echo(self, entry: dict[str, Any]) -> None:
        if entry["event"] not in SHOWN_EVENTS or (self.live and entry["event"] in LIVE_HIDDEN):
            return
        details = {k: v for k, v in entry.items() if k not in ("utc", "event", "campaign")}
        text = " ".join(f"{k}={v if isinstance(v, str) else json.dumps(v, separators=(',', ':'))}"
                        for k, v in details.items() if v is not None)
        style = "red" if entry["event"] in ("fault", "slot_failed") else "yellow" if "missed" in entry["event"] else ""
        self.console.print(Text(f"{entry['utc'][:19]} {entry.get('campaign', '')} {entry['event']} {text}", style=style),
                           highlight=False, soft_wrap=True)
