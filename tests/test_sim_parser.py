"""The simulated instruments' SCPI parser and IEEE 488.2 status, over real TCP through pyvisa-py.

Each check names its clause: SCPI-1999 Vol 1 §6.2 (headers), §7.2/§7.3 (parameters), Vol 2 §21.8 (error
queue); IEEE 488.2-1992 §10 (common commands), §11 (status byte, event register), §6.3.2.3 (query
interrupted), §8.7.9 (definite blocks). Codes and texts are those of SCPI-1999 Vol 2 §21.8 (from memory).
"""

from __future__ import annotations

import socket

import pytest
from pyvisa.errors import VisaIOError

from acqd import scpi

CME, EXE, DDE, QYE, PON = 32, 16, 8, 4, 128  # IEEE 488.2 §11.5.1 standard event register bits


@pytest.fixture
def gen(sim_bench, visa):
    g = visa(sim_bench().resources["generator"])
    g.write("*RST;*CLS")
    return g


@pytest.fixture
def scope(sim_bench, visa):
    s = visa(sim_bench().resources["scope"])
    s.write("*RST;*CLS")
    return s


def errors(session) -> list[tuple[int, str]]:
    """Drain the error queue (SCPI-1999 Vol 2 §21.8: oldest first, 0 "No error" when empty)."""
    found = []
    while (entry := scpi.parse_error_entry(session.query("SYST:ERR?")))[0] != 0:
        found.append(entry)
    return found


def codes(session) -> list[int]:
    return [code for code, _ in errors(session)]


def number(session, query: str) -> float:
    return scpi.parse_number(session.query(query))


# --- headers ----------------------------------------------------------------------------------------------

def test_long_and_short_forms_in_any_case(gen):
    # SCPI-1999 Vol 1 §6.2.1 long/short forms; IEEE 488.2 §7.6.1.1 headers are case-insensitive
    gen.write("SOURce1:FREQuency:CW 2000")
    assert number(gen, "FREQ?") == 2000
    gen.write("sour:freq:cw 2500")
    assert number(gen, "SOURCE:FREQUENCY?") == 2500
    gen.write("FrEq 3000")
    assert number(gen, "frequency?") == 3000
    assert codes(gen) == []


@pytest.mark.parametrize("header", ["FREQU 1000", "FRE 1000", "FREQUENC 1000", "SOU:FREQ 1000", "VOLTS 1"])
def test_only_the_exact_forms_are_accepted(gen, header):
    # SCPI-1999 Vol 1 §6.2.1: neither an abbreviation other than the short form nor an extension
    gen.write(header)
    assert codes(gen) == [-113]
    assert number(gen, "FREQ?") == 1000  # *RST value, unchanged


def test_optional_nodes_may_be_omitted(gen):
    # SCPI-1999 Vol 1 §6.2.2: [LEVel][:IMMediate][:AMPLitude] and [SOURce] are default nodes
    gen.write("SOUR:VOLT:LEV:IMM:AMPL 2")
    assert number(gen, "VOLT?") == 2
    gen.write("VOLT:IMM 3")
    assert number(gen, "SOURCE1:VOLTAGE:LEVEL:IMMEDIATE:AMPLITUDE?") == 3
    gen.write("SOUR:FREQ:FIX 700")
    assert number(gen, "FREQ:CW?") == 700
    assert codes(gen) == []


def test_numeric_suffixes(gen, scope):
    # SCPI-1999 Vol 1 §6.2.5: a suffix selects the instance; omitted means 1; out of range is -114
    gen.write("SOUR1:FREQ 800;:OUTP1 ON")
    assert number(gen, "FREQ?") == 800 and gen.query("OUTP?") == "1"
    gen.write("SOUR2:FREQ 900")
    gen.write("OUTP2 OFF")
    assert codes(gen) == [-114, -114]
    assert gen.query("OUTP?") == "1"
    scope.write("VOLT2:RANG 2;:VOLT:RANG 3;:SENS:VOLT4:DC:RANG:UPP 4")
    assert [number(scope, f"VOLT{n}:RANG?") for n in (1, 2, 3, 4)] == [3, 2, 1, 4]
    scope.write("VOLT5:RANG 2")
    scope.write("INP0:COUP AC")
    assert codes(scope) == [-114, -114]


