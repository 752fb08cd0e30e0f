"""``acqd sync``: copy a data directory's finished segments to the archive, verified, once each.

What makes it safe to run at any time, as often as one likes, and to kill:

* Only finished segments go (``store.naming.finished_segments``): closed, renamed files that no writer
  touches again. A live ``.part`` never leaves the machine. Local files are only read, except by
  ``--prune`` (``prune``), which removes only segments verified in the archive.
* An upload is verified before the catalog lists it (``transfer``: the hashes of one pass over the local
  file against what the store computed, or a read-back). On a share it is written under
  ``<bench>/.incoming/`` and renamed to its final name once verified; on an object store it goes straight
  to its final key, where an object appears only whole, when its upload completes. So a file or object at
  a final name is always a complete segment; a kill leaves at most a temporary file (removed by the next
  sync) or a complete object not yet listed.
* The bench's catalog is rewritten whole (by one PUT, or a move on a share) once a second while segments
  go, and at the end. A kill before it leaves a final object the catalog does not list: the next sync
  checks it against the local file (its ETag on S3; its size on a share, where only a verified copy is
  renamed into place; its SHA-256 read back with ``--verify readback``) and adopts it when it matches.
* A segment is skipped when the catalog lists it with the local file's SHA-256 and the object has its
  size; so a second sync uploads nothing. A catalog entry with the same name but another SHA-256 is never
  overwritten, nor is a file on a share: that is an error naming both (two benches given one bench id,
  say). Only an object the catalog does not list (never verified) may be sent again.
"""

from __future__ import annotations

import secrets
import time
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field, replace
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from ..errors import ConfigError
from ..store import faults
from ..store.lockfile import release_lock, take_lock
from ..store.naming import StorePaths, finished_segments, sync_directory
from ..store.overview import is_overview, write_overview
from ..store.segment import SegmentView
from .archive import INCOMING, Archive, ArchiveError, reaching
from .transfer import (VERIFY_READBACK, VERIFY_UPLOAD, etag_problem, file_sha256, local_hashes, rename_on_share,
                       send_and_read_back, send_to_s3, send_to_share)

SYNC_LOCK = "sync.lock"
# The catalog is rewritten at most this often during a sync, and at its end: a whole catalog per segment
# cost a request as large as the catalog for every small segment. A kill in between leaves verified objects
# it does not list yet, which the next sync checks and adopts.
CATALOG_EVERY_S = 1.0
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
    sha256: str = ""  # "" until a pass over the file hashed it: the upload's own pass, or ``hashed()``
    etag: str = ""  # the S3 ETag of its upload in parts, when ``hashed(etag=True)`` computed it

    def hashed(self, etag: bool = False) -> LocalSegment:
        """This segment with its SHA-256 (and its ETag), from one pass over the file if not known yet."""
        if etag and not self.etag:
            found = local_hashes(self.path)
            return replace(self, sha256=found.sha256, etag=found.etag)
        return self if self.sha256 else replace(self, sha256=file_sha256(self.path))

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
    synced: list[LocalSegment] = field(default_factory=list)  # every local segment now verified in the archive
    pruned: list[Path] = field(default_factory=list)  # local segments removed by ``prune``


def describe_segment(campaign: str, path: Path, fallback_bench_id: str) -> LocalSegment:
    """Read a finished segment's index (no samples) for its bench id and record span; the file is hashed
    later, by the pass that uploads it (or compares it with the catalog), not here."""
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
                        path.stat().st_size)


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
         log: Log | None = None, verify: str = VERIFY_UPLOAD, prune_days: float | None = None) -> SyncReport:
    """Bring the archive up to date with the finished segments of ``data_dir`` (or of ``only``); with
    ``prune_days``, then remove the local segments verified in the archive and older than that."""
    started = time.monotonic()
    lock = _Lock(Path(data_dir))
    report = SyncReport()
    try:
        segments = local_segments(Path(data_dir), fallback_bench_id, only)
        for bench_id in sorted({s.bench_id for s in segments}):
            _sync_bench(archive, bench_id, [s for s in segments if s.bench_id == bench_id], report, log, verify,
                        recheck=prune_days is not None)
        if prune_days is not None:
            report.pruned = prune(Path(data_dir), report.synced, prune_days, log)
    finally:
        lock.release()
    report.seconds = time.monotonic() - started
    return report


