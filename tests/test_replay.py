"""The replay scope: stored records served in the simulated DIG scope's dialect, over real TCP through pyvisa-py.

Records are taken on the simulated bench by the step test through the real roles, written to a real HDF5
store, served by ``ReplayBench`` and acquired again by the same client code. What comes back must be the
stored record bit for bit: ``np.array_equal`` on every channel (math channels are computed again by the
client) and equal CRC-32 checksums (zlib's CRC-32 over the float64 samples, ``Record.checksum``). The
core replay tests run once per transport the replay bench serves (``transport``: socket, HiSLIP, VXI-11).
"""

from __future__ import annotations

import re
import tomllib
from pathlib import Path

import numpy as np
import pytest
import pyvisa

from acqd.cli import main
from acqd.errors import ConfigError, InstrumentError
from acqd.instruments import open_instrument
from acqd.profile import Profile, load_profile
from acqd.record import Record
from acqd.sim.bench import Serving, SimBench, SimBenchConfig
from acqd.sim.replay import ReplayBench
from acqd.steptest import run_step_test
from acqd.store import RecordStore, open_records
from served import serving

DIGITISER = Path(__file__).resolve().parents[1] / "drivers" / "scpi-digitiser.toml"  # REAL,32 big-endian
N_NIGHT = 3
WINDOW_S, SAMPLES, SHARE = 400e-6, 4000, 0.2  # sample interval 100 ns, 800 pre-trigger samples
# The demo bench (CH1 v_src, CH2 v_c, CH3 across the 27 ohm resistor) with its noise, jitter, bandwidth and
# 8-bit ADC on; three inputs and a math channel, the loop current.
PROFILE_TEXT = f"""
[bench]
kind = "simulated"
[bench.generator]
driver = "scpi-generator"
[bench.scope]
driver = "scpi-digitiser"
[bench.simulated]
seed = 11

[limits]
max_level_v = 2.0
max_frequency_hz = 10e3

[stimulus]
low_v = 0.0
high_v = 1.0
frequency_hz = 200.0
edge = "rising"

[acquisition]
window_s = {WINDOW_S}
pretrigger_fraction = {SHARE}
samples = {SAMPLES}
averages = 1
[acquisition.channels.CH1]
name = "v_src"
range_v = 0.8
offset_v = 0.5
[acquisition.channels.CH2]
name = "v_c"
range_v = 1.0
offset_v = 0.75
[acquisition.channels.CH3]
name = "v_r"
range_v = 0.5
offset_v = 0.0

[math.i_l]
unit = "A"
terms = {{ v_r = 1.0 }}
divide_by = 27.0
"""


def write_profile(directory: Path, averages: int = 1) -> Profile:
    path = directory / f"replay-{averages}.toml"
    path.write_text(PROFILE_TEXT.replace("averages = 1", f"averages = {averages}"))
    return load_profile(path)


def formatted_driver(directory: Path, scpi_format: str, fetch_format: str) -> Path:
    """The digitiser driver with another data format (the same instrument, set up differently)."""
    text = DIGITISER.read_text()
    assert '"FORMat REAL,32"' in text and 'format = "REAL,32"' in text
    text = text.replace('"FORMat REAL,32"', f'"FORMat {scpi_format}"').replace(
        'format = "REAL,32"', f'format = "{fetch_format}"')
    path = directory / f"scpi-digitiser-{fetch_format.replace(',', '').lower()}.toml"
    path.write_text(text)
    return path


def take_records(profile: Profile, scope_driver: str | Path, repeats: int) -> list[Record]:
    """Step tests on the profile's simulated bench (noise, jitter and the 8-bit ADC on)."""
    config = SimBenchConfig.from_mapping(profile.bench.simulated, str(profile.path))
    with SimBench(config) as bench, \
            open_instrument(bench.resources["generator"], "scpi-generator") as gen, \
            open_instrument(bench.resources["scope"], scope_driver) as scope:
        return [record for _ in range(repeats) for record in run_step_test(profile, gen, scope)]


def stored(records: list[Record], path: Path) -> list[Record]:
    """Append to a new store at ``path`` and read everything back as the replay will."""
    with RecordStore(path, fsync=False) as store:
        for record in records:
            store.append(record)
    with open_records(path) as reader:
        return list(reader)


def assert_same_record(got: Record, want: Record) -> None:
    assert got.channel_names == want.channel_names
    for a, b in zip(got.channels, want.channels):
        assert np.array_equal(a.samples, b.samples), a.name
    assert got.timebase == want.timebase
    assert got.checksum() == want.checksum()


@pytest.fixture(scope="module")
def night(tmp_path_factory) -> tuple[Path, list[Record]]:
    """A store of three records (REAL,32), and the records as read back from it."""
    directory = tmp_path_factory.mktemp("replay")
    path = directory / "night.h5"
    records = stored(take_records(write_profile(directory), "scpi-digitiser", N_NIGHT), path)
    assert len({r.checksum() for r in records}) == N_NIGHT  # noise differs: each record is recognisable
    return path, records


