"""One VISA session: open, write, query, fast block reads, error queue, drain after a timeout, reconnect.

Why this layer exists instead of using a pyvisa resource directly:

* **One line per failure.** pyvisa raises ``VisaIOError`` codes, pyvisa-py adds plain ``OSError`` and even
  bare ``Exception`` on open; the bench needs "TCPIP0::…::SOCKET: no reply to 'TRAC? CH1' within 5 s".
* **Fast blocks.** With a read termination of NL, every low-level read stops at each 0x0A byte inside
  binary data, so pyvisa's plain ``query_binary_values`` crawls. Here the header is read first, then the
  exact byte count (``blocks.py``; ``bench/transfer.py`` measures the difference).
* **No reply one step late.** After a timeout the reply may still arrive; unless it is thrown away every
  later query returns the answer to the one before. ``drain`` resynchronises on a known reply, and
  reconnects when even that fails.
"""

from __future__ import annotations

import math
import socket
import time
from collections.abc import Iterator, Mapping
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import pyvisa
from pyvisa import constants

from .. import scpi
from ..errors import ConfigError, InstrumentError
from .blocks import PublicReader, SocketReader, read_block

DEFAULT_BACKEND = "@py"
# The backends a profile may name: pyvisa-py, and the IVI VISA library installed on the system. Any
# other backend string makes pyvisa load a shared library or a package, i.e. run native code: that is
# never taken from a profile, only from the command line as an explicit VISA library file (a Path).
NAMED_BACKENDS = ("@py", "@ivi")
# IEEE 488.2 §7.5 / §8.5 (from memory): NL terminates program and response messages.
TERMINATION = "\n"
# IEEE 488.2 common queries and the SCPI error queue (SCPI-1999 Vol 2 §21.8); fixed text, no values.
IDENTIFY = "*IDN?"
CLEAR_STATUS = "*CLS"
EVENT_STATUS = "*ESR?"
NEXT_ERROR = "SYSTem:ERRor?"
# Ordinary (text) reads: large enough that a long ASCii reply is not read in dozens of pieces.
TEXT_CHUNK_BYTES = 1 << 16
MAX_ERROR_ENTRIES = 100

class InstrumentTimeout(InstrumentError):
    """No (complete) reply within the timeout; the session has already been drained or reconnected."""


def _resource_manager(backend: str | Path, resource: str) -> pyvisa.ResourceManager:
    """pyvisa's resource manager for ``backend``: one shared object per backend, re-created by pyvisa if
    someone closed it — so it is asked for at every open instead of being kept here. It is never closed
    here either: closing it would close every session opened through it, ours and other code's.

    ``backend`` is one of NAMED_BACKENDS, or a Path to a VISA library file that the command line named
    explicitly; a string that is neither is refused before pyvisa can load anything."""
    if not isinstance(backend, Path) and backend not in NAMED_BACKENDS:
        raise InstrumentError(resource, f"VISA backend {backend!r} is not allowed; allowed: "
                                        f"{', '.join(NAMED_BACKENDS)} (a VISA library file is given on the "
                                        f"command line only, with --visa-library PATH)")
    try:
        return pyvisa.ResourceManager(str(backend) if isinstance(backend, Path) else backend)
    except (ValueError, OSError) as exc:
        raise InstrumentError(resource, f"VISA backend {backend!r} is not available ({exc}); "
                                        f"the default is {DEFAULT_BACKEND!r} (pyvisa-py)") from None


def _check_timeout(resource: str, field: str, timeout_s: float) -> float:
    if isinstance(timeout_s, bool) or not isinstance(timeout_s, (int, float)) or not math.isfinite(timeout_s) \
            or timeout_s <= 0:
        raise ConfigError(resource, field, f"must be a positive number of seconds, not {timeout_s!r}")
    return float(timeout_s)


