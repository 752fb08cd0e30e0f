"""The slot grid: when slot n is due, which slot is due now, and when the campaign is over.

Slots are numbered from 1 by their place in the schedule, not by how many ran: slot n of an interval
campaign is due at anchor + (n-1)·every_s whatever happened before it. So after a night with the daemon
down for an hour, the slots of that hour are the *same* numbered slots, handled by the late-slot policy and
recorded, and the slots after it keep their times. The scheduler (APScheduler) only wakes the daemon; the
grid decides which slot a wake-up is for, so a wake-up that APScheduler dropped or delayed (a slot that
overran the next one, a restart) cannot shift or lose a slot.
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from typing import Protocol

from apscheduler.triggers.base import BaseTrigger
from apscheduler.triggers.date import DateTrigger
from apscheduler.triggers.interval import IntervalTrigger

from .spec import CampaignSpec

# Counting a cron campaign's slots up to its `until` is a walk over every firing; past this many the total
# is reported as unknown rather than making every start-up slow.
MAX_COUNTED_CRON_SLOTS = 20_000
_TICK = timedelta(microseconds=1)


class Grid(Protocol):
    total: int | None  # number of slots, when known

    def time_of(self, slot: int) -> datetime | None: ...
    def due(self, now: datetime, last: int) -> int: ...
    def finished(self, last: int, now: datetime) -> bool: ...
    def trigger(self) -> BaseTrigger: ...


def microseconds(seconds: float) -> timedelta:
    """An interval rounded to whole microseconds, the resolution of datetime (and so of the grid)."""
    return timedelta(microseconds=round(seconds * 1e6))


class IntervalGrid:
    """Slot n at ``anchor + (n-1)·every``; closed form, so a restart years later costs nothing."""

    def __init__(self, anchor: datetime, every_s: float, slots: int | None, until: datetime | None) -> None:
        self.anchor, self.every = anchor, microseconds(every_s)
        self.total = slots if slots is not None else max(0, (until - anchor) // self.every + 1)

    def time_of(self, slot: int) -> datetime | None:
        return self.anchor + (slot - 1) * self.every if 1 <= slot <= self.total else None

    def due(self, now: datetime, last: int) -> int:
        """The highest slot whose time has come (0 before the first), never past the last slot."""
        if now < self.anchor:
            return 0
        return min(self.total, (now - self.anchor) // self.every + 1)

    def finished(self, last: int, now: datetime) -> bool:
        return last >= self.total

    def trigger(self) -> BaseTrigger:
        end = self.time_of(self.total) or self.anchor
        return IntervalTrigger(seconds=self.every.total_seconds(), start_date=self.anchor, end_date=end,
                               timezone=UTC)


class CronGrid:
    """Slot n at the n-th firing of the crontab line at or after the anchor, walked forward and cached.

    ``seed`` (a slot number and its time, from the ledger) lets a restart walk on from the last slot
    handled instead of from the campaign's first one.
    """

    def __init__(self, spec: CampaignSpec, anchor: datetime, seed: tuple[int, datetime] | None = None) -> None:
        self._trigger = spec.cron_trigger(start=anchor, end=spec.until)
        self._times: dict[int, datetime] = {}
        first = self._trigger.get_next_fire_time(None, anchor)
        if seed is not None:
            self._times[seed[0]] = seed[1]
        elif first is not None:
            self._times[1] = first
        self._slots = spec.slots
        self.total = spec.slots if spec.slots is not None else self._count_until()

    def _next_after(self, moment: datetime) -> datetime | None:
        return self._trigger.get_next_fire_time(None, moment + _TICK)

    def time_of(self, slot: int) -> datetime | None:
        if self._slots is not None and slot > self._slots:
            return None
        known = max((n for n in self._times if n <= slot), default=None)
        if known is None:
            return None
        moment: datetime | None = self._times[known]
        for n in range(known + 1, slot + 1):
            moment = self._next_after(moment)
            if moment is None:
                return None
            self._times[n] = moment
        return moment

    def due(self, now: datetime, last: int) -> int:
        slot = max(last, min(self._times, default=1) - 1)
        while (moment := self.time_of(slot + 1)) is not None and moment <= now:
            slot += 1
        return slot

    def finished(self, last: int, now: datetime) -> bool:
        return self.time_of(last + 1) is None

    def _count_until(self) -> int | None:
        last = max(self._times, default=0)
        while last < MAX_COUNTED_CRON_SLOTS:
            if self.time_of(last + 1) is None:
                return last
            last += 1
        return None

    def trigger(self) -> BaseTrigger:
        return self._trigger


class BackToBackGrid:
    """No clock: the next slot is due as soon as the previous one is over (and not before ``start``)."""

    def __init__(self, slots: int | None, until: datetime | None, start: datetime | None = None) -> None:
        self.total, self.until, self.start = slots, until, start

    def time_of(self, slot: int) -> datetime | None:
        return None

    def due(self, now: datetime, last: int) -> int:
        waiting = self.start is not None and now < self.start
        return last if waiting or self.finished(last, now) else last + 1

    def finished(self, last: int, now: datetime) -> bool:
        return (self.total is not None and last >= self.total) or (self.until is not None and now >= self.until)

    def trigger(self) -> BaseTrigger:
        return DateTrigger(run_date=max(datetime.now(UTC), self.start or datetime.now(UTC)), timezone=UTC)


def make_grid(spec: CampaignSpec, anchor: datetime, seed: tuple[int, datetime] | None = None) -> Grid:
    if spec.schedule == "interval":
        assert spec.every_s is not None
        return IntervalGrid(anchor, spec.every_s, spec.slots, spec.until)
    if spec.schedule == "cron":
        return CronGrid(spec, anchor, seed)
    return BackToBackGrid(spec.slots, spec.until, spec.start)
