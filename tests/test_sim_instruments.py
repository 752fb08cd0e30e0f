"""The simulated generator, the SCPI-1999 digitiser and the second-dialect scope, over TCP through pyvisa-py.

External references: the series RLC step response (Nilsson & Riedel, Electric Circuits ch. 8), the
generator's matched-load doubling (the divider of a 50 Ω source; common practice), scipy (first-order
low-pass, frequency response), numpy's statistics, pyvisa's own block decoder, and IEEE 488.2 §8.7.9 for the block layout.
"""

from __future__ import annotations

import socket
import time

import numpy as np
import pytest
import scipy.signal
from pyvisa.errors import VisaIOError

from acqd import scpi
from acqd.cli import main
from acqd.cli.sim import load_config
from acqd.errors import ConfigError
from acqd.sim import frontend
from acqd.sim.bench import DEMO_DUT, SimBenchConfig
from served import serving

# The demo DUT with the generator's 50 ohm: R_total = 77 ohm, L = 3.3 mH, C = 68 nF.
R_TOTAL, L_H, C_F = DEMO_DUT["r_ohm"] + 50.0, DEMO_DUT["l_h"], DEMO_DUT["c_f"]


def rlc_step_v_c(t: np.ndarray, volts: float) -> np.ndarray:
    """Series RLC capacitor voltage for a step of ``volts`` from rest at t = 0 (Nilsson & Riedel, Electric Circuits
    ch. 8)."""
    wn = 1 / np.sqrt(L_H * C_F)
    zeta = R_TOTAL / 2 * np.sqrt(C_F / L_H)
    sigma, wd = zeta * wn, wn * np.sqrt(1 - zeta**2)
    tp = np.clip(t, 0, None)
    return np.where(t < 0, 0.0, volts * (1 - np.exp(-sigma * tp) * (np.cos(wd * tp) + sigma / wd * np.sin(wd * tp))))


def number(session, query: str) -> float:
    return scpi.parse_number(session.query(query))


def errors(session) -> list[int]:
    found = []
    while (code := scpi.parse_error_entry(session.query("SYST:ERR?"))[0]) != 0:
        found.append(code)
    return found


def read_volts(scope, channel: int, fmt: str = "REAL,32", order: str = "NORM") -> np.ndarray:
    """One channel of the last DIG record, decoded by pyvisa's block reader and scaled per TRACe:AXES?."""
    scope.write(f"FORM {fmt};:FORM:BORD {order}")
    big = order.upper().startswith("NORM")
    if fmt == "ASC":
        return np.array(scope.query_ascii_values(f"TRAC? CH{channel}"))
    datatype = {"REAL,32": "f", "INT,8": "b", "INT,16": "h"}[fmt]
    raw = np.array(scope.query_binary_values(f"TRAC? CH{channel}", datatype=datatype, is_big_endian=big))
    _, _, per_code, at_zero = axes(scope, channel)
    return raw * per_code + at_zero


def axes(scope, channel: int = 1) -> tuple[float, ...]:
    """``TRACe:AXES? CH<n>``: seconds per sample, first sample's time, volts per code, volts at code 0."""
    return tuple(scpi.parse_number(v) for v in scope.query(f"TRAC:AXES? CH{channel}").split(","))


def times(scope) -> np.ndarray:
    dt, t_first, _, _ = axes(scope)
    return t_first + np.arange(int(scope.query("TRAC:POIN?"))) * dt


@pytest.fixture
def quiet(sim_bench, visa, quiet_table):
    """A bench with front-end imperfections off (8-bit quantisation on): (bench, gen, scope, divscope)."""
    bench = sim_bench(quiet_table)
    return (bench, visa(bench.resources["generator"]), visa(bench.resources["scope"], timeout_ms=1000),
            visa(bench.resources["divscope"]))


def square(gen, low: float, high: float, freq: float = 50.0, load: str = "HIGHZ") -> None:
    gen.write(f"FUNC SQU;FREQ {freq};:OUTP:LOAD {load};:VOLT:LOW {low};HIGH {high};:OUTP ON")


