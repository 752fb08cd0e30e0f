"""``acqd fleet``: the archive's records analysed on dask.distributed, one task per segment.

Why dask.distributed rather than a loop of our own: the same code runs on a ``LocalCluster`` (worker
processes, one per core, the default) and on an existing cluster (``--scheduler tcp://host:8786``) that
reaches the same archive, with its scheduling, retries of lost workers and dashboard. A task is one
segment, not one record: a segment is one object to open (fsspec file object into h5py, reading only the
bytes asked for), its blobs are shared by its records, and a task of a few hundred milliseconds or more
keeps the scheduler's overhead (about a millisecond a task) negligible.

Results are put in a fixed order (bench, campaign, record index) before anything is computed from them, so
they do not depend on how many workers ran or which finished first; ``tests/test_fleet.py`` checks that
``fleet drift`` of one bench equals ``acqd drift`` of that bench's own store, and ``fleet compare`` on 1 and
2 workers gives the same table.

Bench-to-bench comparison of a fitted parameter: one-way analysis of variance over the benches (the F
test of equal means, Montgomery, *Design and Analysis of Experiments*, 8th ed., §3.3), and for each bench
Welch's unequal-variance t test of its mean against all other benches' records pooled (Welch, B. L.,
"The generalization of 'Student's' problem when several different population variances are involved",
Biometrika 34, 1947), its p-value multiplied by the number of benches (Bonferroni) so that "differs" at
5 % holds for the fleet as a whole. Both treat a bench's records as independent draws: a bench whose
parameter drifts (see its trend) inflates its own spread, which makes the tests cautious, not bold.
"""

from __future__ import annotations

import json
import logging
import math
import os
from collections import defaultdict
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from typing import Any

import numpy as np
from scipy import stats

from ..campaign.drift import DriftEntry, DriftSummary, summarise
from ..display import edge_label
from ..errors import AcqdError, ConfigError
from ..store.schema import row_summary
from ..store.segment import SegmentView
from .archive import Archive, open_archive, reaching

SIGNIFICANCE = 0.05
READ_BLOCK_BYTES = 4 << 20  # fsspec's read-ahead: a record's samples in one or two requests
TEST_METHOD = ("one-way ANOVA F test over the benches (Montgomery, Design and Analysis of Experiments, §3.3); "
               "per bench, Welch's t test of its mean against the other benches' records (Welch 1947), "
               "p-value × number of benches (Bonferroni); differs when that is below 0.05")


@dataclass(frozen=True)
class SegmentRef:
    """One archived segment, as the bench's catalog lists it."""

    bench: str
    campaign: str
    segment: str
    key: str  # relative to the archive's root
    records: int
    first_index: int | None
    first_utc: str | None
    last_utc: str | None


def archived_segments(archive: Archive) -> list[SegmentRef]:
    """Every segment every bench's catalog lists, in (bench, campaign, segment) order."""
    refs = []
    with reaching(archive, "listing the catalogs"):
        for bench in archive.benches():
            for e in archive.read_catalog(bench)["segments"]:
                refs.append(SegmentRef(bench, e["campaign"], e["segment"], e["key"], int(e["records"]),
                                       e.get("first_index"), e.get("first_utc"), e.get("last_utc")))
    return sorted(refs, key=lambda r: (r.bench, r.campaign, r.segment))


def segments_to_analyse(archive: Archive) -> list[SegmentRef]:
    """``archived_segments``, refused in one line when there are none (before any cluster is started)."""
    refs = archived_segments(archive)
    if not refs:
        raise ConfigError(archive.url, "", "holds no archived segment (no <bench_id>/catalog.json lists one); "
                                           "send some with acqd sync first")
    return refs


def listing(refs: list[SegmentRef]) -> list[dict[str, Any]]:
    """``acqd fleet ls``: per bench and campaign, segments, records and time span, from the catalogs."""
    groups: dict[tuple[str, str], list[SegmentRef]] = defaultdict(list)
    for ref in refs:
        groups[(ref.bench, ref.campaign)].append(ref)
    return [{"bench": bench, "campaign": campaign, "segments": len(g), "records": sum(r.records for r in g),
             "first_utc": min((r.first_utc for r in g if r.first_utc), default=None),
             "last_utc": max((r.last_utc for r in g if r.last_utc), default=None)}
            for (bench, campaign), g in sorted(groups.items())]


