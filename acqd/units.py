"""A batch's results per unit: each unit's verdict and fitted values, each parameter's spread over the units.

From stored analyses and metadata only (``CompareResult.to_dict()`` and the settings a record keeps), so
the run that measured the batch, ``acqd ls --by-unit``, ``acqd status --by-unit`` and the report summarise
a batch the same way from the same numbers.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from typing import Any

from .record import BATCH_SETTING, unit_serial_of



@dataclass(frozen=True)
class Spread:
    """One fitted parameter over the batch: nominal, extremes, mean, standard deviation, tolerance (± %)."""

    parameter: str
    unit: str
    nominal: float
    minimum: float
    maximum: float
    mean: float
    std: float
    tolerance_pct: float | None

    @property
    def worst_deviation_pct(self) -> float:
        return 100 * max(abs(self.minimum - self.nominal), abs(self.maximum - self.nominal)) / abs(self.nominal)


@dataclass(frozen=True)
class UnitSummary:
    serial: str
    verdict: str  # pass | fail | untested | skipped
    fitted: dict[str, float]
    reason: str = ""


def summarise_units(units: Iterable[tuple[str, list[dict[str, Any]], list[str]]],
                    dut: dict[str, Any]) -> tuple[list[UnitSummary], list[Spread]]:
    """Per unit — ``(serial, the stored analyses of its records, reasons it was skipped)``, over every
    pass of the batch — the worst verdict and its fitted values; per parameter, the spread over the
    units. A unit with no record is ``skipped`` with the last reason."""
    summaries, values, nominal, units_of = [], {}, {}, {}
    for serial, analyses, skips in units:
        if not analyses:
            summaries.append(UnitSummary(serial, "skipped", {}, skips[-1] if skips else "no record"))
            continue
        verdicts = [a.get("verdict", "untested") for a in analyses]
        verdict = "fail" if "fail" in verdicts else "pass" if all(v == "pass" for v in verdicts) else "untested"
        fitted = _fitted(analyses, nominal, units_of)
        for name, value in fitted.items():
            values.setdefault(name, []).append(value)
        reasons = list(dict.fromkeys(reason for a in analyses for reason in a.get("reasons", [])))
        summaries.append(UnitSummary(serial, verdict, fitted, "; ".join([*reasons, *skips])))
    spreads = [_spread(name, vals, nominal[name], units_of.get(name, ""), dut) for name, vals in values.items()]
    return summaries, spreads


def _fitted(analyses: list[dict[str, Any]], nominal: dict[str, float], units_of: dict[str, str]) -> dict[str, float]:
    """A unit's fitted model parameters (nuisance values such as the edge instant left out), averaged
    over its records (one per edge and pass)."""
    sums: dict[str, list[float]] = {}
    for analysis in analyses:
        fit = analysis.get("fit") or {}
        for name, value in (fit.get("values") or {}).items():
            if name in (fit.get("nuisance") or ()) or value is None:
                continue
            sums.setdefault(name, []).append(float(value))
            nominal.setdefault(name, float(fit["nominal"][name]))
            units_of.setdefault(name, (fit.get("units") or {}).get(name, ""))
    return {name: sum(v) / len(v) for name, v in sums.items()}


def _spread(name: str, values: list[float], nominal: float, unit: str, dut: dict[str, Any]) -> Spread:
    mean = sum(values) / len(values)
    std = math.sqrt(sum((v - mean) ** 2 for v in values) / (len(values) - 1)) if len(values) > 1 else 0.0
    return Spread(name, unit, nominal, min(values), max(values), mean, std, parameter_tolerance_pct(dut, name))


def parameter_tolerance_pct(dut: dict[str, Any], name: str) -> float | None:
    """The ± % the [dut] table allows this parameter (``parameter_pct``: one number or a table)."""
    pct = (dut.get("tolerances") or {}).get("parameter_pct")
    if isinstance(pct, dict):
        pct = pct.get(name)
    return float(pct) if isinstance(pct, (int, float)) and not isinstance(pct, bool) else None




@dataclass
class UnitRecords:
    """The records of one unit in a store: the switch paths that reached it, their indices and verdicts."""

    serial: str
    paths: list[str] = field(default_factory=list)
    records: list[int] = field(default_factory=list)
    verdicts: list[str | None] = field(default_factory=list)


def records_by_unit(indices: Sequence[int], verdicts: Sequence[str | None],
                    metas: Sequence[dict[str, Any]]) -> list[UnitRecords]:
    """Records grouped by their unit's serial (``(no serial)`` when one names none), in the order each
    unit first appears; ``metas`` are the records' stored metadata (settings and dut)."""
    units: dict[str, UnitRecords] = {}
    for index, verdict, meta in zip(indices, verdicts, metas, strict=True):
        settings = meta.get("settings") or {}
        serial = unit_serial_of(settings, meta.get("dut")) or "(no serial)"
        unit = units.setdefault(serial, UnitRecords(serial))
        path = (settings.get(BATCH_SETTING) or {}).get("path")
        if path and path not in unit.paths:
            unit.paths.append(path)
        unit.records.append(index)
        unit.verdicts.append(verdict)
    return list(units.values())
