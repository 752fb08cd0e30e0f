"""``acqd sync``: copy a data directory's finished segments to the archive, verified, once each.

What makes it safe to run at any time, as often as one likes, and to kill:

* Only finished segments go (``store.naming.finished_segments``): closed, renamed files that no writer
  touches again. A live ``.part`` never leaves the machine. Local files are only ever read.
* An upload is read back from the archive and its SHA-256 compared with the local file's before the
  catalog lists it. On a share it is written under ``<bench>/.incoming/`` and renamed to its final name
  once verified; on an object store it goes straight to its final key, where an object appears only
  whole, when its upload completes. So a file or object at a final name is always a complete segment;
  a kill leaves at most a temporary file (removed by the next sync) or a complete object not yet
  listed.
* The bench's catalog is rewritten (whole, by a move) after each segment. A kill between the move and the
  catalog leaves a final object the catalog does not list: the next sync reads it back, and adopts it when
  its SHA-256 is the local file's.
* A segment is skipped when the catalog lists it with the local file's SHA-256 and the object has its
  size; so a second sync uploads nothing. A catalog entry with the same name but another SHA-256 is never
  overwritten, nor is a file on a share: that is an error naming both (two benches given one bench id,
  say). Only an object the catalog does not list (never verified) may be sent again.
"""

from __future__ import annotations

import hashlib
import secrets
import time
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from ..errors import ConfigError
from ..store import faults
from ..store.lockfile import release_lock, take_lock
from ..store.naming import finished_segments
from ..store.segment import SegmentView
from .archive import HASH_CHUNK_BYTES, INCOMING, Archive, ArchiveError, reaching

SYNC_LOCK = "sync.lock"
UPLOAD_BLOCK_BYTES = 8 << 20  # the part size of a multipart upload (S3 allows 5 MiB and up)
Log = Callable[..., Any]


@dataclass(frozen=True)
class LocalSegment:
    """A finished segment on this machine, with what the catalog says about it."""

    campaign: str  # the store's stem: the daemon names a campaign's store after the campaign
    path: Path
    bench_id: str
    records: int
    first_index: int | None
    last_index: int | None
    first_utc: str | None
    last_utc: str | None
    bytes: int
    sha256: str

    def entry(self, key: str) -> dict[str, Any]:
        return {"campaign": self.campaign, "segment": self.path.name, "key": key, "records": self.records,
                "first_index": self.first_index, "last_index": self.last_index, "first_utc": self.first_utc,
                "last_utc": self.last_utc, "bytes": self.bytes, "sha256": self.sha256,
                "synced_utc": datetime.now(UTC).isoformat(timespec="seconds")}


@dataclass
class SyncReport:
    uploaded: list[dict[str, Any]] = field(default_factory=list)  # catalog entries of the segments sent now
    already: int = 0  # segments the archive held, verified, before this sync
    adopted: int = 0  # complete objects a killed sync left out of the catalog, read back and listed
    bytes_uploaded: int = 0
    seconds: float = 0.0
    synced: list[Path] = field(default_factory=list)  # every local segment now verified in the archive


