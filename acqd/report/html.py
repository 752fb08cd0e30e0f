"""The run report: one self-contained HTML page for a set of stored records, small enough to mail.

The page shows the comparison stored with each record (``Record.analysis``, made when the record was
taken); comparing again is the caller's explicit choice (``recompute``), because a fit per record made a
night's report take minutes. Every record gets one row with a thumbnail of its output channel (an inline
SVG of the min/max envelope, about 1 kB) instead of full figures; the failed records (the first
``MAX_FULL``) and the ones asked for get full figures, the model simulated once with the stored parameters
(``acqd.compare.stored_traces``). Self-contained (images as data: URIs) so it can be mailed, archived
beside the store, or opened from a file browser with no server.

The head of the page says what was tested and how: the DUT's name and serial, the stimulus, the
instruments' identities, the acqd versions that took the records and made the page, and when it was made.
"""

from __future__ import annotations

import base64
import html
import json
import os
from collections import Counter
from collections.abc import Callable, Collection, Iterable, Sequence
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Protocol

import numpy as np
from matplotlib.figure import Figure

from .. import __version__
from ..compare import CompareSpec, Traces, compare_spec, parse_dut_table, stored_traces
from ..display import edge_label, label, si, stimulus_text, unit_symbol
from ..errors import AcqdError, ConfigError
from ..record import Record
from ..units import summarise_units
from .figures import channel_figure, parameter_vs_time_figure, png_bytes, trajectory_figure

MAX_FULL = 12  # failed records drawn in full unless asked for by number: a night of failures stays mailable
THUMB_BUCKETS = 80  # min/max pairs in a thumbnail: the ringing's envelope survives, the noise does not
THUMB_SIZE = (160, 36)  # px
VERDICTS = ("pass", "fail", "untested")
NOT_COMPARED = "not compared"


class RecordSource(Protocol):
    """What the report reads: the store's reader (``acqd.store.open_records``) or any stand-in."""

    def read(self, index: int) -> Record: ...


SpecFor = Callable[[Record], "CompareSpec | None"]


@dataclass
class _Entry:
    """One record as the page shows it; its samples are dropped once its thumbnail and figures are made."""

    index: int
    utc: str
    edge: str
    dut: str
    stimulus: str
    identities: tuple[tuple[str, str], ...]
    version: str
    analysis: dict[str, Any] | None
    problem: str  # why there is no comparison, when there is none
    thumbnail: str = ""
    figures: str = ""  # the full figures' HTML, for the records drawn in full
    limits: dict[str, tuple[float, float]] = field(default_factory=dict)  # fitted parameter → tolerance band
    serial: str = ""  # the unit's serial (a batch's, else the [dut] table's)
    path: str = ""  # the switch channels that connected it, in a batch
    dut_table: dict[str, Any] = field(default_factory=dict)  # the record's [dut], for the batch's tolerances

    @property
    def verdict(self) -> str:
        return self.analysis["verdict"] if self.analysis else NOT_COMPARED


@dataclass(frozen=True)
class Written:
    """What ``write_report`` made: the page, its size, the verdict counts and the records drawn in full."""

    path: Path
    size_bytes: int
    counts: dict[str, int]
    full: tuple[int, ...]


def spec_from_record(record: Record) -> CompareSpec | None:
    """The comparator table the record was captured with (its profile's [dut]), if it names a model."""
    if "model" not in (record.dut or {}):
        return None
    return parse_dut_table(record.dut, f"record {record.index}")


# -- one record ----------------------------------------------------------------------------------------
def _dut_text(dut: dict[str, Any] | None) -> str:
    dut = dut or {}
    parts = [str(dut["name"]) if dut.get("name") else "(no DUT name)", f"serial {dut['serial']}" if dut.get("serial")
             else "(no serial)"]
    return ", ".join(parts)


