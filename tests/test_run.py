"""The main job end to end: profile → simulated bench over real TCP (pyvisa-py) → step test → HDF5 store.

The core step-test and replay tests run once per transport (the ``transport`` fixture: raw socket, HiSLIP,
VXI-11), and a record taken over each must equal the raw socket's bit for bit on the same seeded bench.

References named beside each check: IEEE 181-2011 (the 50 % reference level instant of a transition),
common practice (averaging N captures divides uncorrelated noise by √N), Ohm's law, and h5dump (Debian
hdf5-tools, an HDF5 1.10 reader independent of h5py).
"""

from __future__ import annotations

import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import pyvisa

from acqd.benchsession import Replay, open_bench
from acqd.cli import main
from acqd.errors import InstrumentError
from acqd.judge import make_judge
from acqd.profile import load_profile
from acqd.record import Record
from acqd.steptest import run_step_test
from acqd.store import RecordStore, open_records

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "profiles" / "demo-bridge-filter.toml"
# How a VISA resource string names each transport (the VISA resource syntax, as pyvisa parses it).
RESOURCE_MARK = {"socket": "::SOCKET", "hislip": "::hislip", "vxi11": "::inst"}


def profile_file(tmp_path: Path, *replacements: tuple[str, str], name: str = "p.toml",
                 transport: str = "socket") -> Path:
    """The demo profile with ``replacements``, storing in ``tmp_path``, its bench served over ``transport``."""
    text = DEMO.read_text()
    for old, new in (*replacements, ("[bench.simulated]\n", f'[bench.simulated]\ntransport = "{transport}"\n')):
        assert old in text, f"demo profile changed: {old!r} not found"
        text = text.replace(old, new, 1)
    text = text.replace('file = "data/kt9-demo.h5"', f'file = "{tmp_path / "records.h5"}"')
    path = tmp_path / name
    path.write_text(text)
    return path


def output_commands(log: list) -> list[str]:
    """The generator's OUTPut state commands as received, upper-cased (the simulated command log)."""
    texts = [entry.text.upper() for entry in log]
    return [t for t in texts if t.startswith("OUTP") and "?" not in t and "LOAD" not in t]


@pytest.fixture(scope="module")
def socket_record(tmp_path_factory: pytest.TempPathFactory) -> Record:
    """The demo step test over the raw socket: what every transport must give bit for bit (same seed)."""
    profile = load_profile(profile_file(tmp_path_factory.mktemp("reference")))
    with open_bench(profile) as bench:
        (record,) = run_step_test(profile, bench.generator, bench.scope)
    return record


def test_stored_record_equals_what_the_scope_served(tmp_path: Path, transport: str, socket_record: Record) -> None:
    profile = load_profile(profile_file(tmp_path, transport=transport))
    with open_bench(profile) as bench:
        (record,) = run_step_test(profile, bench.generator, bench.scope)
        # Read the scope's last record again over a separate, plain pyvisa session: pyvisa's own
        # query_binary_values decodes the IEEE 488.2 block independently of acqd's fast path.
        rm = pyvisa.ResourceManager("@py")
        raw = rm.open_resource(bench.scope.resource, read_termination="\n", write_termination="\n")
        try:
            served = {}
            for ch in profile.acquisition.channels:
                values = raw.query_binary_values(f"TRACe? {ch.input}", datatype="f", is_big_endian=True)
                served[ch.name] = np.asarray(values, dtype=float)
        finally:
            raw.close()
            rm.close()
    with RecordStore(tmp_path / "records.h5") as store:
        index = store.append(record)
    with open_records(tmp_path / "records.h5") as reader:
        stored = reader.read(index)
    assert stored.checksum() == record.checksum()
    for name, values in served.items():
        np.testing.assert_array_equal(stored.channel(name).samples, values)
    # The record carries what is needed to interpret it later.
    assert stored.identities["scope"].startswith("acqd-sim,DIG")
    assert stored.identities["generator"].startswith("acqd-sim,FG")
    assert stored.settings["scope"]["n_samples"] == profile.acquisition.samples
    assert stored.profile_sha256 == profile.sha256 and stored.profile_text == profile.text
    assert stored.stimulus.edge_time_s > 0  # read back from the generator, not assumed
    # Whatever carries the bytes, the seeded bench gives the same record: equal CRC-32 (zlib's, over the
    # float64 samples) and the same read-back settings and identities.
    assert RESOURCE_MARK[transport] in bench.scope.resource
    assert stored.checksum() == socket_record.checksum()
    assert stored.settings == socket_record.settings and stored.identities == socket_record.identities


