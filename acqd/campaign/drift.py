"""Drift over a campaign: every fitted parameter and metric of every record against time, a trend each.

The trend is the ordinary least-squares line through (hours since the first record, value); its slope's
95 % interval is slope ± t(0.975, n−2)·SE(slope), Student's t with n − 2 degrees of freedom - the textbook
interval for a regression slope, computed as in the example of scipy.stats.linregress's documentation.
It assumes independent scatter of equal size around a straight line; the points' own fit intervals are
shown in the figures but not used as weights (they come from the noise of one record, while the scatter
between records also carries what changed on the bench).

A record "crossed a tolerance" when the comparator's own check for that parameter or metric failed when
the record was stored (``analysis["checks"]``), so the answer is the one the verdict gave at the time.
"""

from __future__ import annotations

import json
import math
import re
from dataclasses import asdict, dataclass, field, replace
from datetime import datetime
from pathlib import Path
from typing import Any

import numpy as np
from rich.table import Table
from rich.text import Text
from scipy import stats

from ..compare import parse_dut_table
from ..display import UNPREFIXED, edge_label, label, si, unit_symbol
from ..errors import AcqdError, ConfigError
from ..record import unit_serial_of
from ..store import open_records
from .ledger import verdict_text

CONFIDENCE = 0.95
# Step parameters (acqd.compare.ieee181.StepParameters) worth a trend, with their units.
STEP_METRICS = {"overshoot_pct": "%", "transition_duration_s": "s", "settling_duration_s": "s",
                "damped_frequency_hz": "Hz", "state_after": "", "amplitude": ""}
# Comparator check names → the metric series they judge.
CHECK_SERIES = {"nrmse": "nrmse", "overshoot": "overshoot_pct", "settling": "settling_duration_s"}


@dataclass
class Trend:
    """Least-squares line ``value = intercept + slope_per_h · hours``; ``ci95`` is the slope's interval."""

    n: int
    slope_per_h: float
    ci95: tuple[float, float]
    stderr: float
    intercept: float
    r: float
    p_value: float
    change_over_span: float  # slope × the hours the points span
    hours_to_limit: float | None = None  # from the last point, if the line is heading for a tolerance limit

    @property
    def significant(self) -> bool:
        """The interval excludes zero: a drift, not scatter (at the 5 % level)."""
        return self.ci95[0] > 0 or self.ci95[1] < 0


@dataclass
class Series:
    name: str  # "r_ohm", or "v_c.overshoot_pct" for a channel's metric
    kind: str  # "parameter" (fitted) or "metric"
    unit: str
    serial: str = ""  # the unit's serial when the series are kept apart per unit (a batch), else ""
    indices: list[int] = field(default_factory=list)
    utc: list[str] = field(default_factory=list)
    hours: list[float] = field(default_factory=list)
    values: list[float] = field(default_factory=list)
    lower: list[float | None] = field(default_factory=list)  # each fitted value's 95 % interval
    upper: list[float | None] = field(default_factory=list)
    nominal: float | None = None
    limits: tuple[float, float] | None = None
    outside: list[int] = field(default_factory=list)  # record indices whose check failed
    trend: Trend | None = None

    def add(self, index: int, utc: str, hours: float, value: float, interval: Any = None) -> None:
        self.indices.append(index)
        self.utc.append(utc)
        self.hours.append(hours)
        self.values.append(value)
        lo, hi = interval if isinstance(interval, (list, tuple)) and len(interval) == 2 else (None, None)
        self.lower.append(lo)
        self.upper.append(hi)


@dataclass
class DriftSummary:
    store: str
    records: int
    compared: int
    first_utc: str | None
    last_utc: str | None
    span_h: float
    method: str
    series: list[Series]
    failed_records: list[int]
    notes: list[str]

    def to_dict(self) -> dict[str, Any]:
        out = asdict(self)
        for s, d in zip(self.series, out["series"]):
            if s.trend is not None:
                d["trend"]["significant"] = s.trend.significant
        return _finite(out)

    def to_json(self) -> str:
        return json.dumps(self.to_dict(), indent=2, allow_nan=False)


METHOD = ("ordinary least squares of value against hours since the first record; 95 % interval of the slope "
          "= slope ± t(0.975, n-2)·SE (Student's t, n-2 degrees of freedom)")


