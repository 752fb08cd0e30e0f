"""The daemon's sync (``acqd daemon --sync URL``): a thread that sends each finished segment to the archive.

Why a thread that only polls the data directory: the daemon's acquisition must never wait for the archive.
The thread shares nothing with the campaigns but the directory listing (finished segments are immutable,
and the store's writer renames a segment into its finished name only when it is complete), so an archive
that is down, slow or refusing costs the campaigns nothing. It looks every ``POLL_S`` for finished
segments it has not synced yet and talks to the archive only when there are some. A failed pass is retried
``RETRIES`` times with a doubling back-off (``BACKOFF_S``, 2·``BACKOFF_S``, …, at most ``MAX_BACKOFF_S``),
then waits for the next poll; every upload and every failure is a run-log event (``sync_upload``, ``sync_failed``). On stop the
thread is given ``STOP_WAIT_S`` to finish an upload in progress; an upload cut short leaves only a
temporary object, which the next sync removes (see ``sync``).
"""

from __future__ import annotations

import threading
from collections.abc import Callable
from pathlib import Path
from typing import Any

from ..errors import AcqdError
from ..store.naming import finished_segments
from .archive import open_archive
from .sync import sync
from .transfer import VERIFY_UPLOAD

POLL_S = 2.0
RETRIES = 4
BACKOFF_S = 1.0
MAX_BACKOFF_S = 60.0
STOP_WAIT_S = 5.0


def _describe(exc: BaseException) -> str:
    text = " ".join(str(exc).split())
    return text if isinstance(exc, AcqdError) else f"{type(exc).__name__}: {text}"


class BackgroundSync:
    """Syncs ``data_dir`` to ``url`` from a daemon thread until ``stop()``; ``log(event, **fields)`` is the
    daemon's run log."""

    def __init__(self, data_dir: Path, url: str, log: Callable[..., Any], *, bench_id: str = "",
                 endpoint_url: str | None = None, verify: str = VERIFY_UPLOAD, poll_s: float = POLL_S,
                 retries: int = RETRIES, backoff_s: float = BACKOFF_S) -> None:
        self.data_dir, self.log, self.bench_id, self.verify = Path(data_dir), log, bench_id, verify
        self.archive = open_archive(url, endpoint_url)  # a malformed URL is a start-up error
        self.poll_s, self.retries, self.backoff_s = poll_s, retries, backoff_s
        self.synced: set[Path] = set()
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._loop, name="acqd-sync", daemon=True)

    def start(self) -> BackgroundSync:
        self.log("sync_start", url=self.archive.url)
        self._thread.start()
        return self

    def stop(self) -> None:
        """Ask the thread to stop after one last attempt (the segments the stores finished on closing), and
        give it ``STOP_WAIT_S``; never waits longer."""
        self._stop.set()
        self._thread.join(STOP_WAIT_S)
        if self._thread.is_alive():
            self.log("sync_stopped", note="an upload was still running; the next sync finishes it")

    def _loop(self) -> None:
        while True:
            stopping = self._stop.is_set()
            pending = [seg.path for _, seg in finished_segments(self.data_dir) if seg.path not in self.synced]
            if pending:
                self._pass(pending, retries=0 if stopping else self.retries)
            if stopping:
                return
            self._stop.wait(self.poll_s)

    def _pass(self, pending: list[Path], retries: int) -> None:
        """One sync of ``pending``, retried with back-off; gives up until the next poll after ``retries``."""
        for attempt in range(1, retries + 2):
            try:
                report = sync(self.data_dir, self.archive, fallback_bench_id=self.bench_id, only=pending,
                              log=self.log, verify=self.verify)
            except Exception as exc:  # noqa: BLE001 - whatever the archive does, the daemon goes on
                last = attempt > retries
                delay = min(self.backoff_s * 2 ** (attempt - 1), MAX_BACKOFF_S)
                self.log("sync_failed", attempt=attempt, error=_describe(exc),
                         **({"note": "given up until the next poll"} if last else {"retry_in_s": delay}))
                if last or self._stop.wait(delay):
                    return  # a stop during the back-off: the loop's last attempt comes next
            else:
                self.synced.update(s.path for s in report.synced)
                return


def start_background_sync(data_dir: Path, url: str, log: Callable[..., Any], *, bench_id: str = "",
                          endpoint_url: str | None = None, verify: str = VERIFY_UPLOAD) -> BackgroundSync:
    """The daemon's one entry into this package: a started ``BackgroundSync``; call ``stop()`` at exit."""
    return BackgroundSync(data_dir, url, log, bench_id=bench_id, endpoint_url=endpoint_url, verify=verify).start()
