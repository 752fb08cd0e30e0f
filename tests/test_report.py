"""Figures and the HTML run report, built headless from in-memory records (a list stands in for the store's
reader, which offers the same ``read(index)``)."""

from __future__ import annotations

import base64
import re
from datetime import datetime, timedelta, timezone
from html.parser import HTMLParser

import numpy as np
import pytest

from acqd.compare import compare, parse_dut_table
from acqd.record import Stimulus, TimeBase
from acqd.report import (channel_figure, parameter_vs_time_figure, png_bytes, spec_from_record, trajectory_figure,
                         write_report)
from test_compare_synthetic import difference_channel, make_record, series_rlc_nodes

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification (ISO/IEC 15948), the file signature
TB = TimeBase(1.2e-3 / 2400, 480, 2400)
DUT = {"name": "KT-9 input filter", "serial": "KT9-0417", "model": "series_rlc", "r_ohm": 22.0, "l_h": 3.3e-3,
       "c_f": 100e-9, "channels": {"v_c": "v_c", "v_r": "v_src - v_rl"}, "fit": {"free": ["r_ohm", "l_h", "c_f"]},
       "tolerances": {"nrmse_max": 0.05, "channels": {"v_c": {"overshoot_pct": [40.0, 60.0]}}}}


def kt9_record(index: int, r_ohm: float, dut: dict | None = DUT, seed: int = 0):
    nodes = series_rlc_nodes(TB.times(), r_ohm, 3.3e-3, 100e-9)
    rec = make_record(nodes, TB, Stimulus("square", 0.0, 1.0, 200.0, "rising"),
                      {"v_src": "v_src", "v_rl": "v_rl", "v_c": "v_c"}, 0.004, seed, True, dut)
    rec = difference_channel(rec, "v_src", "v_rl", "v_r")
    rec.index = index
    rec.utc = (datetime(2026, 12, 2, 22, 0, tzinfo=timezone.utc) + timedelta(hours=index)).isoformat()
    return rec


class ListSource:
    """Records by index, like ``acqd.store.open_records(path).read``."""

    def __init__(self, records):
        self.records = {r.index: r for r in records}

    def read(self, index):
        return self.records[index]


def test_figures_render_headless_as_png():
    # matplotlib's Agg renderer writes PNG without a display; the bytes carry the PNG signature.
    result = compare(kt9_record(0, 22.0), DUT, DUT["channels"], fit=DUT["fit"])
    for fig in (channel_figure(result), trajectory_figure(result)):
        data = png_bytes(fig)
        assert data[:8] == PNG_SIGNATURE and len(data) > 10_000
    axes = channel_figure(result).axes
    assert len(axes) == 4  # measured over simulated + residual, per channel
    measured, simulated = (line.get_ydata() for line in axes[0].get_lines()[:2])
    assert np.array_equal(measured, result.traces.measured["v_c"])
    assert np.array_equal(simulated, result.traces.simulated["v_c"])


def test_trajectory_has_time_arrows_on_both_curves():
    result = compare(kt9_record(0, 22.0), DUT, DUT["channels"])
    ax = trajectory_figure(result).axes[0]
    arrows = [t for t in ax.texts if getattr(t, "arrow_patch", None) is not None]
    assert len(arrows) == 12  # six along the measured curve, six along the simulated
    # The arrows follow time: each points from an earlier to a later sample of the simulated states.
    sim = result.traces.states_simulated
    for arrow in arrows[6:]:
        (x0, y0), (x1, y1) = arrow.xyann, arrow.xy
        k0 = int(np.argmin(np.hypot(sim[:, 0] - x0, (sim[:, 1] - y0) * 1e3)))
        k1 = int(np.argmin(np.hypot(sim[:, 0] - x1, (sim[:, 1] - y1) * 1e3)))
        assert k1 > k0