def capture(scope, *, level: float = 0.5, slope: str = "POS", time_s: float = 2e-3, points: int = 1000,
            pre: int = 100, range_v: float = 1.25, offset_v: float = 1.0) -> str:
    scope.write(f"TRIG:SOUR EXT;SLOP {slope};LEV {level};:SWE:TIME {time_s};POIN {points};OFFS:POIN {-pre}")
    for ch in (1, 2, 3, 4):
        scope.write(f"VOLT{ch}:RANG {range_v};OFFS {offset_v}")
    scope.write("INIT")
    return scope.query("*OPC?")


# --- generator --------------------------------------------------------------------------------------------

def test_generator_levels_amplitude_offset_high_low(quiet):
    _, gen, _, _ = quiet
    gen.write("VOLT 2;VOLT:OFFS 0.5")
    # amplitude is peak to peak around the offset: high = offset + Vpp/2 (common practice)
    assert (number(gen, "VOLT:HIGH?"), number(gen, "VOLT:LOW?")) == (1.5, -0.5)
    gen.write("VOLT:HIGH 3")
    assert (number(gen, "VOLT?"), number(gen, "VOLT:OFFS?")) == (3.5, 1.25)
    gen.write("VOLT:LOW 1")
    assert (number(gen, "VOLT?"), number(gen, "VOLT:OFFS?")) == (2.0, 2.0)
    assert number(gen, "OUTP:IMP?") == 50.0
    assert number(gen, "FUNC:TRAN?") == 0.0  # the quiet bench's edge time
    assert gen.query("FUNC?") == "SQU"       # short form, upper case (SCPI-1999 Vol 1 §6.2.1, from memory)
    assert errors(gen) == []


def test_out_of_range_levels_are_refused_and_nothing_changes(quiet):
    _, gen, _, _ = quiet
    gen.write("VOLT:LOW 0;HIGH 8")
    before = gen.query("VOLT?;VOLT:OFFS?;:OUTP:LOAD?")
    gen.write("VOLT:HIGH 10.5")     # beyond 10 V into high impedance
    gen.write("VOLT 18")            # 0..8 V has offset 4: 18 Vpp would reach 13 V
    gen.write("OUTP:LOAD MATC")     # 8 V is beyond the 5 V a matched-load setting allows
    assert errors(gen) == [-222, -222, -221]
    assert gen.query("VOLT?;VOLT:OFFS?;:OUTP:LOAD?") == before
    gen.write("VOLT:HIGH 4;:OUTP:LOAD MATC;:VOLT:HIGH 5.5")
    assert errors(gen) == [-222]
    assert number(gen, "VOLT:HIGH?") == 4.0


@pytest.mark.parametrize("load, expected", [("HIGHZ", 1.0), ("MATC", 2.0)])
def test_matched_load_setting_doubles_the_open_circuit_voltage(quiet, load, expected):
    # Common practice (the divider of a 50 ohm source): set for a 50 ohm load, the capacitor settles at about
    # twice the displayed level, because no DC current flows into a series RLC.
    _, gen, scope, _ = quiet
    square(gen, 0.0, 1.0, load=load)
    assert capture(scope, time_s=5e-3, range_v=1.5, offset_v=1.0) == "1"
    v_c = read_volts(scope, 2)
    lsb = 2 * 1.5 / 256
    assert abs(np.mean(v_c[-200:]) - expected) < 2 * lsb


def test_rst_switches_the_output_off(quiet):
    _, gen, _, _ = quiet
    gen.write("OUTP ON;:OUTP:SYNC ON")
    gen.write("*RST")
    assert gen.query("OUTP?;:OUTP:SYNC?") == "0;0"


def test_command_log_records_every_message_in_order(sim_bench, visa, tmp_path):
    log_file = tmp_path / "gen.log"
    bench = sim_bench(command_log=str(log_file))
    gen = visa(bench.resources["generator"])
    sent = ["*RST", "FREQ 2.5kHz;VOLT 1", "VOLT:HIGH 99", "OUTP ON"]
    t_start = time.monotonic()  # the same clock the log uses
    for message in sent:
        gen.write(message)
    gen.query("*OPC?")
    t_end = time.monotonic()
    log = bench.generator.command_log
    assert [m.text for m in log] == sent + ["*OPC?"]  # refused messages are logged too: they reached the wire
    stamps = [m.monotonic_s for m in log]
    assert stamps == sorted(stamps) and t_start <= stamps[0] and stamps[-1] <= t_end
    lines = log_file.read_text().splitlines()
    assert [line.split("\t")[2] for line in lines] == sent + ["*OPC?"]


