"""The campaign's comparator in a process of its own.

Why a process, not the keeper's thread: the comparator is mostly Python and numpy on small arrays, so in
the daemon's process it holds the interpreter lock in bursts that the step test, running at the same time,
has to wait for. With a parameter fit on every record (tens of milliseconds) that made the step test
itself slower by most of the fit's time. In a process of its own it can use another core.

The worker runs at the lowest priority (nice 19): comparing is throughput work that can wait a few
milliseconds, acquiring is not. At normal priority the worker took CPU time from the step test on a
two-core machine. Nice 19 is never starved outright, as SCHED_IDLE can be, and when the worker falls
behind, the keeper's short queue holds the next step test back instead of letting records pile up.
``bench/campaign.py`` measures this side by side; the README quotes its runs.

The process also keeps the daemon safe from its comparator: one that crashes or hangs costs that record's
analysis (logged, the record stored without it) and a restarted worker, not the night.

The worker ignores SIGINT and SIGTERM: a terminal's Ctrl-C and systemd's stop reach the whole process group,
and the daemon wants the record in progress compared before it stops. It ends when the daemon closes the
pipe, or dies with it (end of file on the pipe).
"""

from __future__ import annotations

import multiprocessing
import os
import signal
from multiprocessing.connection import Connection
from typing import Any

from ..judge import make_judge
from ..profile import Profile
from ..record import Record
from .runlog import describe

COMPARE_TIMEOUT_S = 300.0  # far over any fit of a scope record; past it the worker counts as hung
CLOSE_TIMEOUT_S = 5.0
WORKER_NICENESS = 19  # the lowest priority: comparing takes the CPU time that acquiring leaves


class ComparatorFailed(Exception):
    """The comparator raised, hung or died on one record; the text says which and why."""


def _serve(conn: Connection, profile: Profile) -> None:
    """Worker process: judge each record received, answer ("ok", analysis) or ("error", text)."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, signal.SIG_IGN)
    os.nice(WORKER_NICENESS)
    judge = make_judge(profile)
    while True:
        try:
            record = conn.recv()
        except EOFError:
            return
        if record is None:
            return
        try:
            answer = ("ok", judge(record))
        except Exception as exc:  # noqa: BLE001 - every failure goes back to the daemon, which logs it
            answer = ("error", describe(exc))
        try:
            conn.send(answer)
        except OSError:  # the daemon is gone (killed): nobody is left to answer
            return


class ComparatorProcess:
    """Callable like the judge it wraps (record → analysis dict), but run in a worker process that is
    started at once (its imports overlap the bench opening) and again after a crash or a hang."""

    def __init__(self, profile: Profile, timeout_s: float = COMPARE_TIMEOUT_S) -> None:
        self.profile, self.timeout_s = profile, timeout_s
        self.restarts = 0
        self._context = multiprocessing.get_context("spawn")  # fork is unsafe once the daemon has threads
        self._process: Any = None
        self._conn: Connection | None = None
        self._start()

    @property
    def pid(self) -> int | None:
        return self._process.pid if self._process is not None else None

    def _start(self) -> None:
        parent, child = self._context.Pipe()
        process = self._context.Process(target=_serve, args=(child, self.profile), name="acqd-comparator",
                                        daemon=True)
        process.start()
        child.close()
        self._process, self._conn = process, parent

    def __call__(self, record: Record) -> dict[str, Any]:
        if self._process is None:
            self.restarts += 1
            self._start()
        assert self._conn is not None
        try:
            self._conn.send(record)
            if not self._conn.poll(self.timeout_s):
                self._discard()
                raise ComparatorFailed(f"the comparator took over {self.timeout_s:g} s on this record; "
                                       "its worker was stopped and is started again for the next one")
            status, answer = self._conn.recv()
        except (EOFError, OSError):  # the worker died: a closed or reset pipe
            code = None
            if self._process is not None:
                self._process.join(CLOSE_TIMEOUT_S)
                code = self._process.exitcode
            self._discard()
            raise ComparatorFailed(f"the comparator's worker process ended (exit code {code}); "
                                   "it is started again for the next record") from None
        if status != "ok":
            raise ComparatorFailed(answer)
        return answer

    def _discard(self) -> None:
        """Kill the worker (hung or dead) and forget it; the next call starts a new one."""
        if self._process is not None:
            self._process.kill()
            self._process.join(CLOSE_TIMEOUT_S)
        if self._conn is not None:
            self._conn.close()
        self._process, self._conn = None, None

    def close(self) -> None:
        """Ask the worker to finish, kill it if it does not; safe to call twice."""
        if self._process is None:
            return
        try:
            self._conn.send(None)
        except OSError:
            pass  # already gone: the join below returns at once
        self._process.join(CLOSE_TIMEOUT_S)
        self._discard()
