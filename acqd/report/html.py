"""The run report: one self-contained ``index.html`` (figures embedded as PNG data) for a set of records.

Self-contained so it can be mailed, archived beside the store, or opened from a file browser with no
server. Each record gets a summary row and a section with its figures; when parameters were fitted, a
parameter-vs-time plot per parameter shows drift across the records.
"""

from __future__ import annotations

import base64
import html
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from typing import Protocol

from matplotlib.figure import Figure

from ..compare import CompareResult, CompareSpec, compare_spec, parse_dut_table
from ..errors import AcqdError
from ..record import Record
from .figures import channel_figure, parameter_vs_time_figure, png_bytes, trajectory_figure


class RecordSource(Protocol):
    """What the report reads: the store's reader (``acqd.store.open_records``) or any stand-in."""

    def read(self, index: int) -> Record: ...


@dataclass
class _Entry:
    number: int
    record: Record
    result: CompareResult | None
    problem: str  # why there is no comparison, when there is none


def spec_from_record(record: Record) -> CompareSpec | None:
    """The comparator table the record was captured with (its profile's [dut]), if it names a model."""
    if "model" not in (record.dut or {}):
        return None
    return parse_dut_table(record.dut, f"record {record.index}")


def _img(fig: Figure | None, alt: str) -> str:
    if fig is None:
        return ""
    data = base64.b64encode(png_bytes(fig)).decode("ascii")
    return f'<img alt="{html.escape(alt)}" src="data:image/png;base64,{data}">'


def _pair(measured: object, simulated: object, attr: str) -> str:
    """'measured / simulated' of one step parameter, with – where a trace has none."""
    values = (getattr(step, attr) if step is not None else None for step in (measured, simulated))
    return " / ".join("–" if v is None else f"{v:.4g}" for v in values)


def _summary_row(entry: _Entry) -> str:
    rec, res = entry.record, entry.result
    cells = [str(rec.index if rec.index is not None else entry.number), html.escape(rec.utc or "–")]
    if res is None:
        cells += ["–", "no comparison", html.escape(entry.problem), "–"]
    else:
        worst = max(res.channels, key=lambda c: c.nrmse)
        fitted = ", ".join(f"{n} = {v:.4g}" for n, v in (res.fit.values.items() if res.fit else []))
        cells += [html.escape(res.model), f'<span class="{res.verdict.status}">{res.verdict.status.upper()}</span>',
                  html.escape(f"{worst.channel}: {100 * worst.nrmse:.2f} %"), html.escape(fitted or "–")]
    return "<tr>" + "".join(f"<td>{c}</td>" for c in cells) + "</tr>"


def _channel_table(res: CompareResult) -> str:
    head = ("<tr><th>channel</th><th>signal</th><th>NRMSE</th><th>max |error|</th><th>overshoot % meas / sim</th>"
            "<th>transition s meas / sim</th><th>settling s meas / sim</th><th>ringing Hz meas / sim</th></tr>")
    rows = []
    for ch in res.channels:
        cells = (ch.channel, ch.signal, f"{100 * ch.nrmse:.3f} %",
                 f"{ch.max_abs_error:.4g} {ch.unit} at {ch.max_abs_error_time_s:.4g} s",
                 *(_pair(ch.measured, ch.simulated, attr) for attr in
                   ("overshoot_pct", "transition_duration_s", "settling_duration_s", "damped_frequency_hz")))
        rows.append("<tr>" + "".join(f"<td>{html.escape(c)}</td>" for c in cells) + "</tr>")
    return f"<table>{head}{''.join(rows)}</table>"


def _fit_table(res: CompareResult) -> str:
    if res.fit is None:
        return ""
    fit = res.fit
    rows = []
    for name in fit.fitted:
        unit = fit.units[name]
        lo, hi = fit.ci95[name]
        rows.append(f"<tr><td>{name}</td><td>{fit.values[name]:.5g} {unit}</td>"
                    f"<td>±{fit.standard_errors[name]:.3g}</td><td>{lo:.5g} … {hi:.5g}</td>"
                    f"<td>{fit.nominal[name]:.5g}</td></tr>")
    held = "".join(f"<li><b>{html.escape(n)}</b> held fixed: {html.escape(r)}</li>" for n, r in fit.held_fixed.items())
    return (f"<h4>Fit ({html.escape(fit.weighting)} weighting, residual scale {fit.residual_scale:.3g}, "
            f"condition number {fit.condition_number:.3g})</h4><table><tr><th>parameter</th><th>fitted</th>"
            f"<th>standard error</th><th>95 % interval</th><th>nominal</th></tr>{''.join(rows)}</table>"
            + (f"<ul>{held}</ul>" if held else ""))