# -- the cluster ------------------------------------------------------------------------------------------
@contextmanager
def cluster(scheduler: str | None = None, workers: int | None = None) -> Iterator[Any]:
    """A dask.distributed client: of the scheduler at ``scheduler``, or of a LocalCluster of ``workers``
    worker processes (default one per core), one thread each (the comparator holds the interpreter lock)."""
    from distributed import Client, LocalCluster

    if scheduler:
        try:
            client = Client(scheduler, timeout="10s")
        except (OSError, TimeoutError, ValueError) as exc:
            raise ConfigError("--scheduler", "", f"cannot reach {scheduler} ({exc}); give the scheduler's "
                                                 "address, e.g. tcp://host:8786") from None
        with client:
            yield client
        return
    # silence_logs: a worker's heartbeat cut short by the shutdown is logged as an error; it is not one
    with LocalCluster(n_workers=workers or os.cpu_count() or 1, threads_per_worker=1, processes=True,
                      dashboard_address="127.0.0.1:0", host="127.0.0.1", silence_logs=logging.CRITICAL) as local, \
            Client(local) as client:
        yield client


class TaskError(AcqdError):
    """A task's AcqdError as text: our error kinds take several arguments and do not survive pickling
    on their way back from a worker; this one carries the same one line."""


def run_per_segment(client: Any, function: Any, refs: list[SegmentRef], **kwargs: Any) -> list[Any]:
    """``function(ref, **kwargs)`` as one task per segment; results in ``refs``' order."""
    futures = client.map(_one_line, [function] * len(refs), refs, pure=False, **kwargs)
    return client.gather(futures)


def _one_line(function: Any, ref: SegmentRef, **kwargs: Any) -> Any:
    try:
        return function(ref, **kwargs)
    except AcqdError as exc:
        raise TaskError(str(exc)) from None


@contextmanager
def opened_segment(archive: Archive, ref: SegmentRef) -> Iterator[SegmentView]:
    """The archived segment read straight from the archive: an fsspec file object handed to h5py."""
    key = archive.key(ref.key)
    with reaching(archive, f"reading {key}"), archive.fs.open(key, "rb", block_size=READ_BLOCK_BYTES) as f:
        view = SegmentView(Path(key), live=False, source=f)
        try:
            yield view
        finally:
            view.close()


# -- the tasks (run on the workers) -----------------------------------------------------------------------
def drift_task(ref: SegmentRef, *, url: str, endpoint_url: str | None) -> list[dict[str, Any]]:
    """Every record of one segment as the drift reads it: analysis, time, setting, [dut] (no samples)."""
    archive = open_archive(url, endpoint_url)
    with opened_segment(archive, ref) as view:
        rows = view.rows
        analyses, duts = view.blob_values("analysis", rows), view.blob_values("dut", rows)
        out = []
        for row, analysis, dut in zip(rows, analyses, duts, strict=True):
            s = row_summary(row)
            stim = s["stimulus"]
            out.append({"bench": ref.bench, "campaign": ref.campaign, "index": s["index"], "utc": s["utc"],
                        "analysis": analysis, "dut": dut, "setting": edge_label(stim["edge"], stim["low_v"],
                                                                                stim["high_v"])})
        return out


def compare_task(ref: SegmentRef, *, url: str, endpoint_url: str | None, dut_json: str, source: str
                 ) -> list[dict[str, Any]]:
    """Every record of one segment compared with the [dut] table given (``dut_json``): one row each."""
    from ..compare import compare_spec, parse_dut_table

    spec = parse_dut_table(json.loads(dut_json), source)
    archive = open_archive(url, endpoint_url)
    rows = []
    with opened_segment(archive, ref) as view:
        for position in range(len(view.rows)):
            record = view.record(position)  # its samples checked against their CRC-32
            try:
                result, error = compare_spec(record, spec).to_dict(), ""
            except AcqdError as exc:
                result, error = {}, str(exc)
            rows.append(compare_row(ref, record.index, record.utc, record.dut, result, error))
    return rows


def compare_row(ref: SegmentRef, index: int | None, utc: str, dut: dict[str, Any], result: dict[str, Any],
                error: str) -> dict[str, Any]:
    """One record's comparison as a flat row: fitted values with their 95 % intervals, each channel's
    NRMSE and maximum error, the verdict."""
    row: dict[str, Any] = {"bench": ref.bench, "campaign": ref.campaign, "segment": ref.segment, "index": index,
                           "utc": utc, "serial": str((dut or {}).get("serial", "")),
                           "verdict": result.get("verdict", ""), "error": error}
    fit = result.get("fit") or {}
    for name in fit.get("fitted") or []:
        low, high = (fit.get("ci95") or {}).get(name) or (None, None)
        row.update({name: (fit.get("values") or {}).get(name), f"{name}_ci95_low": low, f"{name}_ci95_high": high})
    for channel in result.get("channels") or []:
        row[f"{channel['channel']}_nrmse"] = channel.get("nrmse")
        row[f"{channel['channel']}_max_abs_error"] = channel.get("max_abs_error")
    return row


