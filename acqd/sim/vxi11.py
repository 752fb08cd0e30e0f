"""The VXI-11 transport: the TCP/IP Instrument Protocol over ONC RPC (``TCPIP0::host::inst0::INSTR``).

Written from the specification, VXI-11 revision 1.0 (VXIbus Consortium, TCP/IP Instrument Protocol
Specification, 1995); its RPC language (the ``Device_*`` structures in §C, the procedure numbers and
error codes) is followed; clause numbers below are from memory. What is served:

* **Core channel** (program 0x0607AF version 1, TCP): create_link (10; device names ``inst0``,
  ``inst1``, … in the bench's order; another name is error 3, device not accessible), device_write (11;
  the END flag, 0x08, ends the program message; more data than ``maxRecvSize`` is error 5),
  device_read (12; reasons REQCNT 1, CHR 2 with the termchar flag 0x80, END 4; no response within
  ``io_timeout`` is error 15 and leaves the pending query pending), device_readstb (13; MAV while
  response bytes wait to be read), device_trigger (14; error 8: the simulated instruments have no device
  trigger, IEEE 488.2 DT0), device_clear (15; the engine's device clear and the link's unread response
  dropped), device_remote (16), device_local (17), device_lock (18; flag 0x01 waits up to
  ``lock_timeout``, else error 11 at once), device_unlock (19; error 12 without a lock), destroy_link (23;
  its lock released; a connection that closes destroys the links made on it). device_enable_srq,
  device_docmd and the interrupt channel (20, 22, 25, 26) answer error 8. An unknown link is error 4.
* **Abort channel** (program 0x0607B0 version 1, TCP, on the port create_link names): device_abort (1)
  ends the link's device_read or lock wait in progress with error 23 (abort).
* **Locks** are per instrument across links: reads and writes of another link get error 11 (after
  waiting up to ``lock_timeout`` when they set flag 0x01).
* **Query interrupted**: a device_write while a response is still unread discards it and queues −410
  (IEEE 488.2 §6.3.2.3; VXI-11 keeps the output queue until read, unlike a raw socket).
* **Faults**: the instrument's own (``engine.Faults``, the fault table) as on every transport; a block
  cut half-way is read up to the cut, then the connection drops; a short read is a device_read that ends
  at the pause without END, the rest readable after it (device_clear drops it). ``Vxi11Server.faults``
  (``Vxi11Faults``) adds this transport's own: core-channel calls that get no reply (an RPC timeout) and an
  abort channel that resets every connection.
* **Portmapper** (``oncrpc``): on port 111 (clients ask there) when the server is given one; the
  resources then read ``TCPIP0::host::inst0::INSTR``. Without it, ``TCPIP0::host,PORT::inst0::INSTR``
  names the core channel's port (pyvisa-py then skips the portmapper).
"""

from __future__ import annotations

import asyncio
import contextvars
import functools
from collections.abc import Mapping
from dataclasses import dataclass, field
from enum import IntEnum

from .engine import MessageExchange, Response, SCPIInstrument
from .oncrpc import PORTMAPPER_PROGRAM, PORTMAPPER_VERSION, DropConnection, NoReply, Procedure, Program, XdrReader, \
    XdrWriter, portmapper, serve_connection
from .serving import Listener

CORE_PROGRAM, CORE_VERSION = 0x0607AF, 1
ABORT_PROGRAM, ABORT_VERSION = 0x0607B0, 1
DEVICE_NAME = "inst{}"
MAX_RECV_BYTES = MessageExchange.MAX_MESSAGE_BYTES  # the largest device_write accepted (maxRecvSize)
FLAG_WAIT_LOCK, FLAG_END, FLAG_TERMCHAR = 0x01, 0x08, 0x80
REASON_REQCNT, REASON_CHR, REASON_END = 0x01, 0x02, 0x04


