"""``acqd drift`` on a store whose DUT drifts by a known amount per hour.

The records are built from the series-RLC step response (closed form, Nilsson & Riedel, Electric Circuits
ch. 8) with the resistor rising linearly in time, plus seeded gaussian noise; the real comparator fits R on each and its
result is stored with the record in a real HDF5 store, as the daemon does. ``acqd drift`` must recover the
injected slope inside its own 95 % interval, agree with the textbook regression formulas, and flag
exactly the records whose fitted R left the tolerance band.
"""

import json
import math
from datetime import UTC, datetime, timedelta
from pathlib import Path

import numpy as np
import pytest

from acqd.cli import main
from acqd.compare import compare_spec, parse_dut_table
from acqd.record import Channel, Record, Stimulus, TimeBase
from acqd.store import RecordStore

R0_OHM, SLOPE_OHM_PER_H, L_H, C_F, RS_OHM = 22.0, 0.8, 3.3e-3, 100e-9, 50.0
TOLERANCE_PCT = 15.0
N_RECORDS, EVERY_H = 16, 0.5
T_START = datetime(2026, 12, 2, 22, 0, tzinfo=UTC)
DUT = {"model": "series_rlc", "r_ohm": R0_OHM, "l_h": L_H, "c_f": C_F, "fit": {"free": ["r_ohm"]},
       "channels": {"v_c": "v_c"}, "tolerances": {"parameter_pct": {"r_ohm": TOLERANCE_PCT}}}


def v_c_step(t: np.ndarray, r_total: float, volts: float = 1.0) -> np.ndarray:
    """Capacitor voltage of a series RLC after a step of ``volts`` from rest (0 < ζ < 1), zero before t = 0.
    v_C(t) = V[1 − e^{−σt}(cos ω_d t + (σ/ω_d) sin ω_d t)], σ = R/2L, ω_d = √(1/LC − σ²) (textbook)."""
    sigma = r_total / (2 * L_H)
    wd = math.sqrt(1 / (L_H * C_F) - sigma**2)
    tp = np.clip(t, 0, None)
    v = volts * (1 - np.exp(-sigma * tp) * (np.cos(wd * tp) + sigma / wd * np.sin(wd * tp)))
    return np.where(t >= 0, v, 0.0)


def write_drifting_store(path: Path, rng: np.random.Generator, n_records: int = N_RECORDS,
                         both_edges: bool = False) -> list[float]:
    """Records every EVERY_H hours with R rising by SLOPE_OHM_PER_H; with ``both_edges`` they alternate
    rising and falling (a falling step from the high level is the rising one mirrored: 1 − v_C(t))."""
    spec = parse_dut_table(DUT, "test [dut]")
    timebase = TimeBase(sample_interval_s=1e-6, pretrigger_samples=300, n_samples=1500)
    truth = []
    with RecordStore(path, fsync=False) as store:
        for k in range(n_records):
            r = R0_OHM + SLOPE_OHM_PER_H * k * EVERY_H
            truth.append(r)
            edge = "falling" if both_edges and k % 2 else "rising"
            step = v_c_step(timebase.times(), r + RS_OHM)
            samples = (1.0 - step if edge == "falling" else step) + rng.normal(0, 2e-3, timebase.n_samples)
            record = Record([Channel("v_c", "V", samples, "CH3")], timebase,
                            Stimulus("square", 0.0, 1.0, 200.0, edge, "high_z", RS_OHM),
                            dut=DUT, utc=(T_START + timedelta(hours=k * EVERY_H)).isoformat())
            record.analysis = compare_spec(record, spec).to_dict()
            store.append(record)
    return truth


