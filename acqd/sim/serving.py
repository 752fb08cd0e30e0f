"""What every transport of the simulated bench shares: a TCP listener whose connections end with it, and an
event loop in a background thread to host servers in-process.

A transport server (``rawsocket.SocketServer``, ``hislip.HislipServer``, ``vxi11.Vxi11Server``) serves the
bench's instruments and offers ``resources`` (the VISA resource string of each, by name), ``start()`` and
``stop()``; all listen on 127.0.0.1 unless told otherwise.
"""

from __future__ import annotations

import asyncio
import socket
import threading
from collections.abc import Awaitable, Callable, Coroutine
from typing import Any, Protocol


Handler = Callable[[asyncio.StreamReader, asyncio.StreamWriter], Awaitable[None]]


class TransportServer(Protocol):
    """The bench's instruments served over one transport."""

    @property
    def resources(self) -> dict[str, str]:
        """VISA resource strings by instrument name."""

    async def start(self) -> None: ...

    async def stop(self) -> None: ...


class ListenError(OSError):
    """A listener could not start; ``what`` names it (``hislip``, ``portmapper``, …) for the message."""

    def __init__(self, what: str, host: str, port: int, reason: str) -> None:
        super().__init__(f"cannot listen on {host} port {port} ({what}): {reason}")
        self.what, self.host, self.port, self.reason = what, host, port, reason


class Listener:
    """A listening TCP socket; ``stop()`` closes it and ends every connection it accepted. ``what`` names
    it in a ListenError."""

    def __init__(self, handle: Handler, host: str = "127.0.0.1", port: int = 0, limit: int = 1 << 16,
                 what: str = "socket") -> None:
        self.handle, self.host, self.port, self.limit, self.what = handle, host, port, limit, what
        self._server: asyncio.base_events.Server | None = None
        self._tasks: set[asyncio.Task] = set()

    async def start(self) -> None:
        try:
            self._server = await asyncio.start_server(self._accept, self.host, self.port, limit=self.limit)
        except OSError as exc:
            raise ListenError(self.what, self.host, self.port, exc.strerror or str(exc)) from None
        self.port = self._server.sockets[0].getsockname()[1]

    async def stop(self) -> None:
        if self._server is not None:
            self._server.close()
            for task in list(self._tasks):
                task.cancel()
            await asyncio.gather(*self._tasks, return_exceptions=True)
            await self._server.wait_closed()
            self._server = None

    async def _accept(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        task = asyncio.current_task()
        self._tasks.add(task)
        try:
            await self.handle(reader, writer)
        except asyncio.CancelledError:
            pass
        finally:
            writer.close()
            self._tasks.discard(task)


def ack_promptly(writer: asyncio.StreamWriter) -> None:
    """Ask Linux to acknowledge the next segment at once rather than after its ~40 ms delay.

    A client that writes a command and then a query as two small packets (Nagle's algorithm on, as in
    pyvisa-py's default) otherwise waits for that delayed ACK before its query leaves. Quick-ACK mode
    does not persist, so it is renewed after every read. A no-op where the option does not exist.
    """
    sock = writer.get_extra_info("socket")
    if sock is not None and hasattr(socket, "TCP_QUICKACK"):
        try:
            sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_QUICKACK, 1)
        except OSError:
            pass


class LoopThread:
    """An event loop in a background thread, so tests and the step test can host servers in-process."""

    def __init__(self, name: str = "acqd-sim") -> None:
        self.loop = asyncio.new_event_loop()
        self._thread = threading.Thread(target=self._run, name=name, daemon=True)

    def _run(self) -> None:
        asyncio.set_event_loop(self.loop)
        self.loop.run_forever()

    def start(self) -> None:
        self._thread.start()

    def run(self, coro: Coroutine[Any, Any, Any], timeout_s: float = 10.0) -> Any:
        """Run a coroutine on the loop and return its result (raises what it raised)."""
        return asyncio.run_coroutine_threadsafe(coro, self.loop).result(timeout_s)

    def call(self, func: Callable[..., Any], *args: Any) -> Any:
        """Call ``func`` in the loop's thread (instrument state belongs to that thread)."""
        async def invoke() -> Any:
            return func(*args)
        return self.run(invoke())

    def stop(self) -> None:
        if self._thread.is_alive():
            self.loop.call_soon_threadsafe(self.loop.stop)
            self._thread.join(10)
        self.loop.close()
