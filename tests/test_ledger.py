"""The campaign ledger against SQLite itself: what each call leaves in ``campaigns.sqlite``, read back through
a second, independent connection (Python's sqlite3 on the same file, as ``acqd status`` or any SQLite tool
would read it), and what survives a SIGKILL of the writing process.

Sources: SQLite's documentation (sqlite.org/wal.html: WAL mode, and that a reader of a WAL database creates
``-wal`` and ``-shm`` files unless it opens the file immutable, and sqlite.org/uri.html: an ``immutable``
connection assumes the file never changes, so it reads no write-ahead log; sqlite.org/pragma.html: ``journal_mode``
answers ``wal``, ``synchronous`` NORMAL is 1; sqlite.org/lang_insert.html: ``INSERT OR IGNORE`` keeps the row
already there on a primary-key conflict; sqlite.org/lang_transaction.html: ``BEGIN IMMEDIATE`` takes the write
lock at once, and another connection's write waits for it as long as its busy timeout allows; sqlite.org/wal.html,
"Sometimes Queries Return SQLITE_BUSY In WAL Mode": a connection in exclusive locking mode makes every other
connection's queries busy; docs.python.org, sqlite3.connect: the busy timeout is 5 s unless given).
"""

from __future__ import annotations

import signal
import sqlite3
import subprocess
import sys
import threading
import time
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest

from acqd.campaign.ledger import CampaignRow, Ledger, SlotRow, open_database, verdict_text
from acqd.errors import ConfigError

T0 = datetime(2026, 5, 1, 12, 0, tzinfo=UTC)


def campaign_row(name: str = "night", created: datetime = T0) -> CampaignRow:
    return CampaignRow(name, "profiles/demo.toml", "ab" * 32, "{}", "every 10 min", "data/night.h5",
                       "2026-05-01T12:00:00.000000+00:00", 6, 2, created.isoformat(timespec="microseconds"), None)


def other(path: Path, sql: str, params: tuple = ()) -> list[tuple]:
    """Rows as a second connection sees them: only what the ledger committed."""
    conn = sqlite3.connect(path)
    try:
        return conn.execute(sql, params).fetchall()
    finally:
        conn.close()


@pytest.fixture
def ledger(tmp_path: Path):
    led = Ledger(tmp_path / "campaigns.sqlite")
    yield led
    led.close()


def test_the_database_is_in_wal_mode_with_synchronous_normal(ledger):
    # sqlite.org/pragma.html: journal_mode is persistent in the file and reads back as "wal"; synchronous is
    # per connection, NORMAL = 1.
    assert other(ledger.path, "PRAGMA journal_mode") == [("wal",)]
    assert ledger._conn.execute("PRAGMA synchronous").fetchone() == (1,)


def test_campaigns_are_committed_and_read_back_in_creation_order(ledger):
    ledger.add_campaign(campaign_row("later", T0 + timedelta(hours=1)))
    ledger.add_campaign(campaign_row("first", T0))
    assert other(ledger.path, "SELECT name, total_slots, steps_per_slot FROM acqd_campaigns ORDER BY name") == [
        ("first", 6, 2), ("later", 6, 2)]
    assert [c.name for c in ledger.campaigns()] == ["first", "later"]  # by created_utc, not by insertion
    assert ledger.campaign("first") == campaign_row("first", T0) and ledger.campaign("none") is None
    ledger.update_profile("first", "cd" * 32)
    ledger.finish_campaign("first", T0 + timedelta(days=1))
    assert other(ledger.path, "SELECT profile_sha256, finished_utc FROM acqd_campaigns WHERE name = 'first'") == [
        ("cd" * 32, "2026-05-02T12:00:00.000000+00:00")]  # ISO 8601 UTC with microseconds
    assert ledger.campaign("later").finished_utc is None and ledger.campaign("later").profile_sha256 == "ab" * 32


