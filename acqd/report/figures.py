"""Figures of a comparison, drawn on matplotlib ``Figure`` objects without pyplot.

No pyplot means no global state and no GUI backend: the figures render with Agg on a headless daemon and
in tests, and several can be built at once without interfering.
"""

from __future__ import annotations

import io
import math
from collections.abc import Mapping, Sequence
from datetime import datetime, timedelta, timezone
from pathlib import Path
from typing import Any

import matplotlib.dates as mdates
import numpy as np
from matplotlib.axes import Axes
from matplotlib.figure import Figure

from ..compare import CompareResult, Traces
from ..display import axis_scale, label, si

_MEASURED = dict(color="tab:blue", lw=1.0, label="measured")
_SIMULATED = dict(color="tab:orange", lw=1.2, ls="--", label="simulated")


def _time_scale(times: np.ndarray) -> tuple[float, str]:
    """Multiplier and unit so the time axis reads in s, ms, µs or ns."""
    span = float(np.ptp(times)) or 1.0
    for factor, unit in ((1.0, "s"), (1e3, "ms"), (1e6, "µs"), (1e9, "ns")):
        if span * factor >= 1.0:
            return factor, unit
    return 1e9, "ns"


def _channel_titles(analysis: Mapping[str, Any]) -> dict[str, str]:
    """``v_c ↔ model v_c: NRMSE 0.61 %`` per compared channel of an analysis (``CompareResult.to_dict()``)."""
    titles = {}
    for ch in analysis.get("channels") or []:
        nrmse = "" if ch.get("nrmse") is None else f": NRMSE {si(100 * ch['nrmse'], '%', 3)}"
        titles[ch["channel"]] = f"{ch['channel']} ↔ model {ch['signal']}{nrmse}"
    return titles


def channel_figure(traces: Traces, analysis: Mapping[str, Any]) -> Figure:
    """Per channel: measured over simulated (top) and the residual measured − simulated (below).

    ``analysis`` is the comparison's JSON form, fresh (``CompareResult.to_dict()``) or stored with the
    record, so a stored result is drawn exactly like a new one (``acqd.compare.stored_traces``)."""
    names = list(traces.measured)
    titles = _channel_titles(analysis)
    factor, unit = _time_scale(traces.times)
    t = traces.times * factor
    fig = Figure(figsize=(9, 2.6 * len(names) + 0.6), layout="constrained")
    axes = fig.subplots(2 * len(names), 1, sharex=True, gridspec_kw={"height_ratios": [3, 1] * len(names)})
    for i, name in enumerate(names):
        top, bottom = axes[2 * i], axes[2 * i + 1]
        measured, simulated = traces.measured[name], traces.simulated[name]
        scale, shown = axis_scale(float(np.max(np.abs(simulated))), traces.units[name])
        top.plot(t, measured * scale, **_MEASURED)
        top.plot(t, simulated * scale, **_SIMULATED)
        top.set_ylabel(f"{name} ({shown or '-'})")
        top.set_title(titles.get(name, name), fontsize=9, loc="left")
        top.legend(loc="lower right", fontsize=8)
        bottom.plot(t, (measured - simulated) * scale, color="tab:red", lw=0.8)
        bottom.axhline(0.0, color="0.5", lw=0.6)
        bottom.set_ylabel(f"residual ({shown or '-'})", fontsize=8)
    for ax in axes:
        ax.ticklabel_format(axis="y", useOffset=False)
    axes[-1].set_xlabel(f"time from the trigger ({unit})")
    return fig


def _arrow_pairs(x: np.ndarray, y: np.ndarray, count: int = 6) -> list[tuple[int, int]]:
    """(from, to) sample pairs evenly spaced along the (noise-free) simulated curve's arc length.

    The same pairs serve the measured curve, so its arrows follow the trend rather than its noise.
    """
    sx, sy = (np.ptp(x) or 1.0), (np.ptp(y) or 1.0)
    arc = np.concatenate([[0.0], np.cumsum(np.hypot(np.diff(x) / sx, np.diff(y) / sy))])
    if arc[-1] == 0:
        return []
    pairs = []
    for target in np.linspace(0, arc[-1], count + 2)[1:-1]:
        k = min(int(np.searchsorted(arc, target)), len(x) - 2)
        j = min(max(int(np.searchsorted(arc, arc[k] + 0.02 * arc[-1])), k + 1), len(x) - 1)
        pairs.append((k, j))
    return pairs


