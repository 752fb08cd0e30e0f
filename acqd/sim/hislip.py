"""The HiSLIP transport: IVI-6.1 High-Speed LAN Instrument Protocol, synchronized mode, overlapped mode
when the client asks (``TCPIP0::host::hislip0,port::INSTR``).

Written from the specification, IVI-6.1 revision 2.0 (HiSLIP 2.0). The clause numbers cited are from
memory and so is every value marked so; the message layout (§3.1), the message types (§3.2 table) and
the control codes are the specification's. What is served:

* **Connection (§6.1–6.2).** One port serves every instrument of the bench, each by its sub-address
  (``hislip0``, ``hislip1``, … in the bench's order). A client opens the synchronous channel with
  Initialize (payload: the sub-address; an unknown one is FatalError 3) and gets InitializeResponse (the negotiated version — the lower of the
  client's and ours, 2.0; a session ID; overlap mode off, since we prefer synchronized mode); it then
  opens the asynchronous channel with AsyncInitialize carrying that session ID. A Data message before
  both channels stand is FatalError 2; any other first message is FatalError 3 ("invalid initialization
  sequence"). FatalError closes both channels of the session.
* **Data (§6.5).** Data and DataEnd carry a program message; DataEnd is END. The client numbers its
  messages (from 0xFFFFFF00 up by 2, wrapping); every response message carries the ID of the DataEnd (or
  Data) that completed the program message it answers, so a client can recognise and discard a late reply.
  Bit 0 of a Data/DataEnd message's control code is RMT-delivered: the client has read the last response
  whole (it clears MAV, below). A response longer than the client's maximum message size goes out as
  Data messages and one DataEnd, each no longer than that size with its 16-byte header (pyvisa-py counts
  the header in; counting it is the safe reading).
* **Device clear (§6.12).** AsyncDeviceClear on the asynchronous channel: the engine's device clear
  (input and output dropped, a blocked ``*OPC?`` abandoned); the server answers AsyncDeviceClearAcknowledge
  and from then on discards Data messages and sends nothing on the synchronous channel until the client's
  DeviceClearComplete there, answered by DeviceClearAcknowledge. Both sides restart message IDs at
  0xFFFFFF00. Feature bits: AsyncDeviceClearAcknowledge offers 0 (we prefer synchronized mode, no
  encryption); the client's DeviceClearComplete asks, and DeviceClearAcknowledge grants what it asked.
* **Overlapped mode (§6.12, from memory):** granted when a client asks for it (feature bit 0 of
  DeviceClearComplete) and kept until the next device clear. Then a program message that arrives while a
  response is pending waits its turn instead of interrupting the query (no −410): responses go out in
  order, each with its message ID. pyvisa-py 0.8.1 never asks (it echoes the server's preference), so
  acqd's sessions run synchronized.
* **AsyncLock (§6.9):** request (control code 1; message parameter the timeout in ms; payload empty for
  the exclusive lock, else a shared lock's name) and release (control code 0), answered by
  AsyncLockResponse 0 failure, 1 success (exclusive), 2 success shared, 3 error (release without a lock).
  A request waits up to its timeout for a conflicting lock to go. AsyncLockInfo answers whether an
  exclusive lock is held and how many sessions hold a lock. Locks are per instrument, across sessions,
  and released when a session ends; they are recorded and granted, not enforced on data (a limit).
* **AsyncMaximumMessageSize (§6.7):** payload the client's maximum (8 bytes, big-endian); answered with
  ours, 1 MiB (the raw socket's limit on a program message).
* **AsyncRemoteLocalControl (§6.11):** control codes 0–6 (disable remote, enable remote, disable and go
  to local, enable and go to remote, enable and lock out local, enable, remote and lock out, go to local),
  kept as the instrument's remote/local state (``SCPIInstrument.remote``, ``local_lockout``).
* **AsyncStatusQuery (§6.14):** answered by AsyncStatusResponse with the status byte in the control code.
  MAV is set while a response has been sent and the client has not said RMT-delivered since (from memory;
  the raw socket has no such notion). The status is the instrument's when the query arrives: the two
  channels are two connections, so a program message sent just before may not have been parsed yet.
* **Error (§6.4):** an unknown message type (Error 1), a message longer than our maximum (Error 4,
  payload discarded) — the session goes on. A header without the "HS" prologue is FatalError 1.
* **Trigger:** numbered like Data; the simulated instruments have no device trigger (IEEE 488.2 DT0), so
  it does nothing else.

Faults: the instrument's own (``engine.Faults``, the fault table) act here as on every transport; a
block cut half-way is a DataEnd whose header announces more than comes, then both channels close; a short
read is the response as Data messages up to the pause and the DataEnd after it (a device clear during
the pause abandons the rest). ``HislipServer.faults`` (``HislipFaults``) adds this transport's own: a
FatalError in answer to the next program message.

Not served: the 2.0 secure connection and authentication messages (StartTLS, SASL;
answered with Error 1), GetDescriptors, AsyncServiceRequest (no SRQ is ever raised), Interrupted.
"""

