"""``acqd run PROFILE``: N step tests back to back, each stored durably before its line is printed."""

from __future__ import annotations

import argparse
import signal
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path
from types import FrameType
from typing import Any

from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn
from rich.text import Text

from ..benchsession import Replay, open_bench
from ..errors import AcqdError, ConfigError, InstrumentError
from ..judge import make_judge
from ..plan import ready_profile
from ..record import Record
from ..steptest import Applied, check_limits, output_guard, run_step_test
from ..store import RecordStore
from .common import SAFETY_NOTE, add_command, add_count, add_out, console, record_line
from .sim import parse_selection


class Terminated(KeyboardInterrupt):
    """SIGTERM, raised where the program is so the output guard switches the generator off on the way out."""


@contextmanager
def sigterm_raises() -> Iterator[None]:
    def handler(signum: int, frame: FrameType | None) -> None:
        raise Terminated()

    previous = signal.signal(signal.SIGTERM, handler)
    try:
        yield
    finally:
        signal.signal(signal.SIGTERM, previous)


def register(sub: argparse._SubParsersAction) -> None:
    p = add_command(sub, "run", help="run step tests from a profile and store every record",
                    description="Run N step tests from PROFILE on its bench, compare each record with the "
                                "profile's [dut] table and store it in HDF5 before its line is printed. "
                                + SAFETY_NOTE)
    p.add_argument("profile", type=Path, metavar="PROFILE", help="bench profile (TOML)")
    add_count(p)
    add_out(p, "the record store to append to (default: the profile's output.file)")
    p.add_argument("--replay", type=Path, default=None, metavar="FILE",
                   help="serve the records stored in FILE as the scope instead of the profile's bench")
    p.add_argument("--records", type=parse_selection, default=None, metavar="LIST",
                   help="with --replay: which stored records, in order (e.g. 0,2,5-9)")
    p.set_defaults(func=run_command)


def run_command(args: argparse.Namespace) -> int:
    if args.records is not None and args.replay is None:
        raise ConfigError("command line", "--records", "only has a meaning with --replay FILE")
    profile = ready_profile(args.profile)
    judge = make_judge(profile)  # validates [dut] before anything is started
    out = args.out or profile.output.file
    screen = console(soft_wrap=True)
    replay = Replay(args.replay, args.records) if args.replay is not None else None
    if replay is None:  # a replay drives no output: the caution would only teach people to skip it
        screen.print(Text(SAFETY_NOTE))
    stored, failed = 0, 0
    with sigterm_raises(), open_bench(profile, replay) as bench:
        check_limits(profile, bench.generator)
        out.parent.mkdir(parents=True, exist_ok=True)
        applied = Applied()  # the run configures once: later step tests send only what the plan changes
        with RecordStore(out, fsync=profile.output.fsync, rotate_records=profile.output.rotate_records) as store, \
                _progress(screen) as progress, output_guard(bench.generator):
            task = progress.add_task(profile.name, total=args.count)
            for _ in range(args.count):
                try:
                    records = run_step_test(profile, bench.generator, bench.scope, applied)
                except InstrumentError as exc:
                    failed += 1
                    progress.console.print(Text(f"not acquired: {exc}"))
                    progress.advance(task)
                    continue
                for record in records:
                    record.analysis = _judged(judge, record, progress.console)
                    index = store.append(record)
                    stored += 1
                    progress.console.print(record_line(index, record))
                progress.advance(task)
    screen.print(Text(f"{stored} record(s) stored in {out}; {failed} step test(s) not acquired"))
    return 1 if failed else 0


def _judged(judge: Callable[[Record], dict[str, Any]] | None, record: Record,
            console: Console) -> dict[str, Any] | None:
    """The comparator's result; a comparator failure is reported but never costs the record itself."""
    if judge is None:
        return None
    try:
        return judge(record)
    except AcqdError as exc:
        console.print(Text(f"not compared: {exc}"))
        return None


@contextmanager
def _progress(console: Console) -> Iterator[Progress]:
    with Progress(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(), TimeElapsedColumn(),
                  console=console, transient=True) as progress:
        yield progress