@pytest.fixture
def replay():
    """Factory: ``replay(path, records=None, transport="socket")`` → a started ReplayBench serving over
    ``transport``, stopped after the test."""
    benches: list[ReplayBench] = []

    def start(path: Path, records: list[int] | None = None, transport: str = "socket") -> ReplayBench:
        bench = ReplayBench(path, records, serving=Serving((transport,))).start()
        benches.append(bench)
        return bench

    yield start
    for bench in reversed(benches):
        bench.stop()


@pytest.fixture
def opened():
    """Factory: ``opened(resource, driver)`` → a role, closed after the test."""
    roles: list = []

    def open_role(resource: str, driver: str | Path):
        role = open_instrument(resource, driver)
        roles.append(role)
        return role

    yield open_role
    for role in roles:
        role.close()


def configure_like(scope, record: Record, profile: Profile) -> None:
    """The profile's acquisition settings (the ones the record was taken with)."""
    acq = profile.acquisition
    scope.configure_timebase(acq.window_s, acq.samples, acq.pretrigger_fraction)
    for ch in acq.channels:
        scope.configure_channel(ch.input, ch.range_v, ch.offset_v, ch.coupling)
    scope.configure_trigger("external", record.stimulus.edge, 0.5)


def one_line(exc: BaseException) -> str:
    text = str(exc)
    assert "\n" not in text
    return text


# --- the records come back ---------------------------------------------------------------------------------

def test_the_step_test_on_replay_gives_back_each_record_bit_for_bit(night, replay, opened, tmp_path, transport):
    path, records = night
    bench = replay(path, transport=transport)
    gen = opened(bench.resources["generator"], "scpi-generator")
    scope = opened(bench.resources["scope"], "scpi-digitiser")
    profile = write_profile(tmp_path)
    again = [record for _ in range(N_NIGHT) for record in run_step_test(profile, gen, scope)]
    for got, want in zip(again, records, strict=True):
        assert_same_record(got, want)  # including the math channel i_l, computed again by the client
    assert [c.source for c in records[0].channels][:3] == ["CH1", "CH2", "CH3"]


def test_identity_is_one_the_digitiser_driver_accepts(night, replay, visa):
    path, _ = night
    bench = replay(path)
    idn = visa(bench.resources["scope"]).query("*IDN?")
    pattern = tomllib.loads(DIGITISER.read_text())["driver"]["idn"]
    assert re.search(pattern, idn)
    assert idn.split(",")[2] == "REPLAY-night"  # serial field: replay of store "night"
    assert len(idn) <= 72  # IEEE 488.2 §10.14 (from memory): at most 72 characters
    assert visa(bench.resources["generator"]).query("*IDN?").split(",")[:2] == ["acqd-sim", "FG"]


def test_selected_records_in_the_order_given_then_the_acquisition_never_completes(night, replay, opened, visa,
                                                                                  tmp_path, transport):
    path, records = night
    bench = replay(path, [2, 0], transport)
    scope = opened(bench.resources["scope"], "scpi-digitiser")
    profile = write_profile(tmp_path)
    configure_like(scope, records[0], profile)
    for want in (records[2], records[0]):
        scope.arm()
        scope.wait(2.0)
        volts, timebase = scope.fetch("CH2")
        assert np.array_equal(volts, want.channel("v_c").samples) and timebase == want.timebase
    with pytest.raises(InstrumentError) as caught:
        scope.arm()  # no record left: refused loudly, not cycled
    assert "-300" in one_line(caught.value) and "all 2 records of night served" in str(caught.value)
    raw = visa(bench.resources["scope"], timeout_ms=300)
    raw.write("INIT")
    assert raw.query("SYST:ERR?").startswith("-300,")
    with pytest.raises(pyvisa.errors.VisaIOError):
        raw.query("*OPC?")  # armed, never completes
    raw.write("ABOR")
    assert raw.query("*OPC?") == "1"  # ABORt ends it (the interrupted *OPC? is -410, IEEE 488.2 §6.3.2.3)
    assert raw.query("SYST:ERR?").startswith("-410,")


# --- settings and formats -----------------------------------------------------------------------------------

@pytest.mark.parametrize("timebase, slope, words", [
    ((WINDOW_S, 3000, SHARE), "rising", "SWEep:POINts 3000 but the record has 4000"),
    ((500e-6, SAMPLES, SHARE), "rising", "sample interval (SWEep:TIME/POINts) 1.25e-07 s but the record's is 1e-07 s"),
    ((WINDOW_S, SAMPLES, 0.1), "rising", "SWEep:OFFSet:POINts -400 but the record's is -800"),
    ((WINDOW_S, SAMPLES, SHARE), "falling", "TRIGger:SLOPe NEGative but the record's edge is rising"),
])
def test_settings_other_than_the_records_are_221_and_serve_nothing(night, replay, opened, tmp_path, timebase, slope,
                                                                   words):
    path, records = night
    bench = replay(path)
    scope = opened(bench.resources["scope"], "scpi-digitiser")
    scope.configure_timebase(*timebase)
    scope.configure_trigger("external", slope, 0.5)
    with pytest.raises(InstrumentError) as caught:
        scope.arm()
    text = one_line(caught.value)
    assert "-221" in text and "Settings conflict" in text and words in text  # SCPI-1999 Vol 2 §21.8: -221
    configure_like(scope, records[0], write_profile(tmp_path))
    scope.arm()
    scope.wait(2.0)
    assert np.array_equal(scope.fetch("CH1")[0], records[0].channel("v_src").samples)  # record 0 is still next


