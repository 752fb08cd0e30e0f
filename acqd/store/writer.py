"""The writer: ``RecordStore(path)`` appends records durably, rotates segments, recovers on start-up."""

from __future__ import annotations

from pathlib import Path

from ..errors import ConfigError
from ..record import Record
from . import faults
from .lockfile import release_lock, take_lock
from .naming import CREATING, DAMAGED, LIVE, StorePaths, fsync_file, os_reason, replace_durably
from .overview import is_overview, write_overview
from .recovery import damaged_extent, recover_store
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
        if self.path.exists() and not self.path.is_file():
            raise ConfigError(str(path), "", "is not a regular file (a device, a pipe or a socket); name a store, "
                                             "e.g. data/night.h5 (segments go beside it)")
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
        self._failed = ""  # why appends are refused after a failed write

    def _resume_point(self) -> tuple[int, int]:
        """(next record index, next segment number), after every index any segment present ever held.

        A finished or ``.damaged`` segment counts with every row of its index (rows that fail verification
        held acknowledged records too: indices run on by one from the first verified row, or from the
        segment before when none verifies); one that cannot be opened at all is assumed full
        (``rotate_records`` after the indices before it) and said so in ``notes``: an index is never given
        out twice."""
        segments = self._paths.segments()
        next_number = segments[-1].number + 1 if segments else 0
        end = 0
        for seg in segments:
            if seg.state == "":
                view = SegmentView(seg.path, live=False)
                try:
                    extent = (int(view.rows["index"][0]) if len(view.rows) else None, view.index_rows)
                finally:
                    view.close()
            elif seg.state == DAMAGED:
                extent = damaged_extent(seg.path)
            else:
                continue
            if isinstance(extent, str):
                self.notes.append(f"{seg.path}: cannot be opened ({extent}); indices {end} to "
                                  f"{end + self._rotate - 1} are left unused in case it held them")
                end += self._rotate
            else:
                first, rows = extent
                end = max(end, (end if first is None else first) + rows)
        return end, next_number

    def append(self, record: Record) -> int:
        """Store ``record``; returns its global index (also set on ``record.index``) once it is durable.

        A write that fails (a full disk) leaves the live segment as ``.part`` with every record acknowledged
        before, and raises one ``ConfigError`` line; so does every later append (the next writer recovers)."""
        if self._lock_fd is None or self._failed:
            raise ConfigError(str(self.path), "", self._failed or "this store is closed")
        index = self._next_index
        enc = encode(record, index, str(self.path))
        try:
            if self._live is not None and self._live.layout != enc.layout:
                self._finish()
            if self._live is None:
                self._start(enc.layout)
            self._live.write(enc, fsync=self._fsync)
        except OSError as exc:
            self._abandon(f"record {index} was not stored: writing failed ({os_reason(exc)})")
            raise ConfigError(str(self.path), "", self._failed) from None
        except BaseException:
            self._abandon("an earlier append was interrupted; reopen the store to recover it")
            raise
        self._next_index += 1
        record.index = index
        if self._live.count >= self._rotate:
            try:
                self._finish()
            except OSError as exc:  # this record is durable in the .part; the next append reports the failure
                self._abandon(f"segment {self._live_number} was not finished ({os_reason(exc)})")
        return index

    def _start(self, layout: Layout) -> None:
        """Create the next segment under a temporary name, then rename it live: a kill leaves no empty .part."""
        number = self._next_number
        self._next_number += 1
        creating = self._paths.with_state(number, CREATING)
        try:
            writer = create_segment(creating, layout, swmr=True)
            if self._fsync:
                writer.sync()
        except OSError:
            creating.unlink(missing_ok=True)  # never held a record; recovery would remove it anyway
            raise
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

    def _abandon(self, failure: str) -> None:
        """After a failed write the live file's state is unknown: leave it as .part for recovery, and refuse
        every later append with ``failure`` and what is kept."""
        self._failed = f"{failure}; every record acknowledged before it is kept, the next writer recovers them"
        writer, self._live = self._live, None
        if writer is None:
            return
        try:
            writer.close()
        except Exception:  # noqa: BLE001 - the original error is the one worth reporting
            pass

    def close(self) -> None:
        """Finish the live segment and release the store; safe to call twice."""
        try:
            if self._live is not None:
                try:
                    self._finish()
                except OSError as exc:  # the .part stays, every record in it acknowledged; the next writer recovers it
                    problem = f"the live segment was not finished ({os_reason(exc)}); the next writer recovers its records"
                    raise ConfigError(str(self.path), "", problem) from None
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
    try:
        fd = take_lock(paths.lock)
    except OSError as exc:  # a folder nothing can be created in (/proc), read-only or full
        raise ConfigError(str(paths.path), "", f"cannot be written: its lock file {paths.lock} cannot be made "
                                               f"({exc.strerror})") from None
    if fd is None:
        problem = f"another process is writing this store (it holds {paths.lock})"
        raise ConfigError(str(paths.path), "", problem)
    return fd