def _sync_bench(archive: Archive, bench_id: str, segments: list[LocalSegment], report: SyncReport,
                log: Log | None, verify: str, recheck: bool) -> None:
    token = secrets.token_hex(8)
    with reaching(archive, f"reading {bench_id}'s catalog"):
        archive.fs.invalidate_cache()
        catalog = archive.read_catalog(bench_id)
        present = archive.sizes_under(bench_id)
        _remove_leftovers(archive, bench_id, present)
    listed = {(e["campaign"], e["segment"]): e for e in catalog["segments"]}
    unwritten, written_at = False, time.monotonic()

    def write_catalog() -> None:
        catalog["segments"] = sorted(listed.values(), key=lambda e: (e["campaign"], e["segment"]))
        with reaching(archive, f"writing {bench_id}'s catalog"):
            archive.write_catalog(bench_id, catalog, token)

    try:
        for seg in segments:
            key = archive.key(bench_id, seg.campaign, seg.path.name)
            entry = listed.get((seg.campaign, seg.path.name))
            with reaching(archive, f"checking {key}"):
                state, seg = _state(archive, seg, key, present.get(key), entry, verify, recheck)
            if state == "archived":
                report.already += 1
            else:
                if state == "missing":
                    with reaching(archive, f"uploading {key}"):
                        seg = _upload(archive, seg, key, token, verify)
                    report.bytes_uploaded += seg.bytes
                entry = listed[(seg.campaign, seg.path.name)] = seg.entry(f"{bench_id}/{seg.campaign}/{seg.path.name}")
                unwritten = True
                if time.monotonic() - written_at >= CATALOG_EVERY_S:
                    write_catalog()
                    unwritten, written_at = False, time.monotonic()
                _note(report, log, state, bench_id, seg, key, entry)
            report.synced.append(seg)
    finally:  # a failure part-way still lists what was verified before it (a kill leaves it to adoption)
        if unwritten:
            write_catalog()


def _note(report: SyncReport, log: Log | None, state: str, bench_id: str, seg: LocalSegment, key: str,
          entry: dict[str, Any]) -> None:
    """Count a segment sent or adopted, and log it."""
    if state == "missing":
        report.uploaded.append(entry)
        if log:
            log("sync_upload", bench=bench_id, campaign=seg.campaign, segment=seg.path.name, key=key,
                records=seg.records, bytes=seg.bytes, sha256=seg.sha256)
    else:
        report.adopted += 1
        if log:
            log("sync_adopted", bench=bench_id, campaign=seg.campaign, segment=seg.path.name, key=key)


def _state(archive: Archive, seg: LocalSegment, key: str, size: int | None, entry: dict[str, Any] | None,
           verify: str, recheck: bool) -> tuple[str, LocalSegment]:
    """``archived`` (listed and present), ``unlisted`` (a complete object the catalog lacks) or ``missing``
    for the segment whose object at ``key`` has ``size`` bytes (None: there is none),
    with the segment (hashed when that was needed to tell); anything at that name with other bytes is
    refused, never overwritten. ``recheck`` checks a listed object against the local file too, as an
    unlisted one always is, and on a share by reading it back (``--prune`` removes nothing on the
    catalog's word alone)."""
    deep = _needs_etag(archive, verify) and (entry is None or recheck) and size == seg.bytes
    if entry is not None:
        seg = seg.hashed(etag=deep)
        if entry.get("sha256") != seg.sha256:
            raise ArchiveError(archive.url, f"{key} is archived with SHA-256 {entry.get('sha256')}, but "
                                            f"{seg.path} has {seg.sha256}; an archived segment is never replaced "
                                            "(do two benches share one bench id?)")
    if size is None:
        return "missing", seg
    if size == seg.bytes and (entry is None or recheck):
        seg = seg.hashed(etag=deep)
        if _matches(archive, seg, key, VERIFY_READBACK if archive.local and recheck else verify):
            return ("unlisted" if entry is None else "archived"), seg
    elif size == seg.bytes:
        return "archived", seg
    if entry is None and not archive.local:
        return "missing", seg  # an upload that completed but was never verified nor listed: sent again
    raise ArchiveError(archive.url, f"{key} exists with other content ({size} bytes) than {seg.path} "
                                    f"({seg.bytes} bytes); an archived segment is never replaced")


def _needs_etag(archive: Archive, verify: str) -> bool:
    return archive.s3 and verify == VERIFY_UPLOAD


