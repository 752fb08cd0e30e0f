"""``acqd sync`` and ``acqd fleet``: send a bench's finished segments to the archive, and analyse every
bench's records there on dask.distributed."""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

from rich.text import Text

from .common import add_bench_id, add_command, add_data_dir, add_json, console


def add_archive(parser: argparse.ArgumentParser) -> None:
    """The archive URL and the one client setting a command line may override (never credentials)."""
    parser.add_argument("url", metavar="URL", help="the archive: s3://bucket/prefix or file:///path/to/share")
    parser.add_argument("--endpoint-url", metavar="URL",
                        help="an S3-compatible store's endpoint, in place of AWS_ENDPOINT_URL or the client's "
                             "configuration (credentials always come from the environment or that configuration)")


def register(sub: argparse._SubParsersAction) -> None:
    p = add_command(sub, "sync", help="send the data directory's finished segments to an archive, verified",
                    description="Copy every finished segment of the data directory (never the live .part) to "
                                "the archive at URL as <bench_id>/<campaign>/<segment file>, each read back and "
                                "checked against its SHA-256 before it is listed in the bench's catalog.json. A "
                                "second sync sends nothing; a sync that was killed is finished by the next one. "
                                "Local files are never deleted.")
    add_archive(p)
    add_data_dir(p)
    add_bench_id(p, "the bench id for records that carry none (stores written before [bench] bench_id)")
    add_json(p, "print the sync's report as JSON")
    p.set_defaults(func=sync_command)


def sync_command(args: argparse.Namespace) -> int:
    from ..fleet.archive import open_archive
    from ..fleet.sync import sync

    archive = open_archive(args.url, args.endpoint_url)
    report = sync(args.data_dir, archive, fallback_bench_id=args.bench_id or "")
    if args.json:
        sys.stdout.write(json.dumps({"url": args.url, "uploaded": report.uploaded, "already": report.already,
                                     "adopted": report.adopted, "bytes_uploaded": report.bytes_uploaded,
                                     "seconds": report.seconds}, indent=1) + "\n")
        return 0
    screen = console(wide=True)
    for entry in report.uploaded:
        screen.print(Text(f"sent {entry['key']} ({entry['records']} record(s), {entry['bytes']} bytes, "
                          f"SHA-256 {entry['sha256'][:16]}…)"))
    screen.print(Text(f"{len(report.uploaded)} segment(s) sent to {args.url} ({report.bytes_uploaded} bytes, "
                      f"{report.seconds:.2f} s); {report.already} already there"
                      + (f", {report.adopted} found complete and listed" if report.adopted else "")))
    return 0
