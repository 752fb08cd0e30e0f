"""Recovery of a live segment left behind by a writer that died, and the check readers run first.

The risky part - opening a file that a killed process left half-written - runs in a child process
(``main`` below), because a damaged HDF5 file can crash the process that opens it. The
child opens the ``.part`` with ``swmr=True`` (the writer's SWMR mode makes this work without clearing the
superblock's status flags, which needs ``h5clear`` that may not be installed), keeps the verified prefix
of records - each row, blob and sample chunk checked against its CRC-32 - and writes it into a fresh file.

Why a fresh copy instead of repairing in place: a file still marked as open by a SWMR writer is refused by
plain readers (h5dump, h5py without ``swmr``), and clearing that mark means editing the superblock by
hand. The copy is a normal closed file, is bounded by the rotation size, and only happens after a crash.

The parent then renames the copy into place and either deletes the ``.part`` - when all it lost was the
one record whose ``append()`` had not returned - or keeps it as ``.damaged`` when anything more failed
verification or the file could not be opened at all. Nothing acknowledged is ever deleted silently; every
action is returned as a note (and logged on the ``acqd.store`` logger).
"""

from __future__ import annotations

import json
import logging
import os
import subprocess
import sys
from pathlib import Path

from ..errors import AcqdError, ConfigError
from . import faults
from .naming import CREATING, DAMAGED, LIVE, RECOVERING, Segment, StorePaths, os_reason, replace_durably, sync_directory
from .schema import encode
from .segment import SegmentView, SegmentWriter, create_segment

log = logging.getLogger("acqd.store")
CHILD_TIMEOUT_S = 600.0
_CHILD = "import sys; from acqd.store.recovery import main; sys.exit(main(sys.argv[1:]))"
NOT_A_STORE, CANNOT_WRITE = 3, 4  # the child's exit statuses besides 0


class _CannotWrite(Exception):
    """The child could read the segment but not write the copy (a full disk): never a reason to demote it."""


def _run_child(*args: str) -> tuple[dict | None, str]:
    """Run this module in a child process; (its JSON report, "") or (None, why it failed). A failure to
    write the copy raises ``_CannotWrite`` instead, because it says nothing about the segment itself."""
    env = {k: v for k, v in os.environ.items() if k != faults.ENV}
    try:
        proc = subprocess.run(
            [sys.executable, "-c", _CHILD, *args], capture_output=True, text=True, env=env, timeout=CHILD_TIMEOUT_S
        )
    except subprocess.TimeoutExpired:
        return None, f"opening it did not finish within {CHILD_TIMEOUT_S:.0f} s"
    lines = proc.stderr.strip().splitlines()
    why = lines[-1] if lines else f"exit status {proc.returncode}"
    if proc.returncode == 0:
        return json.loads(proc.stdout), ""
    if proc.returncode == CANNOT_WRITE:
        raise _CannotWrite(why)
    if proc.returncode < 0:
        return None, f"the process opening it died of signal {-proc.returncode}"
    return None, why


def examine(path: Path) -> str:
    """Why ``path`` (a live segment) cannot be opened safely, or "" if it can; readers ask before opening it."""
    report, why = _run_child("examine", str(path))
    return "" if report is not None else why


def damaged_extent(path: Path) -> tuple[int | None, int] | str:
    """What a ``.damaged`` segment holds, opened in a child: (its first verified row's record index or None,
    rows in its index), or why it cannot be opened at all."""
    report, why = _run_child("examine", str(path))
    if report is None:
        return why
    return report["first_index"], report["index_rows"]


def recover_store(paths: StorePaths) -> list[str]:
    """Finish every segment a dead writer left unfinished; returns one note per action taken."""
    notes = []
    segments = paths.segments()
    finished = {s.number for s in segments if s.state == ""}
    for seg in segments:
        if seg.state in (CREATING, RECOVERING):
            seg.path.unlink()
            kind = "a new segment that never held a record" if seg.state == CREATING else "an interrupted recovery copy"
            notes.append(f"{seg.path}: removed {kind}")
    for seg in segments:
        if seg.state == LIVE and seg.number in finished:
            seg.path.unlink()
            notes.append(f"{seg.path}: removed; its records were already recovered into {paths.finished(seg.number)}")
        elif seg.state == LIVE:
            notes.append(_recover_segment(paths, seg))
    if notes:
        sync_directory(paths.directory)
    for note in notes:
        log.warning(note)
    return notes


def _recover_segment(paths: StorePaths, seg: Segment) -> str:
    copy, final = paths.with_state(seg.number, RECOVERING), paths.finished(seg.number)
    damaged = paths.with_state(seg.number, DAMAGED)
    try:
        report, why = _run_child("copy", str(seg.path), str(copy))
    except _CannotWrite as exc:  # the .part is left as it is: acqd ls still reads it, the next writer retries
        copy.unlink(missing_ok=True)
        problem = (f"{seg.path.name} cannot be recovered: writing its copy failed ({exc}); it is kept as it is "
                   f"(acqd ls reads it); free space and open the store again")
        raise ConfigError(str(paths.path), "", problem) from None
    if report is None:
        copy.unlink(missing_ok=True)
        replace_durably(seg.path, damaged)
        return f"{seg.path}: cannot be read ({why}); moved aside to {damaged.name}, its records are not listed"
    kept, rows = report["kept"], report["index_rows"]
    if kept:
        faults.step("recover:copied")
        replace_durably(copy, final)
        faults.step("recover:renamed")
    summary = f"{seg.path}: " + (f"recovered {kept} record(s) into {final.name}" if kept else "held no complete record")
    if rows - kept > 1:
        replace_durably(seg.path, damaged)
        return f"{summary}; {rows - kept} row(s) failed verification, the original is kept as {damaged.name}"
    seg.path.unlink()
    lost = max(rows, report["sample_chunks"]) - kept
    return summary + ("; dropped the unacknowledged last record" if lost else "")


def _copy_verified(part: Path, dest: Path) -> dict:
    """Child side: copy the verified prefix of ``part`` into a new finished file ``dest`` (if not empty)."""
    view = SegmentView(part, live=True)
    writer: SegmentWriter | None = None
    kept = 0
    try:
        for position in range(len(view.rows)):
            try:
                record = view.record(position)
            except AcqdError:
                break
            enc = encode(record, int(record.index), str(dest))
            if writer is None:
                writer = create_segment(dest, enc.layout, swmr=False)
            writer.write(enc, fsync=False)
            kept += 1
        if writer is not None:
            writer.sync()
            writer.close()
    except OSError as exc:
        if writer is not None:  # closed, or HDF5 retries the failed writes when the file is freed, and says so
            try:
                writer.close()
            except Exception:  # noqa: BLE001 - the first failure is the one reported
                pass
        raise _CannotWrite(os_reason(exc)) from None
    return {"kept": kept, "index_rows": view.index_rows, "sample_chunks": view.sample_chunks}


def main(argv: list[str]) -> int:
    """Child side: ``examine PART`` or ``copy PART DEST``; prints a JSON report, exit 3 for a non-store."""
    command, *paths = argv
    try:
        if command == "examine":
            view = SegmentView(Path(paths[0]), live=True)
            first = int(view.rows["index"][0]) if len(view.rows) else None
            report = {"rows": len(view.rows), "first_index": first, "index_rows": view.index_rows}
        else:
            report = _copy_verified(Path(paths[0]), Path(paths[1]))
    except AcqdError as exc:
        print(exc, file=sys.stderr)
        return NOT_A_STORE
    except _CannotWrite as exc:
        print(exc, file=sys.stderr)
        return CANNOT_WRITE
    print(json.dumps(report))
    return 0
