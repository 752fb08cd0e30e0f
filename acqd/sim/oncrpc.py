"""ONC RPC over TCP for the simulated VXI-11 instruments: XDR, record marking, calls and replies, and the
portmapper.

Written from the specifications: RFC 4506 (XDR: big-endian 4-byte units, variable-length opaque data and
strings as a length then the bytes padded to a multiple of four), RFC 5531 (RPC version 2: the call and
reply bodies, accept and reject statuses, record marking on TCP in §11 — a 4-byte fragment header whose
top bit marks the last fragment and whose low 31 bits give its length) and RFC 1833 (portmapper program
100000 version 2: NULL, SET, UNSET, GETPORT, DUMP, CALLIT). Only AUTH_NONE is answered (the credentials a
client sends are read and ignored, which RFC 5531 §8.1 allows a server to do, from memory). The portmapper
serves a fixed table over TCP only: SET and UNSET answer false, CALLIT is not served (PROC_UNAVAIL), and
there is no UDP portmapper.
"""

from __future__ import annotations

import asyncio
import struct
from collections.abc import Awaitable, Callable, Mapping
from dataclasses import dataclass
from enum import IntEnum

RPC_VERSION = 2
LAST_FRAGMENT = 0x8000_0000
MAX_RECORD_BYTES = 4 << 20  # a call longer than this closes the connection (VXI-11 writes are ≤ 1 MiB here)
PORTMAPPER_PROGRAM, PORTMAPPER_VERSION = 100000, 2
PORTMAPPER_PORT = 111
IPPROTO_TCP = 6
_UINT = struct.Struct("!I")
_INT = struct.Struct("!i")


class AcceptStatus(IntEnum):
    """RFC 5531 §9 accept_stat."""

    SUCCESS = 0
    PROG_UNAVAIL = 1
    PROG_MISMATCH = 2
    PROC_UNAVAIL = 3
    GARBAGE_ARGS = 4


class DropConnection(Exception):
    """A procedure gives no reply and the connection is closed (fault injection: a link lost mid-reply)."""


class NoReply(Exception):
    """A procedure sends no reply and the connection stays open (fault injection: an RPC that times out)."""


class GarbageArgs(Exception):
    """The arguments do not decode as the procedure's (GARBAGE_ARGS)."""


class XdrReader:
    """Decodes XDR items from one call's arguments (RFC 4506 §4)."""

    def __init__(self, data: bytes, offset: int = 0) -> None:
        self.data, self.offset = data, offset

    def _take(self, count: int) -> bytes:
        if self.offset + count > len(self.data):
            raise GarbageArgs(f"{count} bytes wanted at offset {self.offset} of {len(self.data)}")
        piece = self.data[self.offset:self.offset + count]
        self.offset += count
        return piece

    def uint(self) -> int:
        return _UINT.unpack(self._take(4))[0]

    def int(self) -> int:
        return _INT.unpack(self._take(4))[0]

    def bool(self) -> bool:
        value = self.uint()
        if value > 1:
            raise GarbageArgs(f"boolean {value}")
        return bool(value)

    def opaque(self, limit: int | None = None) -> bytes:
        """Variable-length opaque data (§4.10): a length, the bytes, zero padding to four."""
        count = self.uint()
        if limit is not None and count > limit:
            raise GarbageArgs(f"{count} bytes, at most {limit} allowed")
        data = self._take(count)
        self._take(-count % 4)
        return data

    def string(self, limit: int | None = None) -> str:
        return self.opaque(limit).decode("latin-1")


class XdrWriter:
    """Encodes XDR items into one reply's results."""

    def __init__(self) -> None:
        self.parts: list[bytes] = []

    def uint(self, value: int) -> XdrWriter:
        self.parts.append(_UINT.pack(value))
        return self

    def int(self, value: int) -> XdrWriter:
        self.parts.append(_INT.pack(value))
        return self

    def bool(self, value: bool) -> XdrWriter:
        return self.uint(int(value))

    def opaque(self, data: bytes) -> XdrWriter:
        self.parts += [_UINT.pack(len(data)), bytes(data), b"\0" * (-len(data) % 4)]
        return self

    def encoded(self) -> bytes:
        return b"".join(self.parts)


Procedure = Callable[[XdrReader], Awaitable[bytes]]


@dataclass(frozen=True)
class Program:
    """An RPC program: its number, version and procedures (each takes the arguments, returns the results)."""

    number: int
    version: int
    procedures: Mapping[int, Procedure]


