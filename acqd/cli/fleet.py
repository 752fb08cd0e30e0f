"""``acqd sync`` and ``acqd fleet``: send a bench's finished segments to the archive, and analyse every
bench's records there on dask.distributed."""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path
from typing import Any

from rich.table import Table
from rich.text import Text

from ..errors import ConfigError
from .common import (add_bench_id, add_command, add_data_dir, add_figures, add_json, add_out, add_profile, console,
                     utc_text, whole_number)


def add_archive(parser: argparse.ArgumentParser) -> None:
    """The archive URL and the one client setting a command line may override (never credentials)."""
    parser.add_argument("url", metavar="URL", help="the archive: s3://bucket/prefix or file:///path/to/share")
    parser.add_argument("--endpoint-url", metavar="URL",
                        help="an S3-compatible store's endpoint, in place of AWS_ENDPOINT_URL or the client's "
                             "configuration (credentials always come from the environment or that configuration)")


def add_verify(parser: argparse.ArgumentParser, option: str) -> None:
    """How an upload is verified (``acqd sync --verify``, ``acqd daemon --sync-verify``)."""
    def mode(text: str) -> str:
        from ..fleet.transfer import VERIFY_MODES

        if text not in VERIFY_MODES:
            raise ConfigError(parser.prog, option, f"{text!r}; give one of {', '.join(VERIFY_MODES)}")
        return text
    parser.add_argument(option, metavar="HOW", type=mode, default="upload",
                        help="upload (default): S3's MD5 ETags of what was sent, on a share the size after fsync; "
                             "readback: read the object back and hash it (for a store whose ETag is not an MD5, "
                             "e.g. SSE-KMS or SSE-C)")


def register(sub: argparse._SubParsersAction) -> None:
    p = add_command(sub, "sync", help="send the data directory's finished segments to an archive, verified",
                    description="Copy every finished segment of the data directory (never the live .part) to "
                                "the archive at URL as <bench_id>/<campaign>/<segment file>, each hashed as it is "
                                "sent and verified (--verify) before it is listed, with its SHA-256, in the "
                                "bench's catalog.json. A "
                                "second sync sends nothing; a sync that was killed is finished by the next one. "
                                "Local files are never deleted, except by --prune.")
    add_archive(p)
    add_data_dir(p)
    add_bench_id(p, "the bench id for records that carry none (stores written before [bench] bench_id)")
    add_verify(p, "--verify")
    p.add_argument("--prune", metavar="DAYS", type=whole_number(p.prog, "--prune", 0),
                   help="then remove the local segments this sync found verified in the archive whose last "
                        "record is more than DAYS days old (never the live .part, nor a store's newest segment)")
    add_json(p, "print the sync's report as JSON")
    p.set_defaults(func=sync_command)

    fleet = add_command(sub, "fleet", help="every bench's archived records at once, analysed on Dask",
                        description="List, trend and re-compare the records every bench has synced to the archive "
                                    "at URL, one Dask task per segment: on a local cluster of worker processes "
                                    "(one per core, or --workers N) or on an existing scheduler (--scheduler).")
    what = fleet.add_subparsers(dest="fleet_command", required=True, metavar="WHAT")
    p = add_command(what, "ls", help="benches, campaigns, segments, records and time span, from the catalogs",
                    description="What the archive holds, per bench and campaign: segments, records and the time "
                                "span, read from each bench's catalog.json without opening a segment.")
    add_archive(p)
    add_json(p)
    p.set_defaults(func=fleet_ls_command)

    p = add_command(what, "drift", help="drift per bench and serial, the fleet's spread, bench against bench",
                    description="The trend of every fitted parameter and metric per bench and campaign (as acqd "
                                "drift on that bench's store) and per DUT serial, the fleet's distribution of each "
                                "fitted parameter, and whether a bench's mean differs from the others' beyond "
                                "their spread (one-way ANOVA, Welch's t test per bench, Bonferroni).")
    add_archive(p)
    add_cluster(p)
    p.add_argument("--serial", metavar="S", help="only the records of the DUT with this serial")
    p.add_argument("--since", metavar="T", type=_utc, help="only records taken at or after this UTC time (ISO 8601)")
    add_json(p, "print the JSON summary instead of tables")
    add_figures(p, "write fleet-drift.json, a distribution PNG per fitted parameter and each bench's drift PNGs")
    p.set_defaults(func=fleet_drift_command)

    p = add_command(what, "compare", help="re-compare every archived record with a profile's [dut], to Parquet",
                    description="Compare every archived record with the model and tolerances of the profile's "
                                "[dut] table, in parallel, and write one Parquet row per record (bench, campaign, "
                                "index, UTC, serial, fitted values and intervals, NRMSE, verdict) to FILE; prints "
                                "a summary per bench.")
    add_archive(p)
    add_cluster(p)
    add_profile(p, "the profile whose [dut] table (model, fit, tolerances) every record is compared with (required)")
    add_out(p, "the Parquet file to write", required=True)
    add_json(p, "print the summary as JSON")
    p.set_defaults(func=fleet_compare_command)