def test_parameter_vs_time_plot_with_intervals():
    times = [datetime(2026, 12, 2, h, tzinfo=timezone.utc) for h in range(5)]
    fig = parameter_vs_time_figure(times, [22.0, 22.1, 22.3, 22.2, 22.6], "r_ohm", "ohm", nominal=22.0,
                                   lower=[21.8] * 5, upper=[22.8] * 5, limits=(19.8, 24.2))
    assert png_bytes(fig)[:8] == PNG_SIGNATURE
    assert fig.axes[0].get_ylabel() == "r_ohm (ohm)"


class _Images(HTMLParser):
    def __init__(self):
        super().__init__()
        self.sources = []

    def handle_starttag(self, tag, attrs):
        if tag == "img":
            self.sources.append(dict(attrs)["src"])


def test_run_report_is_one_self_contained_html_file(tmp_path):
    records = [kt9_record(i, r, seed=i) for i, r in enumerate((22.0, 22.4, 23.0))]
    records.append(kt9_record(3, 22.0, dut={"name": "KT-9 input filter"}))  # captured without a model
    path = write_report(ListSource(records), tmp_path / "out", spec_from_record, "KT-9 night run", [0, 1, 2, 3])
    html = path.read_text(encoding="utf-8")
    assert path.name == "index.html"
    rows = re.findall(r"<tr><td>(\d+)</td>", html)
    assert rows == ["0", "1", "2", "3"]  # one summary row per record
    assert "no comparison" in html and "names no model" in html
    parser = _Images()
    parser.feed(html)
    assert parser.sources and all(s.startswith("data:image/png;base64,") for s in parser.sources)
    for src in parser.sources:  # every embedded image decodes to a PNG (base64 per RFC 4648)
        assert base64.b64decode(src.split(",", 1)[1])[:8] == PNG_SIGNATURE
    # 3 compared records × (channels + trajectory) + one drift plot per fitted parameter
    assert len(parser.sources) == 3 * 2 + 3
    assert html.count('class="pass"') + html.count('class="fail"') >= 3


def test_report_with_one_spec_for_every_record_lists_failures(tmp_path):
    spec = parse_dut_table({**DUT, "tolerances": {"parameter_pct": 2.0}}, "kt9.toml", path="")
    records = [kt9_record(i, r, seed=i) for i, r in enumerate((22.0, 26.0))]
    html = write_report(ListSource(records), tmp_path, lambda rec: spec, "KT-9", [0, 1]).read_text()
    assert "R: fitted" in html and "outside ±2 %" in html
    assert re.search(r'<td>1</td><td>[^<]*</td><td>series_rlc</td><td><span class="fail">FAIL', html)


def test_a_bad_record_table_is_reported_not_raised(tmp_path):
    rec = kt9_record(0, 22.0, dut={**DUT, "r_ohm": -1.0})
    html = write_report(ListSource([rec]), tmp_path, spec_from_record, "KT-9", [0]).read_text()
    assert "No comparison" in html and "r_ohm: must be greater than 0" in html


@pytest.mark.parametrize("name", ["rc_lowpass", "second_order"])
def test_single_state_or_other_models_report_without_failing(tmp_path, name):
    t = TB.times()
    y = np.where(t >= 0, 1 - np.exp(-np.clip(t, 0, None) / 1e-4), 0.0)
    rec = make_record({"y": y}, TB, Stimulus("square", 0.0, 1.0, 200.0, "rising"),
                      {"v_c" if name == "rc_lowpass" else "y": "y"}, 0.002, 1, True)
    table = ({"model": "rc_lowpass", "r_ohm": 50.0, "c_f": 1e-6} if name == "rc_lowpass"
             else {"model": "second_order", "wn_rad_s": 2e4, "zeta": 1.0})
    result = compare(rec, table)
    assert (trajectory_figure(result) is None) == (name == "rc_lowpass")
    assert png_bytes(channel_figure(result))[:8] == PNG_SIGNATURE
