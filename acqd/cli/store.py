"""``acqd ls``, ``acqd show`` and ``acqd export``: look into a record store without writing to it."""

from __future__ import annotations

import argparse
import dataclasses
import json
import sys
from typing import Any

from rich.console import Console
from rich.table import Table

from ..errors import ConfigError
from ..store import RecordReader, RecordSummary, export_csv, open_records


def register(subparsers: argparse._SubParsersAction) -> None:
    ls = subparsers.add_parser("ls", help="list the records of a store (index only, no samples read)")
    ls.add_argument("file", metavar="FILE", help="the store, e.g. data/night.h5, or one segment file")
    ls.add_argument("--json", action="store_true", help="print JSON instead of a table")
    ls.set_defaults(func=_ls)

    show = subparsers.add_parser("show", help="print the metadata of one record")
    show.add_argument("file", metavar="FILE")
    show.add_argument("record", metavar="RECORD", help="record index, as listed by acqd ls")
    show.add_argument("--json", action="store_true", help="print JSON (includes the full profile text)")
    show.set_defaults(func=_show)

    export = subparsers.add_parser("export", help="write one record as CSV (metadata in CSV_PATH.json)")
    export.add_argument("file", metavar="FILE")
    export.add_argument("--record", required=True, metavar="N", help="record index, as listed by acqd ls")
    export.add_argument("--csv", required=True, metavar="OUT", help="CSV file to write")
    export.set_defaults(func=_export)


def _record_index(text: str, flag: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise ConfigError("command line", flag, f"{text!r} is not a record index; give a whole number >= 0") from None
    if value < 0:
        raise ConfigError("command line", flag, f"{value}; record indices start at 0")
    return value


def _open(path: str) -> RecordReader:
    reader = open_records(path)
    for note in reader.notes:
        print(f"acqd: note: {note}", file=sys.stderr)
    return reader


def _ls(args: argparse.Namespace) -> int:
    with _open(args.file) as reader:
        summaries = reader.index()
    if args.json:
        print(json.dumps([dataclasses.asdict(s) for s in summaries], indent=1))
        return 0
    def channels_of(s: RecordSummary) -> str:
        return ", ".join(f"{n} [{u}]" if u else n for n, u in zip(s.channel_names, s.units, strict=True))

    # Records of one store nearly always share their channels: then they are said once, under the table.
    shared = {channels_of(s) for s in summaries}
    per_row = len(shared) > 1
    table = Table(caption=None if per_row or not summaries else f"channels: {shared.pop()}")
    columns = [("index", "right"), ("UTC", "left"), ("edge", "left"), ("levels", "right")]
    columns += [("channels", "left")] if per_row else []
    columns += [("samples", "right"), ("verdict", "left")]
    for name, justify in columns:
        table.add_column(name, justify=justify, no_wrap=name != "channels")
    for s in summaries:
        row = [str(s.index), s.utc[:19].replace("T", " "), s.edge, f"{s.low_v:g} / {s.high_v:g} V"]
        row += [channels_of(s)] if per_row else []
        table.add_row(*row, str(s.n_samples), s.verdict)
    console = Console()
    console.print(f"{args.file}: {len(summaries)} record(s)", soft_wrap=True)  # a long path must not wrap
    console.print(table)
    return 0


def _show(args: argparse.Namespace) -> int:
    index = _record_index(args.record, "RECORD")
    with _open(args.file) as reader:
        meta = reader.metadata(index)
    if args.json:
        print(json.dumps(meta, indent=2, ensure_ascii=False))
        return 0
    text = meta.pop("profile_text")
    meta["profile_text"] = f"({len(text.splitlines())} lines; acqd show --json prints it)"
    table = Table(show_header=False, title=f"record {index}")
    table.add_column("field", style="bold")
    table.add_column("value")
    for key, value in meta.items():
        table.add_row(key, _plain(value))
    Console().print(table)
    return 0


def _plain(value: Any) -> str:
    return value if isinstance(value, str) else json.dumps(value, ensure_ascii=False)


def _export(args: argparse.Namespace) -> int:
    index = _record_index(args.record, "--record")
    with _open(args.file) as reader:
        meta_path = export_csv(reader, index, args.csv)
    print(f"wrote {args.csv} and {meta_path}")
    return 0
