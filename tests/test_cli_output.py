"""What a person reads on the terminal: the compare table and ``acqd show`` in SI-prefixed units that equal
the JSON, colour on the verdict only, and one wording for an edge in every command.

The store comes from ``acqd run`` on the demo profile against the simulated bench (real SCPI servers on
127.0.0.1, pyvisa-py, a real HDF5 file), with both edges captured so that rising and falling records exist.
"""

from __future__ import annotations

import dataclasses
import json
import os
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from acqd.cli import main
from acqd.cli.common import record_line
from acqd.display import si_alike
from acqd.store import open_records

DEMO = Path(__file__).resolve().parents[1] / "profiles" / "demo-bridge-filter.toml"
ACQD = [sys.executable, "-m", "acqd"]
# SI prefixes and their powers of ten (SI Brochure, 9th edition, table 7), as far as a bench reading goes.
PREFIX = {"f": 1e-15, "p": 1e-12, "n": 1e-9, "µ": 1e-6, "m": 1e-3, "": 1.0, "k": 1e3, "M": 1e6, "G": 1e9}
QUANTITY = re.compile(r"^(-?\d+(?:\.\d+)?) ([fpnµmkMG]?)(V|A|s|Ω|H|F|%)$")
# The edges as the CLI convention writes them, levels in the order the edge takes them (common practice:
# a falling edge goes from the high level to the low one).
RISING, FALLING = "rising 0 V → 1 V", "falling 1 V → 0 V"


def quantity(text: str) -> tuple[float, str, float]:
    """``"36.0 mV"`` → (0.036, "V", mantissa 36.0), read independently of acqd.display."""
    match = QUANTITY.match(text.strip())
    assert match, f"not an SI quantity: {text!r}"
    mantissa = float(match.group(1))
    return mantissa * PREFIX[match.group(2)], match.group(3), mantissa


def run_cli(capsys: pytest.CaptureFixture, *argv: str) -> tuple[int, str]:
    code = main(list(argv))
    return code, capsys.readouterr().out


@pytest.fixture(scope="module")
def demo_store(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, str]:
    """(store, the output of ``acqd run``): two step tests of the demo profile with both edges, 4 records."""
    folder = tmp_path_factory.mktemp("cli-output")
    text = DEMO.read_text(encoding="utf-8")
    assert '\nedge = "rising"' in text
    profile = folder / "both.toml"
    profile.write_text(text.replace('\nedge = "rising"', '\nedge = "both"'), encoding="utf-8")
    store = folder / "kt9.h5"
    proc = subprocess.run([*ACQD, "run", str(profile), "-n", "2", "-o", str(store)], capture_output=True,
                          text=True, timeout=120, cwd=folder)
    assert proc.returncode == 0, proc.stderr
    return store, proc.stdout


def table_rows(out: str) -> tuple[list[str], list[list[str]]]:
    """(column headers, body rows) of the first rich table in ``out``: multi-line headers joined by a space."""
    lines = out.splitlines()
    head = [l for l in lines if l.startswith("┃")]
    body = [l for l in lines if l.startswith("│")]
    cells = [[c.strip() for c in l.strip("┃").split("┃")] for l in head]
    headers = [" ".join(part for part in column if part) for column in zip(*cells)]
    return headers, [[c.strip() for c in l.strip("│").split("│")] for l in body]


def test_compare_table_headers_say_what_they_mean(capsys, demo_store):
    store, _ = demo_store
    code, out = run_cli(capsys, "compare", str(store), "-r", "0")
    assert code == 0
    headers, _ = table_rows(out)
    assert headers == ["channel", "model signal", "NRMSE", "max |error|", "overshoot measured",
                       "overshoot simulated", "settling time measured", "settling time simulated"]
    # "m/s" read as metres per second: no header may carry a slash-joined unit.
    assert not any("/" in h for h in headers) and "m/s" not in out