def test_compound_messages_follow_the_path_rules(gen, scope):
    # SCPI-1999 Vol 1 §6.2.4: after ';' a header resolves under the previous header's parent
    scope.write("TRIG:SOUR IMM;SLOP NEG;LEV 0.25;:SWE:POIN 500;TIME 2E-3")
    assert scope.query("TRIG:SOUR?;SLOP?;LEV?") == "IMM;NEG;2.5E-01"
    assert scope.query("SWE:POIN?;TIME?") == "500;2E-03"
    # ... a leading ':' returns to the root, so HIGH alone is not a root header
    gen.write("VOLT:OFFS 0.2;:HIGH 0.6")
    assert codes(gen) == [-113]
    # ... '*' commands leave the path where it was: HIGH still resolves under VOLT
    gen.write("VOLT:OFFS 0.2;*CLS;HIGH 0.8")
    assert number(gen, "VOLT:HIGH?") == pytest.approx(0.8)
    # ... and the path does not outlive the message (the terminator returns to the root)
    gen.write("VOLT:OFFS 0")
    gen.write("HIGH 1")
    assert codes(gen) == [-113]


def test_several_queries_give_one_reply(gen):
    # SCPI-1999 Vol 1 §6.2.3 / IEEE 488.2 §8.4.1: one response message, units separated by ';'
    gen.write("FREQ 1234;VOLT 0.5")
    assert gen.query("FREQ?;VOLT?;:OUTP?;*ESR?") == "1.234E+03;5E-01;0;0"


# --- parameters --------------------------------------------------------------------------------------------

def test_min_max_def(gen):
    # SCPI-1999 Vol 1 §7.2.1: MINimum, MAXimum, DEFault as numeric values and as query arguments
    gen.write("FREQ MIN")
    assert number(gen, "FREQ?") == 1e-3
    assert number(gen, "FREQ? MAX") == 1e6
    assert number(gen, "FREQ? MINimum") == 1e-3
    gen.write("FREQ MAXIMUM")
    assert number(gen, "FREQ?") == 1e6
    gen.write("FREQ DEF")
    assert number(gen, "FREQ?") == 1e3
    gen.write("FREQ INF")  # SCPI-1999 Vol 1 §7.2.1: INFinity is 9.9E37, beyond the range
    gen.write("FREQ? BOTTOM")
    assert codes(gen) == [-222, -224]


def test_booleans(gen):
    # SCPI-1999 Vol 1 §7.3: ON|OFF|1|0 in, 1|0 out
    for text, expected in (("ON", "1"), ("0", "0"), ("1", "1"), ("off", "0")):
        gen.write(f"OUTP {text}")
        assert gen.query("OUTP?") == expected
    gen.write("OUTP 2")
    assert codes(gen) == [-224]


def test_unit_suffixes(gen, scope):
    # SCPI-1999 Vol 1 §7.2.2 / IEEE 488.2 §7.7.3: multipliers are case-insensitive, M is milli, MA mega,
    # MHZ is the defined exception for megahertz
    gen.write("VOLT 500mV")
    assert number(gen, "VOLT?") == pytest.approx(0.5)
    gen.write("VOLT 700 MV")
    assert number(gen, "VOLT?") == pytest.approx(0.7)
    gen.write("FREQ 2kHz")
    assert number(gen, "FREQ?") == pytest.approx(2e3)
    gen.write("FREQ 0.5MHZ")
    assert number(gen, "FREQ?") == pytest.approx(5e5)
    gen.write("FREQ 0.25mhz")  # still mega: 'mHz' is read as megahertz
    assert number(gen, "FREQ?") == pytest.approx(2.5e5)
    gen.write("FREQ 0.001MAHZ")
    assert number(gen, "FREQ?") == pytest.approx(1e3)
    scope.write("SWE:TIME 2ms;:TRIG:LEV -20mV")
    assert number(scope, "SWE:TIME?") == pytest.approx(2e-3)
    assert number(scope, "TRIG:LEV?") == pytest.approx(-0.02)
    gen.write("VOLT 1MAV")  # a megavolt: MA is mega, so the value is out of range
    gen.write("VOLT 2S")    # a time suffix on a voltage
    scope.write("SWE:POIN 100V")  # a point count takes no suffix
    assert codes(gen) == [-222, -131]
    assert codes(scope) == [-138]
    assert number(gen, "VOLT?") == pytest.approx(0.7)


