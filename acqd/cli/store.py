"""``acqd ls``, ``acqd show`` and ``acqd export``: look into a record store without writing to it."""

from __future__ import annotations

import argparse
import dataclasses
import json
import sys
from typing import Any

from rich.table import Table
from rich.text import Text

from ..display import edge_label, si, stimulus_text
from ..store import RecordReader, RecordSummary, export_csv, open_records
from ..units import records_by_unit
from .common import (add_command, add_json, add_out, add_record, add_store, chosen_record, console, utc_text,
                     printable, verdict_text)
from .results import renderables


def register(subparsers: argparse._SubParsersAction) -> None:
    ls = add_command(subparsers, "ls", help="list the records of a store (index only, no samples read)",
                     description="List the records of a store from its index alone, without reading samples: "
                                 "index, UTC time, edge, samples per channel and verdict.")
    add_store(ls)
    add_json(ls)
    ls.add_argument("--by-unit", action="store_true",
                    help="one line per unit serial (a batch): its switch path, records and verdicts "
                         "(reads each record's metadata, still no samples)")
    ls.set_defaults(func=_ls)

    show = add_command(subparsers, "show", help="summarise one record: DUT, stimulus, instruments, verdict, fit",
                       description="Summarise one record: when it was taken, the DUT, the stimulus, the capture, "
                                   "the instruments, and the comparator's verdict with its fitted values, metrics "
                                   "and reasons. --json prints everything the record carries except its samples, "
                                   "including the instruments' read-back settings and the full profile text.")
    add_store(show)
    add_record(show)
    add_json(show, "print all the record's metadata as JSON instead (includes the full profile text)")
    show.set_defaults(func=_show)

    export = add_command(subparsers, "export", help="write one record as CSV (metadata in FILE.json)",
                         description="Write one record's samples as plain CSV (a time column 't [s]', then one column "
                                     "per channel) to FILE, and all its metadata as JSON to FILE.json beside it.")
    add_store(export)
    add_record(export)
    add_out(export, "the CSV file to write; the metadata goes to FILE.json", required=True)
    export.set_defaults(func=_export)


def _open(path: str) -> RecordReader:
    reader = open_records(path)
    for note in reader.notes:
        print(f"acqd: note: {printable(note)}", file=sys.stderr)
    return reader


def _ls(args: argparse.Namespace) -> int:
    with _open(args.store) as reader:
        summaries = reader.index()
        if args.by_unit:
            return _ls_by_unit(args, summaries, [reader.metadata(s.index) for s in summaries])
    if args.json:
        print(json.dumps([dataclasses.asdict(s) for s in summaries], indent=1))
        return 0
    def channels_of(s: RecordSummary) -> str:
        return ", ".join(f"{n} [{u}]" if u else n for n, u in zip(s.channel_names, s.units, strict=True))

    # Records of one store nearly always share their channels: then they are said once, under the table.
    shared = {channels_of(s) for s in summaries}
    per_row = len(shared) > 1
    table = Table(caption=None if per_row or not summaries else Text(f"channels: {shared.pop()}"))
    columns = [("index", "right"), ("UTC", "left"), ("edge", "left")]
    columns += [("channels", "left")] if per_row else []
    columns += [("samples", "right"), ("verdict", "left")]
    for name, justify in columns:
        table.add_column(name, justify=justify, no_wrap=name != "channels")
    for s in summaries:
        row = [str(s.index), utc_text(s.utc), edge_label(s.edge, s.low_v, s.high_v)]
        row += [Text(channels_of(s))] if per_row else []
        table.add_row(*row, str(s.n_samples), verdict_text(s.verdict))
    out = console()
    out.print(Text(f"{args.store}: {len(summaries)} record(s)"), soft_wrap=True)  # a long path must not wrap
    out.print(table)
    return 0


def _ls_by_unit(args: argparse.Namespace, summaries: list[RecordSummary], metas: list[dict[str, Any]]) -> int:
    """The records grouped by the unit they are of, in the order each unit first appears."""
    units = records_by_unit([s.index for s in summaries], [s.verdict for s in summaries], metas)
    if args.json:
        print(json.dumps([dataclasses.asdict(u) for u in units], indent=1))
        return 0
    table = Table()
    for name, justify in (("serial", "left"), ("switch path", "left"), ("records", "right"), ("pass", "right"),
                          ("fail", "right"), ("last", "left")):
        table.add_column(name, justify=justify, no_wrap=True)
    for u in units:
        table.add_row(Text(u.serial), Text(" ".join(u.paths) or "-"), str(len(u.records)),
                      str(u.verdicts.count("pass")), str(u.verdicts.count("fail")), verdict_text(u.verdicts[-1]))
    out = console()
    out.print(Text(f"{args.store}: {len(summaries)} record(s) of {len(units)} unit(s)"), soft_wrap=True)
    out.print(table)
    return 0


def _show(args: argparse.Namespace) -> int:
    with _open(args.store) as reader:
        index = chosen_record(reader, args.store, args.record)
        meta = reader.metadata(index)
    if args.json:
        print(json.dumps(meta, indent=2, ensure_ascii=False))
        return 0
    out = console(wide=True)
    for line in summary_lines(args.store, meta):
        out.print(Text(line), soft_wrap=True)
    analysis = meta.get("analysis")
    if analysis and "channels" in analysis:
        for part in renderables(analysis):
            out.print(part, soft_wrap=isinstance(part, Text))
    else:
        why = (analysis or {}).get("error")
        out.print(Text("verdict: ").append_text(verdict_text(None)).append(f" ({why})" if why else ""), soft_wrap=True)
    lines = len(meta.get("profile_text", "").splitlines())
    out.print(Text(f"(acqd show --json prints everything: read-back settings, the whole analysis, the profile "
                   f"text of {lines} lines)"), soft_wrap=True)
    return 0


FIELD_WIDTH = 12


def summary_lines(store: str, meta: dict[str, Any]) -> list[str]:
    """The record's identity, DUT, stimulus, capture, channels and instruments, one labelled line each."""
    tb = meta["timebase"]
    dut = meta.get("dut") or {}
    who = ", ".join(str(v) for v in (dut.get("name"), dut.get("serial") and f"serial {dut['serial']}",
                                      dut.get("model") and f"model {dut['model']}") if v)
    interval = tb["sample_interval_s"]
    capture = (f"{tb['n_samples']} samples every {si(interval, 's', trim=True)} ({si(interval * tb['n_samples'], 's')}, "
               f"{si(interval * tb['pretrigger_samples'], 's')} before the edge), "
               f"{meta.get('averages', 1)} average(s)")
    stimulus = stimulus_text(meta["stimulus"])
    channels = ", ".join(f"{c['name']} [{c['unit']}] " + (f"({c['source']})" if c["source"].upper().startswith("CH")
                                                          else f"= {c['source']}") for c in meta["channels"])
    instruments = "; ".join(f"{role} {idn}" for role, idn in (meta.get("identities") or {}).items())
    fields = [("DUT", who or "(no [dut] table)"), ("stimulus", stimulus), ("capture", capture),
              ("channels", channels), ("instruments", instruments or "-")]
    return [f"record {meta['index']} of {store}, {utc_text(meta['utc'])} UTC (acqd {meta.get('acqd_version', '?')})",
            *(f"{name:<{FIELD_WIDTH}} {value}" for name, value in fields)]


def _export(args: argparse.Namespace) -> int:
    with _open(args.store) as reader:
        meta_path = export_csv(reader, chosen_record(reader, args.store, args.record), args.out)
    print(f"wrote {args.out} and {meta_path}")
    return 0