class Error(IntEnum):
    """Device_ErrorCode (VXI-11 §B.5, from memory)."""

    NONE = 0
    DEVICE_NOT_ACCESSIBLE = 3
    INVALID_LINK = 4
    PARAMETER = 5
    NOT_SUPPORTED = 8
    LOCKED_BY_ANOTHER_LINK = 11
    NO_LOCK_HELD = 12
    IO_TIMEOUT = 15
    ABORT = 23


# The links made on the core-channel connection being served (each connection is served in a task of its own).
_LINKS_OF_CONNECTION: contextvars.ContextVar[set[int]] = contextvars.ContextVar("links_of_connection")


@dataclass
class Vxi11Faults:
    """Faults of the VXI-11 transport itself, switched from a test (``Vxi11Server.faults``); the
    instruments' own faults (``engine.Faults``) act on every transport alike."""

    silent_calls: int = 0  # this many core-channel calls more get no reply at all (the client's RPC times
                           # out); the procedure is not run, so a response waits on in the link
    abort_channel_lost: bool = False  # the abort channel refuses connections (its listener is stopped)


class Aborted(Exception):
    """device_abort arrived on the abort channel for this link."""


@dataclass
class _Device:
    """One instrument behind a device name, and which link holds its lock."""

    instrument: SCPIInstrument
    lock_holder: int | None = None
    released: asyncio.Event = field(default_factory=asyncio.Event)  # set, and replaced, at every release

    def release(self, link_id: int) -> bool:
        if self.lock_holder != link_id:
            return False
        self.lock_holder = None
        self.released.set()
        self.released = asyncio.Event()
        return True


class _Link:
    """One link: the message exchange, the response waiting to be read, and an abort to watch for."""

    def __init__(self, link_id: int, device: _Device) -> None:
        self.id, self.device = link_id, device
        self.exchange = MessageExchange(device.instrument, self._respond)
        self.unread = bytearray()  # response bytes not yet read; the last of them ends with END
        self.readable = asyncio.Event()
        self.aborted = asyncio.Event()
        self.cut_at: int | None = None  # fault: this many more bytes are read, then the connection drops
        self.rest: asyncio.Task | None = None  # fault: the second part of a short-read response, on its way
        self.running = asyncio.ensure_future(self.exchange.run())

    async def _respond(self, response: Response) -> None:
        data = response.data
        if response.pause_at is not None:  # a short read: a device_read ends at the pause without END
            self.rest = asyncio.ensure_future(self._arrive_later(data[response.pause_at:], response.pause_s))
            data = data[:response.pause_at]
        self.unread += data
        self.cut_at = response.cut_at
        self.readable.set()

    async def _arrive_later(self, data: bytes, pause_s: float) -> None:
        await asyncio.sleep(pause_s)
        self.rest = None
        self.unread += data
        self.readable.set()

    def take(self, count: int, termchar: int | None) -> tuple[bytes, int]:
        """Up to ``count`` response bytes, stopping after ``termchar``; and the reasons the read ended."""
        size = min(count, len(self.unread))
        if termchar is not None and (at := self.unread.find(termchar, 0, size)) >= 0:
            size = at + 1
        if self.cut_at is not None:
            if self.cut_at == 0:
                raise DropConnection
            size = min(size, self.cut_at)
            self.cut_at -= size
        data = bytes(self.unread[:size])
        del self.unread[:size]
        reason = (REASON_END if not self.unread and self.rest is None else 0) | (REASON_REQCNT if size == count else 0)
        if termchar is not None and data.endswith(bytes([termchar])):
            reason |= REASON_CHR
        if not self.unread:
            self.readable.clear()
        return data, reason

    def drop_unread(self) -> None:
        self.unread.clear()
        self.cut_at = None
        self.readable.clear()
        if self.rest is not None:
            self.rest.cancel()
            self.rest = None

    async def until(self, event: asyncio.Event, timeout_s: float) -> bool:
        """Wait for ``event`` up to ``timeout_s``; False on timeout, Aborted on device_abort."""
        self.aborted.clear()
        waiting = asyncio.ensure_future(event.wait())
        abort = asyncio.ensure_future(self.aborted.wait())
        try:
            done, _ = await asyncio.wait({waiting, abort}, timeout=timeout_s, return_when=asyncio.FIRST_COMPLETED)
        finally:
            waiting.cancel()
            abort.cancel()
        if abort in done and waiting not in done:
            raise Aborted
        return waiting in done

    async def close(self) -> None:
        self.drop_unread()
        self.exchange.end_of_input()
        await asyncio.gather(self.running, return_exceptions=True)
        self.device.release(self.id)


