"""Pass or fail from the tolerances: every check is listed with its value and limit, every failure
with a sentence saying why, so a failed unit can be judged without rerunning anything.

The sentences and limits are for a person (``R: fitted 27.31 Ω is 24.1 % from nominal 22 Ω``, through
``acqd.display``); ``value`` and the keys stay in SI and in the names files use (``r_ohm``)."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

from ..display import label, si
from .fit import FitResult
from .metrics import ChannelResult
from .spec import Tolerances


@dataclass(frozen=True)
class Check:
    check: str  # "nrmse", "overshoot", "settling", "parameter"
    subject: str  # channel or parameter name
    value: float | None
    limit: str
    passed: bool
    reason: str


@dataclass(frozen=True)
class Verdict:
    status: str  # "pass", "fail", or "untested" when no tolerance was given
    checks: list[Check]
    reasons: list[str]  # one line per failed check

    @property
    def passed(self) -> bool:
        return self.status != "fail"


def _check(check: str, subject: str, value: float | None, limit: str, ok: bool, what: str, shown: str,
           why: str = "") -> Check:
    """``shown`` is the value as a person reads it (``52.50 %``, ``347.4 µs``); ``value`` stays in SI.
    ``why`` (in parentheses) says why a value may be missing; the limit carries it too."""
    if value is None:
        return Check(check, subject, None, limit + why, False, f"{subject}: {what} is undefined{why}; {limit} required")
    verb = "meets" if ok else "breaks"
    return Check(check, subject, value, limit + why, ok, f"{subject}: {what} {shown} ({verb} {limit})")


def _channel_checks(ch: ChannelResult, tolerances: Tolerances) -> list[Check]:
    limits = tolerances.for_channel(ch.channel)
    checks = []
    if limits.nrmse_max is not None:  # a fraction in the table and JSON, a percentage on screen
        checks.append(_check("nrmse", ch.channel, ch.nrmse, f"≤ {si(100 * limits.nrmse_max, '%', trim=True)}",
                             ch.nrmse <= limits.nrmse_max, "NRMSE", si(100 * ch.nrmse, "%", 3)))
    step = ch.measured
    missing = f" ({ch.step_note})" if step is None else ""
    if limits.overshoot_pct is not None:
        lo, hi = limits.overshoot_pct
        value = step.overshoot_pct if step else None
        checks.append(_check("overshoot", ch.channel, value, f"{si(lo, '%', trim=True)} … {si(hi, '%', trim=True)}",
                             value is not None and lo <= value <= hi, "overshoot", _shown(value, "%"), missing))
    if limits.settling_s_max is not None:
        value = step.settling_duration_s if step else None
        why = missing or ("" if value is not None else
                          f" (never stays inside ±{tolerances.settling_band_pct:g} % within the record)")
        checks.append(_check("settling", ch.channel, value, f"≤ {si(limits.settling_s_max, 's', trim=True)}",
                             value is not None and value <= limits.settling_s_max, "settling time",
                             _shown(value, "s"), why))
    return checks


def _shown(value: float | None, unit: str) -> str:
    return "" if value is None else si(value, unit)


def _parameter_checks(fit: FitResult | None, tolerances: Tolerances) -> tuple[list[Check], list[str]]:
    pct = tolerances.parameter_pct
    if not pct:
        return [], []
    if fit is None:
        return [], ["tolerances.parameter_pct is set but nothing was fitted; it was not checked"]
    checks, notes = [], []
    for name in fit.fitted:
        limit = pct.get(name, pct.get("*"))
        if limit is None or name in fit.nuisance:
            continue
        nominal, value, unit = fit.nominal[name], fit.values[name], fit.units.get(name, "")
        if nominal == 0:
            notes.append(f"tolerances.parameter_pct not checked for {name}: its nominal value is 0")
            continue
        off = 100.0 * abs(value - nominal) / abs(nominal)
        start = si(nominal, unit, 6, trim=True)
        checks.append(Check("parameter", name, value, f"nominal {start} ±{limit:g} %", off <= limit,
                            f"{label(name)}: fitted {si(value, unit)} is {off:.1f} % from nominal {start} "
                            f"({'within' if off <= limit else 'outside'} ±{limit:g} %)"))
    for name in pct:
        if name != "*" and name not in fit.fitted:
            notes.append(f"tolerances.parameter_pct.{name} not checked: {name} was not fitted"
                         + (f" ({fit.held_fixed[name]})" if name in fit.held_fixed else ""))
    return checks, notes


def judge(channels: Sequence[ChannelResult], fit: FitResult | None, tolerances: Tolerances
          ) -> tuple[Verdict, list[str]]:
    """(verdict, notes about tolerances that could not be applied)."""
    checks = [c for ch in channels for c in _channel_checks(ch, tolerances)]
    parameter_checks, notes = _parameter_checks(fit, tolerances)
    checks += parameter_checks
    failed = [c.reason for c in checks if not c.passed]
    status = "untested" if not checks else ("fail" if failed else "pass")
    return Verdict(status, checks, failed), notes
