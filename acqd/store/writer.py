"""The writer: ``RecordStore(path)`` appends records durably, rotates segments, recovers on start-up."""

from __future__ import annotations

import os
from pathlib import Path

from ..errors import ConfigError
from ..record import Record
from . import faults
from .lockfile import release_lock, take_lock
from .naming import CREATING, LIVE, StorePaths, fsync_file, replace_durably
from .overview import is_overview, write_overview
from .recovery import recover_store
from .schema import Layout, encode
from .segment import SegmentView, SegmentWriter, create_segment


class RecordStore:
    """Append-only store of records at ``path`` (e.g. ``data/night.h5``; segments are written beside it).

    ``append(record)`` returns the record's global index only once the record would survive a SIGKILL of
    this process and, with ``fsync`` (the default), a power cut. The live segment is finished - closed,
    fsynced and renamed to a plain HDF5 file - after ``rotate_records`` records, when a record's shape
    (channel count, sample count, sample dtype) differs from the live segment's, and on ``close()``.
    Opening a store first recovers whatever a previous writer left unfinished (see ``notes``).
    One writer per store: a second one is refused while the first holds the lock file.
    """

    def __init__(self, path: str | Path, *, fsync: bool = True, rotate_records: int = 1000) -> None:
        self.path = Path(path)
        if isinstance(rotate_records, bool) or not isinstance(rotate_records, int) or rotate_records < 1:
            raise ConfigError(str(path), "rotate_records", f"{rotate_records!r}; must be an integer >= 1")
        self._paths = StorePaths(path)
        if not self._paths.directory.is_dir():
            raise ConfigError(str(path), "", f"directory {self._paths.directory} does not exist")
        if self.path.is_file() and not is_overview(self.path):
            raise ConfigError(
                str(path), "", f"is an existing file; name a store (segments {self._paths.stem}.NNNNNN.h5 go beside it)"
            )
        self._fsync, self._rotate = fsync, rotate_records
        self._lock_fd: int | None = _take_lock(self._paths)
        try:
            self.notes = recover_store(self._paths)
            self._refresh_overview()  # recovery may have finished a segment; a crash may have left it stale
            self._next_index, self._next_number = self._resume_point()
        except BaseException:
            self._release_lock()
            raise
        self._live: SegmentWriter | None = None
        self._live_number = -1
        self._failed = False

    def _resume_point(self) -> tuple[int, int]:
        """(next record index, next segment number), continuing after every segment already present."""
        segments = self._paths.segments()
        next_number = segments[-1].number + 1 if segments else 0
        for seg in reversed([s for s in segments if s.state == ""]):
            view = SegmentView(seg.path, live=False)
            try:
                if len(view.rows):
                    return int(view.rows["index"][-1]) + 1, next_number
            finally:
                view.close()
        return 0, next_number

    def append(self, record: Record) -> int:
        """Store ``record``; returns its global index (also set on ``record.index``) once it is durable."""
        if self._lock_fd is None or self._failed:
            why = "is closed" if self._lock_fd is None else "failed on an earlier append; reopen it to recover"
            raise ConfigError(str(self.path), "", f"this store {why}")
        index = self._next_index
        enc = encode(record, index, str(self.path))
        if self._live is not None and self._live.layout != enc.layout:
            self._finish()
        if self._live is None:
            self._start(enc.layout)
        try:
            self._live.write(enc, fsync=self._fsync)
        except BaseException:
            self._abandon()
            raise
        self._next_index += 1
        record.index = index
        if self._live.count >= self._rotate:
            self._finish()
        return index

    def _start(self, layout: Layout) -> None:
        """Create the next segment under a temporary name, then rename it live: a kill leaves no empty .part."""
        number = self._next_number
        self._next_number += 1
        creating = self._paths.with_state(number, CREATING)
        writer = create_segment(creating, layout, swmr=True)
        if self._fsync:
            writer.sync()
        faults.step("rotate:created")
        replace_durably(creating, self._paths.with_state(number, LIVE), fsync=self._fsync)
        self._live, self._live_number = writer, number

    def _finish(self) -> None:
        """Close the live segment, make it durable, and rename it to its finished name."""
        writer, live = self._live, self._paths.with_state(self._live_number, LIVE)
        self._live = None
        writer.close()
        faults.step("rotate:closed")
        if self._fsync:
            fsync_file(live)
        replace_durably(live, self._paths.finished(self._live_number), fsync=self._fsync)
        faults.step("rotate:renamed")
        self._refresh_overview()

    def _refresh_overview(self) -> None:
        """Rewrite the overview; a failure (a full disk) is a note, never a failed append: the records are
        in the segments, and the next finished segment or writer tries again."""
        try:
            write_overview(self._paths)
        except OSError as exc:
            self.notes.append(f"{self.path}: the overview was not rewritten ({exc}); the segments hold every record")

    def _abandon(self) -> None:
        """After a failed write the live file's state is unknown: leave it as .part for recovery."""
        self._failed = True
        writer, self._live = self._live, None
        try:
            writer.close()
        except Exception:  # noqa: BLE001 - the original error is the one worth reporting
            pass

    def close(self) -> None:
        """Finish the live segment and release the store; safe to call twice."""
        try:
            if self._live is not None:
                self._finish()
        finally:
            self._release_lock()

    def _release_lock(self) -> None:
        if self._lock_fd is not None:
            release_lock(self._paths.lock, self._lock_fd)
            self._lock_fd = None

    def __enter__(self) -> RecordStore:
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()


def _take_lock(paths: StorePaths) -> int:
    fd = take_lock(paths.lock)
    if fd is None:
        problem = f"another process is writing this store (it holds {paths.lock})"
        raise ConfigError(str(paths.path), "", problem)
    return fd