from __future__ import annotations

import asyncio
import logging
import struct
from collections.abc import Iterator, Mapping
from dataclasses import dataclass, field
from enum import IntEnum

from .engine import ConnectionLost, MessageExchange, Response, SCPIInstrument
from .serving import Listener

_log = logging.getLogger(__name__)

DEFAULT_PORT = 4880  # IANA-registered HiSLIP port (IVI-6.1 §6.1, from memory)
SUB_ADDRESS = "hislip{}"  # the n-th instrument served
VERSION = (2, 0)
VENDOR_ID = b"ZZ"  # two characters; IVI assigns real ones, ours is made up and says so
HEADER = struct.Struct("!2sBBIQ")  # prologue "HS", type, control code, message parameter, payload length
PROLOGUE = b"HS"
INITIAL_MESSAGE_ID = 0xFFFF_FF00
MAX_MESSAGE_BYTES = MessageExchange.MAX_MESSAGE_BYTES
RMT_DELIVERED = 0x01
FEATURE_OVERLAPPED = 0x01  # feature bit 0 of the device-clear messages: overlapped mode (§6.12, from memory)
DISCARD_CHUNK = 1 << 16


class Type(IntEnum):
    """Message types (IVI-6.1 §3.2); the ones this server receives or sends."""

    INITIALIZE = 0
    INITIALIZE_RESPONSE = 1
    FATAL_ERROR = 2
    ERROR = 3
    ASYNC_LOCK = 4
    ASYNC_LOCK_RESPONSE = 5
    DATA = 6
    DATA_END = 7
    DEVICE_CLEAR_COMPLETE = 8
    DEVICE_CLEAR_ACKNOWLEDGE = 9
    ASYNC_REMOTE_LOCAL_CONTROL = 10
    ASYNC_REMOTE_LOCAL_RESPONSE = 11
    TRIGGER = 12
    ASYNC_MAXIMUM_MESSAGE_SIZE = 15
    ASYNC_MAXIMUM_MESSAGE_SIZE_RESPONSE = 16
    ASYNC_INITIALIZE = 17
    ASYNC_INITIALIZE_RESPONSE = 18
    ASYNC_DEVICE_CLEAR = 19
    ASYNC_STATUS_QUERY = 21
    ASYNC_STATUS_RESPONSE = 22
    ASYNC_DEVICE_CLEAR_ACKNOWLEDGE = 23
    ASYNC_LOCK_INFO = 24
    ASYNC_LOCK_INFO_RESPONSE = 25


class Fatal(IntEnum):
    """FatalError control codes (IVI-6.1 §6.3)."""

    UNIDENTIFIED = 0
    POORLY_FORMED_HEADER = 1
    CHANNELS_NOT_ESTABLISHED = 2
    INVALID_INITIALIZATION = 3


