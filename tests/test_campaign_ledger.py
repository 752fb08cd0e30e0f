"""The ledger queries the runner makes before every slot stay bounded as a campaign grows: each reaches
its rows through an index search, never a walk over every slot the campaign has had.

The plans are SQLite's own (``EXPLAIN QUERY PLAN``, sqlite.org/eqp.html): ``SEARCH ... USING INDEX`` with
the constrained columns named, and ``USE TEMP B-TREE FOR ORDER BY`` where the rows found are sorted
afterwards. That a unary ``+`` on an ORDER BY term keeps the planner from using an index to deliver that
order is from SQLite's query-optimiser overview (sqlite.org/optoverview.html), from memory.
"""

from __future__ import annotations

from collections.abc import Callable
from datetime import UTC, datetime, timedelta
from pathlib import Path

from acqd.campaign.ledger import Ledger

T0 = datetime(2026, 1, 1, tzinfo=UTC)


def _campaign_of(ledger: Ledger, slots: int, running: tuple[int, ...]) -> None:
    """``slots`` slots of campaign "night", all done except ``running``; begun newest first, so the table's
    own order is not the slot order."""
    for slot in range(slots, 0, -1):
        moment = T0 + timedelta(seconds=slot)
        ledger.begin_slot("night", slot, moment, moment)
        if slot not in running:
            ledger.end_slot("night", slot, "done", moment, 0)


def _plan_of(ledger: Ledger, query: Callable[[], object]) -> str:
    """The plan of the one statement ``query`` runs, caught as the ledger's connection executes it."""
    seen: list[str] = []
    ledger._conn.set_trace_callback(seen.append)
    try:
        query()
    finally:
        ledger._conn.set_trace_callback(None)
    assert len(seen) == 1, seen
    sql = seen[0].replace("'night'", "?")  # the trace shows the statement with its parameter bound
    return " | ".join(row[-1] for row in ledger._read("EXPLAIN QUERY PLAN " + sql, ("night",)))


def test_running_slots_come_oldest_first_from_the_state_index(tmp_path: Path) -> None:
    ledger = Ledger(tmp_path / "campaigns.sqlite")
    _campaign_of(ledger, 300, running=(250, 17))
    assert [row.slot for row in ledger.running_slots("night")] == [17, 250]
    plan = _plan_of(ledger, lambda: ledger.running_slots("night"))
    # The index on (campaign, state) finds the running rows; the primary key (campaign, slot) would walk all 300.
    assert "USING INDEX acqd_slots_by_state (campaign=? AND state=?)" in plan, plan
    assert "sqlite_autoindex_acqd_slots_1" not in plan, plan
    ledger.close()


def test_last_slot_is_one_step_down_the_primary_key(tmp_path: Path) -> None:
    ledger = Ledger(tmp_path / "campaigns.sqlite")
    _campaign_of(ledger, 300, running=())
    assert ledger.last_slot("night").slot == 300
    plan = _plan_of(ledger, lambda: ledger.last_slot("night"))
    assert "USING INDEX sqlite_autoindex_acqd_slots_1 (campaign=?)" in plan, plan
    assert "TEMP B-TREE" not in plan, plan  # the key's own order: no sort of every row
    ledger.close()
