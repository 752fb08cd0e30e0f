"""The simulated bench over VXI-11, driven by pyvisa-py's own VXI-11 and ONC RPC clients and by raw RPC
calls framed here.

References: VXI-11 rev 1.0 (procedure numbers, Device_* structures, error codes — clause numbers from
memory); RFC 5531 (RPC call/reply, accept/reject statuses, record marking) and RFC 4506 (XDR) through
Python's ``struct``; pyvisa-py's ``protocols.vxi11`` and ``protocols.rpc`` (constants and clients) as an
independent implementation; the raw-socket transport as the reference for bytes and records. The
portmapper test runs in a network namespace of its own (``unshare -rn``), where port 111 is free.
"""

from __future__ import annotations

import json
import os
import shutil
import socket
import struct
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pytest
import pyvisa
from pyvisa_py.protocols import rpc, vxi11

from acqd.visa import InstrumentTimeout, Session
from lanbench import block_faults_recover, served_beside_the_socket

HERE = Path(__file__).resolve().parent


@pytest.fixture
def bench(quiet_table):
    """A quiet, unquantised bench served over the raw socket and VXI-11."""
    with served_beside_the_socket(quiet_table, "vxi11") as bench:
        yield bench


def vxi(bench) -> dict[str, str]:
    return bench.resources_by_transport["vxi11"]


def core_port(bench) -> int:
    """``TCPIP0::127.0.0.1,PORT::inst0::INSTR`` → PORT."""
    return int(vxi(bench)["generator"].split("::")[1].split(",")[1])


@pytest.fixture
def core(bench):
    """pyvisa-py's VXI-11 core client on the bench's core channel (no portmapper), closed after the test."""
    clients = []

    def open_client():
        client = vxi11.CoreClient.__new__(vxi11.CoreClient)
        client.packer, client.unpacker = vxi11.Vxi11Packer(), vxi11.Vxi11Unpacker(b"")
        rpc.RawTCPClient.__init__(client, "127.0.0.1", vxi11.DEVICE_CORE_PROG, vxi11.DEVICE_CORE_VERS,
                                  core_port(bench))
        clients.append(client)
        return client

    yield open_client
    for client in clients:
        client.close()


def raw_call(port: int, program: int, version: int, procedure: int, args: bytes = b"", rpc_version: int = 2,
             fragments: int = 1) -> bytes:
    """One RPC call framed with ``struct`` (RFC 5531 §9 call body, AUTH_NONE; §11 record marking); the
    reply record without its fragment header."""
    body = struct.pack("!IIIIIIIIII", 0x1234, 0, rpc_version, program, version, procedure, 0, 0, 0, 0) + args
    cut = len(body) // fragments
    pieces = [body[i * cut:(i + 1) * cut if i < fragments - 1 else None] for i in range(fragments)]
    with socket.create_connection(("127.0.0.1", port), timeout=2) as sock:
        for i, piece in enumerate(pieces):
            last = 0x8000_0000 if i == len(pieces) - 1 else 0
            sock.sendall(struct.pack("!I", last | len(piece)) + piece)
        (mark,) = struct.unpack("!I", sock.recv(4, socket.MSG_WAITALL))
        return sock.recv(mark & 0x7FFF_FFFF, socket.MSG_WAITALL)


def test_rpc_replies_follow_rfc_5531(bench):
    port, core_prog = core_port(bench), vxi11.DEVICE_CORE_PROG
    # NULL (procedure 0), sent in three fragments: xid, REPLY, MSG_ACCEPTED, AUTH_NONE verifier, SUCCESS.
    assert struct.unpack("!IIIIII", raw_call(port, core_prog, 1, 0, fragments=3)) == (0x1234, 1, 0, 0, 0, 0)
    # PROG_UNAVAIL (1); PROG_MISMATCH (2) with the lowest and highest version served; PROC_UNAVAIL (3).
    assert struct.unpack("!6I", raw_call(port, 0x20000001, 1, 0))[5] == rpc.AcceptStatus.program_unavailable
    assert struct.unpack("!8I", raw_call(port, core_prog, 7, 0))[5:] == (rpc.AcceptStatus.program_mismatch, 1, 1)
    assert struct.unpack("!6I", raw_call(port, core_prog, 1, 99))[5] == rpc.AcceptStatus.procedure_unavailable
    # GARBAGE_ARGS (4): create_link with its arguments cut short.
    assert struct.unpack("!6I", raw_call(port, core_prog, 1, vxi11.CREATE_LINK, b"\0\0"))[5] == \
        rpc.AcceptStatus.garbage_args
    # RPC version 3: MSG_DENIED (1), RPC_MISMATCH (0), versions 2 to 2.
    assert struct.unpack("!6I", raw_call(port, core_prog, 1, 0, rpc_version=3)) == (0x1234, 1, 1, 0, 2, 2)


