"""The run report on real stores: records taken by ``acqd run`` on the simulated bench (real SCPI servers on
127.0.0.1, pyvisa-py, a real HDF5 store), the page read back with Python's HTML parser and by headless
Chromium, and the figures built headless.

The store mixes what a night can hold: records that passed, one that failed its tolerances, and one taken
with a [dut] table that names no model (never compared).
"""

from __future__ import annotations

import base64
import os
import pty
import re
import shutil
import struct
import subprocess
from datetime import datetime, timedelta, timezone
from html.parser import HTMLParser
from importlib.metadata import version
from pathlib import Path

import numpy as np
import pytest

from acqd.cli import main
from acqd.compare import compare_spec, stored_traces
from acqd.report import channel_figure, parameter_vs_time_figure, png_bytes, spec_from_record, trajectory_figure
from acqd.report.html import THUMB_BUCKETS
from acqd.store import open_records
from test_cli_output import ACQD, DEMO, quantity
from test_compare_synthetic import series_rlc_nodes

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification (ISO/IEC 15948), the file signature
CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")


def _profile(folder: Path, name: str, *, edge: str = "rising", dut: str | None = None,
             parameter_pct: float | None = None) -> Path:
    """The demo profile with its edge, its [dut] table or its parameter tolerance changed."""
    text = DEMO.read_text(encoding="utf-8").replace('\nedge = "rising"', f'\nedge = "{edge}"')
    if parameter_pct is not None:
        assert "\nparameter_pct = 5.0" in text
        text = text.replace("\nparameter_pct = 5.0", f"\nparameter_pct = {parameter_pct}")
    if dut is not None:
        head, rest = text.split("\n[dut]\n", 1)
        text = head + "\n" + dut + "\n[output]\n" + rest.split("\n[output]\n", 1)[1]
    path = folder / f"{name}.toml"
    path.write_text(text, encoding="utf-8")
    return path