def test_compare_table_values_are_si_prefixed_and_equal_the_json(capsys, demo_store):
    store, _ = demo_store
    _, out = run_cli(capsys, "compare", str(store), "-r", "1")
    _, text = run_cli(capsys, "compare", str(store), "-r", "1", "--json")
    result = json.loads(text)
    _, rows = table_rows(out)
    by_channel = {ch["channel"]: ch for ch in result["channels"]}
    assert sorted(r[0] for r in rows) == sorted(by_channel)
    for row in rows:
        ch = by_channel[row[0]]
        assert row[1] == ch["signal"]
        expected = [(100 * ch["nrmse"], "%"), (ch["max_abs_error"], ch["unit"]),
                    (ch["measured"]["overshoot_pct"], "%"), (ch["simulated"]["overshoot_pct"], "%"),
                    (ch["measured"]["settling_duration_s"], "s"), (ch["simulated"]["settling_duration_s"], "s")]
        for cell, (value, unit) in zip(row[2:], expected, strict=True):
            shown, shown_unit, mantissa = quantity(cell)
            assert shown_unit == unit
            if unit != "%":  # the SI Brochure's habit: a prefix that puts the number between 1 and 1000
                assert 1 <= abs(mantissa) < 1000, cell
            # three or four significant figures: rounding moves a value by at most half a unit in the 3rd
            np.testing.assert_allclose(shown, value, rtol=5e-3)


FIT_LINE = re.compile(r"^  (R|L|C) = (.+?) ± (.+?) \(95 %: (.+?) … (.+?); start (.+?)\)$", re.M)


def fitted(out: str) -> dict[str, list[float]]:
    """Symbol → [value, standard error, 95 % low, 95 % high, start], parsed from the fit lines."""
    return {m.group(1): [quantity(g)[0] for g in m.groups()[1:]] for m in FIT_LINE.finditer(out)}


def json_fit(fit: dict) -> dict[str, list[float]]:
    symbol = {"r_ohm": "R", "l_h": "L", "c_f": "C"}
    return {symbol[k]: [fit["values"][k], fit["standard_errors"][k], *fit["ci95"][k], fit["nominal"][k]]
            for k in fit["fitted"]}


def test_compare_fit_lines_are_si_prefixed_and_equal_the_json(capsys, demo_store):
    store, _ = demo_store
    _, out = run_cli(capsys, "compare", str(store), "-r", "1")
    _, text = run_cli(capsys, "compare", str(store), "-r", "1", "--json")
    shown, expected = fitted(out), json_fit(json.loads(text)["fit"])
    assert set(shown) == {"R", "L", "C"} == set(expected)
    assert "3.2" in out.split("L = ")[1][:4] and " mH " in out and " nF " in out  # KT-9: mH choke, nF capacitor
    for name in shown:  # standard errors at two figures, the rest at four (numpy's allclose as the judge)
        value, error, low, high, start = shown[name]
        np.testing.assert_allclose([value, low, high, start], np.array(expected[name])[[0, 2, 3, 4]], rtol=5e-4)
        np.testing.assert_allclose(error, expected[name][1], rtol=5e-2)


def test_show_is_a_short_summary_with_the_fitted_values(capsys, demo_store):
    store, _ = demo_store
    code, out = run_cli(capsys, "show", str(store), "-r", "2")
    _, text = run_cli(capsys, "show", str(store), "-r", "2", "--json")
    meta = json.loads(text)
    assert code == 0 and len(out.splitlines()) <= 30  # was ~180 lines of JSON in table cells
    assert "{" not in out and '"' not in out  # no raw JSON left
    np.testing.assert_allclose(np.array(list(fitted(out).values())), np.array(list(json_fit(meta["analysis"]["fit"]).values())),
                               rtol=5e-2)
    assert meta["dut"]["name"] in out and meta["dut"]["serial"] in out
    assert all(idn in out for idn in meta["identities"].values())
    assert f"verdict: {meta['analysis']['verdict'].upper()}" in out
    assert RISING in out  # record 2 is the second step test's rising edge
    assert len(meta["profile_text"].splitlines()) > 50 and meta["profile_text"] not in out  # --json keeps it all


COLOUR = {*range(30, 39), *range(40, 49), *range(90, 98), *range(100, 108)}  # ECMA-48 §8.3.117 SGR colours
SGR = re.compile(r"\x1b\[([0-9;]*)m([^\x1b]*)")


