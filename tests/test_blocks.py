"""acqd.visa.blocks on its own: block framing (IEEE 488.2 §8.7.9-10) and the socket reader over real TCP.

References: IEEE 488.2-1992 §8.7.9 (definite length arbitrary block), §8.7.10 (indefinite length, which
needs END), §8.5 (response message terminator); POSIX select()/recv() semantics for the socket reader.
Peers are plain TCP sockets on 127.0.0.1 that this file opens and closes.
"""

from __future__ import annotations

import io
import socket
import threading
import time
from collections.abc import Iterator

import pytest

from acqd import scpi
from acqd.errors import InstrumentError
from acqd.visa import Session
from acqd.visa.blocks import SocketReader, read_block


def reader_of(data: bytes):
    """A ReadExact over fixed bytes that refuses to read past them (a short read is a test failure)."""
    stream = io.BytesIO(data)

    def read_exact(count: int) -> bytes:
        chunk = stream.read(count)
        assert len(chunk) == count, f"read past the end: wanted {count}, {len(chunk)} left"
        return chunk

    return read_exact, stream


@pytest.mark.parametrize("block, payload", [
    (b"#15hello", b"hello"), (b"#10", b""), (b"#3100" + bytes(range(100)), bytes(range(100))),
    (b"#9000000003abc", b"abc"),
])
def test_read_block_takes_exactly_the_announced_bytes(block, payload):
    # §8.7.9: '#', one digit n (1-9), n digits of length, then exactly that many bytes; the terminator
    # (here NL, §8.5) follows and is consumed, nothing after it.
    read_exact, stream = reader_of(block + b"\nNEXT")
    assert bytes(read_block(read_exact, b"\n")) == payload
    assert stream.read() == b"NEXT"


@pytest.mark.parametrize("block, found", [(b"#15hell\nX", "b'X'"), (b"#14hello\n", "b'o'")])
def test_read_block_names_a_wrong_length(block, found):
    # One byte short (the NL is taken as payload) or long: the byte read where the terminator belongs is
    # not it, and the error names the announced length and what stood there.
    read_exact, _ = reader_of(block)
    count = int(block[2:3])
    with pytest.raises(scpi.BlockError, match=f"the {count}-byte block is followed by {found}, not the "
                                              f"message terminator"):
        read_block(read_exact, b"\n")


def test_read_block_with_a_two_byte_terminator():
    read_exact, _ = reader_of(b"#13abc\r\n")
    assert bytes(read_block(read_exact, b"\r\n")) == b"abc"


def test_indefinite_block_is_refused_with_the_reason():
    # §8.7.10: an indefinite block ends only at NL sent with END, which a TCP byte stream cannot mark.
    read_exact, _ = reader_of(b"#0abc\n")
    with pytest.raises(scpi.BlockError, match=r"#0.*END.*definite-length"):
        read_block(read_exact, b"\n")


# --- SocketReader over a real TCP connection -----------------------------------------------------------

@pytest.fixture
def peer() -> Iterator[tuple[socket.socket, socket.socket]]:
    """(our end, the instrument's end) of one TCP connection on 127.0.0.1; both closed afterwards."""
    listener = socket.create_server(("127.0.0.1", 0))
    ours = socket.create_connection(listener.getsockname())
    theirs, _ = listener.accept()
    listener.close()
    yield ours, theirs
    ours.close()
    theirs.close()


def test_read_exact_joins_read_ahead_and_socket_bytes(peer):
    ours, theirs = peer
    reader = SocketReader(ours, bytearray(b"#15"), "TCPIP::test", "TRAC?", 2.0)
    theirs.sendall(b"hel")
    threading.Timer(0.05, theirs.sendall, (b"lo\n",)).start()  # the rest arrives later, in pieces
    assert bytes(read_block(reader.read_exact, b"\n")) == b"hello"
    assert reader.pending == bytearray()


def test_read_exact_times_out_naming_the_command(peer):
    ours, theirs = peer
    reader = SocketReader(ours, bytearray(), "TCPIP::test", "TRAC? CH1", 0.2)
    theirs.sendall(b"ab")
    start = time.monotonic()
    with pytest.raises(TimeoutError, match=r"after 2 of 5 bytes of the reply to TRAC\? CH1"):
        reader.read_exact(5)
    assert time.monotonic() - start < 2.0  # select's timeout bounds the silence


def test_read_exact_reports_a_dropped_connection(peer):
    ours, theirs = peer
    reader = SocketReader(ours, bytearray(), "TCPIP::test", "TRAC?", 2.0)
    theirs.sendall(b"abc")
    theirs.close()
    with pytest.raises(InstrumentError, match=r"TCPIP::test: connection dropped after 3 of 10 bytes of the "
                                              r"reply to TRAC\?"):
        reader.read_exact(10)


def test_discard_throws_away_a_late_reply_and_returns_when_quiet(peer):
    ours, theirs = peer
    reader = SocketReader(ours, bytearray(b"stale"), "TCPIP::test", "*IDN?", 2.0)
    theirs.sendall(b"late reply\n")
    time.sleep(0.05)
    reader.discard(quiet_s=0.1)
    assert reader.pending == bytearray()
    theirs.sendall(b"fresh\n")
    assert bytes(reader.read_exact(6)) == b"fresh\n"


def test_discard_gives_up_on_an_instrument_that_keeps_sending(peer):
    ours, theirs = peer
    reader = SocketReader(ours, bytearray(), "TCPIP::test", "*IDN?", 0.3)
    stop = threading.Event()

    def chatter() -> None:
        while not stop.is_set():
            theirs.sendall(b"x" * 64)
            time.sleep(0.01)

    thread = threading.Thread(target=chatter, daemon=True)
    thread.start()
    try:
        with pytest.raises(TimeoutError, match="kept sending for 0.3 s"):
            reader.discard(quiet_s=0.1)
    finally:
        stop.set()
        thread.join()


def test_discard_reports_a_closed_connection(peer):
    ours, theirs = peer
    reader = SocketReader(ours, bytearray(), "TCPIP::test", "*IDN?", 2.0)
    theirs.close()
    with pytest.raises(InstrumentError, match="TCPIP::test: connection dropped by the instrument"):
        reader.discard(quiet_s=0.1)


def test_a_reader_only_for_a_pyvisa_py_socket_session(sim_bench, quiet_table):
    bench = sim_bench(quiet_table)
    with Session(bench.resources["generator"]) as s:
        backend = s._backend_session()
        reader = SocketReader.of(backend, s.resource, "FREQ?", 1.0)
        assert isinstance(reader, SocketReader)
        assert reader.sock is backend.interface and reader.pending is backend._pending_buffer
        assert (reader.resource, reader.command, reader.timeout_s) == (s.resource, "FREQ?", 1.0)

    class OnlyBuffer:
        _pending_buffer = bytearray()

    class OnlySocket:
        interface = socket.socket()

    assert SocketReader.of(OnlyBuffer(), "r", "c", 1.0) is None
    assert SocketReader.of(OnlySocket(), "r", "c", 1.0) is None
    OnlySocket.interface.close()
    assert SocketReader.of(None, "r", "c", 1.0) is None