def test_device_read_reasons_links_and_errors(bench, core):
    client = core()
    errors = vxi11.ErrorCodes
    # An unknown device name: error 3; a link that does not exist: error 4 (VXI-11 §B.5.2).
    assert client.create_link(1, False, 0, "inst9")[0] == errors.device_not_accessible
    assert client.device_write(999, 1000, 0, vxi11.OP_FLAG_END, b"*IDN?\n")[0] == errors.invalid_link_identifier
    error, link, abort_port, max_recv = client.create_link(1, False, 0, "inst0")
    assert error == 0 and abort_port > 0 and max_recv >= 1024
    assert client.device_write(link, 1000, 0, vxi11.OP_FLAG_END, b"*IDN?\n") == (0, 6)
    # A short read ends on the request count (REQCNT), the rest on END (VXI-11 §B.6.12).
    error, reason, first = client.device_read(link, 5, 1000, 0, 0, 0)
    assert (error, reason, first) == (0, vxi11.RX_REQCNT, b"acqd-")
    error, reason, rest = client.device_read(link, 1000, 1000, 0, 0, 0)
    assert error == 0 and reason == vxi11.RX_END and (first + rest).startswith(b"acqd-sim,FG,")
    assert rest.endswith(b"\n")
    # With the termchar flag the read stops after the termination character (CHR), here a comma.
    client.device_write(link, 1000, 0, vxi11.OP_FLAG_END, b"*IDN?\n")
    error, reason, upto = client.device_read(link, 1000, 1000, 0, vxi11.OP_FLAG_TERMCHAR_SET, ord(","))
    assert (error, upto) == (0, b"acqd-sim,") and reason & vxi11.RX_CHR
    # A program message without the END flag waits for the rest; nothing to read meanwhile: I/O timeout.
    client.device_write(link, 1000, 0, 0, b"FREQ")
    assert client.device_read(link, 100, 200, 0, 0, 0)[0] == errors.io_timeout
    client.device_write(link, 1000, 0, vxi11.OP_FLAG_END, b" 2E3\n")
    client.device_write(link, 1000, 0, vxi11.OP_FLAG_END, b"FREQ?")  # END alone ends the message
    assert client.device_read(link, 100, 1000, 0, 0, 0)[2] == b"2E+03\n"
    # No device trigger on the simulated instruments (IEEE 488.2 DT0): operation not supported.
    assert client.device_trigger(link, 0, 0, 1000) == errors.operation_not_supported
    assert client.destroy_link(link) == 0
    assert client.destroy_link(link) == errors.invalid_link_identifier


def test_an_unread_response_is_discarded_by_the_next_write_with_query_interrupted(bench, visa):
    gen = visa(vxi(bench)["generator"])
    gen.write("*IDN?")
    # IEEE 488.2 §6.3.2.3: a new program message before the response is read discards it (-410).
    assert gen.query("FREQ?") == "1E+03"
    assert gen.query("SYSTem:ERRor?").startswith("-410")


