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

The worker ignores SIGINT and SIGTERM: a terminal's Ctrl-C reaches the whole process group and systemd's
stop the whole cgroup, and the daemon wants the record in progress compared before it stops. (For the
second or so of a new worker's imports a Ctrl-C still ends it - Python's spawn start resets the signal
mask, and a handler can only be set from the main thread - which costs a restart, nothing else.) It ends
when the daemon closes the pipe, or dies with it (end of file on the pipe); the pipe is also closed at
interpreter exit, since multiprocessing waits for its children then.

Every wait on the worker is bounded by ``timeout_s``: its start (it says "ready" once it can compare), each
record sent (the send times out on the socket), each answer.
"""

from __future__ import annotations

import multiprocessing
import os
import signal
import socket
import struct
import weakref
from multiprocessing.connection import Connection
from typing import Any

from ..errors import AcqdError
from ..batch import batch_judge
from ..profile import Profile
from ..record import Record
from .runlog import describe

COMPARE_TIMEOUT_S = 300.0  # far over any fit of a scope record; past it the worker counts as hung
CLOSE_TIMEOUT_S = 5.0
WORKER_NICENESS = 19  # the lowest priority: comparing takes the CPU time that acquiring leaves
STOP_SIGNALS = (signal.SIGINT, signal.SIGTERM)
READY = "ready"


class ComparatorFailed(AcqdError):
    """The comparator raised, hung or died on one record, or its worker did not start; the text says why."""


def _serve(conn: Connection, profile: Profile, niceness: int = WORKER_NICENESS) -> None:
    """Worker process: say ready, then judge each record received, answering ("ok", analysis) or
    ("error", text)."""
    for sig in STOP_SIGNALS:
        signal.signal(sig, signal.SIG_IGN)
    os.nice(niceness)
    judge = batch_judge(profile)
    try:
        conn.send(READY)
        while (record := conn.recv()) is not None:
            try:
                answer = ("ok", judge(record))
            except Exception as exc:  # noqa: BLE001 - every failure goes back to the daemon, which logs it
                answer = ("error", describe(exc))
            conn.send(answer)
    except (EOFError, OSError):  # the daemon closed the pipe or is gone: nobody is left to answer
        return


class ComparatorProcess:
    """Callable like the judge it wraps (record → analysis dict), but run in a worker process that is
    started at once (its imports overlap the bench opening) and again after a crash or a hang."""

    def __init__(self, profile: Profile, timeout_s: float = COMPARE_TIMEOUT_S, niceness: int = WORKER_NICENESS) -> None:
        self.profile, self.timeout_s, self.niceness = profile, timeout_s, niceness
        self.restarts = 0
        self._context = multiprocessing.get_context("spawn")  # fork is unsafe once the daemon has threads
        self._process: Any = None
        self._conn: Connection | None = None
        self._ready = False
        self._send_timeout_s: float | None = None  # what the pipe's send timeout is set to
        self._at_exit: weakref.finalize | None = None
        self._start()

    @property
    def pid(self) -> int | None:
        return self._process.pid if self._process is not None else None

    def _start(self) -> None:
        parent, child = self._context.Pipe()
        process = self._context.Process(target=_serve, args=(child, self.profile, self.niceness), name="acqd-comparator",
                                        daemon=True)
        try:
            process.start()
        except BaseException:
            parent.close()
            raise
        finally:
            child.close()
        self._process, self._conn, self._ready, self._send_timeout_s = process, parent, False, None
        self._at_exit = weakref.finalize(self, parent.close)  # at exit: EOF for the worker, so it ends

    def wait_ready(self) -> None:
        """Until the worker can compare; ComparatorFailed if it does not get there within ``timeout_s``."""
        if self._process is None:
            self.restarts += 1
            self._start()
        if self._ready:
            return
        ended = False
        try:
            if self._conn.poll(self.timeout_s) and self._conn.recv() == READY:
                self._ready = True
                return
        except (EOFError, OSError):
            ended = True  # it died on the way: wait for its exit status
        code = self._discard(wait_s=CLOSE_TIMEOUT_S if ended else 0.0)
        raise ComparatorFailed(f"the comparator's worker process did not start within {self.timeout_s:g} s "
                               f"(exit code {code}); see the daemon's standard error")

    def __call__(self, record: Record) -> dict[str, Any]:
        self._send(record)
        try:
            if not self._conn.poll(self.timeout_s):
                self._discard()
                raise ComparatorFailed(f"the comparator took over {self.timeout_s:g} s on this record; "
                                       "its worker was stopped and is started again for the next one")
            status, answer = self._conn.recv()
        except (EOFError, OSError):  # it died while comparing: this record may be what killed it
            code = self._discard(wait_s=CLOSE_TIMEOUT_S)
            raise ComparatorFailed(f"the comparator's worker process ended while comparing this record (exit "
                                   f"code {code}); it is started again for the next record") from None
        if status != "ok":
            raise ComparatorFailed(answer)
        return answer

    def _send(self, record: Record) -> None:
        """Hand ``record`` to a ready worker. A worker found dead (it died while idle, or as the record went
        out) never saw the record: a new one gets it. One that stops reading is killed at the timeout."""
        for attempt in (1, 2):
            if self._process is not None and not self._process.is_alive():
                self._discard()
            self.wait_ready()
            try:
                if self._send_timeout_s != self.timeout_s:
                    _bound_sends(self._conn, self.timeout_s)
                    self._send_timeout_s = self.timeout_s
                self._conn.send(record)
                return
            except BlockingIOError:  # the send timed out: the worker is alive but not reading
                self._discard()
                raise ComparatorFailed(f"the comparator's worker took no record for {self.timeout_s:g} s; it was "
                                       "stopped and is started again for the next one") from None
            except OSError:
                code = self._discard(wait_s=CLOSE_TIMEOUT_S)
                if attempt == 2:
                    raise ComparatorFailed(f"two comparator workers in a row ended before taking this record "
                                           f"(exit code {code})") from None

    def _discard(self, wait_s: float = 0.0) -> int | None:
        """Kill the worker (hung or dead) and forget it; the next call starts a new one. Returns its exit
        status as it was before the kill, waiting up to ``wait_s`` for a dying one to end (None: it was
        still running)."""
        code = None
        if self._process is not None:
            self._process.join(wait_s)
            code = self._process.exitcode
            self._process.kill()
            self._process.join(CLOSE_TIMEOUT_S)
        if self._at_exit is not None:
            self._at_exit()  # closes the pipe
        self._process, self._conn, self._at_exit, self._ready = None, None, None, False
        return code

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


def _bound_sends(conn: Connection, timeout_s: float) -> None:
    """Make a send on ``conn`` fail (OSError) after ``timeout_s`` instead of blocking for ever: a record is
    larger than the socket's buffer, so a worker that has stopped reading would otherwise hold the keeper.
    The pipe is a socket pair; the option is set on the shared socket through a duplicate descriptor."""
    sock = socket.socket(fileno=os.dup(conn.fileno()))
    try:
        seconds = int(timeout_s)
        sock.setsockopt(socket.SOL_SOCKET, socket.SO_SNDTIMEO,
                        struct.pack("ll", seconds, int((timeout_s - seconds) * 1e6)))
    finally:
        sock.close()