class Session:
    """A message-based VISA session speaking SCPI with NL-terminated messages.

    ``timeout_s`` bounds every single read or write; ``drain_timeout_s`` bounds the resynchronisation after a
    timeout. The identity (``*IDN?`` reply) is read on open: it proves the instrument answers, and it is
    the known reply that ``drain`` waits for. ``direct_socket=False`` keeps block reads on pyvisa's public
    API even where the faster direct socket read is possible (for comparison, or should a pyvisa-py
    release ever change the two attributes that read relies on).
    """

    def __init__(self, resource: str, *, backend: str | Path = DEFAULT_BACKEND, timeout_s: float = 5.0,
                 drain_timeout_s: float | None = None, direct_socket: bool = True) -> None:
        self.resource = resource
        self.backend = backend
        self.direct_socket = direct_socket  # False: blocks through pyvisa's public API even on pyvisa-py
        self._timeout_s = _check_timeout(resource, "timeout_s", timeout_s)
        self.drain_timeout_s = _check_timeout(resource, "drain_timeout_s",
                                              drain_timeout_s if drain_timeout_s is not None
                                              else max(timeout_s, 1.0))
        self.identity = ""
        self._inst: Any = None

    # -- life cycle ------------------------------------------------------------------------------------
    def open(self) -> Session:
        """Connect and read ``*IDN?``. pyvisa-py 'opens' a socket whose connection was refused, so only a
        reply proves the instrument is there."""
        manager = _resource_manager(self.backend, self.resource)
        try:
            inst = manager.open_resource(self.resource, read_termination=TERMINATION,
                                         write_termination=TERMINATION, timeout=self._ms(self._timeout_s),
                                         open_timeout=self._ms(self._timeout_s))
        except pyvisa.errors.VisaIOError as exc:
            raise InstrumentError(self.resource, f"cannot open ({exc.abbreviation}: {exc.description})") from None
        except Exception as exc:  # pyvisa-py raises a bare Exception("could not connect: ...") on open
            said = "; ".join(line.strip() for line in str(exc).splitlines() if line.strip())  # one line (GPIB, ASRL)
            raise InstrumentError(self.resource, f"cannot open ({said})") from None
        inst.chunk_size = TEXT_CHUNK_BYTES
        self._inst = inst
        self._no_delay()
        try:
            identity = self.query(IDENTIFY, drain=False)
            if self.identity and identity != self.identity:  # reopened after a failure: same instrument?
                raise InstrumentError(self.resource, f"now identifies as {identity!r}, not {self.identity!r} as "
                                                     f"when first opened; a different instrument at this address?")
        except InstrumentError:
            self.close()
            raise
        self.identity = identity
        return self

    def close(self) -> None:
        """Close the connection; safe to call twice or on a connection that already failed."""
        inst, self._inst = self._inst, None
        if inst is not None:
            try:
                inst.close()
            except (pyvisa.errors.Error, OSError):
                pass  # the connection is already gone, which is what close wants

    def reconnect(self) -> None:
        """Close and reopen: a fresh connection carries no late reply and no half-read block."""
        self.close()
        self.open()

    @property
    def is_open(self) -> bool:
        return self._inst is not None

    def __enter__(self) -> Session:
        return self if self.is_open else self.open()

    def __exit__(self, *exc: object) -> None:
        self.close()

    @property
    def timeout_s(self) -> float:
        return self._timeout_s

    @timeout_s.setter
    def timeout_s(self, value: float) -> None:
        self._timeout_s = _check_timeout(self.resource, "timeout_s", value)
        if self._inst is not None:
            self._inst.timeout = self._ms(self._timeout_s)

    # -- messages --------------------------------------------------------------------------------------
    def write(self, message: str) -> None:
        """Send one program message (built by ``acqd.scpi``); the terminator is added here."""
        inst = self._live()
        with self._failures(repr(message), self._timeout_s):
            inst.write(message)

    def query(self, message: str, timeout_s: float | None = None, *, drain: bool = True) -> str:
        """Send a query and return its reply without the terminator.

        On a timeout the late reply is drained first (unless ``drain=False``, for a caller that must act
        before draining, e.g. abort a pending acquisition), then ``InstrumentTimeout`` is raised.
        """
        inst = self._live()
        try:
            with self._timeout(timeout_s) as limit, self._failures(repr(message), limit):
                return inst.query(message)
        except InstrumentError:
            if drain:
                self._drain_quietly()
            raise

    def query_block(self, message: str, timeout_s: float | None = None) -> bytes | bytearray:
        """Send a query whose reply is one definite-length block (IEEE 488.2 §8.7.9); return its payload.

        A garbled header, a short block, a timeout or a dropped connection drains the session (or reopens
        it) before the InstrumentError goes out, so the next reply is not a leftover of this one.
        """
        self.write(message)
        inst = self._live()
        try:
            with self._timeout(timeout_s) as limit, self._failures(repr(message), limit), \
                    self._block_reader(inst, repr(message), limit).raw() as read_exact:
                return read_block(read_exact, TERMINATION.encode())
        except scpi.BlockError as exc:
            self._drain_quietly()
            raise InstrumentError(self.resource, f"the reply to {message!r} is not a valid block: {exc}") from None
        except InstrumentError:
            self._drain_quietly()
            raise

    def query_error_queue(self) -> list[tuple[int, str]]:
        """Read ``SYSTem:ERRor?`` until it answers code 0; the entries found, oldest first."""
        entries: list[tuple[int, str]] = []
        for _ in range(MAX_ERROR_ENTRIES):
            reply = self.query(NEXT_ERROR)
            try:
                code, text = scpi.parse_error_entry(reply)
            except ValueError as exc:
                raise InstrumentError(self.resource, f"reply to {NEXT_ERROR!r} is not an error entry: {exc}") \
                    from None
            if code == 0:
                return entries
            entries.append((code, text))
        raise InstrumentError(self.resource, f"error queue still not empty after {MAX_ERROR_ENTRIES} reads "
                                             f"(first: {entries[0][0]},{entries[0][1]!r})")

    def drain(self) -> None:
        """Throw away whatever reply is still on its way, so the next query gets its own answer.

        What has arrived is discarded; then ``*CLS`` (so the instrument's own complaint about an
        interrupted query, −410, does not surface as a configuration error later) and ``*IDN?``, reading
        and discarding until the known identity comes back. If the instrument closed the connection, or
        the identity does not come back within ``drain_timeout_s``, the connection is reopened, which
        cannot carry a late reply.
        """
        inst = self._inst
        if inst is None:
            return
        if self.identity and not self._peer_closed():
            try:
                with self._timeout(self.drain_timeout_s) as limit, \
                        self._failures(f"{IDENTIFY!r} (resynchronising)", limit):
                    self._discard_input(inst)
                    inst.write(CLEAR_STATUS)
                    inst.write(IDENTIFY)
                    if self._read_until_identity(inst):
                        return
            except InstrumentError:
                pass  # fall through to a fresh connection
        self.reconnect()

    # -- internals -------------------------------------------------------------------------------------
    def _drain_quietly(self) -> None:
        """Drain after a failure without hiding it: if even reconnecting fails, the session stays closed
        and the next call reopens it (or says the instrument is unreachable)."""
        try:
            self.drain()
        except InstrumentError:
            self.close()

    def _live(self) -> Any:
        """The open resource, reopening after an earlier failure closed it (instruments get power-cycled)."""
        if self._inst is None:
            self.open()
        return self._inst

    def _discard_input(self, inst: Any) -> None:
        """Drop what has arrived and what keeps arriving until the line is quiet for 0.1 s.

        On pyvisa-py this is done on its socket: its ``clear()`` never returns once the peer has closed
        the connection (it keeps reading an empty end of stream), while here that is a dropped connection.
        """
        reader = SocketReader.of(self._backend_session(), self.resource, IDENTIFY, self.drain_timeout_s)
        if reader is None:
            inst.clear()
        else:
            reader.discard(quiet_s=0.1)

    def _read_until_identity(self, inst: Any) -> bool:
        expected = self.identity.encode("ascii", "replace")
        deadline = time.monotonic() + self.drain_timeout_s
        while (left := deadline - time.monotonic()) > 0:
            inst.timeout = self._ms(left)
            if inst.read_raw().rstrip(b"\r\n") == expected:
                return True
        return False

    def _block_reader(self, inst: Any, command: str, timeout_s: float) -> SocketReader | PublicReader:
        direct = SocketReader.of(self._backend_session(), self.resource, command, timeout_s)
        return direct if direct is not None and self.direct_socket else PublicReader(inst)

    def _backend_session(self) -> Any:
        """pyvisa-py's session object behind our resource, or None for any other backend."""
        sessions = getattr(getattr(self._inst, "visalib", None), "sessions", None)
        if not isinstance(sessions, Mapping):
            return None
        try:
            return sessions.get(self._inst.session)
        except pyvisa.errors.InvalidSession:
            return None

    def _peer_closed(self) -> bool:
        """True when the instrument has closed the TCP connection (pyvisa-py then reports only a timeout)."""
        sock = getattr(self._backend_session(), "interface", None)
        if not isinstance(sock, socket.socket):
            return False
        try:
            return sock.recv(1, socket.MSG_PEEK | socket.MSG_DONTWAIT) == b""
        except BlockingIOError:
            return False
        except OSError:
            return True

    def _no_delay(self) -> None:
        """Switch Nagle's algorithm off on a pyvisa-py socket.

        pyvisa-py 0.8.1 leaves it on and its VI_ATTR_TCPIP_NODELAY setter is not wired up (setting it
        raises), so a short command followed by a query waits for the instrument's delayed ACK: measured
        here, 45 ms instead of 0.3 ms per write, write, query. Other backends are left at their default
        (VISA's is no delay, from memory).
        """
        sock = getattr(self._backend_session(), "interface", None)
        if isinstance(sock, socket.socket):
            sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)

    @contextmanager
    def _timeout(self, timeout_s: float | None) -> Iterator[float]:
        """Apply a per-call timeout and always put the session's own back (reads may change it too)."""
        limit = self._timeout_s if timeout_s is None else _check_timeout(self.resource, "timeout_s", timeout_s)
        self._inst.timeout = self._ms(limit)
        try:
            yield limit
        finally:
            if self._inst is not None:
                self._inst.timeout = self._ms(self._timeout_s)

    @contextmanager
    def _failures(self, command: str, timeout_s: float) -> Iterator[None]:
        """Turn VISA and socket failures around ``command`` into one InstrumentError naming the resource."""
        try:
            yield
        except pyvisa.errors.VisaIOError as exc:
            if exc.error_code == constants.StatusCode.error_timeout:
                if self._peer_closed():  # pyvisa-py reports a closed connection only as a timeout
                    raise InstrumentError(self.resource, f"connection dropped (closed by the instrument) "
                                                         f"while waiting for the reply to {command}") from None
                raise InstrumentTimeout(self.resource, f"no reply to {command} within {timeout_s:g} s") from None
            if exc.error_code == constants.StatusCode.error_connection_lost:
                raise InstrumentError(self.resource, f"connection dropped during {command}") from None
            if exc.error_code == constants.StatusCode.error_io:  # also a VXI-11 call that timed out, link still up
                raise InstrumentError(self.resource, f"I/O error during {command} (the connection dropped, or the "
                                                     f"instrument left a call unanswered)") from None
            raise InstrumentError(self.resource, f"VISA error {exc.abbreviation} during {command}") from None
        except TimeoutError as exc:
            raise InstrumentTimeout(self.resource, str(exc)) from None
        except ConnectionRefusedError:
            raise InstrumentError(self.resource, "unreachable (connection refused)") from None
        except (BrokenPipeError, ConnectionResetError, ConnectionAbortedError):
            raise InstrumentError(self.resource, f"connection dropped during {command}") from None
        except OSError as exc:
            raise InstrumentError(self.resource, f"{exc.strerror or exc} during {command}") from None
        except UnicodeDecodeError:
            raise InstrumentError(self.resource, f"the reply to {command} is not text") from None
        except RuntimeError as exc:  # pyvisa-py's HiSLIP client: a dropped channel or a message out of step
            raise InstrumentError(self.resource, f"connection lost during {command} ({exc})") from None

    @staticmethod
    def _ms(seconds: float) -> int:
        return max(1, round(seconds * 1000))


def identify(resource: str, *, backend: str | Path = DEFAULT_BACKEND, timeout_s: float = 5.0) -> str:
    """The instrument's ``*IDN?`` reply, on a connection opened and closed for the purpose."""
    with Session(resource, backend=backend, timeout_s=timeout_s) as session:
        return session.identity