def test_locks_between_links_and_remote_local(bench, visa, core):
    first = visa(vxi(bench)["generator"])
    second = visa(vxi(bench)["generator"], timeout_ms=500)
    first.lock_excl()
    # VXI-11 §B.6.17 (from memory): another link's write is refused, device locked by another link.
    with pytest.raises(pyvisa.errors.VisaIOError):
        second.write("FREQ 3E3")
    first.unlock()
    second.write("FREQ 3E3")
    assert first.query("FREQ?") == "3E+03"
    client = core()
    _, link, _, _ = client.create_link(2, False, 0, "inst0")
    assert client.device_unlock(link) == vxi11.ErrorCodes.no_lock_held_by_this_link
    assert client.device_lock(link, 0, 0) == 0
    assert client.device_lock(link, 0, 0) == 0  # its own lock again
    other = core()
    _, other_link, _, _ = other.create_link(3, False, 0, "inst0")
    started = time.monotonic()
    assert other.device_lock(other_link, vxi11.OP_FLAG_WAIT_BLOCK, 200) == \
        vxi11.ErrorCodes.device_locked_by_another_link
    assert time.monotonic() - started >= 0.2  # it waited for the lock timeout
    assert client.device_remote(link, 0, 0, 1000) == 0
    assert bench.call(lambda: bench.generator.remote)
    assert client.device_local(link, 0, 0, 1000) == 0
    assert not bench.call(lambda: bench.generator.remote)
    assert client.destroy_link(link) == 0  # releases its lock
    assert other.device_lock(other_link, 0, 0) == 0


def test_abort_channel_ends_a_read_in_progress(bench, core):
    bench.scope.faults.trigger_never = True
    client = core()
    client.create_link(1, False, 0, "inst0")  # a generator link first: link IDs are the server's to give
    error, link, abort_port, _ = client.create_link(2, False, 0, "inst1")
    client.device_write(link, 1000, 0, vxi11.OP_FLAG_END, b"TRIGger:SOURce EXTernal;:INITiate;*OPC?\n")
    result = {}

    def read() -> None:
        result["reply"] = client.device_read(link, 100, 5000, 0, 0, 0)

    reader = threading.Thread(target=read)
    started = time.monotonic()
    reader.start()
    time.sleep(0.2)
    abort = rpc.RawTCPClient("127.0.0.1", vxi11.DEVICE_ASYNC_PROG, vxi11.DEVICE_ASYNC_VERS, abort_port)
    abort.packer, abort.unpacker = vxi11.Vxi11Packer(), vxi11.Vxi11Unpacker(b"")
    try:
        assert abort.make_call(vxi11.DEVICE_ABORT, link, abort.packer.pack_device_link,
                               abort.unpacker.unpack_device_error) == 0
    finally:
        abort.close()
    reader.join(5)
    # VXI-11 §B.5.? (from memory): the aborted call returns error 23, well before its 5 s timeout.
    assert result["reply"][0] == vxi11.ErrorCodes.abort
    assert time.monotonic() - started < 2


def test_a_timeout_leaves_the_scope_busy_and_device_clear_resynchronises(bench):
    bench.scope.faults.trigger_never = True
    with Session(vxi(bench)["scope"], timeout_s=2.0) as scope:
        scope.write("TRIGger:SOURce EXTernal")
        scope.write("INITiate")
        with pytest.raises(InstrumentTimeout):
            scope.query("*OPC?", timeout_s=0.3)
        assert scope.query("*IDN?") == scope.identity  # drained through VXI-11's device_clear
        assert bench.call(bench.scope.busy)  # IEEE 488.2 §5.8 (from memory): operations go on
        scope.write("ABORt")
        assert scope.query("*OPC?", timeout_s=1.0) == "1"


def test_block_bytes_equal_the_socket_transport(bench, visa):
    socket_scope = visa(bench.resources_by_transport["socket"]["scope"])
    for command in ("FORMat REAL,32", "TRIGger:SOURce IMMediate", "SWEep:POINts 100000", "INITiate"):
        socket_scope.write(command)
    assert socket_scope.query("*OPC?") == "1"
    expected = socket_scope.query_binary_values("TRACe? CH1", datatype="f", is_big_endian=True)
    with Session(vxi(bench)["scope"]) as scope:
        payload = scope.query_block("TRACe? CH1")
    np.testing.assert_array_equal(np.frombuffer(payload, ">f4"), expected)  # pyvisa's decoder on the socket


