"""The keeper: compares, stores and books a campaign's records in order, in a thread of its own.

Why a thread: the comparator and the store's fsync cost about a quarter of a fast step test, and the bench
would wait for them. With the keeper, the next step test starts while the last record is being compared
and written; on a real bench, where a step test mostly waits for the instruments, they overlap fully.
The comparing itself is done by the campaign's comparator process (``comparing``): the keeper only waits
for its answer, which leaves the interpreter to the step test. The queue is short (``QUEUE_LENGTH``), so at
most that many records wait in memory.

Per record, in order: tag it with the campaign, slot and step; compare it with the DUT model (the result
goes into ``record.analysis``); append it to the store (durable when ``append`` returns); enter it in the
ledger and the run log. A kill loses at most the records still queued - none of them acknowledged - and
the ledger still shows their slot running, so the next start acquires exactly the missing steps again.
"""

from __future__ import annotations

import queue
import threading
import traceback
from collections import defaultdict
from collections.abc import Callable
from dataclasses import dataclass
from datetime import datetime
from typing import Any

from ..record import Record
from ..store import RecordStore
from .ledger import Ledger, verdict_text
from .runlog import RunLog, describe, iso, utc_now
from .spec import Step

QUEUE_LENGTH = 2
RUNLOG_SYNC_S = 1.0


@dataclass(frozen=True)
class Acquired:
    record: Record
    slot: int
    step: Step
    scheduled: datetime | None


@dataclass(frozen=True)
class SlotEnd:
    """The acquisition side is through with ``slot``: ``error`` when it gave up, ``interrupted`` on a stop."""

    slot: int
    started: datetime
    faults: int
    error: str | None = None
    interrupted: bool = False


class Keeper:
    def __init__(self, name: str, store: RecordStore, reopen: Callable[[], RecordStore], ledger: Ledger,
                 runlog: RunLog, judge: Callable[[Record], dict[str, Any]] | None) -> None:
        self.name, self.store, self._reopen, self.ledger, self.runlog, self.judge = (
            name, store, reopen, ledger, runlog, judge)
        self.pending_end: set[int] = set()  # slots whose end is queued but not yet in the ledger
        self._queue: queue.Queue[Acquired | SlotEnd | None] = queue.Queue(QUEUE_LENGTH)
        self._verdicts: dict[int, list[str]] = defaultdict(list)
        self._faults: dict[int, int] = defaultdict(int)
        self._errors: dict[int, str] = {}
        self._thread = threading.Thread(target=self._loop, name=f"keeper-{name}", daemon=True)
        self._thread.start()

    def _log(self, event: str, **fields: Any) -> None:
        self.runlog.write(event, self.name, **fields)

    # -- the acquisition side -----------------------------------------------------------------------
    def put(self, item: Acquired | SlotEnd) -> None:
        """Queue a record or a slot's end; waits while the queue is full."""
        if isinstance(item, SlotEnd) and not item.interrupted:
            self.pending_end.add(item.slot)  # before the ledger can show it, see CampaignRunner._position
        self._queue.put(item)

    def drain(self) -> None:
        """Wait until everything queued is stored and booked."""
        self._queue.join()

    def stop(self) -> None:
        """Keep what is queued, then end the thread; safe to call twice."""
        if self._thread.is_alive():
            self._queue.put(None)
            self._thread.join()

    # -- the keeper thread --------------------------------------------------------------------------
    def _loop(self) -> None:
        while True:
            item = self._queue.get()
            try:
                if item is None:
                    return
                if isinstance(item, Acquired):
                    self._keep(item)
                else:
                    self._end(item)
            except Exception as exc:  # noqa: BLE001 - a bug here must not stop the campaign; it is logged
                self._log("fault", what="keeper", error=describe(exc),
                          traceback=traceback.format_exc(limit=6).splitlines()[-6:])
            finally:
                self._queue.task_done()

    def _keep(self, item: Acquired) -> None:
        record, slot, step = item.record, item.slot, item.step
        record.settings = {**record.settings, "campaign": {
            "name": self.name, "slot": slot, "step": step.number, "scheduled_utc": iso(item.scheduled),
            "setting": step.setting}}
        record.analysis = self._analyse(record, slot, step)
        index = self._append(record, slot, step)
        if index is None:
            return
        verdict = verdict_text(record.analysis)
        self.ledger.add_record(self.name, slot, step.number, index, record.utc, verdict)
        self._verdicts[slot].append(verdict)
        reasons = (record.analysis or {}).get("reasons") if verdict == "fail" else None
        self._log("record", slot=slot, step=step.number, index=index, setting=step.label,
                  verdict=verdict or "not compared", **({"reasons": reasons} if reasons else {}))

    def _analyse(self, record: Record, slot: int, step: Step) -> dict[str, Any] | None:
        """The comparator's result; a comparator failure is logged and stored, never a lost record."""
        if self.judge is None:
            return None
        try:
            return self.judge(record)
        except Exception as exc:  # noqa: BLE001 - the measurement is kept whatever the analysis does
            self._log("fault", slot=slot, step=step.number, what="compare", error=describe(exc))
            return {"error": describe(exc)}

    def _append(self, record: Record, slot: int, step: Step) -> int | None:
        """The record's index once durable; after a failed append the store is reopened (which recovers
        it) and tried once more; None (and the slot marked failed) if that fails too."""
        for attempt in (1, 2):
            try:
                if attempt == 2:
                    self.store.close()
                    self.store = self._reopen()
                return self.store.append(record)
            except Exception as exc:  # noqa: BLE001 - one reopen is worth a try before the slot is given up
                self._faults[slot] += 1
                self._log("fault", slot=slot, step=step.number, what="store", attempt=attempt, error=describe(exc))
                if attempt == 2:
                    self._errors[slot] = f"store: {describe(exc)}"
        return None

    def _end(self, end: SlotEnd) -> None:
        verdicts = self._verdicts.pop(end.slot, [])
        faults = end.faults + self._faults.pop(end.slot, 0)
        error = end.error or self._errors.pop(end.slot, None)
        if end.interrupted:
            self._log("slot_interrupted", slot=end.slot, note="stop requested; the slot is completed on the next start")
        elif error:
            self.ledger.end_slot(self.name, end.slot, "failed", utc_now(), faults, error)
            self._log("slot_failed", slot=end.slot, faults=faults, error=error)
        else:
            self.ledger.end_slot(self.name, end.slot, "done", utc_now(), faults)
            self._log("slot_done", slot=end.slot, records=len(verdicts), faults=faults,
                      verdicts={v or "not compared": verdicts.count(v) for v in sorted(set(verdicts))},
                      duration_s=(utc_now() - end.started).total_seconds())
        self.pending_end.discard(end.slot)  # after the ledger has it
        self.runlog.sync(at_most_every_s=RUNLOG_SYNC_S)