# -- fleet drift ------------------------------------------------------------------------------------------
@dataclass
class FleetDrift:
    benches: list[DriftSummary]  # one per bench and campaign, named "bench/campaign"
    serials: list[DriftSummary]  # one per DUT serial, over every bench
    distributions: list[dict[str, Any]]  # per fitted parameter: the fleet's and each bench's spread, the tests
    method: str = TEST_METHOD

    def to_dict(self) -> dict[str, Any]:
        return {"benches": [s.to_dict() for s in self.benches], "serials": [s.to_dict() for s in self.serials],
                "distributions": _finite(self.distributions), "method": self.method}


def fleet_drift(entries: list[dict[str, Any]], serial: str | None = None, since: str | None = None) -> FleetDrift:
    """Drift per bench and campaign and per serial, and the fleet's distribution of each fitted parameter,
    from the drift tasks' entries (in any order: they are sorted first)."""
    after = None if since is None else datetime.fromisoformat(since)
    chosen = [e for e in entries if (serial is None or _serial(e) == serial) and (after is None or _taken_since(e, after))]
    chosen.sort(key=lambda e: (e["bench"], e["campaign"], e["index"]))
    by_store: dict[tuple[str, str], list[dict[str, Any]]] = defaultdict(list)
    by_serial: dict[str, list[dict[str, Any]]] = defaultdict(list)
    for e in chosen:
        by_store[(e["bench"], e["campaign"])].append(e)
        if _serial(e):
            by_serial[_serial(e)].append(e)
    benches = [summarise(f"{bench}/{campaign}", [_entry(e) for e in group], [])
               for (bench, campaign), group in sorted(by_store.items())]
    serials = [summarise(f"serial {name}", [_entry(e) for e in sorted(group, key=lambda e: e["utc"])], [])
               for name, group in sorted(by_serial.items())]
    return FleetDrift(benches, serials, distributions(chosen))


def _taken_since(entry: dict[str, Any], moment: datetime) -> bool:
    """Whether the record was taken at or after ``moment`` (a record without a readable UTC time is not)."""
    try:
        taken = datetime.fromisoformat(entry["utc"])
    except (TypeError, ValueError):
        return False
    return taken.tzinfo is not None and taken >= moment


def _serial(entry: dict[str, Any]) -> str:
    return str((entry.get("dut") or {}).get("serial", ""))


def _entry(e: dict[str, Any]) -> DriftEntry:
    return DriftEntry(e["index"], e["utc"], e["analysis"], e["setting"], e["dut"])


def fitted_values(entries: list[dict[str, Any]]) -> dict[str, dict[str, list[float]]]:
    """parameter → bench → the fitted values of that bench's compared records, in record order."""
    values: dict[str, dict[str, list[float]]] = defaultdict(lambda: defaultdict(list))
    for e in entries:
        fit = (e["analysis"] or {}).get("fit") or {}
        for name in fit.get("fitted") or []:
            value = (fit.get("values") or {}).get(name)
            if isinstance(value, (int, float)) and math.isfinite(value):
                values[name][e["bench"]].append(float(value))
    return values


