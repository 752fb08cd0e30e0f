"""The raw-socket transport: NL-terminated SCPI on a TCP port (``TCPIP0::host::port::SOCKET``).

A socket carries no END and no device clear: NL alone ends a program message and a response, and a reply
counts as read once it is written (the engine's docstring says what follows for −410 and −420). Block
faults act on the wire: ``drop_mid_block`` sends half the response and closes the connection.
"""

from __future__ import annotations

import asyncio
import functools
from collections.abc import Mapping

from .engine import ConnectionLost, MessageExchange, Response, SCPIInstrument
from .serving import Listener, ack_promptly


class SocketServer:
    """Each instrument on a TCP port of its own (the OS picks them); ``resources`` reach them."""

    def __init__(self, instruments: Mapping[str, SCPIInstrument], host: str = "127.0.0.1") -> None:
        self.instruments = dict(instruments)
        self._listeners = {name: Listener(functools.partial(_serve, instrument), host,
                                          limit=MessageExchange.MAX_MESSAGE_BYTES)
                           for name, instrument in self.instruments.items()}

    @property
    def resources(self) -> dict[str, str]:
        """VISA resource strings by instrument name (``TCPIP0::127.0.0.1::PORT::SOCKET``)."""
        return {name: f"TCPIP0::{listener.host}::{listener.port}::SOCKET" for name, listener in self._listeners.items()}

    async def start(self) -> None:
        for listener in self._listeners.values():
            await listener.start()

    async def stop(self) -> None:
        for listener in self._listeners.values():
            await listener.stop()


async def _serve(instrument: SCPIInstrument, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
    """A reader that hands each line to the exchange, and the exchange running them one at a time."""
    exchange = MessageExchange(instrument, lambda response: _send(writer, response))
    reading = asyncio.ensure_future(_read(reader, writer, exchange))
    try:
        await exchange.run()
    finally:
        reading.cancel()


async def _read(reader: asyncio.StreamReader, writer: asyncio.StreamWriter, exchange: MessageExchange) -> None:
    partial = b""
    while True:
        ack_promptly(writer)
        try:
            exchange.receive(await reader.readuntil(b"\n"))
        except asyncio.IncompleteReadError as exc:
            partial = exc.partial
            break
        except asyncio.LimitOverrunError:
            exchange.instrument.push_error(-223, "message longer than 1 MiB; connection closed")
            break
        except ConnectionError:
            break
    exchange.end_of_input(partial)


async def _send(writer: asyncio.StreamWriter, response: Response) -> None:
    if response.cut_at is not None:
        writer.write(response.data[:response.cut_at])
        await writer.drain()
        writer.transport.abort()
        raise ConnectionLost
    data = response.data
    if response.pause_at is not None:  # a short read: the client sees the reply arrive in two parts
        writer.write(data[:response.pause_at])
        await writer.drain()
        await asyncio.sleep(response.pause_s)
        data = data[response.pause_at:]
    writer.write(data)
    await writer.drain()
