"""The ledger: which slots of which campaign ran, missed or failed, and which records they stored.

It lives in the same SQLite file as APScheduler's job store (``campaigns.sqlite`` in the data directory),
in tables of its own, and every change is one committed transaction, so after a SIGKILL it says exactly
which slots are complete. A slot still marked ``running`` when the daemon starts was interrupted; its
steps already stored are listed in ``acqd_records`` and are not run again.

The record store, not the ledger, is the durable truth about records: every record carries its campaign,
slot and step, and ``CampaignRunner.reconcile`` enters at start-up whatever the store holds and the
ledger lacks (a kill between the durable append and the ledger's commit). That is why the ledger can use
WAL with ``synchronous=NORMAL`` - a commit survives a kill of the daemon, and a power cut can at most undo
the last commits, which reconciliation redoes from the store - instead of paying an fsync per commit.
"""

from __future__ import annotations

import sqlite3
import threading
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from typing import Any

from ..errors import ConfigError
from .runlog import iso

FILENAME = "campaigns.sqlite"

SCHEMA = """
CREATE TABLE IF NOT EXISTS acqd_campaigns (
    name TEXT PRIMARY KEY, profile TEXT NOT NULL, profile_sha256 TEXT NOT NULL, spec_json TEXT NOT NULL,
    schedule TEXT NOT NULL, store TEXT NOT NULL, anchor_utc TEXT NOT NULL, total_slots INTEGER,
    steps_per_slot INTEGER NOT NULL, created_utc TEXT NOT NULL, finished_utc TEXT);
CREATE TABLE IF NOT EXISTS acqd_slots (
    campaign TEXT NOT NULL, slot INTEGER NOT NULL, first_slot INTEGER NOT NULL, scheduled_utc TEXT,
    state TEXT NOT NULL, started_utc TEXT, finished_utc TEXT, faults INTEGER NOT NULL DEFAULT 0, note TEXT,
    PRIMARY KEY (campaign, slot));
CREATE INDEX IF NOT EXISTS acqd_slots_by_state ON acqd_slots (campaign, state);
CREATE TABLE IF NOT EXISTS acqd_records (
    campaign TEXT NOT NULL, slot INTEGER NOT NULL, step INTEGER NOT NULL, record_index INTEGER NOT NULL,
    utc TEXT NOT NULL, verdict TEXT NOT NULL, PRIMARY KEY (campaign, slot, step));
"""

SLOT_STATES = ("running", "done", "failed", "missed")


@dataclass(frozen=True)
class CampaignRow:
    name: str
    profile: str
    profile_sha256: str
    spec_json: str
    schedule: str
    store: str
    anchor_utc: str
    total_slots: int | None
    steps_per_slot: int
    created_utc: str
    finished_utc: str | None


@dataclass(frozen=True)
class SlotRow:
    """One slot, or (state ``missed``) the run of missed slots ``first_slot``..``slot``."""

    campaign: str
    slot: int
    first_slot: int
    scheduled_utc: str | None
    state: str
    started_utc: str | None
    finished_utc: str | None
    faults: int
    note: str | None


def verdict_text(analysis: dict[str, Any] | None) -> str:
    """``pass``, ``fail``, ``untested`` (no tolerance to judge by) or ``""`` (not compared), as the ledger
    keeps it, from the comparator's result stored with the record."""
    verdict = (analysis or {}).get("verdict")
    return verdict if isinstance(verdict, str) else ""


def open_database(path: Path, *, readonly: bool = False, settled: bool = False) -> sqlite3.Connection:
    """A connection to ``path``, refused in one line when the file is not an SQLite database.

    ``settled`` (read-only): no process writes the database and it has no write-ahead log, so it is opened
    as immutable. A plain read-only connection to a WAL database creates ``-wal`` and ``-shm`` files that
    only a writer removes (sqlite.org/wal.html), and ``acqd status`` after a clean stop would leave them."""
    try:
        if readonly:
            uri = f"{Path(path).absolute().as_uri()}?mode=ro" + ("&immutable=1" if settled else "")
            conn = sqlite3.connect(uri, uri=True, timeout=10.0, check_same_thread=False)
        else:
            conn = sqlite3.connect(path, timeout=10.0, check_same_thread=False)
        conn.execute("PRAGMA schema_version").fetchone()  # reads the header: fails on a non-database
    except sqlite3.DatabaseError as exc:
        raise ConfigError(str(path), "", f"is not a usable SQLite database ({exc}); move it away or give "
                                         "another --data-dir directory") from None
    return conn