def slope_trend(hours: list[float], values: list[float]) -> Trend | None:
    """The trend of one series, or None with fewer than three points or no spread in time."""
    x, y = np.asarray(hours, float), np.asarray(values, float)
    if len(x) < 3 or np.ptp(x) == 0:
        return None
    if np.ptp(y) == 0:  # a constant (e.g. a quantised level): no slope and no scatter, not an undefined one
        return Trend(len(x), 0.0, (0.0, 0.0), 0.0, float(y[0]), 0.0, 1.0, 0.0)
    fit = stats.linregress(x, y)
    half = stats.t.ppf(0.5 + CONFIDENCE / 2, len(x) - 2) * fit.stderr
    return Trend(len(x), float(fit.slope), (float(fit.slope - half), float(fit.slope + half)), float(fit.stderr),
                 float(fit.intercept), float(fit.rvalue), float(fit.pvalue), float(fit.slope * np.ptp(x)))


def _hours_to_limit(series: Series) -> float | None:
    """Hours after the last record at which the trend line reaches the limit it is heading for."""
    trend, limits = series.trend, series.limits
    if trend is None or limits is None or not trend.significant:
        return None
    bound = limits[1] if trend.slope_per_h > 0 else limits[0]
    if not math.isfinite(bound):
        return None
    t_cross = (bound - trend.intercept) / trend.slope_per_h
    return max(0.0, t_cross - series.hours[-1])


@dataclass(frozen=True)
class DriftEntry:
    """One record as the drift reads it (no samples): its stored analysis, when it was taken, its
    stimulus setting as an edge label, and its [dut] table where the tolerances are taken from it."""

    index: int
    utc: str
    analysis: dict[str, Any] | None
    setting: str
    dut: dict[str, Any] | None = None
    serial: str = ""  # the unit's serial when the series are kept apart per unit (a batch), else ""


def store_entries(path: str | Path, last: int | None = None,
                  by_unit: bool = False) -> tuple[list[DriftEntry], list[str], bool]:
    """(entries, the reader's notes, whether the store mixes stimulus settings) of a store's records, or of
    its ``last`` ones; only the last compared record's [dut] is read (it gives the tolerances), and with
    ``by_unit`` each record's unit serial (a batch: one trend per unit, since a slope pooled over units
    would be the spread between them, not a drift)."""
    with open_records(path) as reader:
        analyses = reader.analyses()
        analyses = analyses[-last:] if last else analyses
        settings = {s.index: edge_label(s.edge, s.low_v, s.high_v) for s in reader.index()}
        entries = [DriftEntry(a.index, a.utc, a.analysis, settings.get(a.index, ""),
                              serial=_serial(reader, a.index) if by_unit else "") for a in analyses]
        for k in range(len(entries) - 1, -1, -1):
            if entries[k].analysis:
                entries[k] = replace(entries[k], dut=reader.metadata(entries[k].index).get("dut") or {})
                break
        return entries, list(reader.notes), len(set(settings.values())) > 1


def analyse_store(path: str | Path, last: int | None = None, by_unit: bool = False) -> DriftSummary:
    """Read every record's stored analysis (no samples), or the ``last`` records', and build the series
    and trends (per unit serial with ``by_unit``)."""
    entries, notes, mixed = store_entries(path, last, by_unit)
    return summarise(str(path), entries, notes, mixed_settings=mixed)