@pytest.mark.parametrize("edge", ["rising", "falling"])
def test_trigger_is_at_t0_with_the_baseline_before_it(tmp_path: Path, edge: str) -> None:
    profile = load_profile(profile_file(tmp_path, ('edge = "rising"', f'edge = "{edge}"')))
    with open_bench(profile) as bench:
        (record,) = run_step_test(profile, bench.generator, bench.scope)
    t = record.timebase.times()
    pre = record.timebase.pretrigger_samples
    assert pre == round(profile.acquisition.pretrigger_fraction * profile.acquisition.samples)
    assert t[pre] == 0.0 and np.all(t[:pre] < 0)
    v_src = record.channel("v_src").samples
    before, after = (0.0, 1.0) if edge == "rising" else (1.0, 0.0)
    # The pre-trigger part sits at the level before the edge (within noise and one 8-bit step of the range).
    lsb = 2 * 0.8 / 256
    assert abs(np.mean(v_src[:pre]) - before) < 2 * lsb
    # IEEE 181-2011: the transition's 50 % reference level instant is the trigger (t = 0), within a sample.
    crossing = np.argmax(v_src > 0.5) if edge == "rising" else np.argmax(v_src < 0.5)
    assert abs(t[crossing]) <= record.timebase.sample_interval_s
    # The response starts at the edge: the capacitor has not moved before it and has moved a sample later.
    v_c = record.channel("v_c").samples
    assert abs(np.mean(v_c[:pre]) - before) < 2 * lsb
    assert abs(np.mean(v_c[pre + 200:pre + 400]) - before) > 0.05


def test_both_edges_give_two_records(tmp_path: Path, transport: str) -> None:
    profile = load_profile(profile_file(tmp_path, ('edge = "rising"', 'edge = "both"'), transport=transport))
    with open_bench(profile) as bench:
        records = run_step_test(profile, bench.generator, bench.scope)
    assert [r.stimulus.edge for r in records] == ["rising", "falling"]
    pre = records[0].timebase.pretrigger_samples
    assert np.mean(records[0].channel("v_c").samples[:pre]) < 0.05
    assert np.mean(records[1].channel("v_c").samples[:pre]) > 0.95


def test_averaging_lowers_noise_by_sqrt_n(tmp_path: Path) -> None:
    """Common practice: the mean of N captures with uncorrelated noise has σ/√N."""
    noisy = ("noise_v_rms = 0.002", "noise_v_rms = 0.02")
    sigmas = {}
    for n in (1, 16):
        path = profile_file(tmp_path, noisy, ("averages = 1", f"averages = {n}"), name=f"avg{n}.toml")
        profile = load_profile(path)
        with open_bench(profile) as bench:
            (record,) = run_step_test(profile, bench.generator, bench.scope)
        assert record.averages == n
        tail = record.channel("v_c").samples[-5000:]  # settled: the level is constant, only noise is left
        sigmas[n] = np.std(tail)
    ratio = sigmas[1] / sigmas[16]
    assert 3.0 < ratio < 5.3, ratio  # √16 = 4


def test_math_channel_is_difference_over_r(tmp_path: Path) -> None:
    """Ohm's law: the loop current is the drop across the 22 Ω resistor over 22 Ω."""
    profile = load_profile(profile_file(tmp_path))
    with open_bench(profile) as bench:
        (record,) = run_step_test(profile, bench.generator, bench.scope)
    v_src, v_rl = record.channel("v_src").samples, record.channel("v_rl").samples
    np.testing.assert_allclose(record.channel("i_l").samples, (v_src - v_rl) / 22.0, rtol=0, atol=1e-15)
    assert record.channel("i_l").unit == "A"
    assert "v_src" in record.channel("i_l").source and "22" in record.channel("i_l").source