@pytest.mark.parametrize("scpi_format, fetch_format", [("INTeger,8", "INT,8"), ("INTeger,16", "INT,16"),
                                                       ("ASCii", "ASC")])
def test_integer_and_ascii_formats_carry_the_record_exactly(tmp_path, replay, opened, scpi_format, fetch_format):
    driver = formatted_driver(tmp_path, scpi_format, fetch_format)
    profile = write_profile(tmp_path)
    records = stored(take_records(profile, driver, 1), tmp_path / "formats.h5")
    bench = replay(tmp_path / "formats.h5")
    gen = opened(bench.resources["generator"], "scpi-generator")
    scope = opened(bench.resources["scope"], driver)
    (again,) = run_step_test(profile, gen, scope)
    assert_same_record(again, records[0])


def test_a_format_that_cannot_carry_the_record_is_221(night, replay, opened, tmp_path):
    path, records = night
    bench = replay(path)
    # REAL,32 volts of a 0.8 V range are not whole INT,8 codes of 1.6 V / 256 from 0.5 V in float64
    scope = opened(bench.resources["scope"], formatted_driver(tmp_path, "INTeger,8", "INT,8"))
    configure_like(scope, records[0], write_profile(tmp_path))
    with pytest.raises(InstrumentError) as caught:
        scope.arm()
    text = one_line(caught.value)
    assert "-221" in text and "record 0 CH1 in INT,8 is not whole codes" in text


def test_an_averaged_record_needs_ascii(tmp_path, replay, opened):
    """The mean of two float32 values is generally not a float32 value; ASCii's shortest round-trip
    decimals (IEEE 488.2 NR3) carry any double, so the replayed record is still bit for bit."""
    averaged = stored(take_records(write_profile(tmp_path, averages=2), "scpi-digitiser", 1), tmp_path / "avg.h5")[0]
    assert averaged.averages == 2
    profile = write_profile(tmp_path)  # the client captures each record once

    bench = replay(tmp_path / "avg.h5")
    scope = opened(bench.resources["scope"], "scpi-digitiser")
    configure_like(scope, averaged, profile)
    with pytest.raises(InstrumentError) as caught:
        scope.arm()
    assert "-221" in one_line(caught.value) and "not float32 (a mean of 2 acquisitions)" in str(caught.value)

    gen = opened(bench.resources["generator"], "scpi-generator")
    ascii_scope = opened(bench.resources["scope"], formatted_driver(tmp_path, "ASCii", "ASC"))
    (again,) = run_step_test(profile, gen, ascii_scope)
    assert_same_record(again, averaged)


def test_trace_of_an_input_the_record_lacks_is_221(night, replay, opened, visa, tmp_path):
    path, records = night
    bench = replay(path)
    scope = opened(bench.resources["scope"], "scpi-digitiser")
    configure_like(scope, records[0], write_profile(tmp_path))
    scope.arm()
    scope.wait(2.0)
    raw = visa(bench.resources["scope"])
    raw.write("TRAC? CH4")  # the record's fourth channel is math (i_l), not an input: nothing is sent
    entry = raw.query("SYST:ERR?")
    assert entry.startswith("-221,") and "no input CH4; it holds CH1, CH2, CH3" in entry
    assert raw.query("TRAC:POIN?") == str(records[0].timebase.n_samples)


# --- errors and the command line --------------------------------------------------------------------------

def test_a_missing_store_or_record_is_one_line(night, tmp_path, capsys):
    path, _ = night
    with pytest.raises(ConfigError) as caught:
        ReplayBench(tmp_path / "none.h5").start()
    assert "none.h5" in one_line(caught.value) and "no such record store" in str(caught.value)
    with pytest.raises(ConfigError) as caught:
        ReplayBench(path, [1, 7]).start()
    assert one_line(caught.value).endswith("records: 7 not in this store; it holds 3 records, 0 to 2")
    assert main(["replay", str(path), "--records", "2-1"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "--records" in err[0] and "0,2,5-9" in err[0]


@pytest.mark.timeout(60)
def test_acqd_replay_json_serves_until_sigterm(night, visa):
    path, _ = night
    with serving("replay", str(path), "--records", "0,2") as resources:
        assert sorted(resources) == ["generator", "scope"]
        assert visa(resources["scope"]).query("*IDN?").startswith("acqd-sim,DIG,REPLAY-night,")
