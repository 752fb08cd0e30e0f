"""The VISA transport against the simulated bench over real TCP through pyvisa-py.

References: pyvisa-py's own plain reads are the reference for bytes and replies; IEEE 488.2 / SCPI-1999
clauses for block format, error queue and message exchange (cited per test).
"""

from __future__ import annotations

import shutil
import socket
import subprocess
import threading
import time
from pathlib import Path

import numpy as np
import pytest

from acqd import scpi
from acqd.errors import ConfigError, InstrumentError
from acqd.profile import load_profile
from acqd.visa import InstrumentTimeout, Session, identify

ROOT = Path(__file__).resolve().parent.parent


def one_line(exc: BaseException) -> str:
    text = str(exc)
    assert "\n" not in text
    return text


def number(reply: str) -> float:
    return scpi.parse_number(reply)


@pytest.fixture
def bench(sim_bench, quiet_table):
    """Quiet, unquantised bench with a 1 kHz sine on: the scope's float32 samples hold every byte value."""
    bench = sim_bench({**quiet_table, "quantise": False})
    with Session(bench.resources["generator"]) as gen:
        for command in ("FUNCtion SINusoid", "FREQuency 1E3", "VOLTage 1", "OUTPut ON"):
            gen.write(command)
    return bench


@pytest.fixture
def session():
    opened: list[Session] = []

    def open_session(resource: str, **kwargs) -> Session:
        s = Session(resource, **kwargs).open()
        opened.append(s)
        return s

    yield open_session
    for s in opened:
        s.close()


def capture(scope: Session, points: int) -> None:
    """A free-running record (IMMediate trigger) on the DIG scope, REAL,32 big-endian."""
    for command in ("FORMat REAL,32", "FORMat:BORDer NORMal", "TRIGger:SOURce IMMediate",
                    f"SWEep:POINts {points}", "SWEep:TIME 1E-3", "INITiate"):
        scope.write(command)
    assert scope.query("*OPC?") == "1"


def test_identity_is_the_idn_reply(bench, session, visa):
    s = session(bench.resources["generator"])
    # Reference: pyvisa-py's plain query. IEEE 488.2 §10.14 (from memory): four comma-separated fields.
    assert s.identity == visa(bench.resources["generator"]).query("*IDN?")
    assert len(s.identity.split(",")) == 4
    assert identify(bench.resources["generator"]) == s.identity


@pytest.mark.parametrize("direct_socket", [True, False])
def test_block_bytes_equal_pyvisa_plain_read(bench, session, visa, direct_socket):
    s = session(bench.resources["scope"], direct_socket=direct_socket)
    capture(s, 100_000)
    payload = s.query_block("TRACe? CH1")
    # Unquantised float32 data holds every byte value, so 0x0A (the read termination) occurs inside the
    # block: a reader that stopped at it would come back short.
    assert payload.count(b"\n") > 10
    # Reference: pyvisa-py's query_binary_values (slow but correct) on the same record, and the length the
    # definite block header announces (IEEE 488.2 §8.7.9): 4 bytes per REAL,32 sample.
    reference = visa(bench.resources["scope"]).query_binary_values(
        "TRACe? CH1", datatype="f", is_big_endian=True, container=np.array)
    assert len(payload) == 4 * 100_000
    np.testing.assert_array_equal(np.frombuffer(bytes(payload), ">f4"), reference)


def test_error_queue_is_read_oldest_first_until_empty(bench, session):
    s = session(bench.resources["generator"])
    s.write("FREQuency 5E9")   # beyond 1 MHz: −222 data out of range
    s.write("NOSUCHHEADER 1")  # −113 undefined header
    # SCPI-1999 Vol 2 §21.8: SYSTem:ERRor? returns the oldest entry first, 0,"No error" once empty.
    assert [code for code, _ in s.query_error_queue()] == [-222, -113]
    assert s.query_error_queue() == []


def test_late_reply_without_draining_is_one_step_late(bench, visa):
    """The problem the drain solves, shown with plain pyvisa-py so the next test can fail."""
    gen = bench.generator
    plain = visa(bench.resources["generator"], timeout_ms=200)
    plain.write("FREQuency 1234")
    gen.faults.reply_delay_s = 0.4
    with pytest.raises(Exception):
        plain.query("OUTPut:IMPedance?")
    time.sleep(0.5)            # the late reply (50 ohm) is sent meanwhile
    gen.faults.reply_delay_s = 0.0
    assert number(plain.query("FREQuency?")) == 50.0  # the answer to the previous query


def test_timeout_drains_so_the_next_reply_is_the_right_one(bench, session):
    gen = bench.generator
    s = session(bench.resources["generator"], timeout_s=0.2, drain_timeout_s=1.0)
    s.write("FREQuency 1234")
    gen.faults.reply_delay_s = 0.4
    with pytest.raises(InstrumentTimeout) as info:
        s.query("OUTPut:IMPedance?")
    assert bench.resources["generator"] in one_line(info.value) and "OUTPut:IMPedance?" in str(info.value)
    gen.faults.reply_delay_s = 0.0
    assert number(s.query("FREQuency?")) == 1234.0
    # The drain's *CLS removed the −410 the interrupted query left (IEEE 488.2 §6.3.2.3).
    assert s.query_error_queue() == []


def test_drain_discards_a_reply_that_did_arrive(bench, session):
    gen = bench.generator
    s = session(bench.resources["generator"], timeout_s=0.2)
    s.write("FREQuency 4321")
    gen.faults.reply_delay_s = 0.4
    with pytest.raises(InstrumentTimeout):
        s.query("OUTPut:IMPedance?", drain=False)
    time.sleep(0.5)  # the late reply is now in the socket, as in the previous test
    gen.faults.reply_delay_s = 0.0
    s.drain()
    assert number(s.query("FREQuency?")) == 4321.0