def _section(entry: _Entry) -> str:
    rec, res = entry.record, entry.result
    label = f"Record {rec.index if rec.index is not None else entry.number}"
    head = f'<section id="r{entry.number}"><h3>{label} — {html.escape(rec.utc or "no timestamp")}</h3>'
    if res is None:
        return f"{head}<p>No comparison: {html.escape(entry.problem)}</p></section>"
    reasons = "".join(f"<li>{html.escape(r)}</li>" for r in res.verdict.reasons)
    warnings = "".join(f"<li>{html.escape(w)}</li>" for w in res.warnings)
    stim = res.stimulus
    return (f"{head}<p>Verdict: <span class=\"{res.verdict.status}\">{res.verdict.status.upper()}</span>"
            f"; EMF {stim['before_v']:g} → {stim['after_v']:g} V, timing {html.escape(stim['timing'])}.</p>"
            + (f"<ul class=\"fail\">{reasons}</ul>" if reasons else "")
            + (f"<p>Warnings:</p><ul>{warnings}</ul>" if warnings else "")
            + _channel_table(res) + _fit_table(res)
            + _img(channel_figure(res), f"{label}: measured and simulated channels")
            + _img(trajectory_figure(res), f"{label}: state trajectory") + "</section>")


def _when(entry: _Entry) -> datetime | int:
    try:
        return datetime.fromisoformat(entry.record.utc)
    except (TypeError, ValueError):
        return entry.number


def _drift(entries: list[_Entry]) -> str:
    fitted = [e for e in entries if e.result is not None and e.result.fit is not None]
    if len(fitted) < 2:
        return ""
    when = [_when(e) for e in fitted]
    if len({type(w) for w in when}) > 1:
        when = [e.number for e in fitted]
    names = sorted({n for e in fitted for n in e.result.fit.fitted})
    parts = ["<h2>Fitted parameters over time</h2>"]
    for name in names:
        rows = [(w, e.result.fit) for w, e in zip(when, fitted) if name in e.result.fit.fitted]
        fig = parameter_vs_time_figure([w for w, _ in rows], [f.values[name] for _, f in rows], name,
                                       rows[0][1].units[name], rows[0][1].nominal[name],
                                       [f.ci95[name][0] for _, f in rows], [f.ci95[name][1] for _, f in rows])
        parts.append(_img(fig, f"{name} over time"))
    return "".join(parts)


_STYLE = """body{font-family:sans-serif;margin:1.5em;max-width:1100px}table{border-collapse:collapse;margin:.5em 0}
td,th{border:1px solid #bbb;padding:.2em .5em;font-size:90%;text-align:left}img{max-width:100%;display:block}
.pass{color:#070;font-weight:bold}.fail{color:#b00;font-weight:bold}.untested{color:#666}"""


def write_report(source: RecordSource, out_dir: str | Path, spec_for: Callable[[Record], CompareSpec | None],
                 title: str, numbers: Sequence[int]) -> Path:
    """Compare records ``numbers`` (``spec_for`` picks each one's spec; None = not comparable) and write
    ``index.html``. A record that cannot be compared is listed with the reason instead of stopping the report.
    """
    entries = []
    for i in numbers:
        record = source.read(i)
        try:
            spec = spec_for(record)
            result = compare_spec(record, spec) if spec is not None else None
            problem = "" if spec is not None else "its [dut] table names no model and no --profile was given"
        except AcqdError as exc:
            result, problem = None, str(exc)
        entries.append(_Entry(i, record, result, problem))
    counts = {s: sum(1 for e in entries if e.result and e.result.verdict.status == s) for s in ("pass", "fail")}
    summary = ("<table><tr><th>record</th><th>UTC</th><th>model</th><th>verdict</th><th>worst NRMSE</th>"
               "<th>fitted</th></tr>" + "".join(_summary_row(e) for e in entries) + "</table>")
    body = (f"<h1>{html.escape(title)}</h1><p>{len(entries)} records: {counts['pass']} pass, {counts['fail']} fail. "
            "NRMSE is the RMS error over the simulated trace's peak-to-peak range.</p>"
            f"<h2>Summary</h2>{summary}{_drift(entries)}<h2>Records</h2>" + "".join(_section(e) for e in entries))
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    path = out / "index.html"
    path.write_text(f"<!DOCTYPE html><html><head><meta charset=\"utf-8\"><title>{html.escape(title)}</title>"
                    f"<style>{_STYLE}</style></head><body>{body}</body></html>", encoding="utf-8")
    return path