async def unlocked(link: _Link, flags: int, lock_timeout_s: float) -> bool:
    """True once no other link holds the device's lock: at once, or within ``lock_timeout_s`` when flag
    0x01 asks to wait (Aborted on device_abort meanwhile)."""
    device = link.device
    deadline = asyncio.get_running_loop().time() + lock_timeout_s
    while device.lock_holder not in (None, link.id):
        left = deadline - asyncio.get_running_loop().time()
        if not flags & FLAG_WAIT_LOCK or not await link.until(device.released, left):
            return False
    return True


class Vxi11Server:
    """The bench's instruments over VXI-11: the core channel, the abort channel, optionally the portmapper."""

    def __init__(self, instruments: Mapping[str, SCPIInstrument], host: str = "127.0.0.1", port: int = 0,
                 portmapper_port: int | None = None) -> None:
        self.instruments = dict(instruments)
        self.host = host
        self._devices: dict[str, _Device] = {}
        self._links: dict[int, _Link] = {}
        self._next_link = 0
        self.faults = Vxi11Faults()
        core = {10: self._create_link, 11: self._write, 12: self._read, 13: self._read_stb, 14: self._trigger,
                15: self._clear, 16: self._remote, 17: self._local, 18: self._lock, 19: self._unlock,
                20: self._not_supported, 22: self._not_supported, 23: self._destroy_link,
                25: self._not_supported, 26: self._not_supported}
        core = {number: self._unless_silent(procedure) for number, procedure in core.items()}
        self._core = Listener(functools.partial(self._serve_core, {CORE_PROGRAM: Program(CORE_PROGRAM, CORE_VERSION,
                                                                                         core)}),
                              host, port, what="vxi11")
        self._abort = Listener(functools.partial(self._serve_abort, {
            ABORT_PROGRAM: Program(ABORT_PROGRAM, ABORT_VERSION, {1: self._device_abort})}), host,
            what="vxi11 abort channel")
        self._portmapper = None if portmapper_port is None else Listener(
            functools.partial(self._serve, {PORTMAPPER_PROGRAM: portmapper(self._mappings)}), host, portmapper_port,
            what="portmapper")

    @property
    def resources(self) -> dict[str, str]:
        """VISA resource strings by instrument name."""
        address = self.host if self._portmapper is not None else f"{self.host},{self._core.port}"
        return {name: f"TCPIP0::{address}::{DEVICE_NAME.format(n)}::INSTR" for n, name in enumerate(self.instruments)}

    async def start(self) -> None:
        self._devices = {DEVICE_NAME.format(n): _Device(instrument) for n, instrument in enumerate(self.instruments.values())}
        for listener in self._listeners():
            await listener.start()

    async def stop(self) -> None:
        for listener in self._listeners():
            await listener.stop()
        for link in list(self._links.values()):
            await link.close()
        self._links.clear()

    def _listeners(self) -> list[Listener]:
        return [self._core, self._abort] + ([self._portmapper] if self._portmapper is not None else [])

    def _mappings(self) -> dict[tuple[int, int], int]:
        mappings = {(CORE_PROGRAM, CORE_VERSION): self._core.port, (ABORT_PROGRAM, ABORT_VERSION): self._abort.port}
        if self._portmapper is not None:
            mappings[(PORTMAPPER_PROGRAM, PORTMAPPER_VERSION)] = self._portmapper.port
        return mappings

    @staticmethod
    async def _serve(programs: Mapping[int, Program], reader: asyncio.StreamReader,
                     writer: asyncio.StreamWriter) -> None:
        await serve_connection(reader, writer, programs)

    async def _serve_abort(self, programs: Mapping[int, Program], reader: asyncio.StreamReader,
                           writer: asyncio.StreamWriter) -> None:
        """The abort channel; under the ``abort_channel_lost`` fault each connection is reset at once."""
        if self.faults.abort_channel_lost:
            writer.transport.abort()
            return
        await serve_connection(reader, writer, programs)

    def _unless_silent(self, procedure: Procedure) -> Procedure:
        """``procedure``, or no reply at all while the ``silent_calls`` fault lasts (the client's RPC times out)."""
        async def call(args: XdrReader) -> bytes:
            if self.faults.silent_calls > 0:
                self.faults.silent_calls -= 1
                raise NoReply
            return await procedure(args)
        return call

    async def _serve_core(self, programs: Mapping[int, Program], reader: asyncio.StreamReader,
                          writer: asyncio.StreamWriter) -> None:
        """The core channel; the links made on a connection end with it, their locks released (a client
        that died without destroy_link must not keep the device locked; VXI-11 §B.? from memory)."""
        made = _LINKS_OF_CONNECTION.set(set())
        try:
            await serve_connection(reader, writer, programs)
        finally:
            for link_id in _LINKS_OF_CONNECTION.get():
                link = self._links.pop(link_id, None)
                if link is not None:
                    await link.close()
            _LINKS_OF_CONNECTION.reset(made)

    # -- the procedures (arguments as in VXI-11 §C's Device_*Parms) --------------------------------------
    def _link(self, link_id: int) -> _Link | None:
        return self._links.get(link_id)

    async def _create_link(self, args: XdrReader) -> bytes:
        """Create_LinkParms (clientId, lockDevice, lock_timeout, device) → (error, lid, abortPort, maxRecvSize)."""
        args.int()
        lock_device, lock_timeout_ms, name = args.bool(), args.uint(), args.string(256)
        device = self._devices.get(name.lower())
        if device is None:
            return XdrWriter().int(Error.DEVICE_NOT_ACCESSIBLE).int(0).uint(0).uint(0).encoded()
        self._next_link += 1
        link = _Link(self._next_link, device)
        if lock_device and not await unlocked(link, FLAG_WAIT_LOCK, lock_timeout_ms / 1000):
            await link.close()
            return XdrWriter().int(Error.LOCKED_BY_ANOTHER_LINK).int(0).uint(0).uint(0).encoded()
        if lock_device:
            device.lock_holder = link.id
        self._links[link.id] = link
        _LINKS_OF_CONNECTION.get().add(link.id)
        return XdrWriter().int(Error.NONE).int(link.id).uint(self._abort.port).uint(MAX_RECV_BYTES).encoded()

    async def _write(self, args: XdrReader) -> bytes:
        """Device_WriteParms (lid, io_timeout, lock_timeout, flags, data) → (error, size)."""
        link = self._link(args.int())
        args.uint()
        lock_timeout_ms, flags, data = args.uint(), args.int(), args.opaque()
        if link is None:
            return XdrWriter().int(Error.INVALID_LINK).uint(0).encoded()
        if len(data) > MAX_RECV_BYTES:
            return XdrWriter().int(Error.PARAMETER).uint(0).encoded()
        if not await unlocked(link, flags, lock_timeout_ms / 1000):
            return XdrWriter().int(Error.LOCKED_BY_ANOTHER_LINK).uint(0).encoded()
        if link.unread or link.rest is not None:
            link.drop_unread()
            link.device.instrument.push_error(-410, "a new message arrived before the response was read")
        link.exchange.receive(data, end=bool(flags & FLAG_END))
        return XdrWriter().int(Error.NONE).uint(len(data)).encoded()

    async def _read(self, args: XdrReader) -> bytes:
        """Device_ReadParms (lid, requestSize, io_timeout, lock_timeout, flags, termChar) → (error, reason, data)."""
        link = self._link(args.int())
        request_size, io_timeout_ms, lock_timeout_ms, flags, termchar = (args.uint(), args.uint(), args.uint(),
                                                                         args.int(), args.int())
        if link is None:
            return _read_reply(Error.INVALID_LINK)
        try:
            if not await unlocked(link, flags, lock_timeout_ms / 1000):
                return _read_reply(Error.LOCKED_BY_ANOTHER_LINK)
            if not await link.until(link.readable, io_timeout_ms / 1000):
                return _read_reply(Error.IO_TIMEOUT)
        except Aborted:
            return _read_reply(Error.ABORT)
        data, reason = link.take(max(request_size, 1), termchar & 0xFF if flags & FLAG_TERMCHAR else None)
        return _read_reply(Error.NONE, reason, data)

    async def _read_stb(self, args: XdrReader) -> bytes:
        """Device_GenericParms → (error, stb); MAV (IEEE 488.2 §11.2) while response bytes wait to be read."""
        link = self._link(args.int())
        if link is None:
            return XdrWriter().int(Error.INVALID_LINK).uint(0).encoded()
        stb = link.device.instrument.status_byte() | (0x10 if link.unread else 0)
        return XdrWriter().int(Error.NONE).uint(stb).encoded()

    async def _trigger(self, args: XdrReader) -> bytes:
        return _error(Error.INVALID_LINK if self._link(args.int()) is None else Error.NOT_SUPPORTED)

    async def _clear(self, args: XdrReader) -> bytes:
        link = self._link(args.int())
        if link is None:
            return _error(Error.INVALID_LINK)
        link.drop_unread()
        link.exchange.device_clear()
        return _error(Error.NONE)

    async def _remote(self, args: XdrReader) -> bytes:
        return self._remote_local(args, True)

    async def _local(self, args: XdrReader) -> bytes:
        return self._remote_local(args, False)

    def _remote_local(self, args: XdrReader, remote: bool) -> bytes:
        link = self._link(args.int())
        if link is None:
            return _error(Error.INVALID_LINK)
        link.device.instrument.remote_local(remote, None)
        return _error(Error.NONE)

    async def _lock(self, args: XdrReader) -> bytes:
        """Device_LockParms (lid, flags, lock_timeout) → error."""
        link = self._link(args.int())
        flags, lock_timeout_ms = args.int(), args.uint()
        if link is None:
            return _error(Error.INVALID_LINK)
        try:
            if not await unlocked(link, flags, lock_timeout_ms / 1000):
                return _error(Error.LOCKED_BY_ANOTHER_LINK)
        except Aborted:
            return _error(Error.ABORT)
        link.device.lock_holder = link.id
        return _error(Error.NONE)

    async def _unlock(self, args: XdrReader) -> bytes:
        link = self._link(args.int())
        if link is None:
            return _error(Error.INVALID_LINK)
        return _error(Error.NONE if link.device.release(link.id) else Error.NO_LOCK_HELD)

    async def _destroy_link(self, args: XdrReader) -> bytes:
        link = self._links.pop(args.int(), None)
        if link is None:
            return _error(Error.INVALID_LINK)
        await link.close()
        return _error(Error.NONE)

    async def _not_supported(self, args: XdrReader) -> bytes:
        return _error(Error.NOT_SUPPORTED)

    async def _device_abort(self, args: XdrReader) -> bytes:
        link = self._link(args.int())
        if link is None:
            return _error(Error.INVALID_LINK)
        link.aborted.set()
        return _error(Error.NONE)


def _error(code: Error) -> bytes:
    return XdrWriter().int(code).encoded()


def _read_reply(code: Error, reason: int = 0, data: bytes = b"") -> bytes:
    return XdrWriter().int(code).int(reason).opaque(data).encoded()