async def _null(args: XdrReader) -> bytes:
    """Procedure 0 of every program takes nothing and returns nothing (RFC 5531, by convention; RFC 1833
    lists it for the portmapper)."""
    return b""


async def read_record(reader: asyncio.StreamReader) -> bytes:
    """One record: fragments up to and including the one marked last (RFC 5531 §11)."""
    parts, size = [], 0
    while True:
        (mark,) = _UINT.unpack(await reader.readexactly(4))
        length = mark & ~LAST_FRAGMENT
        size += length
        if size > MAX_RECORD_BYTES:
            raise ConnectionError(f"RPC record longer than {MAX_RECORD_BYTES} bytes")
        parts.append(await reader.readexactly(length))
        if mark & LAST_FRAGMENT:
            return b"".join(parts)


def record(body: bytes) -> bytes:
    """``body`` as one last fragment."""
    return _UINT.pack(LAST_FRAGMENT | len(body)) + body


def accepted(xid: int, status: AcceptStatus, results: bytes = b"") -> bytes:
    """REPLY, MSG_ACCEPTED, verifier AUTH_NONE, then the status and what follows it."""
    return XdrWriter().uint(xid).uint(1).uint(0).uint(0).opaque(b"").uint(status).encoded() + results


def rpc_mismatch(xid: int) -> bytes:
    """REPLY, MSG_DENIED, RPC_MISMATCH with the versions served (2 to 2)."""
    return XdrWriter().uint(xid).uint(1).uint(1).uint(0).uint(RPC_VERSION).uint(RPC_VERSION).encoded()


async def answer(call: bytes, programs: Mapping[int, Program]) -> bytes | None:
    """The reply to one call record, or None for a record that is not a call or a procedure that gives no
    reply (nothing to answer)."""
    args = XdrReader(call)
    try:
        xid, kind = args.uint(), args.uint()
        if kind != 0:
            return None
        if args.uint() != RPC_VERSION:
            return rpc_mismatch(xid)
        number, version, proc = args.uint(), args.uint(), args.uint()
        for _ in range(2):  # credentials and verifier: flavour, body
            args.uint()
            args.opaque(400)
    except GarbageArgs:
        return None
    program = programs.get(number)
    if program is None:
        return accepted(xid, AcceptStatus.PROG_UNAVAIL)
    if version != program.version:
        return accepted(xid, AcceptStatus.PROG_MISMATCH,
                        XdrWriter().uint(program.version).uint(program.version).encoded())
    procedure = program.procedures.get(proc, _null if proc == 0 else None)  # 0: NULL, every program's
    if procedure is None:
        return accepted(xid, AcceptStatus.PROC_UNAVAIL)
    try:
        results = await procedure(args)
    except GarbageArgs:
        return accepted(xid, AcceptStatus.GARBAGE_ARGS)
    except NoReply:
        return None
    return accepted(xid, AcceptStatus.SUCCESS, results)


async def serve_connection(reader: asyncio.StreamReader, writer: asyncio.StreamWriter,
                           programs: Mapping[int, Program]) -> None:
    """Answer calls on one TCP connection, one at a time and in order, until the client goes."""
    try:
        while True:
            reply = await answer(await read_record(reader), programs)
            if reply is not None:
                writer.write(record(reply))
                await writer.drain()
    except DropConnection:
        writer.transport.abort()
    except (asyncio.IncompleteReadError, ConnectionError):
        return


def portmapper(mappings: Callable[[], Mapping[tuple[int, int], int]]) -> Program:
    """The portmapper over TCP; ``mappings()`` gives (program, version) → TCP port as served now."""

    async def refuse(args: XdrReader) -> bytes:  # SET, UNSET: the table is fixed
        return XdrWriter().bool(False).encoded()

    async def getport(args: XdrReader) -> bytes:
        program, version, protocol, _ = args.uint(), args.uint(), args.uint(), args.uint()
        port = mappings().get((program, version), 0) if protocol == IPPROTO_TCP else 0
        return XdrWriter().uint(port).encoded()

    async def dump(args: XdrReader) -> bytes:
        out = XdrWriter()
        for (program, version), port in mappings().items():
            out.bool(True).uint(program).uint(version).uint(IPPROTO_TCP).uint(port)
        return out.bool(False).encoded()

    return Program(PORTMAPPER_PROGRAM, PORTMAPPER_VERSION, {1: refuse, 2: refuse, 3: getport, 4: dump})
