"""The simulated bench over HiSLIP, driven by pyvisa-py's own HiSLIP client and by a raw client here.

References: IVI-6.1 (HiSLIP 2.0) for the message layout and exchanges — clause numbers from memory;
pyvisa-py's HiSLIP client (``pyvisa_py.protocols.hislip``: its message-type and error-code tables) as an
independent implementation of the same specification; Python's ``struct`` for the 16-byte header; the
raw-socket transport as the reference for the bytes and records a HiSLIP session must give alike.
"""

from __future__ import annotations

import socket
import struct
import time

import numpy as np
import pytest
from pyvisa.util import from_ieee_block
from pyvisa_py.protocols import hislip as pyvisa_hislip

from acqd.errors import InstrumentError
from acqd.visa import InstrumentTimeout, Session
from lanbench import block_faults_recover, served_beside_the_socket

TYPE = pyvisa_hislip.MESSAGETYPE  # an independent implementation's numbering of the message types
HEADER = "!2sBBIQ"  # IVI-6.1 §3.1: "HS", message type, control code, message parameter, payload length
FIRST_MESSAGE_ID = 0xFFFF_FF00  # IVI-6.1 §3.1.2 (from memory): the first message ID after initialisation


@pytest.fixture
def bench(quiet_table):
    """A quiet, unquantised bench served over the raw socket and HiSLIP."""
    with served_beside_the_socket(quiet_table, "hislip") as bench:
        yield bench


def hislip(bench) -> dict[str, str]:
    return bench.resources_by_transport["hislip"]


def host_port(resource: str) -> tuple[str, int]:
    """``TCPIP0::127.0.0.1::hislip1,PORT::INSTR`` → (host, PORT)."""
    _, host, device, _ = resource.split("::")
    return host, int(device.split(",")[1])


class RawClient:
    """Both channels of one HiSLIP session, framed here with ``struct`` only."""

    def __init__(self, resource: str, sub_address: str | None = None) -> None:
        host, port = host_port(resource)
        self.address = (host, port)
        self.sub_address = sub_address or resource.split("::")[2].split(",")[0]
        self.sync = socket.create_connection(self.address, timeout=2)

    def initialize(self, version: tuple[int, int] = (1, 0)) -> tuple[int, int, int]:
        """Initialize, then AsyncInitialize; (negotiated version, session ID, overlap) from the response."""
        self.send(self.sync, "Initialize", 0, (version[0] << 24) | (version[1] << 16) | 0x5854,
                  self.sub_address.encode())
        kind, control, parameter, _ = self.receive(self.sync)
        assert kind == TYPE["InitializeResponse"]
        session_id = parameter & 0xFFFF
        self.async_ = socket.create_connection(self.address, timeout=2)
        self.send(self.async_, "AsyncInitialize", 0, session_id)
        assert self.receive(self.async_)[0] == TYPE["AsyncInitializeResponse"]
        return parameter >> 16, session_id, control

    @staticmethod
    def send(sock: socket.socket, kind: str | int, control: int, parameter: int, payload: bytes = b"") -> None:
        code = TYPE[kind] if isinstance(kind, str) else kind
        sock.sendall(struct.pack(HEADER, b"HS", code, control, parameter, len(payload)) + payload)

    @staticmethod
    def receive(sock: socket.socket) -> tuple[int, int, int, bytes]:
        head = b""
        while len(head) < 16:
            chunk = sock.recv(16 - len(head))
            if not chunk:
                raise ConnectionError("closed")
            head += chunk
        prologue, kind, control, parameter, length = struct.unpack(HEADER, head)
        assert prologue == b"HS"
        payload = b""
        while len(payload) < length:
            payload += sock.recv(length - len(payload))
        return kind, control, parameter, payload

    def query(self, text: str, message_id: int) -> list[tuple[int, int, bytes]]:
        """Send ``text`` as one DataEnd; the response's messages up to its DataEnd (type, message ID, payload)."""
        self.send(self.sync, "DataEnd", 0, message_id, text.encode() + b"\n")
        messages = []
        while not messages or messages[-1][0] != TYPE["DataEnd"]:
            kind, _, parameter, payload = self.receive(self.sync)
            messages.append((kind, parameter, payload))
        return messages

    def close(self) -> None:
        self.sync.close()
        if hasattr(self, "async_"):
            self.async_.close()


