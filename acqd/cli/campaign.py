"""``acqd daemon``, ``acqd status`` and ``acqd drift``: run campaigns, see where they are, see what drifted."""

from __future__ import annotations

import argparse
import dataclasses
import json
import sys
from pathlib import Path
from typing import Any

from rich.table import Table
from rich.text import Text

from ..errors import ConfigError
from .common import (SAFETY_NOTE, add_bench_id, add_command, add_data_dir, add_figures, add_json, add_last, add_store,
                     console)
from .fleet import add_verify


def register(sub: argparse._SubParsersAction) -> None:
    p = add_command(sub, "daemon", help="run campaigns on their schedules until finished or stopped",
                    description="Run the [campaign] of each PROFILE on its schedule, storing every record with "
                                "its comparator result in the data directory. SIGTERM or Ctrl-C stops cleanly "
                                "(outputs off, files closed); started again, it carries on where it was. "
                                + SAFETY_NOTE)
    p.add_argument("profiles", type=Path, nargs="+", metavar="PROFILE", help="bench profile with a [campaign] table")
    add_data_dir(p)
    p.add_argument("--plain", action="store_true", help="one line per event even in a terminal (no live view)")
    add_bench_id(p, "this bench's name in every record, in place of the profiles' [bench] bench_id")
    p.add_argument("--sync", metavar="URL", help="send each finished segment to this archive from a background "
                                                 "thread (see acqd sync); acquisition never waits for it")
    p.add_argument("--endpoint-url", metavar="URL", help="with --sync: an S3-compatible store's endpoint, in "
                                                         "place of AWS_ENDPOINT_URL or the client's configuration")
    add_verify(p, "--sync-verify")
    p.set_defaults(func=daemon_command)

    p = add_command(sub, "status", help="every campaign of a data directory: next slot, counts, last verdicts",
                    description="Where each campaign of the daemon's data directory is: whether a daemon is "
                                "running, each campaign's next slot, its counts of slots done, missed and failed, "
                                "its last verdicts and its last event. Reads the daemon's files only.")
    add_data_dir(p)
    add_json(p)
    p.add_argument("--by-unit", action="store_true",
                   help="each campaign's records per unit serial too (a batch), read from its store")
    p.set_defaults(func=status_command)

    p = add_command(sub, "drift", help="fitted parameters and metrics over time, with a trend per parameter",
                    description="Trend of every fitted parameter and metric in a record store, from the analysis "
                                "stored with each record: least-squares slope per hour with its 95 % interval and "
                                "the records outside tolerance; --figures writes a PNG per parameter and the JSON "
                                "summary.")
    add_store(p)
    add_last(p, "of the store")
    add_json(p, "print the JSON summary instead of a table")
    add_figures(p, "write drift.json and one PNG per parameter into DIR")
    p.add_argument("--by-unit", action="store_true",
                   help="a trend per unit serial (a batch's records), not one pooled over the units")
    p.set_defaults(func=drift_command)


def daemon_command(args: argparse.Namespace) -> int:
    from ..campaign.daemon import Daemon

    screen = console()
    return Daemon(args.profiles, args.data_dir, screen,
                  live=screen.is_terminal and not args.plain, bench_id=args.bench_id or "",
                  sync_url=args.sync, endpoint_url=args.endpoint_url, sync_verify=args.sync_verify).run()


def status_command(args: argparse.Namespace) -> int:
    from ..campaign.status import as_json, collect, daemon_pid, status_table

    statuses = collect(args.data_dir)
    pid = daemon_pid(args.data_dir)
    units = {s.name: _units_of(s.store) for s in statuses} if args.by_unit else {}
    if args.json:
        text = as_json(statuses, pid)
        if args.by_unit:
            data = json.loads(text)
            data["units"] = {name: [dataclasses.asdict(u) for u in found] for name, found in units.items()}
            text = json.dumps(data, indent=2)
        print(text)
        return 0
    screen = console(wide=True)
    screen.print(Text(f"{args.data_dir}: " + (f"daemon running (pid {pid})" if pid else "no daemon running")))
    screen.print(status_table(statuses))
    for s in statuses:
        if s.last_event:
            event = s.last_event
            screen.print(Text(f"{s.name}: last event {event['utc'][:19]} {event['event']}"))
    for name, found in units.items():
        if found:
            screen.print(unit_table(name, found))
    return 0


def _units_of(store: str) -> list[Any]:
    """A campaign's records per unit, read-only from its store (none yet: an empty list)."""
    from ..store import open_records
    from ..units import records_by_unit

    try:
        with open_records(store) as reader:
            summaries = reader.index()
            return records_by_unit([r.index for r in summaries], [r.verdict for r in summaries],
                                   [reader.metadata(r.index) for r in summaries])
    except ConfigError:  # the campaign has stored nothing yet
        return []


def unit_table(campaign: str, units: list[Any]) -> Table:
    """One row per unit: its switch path, records, passes, failures and last verdicts (oldest first)."""
    from ..campaign.status import LAST_VERDICTS, verdict_mark

    table = Table(title=f"{campaign}: {len(units)} unit(s)", show_edge=False, header_style="bold")
    for column, justify in (("unit", "left"), ("switch path", "left"), ("records", "right"), ("pass", "right"),
                            ("fail", "right"), (f"last {LAST_VERDICTS}", "left")):
        table.add_column(column, justify=justify, no_wrap=True)
    for u in units:
        last = "".join(verdict_mark(v) for v in u.verdicts[-LAST_VERDICTS:])
        table.add_row(Text(u.serial), Text(" ".join(u.paths) or "-"), str(len(u.records)),
                      str(u.verdicts.count("pass")), str(u.verdicts.count("fail")), last)
    return table


def drift_command(args: argparse.Namespace) -> int:
    from ..campaign.drift import analyse_store, drift_table, write_outputs

    summary = analyse_store(args.store, last=args.last, by_unit=args.by_unit)
    if args.figures is not None:
        written = write_outputs(summary, args.figures)
    if args.json:
        sys.stdout.write(summary.to_json() + "\n")
    else:
        screen = console(wide=True)
        screen.print(drift_table(summary))
        for line in summary.notes:
            screen.print(Text(line))
        if args.figures is not None:
            screen.print(Text(f"wrote {', '.join(str(p) for p in written)}"))
    return 0