def _matches(archive: Archive, seg: LocalSegment, key: str, verify: str) -> bool:
    """Whether the object at ``key`` (of the local file's size) holds the hashed local file's bytes: on S3
    its ETag against the local file's MD5s, elsewhere (or with ``readback``) its SHA-256 read back. On a
    share a file reaches its final name only once verified, so its size is enough there unless
    ``readback`` is asked for."""
    if _needs_etag(archive, verify):
        return not etag_problem(archive, key, seg.bytes, seg.etag)
    if archive.local and verify == VERIFY_UPLOAD:
        return True
    return archive.sha256(key) == seg.sha256


def _upload(archive: Archive, seg: LocalSegment, key: str, token: str, verify: str) -> LocalSegment:
    """Send the segment and verify it (see ``transfer``); returns it with the SHA-256 of what was sent.

    On a share the bytes go to a temporary name that is renamed to ``key`` once verified (a kill leaves a
    partial file under that temporary name only). On an object store they go straight to ``key``: an
    object appears there only when its upload completes, whole, so there is no copy to pay for; a kill
    between completion and verification leaves a complete object the catalog does not list, which the
    next sync checks and adopts (or replaces, if it does not match). A kill can land mid-upload: the crash
    tests place one there with ``ACQD_STORE_KILL_AT=sync:chunk@N``."""
    if archive.local:
        target = archive.key(seg.bench_id, INCOMING, f"{seg.campaign}--{seg.path.name}.{token}")
        archive.parent_ready(target)
        archive.parent_ready(key)
        sent = send_to_share(archive, seg.path, target, seg.bytes, verify)
        rename_on_share(target, key)
    elif _needs_etag(archive, verify):
        sent = send_to_s3(archive, seg.path, key, seg.bytes)
    else:
        sent = send_and_read_back(archive, seg.path, key, seg.bytes)
    faults.step("sync:moved")
    if seg.sha256 and sent.sha256 != seg.sha256:
        raise ArchiveError(archive.url, f"{seg.path} changed while it was sent (SHA-256 {sent.sha256}, "
                                        f"{seg.sha256} before); a finished segment is never written again")
    return replace(seg, sha256=sent.sha256)


def _remove_leftovers(archive: Archive, bench_id: str, present: dict[str, int]) -> None:
    """Temporary objects of a sync that was killed (this data directory's lock says none is running)."""
    for path in [p for p in present if p.startswith(archive.key(bench_id, INCOMING) + "/")]:
        archive.fs.rm_file(path)


# -- prune ------------------------------------------------------------------------------------------------
def prune(data_dir: Path, verified: list[LocalSegment], days: float, log: Log | None = None) -> list[Path]:
    """Remove the local segments among ``verified`` (checked in the archive by this sync) whose last record
    is older than ``days`` days; returns what was removed.

    Kept always: a segment whose records carry no readable UTC time, and the newest file of each store
    (finished or live), because the store's writer continues its segment numbers and record indices from
    the files present (``RecordStore._resume_point``). The live ``.part`` is never among ``verified``.
    Each store's overview (``night.h5``) is rewritten over the segments left."""
    cutoff = datetime.now(UTC).timestamp() - days * 86400.0
    newest = {stem: StorePaths(data_dir / f"{stem}.h5").segments()[-1].path for stem in {s.campaign for s in verified}}
    removed = []
    for seg in verified:
        taken = _utc_seconds(seg.last_utc)
        if seg.path == newest[seg.campaign] or taken is None or taken >= cutoff:
            continue
        seg.path.unlink()
        removed.append(seg.path)
        if log:
            log("sync_pruned", bench=seg.bench_id, campaign=seg.campaign, segment=seg.path.name,
                records=seg.records, last_utc=seg.last_utc, sha256=seg.sha256)
    if removed:
        sync_directory(data_dir)
        for stem in sorted({s.campaign for s in verified if s.path in removed}):
            _rewrite_overview(data_dir, stem)
    return removed


def _utc_seconds(text: str | None) -> float | None:
    try:
        moment = datetime.fromisoformat(text or "")
    except ValueError:
        return None
    return moment.timestamp() if moment.tzinfo else None


def _rewrite_overview(data_dir: Path, stem: str) -> None:
    """The store's overview over the segments left, under its own temporary name (the store's writer may
    be rewriting it too; the last rename wins, and the writer rewrites it at its next segment anyway)."""
    for suffix in (".h5", ".hdf5", ".hdf"):
        path = data_dir / f"{stem}{suffix}"
        if path.is_file() and is_overview(path):
            write_overview(StorePaths(path), tag=".prune")
