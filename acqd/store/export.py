"""CSV export of one record: plain CSV that any reader parses, with the metadata in a JSON file beside it.

Why no ``#`` comment lines at the top: the CSV format (RFC 4180) has no comments, and spreadsheet
programs and ``csv``/``numpy.loadtxt`` without extra options read them as data. So ``OUT.csv`` holds only
a header row and numbers, and ``OUT.csv.json`` holds what ``acqd show --json`` prints for the record.

Columns: ``t_s`` (seconds from the trigger), then one per channel named ``<name>_<unit>``, matching the
project's habit of putting the unit after the name. Numbers are written with ``repr``, the shortest text
that reads back as exactly the same float64, so nothing is lost.
"""

from __future__ import annotations

import csv
import json
from pathlib import Path

from ..errors import ConfigError
from .reader import RecordReader


def column_name(name: str, unit: str) -> str:
    return f"{name}_{unit}" if unit else name


def export_csv(reader: RecordReader, index: int, out_path: str | Path) -> Path:
    """Write record ``index`` to ``out_path`` (CSV) and its metadata to ``out_path`` + ``.json``; returns the latter."""
    out = Path(out_path)
    record = reader.read(index)
    meta_path = out.with_name(out.name + ".json")
    columns = [record.timebase.times().tolist(), *[ch.samples.tolist() for ch in record.channels]]
    try:
        with open(out, "w", newline="", encoding="utf-8") as fh:
            writer = csv.writer(fh)
            writer.writerow(["t_s", *[column_name(ch.name, ch.unit) for ch in record.channels]])
            writer.writerows([repr(value) for value in row] for row in zip(*columns, strict=True))
        with open(meta_path, "w", encoding="utf-8") as fh:
            json.dump(reader.metadata(index), fh, indent=2, ensure_ascii=False)
            fh.write("\n")
    except OSError as exc:
        raise ConfigError(str(exc.filename or out), "", f"cannot write the export: {exc.strerror}") from None
    return meta_path