@pytest.fixture
def raw():
    clients: list[RawClient] = []

    def open_client(resource: str, sub_address: str | None = None) -> RawClient:
        clients.append(RawClient(resource, sub_address))
        return clients[-1]

    yield open_client
    for client in clients:
        client.close()


def test_initialize_negotiates_version_and_the_reply_carries_the_message_id(bench, raw):
    client = raw(hislip(bench)["generator"])
    version, session_id, overlap = client.initialize(version=(1, 0))
    # IVI-6.1 §6.1 (from memory): the server answers with the lower of the two versions, a session ID,
    # and its overlap preference (0: synchronized mode).
    assert version == (1 << 8) | 0 and session_id != 0 and overlap == 0
    ((kind, message_id, payload),) = client.query("*IDN?", FIRST_MESSAGE_ID)
    # IVI-6.1 §3.1.2 (from memory): the response carries the ID of the message it answers; IEEE 488.2
    # §8.4 the response ends with NL (with END: here DataEnd).
    assert kind == TYPE["DataEnd"] and message_id == FIRST_MESSAGE_ID
    assert payload.startswith(b"acqd-sim,FG,") and payload.endswith(b"\n")
    ((_, second_id, _),) = client.query("*IDN?", FIRST_MESSAGE_ID + 2)
    assert second_id == FIRST_MESSAGE_ID + 2


def test_a_long_response_is_split_at_the_clients_maximum_message_size(bench, raw, visa):
    scope_socket = visa(bench.resources_by_transport["socket"]["scope"])
    for command in ("FORMat REAL,32", "TRIGger:SOURce IMMediate", "SWEep:POINts 3000", "INITiate"):
        scope_socket.write(command)
    assert scope_socket.query("*OPC?") == "1"
    client = raw(hislip(bench)["scope"])
    client.initialize()
    client.send(client.async_, "AsyncMaxMsgSize", 0, 0, struct.pack("!Q", 1024))
    kind, _, _, payload = client.receive(client.async_)
    assert kind == TYPE["AsyncMaxMsgSizeResponse"] and len(payload) == 8  # IVI-6.1 §6.7: 8-byte size
    messages = client.query("TRACe? CH1", FIRST_MESSAGE_ID)
    # IVI-6.1 §6.5/§6.7 (from memory): Data messages then one DataEnd, none longer than the client's
    # maximum (here counted with the 16-byte header, as pyvisa-py counts it), each with the query's ID.
    assert [k for k, _, _ in messages] == [TYPE["Data"]] * (len(messages) - 1) + [TYPE["DataEnd"]]
    assert len(messages) > 1 and all(16 + len(p) <= 1024 for _, _, p in messages)
    assert {m for _, m, _ in messages} == {FIRST_MESSAGE_ID}
    # The same bytes as the raw socket's reply (pyvisa-py's plain read on the socket transport).
    socket_reply = scope_socket.query_binary_values("TRACe? CH1", datatype="f", is_big_endian=True)
    joined = b"".join(p for _, _, p in messages)
    np.testing.assert_array_equal(from_ieee_block(joined, "f", is_big_endian=True), socket_reply)  # pyvisa's decoder


def test_protocol_errors_are_error_and_fatal_error_messages(bench, raw):
    codes = {v: k for k, v in pyvisa_hislip.FATALERRORCODE.items()}
    # IVI-6.1 §6.3: a header without the "HS" prologue is FatalError 1, and the channel is closed.
    bad = raw(hislip(bench)["generator"])
    bad.sync.sendall(b"XX" + bytes(14))
    kind, control, _, _ = bad.receive(bad.sync)
    assert (kind, codes[control]) == (TYPE["FatalError"], "Poorly formed message header")
    assert bad.sync.recv(1) == b""
    # An unknown sub-address, and a first message that is not Initialize: FatalError 3.
    unknown = raw(hislip(bench)["generator"], sub_address="hislip9")
    unknown.send(unknown.sync, "Initialize", 0, 1 << 24, b"hislip9")
    assert unknown.receive(unknown.sync)[:2] == (TYPE["FatalError"], 3)
    first = raw(hislip(bench)["generator"])
    first.send(first.sync, "DataEnd", 0, FIRST_MESSAGE_ID, b"*IDN?\n")
    assert first.receive(first.sync)[:2] == (TYPE["FatalError"], 3)
    # Data before the asynchronous channel stands: FatalError 2.
    early = raw(hislip(bench)["generator"])
    early.send(early.sync, "Initialize", 0, 1 << 24, b"hislip0")
    early.receive(early.sync)
    early.send(early.sync, "DataEnd", 0, FIRST_MESSAGE_ID, b"*IDN?\n")
    assert early.receive(early.sync)[:2] == (TYPE["FatalError"], 2)
    # An unrecognised message type is Error 1 (IVI-6.1 §6.4), and the session goes on.
    client = raw(hislip(bench)["generator"])
    client.initialize()
    client.send(client.async_, 100, 0, 0, b"abc")
    kind, control, _, _ = client.receive(client.async_)
    assert (kind, pyvisa_hislip.ERRORMESSAGE[control]) == (TYPE["Error"], "Unrecognized Message Type")
    assert client.query("*IDN?", FIRST_MESSAGE_ID)[0][2].startswith(b"acqd-sim,FG,")