def test_a_slot_runs_then_ends_with_its_state_faults_and_note(ledger):
    ledger.begin_slot("night", 3, T0, T0 + timedelta(seconds=2))
    (row,) = ledger.running_slots("night")
    assert row == SlotRow("night", 3, 3, "2026-05-01T12:00:00.000000+00:00", "running",
                          "2026-05-01T12:00:02.000000+00:00", None, 0, None)
    ledger.end_slot("night", 3, "failed", T0 + timedelta(seconds=9), 2, "scope timed out")
    assert ledger.running_slots("night") == []
    assert other(ledger.path, "SELECT state, finished_utc, faults, note FROM acqd_slots") == [
        ("failed", "2026-05-01T12:00:09.000000+00:00", 2, "scope timed out")]
    ledger.begin_slot("night", 4, None, T0)
    ledger.end_slot("night", 4, "done", T0, 0)
    assert ledger.slots("night")[1].note is None and ledger.slots("night")[1].scheduled_utc is None  # "" is no note
    with pytest.raises(AssertionError):
        ledger.end_slot("night", 4, "finished", T0, 0)  # not one of the slot states


def test_running_slots_are_listed_oldest_first_and_per_campaign(ledger):
    for slot in (7, 5, 6):
        ledger.begin_slot("night", slot, T0, T0)
    ledger.begin_slot("day", 1, T0, T0)
    ledger.end_slot("night", 6, "done", T0, 0)
    assert [s.slot for s in ledger.running_slots("night")] == [5, 7]
    assert [s.slot for s in ledger.slots("night")] == [5, 6, 7]
    assert ledger.last_slot("night").slot == 7 and ledger.last_slot("day").slot == 1
    assert ledger.last_slot("none") is None and ledger.slots("none") == []


def test_a_run_of_missed_slots_is_one_row_from_the_first_to_the_last(ledger):
    ledger.mark_missed("night", 10, 19, T0, T0 + timedelta(hours=2), "daemon not running")
    (row,) = ledger.slots("night")
    assert (row.first_slot, row.slot, row.state, row.note) == (10, 19, "missed", "daemon not running")
    assert (row.scheduled_utc, row.started_utc, row.finished_utc) == (
        "2026-05-01T12:00:00.000000+00:00", None, "2026-05-01T14:00:00.000000+00:00")
    assert ledger.last_slot("night").slot == 19 and ledger.running_slots("night") == []


def test_a_record_is_entered_once_and_a_second_entry_changes_nothing(ledger):
    ledger.add_record("night", 2, 0, 40, "2026-05-01T12:20:00.000000+00:00", "pass")
    ledger.add_record("night", 2, 1, 41, "2026-05-01T12:20:05.000000+00:00", "")
    ledger.add_record("night", 2, 0, 99, "later", "fail")  # reconciliation re-entering a step: ignored
    ledger.add_record("night", 3, 0, 42, "2026-05-01T12:30:00.000000+00:00", "fail")
    ledger.add_record("day", 2, 0, 7, "2026-05-01T12:20:00.000000+00:00", "pass")
    assert other(ledger.path, "SELECT * FROM acqd_records WHERE campaign = 'night' AND step = 0 AND slot = 2") == [
        ("night", 2, 0, 40, "2026-05-01T12:20:00.000000+00:00", "pass")]
    assert ledger.steps_stored("night", 2) == {0, 1} and ledger.steps_stored("night", 4) == set()
    assert ledger.record_indices("night") == {40, 41, 42} and ledger.record_indices("day") == {7}


def test_verdict_text_reads_the_comparators_verdict_or_nothing():
    assert [verdict_text(a) for a in ({"verdict": "pass"}, {"verdict": "fail"}, {"verdict": "untested"})] == [
        "pass", "fail", "untested"]
    assert verdict_text(None) == "" and verdict_text({}) == "" and verdict_text({"verdict": None}) == ""
    assert verdict_text({"verdict": 1}) == ""  # not text: nothing the ledger could keep


CHILD = """
import sys
from datetime import UTC, datetime
from acqd.campaign.ledger import Ledger
led = Ledger(sys.argv[1])
now = datetime(2026, 5, 1, 12, 0, tzinfo=UTC)
led.begin_slot("night", 1, now, now)
led.add_record("night", 1, 0, 0, "2026-05-01T12:00:01.000000+00:00", "pass")
led.end_slot("night", 1, "done", now, 0)
led.begin_slot("night", 2, now, now)
print("written", flush=True)
sys.stdin.read()  # wait to be killed
"""


