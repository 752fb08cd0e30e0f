"""A lock file that one process holds (flock) and removes when it lets go, so a clean exit leaves none.

Removing a lock file on release races with a process that opened the old file just before and takes its
lock just after: it would hold a lock on a file no longer in the directory while a third process creates
and locks a new one, and two writers would run. A taker therefore checks, once it holds the flock, that
the path still names the file it locked, and starts again if not.
"""

from __future__ import annotations

import fcntl
import os
from pathlib import Path


def take_lock(path: Path) -> int | None:
    """The descriptor of ``path`` locked for this process, or None while another process holds it."""
    while True:
        fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            os.close(fd)
            return None
        if _names_the_file(path, fd):
            return fd
        os.close(fd)  # the holder removed it between our open and our flock: lock the new one


def release_lock(path: Path, fd: int) -> None:
    """Remove the lock file, then let go of it (in that order, see the module's note)."""
    try:
        path.unlink(missing_ok=True)
    finally:
        os.close(fd)


def _names_the_file(path: Path, fd: int) -> bool:
    try:
        named = os.stat(path)
    except FileNotFoundError:
        return False
    held = os.fstat(fd)
    return (named.st_dev, named.st_ino) == (held.st_dev, held.st_ino)