# --- the SCPI-1999 digitiser -------------------------------------------------------------------------------

def test_trigger_on_the_edge_with_pre_trigger_samples(sim_bench, visa, quiet_table):
    bench = sim_bench({**quiet_table, "quantise": False})
    gen, scope = visa(bench.resources["generator"]), visa(bench.resources["scope"])
    square(gen, 0.0, 1.0, freq=50.0)
    assert capture(scope, time_s=1e-3, points=1000, pre=100) == "1"
    t = times(scope)
    assert axes(scope)[0] == pytest.approx(1e-6)               # SWE:TIME / SWE:POIN
    assert t[100] == pytest.approx(0.0, abs=1e-12)             # OFFS:POIN -100: 100 pre-trigger samples
    v_c = read_volts(scope, 2)
    # smoke check of the physics against the textbook step response (the lead's tests go further); the
    # half period (10 ms) is 29 settling times (4/(zeta wn) = 343 us), so the edge starts from rest
    assert np.max(np.abs(v_c - rlc_step_v_c(t, 1.0))) < 1e-5
    assert np.all(v_c[:100] == pytest.approx(0.0, abs=1e-6))


def test_negative_slope_captures_the_falling_edge(quiet):
    _, gen, scope, _ = quiet
    square(gen, 0.0, 1.0)
    assert capture(scope, slope="NEG", level=0.5, time_s=5e-3, offset_v=0.5) == "1"  # spans -0.75..1.75 V
    v_c = read_volts(scope, 2)
    lsb = 2 * 1.25 / 256
    assert abs(np.mean(v_c[:100]) - 1.0) < 2 * lsb and abs(np.mean(v_c[-100:])) < 2 * lsb
    assert v_c.min() < -0.4  # a falling step rings below zero too (same overshoot, mirrored)


@pytest.mark.parametrize("fmt, order", [("REAL,32", "SWAP"), ("INT,8", "NORM"), ("INT,8", "SWAP"),
                                        ("INT,16", "NORM"), ("INT,16", "SWAP"), ("ASC", "NORM")])
def test_every_format_and_byte_order_gives_the_same_volts(sim_bench, visa, fmt, order):
    bench = sim_bench()  # the demo bench: noise, jitter, bandwidth and the 8-bit ADC all on
    gen, scope = visa(bench.resources["generator"]), visa(bench.resources["scope"])
    square(gen, 0.0, 1.0)
    assert capture(scope) == "1"
    reference = read_volts(scope, 2, "REAL,32", "NORM")
    lsb = 2 * 1.25 / 256
    assert np.max(np.abs(read_volts(scope, 2, fmt, order) - reference)) < lsb  # within a quantisation step
    assert len(reference) == 1000


def test_int16_words_carry_the_8_bit_code_times_256(quiet):
    # an 8-bit ADC left-justified in a 16-bit word (common practice): every code is a multiple of 256
    _, gen, scope, _ = quiet
    square(gen, 0.0, 1.0)
    capture(scope)
    scope.write("FORM INT,16;:FORM:BORD NORM")
    codes = np.array(scope.query_binary_values("TRAC? CH2", datatype="h", is_big_endian=True))
    assert np.all(codes % 256 == 0) and len(np.unique(codes)) > 20
    assert axes(scope, 2)[2] == pytest.approx(2 * 1.25 / 65536)


@pytest.mark.timeout(20)
def test_level_outside_the_stimulus_never_completes(quiet):
    _, gen, scope, _ = quiet
    square(gen, 0.0, 1.0)
    scope.timeout = 300
    with pytest.raises(VisaIOError):
        capture(scope, level=1.5)
    assert errors(scope) == [-410]  # the pending *OPC? was interrupted by SYST:ERR?
    scope.write("TRAC? CH1")        # nothing completed, so there is no record to read
    assert errors(scope) == [-230]