def thumbnail(record: Record) -> str:
    """An inline SVG of the record's output channel (the last scope input, as ``acqd run`` prints it): the
    minimum and maximum of each of ``THUMB_BUCKETS`` stretches, so a 15,000-sample trace is 160 points."""
    captured = [c for c in record.channels if c.source.upper().startswith("CH")] or record.channels
    channel = captured[-1]
    samples = np.asarray(channel.samples, dtype=float)
    buckets = np.array_split(samples, min(THUMB_BUCKETS, len(samples)))
    envelope = np.ravel([(b.min(), b.max()) for b in buckets])
    width, height = THUMB_SIZE
    lo, hi = float(envelope.min()), float(envelope.max())
    span = (hi - lo) or 1.0
    xs = np.linspace(0, width, len(envelope))
    ys = (height - 2) - (envelope - lo) / span * (height - 4)
    points = " ".join(f"{x:.0f},{y:.0f}" for x, y in zip(xs, ys))
    title = f"{channel.name} [{channel.unit}]: {si(lo, channel.unit, 3)} … {si(hi, channel.unit, 3)}"
    return (f'<svg class="thumb" width="{width}" height="{height}" viewBox="0 0 {width} {height}" role="img">'
            f"<title>{html.escape(title)}</title>"
            f'<polyline fill="none" stroke="#1f5fa8" stroke-width="1" points="{points}"/></svg>')


def _parameter_limits(spec: CompareSpec | None, fit: dict[str, Any] | None) -> dict[str, tuple[float, float]]:
    """Each fitted parameter's tolerance band, nominal × (1 ± p/100), from the table's ``parameter_pct``."""
    if spec is None or not fit:
        return {}
    pct = spec.tolerances.parameter_pct
    out = {}
    for name in fit["fitted"]:
        limit = pct.get(name, pct.get("*"))
        nominal = fit["nominal"].get(name)
        if limit is not None and nominal is not None:
            out[name] = (nominal * (1 - limit / 100), nominal * (1 + limit / 100))
    return out


def _img(fig: Figure | None, alt: str) -> str:
    if fig is None:
        return ""
    data = base64.b64encode(png_bytes(fig, dpi=80)).decode("ascii")
    return f'<img alt="{html.escape(alt)}" src="data:image/png;base64,{data}">'


class _Specs:
    """Each record's own [dut] table parsed once per distinct table (a campaign's records share one)."""

    def __init__(self) -> None:
        self._parsed: dict[str, tuple[CompareSpec | None, str]] = {}

    def of(self, record: Record) -> tuple[CompareSpec | None, str]:
        """(the spec, or None with why not)."""
        key = json.dumps(record.dut or {}, sort_keys=True, default=str)
        if key not in self._parsed:
            try:
                spec = spec_from_record(record)
                self._parsed[key] = (spec, "" if spec else "its [dut] table names no model")
            except AcqdError as exc:
                self._parsed[key] = (None, str(exc))
        return self._parsed[key]


def _stored(record: Record, why_not: str) -> tuple[dict[str, Any] | None, str]:
    """(the comparison stored with the record, or None with why there is none)."""
    stored = record.analysis
    if stored and "channels" in stored:
        return stored, ""
    return None, f"not compared when stored: {(stored or {}).get('error') or why_not or 'no comparison was kept'}"


def _compared(record: Record, recompute: SpecFor) -> tuple[CompareSpec | None, dict[str, Any] | None, str, Any]:
    """(spec, analysis, why there is none, traces): the record compared again."""
    try:
        spec = recompute(record)
        if spec is None:
            return None, None, "its [dut] table names no model and no profile was given", None
        result = compare_spec(record, spec)
    except AcqdError as exc:
        return None, None, str(exc), None
    return spec, result.to_dict(), "", result.traces


def _full_figures(record: Record, analysis: dict[str, Any], traces: Traces | None, spec: CompareSpec | None,
                  why_not: str) -> str:
    """The channel and trajectory figures; a stored analysis is simulated once more for them."""
    if traces is None:
        try:
            if spec is None:
                raise ConfigError(f"record {record.index}", "dut", why_not or "no model to simulate")
            traces = stored_traces(record, spec, analysis)
        except AcqdError as exc:
            return f"<p>Figures not drawn: {html.escape(str(exc))}.</p>"
    name = f"Record {record.index}"
    return (_img(channel_figure(traces, analysis), f"{name}: measured and simulated channels")
            + _img(trajectory_figure(traces), f"{name}: state trajectory"))