class Err(IntEnum):
    """Error control codes (IVI-6.1 §6.4)."""

    UNRECOGNIZED_TYPE = 1
    MESSAGE_TOO_LARGE = 4


class Lock(IntEnum):
    """AsyncLockResponse control codes (IVI-6.1 §6.9)."""

    FAILURE = 0
    SUCCESS = 1
    SUCCESS_SHARED = 2
    ERROR = 3


# AsyncRemoteLocalControl control code → (remote, local lockout) as SCPIInstrument.remote_local takes them;
# None leaves that state as it is. Disabling remote (REN false) also ends a lockout (IEEE 488.1, from memory).
REMOTE_LOCAL: dict[int, tuple[bool | None, bool | None]] = {
    0: (False, False),  # disable remote
    1: (None, None),    # enable remote
    2: (False, False),  # disable remote and go to local
    3: (True, None),    # enable remote and go to remote
    4: (None, True),    # enable remote and lock out local
    5: (True, True),    # enable remote, go to remote and lock out local
    6: (False, None),   # go to local
}


class FatalErrorRaised(Exception):
    """A FatalError was sent; the session's channels are closed."""


@dataclass(frozen=True)
class Header:
    type: int
    control: int
    parameter: int
    length: int

    @classmethod
    def parse(cls, raw: bytes) -> Header | None:
        """The header, or None when it does not start with the "HS" prologue."""
        prologue, kind, control, parameter, length = HEADER.unpack(raw)
        return cls(kind, control, parameter, length) if prologue == PROLOGUE else None


def pack(kind: Type, control: int = 0, parameter: int = 0, payload: bytes = b"") -> bytes:
    return HEADER.pack(PROLOGUE, kind, control, parameter, len(payload)) + payload


def data_messages(data: bytes, message_id: int, max_message_bytes: int | None,
                  last: Type = Type.DATA_END) -> Iterator[bytes | memoryview]:
    """A response as Data messages and a final ``last`` (DataEnd: END), each at most ``max_message_bytes``
    with its header."""
    view = memoryview(data)
    step = len(view) if max_message_bytes is None else max(1, max_message_bytes - HEADER.size)
    while len(view) > step:
        yield HEADER.pack(PROLOGUE, Type.DATA, 0, message_id, step)
        yield view[:step]
        view = view[step:]
    yield HEADER.pack(PROLOGUE, last, 0, message_id, len(view))
    yield view


@dataclass
class HislipFaults:
    """Faults of the HiSLIP transport itself, switched from a test (``HislipServer.faults``); the
    instruments' own faults (``engine.Faults``) act on every transport alike."""

    fatal_error_next: bool = False  # the next program message is answered with FatalError 0, both channels
                                    # closed; the switch then goes off (one session lost, not every reconnect)


@dataclass
class _Locks:
    """The instrument's locks across sessions: one exclusive holder, and shared locks by name."""

    exclusive: int | None = None
    shared: dict[int, str] = field(default_factory=dict)
    changed: asyncio.Condition = field(default_factory=asyncio.Condition)

    def _free_for(self, session_id: int, name: str) -> bool:
        if self.exclusive not in (None, session_id):
            return False
        if not name:
            return not any(holder != session_id for holder in self.shared)
        return all(other == name for holder, other in self.shared.items() if holder != session_id)

    async def request(self, session_id: int, name: str, timeout_s: float) -> Lock:
        async with self.changed:
            if not self._free_for(session_id, name):
                try:
                    await asyncio.wait_for(self.changed.wait_for(lambda: self._free_for(session_id, name)),
                                           timeout_s)
                except TimeoutError:
                    return Lock.FAILURE
            if name:
                self.shared[session_id] = name
                return Lock.SUCCESS_SHARED
            self.exclusive = session_id
            return Lock.SUCCESS

    async def release(self, session_id: int) -> Lock:
        async with self.changed:
            if self.exclusive == session_id:
                self.exclusive = None
                outcome = Lock.SUCCESS
            elif self.shared.pop(session_id, None) is not None:
                outcome = Lock.SUCCESS_SHARED
            else:
                return Lock.ERROR
            self.changed.notify_all()
            return outcome

    async def forget(self, session_id: int) -> None:
        """A session ended: whatever it held is released."""
        async with self.changed:
            if self.exclusive == session_id:
                self.exclusive = None
            self.shared.pop(session_id, None)
            self.changed.notify_all()

    def holders(self) -> int:
        return len(set(self.shared) | ({self.exclusive} if self.exclusive is not None else set()))