def test_acqd_run_stores_records_h5dump_reads_them(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    path = profile_file(tmp_path)
    assert main(["run", str(path), "--count", "2"]) == 0
    out = capsys.readouterr().out
    assert "2 record(s) stored" in out and out.count(" pass") == 2
    with open_records(tmp_path / "records.h5") as reader:
        assert len(reader) == 2
        record = reader.read(1)
        assert record.analysis["verdict"] == "pass"
    segments = sorted(tmp_path.glob("records.*.h5"))
    assert segments, "closing the store leaves finished plain HDF5 segments"
    if shutil.which("h5dump") is None:
        pytest.skip("h5dump (Debian hdf5-tools) not installed")
    # h5dump 1.10 reads the file h5py wrote (an independent reader of the file format).
    dump = subprocess.run(["h5dump", "-H", str(segments[0])], capture_output=True, text=True, timeout=60)
    assert dump.returncode == 0, dump.stderr
    assert "DATASET" in dump.stdout


def test_stimulus_over_the_driver_limit_never_reaches_the_wire(tmp_path: Path,
                                                             capsys: pytest.CaptureFixture) -> None:
    # The profile allows 20 V, the generator driver only 10 V into high impedance: the driver refuses.
    log = tmp_path / "gen.log"
    path = profile_file(tmp_path, ("max_level_v = 2.0", "max_level_v = 20.0"), ("high_v = 1.0", "high_v = 12.0"),
                        ("seed = 9", f'seed = 9\ncommand_log = "{log}"'))
    assert main(["run", str(path)]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "12" in err and "limit" in err
    sent = log.read_text().upper() if log.exists() else ""
    assert "VOLT" not in sent and "OUTP ON" not in sent and "OUTP 1" not in sent
    assert not list(tmp_path.glob("records*")), "no record file is created for a refused run"


def test_output_off_after_an_error(tmp_path: Path, capsys: pytest.CaptureFixture, transport: str) -> None:
    # A trigger level outside the stimulus never fires: the wait times out and the run fails cleanly.
    path = profile_file(tmp_path, ("averages = 1", "averages = 1\ntrigger_level_v = 1.8\ntimeout_s = 0.5"),
                        transport=transport)
    profile = load_profile(path)
    with open_bench(profile) as bench:
        with pytest.raises(InstrumentError, match="acquisition not complete within 0.5 s"):
            run_step_test(profile, bench.generator, bench.scope)
        commands = output_commands(bench.simulated.generator.command_log)
    assert commands[-1] in ("OUTPUT OFF", "OUTP OFF", "OUTPUT 0", "OUTP 0"), commands


def test_sigterm_switches_the_output_off_and_keeps_the_file(tmp_path: Path) -> None:
    log = tmp_path / "gen.log"
    path = profile_file(tmp_path, ("seed = 9", f'seed = 9\ncommand_log = "{log}"'))
    env = {**os.environ, "PYTHONUNBUFFERED": "1"}
    proc = subprocess.Popen([sys.executable, "-m", "acqd", "run", str(path), "--count", "100000"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env)
    try:
        acknowledged = []
        deadline = time.monotonic() + 60
        while len(acknowledged) < 2 and time.monotonic() < deadline:
            line = proc.stdout.readline()
            if line.startswith("#"):
                acknowledged.append(int(line.split()[0][1:]))
        assert len(acknowledged) == 2, "the run printed no records"
        proc.send_signal(signal.SIGTERM)
        proc.communicate(timeout=30)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode != 0  # interrupted runs say so in their exit status
    texts = [line.split("\t")[-1].upper() for line in log.read_text().splitlines()]
    outputs = [t for t in texts if t.startswith("OUTP") and "?" not in t and "LOAD" not in t]
    assert outputs[-1] in ("OUTPUT OFF", "OUTP OFF", "OUTPUT 0", "OUTP 0"), outputs[-3:]
    with open_records(tmp_path / "records.h5") as reader:
        assert len(reader) >= len(acknowledged)
        for i in acknowledged:  # every record reported stored is there and verifies (checked on read)
            assert reader.read(i).checksum() == reader.index()[i].checksum


BAD_WITH_BENCH = [
    (('driver = "scpi-digitiser"', 'driver = "no-such-scope"'), ["bench.scope.driver", "no-such-scope"]),
    (('CH3 = "v_c"', 'CH3 = "v_q"'), ["wiring.CH3", "v_q"]),
    (("r_ohm = 22.4", "r_ohm = -22.4"), ["bench.simulated.dut", "r_ohm", "greater than 0"]),
    (('driver = "scpi-digitiser"', 'driver = "scpi-generator"'), ["bench.scope.driver", "generator driver"]),
]


@pytest.mark.parametrize("change,words", BAD_WITH_BENCH,
                         ids=["unknown driver", "unknown wiring node", "bad dut", "driver of the other role"])
def test_bad_bench_tables_are_one_line_and_create_nothing(tmp_path: Path, capsys: pytest.CaptureFixture,
                                                           change: tuple[str, str], words: list[str]) -> None:
    path = profile_file(tmp_path, change)
    assert main(["run", str(path)]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "Traceback" not in err
    for word in words:
        assert word in err, err
    assert not list(tmp_path.glob("records*"))


def test_run_summary_counts_failures(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    # A run whose records cannot be acquired exits nonzero and says how many failed.
    path = profile_file(tmp_path, ("averages = 1", "averages = 1\ntrigger_level_v = 1.8\ntimeout_s = 0.3"))
    assert main(["run", str(path), "--count", "2"]) == 1
    out = capsys.readouterr().out
    assert "0 record(s) stored" in out and "2 step test(s) not acquired" in out


def test_replay_round_trip_gives_identical_samples_and_verdicts(tmp_path: Path, capsys: pytest.CaptureFixture,
                                                                transport: str) -> None:
    """Record → replay → re-acquire: the same samples bit for bit and the same verdicts (issue 5); the
    replay is served over the profile's transport too."""
    path = profile_file(tmp_path, ('edge = "rising"', 'edge = "both"'), transport=transport)
    assert main(["run", str(path), "--count", "2"]) == 0
    again = tmp_path / "again.h5"
    assert main(["run", str(path), "--replay", str(tmp_path / "records.h5"), "--count", "2",
                 "--out", str(again)]) == 0
    capsys.readouterr()
    with open_records(tmp_path / "records.h5") as first, open_records(again) as second:
        assert len(first) == len(second) == 4
        for i in range(4):
            a, b = first.read(i), second.read(i)
            assert a.stimulus.edge == b.stimulus.edge
            for ca, cb in zip(a.channels, b.channels):
                assert ca.name == cb.name and np.array_equal(ca.samples, cb.samples)
            assert a.checksum() == b.checksum()
            assert a.analysis["verdict"] == b.analysis["verdict"] == "pass"
            assert a.analysis["fit"]["values"] == b.analysis["fit"]["values"]
    with open_bench(load_profile(path), Replay(tmp_path / "records.h5")) as replayed:  # what --replay opens
        assert RESOURCE_MARK[transport] in replayed.scope.resource  # served over the profile's transport
    assert main(["run", str(path), "--replay", str(tmp_path / "records.h5"), "--records", "0,x"]) == 2
    assert "--records" in capsys.readouterr().err
    assert main(["run", str(path), "--records", "0"]) == 2  # a selection without a replay file means nothing
    assert "--records: only has a meaning with --replay" in capsys.readouterr().err


def test_dut_mapping_to_a_channel_not_recorded_is_refused_up_front(tmp_path: Path,
                                                                   capsys: pytest.CaptureFixture) -> None:
    path = profile_file(tmp_path, ('v_rl = "v_rl"', 'i_x = "i_l"'))
    assert main(["run", str(path)]) == 2
    err = capsys.readouterr().err
    assert "dut.channels.i_x" in err and "v_src, v_rl, v_c, i_l" in err
    assert not list(tmp_path.glob("records*"))


def test_clipped_channel_is_named_in_the_comparison(tmp_path: Path) -> None:
    """A span too small for the 53 % overshoot: the comparator says the trace is clipped (a set-up fault)."""
    path = profile_file(tmp_path, ("range_v = 1.2", "range_v = 0.7"))  # v_c spans -0.2 .. 1.2 V, peak 1.53 V
    profile = load_profile(path)
    with open_bench(profile) as bench:
        (record,) = run_step_test(profile, bench.generator, bench.scope)
    result = make_judge(profile)(record)
    assert any(w.startswith("v_c:") and "clipped" in w for w in result["warnings"]), result["warnings"]
    assert not any(w.startswith("v_src:") and "clipped" in w for w in result["warnings"])
