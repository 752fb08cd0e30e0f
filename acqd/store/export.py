"""CSV export of one record: plain CSV that any reader parses, with the metadata in a JSON file beside it.

Why no ``#`` comment lines at the top: the CSV format (RFC 4180) has no comments, and spreadsheet
programs and ``csv``/``numpy.loadtxt`` without extra options read them as data. So ``OUT.csv`` holds only
a header row and numbers, and ``OUT.csv.json`` holds what ``acqd show --json`` prints for the record.

Columns: ``t [s]`` (seconds from the trigger), then one per channel headed ``<name> [<unit>]``, the way an
axis is labelled and the way ``acqd compare`` reads a CSV back (``acqd.record.column_header``). Numbers are
written with ``repr``, the shortest text that reads back as exactly the same float64, so nothing is lost:
``acqd compare OUT.csv`` on the export gives the stored record's result.
"""

from __future__ import annotations

import csv
import json
from pathlib import Path

from ..errors import ConfigError
from ..record import TIME_COLUMN, column_header
from .reader import RecordReader


def export_csv(reader: RecordReader, index: int, out_path: str | Path) -> Path:
    """Write record ``index`` to ``out_path`` (CSV) and its metadata to ``out_path`` + ``.json``; returns the latter."""
    out = Path(out_path)
    record = reader.read(index)
    meta_path = out.with_name(out.name + ".json")
    columns = [record.timebase.times().tolist(), *[ch.samples.tolist() for ch in record.channels]]
    try:
        with open(out, "w", newline="", encoding="utf-8") as fh:
            writer = csv.writer(fh)
            writer.writerow([TIME_COLUMN, *[column_header(ch.name, ch.unit) for ch in record.channels]])
            writer.writerows([repr(value) for value in row] for row in zip(*columns, strict=True))
        with open(meta_path, "w", encoding="utf-8") as fh:
            json.dump(reader.metadata(index), fh, indent=2, ensure_ascii=False)
            fh.write("\n")
    except OSError as exc:
        raise ConfigError(str(exc.filename or out), "", f"cannot write the export: {exc.strerror}") from None
    return meta_path