@pytest.mark.timeout(20)
def test_arming_before_the_output_is_switched_on(quiet):
    _, gen, scope, _ = quiet
    gen.write("FUNC SQU;FREQ 50;:VOLT:LOW 0;HIGH 1")  # output still off: no edges
    scope.write("TRIG:SOUR EXT;LEV 0.5;:INIT")
    scope.timeout = 200
    with pytest.raises(VisaIOError):
        scope.query("*OPC?")
    gen.write("OUTP ON")
    scope.timeout = 2000
    assert scope.query("*OPC?") == "1"


@pytest.mark.timeout(20)
def test_opc_and_wai_cover_the_armed_acquisition(quiet, visa):
    bench, gen, scope, _ = quiet
    other = visa(bench.resources["scope"])  # a second session sees the instrument-wide status
    gen.write("FUNC SQU;FREQ 50;:VOLT:LOW 0;HIGH 1")  # output off: the acquisition stays pending
    scope.write("*ESR?")
    scope.read()
    # IEEE 488.2 §12.5.2: *OPC sets ESR bit 0 only when the pending operation has finished
    scope.write("TRIG:SOUR EXT;LEV 0.5;:INIT;*OPC")
    assert int(other.query("*ESR?")) == 0
    # IEEE 488.2 §10.39: after *WAI nothing more of the message runs until the operation has finished
    scope.write("*WAI;*ESE 8")
    assert other.query("*ESE?") == "0"
    gen.query("OUTP ON;*OPC?")  # the generator has switched on: its edge completes the acquisition
    assert other.query("*ESE?") == "8"
    assert int(other.query("*ESR?")) == 1


@pytest.mark.timeout(20)
def test_trigger_never_comes_fault(quiet):
    bench, gen, scope, _ = quiet
    square(gen, 0.0, 1.0)
    bench.scope.faults.trigger_never = True
    scope.timeout = 200
    with pytest.raises(VisaIOError):
        capture(scope)
    bench.scope.faults.trigger_never = False


def test_immediate_capture_of_dc_and_clipping(quiet):
    _, gen, scope, _ = quiet
    gen.write("FUNC DC;:VOLT:OFFS 0.3;:OUTP ON")
    scope.write("TRIG:SOUR IMM;:SWE:POIN 200;:VOLT2:RANG 1;OFFS 0;:VOLT3:RANG 0.2;OFFS 0;:INIT")
    assert scope.query("*OPC?") == "1"
    lsb = 2 * 1.0 / 256
    # the series capacitor blocks DC, so it charges to the full DC level (textbook)
    assert np.all(np.abs(read_volts(scope, 2) - 0.3) <= lsb / 2)
    # CH3 (across R) is 0 V; CH3 with a span of only ±0.2 V shows an in-range value, and CH1 (v_src,
    # 0.3 V) read on a ±0.2 V span clips at the top code: centre + 127 LSB (8-bit ADC, common practice)
    scope.write("VOLT1:RANG 0.2;OFFS 0;:INIT")
    scope.query("*OPC?")
    assert np.all(read_volts(scope, 1) == pytest.approx(0.2 * 127 / 128))


def test_ac_coupling_removes_the_mean(quiet):
    _, gen, scope, _ = quiet
    gen.write("FUNC DC;:VOLT:OFFS 0.6;:OUTP ON")
    scope.write("TRIG:SOUR IMM;:INP2:COUP AC;:VOLT2:RANG 1;OFFS 0;:INIT")
    scope.query("*OPC?")
    assert np.all(read_volts(scope, 2) == 0.0)
    assert scope.query("INP2:COUP?;:INP1:COUP?") == "AC;DC"