def add_cluster(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--scheduler", metavar="ADDRESS", help="an existing Dask scheduler, e.g. tcp://host:8786 "
                                                                "(default: a local cluster on this machine)")
    parser.add_argument("--workers", metavar="N", type=whole_number(parser.prog, "--workers", 1),
                        help="worker processes of the local cluster (default: one per core)")


def _utc(text: str) -> str:
    from datetime import UTC, datetime

    try:
        moment = datetime.fromisoformat(text)
    except ValueError:
        raise ConfigError("acqd fleet drift", "--since", f"{text!r} is not an ISO 8601 time, e.g. "
                                                         "2026-12-01T00:00:00+00:00") from None
    return (moment if moment.tzinfo else moment.replace(tzinfo=UTC)).astimezone(UTC).isoformat()


def sync_command(args: argparse.Namespace) -> int:
    from ..fleet.archive import open_archive
    from ..fleet.sync import sync

    archive = open_archive(args.url, args.endpoint_url)
    runlog = _prune_log(args.data_dir) if args.prune is not None else None  # what --prune removes is logged
    try:
        report = sync(args.data_dir, archive, fallback_bench_id=args.bench_id or "", verify=args.verify,
                      prune_days=args.prune, log=runlog.write if runlog else None)
    finally:
        if runlog:
            runlog.close()
    if args.json:
        sys.stdout.write(json.dumps({"url": args.url, "uploaded": report.uploaded, "already": report.already,
                                     "adopted": report.adopted, "bytes_uploaded": report.bytes_uploaded,
                                     "seconds": report.seconds, "pruned": [str(p) for p in report.pruned]},
                                    indent=1) + "\n")
        return 0
    screen = console(wide=True)
    for entry in report.uploaded:
        screen.print(Text(f"sent {entry['key']} ({entry['records']} record(s), {entry['bytes']} bytes, "
                          f"SHA-256 {entry['sha256'][:16]}…)"))
    screen.print(Text(f"{len(report.uploaded)} segment(s) sent to {args.url} ({report.bytes_uploaded} bytes, "
                      f"{report.seconds:.2f} s); {report.already} already there"
                      + (f", {report.adopted} found complete and listed" if report.adopted else "")))
    if args.prune is not None:
        for path in report.pruned:
            screen.print(Text(f"removed {path}"))
        screen.print(Text(f"{len(report.pruned)} local segment(s) removed: verified in the archive, last record "
                          f"more than {args.prune} day(s) old"))
    return 0


def _prune_log(data_dir: Path) -> Any:
    """The data directory's run log, where ``--prune`` records each segment it removes (appended line by
    line, so a daemon writing the same log meanwhile loses nothing)."""
    from ..campaign.runlog import RunLog
    from ..campaign.status import RUNLOG

    if not data_dir.is_dir():
        raise ConfigError(str(data_dir), "", "no such data directory")
    return RunLog(data_dir / RUNLOG)


def fleet_ls_command(args: argparse.Namespace) -> int:
    from rich.table import Table

    from ..fleet.analysis import archived_segments, listing
    from ..fleet.archive import open_archive

    rows = listing(archived_segments(open_archive(args.url, args.endpoint_url)))
    if args.json:
        sys.stdout.write(json.dumps(rows, indent=1) + "\n")
        return 0
    table = Table(title=f"{args.url}: {sum(r['records'] for r in rows)} record(s) of {len({r['bench'] for r in rows})} "
                        "bench(es)", show_edge=False, header_style="bold")
    for column in ("bench", "campaign", "segments", "records", "first UTC", "last UTC"):
        table.add_column(column, justify="right" if column in ("segments", "records") else "left")
    for r in rows:
        table.add_row(Text(r["bench"]), Text(r["campaign"]), str(r["segments"]), str(r["records"]),
                      utc_text(r["first_utc"] or "-"), utc_text(r["last_utc"] or "-"))
    console(wide=True).print(table)
    return 0


