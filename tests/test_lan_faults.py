"""Faults per transport, through acqd's session layer on pyvisa-py: a short read, a stall mid-block that
only a device clear (or, on the raw socket, a reconnect) gets out of, a HiSLIP FatalError, a VXI-11 RPC
that never answers and a lost VXI-11 abort channel. Each ends in a bounded recovery or one clear error line
naming the resource, and the next reply is the instrument's own.

References: IVI-6.1 (HiSLIP 2.0: Data/DataEnd, device clear, FatalError — clause numbers from memory);
VXI-11 rev 1.0 (device_read reasons, device_clear, the abort channel, error codes, from memory); RFC 5531
(an RPC reply matched to its call by xid); pyvisa-py's clients as the independent implementation; pyvisa's
own ``query_binary_values`` over the raw socket as the reference for the samples.
"""

from __future__ import annotations

import threading
import time

import numpy as np
import pytest
from pyvisa_py.protocols import rpc, vxi11

from acqd.errors import InstrumentError
from acqd.sim.bench import TRANSPORTS, Serving, SimBench
from acqd.visa import InstrumentTimeout, Session

SAMPLES = 200_000  # an 800 kB REAL,32 block: many TCP segments, and a HiSLIP reply of several messages


@pytest.fixture(scope="module")
def bench():
    """One bench over all three transports, a capture of SAMPLES taken, and its CH1 block as pyvisa's
    plain binary read over the raw socket gives it (the reference)."""
    import pyvisa

    with SimBench(serving=Serving(TRANSPORTS)) as bench:
        rm = pyvisa.ResourceManager("@py")
        reference = rm.open_resource(bench.resources_by_transport["socket"]["scope"], read_termination="\n",
                                     write_termination="\n")
        for command in ("FORMat REAL,32", "TRIGger:SOURce IMMediate", f"SWEep:POINts {SAMPLES}", "INITiate"):
            reference.write(command)
        assert reference.query("*OPC?") == "1"
        bench.expected = np.asarray(reference.query_binary_values("TRACe? CH1", datatype="f", is_big_endian=True))
        reference.close()
        rm.close()
        yield bench


@pytest.fixture
def faults(bench):
    """The scope's instrument faults, and each transport's own, all off again after the test."""
    yield bench.scope.faults
    bench.call(_all_off, bench)


def _all_off(bench: SimBench) -> None:
    bench.scope.faults.short_read = False
    bench.scope.faults.short_read_pause_s = 0.05
    hislip, vxi = bench.transport_server("hislip"), bench.transport_server("vxi11")
    hislip.faults.fatal_error_next = False
    vxi.faults.silent_calls, vxi.faults.abort_channel_lost = 0, False


def scope_resource(bench: SimBench, transport: str) -> str:
    return bench.resources_by_transport[transport]["scope"]


def block(session: Session) -> np.ndarray:
    return np.frombuffer(session.query_block("TRACe? CH1"), ">f4")


def one_line(exc: BaseException, resource: str) -> str:
    text = str(exc)
    assert text.startswith(resource) and "\n" not in text
    return text


def test_a_reply_in_two_parts_is_read_on(bench, faults, transport):
    """Raw socket: two TCP writes; HiSLIP: Data messages, then the DataEnd; VXI-11: a device_read that ends
    at the pause without END (reason REQCNT or none), then the rest. A correct client joins them."""
    faults.short_read = True
    with Session(scope_resource(bench, transport), timeout_s=2.0) as scope:
        np.testing.assert_array_equal(block(scope), bench.expected)
        assert scope.query("*IDN?") == scope.identity  # a short text reply is split too


def test_a_stall_mid_block_times_out_and_the_session_resynchronises(bench, faults, transport):
    """Half the block arrives, the rest long after the timeout. HiSLIP and VXI-11: the transport's device
    clear abandons the rest (IEEE 488.2 §5.8, IVI-6.1 §6.12, VXI-11 device_clear) and the session goes on
    on the same connection; the raw socket, which has no device clear, is reopened. Either way the timeout
    is one line, bounded, and the next block is whole."""
    resource = scope_resource(bench, transport)
    with Session(resource, timeout_s=0.5) as scope:
        faults.short_read, faults.short_read_pause_s = True, 5.0
        # Only the block's reply stalls: the switch goes off once the server has split it.
        threading.Timer(0.25, setattr, (faults, "short_read", False)).start()
        bench.call(bench.scope.start_logging)
        bench.call(bench.scope.command_log.clear)
        started = time.monotonic()
        with pytest.raises(InstrumentTimeout) as info:
            scope.query_block("TRACe? CH1")
        assert "'TRACe? CH1'" in one_line(info.value, resource)
        assert time.monotonic() - started < 4.0, "recovery waited for the stalled rest"
        received = [entry.text for entry in bench.call(lambda: list(bench.scope.command_log))]
        # acqd.visa.Session.drain: *CLS and *IDN? on the same connection; over the raw socket that *IDN?
        # waits behind the stalled reply, so the session is reopened, which asks *IDN? once more.
        in_place = ["TRACe? CH1", "*CLS", "*IDN?"]
        assert received == (in_place + ["*IDN?"] if transport == "socket" else in_place)
        np.testing.assert_array_equal(block(scope), bench.expected)
        assert scope.query("*IDN?") == scope.identity
        assert scope.query_error_queue() == []  # nothing stale: no −410 or −420 left behind