def coloured_texts(out: str) -> list[str]:
    """The text each colour-setting SGR sequence applies to (up to the next escape sequence)."""
    texts = []
    for params, text in SGR.findall(out):
        codes = [int(p) for p in params.split(";") if p]
        if 38 in codes or 48 in codes or COLOUR.intersection(codes):
            texts.append(text.strip())
    return texts


@pytest.mark.parametrize("argv", [["ls", "{store}"], ["show", "{store}"], ["compare", "{store}", "-r", "0"],
                                  ["drift", "{store}"]], ids=["ls", "show", "compare", "drift"])
def test_only_the_verdict_is_coloured_on_a_terminal(demo_store, argv):
    # FORCE_COLOR makes rich write for a terminal into a pipe (rich's documented environment variable).
    store, _ = demo_store
    env = {**os.environ, "FORCE_COLOR": "1", "TERM": "xterm-256color", "COLUMNS": "200"}
    env.pop("NO_COLOR", None)
    proc = subprocess.run([*ACQD, *(a.format(store=store) for a in argv)], capture_output=True, text=True,
                          timeout=120, env=env)
    assert proc.returncode == 0, proc.stderr
    texts = coloured_texts(proc.stdout)
    # a record's verdict; in the drift table the verdict is its "drift?" column, coloured only when "yes"
    assert set(texts) <= ({"yes"} if argv[0] == "drift" else {"pass", "PASS", "FAIL"}), texts
    if argv[0] != "drift":  # the drift table's "yes" shows only when a series drifts
        assert texts, "the verdict should be in colour on a terminal"


def test_run_colours_only_the_verdict_and_nothing_in_a_pipe(demo_store):
    _, plain = demo_store
    assert "\x1b" not in plain  # a pipe gets no escape sequences at all
    profile = Path(demo_store[0]).parent / "both.toml"
    env = {**os.environ, "FORCE_COLOR": "1", "TERM": "xterm-256color", "COLUMNS": "200"}
    env.pop("NO_COLOR", None)
    proc = subprocess.run([*ACQD, "run", str(profile), "-n", "1", "-o", str(profile.with_name("forced.h5"))],
                          capture_output=True, text=True, timeout=120, env=env, cwd=profile.parent)
    assert proc.returncode == 0, proc.stderr
    assert coloured_texts(proc.stdout) == ["pass", "pass"]  # one verdict per edge; dates and words plain


def test_edges_read_the_same_in_run_ls_compare_and_drift(capsys, demo_store):
    store, run_out = demo_store
    lines = [l for l in run_out.splitlines() if l.startswith("#")]
    assert [RISING in l for l in lines] == [True, False, True, False]
    assert [FALLING in l for l in lines] == [False, True, False, True]
    _, out = run_cli(capsys, "ls", str(store))
    _, rows = table_rows(out)
    assert [r[2] for r in rows] == [RISING, FALLING, RISING, FALLING]
    _, out = run_cli(capsys, "compare", str(store), "-r", "1")
    assert f"series_rlc: {FALLING}," in out.splitlines()[0] and "->" not in out and "EMF" not in out
    _, text = run_cli(capsys, "drift", str(store), "--json")
    names = {s["name"] for s in json.loads(text)["series"]}
    assert f"v_c.amplitude @ {RISING}" in names and f"v_c.amplitude @ {FALLING}" in names


def test_record_line_shows_a_level_that_rounds_to_zero_as_0(demo_store):
    # A baseline a hair below zero (as a first-order RC's is, from ADC noise) must not print as -0.000.
    with open_records(demo_store[0]) as reader:
        record = reader.read(0)
    channels = [dataclasses.replace(c, samples=np.where(np.arange(len(c.samples)) < record.timebase.pretrigger_samples,
                                                        -4e-5, c.samples)) for c in record.channels]
    record.channels = channels
    line = record_line(0, record).plain
    assert "v_c 0 V → 0.999 V" in line and "-0." not in line and line.endswith(" pass")
    assert si_alike([-4e-5, 0.9994], "V") == ["0 V", "0.999 V"]