class _FullChoice:
    """Which records are drawn in full: those asked for, and the first ``MAX_FULL`` failed ones."""

    def __init__(self, asked: Collection[int]) -> None:
        self.asked, self.failed = set(asked), 0

    def __call__(self, index: int, verdict: str) -> bool:
        if index in self.asked:
            return True
        if verdict == "fail" and self.failed < MAX_FULL:
            self.failed += 1
            return True
        return False


def _entry(index: int, record: Record, recompute: SpecFor | None, specs: _Specs, full: _FullChoice) -> _Entry:
    if recompute is None:
        spec, why_not = specs.of(record)
        analysis, problem = _stored(record, why_not)
        traces = None
    else:
        spec, analysis, problem, traces = _compared(record, recompute)
        why_not = problem
    stim = record.stimulus
    entry = _Entry(index, record.utc or "", edge_label(stim.edge, stim.low_v, stim.high_v), _dut_text(record.dut),
                   stimulus_text(_stimulus_dict(record)), tuple(sorted((record.identities or {}).items())),
                   record.acqd_version or "?", analysis, problem, thumbnail(record),
                   serial=record.unit_serial or "", path=record.switch_path or "", dut_table=dict(record.dut or {}))
    if analysis:
        entry.limits = _parameter_limits(spec, analysis.get("fit"))
        if full(index, entry.verdict):
            entry.figures = _full_figures(record, analysis, traces, spec, why_not)
    return entry


def _stimulus_dict(record: Record) -> dict[str, Any]:
    s = record.stimulus
    return {"shape": s.shape, "frequency_hz": s.frequency_hz, "edge": s.edge, "low_v": s.low_v, "high_v": s.high_v,
            "load": s.load, "source_resistance_ohm": s.source_resistance_ohm, "edge_time_s": s.edge_time_s}


# -- the page ------------------------------------------------------------------------------------------
def _distinct(values: Iterable[str], total: int) -> str:
    """``a`` when every record has it; ``a (12 records); b (4 records)`` otherwise."""
    counts = Counter(values)
    if len(counts) == 1:
        return html.escape(next(iter(counts)))
    return "; ".join(f"{html.escape(v)} ({n} of {total} records)" for v, n in counts.most_common())


def _head(entries: list[_Entry], store: str, made: str, how: str) -> str:
    total = len(entries)
    instruments = _distinct(("; ".join(f"{role} {idn}" for role, idn in e.identities) or "(none recorded)"
                             for e in entries), total)
    times = sorted(e.utc for e in entries if e.utc)
    span = f"{_utc(times[0])} … {_utc(times[-1])} UTC" if times else "–"
    rows = [("DUT", _distinct((e.dut for e in entries), total)), ("stimulus", _distinct((e.stimulus for e in entries), total)),
            ("instruments", instruments), ("records", f"{total} from {html.escape(store)}, taken {span}"),
            ("analysis", html.escape(how)),
            ("made", f"{made} by acqd {html.escape(__version__)}; records taken by acqd "
                     + _distinct((e.version for e in entries), total))]
    return '<table class="head">' + "".join(f"<tr><th>{k}</th><td>{v}</td></tr>" for k, v in rows) + "</table>"


def _utc(iso: str) -> str:
    return iso[:19].replace("T", " ")


def _counts(entries: list[_Entry]) -> dict[str, int]:
    counts = Counter(e.verdict for e in entries)
    return {v: counts.get(v, 0) for v in (*VERDICTS, NOT_COMPARED)}


def _verdict_span(verdict: str) -> str:
    css = verdict.replace(" ", "-")
    return f'<span class="{css}">{html.escape(verdict.upper() if verdict == "fail" else verdict)}</span>'


def _fitted_names(entries: list[_Entry]) -> list[str]:
    names: list[str] = []
    for e in entries:
        for name in ((e.analysis or {}).get("fit") or {}).get("fitted", []):
            if name not in names:
                names.append(name)
    return names