@dataclass
class _Device:
    """One instrument behind a sub-address, and its locks."""

    name: str
    instrument: SCPIInstrument
    locks: _Locks = field(default_factory=_Locks)


class _Session:
    """One client: its two channels, the message exchange, the device-clear state and MAV."""

    def __init__(self, session_id: int, device: _Device, sync: asyncio.StreamWriter) -> None:
        self.id, self.device, self.sync = session_id, device, sync
        instrument = device.instrument
        self.async_writer: asyncio.StreamWriter | None = None
        self.exchange = MessageExchange(instrument, self.respond)
        self.client_max_bytes: int | None = None  # until the client says (AsyncMaximumMessageSize)
        self.clearing = False  # between AsyncDeviceClear and DeviceClearComplete
        self.cleared = asyncio.Event()  # set, and replaced, at every device clear (a paused response waits on it)
        self.unread = False  # a response was sent and the client has not said RMT-delivered since
        self.ended = asyncio.Event()

    async def respond(self, response: Response) -> None:
        if self.clearing:
            return
        message_id = response.tag if response.tag is not None else INITIAL_MESSAGE_ID
        if response.cut_at is not None:  # fault: the header announces it all, half of it comes
            self.sync.write(pack(Type.DATA_END, 0, message_id, response.data)[:HEADER.size + response.cut_at])
            await self.sync.drain()
            self.abort()
            raise ConnectionLost
        data = response.data
        if response.pause_at is not None:  # a short read: Data messages now, the rest after the pause
            cleared = self.cleared
            self.sync.writelines(data_messages(data[:response.pause_at], message_id, self.client_max_bytes,
                                               last=Type.DATA))
            await self.sync.drain()
            try:
                await asyncio.wait_for(cleared.wait(), response.pause_s)
                return  # a device clear meanwhile abandons the rest of the response (§6.12)
            except TimeoutError:
                data = data[response.pause_at:]
        self.sync.writelines(data_messages(data, message_id, self.client_max_bytes))
        self.unread = True
        await self.sync.drain()

    def abort(self) -> None:
        for writer in (self.sync, self.async_writer):
            if writer is not None:
                writer.transport.abort()
        self.ended.set()