def _arrows(ax: Axes, x: np.ndarray, y: np.ndarray, pairs: list[tuple[int, int]], color: str) -> None:
    for k, j in pairs:
        ax.annotate("", xy=(x[j], y[j]), xytext=(x[k], y[k]),
                    arrowprops=dict(arrowstyle="-|>", color=color, lw=1.2, mutation_scale=14))


def trajectory_figure(traces: Traces) -> Figure | None:
    """The first two states against each other (a phase portrait), measured over simulated.

    Measured states are those the mapped channels determine (e.g. i_L from v_R / R); arrows mark the
    direction of time. None for a model with fewer than two states.
    """
    if len(traces.states) < 2:
        return None
    (a, b), units = traces.states[:2], (tuple(traces.state_units[:2]) if traces.state_units else ("", ""))
    fig = Figure(figsize=(6, 5), layout="constrained")
    ax = fig.subplots()
    (fx, ux), (fy, uy) = (axis_scale(float(np.max(np.abs(traces.states_simulated[:, k]))), units[k]) for k in (0, 1))
    sim_x, sim_y = traces.states_simulated[:, 0] * fx, traces.states_simulated[:, 1] * fy
    pairs = _arrow_pairs(sim_x, sim_y)
    if a in traces.states_measured and b in traces.states_measured:
        mx, my = traces.states_measured[a] * fx, traces.states_measured[b] * fy
        ax.plot(mx, my, color="tab:blue", lw=0.8, alpha=0.8, label="measured")
        _arrows(ax, mx, my, pairs, "tab:blue")
    else:
        ax.text(0.02, 0.02, f"measured states not available: map channels that determine {a} and {b}",
                transform=ax.transAxes, fontsize=8)
    ax.plot(sim_x, sim_y, color="tab:orange", lw=1.2, ls="--", label="simulated")
    _arrows(ax, sim_x, sim_y, pairs, "tab:orange")
    ax.plot(sim_x[0], sim_y[0], "o", color="k", ms=4, label="start (rest before the edge)")
    ax.set_xlabel(f"{a} ({ux or '-'})")
    ax.set_ylabel(f"{b} ({uy or '-'})")
    ax.ticklabel_format(useOffset=False)
    ax.set_title("state trajectory (arrows: direction of time)", fontsize=9, loc="left")
    ax.legend(fontsize=8)
    return fig


def _time_axis(ax: Axes, times: Sequence[object]) -> None:
    """Date-times as ``12-02 23:00`` ticks with the date once beside them and the time zone in the
    label; plain numbers are record numbers."""
    if not (len(times) and isinstance(times[0], datetime)):
        ax.set_xlabel("record")
        return
    zone = times[0].tzinfo or timezone.utc
    offset = zone.utcoffset(times[0])
    name = "UTC" if offset == timedelta(0) else (times[0].tzname() or str(zone))
    locator = mdates.AutoDateLocator(tz=zone)
    ax.xaxis.set_major_locator(locator)
    ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator, tz=zone, show_offset=True))
    ax.set_xlabel(f"time ({name})")