def fleet_drift_command(args: argparse.Namespace) -> int:
    from ..campaign.drift import drift_table
    from ..fleet.analysis import cluster, drift_task, fleet_drift, run_per_segment, segments_to_analyse, write_figures
    from ..fleet.archive import open_archive

    refs = segments_to_analyse(open_archive(args.url, args.endpoint_url))
    with cluster(args.scheduler, args.workers) as client:
        parts = run_per_segment(client, drift_task, refs, url=args.url, endpoint_url=args.endpoint_url)
    entries = [e for part in parts for e in part]
    drift = fleet_drift(entries, serial=args.serial, since=args.since)
    written = write_figures(drift, entries, args.figures) if args.figures is not None else []
    if args.json:
        sys.stdout.write(json.dumps(drift.to_dict(), indent=1, allow_nan=False) + "\n")
        return 0
    screen = console(wide=True)
    for summary in drift.benches + drift.serials:
        screen.print(drift_table(summary))
    screen.print(distribution_table(drift.distributions))
    screen.print(Text(f"bench against bench: {drift.method}"))
    if written:
        screen.print(Text(f"wrote {len(written)} file(s) into {args.figures}"))
    return 0


def distribution_table(distributions: list[dict]) -> Table:
    """Each fitted parameter across the fleet: its spread, the ANOVA, and the benches that read apart."""

    from ..display import label, si

    table = Table(title="the fleet's fitted parameters", show_edge=False, header_style="bold")
    for column in ("parameter", "n", "median", "5 % … 95 %", "ANOVA p", "benches that differ"):
        table.add_column(column, justify="right" if column == "n" else "left")
    for d in distributions:
        unit = d.get("unit", "")
        differs = [b["bench"] for b in d["benches"] if b.get("differs")]
        anova = d["anova"]
        table.add_row(Text(label(d["parameter"])), str(d["n"]), si(d["median"], unit, 5),
                      f"{si(d['p5'], unit, 4)} … {si(d['p95'], unit, 4)}",
                      f"{anova['p_value']:.3g}" if anova else "-",
                      Text(", ".join(differs), style="yellow") if differs else "none")
    return table


def fleet_compare_command(args: argparse.Namespace) -> int:
    import pyarrow.parquet as pq

    from ..compare import parse_dut_table
    from ..fleet.analysis import (cluster, compare_summary, compare_table, compare_task, run_per_segment,
                                  segments_to_analyse)
    from ..fleet.archive import open_archive
    from ..profile import load_profile

    if not args.profile:
        raise ConfigError("acqd fleet compare", "--profile", "required: the profile whose [dut] table to compare with")
    profile = load_profile(args.profile)
    if "model" not in profile.dut:
        raise ConfigError(profile.source, "dut.model", "missing; fleet compare needs a model to compare with")
    parse_dut_table(profile.dut, profile.source, profile.text)  # a bad table is one line before any task runs
    refs = segments_to_analyse(open_archive(args.url, args.endpoint_url))
    with cluster(args.scheduler, args.workers) as client:
        parts = run_per_segment(client, compare_task, refs, url=args.url, endpoint_url=args.endpoint_url,
                                dut_json=json.dumps(profile.dut), source=profile.source)
    table = compare_table([row for part in parts for row in part])
    try:
        pq.write_table(table, args.out)
    except OSError as exc:
        raise ConfigError(str(args.out), "", f"cannot be written ({exc})") from None
    summary = compare_summary(table)
    if args.json:
        sys.stdout.write(json.dumps({"out": str(args.out), "records": table.num_rows, "benches": summary}, indent=1) + "\n")
        return 0
    screen = console(wide=True)
    for s in summary:
        screen.print(Text(f"{s['bench']}: {s['records']} record(s), {s['pass']} pass, {s['fail']} fail, "
                          f"{s['untested']} untested, {s['errors']} not compared"))
    screen.print(Text(f"wrote {table.num_rows} row(s) to {args.out}"))
    return 0