class Ledger:
    """Thread-safe (one lock around one connection): each campaign's worker thread writes its own rows."""

    def __init__(self, path: str | Path) -> None:
        self.path = Path(path)
        self._conn = open_database(self.path)
        self._lock = threading.Lock()
        try:
            self._conn.execute("PRAGMA journal_mode=WAL")
            self._conn.execute("PRAGMA synchronous=NORMAL")
            self._conn.executescript(SCHEMA)
        except sqlite3.DatabaseError as exc:
            raise ConfigError(str(self.path), "", f"is not a usable campaign database ({exc})") from None

    def _write(self, sql: str, params: tuple[Any, ...]) -> None:
        with self._lock, self._conn:
            self._conn.execute(sql, params)

    def _read(self, sql: str, params: tuple[Any, ...] = ()) -> list[tuple[Any, ...]]:
        with self._lock:
            return self._conn.execute(sql, params).fetchall()

    # -- campaigns ---------------------------------------------------------------------------------
    def campaign(self, name: str) -> CampaignRow | None:
        rows = self._read("SELECT * FROM acqd_campaigns WHERE name = ?", (name,))
        return CampaignRow(*rows[0]) if rows else None

    def campaigns(self) -> list[CampaignRow]:
        return [CampaignRow(*r) for r in self._read("SELECT * FROM acqd_campaigns ORDER BY created_utc")]

    def add_campaign(self, row: CampaignRow) -> None:
        self._write("INSERT INTO acqd_campaigns VALUES (?,?,?,?,?,?,?,?,?,?,?)", tuple(row.__dict__.values()))

    def update_profile(self, name: str, sha256: str) -> None:
        self._write("UPDATE acqd_campaigns SET profile_sha256 = ? WHERE name = ?", (sha256, name))

    def finish_campaign(self, name: str, when: datetime) -> None:
        self._write("UPDATE acqd_campaigns SET finished_utc = ? WHERE name = ?", (iso(when), name))

    # -- slots -------------------------------------------------------------------------------------
    def last_slot(self, campaign: str) -> SlotRow | None:
        rows = self._read("SELECT * FROM acqd_slots WHERE campaign = ? ORDER BY slot DESC LIMIT 1", (campaign,))
        return SlotRow(*rows[0]) if rows else None

    def running_slots(self, campaign: str) -> list[SlotRow]:
        """Slots begun and not ended, oldest first: after a kill there can be two (the keeper may not have
        booked the end of the slot before the one the runner was in).

        The runner asks before every slot, so this must not grow with the campaign: ``+slot`` keeps SQLite
        from walking the primary key (campaign, slot) - every slot the campaign ever had - to save sorting
        the one or two rows that ``acqd_slots_by_state`` finds (0.4 ms a query at 2,000 slots, 0.01 ms)."""
        return [SlotRow(*r) for r in self._read("SELECT * FROM acqd_slots WHERE campaign = ? AND state = 'running' "
                                                 "ORDER BY +slot", (campaign,))]

    def slots(self, campaign: str) -> list[SlotRow]:
        return [SlotRow(*r) for r in self._read("SELECT * FROM acqd_slots WHERE campaign = ? ORDER BY slot",
                                                 (campaign,))]

    def begin_slot(self, campaign: str, slot: int, scheduled: datetime | None, started: datetime) -> None:
        self._write("INSERT INTO acqd_slots (campaign, slot, first_slot, scheduled_utc, state, started_utc) "
                    "VALUES (?,?,?,?, 'running', ?)", (campaign, slot, slot, iso(scheduled), iso(started)))

    def end_slot(self, campaign: str, slot: int, state: str, when: datetime, faults: int, note: str = "") -> None:
        assert state in SLOT_STATES
        self._write("UPDATE acqd_slots SET state = ?, finished_utc = ?, faults = ?, note = ? "
                    "WHERE campaign = ? AND slot = ?", (state, iso(when), faults, note or None, campaign, slot))

    def mark_missed(self, campaign: str, first: int, last: int, scheduled: datetime | None, when: datetime,
                    note: str) -> None:
        """Slots ``first``..``last`` missed, as one row (a week's outage at a short interval stays small);
        ``scheduled`` is the first one's time."""
        self._write("INSERT INTO acqd_slots (campaign, slot, first_slot, scheduled_utc, state, finished_utc, note) "
                    "VALUES (?,?,?,?,'missed',?,?)", (campaign, last, first, iso(scheduled), iso(when), note))

    # -- records -----------------------------------------------------------------------------------
    def add_record(self, campaign: str, slot: int, step: int, index: int, utc: str, verdict: str) -> None:
        self._write("INSERT OR IGNORE INTO acqd_records VALUES (?,?,?,?,?,?)",
                    (campaign, slot, step, index, utc, verdict))

    def steps_stored(self, campaign: str, slot: int) -> set[int]:
        return {r[0] for r in self._read("SELECT step FROM acqd_records WHERE campaign = ? AND slot = ?",
                                         (campaign, slot))}

    def record_indices(self, campaign: str) -> set[int]:
        return {r[0] for r in self._read("SELECT record_index FROM acqd_records WHERE campaign = ?", (campaign,))}

    def close(self) -> None:
        with self._lock:
            self._conn.close()
