"""Reading one IEEE 488.2 definite-length block (§8.7.9) as fast as the backend allows.

The block is read in four exact-length pieces: ``#<n>``, the n length digits, the payload, the terminator.
Knowing every length in advance is what makes it fast — nothing scans the payload for a terminator.

Two readers supply the exact-length reads:

* ``PublicReader`` uses pyvisa's public API only: ``read_bytes(count)`` with the read termination off,
  so a 0x0A byte inside the data does not end a low-level read. It works on every backend.
* ``SocketReader`` is used on pyvisa-py socket sessions: it takes the bytes pyvisa-py has already read
  ahead, then ``recv_into`` one preallocated buffer straight from pyvisa-py's socket. pyvisa-py's own read
  copies the payload five or six times (its read-ahead buffer, slices, pyvisa's accumulator) and page-faults
  a fresh buffer for each copy; at megabytes that, not the network, is the cost (``bench/transfer.py``).
  It relies on two pyvisa-py attributes (``interface``, ``_pending_buffer``); when they are not there,
  the session falls back to ``PublicReader``.
"""

from __future__ import annotations

import select
import socket
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from typing import Any

from .. import scpi
from ..errors import InstrumentError

ReadExact = Callable[[int], bytes | bytearray]
DISCARD_BYTES = 1 << 16


def read_block(read_exact: ReadExact, terminator: bytes) -> bytes | bytearray:
    """The payload of one definite-length block followed by ``terminator``; BlockError if malformed."""
    head = bytes(read_exact(2))
    header_len = scpi.block_header_length(head)
    if header_len > 2:
        head += bytes(read_exact(header_len - 2))
    _, count = scpi.parse_block_header(head)
    if count is None:
        raise scpi.BlockError("indefinite-length block (#0) needs END, which a socket cannot carry; "
                              "set the instrument to definite-length blocks")
    data = read_exact(count) if count else b""
    end = bytes(read_exact(len(terminator)))
    if end != terminator:
        raise scpi.BlockError(f"the {count}-byte block is followed by {end!r}, not the message terminator: "
                              f"its header's length is wrong")
    return data


class PublicReader:
    """Exact-length reads through ``read_bytes`` with the read termination switched off."""

    def __init__(self, inst: Any) -> None:
        self.inst = inst

    @contextmanager
    def raw(self) -> Iterator[ReadExact]:
        termination = self.inst.read_termination
        self.inst.read_termination = None
        try:
            yield lambda count: self.inst.read_bytes(count, chunk_size=count)
        finally:
            self.inst.read_termination = termination


class SocketReader:
    """Exact-length reads straight from pyvisa-py's socket into one buffer per read.

    ``timeout_s`` bounds the silence between two pieces of data, not the whole transfer, so a large block
    on a slow link is not cut off while bytes keep arriving.
    """

    def __init__(self, sock: socket.socket, pending: bytearray, resource: str, command: str,
                 timeout_s: float) -> None:
        self.sock, self.pending = sock, pending
        self.resource, self.command, self.timeout_s = resource, command, timeout_s

    @classmethod
    def of(cls, backend_session: Any, resource: str, command: str, timeout_s: float) -> SocketReader | None:
        """A reader for this pyvisa-py session, or None when it is not a pyvisa-py socket session."""
        sock = getattr(backend_session, "interface", None)
        pending = getattr(backend_session, "_pending_buffer", None)
        if isinstance(sock, socket.socket) and isinstance(pending, bytearray):
            return cls(sock, pending, resource, command, timeout_s)
        return None

    @contextmanager
    def raw(self) -> Iterator[ReadExact]:
        yield self.read_exact

    def discard(self, quiet_s: float) -> None:
        """Throw away the read-ahead and everything that arrives until ``quiet_s`` pass without data, for
        at most ``timeout_s``; a closed connection is an InstrumentError."""
        self.pending.clear()
        deadline = time.monotonic() + self.timeout_s
        while select.select([self.sock], [], [], quiet_s)[0]:
            if not self.sock.recv(DISCARD_BYTES):
                raise InstrumentError(self.resource, "connection dropped by the instrument")
            if time.monotonic() > deadline:
                raise TimeoutError(f"the instrument kept sending for {self.timeout_s:g} s")

    def read_exact(self, count: int) -> bytearray:
        buf = bytearray(count)
        view = memoryview(buf)
        got = min(len(self.pending), count)
        view[:got] = self.pending[:got]
        del self.pending[:got]
        while got < count:
            ready, _, _ = select.select([self.sock], [], [], self.timeout_s)
            if not ready:  # the session turns this into InstrumentTimeout naming the resource
                raise TimeoutError(f"no data for {self.timeout_s:g} s after {got} of {count} bytes of the "
                                   f"reply to {self.command}")
            received = self.sock.recv_into(view[got:], count - got)
            if not received:
                raise InstrumentError(self.resource, f"connection dropped after {got} of {count} bytes of "
                                                     f"the reply to {self.command}")
            got += received
        return buf