def test_a_hislip_fatal_error_is_one_line_and_the_next_query_reconnects(bench, faults):
    resource = scope_resource(bench, "hislip")
    with Session(resource, timeout_s=1.0) as scope:
        bench.transport_server("hislip").faults.fatal_error_next = True
        started = time.monotonic()
        with pytest.raises(InstrumentError) as info:
            scope.query("*IDN?")
        # IVI-6.1 §6.3 (from memory): after FatalError the server closes both channels; pyvisa-py reports
        # the message it did not expect, acqd one line naming the resource.
        one_line(info.value, resource)
        assert time.monotonic() - started < 3.0
        assert scope.query("*IDN?") == scope.identity  # a new session (new Initialize), the same instrument
        np.testing.assert_array_equal(block(scope), bench.expected)


def test_an_rpc_that_never_answers_times_out_and_the_link_recovers(bench, faults):
    resource = scope_resource(bench, "vxi11")
    server = bench.transport_server("vxi11")
    with Session(resource, timeout_s=0.5) as scope:
        server.faults.silent_calls = 1  # the query's device_read gets no reply; pyvisa-py waits io_timeout + 1 s
        started = time.monotonic()
        with pytest.raises(InstrumentError) as info:  # pyvisa-py turns its RPC socket timeout into an I/O error
            scope.query("*IDN?")
        line = one_line(info.value, resource)
        assert "'*IDN?'" in line and "left a call unanswered" in line  # not only "dropped": the link is up
        assert time.monotonic() - started < 4.0
        # RFC 5531: replies are matched to calls by xid; the silent call's never comes, so nothing stale does.
        assert scope.query("*IDN?") == scope.identity


def test_a_lost_abort_channel_leaves_the_core_channel_and_its_recovery_working(bench, faults):
    server = bench.transport_server("vxi11")
    server.faults.abort_channel_lost = True
    bench.scope.faults.trigger_never = True
    resource = scope_resource(bench, "vxi11")
    core_port = int(resource.split("::")[1].split(",")[1])
    client = vxi11.CoreClient.__new__(vxi11.CoreClient)  # pyvisa-py's core client on the core channel
    client.packer, client.unpacker = vxi11.Vxi11Packer(), vxi11.Vxi11Unpacker(b"")
    rpc.RawTCPClient.__init__(client, "127.0.0.1", vxi11.DEVICE_CORE_PROG, vxi11.DEVICE_CORE_VERS, core_port)
    try:
        error, link, abort_port, _ = client.create_link(1, False, 0, "inst1")
        assert error == 0
        client.device_write(link, 1000, 0, vxi11.OP_FLAG_END, b"TRIGger:SOURce EXTernal;:INITiate;*OPC?\n")
        # The abort channel is gone: a client that tries it gets a dropped connection (pyvisa-py's RPC client)...
        with pytest.raises((rpc.RPCError, OSError, EOFError)):
            abort = rpc.RawTCPClient("127.0.0.1", vxi11.DEVICE_ASYNC_PROG, vxi11.DEVICE_ASYNC_VERS, abort_port)
            abort.packer, abort.unpacker = vxi11.Vxi11Packer(), vxi11.Vxi11Unpacker(b"")
            abort.make_call(vxi11.DEVICE_ABORT, link, abort.packer.pack_device_link,
                            abort.unpacker.unpack_device_error)
        # ...and the blocked read still ends by its own io_timeout (VXI-11 error 15), then device_clear on
        # the core channel abandons the blocked *OPC? (IEEE 488.2 §5.8) and the link answers again.
        started = time.monotonic()
        assert client.device_read(link, 100, 300, 0, 0, 0)[0] == vxi11.ErrorCodes.io_timeout
        assert time.monotonic() - started < 2.0
        assert client.device_clear(link, 0, 0, 1000) == 0
        client.device_write(link, 1000, 0, vxi11.OP_FLAG_END, b"ABORt;*IDN?\n")
        assert client.device_read(link, 1000, 1000, 0, 0, 0)[2].startswith(b"acqd-sim,DIG,")
        client.destroy_link(link)
    finally:
        client.close()
        bench.scope.faults.trigger_never = False
    # acqd never needs the abort channel: its timeout recovery is the core channel's device_clear.
    with Session(resource, timeout_s=2.0) as scope:
        assert scope.query("*IDN?") == scope.identity