def test_drift_recovers_injected_slope_within_its_interval(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    truth = write_drifting_store(tmp_path / "night.h5", np.random.default_rng(7))
    out = tmp_path / "drift"
    assert main(["drift", str(tmp_path / "night.h5"), "--json", "--figures", str(out)]) == 0
    summary = json.loads(capsys.readouterr().out)
    assert summary["records"] == summary["compared"] == N_RECORDS
    r = next(s for s in summary["series"] if s["name"] == "r_ohm")
    assert (r["kind"], r["unit"], r["nominal"]) == ("parameter", "ohm", R0_OHM)
    np.testing.assert_allclose(r["hours"], np.arange(N_RECORDS) * EVERY_H)
    np.testing.assert_allclose(r["values"], truth, rtol=1e-2)  # each fit lands near the injected R

    trend = r["trend"]
    lo, hi = trend["ci95"]
    assert lo < SLOPE_OHM_PER_H < hi, trend  # the injected drift lies inside the stated 95 % interval
    assert trend["significant"]

    # Textbook simple regression (independent of scipy): b = Sxy/Sxx, SE(b) = √(SSR/(n−2)/Sxx), and the
    # interval b ± t·SE with t(0.975, 14) = 2.145 (Student's t table, from memory).
    x, y = np.asarray(r["hours"]), np.asarray(r["values"])
    sxx = np.sum((x - x.mean()) ** 2)
    b = np.sum((x - x.mean()) * (y - y.mean())) / sxx
    ssr = np.sum((y - (y.mean() + b * (x - x.mean()))) ** 2)
    se = math.sqrt(ssr / (len(x) - 2) / sxx)
    assert trend["slope_per_h"] == pytest.approx(b, rel=1e-9)
    assert trend["stderr"] == pytest.approx(se, rel=1e-9)
    assert hi - trend["slope_per_h"] == pytest.approx(2.145 * se, rel=1e-3)

    # Tolerance ±15 % of 22 Ω: the upper limit 25.3 Ω is crossed from 4.125 h on, i.e. from record 9
    # (4.5 h); the comparator's own verdicts must say so for exactly those records.
    upper = R0_OHM * (1 + TOLERANCE_PCT / 100)
    assert r["limits"] == pytest.approx([R0_OHM * (1 - TOLERANCE_PCT / 100), upper])
    assert r["outside"] == [k for k, value in enumerate(truth) if value > upper] == list(range(9, N_RECORDS))
    assert summary["failed_records"] == r["outside"]
    assert trend["hours_to_limit"] == 0.0  # already past it

    assert json.loads((out / "drift.json").read_text())["series"][0]["name"] == "r_ohm"
    png = (out / "drift-r_ohm.png").read_bytes()
    assert png[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG specification, section 5.2)


def test_a_sweep_keeps_metrics_per_setting_and_parameters_pooled(tmp_path: Path) -> None:
    from acqd.campaign.drift import analyse_store

    write_drifting_store(tmp_path / "both.h5", np.random.default_rng(3), n_records=10, both_edges=True)
    summary = analyse_store(tmp_path / "both.h5")
    names = {s.name: s for s in summary.series}
    assert len(names["r_ohm"].values) == 10  # the DUT's parameter, whatever the edge
    lo, hi = names["r_ohm"].trend.ci95
    assert lo < SLOPE_OHM_PER_H < hi
    rising, falling = names["v_c.amplitude @ rising 0 V → 1 V"], names["v_c.amplitude @ falling 1 V → 0 V"]
    assert rising.indices == [0, 2, 4, 6, 8] and falling.indices == [1, 3, 5, 7, 9]
    # IEEE 181 amplitude = final − initial state level: about +1 V rising, −1 V falling, no trend in either.
    assert np.allclose(rising.values, 1.0, atol=0.01) and np.allclose(falling.values, -1.0, atol=0.01)
    assert "v_c.amplitude" not in names


def test_no_drift_gives_an_interval_around_zero(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    from acqd.campaign.drift import slope_trend

    rng = np.random.default_rng(11)
    hours = list(np.arange(40) * 0.25)
    trend = slope_trend(hours, list(22.0 + rng.normal(0, 0.05, 40)))
    assert trend.ci95[0] < 0 < trend.ci95[1] and not trend.significant
    assert slope_trend([0.0, 1.0], [1.0, 2.0]) is None  # two points leave no degree of freedom


def test_drift_of_a_missing_store_is_one_line(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    assert main(["drift", str(tmp_path / "nothing.h5")]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "nothing.h5" in err and "no such record store" in err


def test_the_drift_table_shows_symbols_and_si_prefixes_not_keys() -> None:
    from rich.console import Console

    from acqd.campaign.drift import DriftSummary, Series, Trend, drift_table

    series = [Series("c_f", "parameter", "F", values=[1.0262e-7, 1.0975e-7],
                     trend=Trend(2, 1.217e-6, (1.198e-6, 1.236e-6), 1e-8, 1.02e-7, 0.99, 1e-9, 7e-9)),
              Series("v_c.overshoot_pct @ rising 0 V → 1 V", "metric", "%", values=[52.4, 52.5])]
    summary = DriftSummary("s.h5", 2, 2, None, None, 0.1, "ols", series, [], [])
    screen = Console(record=True, width=200)
    screen.print(drift_table(summary))
    text = screen.export_text()
    # Prefixes from the SI Brochure (BIPM, 9th edition, table 7): 1e-9 nano, 1e-6 micro.
    assert "102.62 nF" in text and "109.75 nF" in text and "1.217 µF/h" in text
    assert "1.198 µF/h … 1.236 µF/h" in text
    assert "v_c overshoot @ rising 0 V → 1 V" in text and "52.400 %" in text
    assert "c_f" not in text and "overshoot_pct" not in text and "e-0" not in text
