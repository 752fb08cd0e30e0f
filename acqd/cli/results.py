"""A comparator result as a person reads it: the channel table, the fitted values with their intervals,
the verdict and its reasons.

Both ``acqd compare`` (a fresh result) and ``acqd show`` (the result stored with a record) print from the
result's JSON form (``CompareResult.to_dict()``), so one record reads the same whichever way it is looked
at. Values go through ``acqd.display``: ``3.248 mH``, ``217.5 µs``, ``62.5 mV`` — never a base-unit float.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

from rich.console import RenderableType
from rich.table import Table
from rich.text import Text

from ..display import label, si, unit_symbol
from .common import verdict_text

# Header → (where the value is, its unit); "measured" and "simulated" are written out, not "m/s".
STEP_COLUMNS = (("overshoot\nmeasured", "measured", "overshoot_pct", "%"),
                ("overshoot\nsimulated", "simulated", "overshoot_pct", "%"),
                ("settling time\nmeasured", "measured", "settling_duration_s", "s"),
                ("settling time\nsimulated", "simulated", "settling_duration_s", "s"))
MISSING = "-"


def _value(value: Any, unit: str, digits: int = 4) -> str:
    return MISSING if value is None else si(float(value), unit, digits)


def channel_table(analysis: dict[str, Any]) -> Table:
    """One row per compared channel: NRMSE and the largest error with its unit, then the IEEE 181
    overshoot and settling time of the measured and the simulated trace side by side."""
    table = Table(header_style="bold")
    table.add_column("channel")
    table.add_column("model\nsignal")
    for header in ("NRMSE", "max |error|", *(c[0] for c in STEP_COLUMNS)):
        table.add_column(header, justify="right")
    for ch in analysis.get("channels") or []:
        nrmse = None if ch.get("nrmse") is None else 100.0 * ch["nrmse"]
        steps = [_value((ch.get(side) or {}).get(key), unit) for _, side, key, unit in STEP_COLUMNS]
        table.add_row(Text(ch["channel"]), Text(ch["signal"]), _value(nrmse, "%", 3),
                      _value(ch.get("max_abs_error"), ch.get("unit", ""), 3), *steps)
    return table


SINGULAR_CONDITION = 1e15
"""Above this a Jacobian's condition number is a property of rounding, not of the fit: in binary64
(eps = 2.2e-16) a matrix that singular has no digits of its own left, and the figure differs between
BLAS builds (1.8e+16 on one machine, 5.4e+15 on another for the same record)."""


def _condition(number: float) -> str:
    return f"{number:.3g}" if number < SINGULAR_CONDITION else "> 1e15, singular"


def fit_lines(fit: dict[str, Any] | None) -> list[str]:
    """``R = 22.49 Ω ± 47 mΩ (95 %: 22.39 Ω … 22.58 Ω; start 22 Ω)``, one line per fitted parameter."""
    if not fit:
        return []
    lines = [f"fit ({fit['weighting']} weighting, residual scale {fit['residual_scale']:.3g}, "
             f"{fit['evaluations']} evaluations, condition number {_condition(fit['condition_number'])}):"]
    for name in fit["fitted"]:
        unit = unit_symbol((fit.get("units") or {}).get(name, ""))
        lo, hi = fit["ci95"][name]
        lines.append(f"  {label(name)} = {si(fit['values'][name], unit)} ± {si(fit['standard_errors'][name], unit, 2)} "
                     f"(95 %: {si(lo, unit)} … {si(hi, unit)}; start {si(fit['nominal'][name], unit, trim=True)})")
    lines += [f"  {label(name)} held fixed: {why}" for name, why in (fit.get("held_fixed") or {}).items()]
    return lines


def verdict_lines(analysis: dict[str, Any]) -> Iterator[Text]:
    """``verdict: PASS`` (the one coloured word), each failed check's reason, then the warnings."""
    yield Text("verdict: ").append_text(verdict_text(analysis.get("verdict"), upper=True))
    for reason in analysis.get("reasons") or []:
        yield Text(f"  - {reason}")
    for warning in analysis.get("warnings") or []:
        yield Text(f"warning: {warning}")


def renderables(analysis: dict[str, Any]) -> list[RenderableType]:
    """Everything above, in reading order, for ``console.print(*...)`` one per line."""
    return [channel_table(analysis), *(Text(line) for line in fit_lines(analysis.get("fit"))),
            *verdict_lines(analysis)]