def _namespace_command() -> list[str] | None:
    """``unshare -rn`` (a user and network namespace, as an unprivileged user may make where the kernel
    allows), else ``unshare -n`` as root; None when neither works here."""
    if shutil.which("unshare") is None:
        return None
    for command in (["unshare", "-rn"], ["unshare", "-n"]):
        if subprocess.run([*command, "true"], capture_output=True, timeout=10).returncode == 0:
            return command
    return None


def test_pyvisa_finds_the_core_channel_through_the_portmapper_on_port_111():
    command = _namespace_command()
    if command is None:
        pytest.skip("no network namespace can be made here (unshare -rn and unshare -n both failed): the "
                    "portmapper needs port 111 of a loopback of its own")
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(HERE.parent), os.environ.get("PYTHONPATH", "")])}
    done = subprocess.run([*command, sys.executable, str(HERE / "vxi11_netns.py")], capture_output=True,
                          text=True, timeout=60, env=env, cwd=HERE)
    assert done.returncode == 0, done.stderr
    seen = json.loads(done.stdout.strip().splitlines()[-1])
    assert seen["resources"]["generator"] == "TCPIP0::127.0.0.1::inst0::INSTR"
    # RFC 1833 GETPORT: the core channel's port for (0x0607AF, 1, TCP); 0 for a program not served.
    assert seen["getport_core"] == seen["core_port"] > 0 and seen["getport_unknown"] == 0
    # DUMP lists the core, abort (0x0607B0) and portmapper programs, all TCP (protocol 6).
    assert {(p, v, proto) for p, v, proto, _ in seen["dump"]} == {(100000, 2, 6), (0x0607AF, 1, 6), (0x0607B0, 1, 6)}
    assert seen["idn"].startswith("acqd-sim,FG,") and seen["scope_idn"].startswith("acqd-sim,DIG,")
    # python-vxi11, an independent client (its own RPC and VXI-11 code): a query, the status byte with the
    # error-queue bit (SCPI-1999, from memory: bit 2), lock, clear, local/remote, abort, and device_trigger
    # refused as not supported (VXI-11 error 8).
    # pyvisa's own shell, through the portmapper too: *IDN?, and FREQ? after its FREQ 5000 (NR3).
    assert seen["pyvisa_shell"][0].startswith("acqd-sim,FG,") and float(seen["pyvisa_shell"][1]) == 5000
    independent = seen["python_vxi11"]
    if independent is None:
        pytest.skip("python-vxi11 not installed (pip install -e '.[test]' brings it)")
    assert independent["idn"].startswith("acqd-sim,DIG,") and independent["idn_again"] == independent["idn"]
    assert independent["stb_after_error"] & 0x04 and independent["error"].startswith("-113")
    assert independent["trigger"] == vxi11.ErrorCodes.operation_not_supported


@pytest.mark.parametrize("fault", ["drop_mid_block", "garble_block_header"])
def test_a_cut_or_garbled_block_is_one_line_and_the_session_recovers(bench, fault):
    block_faults_recover(bench, vxi(bench)["scope"], fault)


def test_a_closed_connection_ends_its_links_and_their_locks(bench, core):
    first = core()
    _, link, _, max_recv = first.create_link(1, True, 0, "inst0")  # lockDevice: the link holds the lock
    # VXI-11 §B.6.11 (from memory): more than maxRecvSize bytes in one device_write is a parameter error.
    assert first.device_write(link, 1000, 0, vxi11.OP_FLAG_END, b"*" * (max_recv + 1))[0] == \
        vxi11.ErrorCodes.parameter_error
    second = core()
    _, other, _, _ = second.create_link(2, False, 0, "inst0")
    assert second.device_lock(other, 0, 0) == vxi11.ErrorCodes.device_locked_by_another_link
    first.close()  # no destroy_link: the client just went away
    deadline = time.monotonic() + 2
    while second.device_lock(other, 0, 0) != 0:
        assert time.monotonic() < deadline, "the lock of a closed connection's link was never released"
        time.sleep(0.05)