def test_every_change_survives_a_sigkill_of_the_writer(tmp_path: Path):
    path = tmp_path / "campaigns.sqlite"
    child = subprocess.Popen([sys.executable, "-c", CHILD, str(path)], stdin=subprocess.PIPE,
                             stdout=subprocess.PIPE, text=True)
    try:
        assert child.stdout.readline() == "written\n"
    finally:
        child.kill()
        child.wait(timeout=10)
        child.stdin.close()
        child.stdout.close()
    assert child.returncode == -signal.SIGKILL
    led = Ledger(path)  # the next daemon: slot 1 complete with its record, slot 2 interrupted
    try:
        assert [(s.slot, s.state) for s in led.slots("night")] == [(1, "done"), (2, "running")]
        assert led.steps_stored("night", 1) == {0} and [s.slot for s in led.running_slots("night")] == [2]
    finally:
        led.close()


def test_a_file_that_is_not_a_database_is_refused_in_one_line(tmp_path: Path):
    path = tmp_path / "campaigns.sqlite"
    path.write_bytes(b"this is not an SQLite file, it is text" * 50)
    for opened in (lambda: Ledger(path), lambda: open_database(path), lambda: open_database(path, readonly=True)):
        with pytest.raises(ConfigError) as err:
            opened()
        assert err.value.source == str(path) and err.value.field == ""
        assert err.value.problem.startswith("is not a usable SQLite database (")
        assert err.value.problem.endswith("; move it away or give another --data-dir directory")  # what to do
        assert "\n" not in str(err.value)


def test_a_database_whose_tables_do_not_fit_is_refused_in_one_line(tmp_path: Path):
    # An SQLite file with an acqd_slots table of another shape: CREATE TABLE IF NOT EXISTS leaves it, and
    # the index on (campaign, state) cannot be made.
    path = tmp_path / "campaigns.sqlite"
    conn = sqlite3.connect(path)
    conn.execute("CREATE TABLE acqd_slots (something_else TEXT)")
    conn.commit()
    conn.close()
    with pytest.raises(ConfigError) as err:
        Ledger(path)
    assert (err.value.source, err.value.field) == (str(path), "")
    assert err.value.problem.startswith("is not a usable campaign database (") and "\n" not in str(err.value)


def test_a_reader_of_a_running_daemons_database_sees_its_commits(ledger):
    # Not settled (a writer is running, its last commits are in the -wal file): the read-only connection
    # must read the log, so it is not immutable.
    ledger.begin_slot("night", 1, T0, T0)
    conn = open_database(ledger.path, readonly=True)
    try:
        assert conn.execute("SELECT slot, state FROM acqd_slots").fetchall() == [(1, "running")]
        ledger.end_slot("night", 1, "done", T0, 0)
        assert conn.execute("SELECT state FROM acqd_slots").fetchall() == [("done",)]  # and later ones
    finally:
        conn.close()


def started_in_thread(job):
    """Start ``job`` in another thread; the function returned waits for it and re-raises what it raised."""
    failures: list[BaseException] = []

    def run() -> None:
        try:
            job()
        except BaseException as exc:  # noqa: BLE001 - handed to the test's thread
            failures.append(exc)

    thread = threading.Thread(target=run)
    thread.start()

    def finish() -> None:
        thread.join(timeout=30)
        if failures:
            raise failures[0]
    return finish


def in_thread(job) -> None:
    """Run ``job`` in another thread and re-raise what it raised there."""
    started_in_thread(job)()


def test_the_ledger_and_a_reader_serve_other_threads(ledger):
    # Each campaign's worker thread writes through the one ledger, and the daemon's live view reads from
    # its refresh thread: sqlite3 connections refuse other threads unless made with check_same_thread=False.
    in_thread(lambda: ledger.begin_slot("night", 1, T0, T0))
    assert [s.slot for s in ledger.running_slots("night")] == [1]
    conn = open_database(ledger.path, readonly=True)
    try:
        in_thread(lambda: conn.execute("SELECT * FROM acqd_slots").fetchall())
    finally:
        conn.close()


