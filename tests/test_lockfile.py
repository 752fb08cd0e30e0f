"""The writer's and the daemon's lock file: one holder, removed on release, safe against the removal race."""

from __future__ import annotations

import fcntl
import os
from pathlib import Path

from acqd.store.lockfile import _names_the_file, release_lock, take_lock


def test_one_holder_and_no_file_left_after_release(tmp_path: Path) -> None:
    path = tmp_path / "x.lock"
    fd = take_lock(path)
    assert fd is not None and path.exists()
    assert take_lock(path) is None  # flock(2): a second open file description cannot take LOCK_EX
    release_lock(path, fd)
    assert not path.exists()
    again = take_lock(path)
    assert again is not None
    release_lock(path, again)


def test_a_file_removed_by_its_holder_is_not_taken_as_the_lock(tmp_path: Path) -> None:
    """B opened the lock file just before A released it: B's flock then succeeds on a file that is no
    longer in the directory. The check take_lock makes after its flock must refuse it, and accept the file
    the path names now."""
    path = tmp_path / "x.lock"
    first = take_lock(path)
    assert first is not None
    stale = os.open(path, os.O_RDWR)  # B's open, before A lets go
    release_lock(path, first)
    fcntl.flock(stale, fcntl.LOCK_EX | fcntl.LOCK_NB)  # succeeds: the removed file is nobody's now
    assert not _names_the_file(path, stale)  # not in the directory: take_lock starts again
    fresh = take_lock(path)
    assert fresh is not None and _names_the_file(path, fresh)
    os.close(stale)
    release_lock(path, fresh)
