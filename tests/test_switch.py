"""The switch and the batch over real TCP (pyvisa-py) against the simulated switch ``acqd-sim,SW``.

References named beside each check: SCPI-1999 Vol 1 §8.3.2 channel lists (from memory: ``(@...)``, entries
separated by ``,``, a range ``first:last``), SCPI-1999 Vol 2 §17 ROUTe (from memory: ``CLOSe``, ``OPEN``,
``OPEN:ALL``, ``CLOSe?`` answering 1 or 0 per listed channel in list order), IEEE 488.2-1992 §7.7.7
expression program data (parenthesised, so its commas do not separate parameters), common practice for
relay switching (break before make; no hot switching with the source on), and numpy's sample statistics.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from acqd import scpi
from acqd.batch import open_left_closed, run_batch, summarise, unit_judges
from acqd.benchsession import open_bench
from acqd.cli import main
from acqd.errors import SafetyError
from acqd.profile import load_profile
from acqd.sim.fixture import unit_path
from acqd.store import RecordStore, open_records

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "profiles" / "demo-kt9-batch.toml"
SWITCH_DRIVER = ROOT / "drivers" / "scpi-switch.toml"


def batch_profile(tmp_path: Path, *replacements: tuple[str, str], units: int = 4, log: bool = True) -> Path:
    """The batch demo with ``units`` units, its records and (optionally) a command log in ``tmp_path``."""
    text = DEMO.read_text().replace("count = 8", f"count = {units}")
    if units < 6:  # the demo's faulty socket 6 is not on a smaller fixture: socket 1 gets the wrong part
        text = text.replace("out_of_tolerance = { unit = 6,", "out_of_tolerance = { unit = 1,")
    text = text.replace('file = "data/kt9-lot48.h5"', f'file = "{tmp_path / "records.h5"}"')
    if log:
        text = text.replace("seed = 48\n", f'seed = 48\ncommand_log = "{tmp_path / "commands.log"}"\n')
    for old, new in replacements:
        assert old in text, f"batch demo changed: {old!r} not found"
        text = text.replace(old, new, 1)
    path = tmp_path / "batch.toml"
    path.write_text(text)
    return path


def driver_copy(tmp_path: Path, old: str, new: str) -> Path:
    text = SWITCH_DRIVER.read_text()
    assert old in text
    path = tmp_path / "my-switch.toml"
    path.write_text(text.replace(old, new))
    return path


def logged(path: Path) -> list[tuple[float, str, str]]:
    """(monotonic time, model, upper-cased message) of every program message, in arrival order."""
    rows = []
    for line in path.read_text().splitlines():
        t, model, text = line.split("\t", 2)
        rows.append((float(t), model, text.upper()))
    return sorted(rows)


def is_relay_change(text: str) -> bool:
    return text.startswith("ROUT") and "?" not in text


def is_output_state(text: str) -> bool:
    return text.startswith("OUTP") and "?" not in text and "LOAD" not in text


OUTPUT_OFF = ("OUTPUT OFF", "OUTP OFF", "OUTPUT 0", "OUTP 0")


# -- channel lists (SCPI-1999 Vol 1 §8.3.2, from memory) -------------------------------------------

@pytest.mark.parametrize("text,channels", [
    ("(@101)", (101,)),                                  # a single channel
    ("(@101,102)", (101, 102)),                          # entries separated by ','
    ("(@101:108)", tuple(range(101, 109))),              # a range first:last, both ends included
    ("(@ 101:103, 201)", (101, 102, 103, 201)),          # white space around entries
    ("(@108:106)", (108, 107, 106)),                     # a descending range lists downwards
    ("(@)", ()),                                         # the empty list
])
def test_channel_list_parsing(text: str, channels: tuple[int, ...]) -> None:
    assert scpi.parse_channel_list(text) == channels


@pytest.mark.parametrize("text", ["101,102", "(@101,,102)", "(@1!101)", "(@101:)", "(101)", "(@101"])
def test_malformed_channel_lists_are_refused(text: str) -> None:
    with pytest.raises(ValueError):
        scpi.parse_channel_list(text)


def test_channel_list_round_trip_keeps_order_and_writes_runs_as_ranges() -> None:
    rng = np.random.default_rng(17)
    for _ in range(200):
        channels = [int(c) for c in rng.choice(np.arange(101, 140), size=int(rng.integers(1, 12)), replace=False)]
        if rng.random() < 0.5:
            channels.sort()
        text = scpi.format_channel_list(channels)
        assert scpi.parse_channel_list(text) == tuple(channels)
    assert scpi.format_channel_list([101, 102, 103, 104, 201]) == "(@101:104,201)"
    assert scpi.format_channel_list([101, 102]) == "(@101,102)"  # two in a row stay a list


def test_a_channel_list_is_one_parameter() -> None:
    # IEEE 488.2 §7.7.7: expression data is parenthesised, so its commas do not split parameters.
    assert scpi.split_reply("(@101,102),ALL", ",") == ["(@101,102)", "ALL"]


# -- the simulated switch over TCP (SCPI-1999 Vol 2 §17 ROUTe, from memory) -------------------------

@pytest.fixture
def switch_bench(sim_bench, quiet_table):
    return sim_bench({**quiet_table, "fixture": {"units": 4}})


def test_close_query_answers_per_channel_in_list_order(switch_bench, visa) -> None:
    sw = visa(switch_bench.resources["switch"])
    assert sw.query("*IDN?").startswith("acqd-sim,SW,")
    sw.write("ROUTe:CLOSe (@101:103,203)")
    assert sw.query("ROUTe:CLOSe? (@203,104,101)") == "1,0,1"
    assert sw.query("ROUTe:OPEN? (@203,104)") == "0,1"
    sw.write("ROUTe:OPEN (@102)")
    assert sw.query("ROUT:CLOS? (@101:103)") == "1,0,1"
    sw.write("ROUTe:OPEN:ALL")
    assert sw.query("ROUTe:CLOSe? (@101:103,203)") == "0,0,0,0"
    assert sw.query("SYSTem:ERRor?") == '0,"No error"'


def test_a_list_with_an_unknown_channel_changes_nothing(switch_bench, visa) -> None:
    sw = visa(switch_bench.resources["switch"])
    sw.write("ROUTe:CLOSe (@101,999)")
    code, _ = scpi.parse_error_entry(sw.query("SYSTem:ERRor?"))
    assert code == -222  # SCPI-1999 Vol 2 §21.8: data out of range
    assert sw.query("ROUTe:CLOSe? (@101)") == "0"
    sw.write("ROUTe:CLOSe 101")  # not a channel list: a data type error
    assert scpi.parse_error_entry(sw.query("SYSTem:ERRor?"))[0] == -104


# -- the batch ----------------------------------------------------------------------------------

def test_batch_breaks_before_make_with_the_output_off(tmp_path: Path) -> None:
    profile = load_profile(batch_profile(tmp_path))
    with open_bench(profile) as bench:
        results = list(run_batch(profile, bench.generator, bench.scope, bench.switch))
        assert bench.simulated.switch.settings.closed == set()  # everything open at the end
    assert [r.skipped for r in results] == [None] * 4
    rows = logged(tmp_path / "commands.log")
    output_on = False
    closed_since_open_all = False
    for _, model, text in rows:
        if model == "FG" and is_output_state(text):
            output_on = text not in OUTPUT_OFF
        if model == "SW" and is_relay_change(text):
            assert not output_on, f"{text} sent with the generator output on"  # common practice: no hot switching
            if "OPEN:ALL" in text:
                closed_since_open_all = False
            elif "CLOS" in text:
                assert not closed_since_open_all, "a path closed before the previous one was opened"  # break before make
                closed_since_open_all = True
    switch_log = [t for _, m, t in rows if m == "SW" and is_relay_change(t)]
    assert switch_log[-1].endswith("OPEN:ALL")
    closes = [scpi.parse_channel_list(t.split(" ", 1)[1]) for t in switch_log if "CLOS" in t]
    assert closes == [unit_path(k) for k in range(1, 5)]


def test_the_failing_unit_is_the_one_the_fixture_made_out_of_tolerance(tmp_path: Path) -> None:
    profile = load_profile(batch_profile(tmp_path, units=8, log=False))
    judges = unit_judges(profile, profile.batch)
    with open_bench(profile) as bench, RecordStore(tmp_path / "records.h5") as store:
        fixture = bench.simulated.fixture
        results = list(run_batch(profile, bench.generator, bench.scope, bench.switch))
        for result in results:
            for record in result.records:
                record.analysis = judges[result.unit.serial](record)
                store.append(record)
    faulty = fixture.config.out_of_tolerance
    units, spreads = summarise(results, profile.dut)
    failing = [u.serial for u in units if u.verdict == "fail"]
    assert failing == [profile.batch.units[faulty.unit - 1].serial]
    for k, u in enumerate(units):  # each unit's fit finds the parts the fixture gave it
        true_c_f = fixture.duts[k]["c_f"]
        assert u.fitted["c_f"] == pytest.approx(true_c_f, rel=0.01)
    c_f = next(s for s in spreads if s.parameter == "c_f")
    fitted = [u.fitted["c_f"] for u in units]
    assert c_f.std == pytest.approx(np.std(fitted, ddof=1))  # numpy's sample standard deviation
    assert c_f.worst_deviation_pct > c_f.tolerance_pct
    with open_records(tmp_path / "records.h5") as reader:  # serial and path survive the HDF5 store
        stored = [(reader.read(i).unit_serial, reader.read(i).switch_path) for i in range(len(reader))]
    assert stored == [(unit.serial, scpi.format_channel_list(unit.channels)) for unit in profile.batch.units]


def test_a_path_that_does_not_verify_skips_the_unit(tmp_path: Path) -> None:
    profile = load_profile(batch_profile(tmp_path))
    with open_bench(profile) as bench:
        bench.simulated.switch.stuck_open = {203}
        results = list(run_batch(profile, bench.generator, bench.scope, bench.switch))
    skipped = {r.unit.serial: r.skipped for r in results if r.skipped}
    assert list(skipped) == ["KT9-4803"]
    assert "(@203)" in skipped["KT9-4803"] and "did not verify" in skipped["KT9-4803"]
    assert [len(r.records) for r in results] == [1, 1, 0, 1]
    # Nothing was measured while unit 3's path stood half-closed: the output stayed off until it was opened.
    rows = logged(tmp_path / "commands.log")
    start = next(i for i, (_, m, t) in enumerate(rows) if m == "SW" and t.startswith("ROUTE:CLOSE (@103,203)"))
    end = next(i for i in range(start, len(rows)) if rows[i][2].endswith("OPEN:ALL"))
    assert not any(m == "FG" and is_output_state(t) and t not in OUTPUT_OFF for _, m, t in rows[start:end])


def test_switch_limits_are_checked_before_any_relay_closes(tmp_path: Path) -> None:
    # 1 V open-circuit behind the generator's 50 ohm can drive 20 mA into a short (Ohm's law): over 10 mA.
    driver = driver_copy(tmp_path, "max_current_a = 0.5", "max_current_a = 0.01")
    profile = load_profile(batch_profile(tmp_path, ('driver = "scpi-switch"', f'driver = "{driver}"')))
    with open_bench(profile) as bench:
        with pytest.raises(SafetyError, match="max_current_a"):
            list(run_batch(profile, bench.generator, bench.scope, bench.switch))
        assert not [m for m in bench.simulated.switch.command_log if "CLOS" in m.text.upper()]


def test_channels_found_closed_at_start_up_are_opened(tmp_path: Path) -> None:
    profile = load_profile(batch_profile(tmp_path, log=False))
    with open_bench(profile) as bench:
        bench.switch.close_channels((105, 205, 107))
        assert open_left_closed(bench.switch) == (105, 107, 205)
        assert bench.switch.closed_channels() == ()


def test_a_missing_settling_wait_shows_in_the_data(tmp_path: Path) -> None:
    """The fixture's relays bounce for 0.2 s after closing: a 0.3 s wait hides it, a 0.1 ms wait does not."""
    baseline_rms = {}
    for settle in ("0.3", "0.0001"):
        driver = driver_copy(tmp_path, "settle_s = 0.03", f"settle_s = {settle}")
        path = batch_profile(tmp_path, ('driver = "scpi-switch"', f'driver = "{driver}"'),
                             ("seed = 4806", "seed = 4806\nbounce_s = 0.2\nbounce_v = 0.2"), units=1, log=False)
        profile = load_profile(path)
        with open_bench(profile) as bench:
            (result,) = run_batch(profile, bench.generator, bench.scope, bench.switch)
        record = result.records[0]
        before = record.channel("v_src").samples[: record.timebase.pretrigger_samples]
        baseline_rms[settle] = float(np.std(before))
    # The demo bench's own noise is 2 mV rms (plus 8-bit quantisation); a bounce adds up to 0.2 V rms.
    assert baseline_rms["0.3"] < 0.01 < baseline_rms["0.0001"], baseline_rms