class HislipServer:
    """The bench's instruments over HiSLIP on one TCP port (both channels of every session)."""

    def __init__(self, instruments: Mapping[str, SCPIInstrument], host: str = "127.0.0.1",
                 port: int = DEFAULT_PORT) -> None:
        self.instruments = dict(instruments)
        self._listener = Listener(self._connection, host, port, what="hislip")
        self.faults = HislipFaults()
        self._devices: dict[str, _Device] = {}  # by sub-address; made in the serving loop (asyncio.Condition)
        self._sessions: dict[int, _Session] = {}
        self._next_id = 0

    @property
    def resources(self) -> dict[str, str]:
        """VISA resource strings by instrument name (``TCPIP0::127.0.0.1::hislip0,4880::INSTR``)."""
        return {name: f"TCPIP0::{self._listener.host}::{SUB_ADDRESS.format(n)},{self._listener.port}::INSTR"
                for n, name in enumerate(self.instruments)}

    async def start(self) -> None:
        self._devices = {SUB_ADDRESS.format(n): _Device(name, instrument)
                         for n, (name, instrument) in enumerate(self.instruments.items())}
        await self._listener.start()

    async def stop(self) -> None:
        await self._listener.stop()

    # -- one TCP connection: which channel it is ------------------------------------------------------
    async def _connection(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        try:
            header = await _read_header(reader, writer)
            if header.type == Type.INITIALIZE:
                await self._synchronous(header, reader, writer)
            elif header.type == Type.ASYNC_INITIALIZE:
                await self._asynchronous(header, reader, writer)
            else:
                await _fatal(writer, Fatal.INVALID_INITIALIZATION, "a connection starts with Initialize or "
                                                                   "AsyncInitialize")
        except (FatalErrorRaised, asyncio.IncompleteReadError, ConnectionError):
            pass

    async def _synchronous(self, init: Header, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        sub_address = (await reader.readexactly(init.length)).decode("latin-1")
        device = self._devices.get(sub_address.lower())
        if device is None:
            await _fatal(writer, Fatal.INVALID_INITIALIZATION, f"no device {sub_address!r} here; served: "
                                                               f"{', '.join(self._devices)}")
        client_version = (init.parameter >> 24, (init.parameter >> 16) & 0xFF)
        major, minor = min(client_version, VERSION)
        self._next_id = self._next_id % 0xFFFF + 1
        session = _Session(self._next_id, device, writer)
        self._sessions[session.id] = session
        writer.write(pack(Type.INITIALIZE_RESPONSE, 0, (major << 24) | (minor << 16) | session.id))
        running = asyncio.ensure_future(session.exchange.run())
        try:
            await self._read_synchronous(session, reader)
        finally:
            session.exchange.end_of_input()
            await asyncio.gather(running, return_exceptions=True)
            del self._sessions[session.id]
            await device.locks.forget(session.id)
            session.abort()

    async def _read_synchronous(self, session: _Session, reader: asyncio.StreamReader) -> None:
        writer = session.sync
        while True:
            header = await _read_header(reader, writer)
            if header.type in (Type.DATA, Type.DATA_END):
                if session.async_writer is None:
                    await _fatal(writer, Fatal.CHANNELS_NOT_ESTABLISHED, "open the asynchronous channel first")
                payload = await _payload(header, reader, writer)
                if self.faults.fatal_error_next:
                    self.faults.fatal_error_next = False
                    await _fatal(writer, Fatal.UNIDENTIFIED, "injected fault: the session is lost")
                if header.control & RMT_DELIVERED:
                    session.unread = False
                if payload is not None and not session.clearing:
                    session.exchange.receive(payload, end=header.type == Type.DATA_END, tag=header.parameter)
            elif header.type == Type.DEVICE_CLEAR_COMPLETE:
                session.clearing = False
                session.unread = False
                overlapped = bool(header.control & FEATURE_OVERLAPPED)  # the client's request, granted
                session.exchange.interrupt_queries = not overlapped
                writer.write(pack(Type.DEVICE_CLEAR_ACKNOWLEDGE, FEATURE_OVERLAPPED if overlapped else 0))
            elif header.type == Type.TRIGGER:
                pass  # DT0: no device trigger (IEEE 488.2 §5.? capability codes, from memory)
            elif header.type == Type.FATAL_ERROR:
                return
            else:
                await self._unexpected(header, reader, writer)

    async def _asynchronous(self, init: Header, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        session = self._sessions.get(init.parameter)
        if session is None or session.async_writer is not None:
            await _fatal(writer, Fatal.INVALID_INITIALIZATION, f"no session {init.parameter} waiting for its "
                                                               "asynchronous channel")
        session.async_writer = writer
        writer.write(pack(Type.ASYNC_INITIALIZE_RESPONSE, 0, int.from_bytes(VENDOR_ID, "big")))
        reading = asyncio.ensure_future(self._read_asynchronous(session, reader, writer))
        ended = asyncio.ensure_future(session.ended.wait())
        try:
            await asyncio.wait({reading, ended}, return_when=asyncio.FIRST_COMPLETED)
        finally:
            reading.cancel()
            ended.cancel()
            session.abort()  # one channel gone ends the session (§6.2, from memory)

    async def _read_asynchronous(self, session: _Session, reader: asyncio.StreamReader,
                                 writer: asyncio.StreamWriter) -> None:
        while True:
            header = await _read_header(reader, writer)
            kind = header.type
            if kind == Type.ASYNC_DEVICE_CLEAR:
                session.clearing = True
                session.cleared.set()
                session.cleared = asyncio.Event()
                session.exchange.device_clear()
                writer.write(pack(Type.ASYNC_DEVICE_CLEAR_ACKNOWLEDGE, 0))
            elif kind == Type.ASYNC_STATUS_QUERY:
                if header.control & RMT_DELIVERED:
                    session.unread = False
                stb = session.device.instrument.status_byte() | (0x10 if session.unread else 0)  # MAV, IEEE 488.2 §11.2
                writer.write(pack(Type.ASYNC_STATUS_RESPONSE, stb))
            elif kind == Type.ASYNC_MAXIMUM_MESSAGE_SIZE:
                payload = await _payload(header, reader, writer)
                if payload is not None and len(payload) == 8:
                    session.client_max_bytes = int.from_bytes(payload, "big")
                writer.write(pack(Type.ASYNC_MAXIMUM_MESSAGE_SIZE_RESPONSE, 0, 0, MAX_MESSAGE_BYTES.to_bytes(8, "big")))
            elif kind == Type.ASYNC_LOCK:
                name = (await _payload(header, reader, writer) or b"").decode("latin-1")
                locks = session.device.locks
                outcome = (await locks.request(session.id, name, header.parameter / 1000) if header.control
                           else await locks.release(session.id))
                writer.write(pack(Type.ASYNC_LOCK_RESPONSE, outcome))
            elif kind == Type.ASYNC_LOCK_INFO:
                locks = session.device.locks
                writer.write(pack(Type.ASYNC_LOCK_INFO_RESPONSE, int(locks.exclusive is not None), locks.holders()))
            elif kind == Type.ASYNC_REMOTE_LOCAL_CONTROL and header.control in REMOTE_LOCAL:
                session.device.instrument.remote_local(*REMOTE_LOCAL[header.control])
                writer.write(pack(Type.ASYNC_REMOTE_LOCAL_RESPONSE))
            elif kind == Type.FATAL_ERROR:
                return
            else:
                await self._unexpected(header, reader, writer)
            await writer.drain()

    @staticmethod
    async def _unexpected(header: Header, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        """A message this server does not take on this channel: Error 1, its payload discarded (§6.4)."""
        await _payload(header, reader, writer)
        if header.type != Type.ERROR:  # the client's own Error is only noted
            writer.write(pack(Type.ERROR, Err.UNRECOGNIZED_TYPE, 0, f"message type {header.type} not served "
                                                                   "on this channel".encode()))
        _log.debug("HiSLIP: unexpected message type %d", header.type)


async def _read_header(reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> Header:
    header = Header.parse(await reader.readexactly(HEADER.size))
    if header is None:
        await _fatal(writer, Fatal.POORLY_FORMED_HEADER, "a message starts with the prologue 'HS'")
    return header


async def _payload(header: Header, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> bytes | None:
    """The payload, or None when it is longer than our maximum message size: then it is read and thrown
    away and the client gets Error 4 (§6.4)."""
    if header.length <= MAX_MESSAGE_BYTES:
        return await reader.readexactly(header.length)
    left = header.length
    while left:
        left -= len(await reader.readexactly(min(left, DISCARD_CHUNK)))
    writer.write(pack(Type.ERROR, Err.MESSAGE_TOO_LARGE, 0, f"largest message taken: {MAX_MESSAGE_BYTES} bytes".encode()))
    return None


async def _fatal(writer: asyncio.StreamWriter, code: Fatal, text: str) -> None:
    """Send FatalError and give up on this channel (the caller's session then ends)."""
    writer.write(pack(Type.FATAL_ERROR, code, 0, text.encode()))
    try:
        await writer.drain()
    finally:
        writer.close()
    raise FatalErrorRaised(text)