def summarise(name: str, entries: list[DriftEntry], notes: list[str], *, mixed_settings: bool | None = None
              ) -> DriftSummary:
    """The series and trends of ``entries`` (one store's, or any group of records: ``acqd fleet drift``).
    ``mixed_settings``: label metrics by their stimulus setting (default: when the entries mix settings).
    A campaign's sweep mixes settings, and a metric such as a step's amplitude belongs to its setting
    (pooled over both edges it would jump between +1 and -1 V); fitted parameters describe the DUT
    whatever the stimulus and stay pooled."""
    notes = list(notes)
    if mixed_settings is None:
        mixed_settings = len({e.setting for e in entries}) > 1
    tolerances = _tolerances(entries)
    times = [_parse_utc(e.utc) for e in entries]
    t0 = min((t for t in times if t is not None), default=None)
    groups: dict[str, dict[str, Series]] = {}
    failed, compared, undated = [], 0, 0
    for entry, when in zip(entries, times):
        analysis = entry.analysis
        if not analysis or ("error" in analysis and "verdict" not in analysis):
            continue
        if when is None:
            undated += 1
            continue
        compared += 1
        hours = (when - t0).total_seconds() / 3600.0
        series = groups.setdefault(entry.serial, {})
        _add_parameters(series, analysis, entry.index, entry.utc, hours)
        label = f" @ {entry.setting}" if mixed_settings else ""
        _add_metrics(series, analysis, entry.index, entry.utc, hours, label)
        _mark_outside(series, analysis, entry.index, label)
        if verdict_text(analysis) == "fail":
            failed.append(entry.index)
    for serial, group in groups.items():
        for s in group.values():
            s.serial = serial
    series = {(s.serial, s.name): s for group in groups.values() for s in group.values()}
    for s in series.values():
        _apply_tolerances(s, tolerances)
        s.trend = slope_trend(s.hours, s.values)
        if s.trend is not None:
            s.trend.hours_to_limit = _hours_to_limit(s)
    if undated:
        notes.append(f"{undated} record(s) have no readable UTC time and were left out")
    if compared < len(entries):
        notes.append(f"{len(entries) - compared} of {len(entries)} record(s) carry no comparator result")
    dated = [t for t in times if t is not None]
    span = (max(dated) - t0).total_seconds() / 3600.0 if dated else 0.0
    ordered = sorted(series.values(), key=lambda s: (s.serial, s.kind != "parameter", s.name))
    return DriftSummary(name, len(entries), compared, _iso(t0), _iso(max(dated) if dated else None), span,
                        METHOD, ordered, failed, notes)


def _serial(reader: Any, index: int) -> str:
    """A record's unit serial (``(no serial)`` for a record that names none)."""
    meta = reader.metadata(index)
    return unit_serial_of(meta.get("settings"), meta.get("dut")) or "(no serial)"


def _parse_utc(text: str) -> datetime | None:
    try:
        moment = datetime.fromisoformat(text)
    except (TypeError, ValueError):
        return None
    return moment if moment.tzinfo is not None else None


def _iso(moment: datetime | None) -> str | None:
    return moment.isoformat() if moment else None


def _add_parameters(series: dict[str, Series], analysis: dict[str, Any], index: int, utc: str, hours: float) -> None:
    fit = analysis.get("fit")
    if not isinstance(fit, dict):
        return
    units = fit.get("units") if isinstance(fit.get("units"), dict) else {}  # stored with the fit, any model
    for name in fit.get("fitted") or []:
        value = (fit.get("values") or {}).get(name)
        if not _number(value):
            continue
        s = series.setdefault(name, Series(name, "parameter", str(units.get(name, ""))))
        s.nominal = (fit.get("nominal") or {}).get(name, s.nominal)
        s.add(index, utc, hours, float(value), (fit.get("ci95") or {}).get(name))


def _metric_name(channel: str, metric: str, label: str) -> str:
    return f"{channel}.{metric}{label}"


def _add_metrics(series: dict[str, Series], analysis: dict[str, Any], index: int, utc: str, hours: float,
                 label: str) -> None:
    for channel in analysis.get("channels") or []:
        name = channel.get("channel")
        values = {"nrmse": (channel.get("nrmse"), "")}
        measured = channel.get("measured") or {}
        values.update({key: (measured.get(key), unit or channel.get("unit", "")) for key, unit in STEP_METRICS.items()})
        for key, (value, unit) in values.items():
            if _number(value):
                metric = _metric_name(name, key, label)
                series.setdefault(metric, Series(metric, "metric", unit)).add(index, utc, hours, float(value))


def _mark_outside(series: dict[str, Series], analysis: dict[str, Any], index: int, label: str) -> None:
    for check in analysis.get("checks") or []:
        if check.get("passed"):
            continue
        kind, subject = check.get("check"), check.get("subject")
        name = subject if kind == "parameter" else _metric_name(subject, CHECK_SERIES.get(kind, kind), label)
        if name in series:
            series[name].outside.append(index)


def _tolerances(entries: list[DriftEntry]) -> Any:
    """The comparator's tolerances from the last compared record's [dut] table, or None."""
    for entry in reversed(entries):
        if entry.analysis:
            dut = entry.dut or {}
            if "model" not in dut:
                return None
            try:
                return parse_dut_table(dut, f"record {entry.index} [dut]").tolerances
            except AcqdError:
                return None
    return None


