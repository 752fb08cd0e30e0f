"""What the campaigns in a data directory are doing: from the ledger, the job store and the run log.

``acqd status`` opens everything read-only, so it can be run at any time, also while the daemon runs;
the daemon's live view is the same table, refreshed.
"""

from __future__ import annotations

import fcntl
import json
import os
import sqlite3
from dataclasses import asdict, dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from rich.table import Table

from ..errors import ConfigError
from .ledger import FILENAME, open_database
from .runlog import read_runlog
from .scheduler import JOBS_TABLE, START_SUFFIX

RUNLOG = "runlog.jsonl"
LOCKFILE = "daemon.lock"
LAST_VERDICTS = 5


@dataclass
class CampaignStatus:
    name: str
    profile: str
    schedule: str
    store: str
    state: str  # "active"; "finished"; "paused": the running daemon does not run it; "stopped": no daemon runs
    total_slots: int | None
    steps_per_slot: int
    slots_done: int = 0
    slots_failed: int = 0  # faulted: every retry used up
    slots_missed: int = 0
    slot_running: int | None = None
    next_slot: int | None = None
    next_utc: str | None = None
    records: int = 0
    passed: int = 0
    failed: int = 0
    untested: int = 0
    not_compared: int = 0
    faults: int = 0  # failed attempts, retried or not
    last_verdicts: list[dict[str, Any]] = field(default_factory=list)
    last_event: dict[str, Any] | None = None

    @property
    def slots_handled(self) -> int:
        return self.slots_done + self.slots_failed + self.slots_missed


def daemon_pid(data_dir: Path) -> int | None:
    """The pid of the daemon holding ``daemon.lock`` in ``data_dir``, or None when none runs."""
    path = data_dir / LOCKFILE
    try:
        fd = os.open(path, os.O_RDONLY)
    except FileNotFoundError:
        return None
    try:
        fcntl.flock(fd, fcntl.LOCK_SH | fcntl.LOCK_NB)
    except BlockingIOError:
        text = path.read_text().strip()
        return int(text) if text.isdigit() else -1
    else:
        fcntl.flock(fd, fcntl.LOCK_UN)
        return None
    finally:
        os.close(fd)


def collect(data_dir: str | Path) -> list[CampaignStatus]:
    """Every campaign of ``data_dir``, read-only; one ConfigError line when it holds none."""
    data_dir = Path(data_dir)
    database = data_dir / FILENAME
    if not database.is_file():
        raise ConfigError(str(data_dir), "", f"no campaign database ({FILENAME}) here; is this the daemon's --data-dir "
                                             "directory?")
    running = daemon_pid(data_dir) is not None
    settled = not running and not Path(f"{database}-wal").exists()  # after a kill the log holds the last rows
    conn = open_database(database, readonly=True, settled=settled)
    try:
        statuses = campaign_statuses(conn, next_run_times(conn))
    finally:
        conn.close()
    if not running:
        for status in statuses:
            _stopped(status)
    last_events = _last_events(data_dir / RUNLOG)
    for status in statuses:
        status.last_event = last_events.get(status.name)
    return statuses


def next_run_times(conn: sqlite3.Connection) -> dict[str, datetime | None]:
    """Job id → next run time, straight from APScheduler's table (no unpickling of jobs needed)."""
    try:
        rows = conn.execute(f"SELECT id, next_run_time FROM {JOBS_TABLE}").fetchall()
    except sqlite3.OperationalError:
        return {}
    return {job_id: (datetime.fromtimestamp(t, UTC) if t is not None else None) for job_id, t in rows}


def campaign_statuses(conn: sqlite3.Connection, next_times: dict[str, datetime | None]) -> list[CampaignStatus]:
    try:
        campaigns = conn.execute("SELECT name, profile, schedule, store, total_slots, steps_per_slot, finished_utc "
                                 "FROM acqd_campaigns ORDER BY created_utc").fetchall()
    except sqlite3.OperationalError:
        return []
    out = []
    for name, profile, schedule, store, total, steps, finished in campaigns:
        status = CampaignStatus(name, profile, schedule, store, "finished" if finished else "active", total, steps)
        _slot_counts(conn, status)
        _record_counts(conn, status)
        if not finished:
            _next(status, next_times)
        out.append(status)
    return out