def _fit_cell(fit: dict[str, Any] | None, name: str) -> str:
    if not fit or name not in fit.get("values", {}):
        return "–"
    return html.escape(si(fit["values"][name], unit_symbol(fit.get("units", {}).get(name, ""))))


def _summary(entries: list[_Entry]) -> str:
    names = _fitted_names(entries)
    head = "".join(f"<th>{h}</th>" for h in ("record", "UTC", "edge", "verdict", "worst NRMSE",
                                              *(html.escape(label(n)) for n in names), "output channel"))
    rows = []
    for e in entries:
        number = f'<a href="#r{e.index}">{e.index}</a>' if e.figures else str(e.index)
        if e.analysis:
            worst = max(e.analysis["channels"], key=lambda c: -1.0 if c.get("nrmse") is None else c["nrmse"])
            nrmse = "–" if worst.get("nrmse") is None else f"{worst['channel']}: {si(100 * worst['nrmse'], '%', 3)}"
            cells = [html.escape(nrmse), *(_fit_cell(e.analysis.get("fit"), n) for n in names)]
        else:
            cells = [f'<span class="note">{html.escape(e.problem)}</span>', *("–" for _ in names)]
        rows.append(f"<tr><td>{number}</td><td>{html.escape(_utc(e.utc))}</td><td>{html.escape(e.edge)}</td>"
                    f"<td>{_verdict_span(e.verdict)}</td>" + "".join(f"<td>{c}</td>" for c in cells)
                    + f"<td>{e.thumbnail}</td></tr>")
    return f"<table><tr>{head}</tr>{''.join(rows)}</table>"


def _units(entries: list[_Entry]) -> str:
    """A batch (records of more than one unit): each unit's verdict and fitted values over its records,
    and each fitted parameter's spread over the units against its tolerance (``acqd.units``)."""
    grouped: dict[str, list[_Entry]] = {}
    for e in entries:
        grouped.setdefault(e.serial or "(no serial)", []).append(e)
    if len(grouped) < 2:
        return ""
    summaries, spreads = summarise_units(((serial, [e.analysis for e in group if e.analysis], [])
                                          for serial, group in grouped.items()), entries[-1].dut_table)
    names = [sp.parameter for sp in spreads]
    unit_of = {sp.parameter: unit_symbol(sp.unit) for sp in spreads}
    head = "".join(f"<th>{h}</th>" for h in ("unit", "switch path", "records", "verdict",
                                              *(html.escape(label(n)) for n in names), "reasons"))
    rows = []
    for u in summaries:
        group = grouped[u.serial]
        paths = " ".join(dict.fromkeys(e.path for e in group if e.path)) or "–"
        cells = [html.escape(u.serial), html.escape(paths), str(len(group)),
                 _verdict_span(NOT_COMPARED if u.verdict == "skipped" else u.verdict),
                 *(html.escape(si(u.fitted[n], unit_of[n])) if n in u.fitted else "–" for n in names),
                 f'<span class="note">{html.escape(u.reason)}</span>' if u.reason else ""]
        rows.append("<tr>" + "".join(f"<td>{c}</td>" for c in cells) + "</tr>")
    spread_rows = "".join(
        f"<li>{html.escape(label(sp.parameter))}: nominal {html.escape(si(sp.nominal, unit_of[sp.parameter]))}, "
        f"{html.escape(si(sp.minimum, unit_of[sp.parameter]))} – {html.escape(si(sp.maximum, unit_of[sp.parameter]))}, "
        f"worst {sp.worst_deviation_pct:.2g} % off nominal"
        + (f"; tolerance ±{sp.tolerance_pct:g} %" if sp.tolerance_pct is not None else "") + "</li>"
        for sp in spreads)
    passing = sum(u.verdict == "pass" for u in summaries)
    return (f"<h2>Units</h2><p>{passing} of {len(summaries)} unit(s) pass; fitted values are each unit's mean "
            f"over its records.</p><table><tr>{head}</tr>{''.join(rows)}</table><ul>{spread_rows}</ul>")