def test_dropped_connection_mid_block_then_reconnect(bench, session):
    scope = bench.scope
    s = session(bench.resources["scope"], timeout_s=1.0)
    capture(s, 50_000)
    scope.faults.drop_mid_block = True
    with pytest.raises(InstrumentError) as info:
        s.query_block("TRACe? CH1")
    text = one_line(info.value)
    assert bench.resources["scope"] in text and "dropped" in text
    scope.faults.drop_mid_block = False
    # The session reopens by itself; the instrument kept its settings and its record.
    assert len(s.query_block("TRACe? CH1")) == 4 * 50_000


def test_garbled_block_header_is_one_line_and_the_session_recovers(bench, session):
    scope = bench.scope
    s = session(bench.resources["scope"])
    capture(s, 1000)
    scope.faults.garble_block_header = True
    with pytest.raises(InstrumentError) as info:
        s.query_block("TRACe? CH1")
    # IEEE 488.2 §8.7.9: '#' must be followed by a non-zero digit giving the length field's size.
    assert "not a valid block" in one_line(info.value)
    scope.faults.garble_block_header = False
    assert len(s.query_block("TRACe? CH1")) == 4000


def test_reconnect_keeps_talking(bench, session):
    s = session(bench.resources["generator"])
    s.write("FREQuency 777")
    s.reconnect()
    assert number(s.query("FREQuency?")) == 777.0


def test_nagle_is_off_on_the_socket(bench, session):
    s = session(bench.resources["generator"])
    sock = s._backend_session().interface
    # A short command then a query would otherwise wait for the peer's delayed ACK (RFC 896 / RFC 1122).
    assert sock.getsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY) != 0


def closed_port() -> int:
    sock = socket.socket()
    sock.bind(("127.0.0.1", 0))
    port = sock.getsockname()[1]
    sock.close()
    return port


def test_unreachable_resource_is_one_line():
    resource = f"TCPIP0::127.0.0.1::{closed_port()}::SOCKET"
    with pytest.raises(InstrumentError) as info:
        Session(resource, timeout_s=1.0).open()
    text = one_line(info.value)
    assert text.startswith(resource) and "unreachable" in text


@pytest.fixture
def silent_server():
    """Accepts connections and never answers: an instrument that hangs."""
    server = socket.socket()
    server.bind(("127.0.0.1", 0))
    server.listen()
    accepted: list[socket.socket] = []
    stop = threading.Event()

    def serve() -> None:
        server.settimeout(0.05)
        while not stop.is_set():
            try:
                accepted.append(server.accept()[0])
            except TimeoutError:
                pass

    thread = threading.Thread(target=serve, daemon=True)
    thread.start()
    yield f"TCPIP0::127.0.0.1::{server.getsockname()[1]}::SOCKET"
    stop.set()
    thread.join(2)
    for conn in accepted:
        conn.close()
    server.close()


def test_silent_instrument_times_out_naming_resource_and_query(silent_server):
    with pytest.raises(InstrumentTimeout) as info:
        Session(silent_server, timeout_s=0.3).open()
    assert one_line(info.value) == f"{silent_server}: no reply to '*IDN?' within 0.3 s"


def test_unknown_backend_and_bad_timeout_are_one_line():
    with pytest.raises(InstrumentError) as info:
        Session("TCPIP0::127.0.0.1::1::SOCKET", backend="@nosuch").open()
    assert "@nosuch" in one_line(info.value) and "allowed: @py, @ivi" in one_line(info.value)
    with pytest.raises(ConfigError) as info:
        Session("TCPIP0::127.0.0.1::1::SOCKET", timeout_s=-1)
    assert "timeout_s" in one_line(info.value)


@pytest.fixture
def constructor_library(tmp_path):
    """A real shared library whose ELF constructor leaves a marker file: proof of whether it was loaded."""
    compiler = shutil.which("cc") or shutil.which("gcc")
    if compiler is None:
        pytest.skip("no C compiler to build the test library")
    marker = tmp_path / "loaded"
    source = tmp_path / "lib.c"
    source.write_text('#include <stdio.h>\n__attribute__((constructor)) static void mark(void) '
                      f'{{ FILE *f = fopen("{marker}", "w"); if (f) fclose(f); }}\n')
    library = tmp_path / "libsomething.so"
    subprocess.run([compiler, "-shared", "-fPIC", "-o", str(library), str(source)], check=True)
    return library, marker


def test_a_library_path_from_a_profile_is_never_loaded(constructor_library, tmp_path):
    library, marker = constructor_library
    profile = tmp_path / "p.toml"
    text = (ROOT / "profiles" / "demo-bridge-filter.toml").read_text()
    profile.write_text(text.replace('kind = "simulated"', 'kind = "visa"').replace(
        'driver = "scpi-generator"', f'driver = "scpi-generator"\nresource = "TCPIP0::127.0.0.1::1::SOCKET"'
        f'\nbackend = "{library}"', 1).replace(
        'driver = "scpi-digitiser"', 'driver = "scpi-digitiser"\nresource = "TCPIP0::127.0.0.1::2::SOCKET"', 1))
    with pytest.raises(ConfigError) as info:
        load_profile(profile)
    assert "bench.generator.backend" in one_line(info.value) and "@py" in one_line(info.value)
    # The transport refuses the same string on its own, before pyvisa could dlopen it.
    with pytest.raises(InstrumentError, match="not allowed"):
        Session("TCPIP0::127.0.0.1::1::SOCKET", backend=str(library)).open()
    assert not marker.exists()