def _slot_counts(conn: sqlite3.Connection, s: CampaignStatus) -> None:
    for state, slots, faults in conn.execute(
            "SELECT state, SUM(slot - first_slot + 1), SUM(faults) FROM acqd_slots WHERE campaign = ? GROUP BY state",
            (s.name,)):
        s.faults += faults or 0
        if state == "done":
            s.slots_done = slots
        elif state == "failed":
            s.slots_failed = slots
        elif state == "missed":
            s.slots_missed = slots
    running = conn.execute("SELECT slot FROM acqd_slots WHERE campaign = ? AND state = 'running'", (s.name,)).fetchone()
    s.slot_running = running[0] if running else None
    last = conn.execute("SELECT MAX(slot) FROM acqd_slots WHERE campaign = ?", (s.name,)).fetchone()[0] or 0
    if s.total_slots is None or last < s.total_slots:
        s.next_slot = last + 1  # a running slot has its row already; APScheduler's next wake-up is the one after


def _record_counts(conn: sqlite3.Connection, s: CampaignStatus) -> None:
    for verdict, count in conn.execute("SELECT verdict, COUNT(*) FROM acqd_records WHERE campaign = ? GROUP BY verdict",
                                       (s.name,)):
        s.records += count
        if verdict == "pass":
            s.passed += count
        elif verdict == "fail":
            s.failed += count
        elif verdict == "untested":
            s.untested += count
        else:
            s.not_compared += count
    s.last_verdicts = [{"index": i, "slot": slot, "utc": utc, "verdict": v or "not compared"}
                       for i, slot, utc, v in conn.execute(
                           "SELECT record_index, slot, utc, verdict FROM acqd_records WHERE campaign = ? "
                           "ORDER BY record_index DESC LIMIT ?", (s.name, LAST_VERDICTS))]


def _next(s: CampaignStatus, next_times: dict[str, datetime | None]) -> None:
    """The next wake-up from the job store; a job without one was paused by a daemon not running it."""
    if s.schedule == "back_to_back":
        return
    if s.name in next_times and next_times[s.name] is None:
        s.state = "paused"
        return
    times = [t for key in (s.name, s.name + START_SUFFIX) if (t := next_times.get(key)) is not None]
    s.next_utc = min(times).isoformat(timespec="seconds") if times else None


def _stopped(s: CampaignStatus) -> None:
    """With no daemon running, an unfinished campaign waits for a start: no wake-up time is coming, so none
    is shown (the job store still holds the one it had, which is in the past by now)."""
    if s.state != "finished":
        s.state, s.next_utc = "stopped", None


def _last_events(runlog: Path) -> dict[str, dict[str, Any]]:
    last: dict[str, dict[str, Any]] = {}
    for entry in read_runlog(runlog):
        if "campaign" in entry:
            last[entry["campaign"]] = entry
    return last


def as_json(statuses: list[CampaignStatus], pid: int | None) -> str:
    return json.dumps({"daemon_pid": pid, "campaigns": [asdict(s) for s in statuses]}, indent=2)


def status_table(statuses: list[CampaignStatus], activity: dict[str, str] | None = None) -> Table:
    """The table ``acqd status`` prints and the daemon's live view shows."""
    table = Table(show_edge=False, header_style="bold")
    table.add_column("campaign", no_wrap=True)
    table.add_column("state")
    table.add_column("slots", no_wrap=True)
    table.add_column("next slot (UTC)", no_wrap=True)
    for column in ("records", "pass", "fail", "faults", "missed"):
        table.add_column(column, justify="right")
    table.add_column(f"last {LAST_VERDICTS}", no_wrap=True)
    for s in statuses:
        total = f"/{s.total_slots}" if s.total_slots else ""
        state = (activity or {}).get(s.name) or s.state
        if s.slot_running is not None and not activity:
            state += f" (slot {s.slot_running} unfinished)"
        when = f" {s.next_utc[:19].replace('T', ' ')}" if s.next_utc else ""
        nxt = "" if s.next_slot is None else f"#{s.next_slot}{when}"
        verdicts = "".join(verdict_mark(v["verdict"]) for v in reversed(s.last_verdicts))
        table.add_row(s.name, state, f"{s.slots_handled}{total}" + (f" ({s.slots_failed} failed)" if s.slots_failed else ""),
                      nxt, str(s.records), str(s.passed), str(s.failed), str(s.faults), str(s.slots_missed), verdicts)
    table.caption = "last: P pass, F fail, u untested (no tolerance), - not compared; oldest first"
    return table


def verdict_mark(verdict: str | None) -> str:
    """One verdict as the one-letter mark of the status tables (rich markup: colour on the verdict only)."""
    return {"pass": "[green]P[/green]", "fail": "[bold red]F[/bold red]", "untested": "u"}.get(verdict, "-")
