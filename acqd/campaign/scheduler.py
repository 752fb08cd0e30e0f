"""APScheduler 3 wiring: a background scheduler whose jobs live in SQLite beside the records.

Each campaign has one job (id = the campaign name) whose trigger is its slot grid (for a back-to-back
campaign: one wake-up at its start, after which it runs slot after slot); the job store keeps
its next run time, so a daemon started again after a stop sees at once that a slot time passed and wakes
the campaign (coalesced into one wake-up). At every start each campaign also gets a one-off wake-up
(``NAME@start``) so that an interrupted slot is completed, and a back-to-back campaign begins, without
waiting for the next slot time. What a wake-up runs is decided by the campaign's ledger and grid, not by
how many wake-ups APScheduler delivered (see ``grid``).

The job function is the top-level ``fire_campaign`` with the campaign's name as its only argument, as the
SQLAlchemy job store requires (it pickles a reference to the function and the arguments).
"""

from __future__ import annotations

import logging
from collections.abc import Iterable
from datetime import UTC, datetime
from pathlib import Path

from apscheduler.executors.pool import ThreadPoolExecutor
from apscheduler.jobstores.base import JobLookupError
from apscheduler.jobstores.sqlalchemy import SQLAlchemyJobStore
from apscheduler.schedulers.background import BackgroundScheduler
from apscheduler.triggers.date import DateTrigger

from .runner import CampaignRunner

JOBS_TABLE = "apscheduler_jobs"
START_SUFFIX = "@start"
WAKE_SUFFIX = "@wake"
MAX_INSTANCES = 3

# The live runners of this process, by campaign name; jobs reach them through ``fire_campaign``.
_RUNNERS: dict[str, CampaignRunner] = {}


def fire_campaign(name: str) -> None:
    """APScheduler's job function: run whatever is due for campaign ``name`` in this daemon.

    A job left in the store for a campaign this daemon was not given finds no runner and does nothing
    (such jobs are paused at start-up anyway)."""
    runner = _RUNNERS.get(name)
    if runner is not None:
        runner.fire()


def build_scheduler(database: Path, campaigns: int) -> BackgroundScheduler:
    """A scheduler with the SQLite job store and one worker per campaign (each drives its own bench).

    ``misfire_grace_time=None``: APScheduler runs a late wake-up however late, and the campaign's own
    late-slot policy (`late_slots`) decides (and records) what happens to the slot. ``coalesce``: many missed wake-ups are
    delivered as one. ``max_instances=MAX_INSTANCES``: APScheduler drops a wake-up while the job's earlier
    one has not returned, and a wake-up arriving just as the earlier one finishes its last look at the
    clock would be lost; so a second instance is let in, and ``CampaignRunner.fire`` makes sure only one
    of them runs slots (the other returns at once, asking the first to look again)."""
    logging.getLogger("apscheduler").setLevel(logging.ERROR)  # dropped wake-ups are expected, see grid
    return BackgroundScheduler(
        jobstores={"default": SQLAlchemyJobStore(url=f"sqlite:///{database}", tablename=JOBS_TABLE)},
        executors={"default": ThreadPoolExecutor(max_workers=(MAX_INSTANCES + 1) * max(1, campaigns))},
        job_defaults={"coalesce": True, "max_instances": MAX_INSTANCES, "misfire_grace_time": None},
        timezone=UTC,
    )


def install_jobs(scheduler: BackgroundScheduler, runners: Iterable[CampaignRunner]) -> None:
    """Register the runners, keep each campaign's stored job (or add it), pause jobs of campaigns not run
    by this daemon, add the start-up wake-ups; the scheduler must have been started paused."""
    active = [r for r in runners if not r.finished]
    names = {r.name for r in active}
    for runner in active:
        _RUNNERS[runner.name] = runner
    for job in scheduler.get_jobs():
        if job.id.partition("@")[0] not in names and job.next_run_time is not None:
            scheduler.pause_job(job.id)
    for runner in active:
        assert runner.grid is not None
        job = scheduler.get_job(runner.name)
        if job is None:
            scheduler.add_job(fire_campaign, runner.grid.trigger(), args=[runner.name], id=runner.name,
                              name=f"campaign {runner.name}")
        elif job.next_run_time is None:
            scheduler.resume_job(runner.name)
        scheduler.add_job(fire_campaign, DateTrigger(run_date=datetime.now(UTC), timezone=UTC),
                          args=[runner.name], id=runner.name + START_SUFFIX, name=f"start {runner.name}",
                          replace_existing=True)


def wake(scheduler: BackgroundScheduler, name: str) -> None:
    """An extra wake-up now (the daemon's watchdog uses it when a due slot was not picked up)."""
    scheduler.add_job(fire_campaign, DateTrigger(run_date=datetime.now(UTC), timezone=UTC), args=[name],
                      id=name + WAKE_SUFFIX, name=f"wake {name}", replace_existing=True)


def remove_jobs(scheduler: BackgroundScheduler, name: str) -> None:
    """A finished campaign leaves no job behind (so ``acqd status`` shows no next slot).

    Only from the daemon's main thread, never from a job: APScheduler 3's ``shutdown`` holds the job-store
    lock while it waits for running jobs, so a job removing a job during shutdown would wait forever."""
    for job_id in (name, name + START_SUFFIX, name + WAKE_SUFFIX):
        try:
            scheduler.remove_job(job_id)
        except JobLookupError:
            pass


def forget_runners() -> None:
    _RUNNERS.clear()