def _when(entries: list[_Entry]) -> list[datetime] | list[int]:
    try:
        return [datetime.fromisoformat(e.utc) for e in entries]
    except ValueError:
        return [e.index for e in entries]


def _drift(entries: list[_Entry]) -> str:
    """One plot per fitted parameter over the records' times, with intervals, nominal and tolerance band."""
    fitted = [e for e in entries if e.analysis and e.analysis.get("fit")]
    if len(fitted) < 2:
        return ""
    parts = ["<h2>Fitted parameters over time</h2>"]
    for name in _fitted_names(fitted):
        rows = [e for e in fitted if name in e.analysis["fit"]["fitted"]]
        fits = [e.analysis["fit"] for e in rows]
        lower, upper = ([f["ci95"][name][k] for f in fits] for k in (0, 1))
        intervals = all(v is not None for v in lower + upper)
        limits = next((e.limits[name] for e in rows if name in e.limits), None)
        fig = parameter_vs_time_figure(_when(rows), [f["values"][name] for f in fits], name,
                                       fits[0].get("units", {}).get(name, ""), fits[0]["nominal"].get(name),
                                       lower if intervals else None, upper if intervals else None, limits)
        parts.append(_img(fig, f"{label(name)} over time"))
    return "".join(parts)


def _channel_table(analysis: dict[str, Any]) -> str:
    """The comparison of each channel in SI units: NRMSE, the largest error, IEEE 181 step parameters."""
    steps = (("overshoot", "overshoot_pct", "%"), ("transition", "transition_duration_s", "s"),
             ("settling time", "settling_duration_s", "s"), ("ringing", "damped_frequency_hz", "Hz"))
    head = "".join(f"<th>{h}</th>" for h in ("channel", "model signal", "NRMSE", "max |error|",
                                              *(f"{name} measured / simulated" for name, _, _ in steps)))
    rows = []
    for ch in analysis["channels"]:
        def pair(key: str, unit: str) -> str:
            values = ((ch.get(side) or {}).get(key) for side in ("measured", "simulated"))
            return " / ".join("–" if v is None else si(v, unit) for v in values)
        error = ("–" if ch.get("max_abs_error") is None else
                 f"{si(ch['max_abs_error'], ch['unit'], 3)} at {si(ch['max_abs_error_time_s'], 's', 3)}")
        nrmse = "–" if ch.get("nrmse") is None else si(100 * ch["nrmse"], "%", 3)
        cells = (ch["channel"], ch["signal"], nrmse, error, *(pair(key, unit) for _, key, unit in steps))
        rows.append("<tr>" + "".join(f"<td>{html.escape(c)}</td>" for c in cells) + "</tr>")
    return f"<table><tr>{head}</tr>{''.join(rows)}</table>"


def _fit_list(fit: dict[str, Any] | None) -> str:
    if not fit:
        return ""
    items = []
    for name in fit["fitted"]:
        unit = unit_symbol(fit.get("units", {}).get(name, ""))
        lo, hi = fit["ci95"][name]
        interval = "" if lo is None or hi is None else f" (95 %: {si(lo, unit)} … {si(hi, unit)})"
        items.append(f"{label(name)} = {si(fit['values'][name], unit)} ± {si(fit['standard_errors'][name], unit, 2)}"
                     f"{interval}; nominal {si(fit['nominal'][name], unit, trim=True)}")
    items += [f"{label(n)} held fixed: {why}" for n, why in (fit.get("held_fixed") or {}).items()]
    return "<p>Fit:</p><ul>" + "".join(f"<li>{html.escape(i)}</li>" for i in items) + "</ul>"


def _section(e: _Entry) -> str:
    a = e.analysis or {}
    reasons = "".join(f"<li>{html.escape(r)}</li>" for r in a.get("reasons") or [])
    warnings = "".join(f"<li>{html.escape(w)}</li>" for w in a.get("warnings") or [])
    return (f'<section id="r{e.index}"><h3>Record {e.index} — {html.escape(_utc(e.utc))} UTC, '
            f"{html.escape(e.edge)}: {_verdict_span(e.verdict)}</h3>"
            + (f'<ul class="reasons">{reasons}</ul>' if reasons else "")
            + (f"<p>Warnings:</p><ul>{warnings}</ul>" if warnings else "")
            + _channel_table(a) + _fit_list(a.get("fit")) + e.figures + "</section>")


