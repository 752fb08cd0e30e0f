"""``acqd daemon``, ``acqd status`` and ``acqd drift``: run campaigns, see where they are, see what drifted."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from rich.console import Console

from .common import SAFETY_NOTE

DEFAULT_DATA = Path("data")


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("daemon", help="run campaigns on their schedules until finished or stopped",
                       description="Run the [campaign] of each PROFILE on its schedule, storing every record with "
                                   "its comparator result in DATA. SIGTERM or Ctrl-C stops cleanly (outputs off, "
                                   "files closed); started again, it carries on where it was. " + SAFETY_NOTE)
    p.add_argument("profiles", type=Path, nargs="+", metavar="PROFILE", help="bench profile with a [campaign] table")
    p.add_argument("--data", type=Path, default=DEFAULT_DATA,
                   help="data directory: records, run log, job store (default: ./data)")
    p.add_argument("--plain", action="store_true", help="one line per event even in a terminal (no live view)")
    p.set_defaults(func=daemon_command)

    p = sub.add_parser("status", help="every campaign of a data directory: next slot, counts, last verdicts")
    p.add_argument("data", type=Path, nargs="?", default=DEFAULT_DATA, metavar="DATA_DIR",
                   help="the daemon's data directory (default: ./data)")
    p.add_argument("--json", action="store_true", help="print JSON instead of a table")
    p.set_defaults(func=status_command)

    p = sub.add_parser("drift", help="fitted parameters and metrics over time, with a trend per parameter",
                       description="Trend of every fitted parameter and metric in a record store: least-squares "
                                   "slope per hour with its 95 % interval, records outside tolerance, a PNG per "
                                   "parameter and a JSON summary.")
    p.add_argument("file", type=Path, metavar="FILE", help="record store (e.g. data/night.h5) or one segment file")
    p.add_argument("--json", action="store_true", help="print the JSON summary instead of a table")
    p.add_argument("--out", type=Path, default=None, help="write drift.json and one PNG per parameter here")
    p.set_defaults(func=drift_command)


def wide_console() -> Console:
    """The terminal's width in a terminal; in a pipe or a log file, wide enough that tables do not wrap."""
    console = Console()
    return console if console.is_terminal else Console(width=160)


def daemon_command(args: argparse.Namespace) -> int:
    from ..campaign.daemon import Daemon

    console = Console()
    return Daemon(args.profiles, args.data, console, live=console.is_terminal and not args.plain).run()


def status_command(args: argparse.Namespace) -> int:
    from ..campaign.status import as_json, collect, daemon_pid, status_table

    statuses = collect(args.data)
    pid = daemon_pid(args.data)
    if args.json:
        print(as_json(statuses, pid))
        return 0
    console = wide_console()
    console.print(f"{args.data}: " + (f"daemon running (pid {pid})" if pid else "no daemon running"))
    console.print(status_table(statuses))
    for s in statuses:
        if s.last_event:
            event = s.last_event
            console.print(f"[dim]{s.name}: last event {event['utc'][:19]} {event['event']}[/dim]", highlight=False)
    return 0


def drift_command(args: argparse.Namespace) -> int:
    from ..campaign.drift import analyse_store, drift_table, write_outputs

    summary = analyse_store(args.file)
    if args.out is not None:
        written = write_outputs(summary, args.out)
    if args.json:
        sys.stdout.write(summary.to_json() + "\n")
    else:
        console = wide_console()
        console.print(drift_table(summary))
        for line in summary.notes:
            console.print(f"[yellow]{line}[/yellow]", highlight=False)
        if args.out is not None:
            console.print(f"wrote {', '.join(str(p) for p in written)}")
    return 0
