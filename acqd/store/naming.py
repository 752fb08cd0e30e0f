"""How one store path maps to the segment files beside it, and how those files are renamed durably.

The user names a store with one path, ``data/night.h5``. The files are, in ``data/``:

``night.h5``                                 the overview: virtual datasets over the finished segments (overview.py)
``night.000000.h5``, ``night.000001.h5`` …   finished segments: plain HDF5, closed, never written again
``night.000002.h5.part``                     the live segment the writer appends to (SWMR)
``night.000003.h5.init``                     a segment being created; it never holds a record
``night.000002.h5.recovering``               a recovered copy being written; the ``.part`` is still there
``night.000002.h5.damaged``                  a segment recovery could not fully verify, kept for a human
``night.h5.lock``                            held (flock) by the one writer of the store, removed on close

Segment numbers only grow, so sorting by number is the order in which records were written. A path that
is itself an existing file other than the overview (``night.000001.h5``) is read as a store of that one
segment.
"""

from __future__ import annotations

import os
import re
from dataclasses import dataclass
from pathlib import Path

from ..errors import ConfigError

LIVE, CREATING, RECOVERING, DAMAGED = ".part", ".init", ".recovering", ".damaged"
_STORE_SUFFIXES = (".h5", ".hdf5", ".hdf")


@dataclass(frozen=True)
class Segment:
    number: int
    path: Path
    state: str  # "" for finished, or one of LIVE, CREATING, RECOVERING, DAMAGED


class StorePaths:
    """The names of every file that belongs to the store addressed as ``path``."""

    def __init__(self, path: str | Path) -> None:
        self.path = Path(path)
        if self.path.is_dir():
            raise ConfigError(str(path), "", "is a directory; name a store in it, e.g. data/night.h5")
        name = self.path.name
        for suffix in _STORE_SUFFIXES:
            if name.lower().endswith(suffix) and len(name) > len(suffix):
                name = name[: -len(suffix)]
                break
        self.directory = self.path.parent
        self.stem = name
        self.lock = self.directory / f"{self.path.name}.lock"
        states = "|".join(map(re.escape, (LIVE, CREATING, RECOVERING, DAMAGED)))
        self._pattern = re.compile(rf"^{re.escape(self.stem)}\.(\d{{6,}})\.h5({states})?$")

    def finished(self, number: int) -> Path:
        return self.directory / f"{self.stem}.{number:06d}.h5"

    def with_state(self, number: int, state: str) -> Path:
        return self.directory / f"{self.stem}.{number:06d}.h5{state}"

    def segments(self) -> list[Segment]:
        """Every file of this store in the directory, ordered by segment number (then name)."""
        if not self.directory.is_dir():
            return []
        found = []
        for entry in self.directory.iterdir():
            match = self._pattern.match(entry.name)
            if match:
                found.append(Segment(int(match.group(1)), entry, match.group(2) or ""))
        return sorted(found, key=lambda s: (s.number, s.state))


_FINISHED = re.compile(r"^(.+)\.(\d{6,})\.h5$")


def finished_segments(directory: Path) -> list[tuple[str, Segment]]:
    """Every finished segment of every store in ``directory``, as (store stem, segment), by stem then
    number: the immutable files that may be copied elsewhere (never a live ``.part`` or any other state)."""
    if not directory.is_dir():
        return []
    found = []
    for entry in directory.iterdir():
        match = _FINISHED.match(entry.name)
        if match and entry.is_file():
            found.append((match.group(1), Segment(int(match.group(2)), entry, "")))
    return sorted(found, key=lambda item: (item[0], item[1].number))


def replace_durably(src: Path, dst: Path, *, fsync: bool = True) -> None:
    """Atomically rename ``src`` to ``dst``; with ``fsync``, also make the new name survive a power cut."""
    os.replace(src, dst)
    if fsync:
        sync_directory(dst.parent)


def fsync_file(path: Path) -> None:
    """fsync a closed file by name, so that what its last writer flushed is on the disk before a rename."""
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def sync_directory(directory: Path) -> None:
    """fsync a directory, which is what makes a rename or an unlink in it durable on POSIX file systems."""
    fd = os.open(directory, os.O_RDONLY | os.O_DIRECTORY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def os_reason(exc: OSError) -> str:
    """``No space left on device``: the system's words for an errno, not HDF5's multi-line report of it."""
    return os.strerror(exc.errno) if exc.errno else str(exc).splitlines()[0]