def parameter_vs_time_figure(times: Sequence[object], values: Sequence[float], name: str, unit: str = "",
                             nominal: float | None = None, lower: Sequence[float] | None = None,
                             upper: Sequence[float] | None = None, limits: Sequence[float] | None = None,
                             trend: Sequence[float] | None = None, trend_label: str = "trend") -> Figure:
    """One parameter over time (a drift plot): points with optional 95 % interval bars, the nominal value,
    the tolerance limits and an optional trend line (values at ``times``), all in the legend.

    ``name`` is the key (``c_f``) and ``unit`` its unit as stored (``F``); the axis reads ``C (nF)`` with
    values scaled to the prefix, never bare farads under an offset. ``times`` may be datetimes (the axis
    says their time zone) or numbers (record numbers).
    """
    fig = Figure(figsize=(8, 3.5), layout="constrained")
    ax = fig.subplots()
    values = np.asarray(values, dtype=float)
    typical = nominal if nominal else (float(np.nanmax(np.abs(values))) if values.size else 0.0)
    factor, shown = axis_scale(typical, unit)
    person = label(name)
    if lower is not None and upper is not None:
        err = np.vstack([values - np.asarray(lower, float), np.asarray(upper, float) - values]) * factor
        ax.errorbar(times, values * factor, yerr=err, fmt="o", ms=4, capsize=3, label=f"{person} (95 % interval)")
    else:
        ax.plot(times, values * factor, "o-", ms=4, label=person)
    if nominal is not None:
        ax.axhline(nominal * factor, color="0.3", lw=1.0, ls="--", label=f"nominal {si(nominal, unit, trim=True)}")
    bounds = [b for b in (limits or ()) if math.isfinite(b)]
    for k, bound in enumerate(bounds):
        ax.axhline(bound * factor, color="tab:red", lw=1.0, ls=":",
                   label=None if k else "tolerance " + " … ".join(si(b, unit) for b in bounds))
    if trend is not None:
        ax.plot(times, np.asarray(trend, dtype=float) * factor, color="tab:orange", lw=1.2, label=trend_label)
    ax.set_ylabel(f"{person} ({shown})" if shown else person)
    ax.ticklabel_format(axis="y", useOffset=False)
    _time_axis(ax, times)
    ax.legend(fontsize=8)
    return fig


def png_bytes(fig: Figure, dpi: int = 100) -> bytes:
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", dpi=dpi)
    return buffer.getvalue()


def save_figures(result: CompareResult, directory: str | Path, stem: str = "") -> list[Path]:
    """Write channels.png (and trajectory.png when the model has two states) into ``directory``."""
    directory = Path(directory)
    directory.mkdir(parents=True, exist_ok=True)
    written = []
    figures = (("channels", channel_figure(result.traces, result.to_dict())),
               ("trajectory", trajectory_figure(result.traces)))
    for kind, fig in figures:
        if fig is not None:
            path = directory / f"{stem}{kind}.png"
            path.write_bytes(png_bytes(fig))
            written.append(path)
    return written


def distribution_figure(per_bench: Mapping[str, Sequence[float]], name: str, unit: str = "",
                        nominal: float | None = None) -> Figure:
    """One fitted parameter across a fleet: a box (quartiles, whiskers to 1.5 × the inter-quartile range)
    and every record's value as a point, per bench, so a bench that reads apart shows at a glance."""
    fig = Figure(figsize=(8, 3.5), layout="constrained")
    ax = fig.subplots()
    benches = list(per_bench)
    everything = np.concatenate([np.asarray(v, float) for v in per_bench.values()]) if benches else np.zeros(0)
    typical = nominal if nominal else (float(np.nanmax(np.abs(everything))) if everything.size else 0.0)
    factor, shown = axis_scale(typical, unit)
    ax.boxplot([np.asarray(per_bench[b], float) * factor for b in benches], showfliers=False)
    ax.set_xticks(range(1, len(benches) + 1), labels=benches)
    for k, bench in enumerate(benches, start=1):
        values = np.asarray(per_bench[bench], float) * factor
        ax.plot(np.full(values.size, k) + np.linspace(-0.12, 0.12, values.size), values, "o", ms=3,
                color="tab:blue", alpha=0.6)
    person = label(name)
    if nominal is not None:
        ax.axhline(nominal * factor, color="0.3", lw=1.0, ls="--", label=f"nominal {si(nominal, unit, trim=True)}")
        ax.legend(fontsize=8)
    ax.set_ylabel(f"{person} ({shown})" if shown else person)
    ax.set_xlabel("bench")
    ax.ticklabel_format(axis="y", useOffset=False)
    return fig