_STYLE = """body{font-family:sans-serif;margin:1.5em;max-width:1200px}table{border-collapse:collapse;margin:.5em 0}
td,th{border:1px solid #bbb;padding:.2em .5em;font-size:90%;text-align:left;vertical-align:middle}
table.head th{background:#f3f3f3}img{max-width:100%;display:block;margin:.5em 0}svg.thumb{display:block}
.pass{color:#070;font-weight:bold}.fail{color:#b00;font-weight:bold}.untested,.not-compared,.note{color:#666}
ul.reasons{color:#b00}"""


def write_report(source: RecordSource, out: str | Path, numbers: Sequence[int], store: str, *,
                 recompute: SpecFor | None = None, full: Collection[int] = (),
                 progress: Callable[[], None] | None = None) -> Written:
    """Write the report of records ``numbers`` of ``source`` (named ``store`` on the page) to the HTML
    file ``out``, whole or not at all (written beside it, then renamed).

    The stored comparison of each record is shown; ``recompute`` (a record → the spec to compare it
    with, or None when it has none) compares every record again instead. Records in ``full`` and the
    first ``MAX_FULL`` failed ones get full figures. ``progress`` is called once per record read.
    """
    specs, entries, choice = _Specs(), [], _FullChoice(full)
    for index in numbers:
        entries.append(_entry(index, source.read(index), recompute, specs, choice))
        if progress is not None:
            progress()
    made = datetime.now(timezone.utc).strftime("%Y-%m-%d %H:%M:%S UTC")
    how = ("compared again by this report" if recompute is not None
           else "the comparison stored with each record when it was taken")
    counts = _counts(entries)
    shown = [e for e in entries if e.figures]
    failed = counts["fail"]
    left_out = failed - sum(1 for e in shown if e.verdict == "fail")
    duts = {e.dut for e in entries}
    title = f"Run report: {duts.pop() if len(duts) == 1 else store}"
    body = (f"<h1>{html.escape(title)}</h1>{_head(entries, store, made, how)}"
            f'<p class="counts">{len(entries)} records: ' + ", ".join(f"{n} {v}" for v, n in counts.items()) + ".</p>"
            "<p>NRMSE is the RMS error over the simulated trace's peak-to-peak range. The thumbnail is the output "
            "channel's envelope over the record.</p>"
            f"{_units(entries)}{_drift(entries)}<h2>Records</h2>{_summary(entries)}"
            + (f"<h2>Records in full</h2><p>The failed records and those asked for ({len(shown)})"
               + (f"; {left_out} more failed record(s) not drawn in full (acqd report --full LIST draws them)" if left_out else "")
               + ".</p>" + "".join(_section(e) for e in shown) if shown or left_out else ""))
    page = (f'<!DOCTYPE html><html lang="en"><head><meta charset="utf-8"><title>{html.escape(title)}</title>'
            f"<style>{_STYLE}</style></head><body>{body}</body></html>")
    return Written(_write_whole(Path(out), page), len(page.encode("utf-8")), counts,
                   tuple(e.index for e in shown))


def _write_whole(path: Path, text: str) -> Path:
    """``text`` to ``path`` through a file beside it and a rename, so no half-written page is ever there."""
    if path.is_dir():
        raise ConfigError(str(path), "", "is a folder; name the HTML file to write (e.g. report.html)")
    if path.exists() and not path.is_file():  # the rename below would replace a device such as /dev/null
        raise ConfigError(str(path), "", "is not a regular file (a device, a FIFO or a socket); name the HTML file")
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        part = path.with_name(f".{path.name}.part")
        part.write_text(text, encoding="utf-8")
        os.replace(part, path)
    except OSError as exc:
        raise ConfigError(str(path), "", f"cannot be written ({exc.strerror})") from None
    return path