BAD_BATCH = [
    (("channel_step = 1", "channel_step = 1\n\n[[batch.units]]\nserial = 'X'\nchannels = '(@101)'"),
     ["batch.units", "exactly one"]),
    (('serial = "KT9-48{n:02d}"', 'serial = "KT9-48"'), ["batch.range.serial", "{n}"]),
    (('channels = "(@101,201)"', 'channels = "101,201"'), ["batch.range.channels", "(@101,201)"]),
    (('[bench.switch]\ndriver = "scpi-switch"\n', ''), ["batch", "[bench.switch]"]),
    (("count = 4", "count = 4\nfrist = 2"), ["batch.range.frist", "unknown key"]),
]


@pytest.mark.parametrize("change,words", BAD_BATCH,
                         ids=["units and range", "pattern without n", "not a channel list", "no switch", "typo"])
def test_bad_batch_tables_are_one_line_and_touch_nothing(tmp_path: Path, capsys: pytest.CaptureFixture,
                                                         change: tuple[str, str], words: list[str]) -> None:
    path = batch_profile(tmp_path, change)
    assert main(["run", str(path)]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "Traceback" not in err, err
    for word in words:
        assert word in err, err
    assert not (tmp_path / "records.h5").exists() and not (tmp_path / "commands.log").exists()


def test_duplicate_serials_and_paths_are_refused(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    units = "\n".join(f"[[batch.units]]\nserial = '{s}'\nchannels = '{c}'\n"
                      for s, c in (("A-1", "(@101,201)"), ("A-2", "(@201,101)")))
    text = batch_profile(tmp_path).read_text()
    head, _, _ = text.partition("[batch.range]")
    path = tmp_path / "dup.toml"
    path.write_text(head + units + text[text.index("[limits]"):])
    assert main(["run", str(path)]) == 2
    assert "same switch path" in capsys.readouterr().err


def test_sigterm_mid_batch_leaves_the_output_off_and_every_relay_open(tmp_path: Path) -> None:
    path = batch_profile(tmp_path, units=8)
    env = {**os.environ, "PYTHONUNBUFFERED": "1"}
    proc = subprocess.Popen([sys.executable, "-m", "acqd", "run", str(path), "--count", "1000"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env)
    try:
        seen = 0
        deadline = time.monotonic() + 60
        while seen < 3 and time.monotonic() < deadline:
            if proc.stdout.readline().startswith("KT9-"):
                seen += 1
        assert seen == 3, "the batch printed no records"
        proc.send_signal(signal.SIGTERM)
        proc.communicate(timeout=30)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode != 0
    rows = logged(tmp_path / "commands.log")
    assert [t for _, m, t in rows if m == "FG" and is_output_state(t)][-1] in OUTPUT_OFF
    assert [t for _, m, t in rows if m == "SW" and is_relay_change(t)][-1].endswith("OPEN:ALL")


# -- a campaign over the batch --------------------------------------------------------------------

def test_sigkill_mid_batch_campaign_then_restart_measures_every_unit_once(tmp_path: Path) -> None:
    path = batch_profile(tmp_path, ("[limits]", "[campaign]\nname = \"lot48\"\nback_to_back = true\nslots = 2\n\n"
                                                "[limits]"), units=6)
    data = tmp_path / "data"
    command = [sys.executable, "-m", "acqd", "daemon", "--plain", "--data-dir", str(data), str(path)]
    # The store's kill switch ends the daemon with SIGKILL once the 5th record is durable: mid-slot, with
    # one unit of the first slot and the whole second slot still to measure, on any machine and load.
    killed = subprocess.run(command, capture_output=True, text=True, timeout=120,
                            env={**os.environ, "ACQD_STORE_KILL_AT": "append:synced@5"})
    assert killed.returncode == -signal.SIGKILL, killed.stderr
    assert _stored(data / "lot48.h5") == 5
    second = subprocess.run(command, capture_output=True, text=True, timeout=120)
    assert second.returncode == 0, second.stderr
    with open_records(data / "lot48.h5") as reader:
        records = [reader.read(i) for i in range(len(reader))]
    seen = [(r.settings["campaign"]["slot"], r.unit_serial, r.switch_path) for r in records]
    serials = [f"KT9-48{n:02d}" for n in range(1, 7)]
    # Each unit exactly once per slot, each on its own path (socket k: relays 10k and 20k).
    assert sorted(seen) == sorted((slot, s, f"(@{100 + k},{200 + k})") for slot in (1, 2)
                                  for k, s in enumerate(serials, start=1))
    events = [line for line in (data / "runlog.jsonl").read_text().splitlines() if '"campaign_resume"' in line]
    assert events, "the second start did not resume the campaign"
    # acqd status --by-unit: each unit of the campaign with its own records, as read back from the store
    import json

    status = subprocess.run([sys.executable, "-m", "acqd", "status", "-d", str(data), "--by-unit", "--json"],
                            capture_output=True, text=True, timeout=60)
    assert status.returncode == 0, status.stderr
    units = {u["serial"]: u for u in json.loads(status.stdout)["units"]["lot48"]}
    assert sorted(units) == serials
    for k, serial in enumerate(serials, start=1):
        mine = [i for i, r in enumerate(records) if r.unit_serial == serial]
        assert units[serial]["records"] == mine and units[serial]["paths"] == [f"(@{100 + k},{200 + k})"]
        assert units[serial]["verdicts"] == [records[i].analysis["verdict"] for i in mine]


def _stored(path: Path) -> int:
    try:
        with open_records(path) as reader:
            return len(reader)
    except Exception:  # noqa: BLE001 - not created yet, or being written: look again
        return 0


def test_acqd_run_ends_with_the_batch_summary_and_ls_groups_by_unit(tmp_path: Path,
                                                                     capsys: pytest.CaptureFixture) -> None:
    import json

    path = batch_profile(tmp_path, units=3, log=False)
    assert main(["run", str(path), "-n", "2"]) == 0
    out = capsys.readouterr().out
    summary = out[out.index("batch summary"):]
    assert summary.startswith("batch summary: 2 of 3 unit(s) pass")  # two passes over three units
    lines = {line.split()[0]: line for line in summary.splitlines()[1:4]}
    assert "FAIL" in lines["KT9-4801"] and "pass" in lines["KT9-4802"]  # socket 1 holds the wrong part here
    store = str(tmp_path / "records.h5")
    assert main(["ls", store, "--by-unit", "--json"]) == 0
    grouped = json.loads(capsys.readouterr().out)
    with open_records(store) as reader:  # the grouping agrees with each record read back in full
        expected: dict[str, list[int]] = {}
        for i in range(len(reader)):
            expected.setdefault(reader.read(i).unit_serial, []).append(i)
    assert {u["serial"]: u["records"] for u in grouped} == expected
    assert [u["paths"] for u in grouped] == [["(@101,201)"], ["(@102,202)"], ["(@103,203)"]]
    # acqd drift --by-unit: each unit's series hold exactly that unit's records and their fitted values
    assert main(["drift", store, "--by-unit", "--json"]) == 0
    per_unit = {(s["serial"], s["name"]): s for s in json.loads(capsys.readouterr().out)["series"]}
    with open_records(store) as reader:
        for serial, indices in expected.items():
            c = per_unit[(serial, "c_f")]
            assert c["indices"] == indices
            assert c["values"] == [reader.read(i).analysis["fit"]["values"]["c_f"] for i in indices]
    assert main(["drift", store, "--json"]) == 0  # pooled: one series over every unit, serial empty
    pooled = [s for s in json.loads(capsys.readouterr().out)["series"] if s["name"] == "c_f"]
    assert [s["serial"] for s in pooled] == [""] and len(pooled[0]["indices"]) == 6
    # the report groups the batch by unit too: one row per serial with its path, record count and verdict
    page_path = tmp_path / "batch.html"
    assert main(["report", store, "-o", str(page_path)]) == 0
    page = page_path.read_text(encoding="utf-8")
    units = page[page.index("<h2>Units</h2>"):page.index("</table>", page.index("<h2>Units</h2>"))]
    assert "2 of 3 unit(s) pass" in units
    for serial, indices in expected.items():
        row = units[units.index(f"<td>{serial}</td>"):].split("</tr>")[0]
        verdict = "FAIL" if serial == "KT9-4801" else "pass"
        assert f"<td>{len(indices)}</td>" in row and f">{verdict}</span>" in row, row