def test_sine_free_run_amplitude_follows_the_frequency_response(sim_bench, visa, quiet_table):
    bench = sim_bench({**quiet_table, "quantise": False})
    gen, scope = visa(bench.resources["generator"]), visa(bench.resources["scope"])
    gen.write("FUNC SIN;FREQ 8000;VOLT 1;VOLT:OFFS 0;:OUTP ON")
    scope.write("TRIG:SOUR IMM;:SWE:TIME 1e-3;POIN 5000;:VOLT2:RANG 5;:INIT")
    scope.query("*OPC?")
    v_c = read_volts(scope, 2)
    # textbook voltage divider of the series RLC: V_C/U = 1 / (1 - w^2 LC + j w R C)
    w = 2 * np.pi * 8000
    response = [1 / (1 - w**2 * L_H * C_F + 1j * w * R_TOTAL * C_F)]
    assert (v_c.max() - v_c.min()) / 2 == pytest.approx(0.5 * abs(response[0]), rel=2e-3)


def test_noise_is_gaussian_with_the_set_rms_and_seeded(sim_bench, visa, quiet_table):
    table = {**quiet_table, "quantise": False, "noise_v_rms": 0.01, "seed": 11}
    records = []
    for seed in (11, 11, 12):
        bench = sim_bench({**table, "seed": seed})
        scope = visa(bench.resources["scope"])
        scope.write("TRIG:SOUR IMM;:SWE:POIN 20000;:INIT")  # generator output off: 0 V plus noise
        scope.query("*OPC?")
        records.append(read_volts(scope, 1))
    # sample standard deviation of 20000 gaussian draws is within 2 % of sigma (about 4 standard errors)
    assert np.std(records[0]) == pytest.approx(0.01, rel=0.02)
    assert abs(np.mean(records[0])) < 4 * 0.01 / np.sqrt(20000)
    assert np.array_equal(records[0], records[1]) and not np.array_equal(records[0], records[2])


def test_trigger_jitter_moves_the_edge_between_acquisitions(sim_bench, visa, quiet_table):
    crossings = {}
    for jitter in (0.0, 3e-6):
        bench = sim_bench({**quiet_table, "jitter_s": jitter})
        gen, scope = visa(bench.resources["generator"]), visa(bench.resources["scope"])
        square(gen, 0.0, 1.0)
        found = []
        for _ in range(12):
            capture(scope, time_s=1e-4, points=100, pre=50)  # 1 us per sample
            found.append(int(np.argmax(read_volts(scope, 1) > 0.5)))
        crossings[jitter] = found
    assert len(set(crossings[0.0])) == 1 and crossings[0.0][0] == 50
    assert np.std(crossings[3e-6]) > 1.0  # a 3 us rms shift is several samples


def test_bandwidth_is_a_single_pole_low_pass_on_the_sample_grid():
    # reference: scipy's own first-order-hold discretisation of w/(s + w), started settled at the first value
    dt, bandwidth = 1e-6, 50e3
    volts = np.concatenate([np.zeros(20), np.ones(80), np.linspace(1, -1, 50)])
    out = frontend.analogue(volts, dt, frontend.ChannelSetup(0.0, 1.0),
                            frontend.FrontEndSettings(bandwidth_hz=bandwidth), np.random.default_rng(0))
    w = 2 * np.pi * bandwidth
    num, den, _ = scipy.signal.cont2discrete(([w], [1, w]), dt, method="foh")
    num, den = np.ravel(num), np.ravel(den)
    zi = scipy.signal.lfiltic(num, den, y=[volts[0]] * 2, x=[volts[0]] * 2)
    expected, _ = scipy.signal.lfilter(num, den, volts, zi=zi)
    assert np.max(np.abs(out - expected)) < 1e-9
    assert out[20] < 0.5 < out[40]  # the step is rounded, not passed through


@pytest.mark.timeout(20)
def test_realtime_mode_takes_the_instrument_time(sim_bench, visa, quiet_table):
    bench = sim_bench({**quiet_table, "realtime": True})
    gen, scope, view = (visa(bench.resources[k]) for k in ("generator", "scope", "divscope"))
    square(gen, 0.0, 1.0, freq=20.0)
    t0 = time.monotonic()
    assert capture(scope, time_s=0.1, points=1000, pre=100) == "1"
    assert time.monotonic() - t0 >= 0.09  # at least the post-trigger part of the window
    view.write("CATCh:SOUR FREE;:SPAN:PERD 0.02;:CATCh:ONCE")  # a 0.2 s window, free running
    assert view.query("CATCh:STAT?") == "WAIT"
    deadline = time.monotonic() + 5
    while view.query("CATCh:STAT?") != "DONE" and time.monotonic() < deadline:
        time.sleep(0.02)
    assert view.query("CATCh:STAT?") == "DONE"