def _apply_tolerances(s: Series, tolerances: Any) -> None:
    """Limits for the plots and the time-to-limit projection, from the same table the verdicts used."""
    if tolerances is None:
        return
    if s.kind == "parameter" and s.nominal:
        pct = tolerances.parameter_pct.get(s.name, tolerances.parameter_pct.get("*"))
        if pct is not None:
            s.limits = (s.nominal * (1 - pct / 100), s.nominal * (1 + pct / 100))
        return
    channel, _, metric = s.name.partition(" @ ")[0].partition(".")
    limits = tolerances.for_channel(channel)
    if metric == "nrmse" and limits.nrmse_max is not None:
        s.limits = (-math.inf, limits.nrmse_max)
    elif metric == "overshoot_pct" and limits.overshoot_pct is not None:
        s.limits = tuple(limits.overshoot_pct)
    elif metric == "settling_duration_s" and limits.settling_s_max is not None:
        s.limits = (-math.inf, limits.settling_s_max)


def _number(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)


def _finite(value: Any) -> Any:
    """JSON has no infinity: an open-ended limit is written as null."""
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, dict):
        return {k: _finite(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_finite(v) for v in value]
    return value


def drift_table(summary: DriftSummary) -> Table:
    """The series as a person reads them: symbols and SI-prefixed units (``C``, ``102.6 nF``), keys stay in JSON."""
    table = Table(title=f"{summary.store}: {summary.compared} compared record(s) over {summary.span_h:.3g} h",
                  show_edge=False, header_style="bold")
    for column in ("series", "n", "first", "last", "slope per h", "95 % interval of the slope", "drift?", "outside"):
        table.add_column(column, justify="right" if column in ("n", "outside") else "left")
    for s in summary.series:
        t = s.trend
        table.add_row(Text(f"{s.serial} {series_label(s.name)}" if s.serial else series_label(s.name)), str(len(s.values)), si(s.values[0], s.unit, 5),
                      si(s.values[-1], s.unit, 5), per_hour(t.slope_per_h, s.unit) if t else "-",
                      " … ".join(per_hour(v, s.unit) for v in t.ci95) if t else "-",
                      Text("yes", style="yellow") if t and t.significant else ("no" if t else "-"),
                      str(len(s.outside)))
    return table


def per_hour(value: float, unit: str) -> str:
    """A rate with its prefix on the unit it changes: ``1.059 µF/h``, ``-0.1512/h``, ``-16.06 %/h``."""
    if unit_symbol(unit) in UNPREFIXED:
        return f"{si(value, unit, 4)}/h"
    return si(value, f"{unit_symbol(unit)}/h", 4)


def series_label(name: str) -> str:
    """``c_f`` → ``C``; ``v_c.overshoot_pct @ rising 0 V → 1 V`` → ``v_c overshoot @ rising 0 V → 1 V``."""
    key, at, setting = name.partition(" @ ")
    channel, dot, metric = key.rpartition(".")
    shown = f"{channel} {label(metric)}" if dot else label(key)
    return shown + (f" @ {setting}" if at else "")


def write_outputs(summary: DriftSummary, out_dir: str | Path) -> list[Path]:
    """drift.json and one PNG per fitted parameter (per metric when nothing was fitted)."""
    from ..report import parameter_vs_time_figure

    out = Path(out_dir)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise ConfigError(str(out), "", f"cannot be created ({exc.strerror})") from None
    written = [out / "drift.json"]
    written[0].write_text(summary.to_json() + "\n", encoding="utf-8")
    plotted = [s for s in summary.series if s.kind == "parameter"] or summary.series
    for s in plotted:
        times = [datetime.fromisoformat(u) for u in s.utc]
        intervals = all(v is not None for v in s.lower + s.upper)
        limits = tuple(b for b in s.limits if math.isfinite(b)) if s.limits else None
        trend = s.trend
        fig = parameter_vs_time_figure(
            times, s.values, s.name, s.unit, s.nominal, s.lower if intervals else None,
            s.upper if intervals else None, limits,
            trend=None if trend is None else [trend.intercept + trend.slope_per_h * h for h in s.hours],
            trend_label="" if trend is None else
            f"trend {per_hour(trend.slope_per_h, s.unit)} (95 %: {per_hour(trend.ci95[0], s.unit)} … "
            f"{per_hour(trend.ci95[1], s.unit)})")
        stem = f"{s.serial}-{s.name}" if s.serial else s.name
        path = out / f"drift-{re.sub(r'[^A-Za-z0-9._-]', '_', stem)}.png"
        fig.savefig(path, dpi=100)
        written.append(path)
    return written
