"""Figures of a comparison, drawn on matplotlib ``Figure`` objects without pyplot.

No pyplot means no global state and no GUI backend: the figures render with Agg on a headless daemon and
in tests, and several can be built at once without interfering.
"""

from __future__ import annotations

import io
from collections.abc import Sequence
from datetime import datetime
from pathlib import Path

import numpy as np
from matplotlib.axes import Axes
from matplotlib.figure import Figure

from ..compare import CompareResult

_MEASURED = dict(color="tab:blue", lw=1.0, label="measured")
_SIMULATED = dict(color="tab:orange", lw=1.2, ls="--", label="simulated")


def _time_scale(times: np.ndarray) -> tuple[float, str]:
    """Multiplier and unit so the time axis reads in s, ms, µs or ns."""
    span = float(np.ptp(times)) or 1.0
    for factor, unit in ((1.0, "s"), (1e3, "ms"), (1e6, "µs"), (1e9, "ns")):
        if span * factor >= 1.0:
            return factor, unit
    return 1e9, "ns"


def channel_figure(result: CompareResult) -> Figure:
    """Per channel: measured over simulated (top) and the residual measured − simulated (below)."""
    tr = result.traces
    names = list(tr.measured)
    factor, unit = _time_scale(tr.times)
    t = tr.times * factor
    fig = Figure(figsize=(9, 2.6 * len(names) + 0.6), layout="constrained")
    axes = fig.subplots(2 * len(names), 1, sharex=True, gridspec_kw={"height_ratios": [3, 1] * len(names)})
    for i, name in enumerate(names):
        top, bottom = axes[2 * i], axes[2 * i + 1]
        ch = result.channel(name)
        top.plot(t, tr.measured[name], **_MEASURED)
        top.plot(t, tr.simulated[name], **_SIMULATED)
        top.set_ylabel(f"{name} ({tr.units[name] or '-'})")
        top.set_title(f"{name} ↔ model {ch.signal}: NRMSE {100 * ch.nrmse:.2f} %", fontsize=9, loc="left")
        top.legend(loc="lower right", fontsize=8)
        bottom.plot(t, tr.measured[name] - tr.simulated[name], color="tab:red", lw=0.8)
        bottom.axhline(0.0, color="0.5", lw=0.6)
        bottom.set_ylabel("residual", fontsize=8)
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


def trajectory_figure(result: CompareResult) -> Figure | None:
    """The first two states against each other (a phase portrait), measured over simulated.

    Measured states are those the mapped channels determine (e.g. i_L from v_R / R); arrows mark the
    direction of time. None for a model with fewer than two states.
    """
    tr = result.traces
    if len(tr.states) < 2:
        return None
    (a, b), units = tr.states[:2], (tuple(tr.state_units[:2]) if tr.state_units else ("", ""))
    fig = Figure(figsize=(6, 5), layout="constrained")
    ax = fig.subplots()
    sim_x, sim_y = tr.states_simulated[:, 0], tr.states_simulated[:, 1]
    pairs = _arrow_pairs(sim_x, sim_y)
    if a in tr.states_measured and b in tr.states_measured:
        mx, my = tr.states_measured[a], tr.states_measured[b]
        ax.plot(mx, my, color="tab:blue", lw=0.8, alpha=0.8, label="measured")
        _arrows(ax, mx, my, pairs, "tab:blue")
    else:
        ax.text(0.02, 0.02, f"measured states not available: map channels that determine {a} and {b}",
                transform=ax.transAxes, fontsize=8)
    ax.plot(sim_x, sim_y, color="tab:orange", lw=1.2, ls="--", label="simulated")
    _arrows(ax, sim_x, sim_y, pairs, "tab:orange")
    ax.plot(sim_x[0], sim_y[0], "o", color="k", ms=4, label="start (rest before the edge)")
    ax.set_xlabel(f"{a} ({units[0]})")
    ax.set_ylabel(f"{b} ({units[1]})")
    ax.set_title("state trajectory (arrows: direction of time)", fontsize=9, loc="left")
    ax.legend(fontsize=8)
    return fig


def parameter_vs_time_figure(times: Sequence[object], values: Sequence[float], name: str, unit: str = "",
                             nominal: float | None = None, lower: Sequence[float] | None = None,
                             upper: Sequence[float] | None = None, limits: tuple[float, float] | None = None
                             ) -> Figure:
    """One parameter over time (a drift plot): points with optional 95 % interval bars, the nominal value
    and tolerance lines. ``times`` may be datetimes or numbers (seconds, record numbers)."""
    fig = Figure(figsize=(8, 3.5), layout="constrained")
    ax = fig.subplots()
    values = np.asarray(values, dtype=float)
    if lower is not None and upper is not None:
        err = np.vstack([values - np.asarray(lower, float), np.asarray(upper, float) - values])
        ax.errorbar(times, values, yerr=err, fmt="o", ms=4, capsize=3, label=f"{name} (95 % interval)")
    else:
        ax.plot(times, values, "o-", ms=4, label=name)
    if nominal is not None:
        ax.axhline(nominal, color="0.3", lw=1.0, ls="--", label="nominal")
    for bound in limits or ():
        ax.axhline(bound, color="tab:red", lw=0.8, ls=":")
    ax.set_ylabel(f"{name} ({unit})" if unit else name)
    ax.legend(fontsize=8)
    if len(times) and isinstance(times[0], datetime):
        fig.autofmt_xdate()
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
    for label, fig in (("channels", channel_figure(result)), ("trajectory", trajectory_figure(result))):
        if fig is not None:
            path = directory / f"{stem}{label}.png"
            path.write_bytes(png_bytes(fig))
            written.append(path)
    return written