def distributions(entries: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """Per fitted parameter: the fleet's quantiles, each bench's mean and spread, and the bench tests."""
    out = []
    units, nominal = _units_and_nominals(entries)
    for name, per_bench in sorted(fitted_values(entries).items()):
        everything = np.concatenate([np.asarray(v) for v in per_bench.values()])
        q5, q50, q95 = np.percentile(everything, [5, 50, 95])
        out.append({"parameter": name, "unit": units.get(name, ""), "nominal": nominal.get(name),
                    "n": int(everything.size), "mean": float(everything.mean()),
                    "std": float(everything.std(ddof=1)) if everything.size > 1 else None,
                    "p5": float(q5), "median": float(q50), "p95": float(q95),
                    **bench_tests(per_bench)})
    return out


def bench_tests(per_bench: dict[str, list[float]]) -> dict[str, Any]:
    """The one-way ANOVA over the benches with two or more values, and each bench's Welch t test against
    the rest (Bonferroni-adjusted); see the module's docstring for the sources."""
    tested = {b: np.asarray(v) for b, v in sorted(per_bench.items()) if len(v) >= 2}
    benches = [{"bench": b, "n": len(v), "mean": float(np.mean(v)),
                "std": float(np.std(v, ddof=1)) if len(v) > 1 else None} for b, v in sorted(per_bench.items())]
    anova = None
    if len(tested) >= 2 and any(np.ptp(v) > 0 for v in tested.values()):
        f = stats.f_oneway(*tested.values())
        anova = {"f": float(f.statistic), "p_value": float(f.pvalue), "benches": len(tested)}
    for row in benches:
        own = tested.get(row["bench"])
        rest = [v for b, v in tested.items() if b != row["bench"]]
        if own is None or not rest:
            continue
        t = stats.ttest_ind(own, np.concatenate(rest), equal_var=False)
        if math.isfinite(t.pvalue):
            p_adjusted = min(1.0, float(t.pvalue) * len(tested))
            row.update({"welch_t": float(t.statistic), "p_value": float(t.pvalue), "p_adjusted": p_adjusted,
                        "differs": p_adjusted < SIGNIFICANCE})
    return {"anova": anova, "benches": benches}


def _finite(value: Any) -> Any:
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, dict):
        return {k: _finite(v) for k, v in value.items()}
    if isinstance(value, list):
        return [_finite(v) for v in value]
    return value


# -- fleet compare ----------------------------------------------------------------------------------------
def compare_table(rows: list[dict[str, Any]]) -> Any:
    """The rows as one pyarrow table in (bench, campaign, index) order; columns the union of the rows'
    (a fitted parameter or channel that a record lacks is null there)."""
    import pyarrow as pa

    rows = sorted(rows, key=lambda r: (r["bench"], r["campaign"], r["index"]))
    fixed = ["bench", "campaign", "segment", "index", "utc", "serial", "verdict", "error"]
    extra = sorted({k for r in rows for k in r} - set(fixed))
    columns = {c: [r.get(c) for r in rows] for c in fixed + extra}
    types = {c: pa.float64() for c in extra}
    types.update({c: pa.string() for c in fixed if c != "index"}, index=pa.int64())
    return pa.table({c: pa.array(v, type=types[c]) for c, v in columns.items()})


def compare_summary(table: Any) -> list[dict[str, Any]]:
    """Per bench: records, and how many passed, failed, were untested or could not be compared."""
    data = table.select(["bench", "verdict", "error"]).to_pylist()
    out = []
    for bench in sorted({r["bench"] for r in data}):
        mine = [r for r in data if r["bench"] == bench]
        out.append({"bench": bench, "records": len(mine),
                    **{v: sum(r["verdict"] == v for r in mine) for v in ("pass", "fail", "untested")},
                    "errors": sum(bool(r["error"]) for r in mine)})
    return out


# -- figures ----------------------------------------------------------------------------------------------
def write_figures(drift: FleetDrift, entries: list[dict[str, Any]], out_dir: Path) -> list[Path]:
    """fleet-drift.json, one distribution PNG per fitted parameter, and each bench's drift figures (as
    ``acqd drift --figures`` draws them) in a folder per bench and campaign."""
    from ..campaign.drift import write_outputs
    from ..report import distribution_figure

    try:
        out_dir.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise ConfigError(str(out_dir), "", f"cannot be created ({exc.strerror})") from None
    written = [out_dir / "fleet-drift.json"]
    written[0].write_text(json.dumps(drift.to_dict(), indent=1, allow_nan=False) + "\n", encoding="utf-8")
    units, nominal = _units_and_nominals(entries)
    for name, per_bench in sorted(fitted_values(entries).items()):
        fig = distribution_figure(dict(sorted(per_bench.items())), name, units.get(name, ""), nominal.get(name))
        path = out_dir / f"distribution-{name}.png"
        fig.savefig(path, dpi=100)
        written.append(path)
    for summary in drift.benches:
        written += write_outputs(summary, out_dir / summary.store.replace("/", "--"))
    return written


def _units_and_nominals(entries: list[dict[str, Any]]) -> tuple[dict[str, str], dict[str, float]]:
    units: dict[str, str] = {}
    nominal: dict[str, float] = {}
    for e in entries:
        fit = (e["analysis"] or {}).get("fit") or {}
        units.update({k: str(v) for k, v in (fit.get("units") or {}).items()})
        nominal.update({k: float(v) for k, v in (fit.get("nominal") or {}).items() if isinstance(v, (int, float))})
    return units, nominal
