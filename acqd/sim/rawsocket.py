"""The raw-socket transport: NL-terminated SCPI on a TCP port (``TCPIP0::host::port::SOCKET``).

A socket carries no END and no device clear: NL alone ends a program message and a response, and a reply
counts as read once it is written (the engine's docstring says what follows for −410 and −420). Block
faults act on the wire: ``drop_mid_block`` sends half the response and closes the connection.
"""

from __future__ import annotations

import asyncio

from .engine import ConnectionLost, MessageExchange, Response, SCPIInstrument
from .serving import Listener, ack_promptly


class SocketServer:
    """One instrument on one TCP port; ``resource`` is the VISA resource string to reach it."""

    def __init__(self, instrument: SCPIInstrument, host: str = "127.0.0.1", port: int = 0) -> None:
        self.instrument = instrument
        self._listener = Listener(self._serve, host, port, limit=MessageExchange.MAX_MESSAGE_BYTES)

    @property
    def resource(self) -> str:
        return f"TCPIP0::{self._listener.host}::{self._listener.port}::SOCKET"

    async def start(self) -> None:
        await self._listener.start()

    async def stop(self) -> None:
        await self._listener.stop()

    async def _serve(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        """A reader that hands each line to the exchange, and the exchange running them one at a time."""
        exchange = MessageExchange(self.instrument, lambda response: _send(writer, response))
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
    writer.write(response.data)
    await writer.drain()