# --- blocks on the wire and their faults -------------------------------------------------------------------

def _raw_query(resource: str, message: bytes) -> bytes:
    _, host, port, _ = resource.split("::")
    data = b""
    with socket.create_connection((host, int(port)), timeout=2) as raw:
        raw.sendall(message)
        while chunk := raw.recv(65536):
            data += chunk
            if data.endswith(b"\n") and len(data) > 8 and len(data) >= _expected(data):
                break
    return data


def _expected(data: bytes) -> int:
    try:
        header_len, count = scpi.parse_block_header(data[:11])
        return header_len + count + 1
    except scpi.BlockError:
        return 0


def test_trace_block_read_raw_and_through_pyvisa_agree(quiet):
    bench, gen, scope, _ = quiet
    square(gen, 0.0, 1.0)
    capture(scope, points=500)
    data = _raw_query(bench.resources["scope"], b"FORM REAL,32;:FORM:BORD NORM;:TRAC? CH2\n")
    # IEEE 488.2 §8.7.9: #, digit count, byte count (500 × 4 = 2000), payload, then the NL terminator
    assert data[:6] == b"#42000" and len(data) == 6 + 2000 + 1 and data.endswith(b"\n")
    raw_volts = np.frombuffer(scpi.decode_block(data), dtype=">f4")
    assert np.array_equal(raw_volts, read_volts(scope, 2))


@pytest.mark.timeout(20)
def test_garbled_header_and_dropped_block_faults(quiet):
    bench, gen, scope, _ = quiet
    square(gen, 0.0, 1.0)
    capture(scope, points=500)
    bench.scope.faults.garble_block_header = True
    data = _raw_query(bench.resources["scope"], b"FORM INT,8;:TRAC? CH1\n")
    with pytest.raises(scpi.BlockError, match="digit"):
        scpi.parse_block_header(data[:8])
    bench.scope.faults.garble_block_header = False
    bench.scope.faults.drop_mid_block = True
    data = _raw_query(bench.resources["scope"], b"FORM INT,8;:TRAC? CH1\n")
    assert data[:5] == b"#3500" and 5 < len(data) < 5 + 500  # cut short, then the connection closed
    with pytest.raises(scpi.BlockError, match="holds only"):
        scpi.decode_block(data)
    bench.scope.faults.drop_mid_block = False
    bench.scope.push_error(-350)  # fault injection: an error-queue entry
    assert scope.query("SYST:ERR?") == '-350,"Queue overflow"'


# --- the second dialect ------------------------------------------------------------------------------------

def test_divscope_gives_the_same_volts_as_the_digitiser(quiet):
    _, gen, scope, view = quiet
    square(gen, 0.0, 1.0)
    assert capture(scope, time_s=1e-3, points=1000, pre=100, range_v=1.6, offset_v=0.8) == "1"
    dig = read_volts(scope, 2)
    # the same window and span in per-division terms: 10 × 1e-4 s, 10 % lead; 8 × 0.4 V = ±1.6 V about 0.8 V
    view.write("SPAN:PERD 1e-4;POIN 1000;LEAD 0.1;:LANE2:PERD 0.4;CENT 0.8;:CATCh:SOUR EXT;EDGE UP;THR 0.5")
    view.write("BLOCk:WIDT 16;:CATCh:ONCE")
    assert view.query("CATCh:STAT?") == "DONE"
    per_code, at_zero, dt, t_first = (scpi.parse_number(v) for v in view.query("BLOCk:LANE2:SCAL?").split(","))
    codes = np.array(view.query_binary_values("BLOCk:LANE2:COD?", datatype="h", is_big_endian=False))
    assert np.max(np.abs(codes * per_code + at_zero - dig)) < 1e-6
    assert (dt, t_first) == pytest.approx(axes(scope, 2)[:2])
    view.write("BLOCk:WIDT 8")
    codes8 = np.array(view.query_binary_values("BLOCk:LANE2:COD?", datatype="b"))
    assert np.array_equal(codes8.astype(int) * 256, codes.astype(int))