def test_device_clear_drops_an_unread_response_and_restarts_message_ids(bench, raw):
    client = raw(hislip(bench)["generator"])
    client.initialize()
    client.send(client.sync, "DataEnd", 0, FIRST_MESSAGE_ID + 10, b"*IDN?\n")  # its reply is never read
    time.sleep(0.1)
    client.send(client.async_, "AsyncDeviceClear", 0, 0)
    assert client.receive(client.async_)[0] == TYPE["AsyncDeviceClearAcknowledge"]
    client.send(client.sync, "DataEnd", 0, FIRST_MESSAGE_ID + 12, b"FREQ 5E3\n")  # discarded while clearing
    client.send(client.sync, "DeviceClearComplete", 0, 0)
    # IVI-6.1 §6.12 (from memory): the client discards what arrived before DeviceClearAcknowledge.
    while (kind := client.receive(client.sync)[0]) != TYPE["DeviceClearAcknowledge"]:
        assert kind == TYPE["DataEnd"]  # the stale *IDN? reply, sent before the clear
    ((_, message_id, payload),) = client.query("FREQ?", FIRST_MESSAGE_ID)
    assert message_id == FIRST_MESSAGE_ID and float(payload) == 1e3  # *RST's 1 kHz: FREQ 5E3 never ran


def device_clear(client: RawClient, features: int) -> int:
    """AsyncDeviceClear, then DeviceClearComplete asking for ``features``; the features granted."""
    client.send(client.async_, "AsyncDeviceClear", 0, 0)
    kind, offered, _, _ = client.receive(client.async_)
    assert (kind, offered) == (TYPE["AsyncDeviceClearAcknowledge"], 0)  # we prefer synchronized mode
    client.send(client.sync, "DeviceClearComplete", features, 0)
    kind, granted, _, _ = client.receive(client.sync)
    assert kind == TYPE["DeviceClearAcknowledge"]
    return granted


def test_overlapped_mode_when_the_client_asks_keeps_queries_from_interrupting(bench, raw):
    """IVI-6.1 §6.12 (from memory): feature bit 0 of DeviceClearComplete asks for overlapped mode, and
    DeviceClearAcknowledge says what was granted. Synchronized, a query sent while a reply is pending
    interrupts it (IEEE 488.2 §6.3.2.3, −410); overlapped, both are answered in order with their IDs."""
    bench.generator.faults.reply_delay_s = 0.3  # each reply is pending long enough for the next message
    client = raw(hislip(bench)["generator"])
    client.initialize()

    def two_queries() -> list[tuple[int, int, bytes]]:
        """*IDN? and FREQ? sent back to back; what comes back within the replies' delay (type, ID, payload)."""
        client.send(client.sync, "DataEnd", 0, FIRST_MESSAGE_ID, b"*IDN?\n")
        client.send(client.sync, "DataEnd", 0, FIRST_MESSAGE_ID + 2, b"FREQ?\n")
        replies = []
        while not replies or replies[-1][1] != FIRST_MESSAGE_ID + 2:
            kind, _, message_id, payload = client.receive(client.sync)
            replies.append((kind, message_id, payload))
        return replies

    assert device_clear(client, 0) == 0
    assert two_queries() == [(TYPE["DataEnd"], FIRST_MESSAGE_ID + 2, b"1E+03\n")]  # *IDN? interrupted
    assert client.query("SYSTem:ERRor?", FIRST_MESSAGE_ID + 4)[0][2].startswith(b"-410,")
    assert device_clear(client, 1) == 1  # overlapped, as asked
    (idn, freq) = two_queries()
    assert idn[:2] == (TYPE["DataEnd"], FIRST_MESSAGE_ID) and idn[2].startswith(b"acqd-sim,FG,")
    assert freq == (TYPE["DataEnd"], FIRST_MESSAGE_ID + 2, b"1E+03\n")
    bench.generator.faults.reply_delay_s = 0.0
    assert device_clear(client, 0) == 0  # synchronized again until asked
    assert client.query("SYSTem:ERRor?", FIRST_MESSAGE_ID)[0][2].startswith(b"0,")


