"""``acqd report STORE -o FILE``: one self-contained HTML page of a store's records.

The page shows the comparison stored with each record when it was taken; ``--recompute`` compares every
record again (with ``-p``'s [dut] table, or each record's own), which costs a fit per record. Exit status
0 when the page was written, 2 on bad input.
"""

from __future__ import annotations

import argparse
import sys
from typing import TYPE_CHECKING

from rich.text import Text

from ..errors import ConfigError
from .common import add_command, add_last, add_out, add_profile, add_store, console, printable, progress_bar
from .sim import parse_selection

if TYPE_CHECKING:
    from ..report.html import SpecFor

CLI = "acqd report"


def register(sub: argparse._SubParsersAction) -> None:
    p = add_command(sub, "report", help="write an HTML run report of a record store",
                    description="Write one self-contained HTML page of a store's records (or the last N): what "
                                "was tested (DUT name and serial, stimulus, instruments), the verdict counts, the "
                                "fitted parameters over time against their tolerances, one row with a thumbnail "
                                "per record, and full figures for the failed records and those named by --full. "
                                "It shows the comparison stored with each record; --recompute compares again.")
    add_store(p)
    add_out(p, "the HTML file to write (e.g. report.html); its folder is made if missing", required=True)
    add_profile(p, "with --recompute: compare with this profile's [dut] table (default: each record's own)")
    add_last(p, "in the report")
    p.add_argument("--recompute", action="store_true",
                   help="compare every record again instead of showing the stored comparison (a fit per record)")
    p.add_argument("--full", type=lambda text: parse_selection(text, "--full"), default=[], metavar="LIST",
                   help="records drawn in full besides the failed ones, by index (e.g. 0,2,5-9)")
    p.set_defaults(func=run_report)


def _recompute(args: argparse.Namespace) -> SpecFor | None:
    """What ``--recompute`` compares each record with; None without it."""
    if args.profile and not args.recompute:
        raise ConfigError(CLI, "--profile", "only with --recompute: without it the report shows the comparison "
                                            "stored with each record")
    if not args.recompute:
        return None
    from ..report import spec_from_record

    if not args.profile:
        return spec_from_record
    from ..compare import parse_dut_table
    from ..profile import load_profile

    profile = load_profile(args.profile)
    spec = parse_dut_table(profile.dut, profile.source, profile.text)
    return lambda record: spec


def run_report(args: argparse.Namespace) -> int:
    recompute = _recompute(args)
    from ..report import write_report  # matplotlib only for this sub-command
    from ..store import open_records

    with open_records(args.store) as reader:
        for note in reader.notes:
            print(f"acqd: note: {printable(note)}", file=sys.stderr)
        numbers = [s.index for s in reader.index()]
        if not numbers:
            raise ConfigError(args.store, "", "holds no records")
        chosen = numbers if args.last is None else numbers[-args.last:]
        missing = sorted(set(args.full) - set(chosen))
        if missing:
            raise ConfigError(CLI, "--full", f"record {missing[0]} is not among the records reported "
                                             f"({chosen[0]}-{chosen[-1]})")
        with progress_bar(console(stderr=True)) as progress:
            task = progress.add_task("report", total=len(chosen))
            written = write_report(reader, args.out, chosen, args.store, recompute=recompute, full=args.full,
                                   progress=lambda: progress.advance(task))
    counts = ", ".join(f"{n} {verdict}" for verdict, n in written.counts.items())
    console().print(Text(f"wrote {written.path} ({written.size_bytes / 1e3:.0f} kB): {len(chosen)} record(s), "
                         f"{counts}; {len(written.full)} drawn in full"), soft_wrap=True)
    return 0