@pytest.mark.timeout(20)
def test_divscope_state_poll_and_its_opc_does_not_wait(quiet):
    _, gen, _, view = quiet
    assert view.query("CATCh:STAT?") == "IDLE"
    gen.write("FUNC SQU;FREQ 50;:VOLT:LOW 0;HIGH 1")  # output off
    view.write("CATCh:SOUR EXT;EDGE DOWN;THR 0.5;:CATCh:ONCE")
    assert view.query("CATCh:STAT?") == "WAIT"
    assert view.query("*OPC?") == "1"  # this dialect's *OPC? does not cover the acquisition
    view.write("BLOCk:LANE1:COD?")
    assert errors(view) == [-230]
    gen.query("OUTP ON;*OPC?")
    assert view.query("CATCh:STAT?") == "DONE"
    view.write("BLOCk:WIDT 12")
    assert errors(view) == [-224]


# --- configuration and the command line -------------------------------------------------------------------

@pytest.mark.parametrize("table, field, words", [
    ({"noise": 0.1}, "bench.simulated.noise", "allowed here"),
    ({"noise_v_rms": -1}, "bench.simulated.noise_v_rms", "at least 0"),
    ({"realtime": "yes"}, "bench.simulated.realtime", "true or false"),
    ({"wiring": {"CH5": "v_c"}}, "bench.simulated.wiring.CH5", "CH1, CH2, CH3, CH4"),
    ({"wiring": {"CH1": "v_x"}}, "bench.simulated.wiring.CH1", "v_src, v_rl, v_c, i_l"),
    ({"wiring": {"CH1": "v_c - - v_rl"}}, "bench.simulated.wiring.CH1", "not a signal"),
    ({"dut": {"model": "tube_amp"}}, "model", "allowed"),
    ({"command_log": "/nonexistent-folder/gen.log"}, "bench.simulated.command_log", "does not exist"),
])
def test_bad_bench_tables_name_the_key_and_what_is_allowed(table, field, words):
    with pytest.raises(ConfigError) as caught:
        SimBenchConfig.from_mapping(table, "bench.toml")
    assert caught.value.source.startswith("bench.toml") and caught.value.field == field
    assert words in caught.value.problem


def test_profile_tables(tmp_path, capsys):
    profile = tmp_path / "p.toml"
    profile.write_text('[bench.simulated]\nseed = 5\nrealtime = true\n[bench.simulated.wiring]\nCH4 = "i_l"\n')
    config = load_config(str(profile))
    assert (config.seed, config.realtime, dict(config.wiring)) == (5, True, {"CH4": "i_l"})
    bare = tmp_path / "bare.toml"
    bare.write_text("[stimulus]\nhigh_v = 1.0\n")
    assert main(["sim", str(bare)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "bench.simulated" in err[0] and str(bare) in err[0]


def test_cli_refuses_a_non_loopback_host(capsys):
    assert main(["sim", "--host", "0.0.0.0"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "--host" in err[0] and "--allow-remote" in err[0]


@pytest.mark.timeout(60)
def test_acqd_sim_json_serves_until_sigterm(visa):
    with serving("sim") as resources:
        assert sorted(resources) == ["divscope", "generator", "scope"]
        models = {name: visa(resource).query("*IDN?").split(",")[1] for name, resource in resources.items()}
        assert models == {"generator": "FG", "scope": "DIG", "divscope": "DIVSCOPE"}


def test_opc_query_answers_at_once_on_a_fresh_scope(sim_bench, visa) -> None:
    """IEEE 488.2 §12.5.3 (from memory): *OPC? returns 1 when no operation is pending — at power-on too."""
    bench = sim_bench()
    scope = visa(bench.resources["scope"], timeout_ms=1000)
    assert scope.query("*OPC?").strip() == "1"