def file_sha256(path: Path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as f:
        while chunk := f.read(HASH_CHUNK_BYTES):
            digest.update(chunk)
    return digest.hexdigest()


def describe_segment(campaign: str, path: Path, fallback_bench_id: str) -> LocalSegment:
    """Read a finished segment's index (no samples) for its bench id, record span and checksum."""
    view = SegmentView(path, live=False)
    try:
        rows = view.rows
        ids = {bytes(b).decode() for b in rows["bench_id"]}
        utc = [bytes(b).decode() for b in rows["utc"]]
        indices = rows["index"].tolist()
    finally:
        view.close()
    named = ids - {""}
    if len(named) > 1:
        raise ConfigError(str(path), "bench_id", f"records of several benches ({', '.join(sorted(named))}) in "
                                                 "one segment; sync them by hand")
    bench_id = named.pop() if named else fallback_bench_id
    if not bench_id:
        raise ConfigError(str(path), "bench_id", "its records carry no bench id (a store from before "
                                                 "[bench] bench_id); give --bench-id ID to file them under")
    return LocalSegment(campaign, path, bench_id, len(indices), indices[0] if indices else None,
                        indices[-1] if indices else None, min(utc) if utc else None, max(utc) if utc else None,
                        path.stat().st_size, file_sha256(path))


def local_segments(data_dir: Path, fallback_bench_id: str = "", only: Iterable[Path] | None = None
                   ) -> list[LocalSegment]:
    """The data directory's finished segments (or those of ``only``), described for the catalog."""
    wanted = None if only is None else {Path(p) for p in only}
    return [describe_segment(stem, seg.path, fallback_bench_id) for stem, seg in finished_segments(data_dir)
            if wanted is None or seg.path in wanted]


class _Lock:
    """One sync per data directory at a time (the daemon's and a hand-run one would race on the catalog)."""

    def __init__(self, data_dir: Path) -> None:
        self.path = data_dir / SYNC_LOCK
        if not data_dir.is_dir():
            raise ConfigError(str(data_dir), "", "no such data directory")
        self.fd = take_lock(self.path)
        if self.fd is None:
            raise ConfigError(str(data_dir), "", f"another acqd sync is running on it (it holds {self.path})")

    def release(self) -> None:
        release_lock(self.path, self.fd)


def sync(data_dir: Path, archive: Archive, *, fallback_bench_id: str = "", only: Iterable[Path] | None = None,
         log: Log | None = None) -> SyncReport:
    """Bring the archive up to date with the finished segments of ``data_dir`` (or of ``only``)."""
    started = time.monotonic()
    lock = _Lock(Path(data_dir))
    report = SyncReport()
    try:
        segments = local_segments(Path(data_dir), fallback_bench_id, only)
        for bench_id in sorted({s.bench_id for s in segments}):
            _sync_bench(archive, bench_id, [s for s in segments if s.bench_id == bench_id], report, log)
    finally:
        lock.release()
    report.seconds = time.monotonic() - started
    return report


def _sync_bench(archive: Archive, bench_id: str, segments: list[LocalSegment], report: SyncReport,
                log: Log | None) -> None:
    token = secrets.token_hex(8)
    with reaching(archive, f"reading {bench_id}'s catalog"):
        archive.fs.invalidate_cache()
        catalog = archive.read_catalog(bench_id)
        _remove_leftovers(archive, bench_id)
    listed = {(e["campaign"], e["segment"]): e for e in catalog["segments"]}
    for seg in segments:
        key = archive.key(bench_id, seg.campaign, seg.path.name)
        entry = listed.get((seg.campaign, seg.path.name))
        with reaching(archive, f"checking {key}"):
            state = _state(archive, seg, key, entry)
        if state == "archived":
            report.already += 1
        else:
            if state == "missing":
                with reaching(archive, f"uploading {key}"):
                    _upload(archive, seg, key, token)
                report.bytes_uploaded += seg.bytes
            entry = listed[(seg.campaign, seg.path.name)] = seg.entry(f"{bench_id}/{seg.campaign}/{seg.path.name}")
            catalog["segments"] = sorted(listed.values(), key=lambda e: (e["campaign"], e["segment"]))
            with reaching(archive, f"writing {bench_id}'s catalog"):
                archive.write_catalog(bench_id, catalog, token)
            if state == "missing":
                report.uploaded.append(entry)
                if log:
                    log("sync_upload", bench=bench_id, campaign=seg.campaign, segment=seg.path.name, key=key,
                        records=seg.records, bytes=seg.bytes, sha256=seg.sha256)
            else:
                report.adopted += 1
                if log:
                    log("sync_adopted", bench=bench_id, campaign=seg.campaign, segment=seg.path.name, key=key)
        report.synced.append(seg.path)


def _state(archive: Archive, seg: LocalSegment, key: str, entry: dict[str, Any] | None) -> str:
    """``archived`` (listed and present), ``unlisted`` (a complete object the catalog lacks) or ``missing``;
    anything at that name with other bytes is refused, never overwritten."""
    size = archive.size(key)
    if entry is not None and entry.get("sha256") != seg.sha256:
        raise ArchiveError(archive.url, f"{key} is archived with SHA-256 {entry.get('sha256')}, but "
                                        f"{seg.path} has {seg.sha256}; an archived segment is never replaced "
                                        "(do two benches share one bench id?)")
    if size is None:
        return "missing"
    if size == seg.bytes and (entry is not None or archive.sha256(key) == seg.sha256):
        return "archived" if entry is not None else "unlisted"
    if entry is None and not archive.local:
        return "missing"  # an upload that completed but was never verified nor listed: sent again
    raise ArchiveError(archive.url, f"{key} exists with other content ({size} bytes) than {seg.path} "
                                    f"({seg.bytes} bytes); an archived segment is never replaced")


def _upload(archive: Archive, seg: LocalSegment, key: str, token: str) -> None:
    """Send the segment, read it back from the archive and compare SHA-256 with the local file's.

    On a share the bytes go to a temporary name that is renamed to ``key`` once verified (a kill leaves a
    partial file under that temporary name only). On an object store they go straight to ``key``: an
    object appears there only when its upload completes, whole, so there is no copy to pay for; a kill
    between completion and verification leaves a complete object the catalog does not list, which the
    next sync reads back and adopts (or replaces, if it does not match). The bytes go in chunks through
    the client's own writer (multipart on an object store), so a kill can land mid-upload (the crash tests
    place one there with ``ACQD_STORE_KILL_AT=sync:chunk@N``)."""
    target = archive.key(seg.bench_id, INCOMING, f"{seg.campaign}--{seg.path.name}.{token}") if archive.local else key
    archive.parent_ready(target)
    archive.parent_ready(key)
    with open(seg.path, "rb") as local, archive.fs.open(target, "wb", block_size=UPLOAD_BLOCK_BYTES) as remote:
        while chunk := local.read(HASH_CHUNK_BYTES):
            remote.write(chunk)
            faults.step("sync:chunk")
    faults.step("sync:uploaded")
    got = archive.sha256(target)
    if got != seg.sha256:
        archive.fs.rm_file(target)
        raise ArchiveError(archive.url, f"{target} read back with SHA-256 {got}, not {seg.sha256} as sent; "
                                        "nothing was kept")
    if target != key:
        archive.fs.mv(target, key)
    faults.step("sync:moved")
    if archive.size(key) != seg.bytes:
        raise ArchiveError(archive.url, f"{key} has {archive.size(key)} bytes after the move, not {seg.bytes}")


def _remove_leftovers(archive: Archive, bench_id: str) -> None:
    """Temporary objects of a sync that was killed (this data directory's lock says none is running)."""
    for path in archive.fs.glob(archive.key(bench_id, INCOMING, "*")):
        archive.fs.rm_file(path)