# --- errors and status ------------------------------------------------------------------------------------

@pytest.mark.parametrize("message, code, bit", [
    ("FREQ::1", -102, CME),        # syntax error: empty mnemonic
    ("FREQ ON", -104, CME),        # character data where a number belongs
    ("FREQ 1,2", -108, CME),       # one parameter too many
    ("FREQ", -109, CME),           # the parameter is missing
    ("BOGUS 1", -113, CME),        # undefined header
    ("OUTP:IMP 50", -113, CME),    # the header exists only as a query
    ("SOUR3:FREQ 1", -114, CME),   # suffix out of range
    ("FREQ 1.2.3", -120, CME),     # malformed number
    ("VOLT 1S", -131, CME),        # invalid suffix
    ("VOLT:LOW 2", -221, EXE),     # low above high: settings conflict
    ("VOLT:HIGH 11", -222, EXE),   # data out of range
    ("FUNC TRIangle", -224, EXE),  # not one of the allowed shapes
])
def test_errors_have_their_codes_and_event_bits(gen, message, code, bit):
    # SCPI-1999 Vol 2 §21.8: -1xx command errors set CME, -2xx execution errors set EXE (IEEE 488.2 §11.5.1)
    gen.write(message)
    found = errors(gen)
    assert [c for c, _ in found] == [code]
    assert found[0][1].startswith(
        {-102: "Syntax error", -104: "Data type error", -108: "Parameter not allowed", -109: "Missing parameter",
         -113: "Undefined header", -114: "Header suffix out of range", -120: "Numeric data error",
         -131: "Invalid suffix", -221: "Settings conflict", -222: "Data out of range",
         -224: "Illegal parameter value"}[code])
    assert int(gen.query("*ESR?")) == bit


def test_a_command_error_skips_the_rest_of_the_message_an_execution_error_does_not(gen):
    gen.write("FREQU 5;FREQ 600")   # -113: the rest of the message is not executed
    assert number(gen, "FREQ?") == 1000
    gen.write("VOLT:HIGH 11;:FREQ 600")  # -222: the next unit still runs
    assert number(gen, "FREQ?") == 600
    assert codes(gen) == [-113, -222]


def test_error_queue_overflow_keeps_the_oldest_and_ends_with_350(gen):
    # SCPI-1999 Vol 2 §21.8: on overflow the newest entry is replaced by -350 and later errors are lost
    for _ in range(25):
        gen.write("FREQU 1")
    gen.write("VOLT:HIGH 11")  # lost: the queue is full
    found = codes(gen)
    assert found == [-113] * 19 + [-350]
    assert gen.query("SYST:ERR:NEXT?") == '0,"No error"'


def test_power_on_esr_then_read_and_clear(sim_bench, visa):
    g = visa(sim_bench().resources["generator"])
    # IEEE 488.2 §11.5.1: power-on sets PON; *ESR? reads and clears
    assert int(g.query("*ESR?")) == PON
    assert int(g.query("*ESR?")) == 0
    g.write("*OPC")  # no operation pending: OPC set at once (IEEE 488.2 §12.5.2)
    assert int(g.query("*ESR?")) == 1


def test_status_byte_bits_and_enable_masks(gen):
    # IEEE 488.2 §11.2 with SCPI's bits: 2 error queue not empty, 4 MAV, 5 ESB, 6 MSS
    assert int(gen.query("*STB?")) == 0
    gen.write("BOGUS")
    assert int(gen.query("*STB?")) == 4           # an error is queued; ESE is 0 so no ESB
    gen.write("*ESE 32")
    assert gen.query("*ESE?") == "32"
    assert int(gen.query("*STB?")) == 4 | 32      # CME is enabled into ESB
    gen.write("*SRE 32")
    assert int(gen.query("*STB?")) == 4 | 32 | 64  # ESB is enabled into MSS
    assert gen.query("*IDN?;*STB?").split(";")[1] == str(4 | 16 | 32 | 64)  # the *IDN? reply is queued: MAV
    gen.write("*SRE 255")
    assert gen.query("*SRE?") == "191"            # bit 6 cannot be enabled (IEEE 488.2 §11.3.2)
    gen.write("*CLS")                              # IEEE 488.2 §10.3: clears ESR and queue, not the masks
    assert int(gen.query("*STB?")) == 0
    assert gen.query("*ESE?;*SRE?") == "32;191"
    gen.write("*ESE 256")
    assert codes(gen) == [-222]