def test_a_read_only_connection_cannot_write_and_a_settled_one_leaves_no_wal_files(tmp_path: Path):
    path = tmp_path / "campaigns.sqlite"
    led = Ledger(path)
    led.begin_slot("night", 1, T0, T0)
    led.close()  # the last connection to close checkpoints and removes -wal and -shm (sqlite.org/wal.html)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["campaigns.sqlite"]
    conn = open_database(path, readonly=True, settled=True)
    try:
        assert conn.execute("SELECT slot, state FROM acqd_slots").fetchall() == [(1, "running")]
        with pytest.raises(sqlite3.OperationalError, match="readonly"):
            conn.execute("DELETE FROM acqd_slots")
    finally:
        conn.close()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["campaigns.sqlite"]  # immutable: nothing created
    conn = open_database(path, readonly=True)
    try:
        with pytest.raises(sqlite3.OperationalError, match="readonly"):
            conn.execute("DELETE FROM acqd_slots")
    finally:
        conn.close()


# sqlite3's default busy timeout (docs.python.org, sqlite3.connect): a lock held longer than this makes a
# connection made without a timeout fail with "database is locked".
SQLITE3_DEFAULT_TIMEOUT_S = 5.0
HELD_S = SQLITE3_DEFAULT_TIMEOUT_S + 0.6


def hold_lock(path: Path, exclusive: bool, held_s: float) -> threading.Thread:
    """Another program's connection holding ``path`` locked for ``held_s``: the write lock (``BEGIN
    IMMEDIATE``, a writer of a WAL database) or, ``exclusive``, the whole file (exclusive locking mode, after
    one write). Returns once the lock is taken; the thread commits and closes when the time is up."""
    locked = threading.Event()

    def hold() -> None:
        conn = sqlite3.connect(path, isolation_level=None)
        try:
            if exclusive:
                conn.execute("PRAGMA locking_mode=EXCLUSIVE")
            conn.execute("BEGIN EXCLUSIVE" if exclusive else "BEGIN IMMEDIATE")
            conn.execute("DELETE FROM acqd_slots WHERE slot < 0")
            if exclusive:
                conn.execute("COMMIT")  # exclusive mode keeps the file locked after the commit
            locked.set()
            time.sleep(held_s)
            if conn.in_transaction:
                conn.execute("COMMIT")
        finally:
            locked.set()
            conn.close()

    thread = threading.Thread(target=hold)
    thread.start()
    locked.wait()
    return thread


def test_a_lock_held_past_sqlites_default_timeout_is_waited_out(tmp_path: Path):
    # Another program (an SQLite tool, a second reader) may hold the database for a few seconds: the daemon's
    # write must wait for the write lock and succeed, and so must a read-only connection (acqd status) opened
    # while the file is locked exclusively, rather than fail at sqlite3's default 5 s. Two databases, so both
    # waits run side by side (an exclusive lock cannot be taken while the ledger's connection is open).
    written = Ledger(tmp_path / "written.sqlite")
    read_path = tmp_path / "read.sqlite"
    reader_side = Ledger(read_path)
    reader_side.begin_slot("night", 1, T0, T0)
    reader_side.close()
    start = time.monotonic()
    holders = [hold_lock(written.path, False, HELD_S), hold_lock(read_path, True, HELD_S)]
    seen: list[list[tuple]] = []
    waited_s: dict[str, float] = {}

    def read() -> None:
        conn = open_database(read_path, readonly=True)
        try:
            seen.append(conn.execute("SELECT slot, state FROM acqd_slots").fetchall())
        finally:
            conn.close()
        waited_s["read"] = time.monotonic() - start

    try:
        finish_reading = started_in_thread(read)
        written.begin_slot("night", 1, T0, T0)
        waited_s["write"] = time.monotonic() - start
        finish_reading()
    finally:
        for holder in holders:
            holder.join(timeout=30)
        written.close()
    assert seen == [[(1, "running")]]
    assert other(written.path, "SELECT slot, state FROM acqd_slots") == [(1, "running")]
    assert min(waited_s.values()) > SQLITE3_DEFAULT_TIMEOUT_S  # both did wait past the default, and succeeded