@pytest.fixture(scope="module")
def night(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A store of 6 records: 4 that pass (both edges), 1 that fails (parameters within 1 %, where the
    simulated unit's parts are 1.5-2 % off), 1 with no model in its [dut] table."""
    folder = tmp_path_factory.mktemp("report")
    store = folder / "night.h5"
    runs = [(_profile(folder, "both", edge="both"), 2), (_profile(folder, "tight", parameter_pct=1.0), 1),
            (_profile(folder, "nomodel", dut='[dut]\nname = "KT-9 input filter"\nserial = "KT9-0417"\n'), 1)]
    for profile, count in runs:
        proc = subprocess.run([*ACQD, "run", str(profile), "-n", str(count), "-o", str(store)], capture_output=True,
                              text=True, timeout=120, cwd=folder)
        assert proc.returncode == 0, proc.stderr
    return store


class Page(HTMLParser):
    """The parts of the report a test reads: table rows as cell texts, images, thumbnails, sections."""

    def __init__(self, text: str) -> None:
        super().__init__()
        self.tables: list[list[list[str]]] = []
        self.images: list[str] = []
        self.thumbs: list[tuple[str, str]] = []  # (title, points)
        self.sections: list[str] = []
        self.text: list[str] = []
        self._cell: list[str] | None = None
        self._in_title = False
        self.feed(text)

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        a = dict(attrs)
        if tag == "table":
            self.tables.append([])
        elif tag == "tr":
            self.tables[-1].append([])
        elif tag in ("td", "th"):
            self._cell = []
        elif tag == "img":
            self.images.append(a["src"] or "")
        elif tag == "polyline":
            self.thumbs[-1] = (self.thumbs[-1][0], a["points"] or "")
        elif tag == "svg":
            self.thumbs.append(("", ""))
        elif tag == "title" and self.thumbs:
            self._in_title = True
        elif tag == "section":
            self.sections.append(a["id"] or "")

    def handle_endtag(self, tag: str) -> None:
        if tag in ("td", "th") and self._cell is not None:
            self.tables[-1][-1].append("".join(self._cell).strip())
            self._cell = None
        elif tag == "title":
            self._in_title = False

    def handle_data(self, data: str) -> None:
        self.text.append(data)
        if self._in_title:
            self.thumbs[-1] = (self.thumbs[-1][0] + data, self.thumbs[-1][1])
        elif self._cell is not None:
            self._cell.append(data)

    def head(self) -> dict[str, str]:
        return {row[0]: row[1] for row in self.tables[0]}

    def summary(self) -> list[dict[str, str]]:
        table = next(t for t in self.tables if t and t[0][:2] == ["record", "UTC"])
        return [dict(zip(table[0], row)) for row in table[1:]]


def stored(store: Path) -> list[dict]:
    """Every record's metadata as ``acqd show --json`` gives it (the stored analysis included)."""
    with open_records(store) as reader:
        return [reader.metadata(s.index) for s in reader.index()]


@pytest.fixture(scope="module")
def report(night: Path) -> tuple[Path, str, datetime, datetime]:
    """(page, what acqd report printed, the time before and after it ran)."""
    out = night.parent / "pages" / "night.html"
    before = datetime.now(timezone.utc)
    proc = subprocess.run([*ACQD, "report", str(night), "-o", str(out)], capture_output=True, text=True, timeout=120)
    after = datetime.now(timezone.utc)
    assert proc.returncode == 0, proc.stderr
    assert proc.stderr == ""  # no progress bar when stderr is not a terminal
    return out, proc.stdout, before, after


def test_the_page_shows_the_stored_analysis(night, report):
    out, printed, _, _ = report
    page = Page(out.read_text(encoding="utf-8"))
    records = stored(night)
    rows = page.summary()
    assert [int(r["record"]) for r in rows] == [m["index"] for m in records]
    for row, meta in zip(rows, records):
        analysis = meta["analysis"]
        # The store's index keeps the verdict beside the record (acqd ls); "not compared" where none.
        assert row["verdict"] == {"pass": "pass", "fail": "FAIL", "": "not compared"}[meta["verdict"]]
        if analysis is None:
            assert row["R"] == "–" and "not compared when stored" in row["worst NRMSE"]
            continue
        for column, key in (("R", "r_ohm"), ("L", "l_h"), ("C", "c_f")):
            value, unit, _ = quantity(row[column])  # read independently of acqd.display
            assert unit == {"r_ohm": "Ω", "l_h": "H", "c_f": "F"}[key]
            # four significant figures: within half a unit in the fourth (common practice for rounding)
            assert value == pytest.approx(analysis["fit"]["values"][key], rel=5e-4)
        worst = max(analysis["channels"], key=lambda c: c["nrmse"])
        name, shown = row["worst NRMSE"].split(": ")
        assert name == worst["channel"] and quantity(shown)[0] == pytest.approx(100 * worst["nrmse"], rel=5e-3)
    counts = {v: sum(1 for m in records if m["verdict"] == v) for v in ("pass", "fail", "")}
    assert counts == {"pass": 4, "fail": 1, "": 1}
    line = f"6 records: {counts['pass']} pass, {counts['fail']} fail, 0 untested, {counts['']} not compared."
    assert line in "".join(page.text)
    assert re.fullmatch(rf"wrote {re.escape(str(out))} \(\d+ kB\): 6 record\(s\), 4 pass, 1 fail, 0 untested, "
                        r"1 not compared; 1 drawn in full\n", printed)


def test_the_head_says_what_was_tested_with_what_and_when(night, report):
    out, _, before, after = report
    head = Page(out.read_text(encoding="utf-8")).head()
    first = stored(night)[0]
    assert head["DUT"] == "KT-9 input filter, serial KT9-0417"
    # The stimulus as set on the demo profile; the two edges each hold for some of the records.
    assert "square 200 Hz, rising 0 V → 1 V, load high_z, source 50 Ω, edge time 20 ns" in head["stimulus"]
    assert "falling 1 V → 0 V" in head["stimulus"] and "of 6 records" in head["stimulus"]
    for role, idn in first["identities"].items():  # *IDN? as the instruments answered (IEEE 488.2 §10.14)
        assert f"{role} {idn}" in head["instruments"]
    made = re.match(r"(\d{4}-\d\d-\d\d \d\d:\d\d:\d\d) UTC by acqd (\S+); records taken by acqd (\S+)", head["made"])
    assert made, head["made"]
    when = datetime.strptime(made.group(1), "%Y-%m-%d %H:%M:%S").replace(tzinfo=timezone.utc)
    assert before - timedelta(seconds=1) <= when <= after
    assert made.group(2) == version("acqd")  # the installed package's own metadata (importlib.metadata)
    assert made.group(3) == first["acqd_version"]


def test_only_failed_and_named_records_carry_figures(night, report, tmp_path):
    out, _, _, _ = report
    page = Page(out.read_text(encoding="utf-8"))
    failed = [m["index"] for m in stored(night) if m["verdict"] == "fail"]
    assert page.sections == [f"r{i}" for i in failed]
    # 3 drift plots (R, L, C) + the failed record's channel and trajectory figures
    assert len(page.images) == 3 + 2
    for src in page.images:  # every embedded image decodes to a PNG (data: URI, RFC 2397; base64, RFC 4648)
        assert src.startswith("data:image/png;base64,")
        assert base64.b64decode(src.split(",", 1)[1])[:8] == PNG_SIGNATURE
    named = tmp_path / "named.html"
    assert main(["report", str(night), "-o", str(named), "--full", "0,1"]) == 0
    assert Page(named.read_text(encoding="utf-8")).sections == ["r0", "r1", *(f"r{i}" for i in failed)]


def test_thumbnails_are_the_output_channels_envelope(night, report):
    out, _, _, _ = report
    page = Page(out.read_text(encoding="utf-8"))
    assert len(page.thumbs) == 6
    with open_records(night) as reader:
        for (title, points), s in zip(page.thumbs, reader.index()):
            samples = reader.read(s.index).channel("v_c").samples  # the last scope input, CH3
            name, span = title.split(": ")
            lo, hi = (quantity(v)[0] for v in span.split(" … "))
            assert name == "v_c [V]"
            # three significant figures of numpy's own minimum and maximum
            assert lo == pytest.approx(samples.min(), abs=5e-3) and hi == pytest.approx(samples.max(), abs=5e-3)
            assert len(points.split()) == 2 * THUMB_BUCKETS


def test_recompute_compares_again_with_the_profile(night, tmp_path, capsys):
    # Stored: the first records passed against the demo's ±5 %. Compared again with ±1 %, every record
    # with a model fails: the simulated unit's parts are 1.5-2 % off nominal (22.4 Ω, 3.25 mH, 102 nF).
    tight = _profile(tmp_path, "tight", parameter_pct=1.0)
    out = tmp_path / "again.html"
    assert main(["report", str(night), "-o", str(out), "--recompute", "-p", str(tight), "--last", "3"]) == 0
    page = Page(out.read_text(encoding="utf-8"))
    assert [r["verdict"] for r in page.summary()] == ["FAIL", "FAIL", "FAIL"]
    assert page.head()["analysis"] == "compared again by this report"
    assert "3 record(s), 0 pass, 3 fail" in capsys.readouterr().out


def test_stored_traces_follow_the_textbook_response(night):
    # The figures of a stored analysis simulate the model once with the stored parameters: the series RLC
    # step response in closed form (textbook, underdamped; see test_compare_synthetic) with the same R, L, C.
    with open_records(night) as reader:
        record = reader.read(0)
    spec = spec_from_record(record)
    traces = stored_traces(record, spec, record.analysis)
    p = record.analysis["parameters"]
    nodes = series_rlc_nodes(traces.times, p["r_ohm"], p["l_h"], p["c_f"], p["source_resistance_ohm"],
                             delay_s=record.analysis["stimulus"]["t50_s"])
    after_edge = traces.times > 1e-6  # the record's 20 ns edge against the ideal step of the closed form
    assert np.max(np.abs(traces.simulated["v_c"] - nodes["v_c"])[after_edge]) < 1e-3
    # and the same traces as comparing afresh (the fit is deterministic, so its parameters are the stored ones)
    fresh = compare_spec(record, spec).traces
    assert np.max(np.abs(fresh.simulated["v_c"] - traces.simulated["v_c"])) < 1e-6


def test_progress_bar_on_a_terminal(night, tmp_path):
    # stderr on a pseudo-terminal (POSIX pty): rich draws the bar there with control codes; stdout is a pipe.
    master, slave = pty.openpty()
    proc = subprocess.Popen([*ACQD, "report", str(night), "-o", str(tmp_path / "p.html")], stdout=subprocess.PIPE,
                            stderr=slave, env={**os.environ, "COLUMNS": "100"})
    os.close(slave)
    drawn = b""
    while True:
        try:
            chunk = os.read(master, 4096)
        except OSError:  # the child closed the terminal
            break
        if not chunk:
            break
        drawn += chunk
    stdout, _ = proc.communicate(timeout=120)
    os.close(master)
    assert proc.returncode == 0 and stdout.startswith(b"wrote ")
    assert b"report" in drawn and b"\x1b[" in drawn  # ECMA-48 control sequences: the bar is drawn and cleared


@pytest.mark.parametrize("argv, named", [
    (["report", "{store}", "-o", "{tmp}/x.html", "-p", "{tmp}/p.toml"], "--profile: only with --recompute"),
    (["report", "{store}", "-o", "{tmp}/x.html", "--full", "99"], "--full: record 99 is not among"),
    (["report", "{store}", "-o", "{tmp}/x.html", "--full", "2-1"], "--full: '2-1'"),
    (["report", "{store}", "-o", "{tmp}"], "is a folder; name the file to write"),
    (["report", "{store}", "-o", "{tmp}/x.html", "--last", "0"], "--last: must be 1 or more"),
    (["report", "{tmp}/none.h5", "-o", "{tmp}/x.html"], "no such record store"),
])
def test_bad_input_is_one_line_and_writes_nothing(capsys, night, tmp_path, argv, named):
    code = main([a.format(store=night, tmp=tmp_path) for a in argv])
    out, err = capsys.readouterr()
    assert code == 2 and out == "" and err.count("\n") == 1 and named in err, err
    assert not (tmp_path / "x.html").exists()


def test_drift_figure_reads_in_si_units_with_dates_and_limits():
    times = [datetime(2026, 12, 2, 22, tzinfo=timezone.utc) + timedelta(minutes=30 * k) for k in range(8)]
    values = [1.020e-7 + 2e-10 * k for k in range(8)]
    fig = parameter_vs_time_figure(times, values, "c_f", "F", nominal=1e-7, lower=[v - 1e-10 for v in values],
                                   upper=[v + 1e-10 for v in values], limits=(0.95e-7, 1.05e-7),
                                   trend=values, trend_label="trend")
    png = png_bytes(fig)  # draws the figure, so tick labels and offsets are final
    assert png[:8] == PNG_SIGNATURE
    ax = fig.axes[0]
    assert ax.get_ylabel() == "C (nF)" and ax.get_xlabel() == "time (UTC)"
    assert ax.yaxis.get_offset_text().get_text() == ""  # no bare 1e-7 beside the axis
    ticks = [float(t.get_text().replace("−", "-")) for t in ax.get_yticklabels() if t.get_text()]
    assert min(ticks) < 102.0 and max(ticks) > 103.4  # nanofarads (SI Brochure, table 7: n = 1e-9)
    assert "2026" in ax.xaxis.get_offset_text().get_text()  # the date beside the times of day
    assert re.fullmatch(r"\d\d:\d\d", next(t.get_text() for t in ax.get_xticklabels() if t.get_text()))
    legend = [t.get_text() for t in ax.get_legend().get_texts()]
    assert "tolerance 95.00 nF … 105.0 nF" in legend and "nominal 100 nF" in legend and "trend" in legend
    limit_lines = [l for l in ax.get_lines() if l.get_linestyle() == ":"]
    assert sorted(l.get_ydata()[0] for l in limit_lines) == pytest.approx([95.0, 105.0])


def test_figures_of_a_stored_analysis_render_headless(night):
    # matplotlib's Agg renderer writes PNG without a display; the plotted lines are the traces, scaled to
    # the axis' prefix.
    with open_records(night) as reader:
        record = reader.read(0)
    traces = stored_traces(record, spec_from_record(record), record.analysis)
    fig = channel_figure(traces, record.analysis)
    assert png_bytes(fig)[:8] == PNG_SIGNATURE
    assert len(fig.axes) == 2 * len(traces.measured)  # measured over simulated + residual, per channel
    measured = fig.axes[0].get_lines()[0].get_ydata()
    assert np.array_equal(measured, traces.measured["v_src"])  # volts in V: no prefix on a 1 V step
    trajectory = trajectory_figure(traces)
    assert trajectory.axes[0].get_ylabel() == "i_l (mA)"  # tens of milliamps (SI Brochure, table 7)
    assert png_bytes(trajectory)[:8] == PNG_SIGNATURE


def _png_size(data: bytes) -> tuple[int, int]:
    """Width and height from the IHDR chunk, the first after the signature (PNG specification, 11.2.2)."""
    assert data[:8] == PNG_SIGNATURE and data[12:16] == b"IHDR"
    return struct.unpack(">II", data[16:24])


@pytest.mark.skipif(CHROMIUM is None, reason="Debian's chromium is not installed (.ci/run installs it)")
def test_the_page_in_headless_chromium(night, report, tmp_path):
    # A real browser opens the file with no server: its DOM after loading names the DUT, the serial and the
    # verdict counts, and its screenshot is a PNG a person can look at.
    out, _, _, _ = report
    browser = [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--hide-scrollbars", "--window-size=1280,1600"]
    dom = subprocess.run([*browser, "--dump-dom", out.as_uri()], capture_output=True, text=True, timeout=120)
    assert dom.returncode == 0, dom.stderr
    text = re.sub(r"<[^>]+>", " ", dom.stdout)
    counts = {v: sum(1 for m in stored(night) if m["verdict"] == v) for v in ("pass", "fail", "")}
    assert "KT-9 input filter" in text and "KT9-0417" in text
    assert f"{counts['pass']} pass, {counts['fail']} fail, 0 untested, {counts['']} not compared" in text
    shot = tmp_path / "report.png"
    proc = subprocess.run([*browser, f"--screenshot={shot}", out.as_uri()], capture_output=True, text=True,
                          timeout=120)
    assert proc.returncode == 0, proc.stderr
    assert _png_size(shot.read_bytes()) == (1280, 1600)