def test_a_timeout_leaves_the_scope_busy_and_device_clear_resynchronises(bench):
    bench.scope.faults.trigger_never = True
    with Session(hislip(bench)["scope"], timeout_s=2.0) as scope:
        scope.write("TRIGger:SOURce EXTernal")
        scope.write("INITiate")
        with pytest.raises(InstrumentTimeout) as info:
            scope.query("*OPC?", timeout_s=0.3)
        assert hislip(bench)["scope"] in str(info.value) and "'*OPC?'" in str(info.value)
        # The session drained through HiSLIP's own device clear; the next reply is its own.
        assert scope.query("*IDN?") == scope.identity
        # IEEE 488.2 §5.8 (from memory): a device clear leaves operations in progress alone.
        assert bench.call(bench.scope.busy)
        assert scope.query("SWEep:POINts?") == scope.query("SWEep:POINts?")
        scope.write("ABORt")
        assert scope.query("*OPC?", timeout_s=1.0) == "1"  # IEEE 488.2 §12.5.3: nothing pending → 1


def test_status_query_locks_and_remote_local_through_pyvisa_py(bench, visa):
    gen = visa(hislip(bench)["generator"])
    other = visa(hislip(bench)["generator"])
    client = gen.visalib.sessions[gen.session].interface  # pyvisa-py's own HiSLIP client
    second = other.visalib.sessions[other.session].interface
    gen.write("BOGUs")
    assert gen.query("*OPC?") == "1"  # the two channels are two connections: be sure BOGUs was parsed
    # SCPI-1999 Vol 1 §9 (from memory): status byte bit 2 while the error queue holds an entry.
    assert gen.read_stb() & 0x04
    assert gen.query("SYSTem:ERRor?").startswith("-113")
    assert not gen.read_stb() & 0x04
    # IVI-6.1 §6.9: an exclusive lock is granted once; a second request fails after its timeout; release.
    assert client.async_lock_request(timeout=0.1) == "success"
    assert client.async_lock_info() == 1
    started = time.monotonic()
    assert second.async_lock_request(timeout=0.2) == "failure"
    assert time.monotonic() - started >= 0.2
    assert client.async_lock_release() == "success"
    assert second.async_lock_request(timeout=0.2) == "success"
    assert client.async_lock_release() == "error"  # holds no lock
    assert second.async_lock_release() == "success"
    assert second.async_lock_request(timeout=0.1, lock_string="bench") == "success shared"
    assert client.async_lock_request(timeout=0.1, lock_string="bench") == "success shared"
    assert client.async_lock_info() == 0
    # IVI-6.1 §6.11: remote/local control codes.
    client.async_remote_local_control("enableAndGTRLLO")
    assert bench.call(lambda: (bench.generator.remote, bench.generator.local_lockout)) == (True, True)
    client.async_remote_local_control("disableAndGTL")
    assert bench.call(lambda: (bench.generator.remote, bench.generator.local_lockout)) == (False, False)


def test_an_unreachable_hislip_port_is_one_line():
    probe = socket.socket()
    probe.bind(("127.0.0.1", 0))
    port = probe.getsockname()[1]
    probe.close()
    resource = f"TCPIP0::127.0.0.1::hislip0,{port}::INSTR"
    with pytest.raises(InstrumentError) as info:
        Session(resource, timeout_s=0.5).open()
    assert str(info.value).startswith(resource) and "\n" not in str(info.value)


@pytest.mark.parametrize("fault", ["drop_mid_block", "garble_block_header"])
def test_a_cut_or_garbled_block_is_one_line_and_the_session_recovers(bench, fault):
    block_faults_recover(bench, hislip(bench)["scope"], fault)
