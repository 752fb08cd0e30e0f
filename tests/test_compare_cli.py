"""``acqd compare`` and ``acqd report`` end to end: CSV and stored input, options, exit codes, and bad input
as one line naming the file, column or option (the house rule), never a traceback."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from acqd.cli import main
from acqd.record import Stimulus, TimeBase
from acqd.store import RecordStore
from test_compare_synthetic import make_record, series_rlc_nodes

TRUE = {"r_ohm": 27.0, "l_h": 3.3e-3, "c_f": 100e-9}  # a KT-9 unit whose damping resistor reads 27 Ω
MODEL = ["--model", "series_rlc", "--param", "r_ohm=22", "--param", "l_h=3.3e-3", "--param", "c_f=100e-9"]
TB = TimeBase(1.5e-3 / 3000, 600, 3000)


def write_csv(path: Path, rows: list[list[str]] | None = None, header: str = "t_s,v_src [V],v_rl [V],v_c [V]") -> Path:
    if rows is None:
        t = TB.times()
        nodes = series_rlc_nodes(t, **TRUE)
        noise = np.random.default_rng(8).normal(0, 0.003, (3, len(t)))
        rows = [[f"{t[k]:.10e}"] + [f"{nodes[n][k] + noise[j, k]:.5f}" for j, n in enumerate(("v_src", "v_rl", "v_c"))]
                for k in range(len(t))]
    path.write_text(header + "\n" + "\n".join(",".join(r) for r in rows) + "\n", encoding="utf-8")
    return path


def run(capsys, *argv: str) -> tuple[int, str, str]:
    code = main(["compare", *argv])
    out = capsys.readouterr()
    return code, out.out, out.err


@pytest.fixture
def csv_file(tmp_path):
    return write_csv(tmp_path / "kt9-unit17.csv")


def test_csv_fit_prints_json_and_exits_0(capsys, csv_file, tmp_path):
    code, out, err = run(capsys, str(csv_file), "--high", "1", *MODEL, "--map", "v_c=v_c", "--map", "v_rl=v_rl",
                         "--map", "v_src=v_src", "--stimulus-channel", "v_src", "--free", "r_ohm,l_h,c_f",
                         "--nrmse-max", "0.02", "--json", "--figures", str(tmp_path / "figs"))
    assert (code, err) == (0, "")
    result = json.loads(out)
    assert result["verdict"] == "pass" and result["model"] == "series_rlc"
    for name, true in TRUE.items():
        lo, hi = result["fit"]["ci95"][name]
        assert lo * 0.98 <= true <= hi * 1.02  # the textbook closed form's parts, recovered from 22 Ω nominal
    assert sorted(p.name for p in (tmp_path / "figs").iterdir()) == ["channels.png", "trajectory.png"]
    assert (tmp_path / "figs" / "channels.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature


def test_failed_verdict_exits_1_and_lists_the_reasons(capsys, csv_file):
    # Nise, Control Systems Engineering §4.6: the 27 Ω unit (R_total 77 Ω, ζ ≈ 0.21) overshoots by about 50 %
    # and settles in about 8L/R ≈ 0.34 ms, so a 10–20 % band and a 10 µs ceiling fail; the exit status says so
    # (1).
    code, out, err = run(capsys, str(csv_file), "--high", "1", *MODEL, "--map", "v_c=v_c",
                         "--overshoot", "v_c=10:20", "--settling-max", "v_c=1e-5")
    assert code == 1 and err == ""
    assert "verdict: FAIL" in out and "v_c: overshoot" in out and "v_c: settling" in out


def _bad_csv(tmp_path, kind):
    good = write_csv(tmp_path / "good.csv").read_text().splitlines()
    lines = list(good)
    if kind == "short row":
        lines[40] = ",".join(lines[40].split(",")[:-1])
    elif kind == "text cell":
        cells = lines[41].split(",")
        cells[3] = "0.5V"
        lines[41] = ",".join(cells)
    elif kind == "time goes back":
        lines[42], lines[43] = lines[43], lines[42]
    elif kind == "nan":
        cells = lines[44].split(",")
        cells[2] = "nan"
        lines[44] = ",".join(cells)
    path = tmp_path / f"{kind.replace(' ', '-')}.csv"
    path.write_text("\n".join(lines) + "\n")
    return path


@pytest.mark.parametrize("kind, where", [
    ("short row", "line 41: has 3 values; the header names 4 columns"),
    ("text cell", "line 42, column v_c: '0.5V' is not a number"),
    ("time goes back", "column t_s: time must increase"),
    ("nan", "line 45, column v_rl: 'nan' is not a finite number"),
])
def test_bad_csv_is_one_line_naming_file_line_and_column(capsys, tmp_path, kind, where):
    path = _bad_csv(tmp_path, kind)
    code, out, err = run(capsys, str(path), "--high", "1", *MODEL, "--map", "v_c=v_c")
    assert code == 2 and out == ""
    assert err.count("\n") == 1 and "Traceback" not in err
    assert err.startswith(f"acqd: error: {path}: ") and where in err


@pytest.mark.parametrize("extra, option, problem", [
    (["--model", "series_lcr"], "--model", "must be one of"),
    (["--param", "r_ohm=-22"], "--param r_ohm", "must be greater than 0"),
    (["--param", "r_ohm=twenty"], "--param r_ohm", "'twenty' is not a number"),
    (["--param", "x_h=1"], "--param x_h", "unknown key"),
    (["--map", "v_q=v_c"], "--map v_q", "has no such channel"),
    (["--map", "v_c=v_cap"], "--map v_c", "must name a model output"),
    (["--free", "r_ohm,l_x"], "--free", "'l_x' is not one of"),
    (["--gain", "v_rl=2"], "--gain v_rl", "not mapped"),
    (["--overshoot", "v_c=10"], "--overshoot v_c", "LO:HI"),
    (["--nrmse-max", "0"], "--nrmse-max", "greater than 0"),
    (["--record", "3"], "--record", "only for a record store"),
])
def test_bad_options_are_one_line_naming_the_option(capsys, csv_file, extra, option, problem):
    argv = [str(csv_file), "--high", "1", *MODEL, "--map", "v_c=v_c", *extra]
    if extra[0] == "--model":
        argv = [str(csv_file), "--high", "1", *extra]
    code, out, err = run(capsys, *argv)
    assert code == 2 and out == ""
    assert err.count("\n") == 1 and "Traceback" not in err
    assert err.startswith(f"acqd: error: acqd compare: {option}: ") and problem in err


def test_csv_needs_the_generator_levels(capsys, csv_file):
    # A CSV carries no stimulus: the generator's level must be given, and the error says which option.
    code, _, err = run(capsys, str(csv_file), *MODEL)
    assert code == 2 and "--high: required with a CSV input" in err


def test_subprocess_bad_input_exit_2_one_line(tmp_path):
    # The installed entry point as a user runs it: a separate interpreter, real exit status and stderr.
    path = _bad_csv(tmp_path, "text cell")
    proc = subprocess.run([sys.executable, "-m", "acqd", "compare", str(path), "--high", "1", *MODEL],
                          capture_output=True, text=True, timeout=60)
    assert proc.returncode == 2 and proc.stdout == ""
    assert proc.stderr.count("\n") == 1 and "column v_c" in proc.stderr and "Traceback" not in proc.stderr


def _store_with_records(tmp_path, dut: dict) -> Path:
    path = tmp_path / "kt9.h5"
    stim = Stimulus("square", 0.0, 1.0, 200.0, "rising")
    with RecordStore(path, fsync=False) as store:
        for seed, r in enumerate((22.0, 22.5, 23.1)):
            nodes = series_rlc_nodes(TB.times(), r, 3.3e-3, 100e-9)
            rec = make_record(nodes, TB, stim, {"v_src": "v_src", "v_rl": "v_rl", "v_c": "v_c"}, 0.003, seed,
                              True, dut)
            store.append(rec)
    return path


DUT = {"name": "KT-9 input filter", "serial": "KT9-0417", "model": "series_rlc", "r_ohm": 22.0, "l_h": 3.3e-3,
       "c_f": 100e-9, "fit": {"free": ["r_ohm", "c_f"]}, "tolerances": {"nrmse_max": 0.02, "parameter_pct": 10.0}}


def test_stored_record_uses_its_own_dut_table(capsys, tmp_path):
    # Records written to a real HDF5 store (acqd.store) keep the [dut] table they were captured with; the
    # fit recovers each unit's resistor from the textbook closed form it was built from.
    store = _store_with_records(tmp_path, DUT)
    code, out, err = run(capsys, str(store), "--record", "1", "--json")
    assert (code, err) == (0, "")
    result = json.loads(out)
    assert result["record"]["index"] == 1 and result["record"]["dut"]["serial"] == "KT9-0417"
    assert result["fit"]["values"]["r_ohm"] == pytest.approx(22.5, rel=0.03)
    code, out, _ = run(capsys, str(store), "--json")  # the newest record by default
    assert code == 0 and json.loads(out)["record"]["index"] == 2
    code, _, err = run(capsys, str(store), "--record", "7")
    assert code == 2 and "7 is not in this store" in err


def test_profile_dut_table_and_option_override(capsys, tmp_path, csv_file):
    # The demo profile with a comparator [dut] table; options override it, and a bad value in the file is
    # reported with the profile's file, line and key (house rule).
    demo = Path(__file__).resolve().parents[1] / "profiles" / "demo-bridge-filter.toml"
    bench_part = demo.read_text().split("\n[dut]")[0]  # the demo's bench, with a [dut] table of this test's own
    text = bench_part + ('\n[dut]\nname = "KT-9 input filter"\nserial = "KT9-0417"\nmodel = "series_rlc"\n'
                         'r_ohm = 22.0\nl_h = 3.3e-3\nc_f = 100e-9\n[dut.tolerances]\nnrmse_max = 0.001\n'
                         '\n[output]\nfile = "data/kt9-demo.h5"\n')
    profile = tmp_path / "kt9.toml"
    profile.write_text(text)
    code, out, _ = run(capsys, str(csv_file), "--high", "1", "--profile", str(profile), "--map", "v_c=v_c")
    assert code == 1 and "NRMSE" in out  # 27 Ω unit against the 22 Ω nominal breaks a 0.1 % ceiling
    code, out, _ = run(capsys, str(csv_file), "--high", "1", "--profile", str(profile), "--map", "v_c=v_c",
                       "--param", "r_ohm=27", "--nrmse-max", "0.01")
    assert code == 0
    broken = text.replace("nrmse_max = 0.001", "nrmse_max = -1")
    profile.write_text(broken)
    code, _, err = run(capsys, str(csv_file), "--high", "1", "--profile", str(profile), "--map", "v_c=v_c")
    line = next(i for i, l in enumerate(broken.splitlines(), 1) if l.startswith("nrmse_max = -1"))
    assert code == 2 and f"{profile} line {line}: dut.tolerances.nrmse_max: must be greater than 0" in err


def test_report_command_compares_records_stored_without_analysis(capsys, tmp_path):
    # Records stored with no comparison (acqd.store directly) are compared with --recompute against their
    # own [dut]; the page is one file, self-contained: images as data: URIs (RFC 2397), nothing fetched.
    store = _store_with_records(tmp_path, DUT)
    out = tmp_path / "report" / "night.html"
    assert main(["report", str(store), "-o", str(out), "--last", "2", "--recompute"]) == 0
    html = out.read_text()
    assert capsys.readouterr().out.startswith(f"wrote {out} (")
    assert "2 records: 2 pass, 0 fail" in html and "Fitted parameters over time" in html
    assert "data:image/png;base64," in html and "src=\"http" not in html  # self-contained
    assert main(["report", str(store), "-o", str(out)]) == 0  # without --recompute: nothing was stored
    assert "3 records: 0 pass, 0 fail, 0 untested, 3 not compared" in out.read_text()