def test_rst_restores_settings_and_leaves_status_alone(gen):
    # IEEE 488.2 §10.32: *RST resets device settings, not the status registers, masks or queues
    gen.write("FREQ 5000;:OUTP ON;:OUTP:LOAD MATC;*ESE 4;BOGUS")
    gen.write("*RST")
    assert gen.query("FREQ?;:OUTP?;:OUTP:LOAD?") == "1E+03;0;HIGH"
    assert gen.query("*ESE?") == "4"
    assert codes(gen) == [-113]


def test_common_queries(gen):
    maker, model, serial, firmware = gen.query("*IDN?").split(",")  # IEEE 488.2 §10.14: four fields
    assert (maker, model) == ("acqd-sim", "FG")
    assert gen.query("*TST?") == "0"  # IEEE 488.2 §10.38: 0 = self-test passed
    assert gen.query("*OPC?") == "1"
    gen.write("*WAI")
    gen.write("*FOO")
    gen.write("*IDN")  # a query-only common header used as a command
    assert codes(gen) == [-113, -113]


# --- the message exchange on a socket --------------------------------------------------------------------

@pytest.mark.timeout(20)
def test_new_message_interrupts_a_pending_query(sim_bench, visa):
    # IEEE 488.2 §6.3.2.3: a message arriving before the reply is read discards it, -410 Query INTERRUPTED
    bench = sim_bench()
    gen, scope = visa(bench.resources["generator"]), visa(bench.resources["scope"], timeout_ms=300)
    gen.write("VOLT:LOW 0;HIGH 1;:OUTP ON")
    scope.write("TRIG:SOUR EXT;LEV 5;:INIT")  # a level outside the stimulus: no completion
    with pytest.raises(VisaIOError):
        scope.query("*OPC?")
    found = errors(scope)
    assert [c for c, _ in found] == [-410]
    assert scope.query("*IDN?").startswith("acqd-sim,DIG")  # no stale '1' left behind
    assert int(scope.query("*ESR?")) & QYE


@pytest.mark.timeout(20)
def test_slow_reply_fault_and_interruption(sim_bench, visa):
    bench = sim_bench()
    gen = visa(bench.resources["generator"], timeout_ms=150)
    bench.generator.faults.reply_delay_s = 0.5
    with pytest.raises(VisaIOError):
        gen.query("*IDN?")
    bench.generator.faults.reply_delay_s = 0.0
    assert gen.query("SYST:ERR?").startswith("-410,")


def _raw(resource: str) -> socket.socket:
    _, host, port, _ = resource.split("::")
    return socket.create_connection((host, int(port)), timeout=2)


@pytest.mark.timeout(20)
def test_unterminated_messages_at_close(sim_bench, visa):
    bench = sim_bench()
    with _raw(bench.resources["generator"]) as raw:
        raw.sendall(b"FREQ 5000")  # no terminator: discarded, not executed
    with _raw(bench.resources["generator"]) as raw:
        raw.sendall(b"*IDN?")      # a query that can never be answered: -420 Query UNTERMINATED
    gen = visa(bench.resources["generator"])
    for _ in range(50):  # the server sees the closes asynchronously
        if len(bench.generator.errors) == 2:
            break
        gen.query("*OPC?")
    assert number(gen, "FREQ?") == 1000
    assert codes(gen) == [-100, -420]
    assert int(gen.query("*ESR?")) == PON | CME | QYE


def test_raw_socket_line_protocol_and_definite_block(sim_bench):
    bench = sim_bench()
    with _raw(bench.resources["scope"]) as raw:
        raw.sendall(b"SWE:POIN 100;:TRIG:SOUR IMM;:INIT;*OPC?\n")
        assert raw.recv(100) == b"1\n"  # a reply ends with NL
        raw.sendall(b"FORM INT,16;:TRAC? CH1\n")
        data = b""
        while not data.endswith(b"\n") or len(data) < 205:
            data += raw.recv(4096)
    # IEEE 488.2 §8.7.9: '#', digit count 3, byte count 200 (100 samples of 2 bytes), the bytes, then NL
    assert data[:5] == b"#3200"
    assert len(data) == 5 + 200 + 1 and data[-1:] == b"\n"
