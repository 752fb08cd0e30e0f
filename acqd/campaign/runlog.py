"""The run log: one JSON object per line for every attempt, fault, retry, record stored, verdict, missed
slot and start/stop, each with its UTC time.

Why JSON lines: a night's log can be read with ``grep``/``jq`` in the morning and by ``acqd status``, and a
line cut short by a kill spoils only itself. Each line is written with one ``write`` and flushed at once,
so it survives a SIGKILL of the daemon; the file is fsynced at the end of a slot (at most once a second)
and on stop. What the
log says is a narrative: the durable truth about slots and records is the ledger and the record store.
"""

from __future__ import annotations

import json
import math
import os
import threading
import time
from collections.abc import Callable, Iterator
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from ..errors import AcqdError, ConfigError

Listener = Callable[[dict[str, Any]], None]


def describe(exc: BaseException) -> str:
    """One line for the run log: our own errors as they read, others with their type."""
    text = str(exc).replace("\n", " ")
    return text if isinstance(exc, AcqdError) else f"{type(exc).__name__}: {text}"


def utc_now() -> datetime:
    return datetime.now(UTC)


def iso(moment: datetime | None) -> str | None:
    """UTC ISO 8601 with microseconds (what every file of the data directory uses), or None."""
    return None if moment is None else moment.astimezone(UTC).isoformat(timespec="microseconds")


class RunLog:
    """Appends events to ``path``; ``listeners`` see each event too (the daemon's console output)."""

    def __init__(self, path: str | Path) -> None:
        self.path = Path(path)
        self.listeners: list[Listener] = []
        self._lock = threading.Lock()  # one line at a time
        self._sync_lock = threading.Lock()  # one fsync at a time, and none while the file closes
        self._synced = -math.inf
        try:
            self._file = open(self.path, "a+", encoding="utf-8")
        except OSError as exc:
            raise ConfigError(str(self.path), "", f"cannot be opened for appending ({exc.strerror})") from None
        self._start_on_new_line()

    def _start_on_new_line(self) -> None:
        """After a kill in the middle of a line, begin the next event on a line of its own."""
        size = self._file.seek(0, os.SEEK_END)
        if size:
            self._file.seek(size - 1)
            if self._file.read(1) != "\n":
                self._file.write("\n")
                self._file.flush()

    def write(self, event: str, campaign: str | None = None, **fields: Any) -> dict[str, Any]:
        entry = {"utc": iso(utc_now()), "event": event, **({"campaign": campaign} if campaign else {}), **fields}
        line = json.dumps(entry, default=str, allow_nan=False) + "\n"
        with self._lock:
            self._file.write(line)
            self._file.flush()
        for listener in list(self.listeners):
            listener(entry)
        return entry

    def sync(self, at_most_every_s: float = 0.0) -> None:
        """Make every line so far survive a power cut, not only a kill; with ``at_most_every_s``, only if
        the last sync is that long ago (a fast campaign need not pay an fsync per slot).

        The fsync runs outside the writers' lock: it takes milliseconds (tens on a busy disk), and the
        acquiring thread's next line would wait for it in the middle of a slot."""
        with self._sync_lock:
            now = time.monotonic()
            if now - self._synced < at_most_every_s:
                return
            with self._lock:
                self._file.flush()
            os.fsync(self._file.fileno())
            self._synced = now

    def close(self) -> None:
        with self._sync_lock, self._lock:
            if not self._file.closed:
                self._file.flush()
                os.fsync(self._file.fileno())
                self._file.close()


def read_runlog(path: str | Path) -> Iterator[dict[str, Any]]:
    """Every well-formed event in order; a torn line (a kill mid-write) is skipped."""
    try:
        with open(path, encoding="utf-8") as f:
            for line in f:
                try:
                    entry = json.loads(line)
                except json.JSONDecodeError:
                    continue
                if isinstance(entry, dict):
                    yield entry
    except FileNotFoundError:
        return
