"""The archive: one fsspec URL (``s3://bucket/prefix`` on any S3-compatible store, ``file:///mnt/share/acqd``
on a mounted share) holding every bench's finished segments and a catalog per bench.

Layout under the URL's path::

    <bench_id>/catalog.json                     what the bench has archived (``CATALOG_FORMAT``)
    <bench_id>/<campaign>/<segment file>        a finished segment, byte for byte as the bench wrote it
    <bench_id>/.incoming/<name>.<token>         an upload in progress; never read as a segment

Credentials and the endpoint of an S3-compatible store come from where its client looks for them (the
``AWS_ACCESS_KEY_ID``, ``AWS_SECRET_ACCESS_KEY`` and ``AWS_ENDPOINT_URL`` variables, or the client's own
configuration files); only the endpoint may be overridden, from the command line. A profile never holds
them (a profile is stored with every record), and TLS certificates are always verified.
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Any

from ..errors import AcqdError

CATALOG = "catalog.json"
CATALOG_FORMAT = "acqd-archive-catalog"
CATALOG_VERSION = 1
INCOMING = ".incoming"
HASH_CHUNK_BYTES = 1 << 20


class ArchiveError(AcqdError):
    """The archive cannot be reached, read or written; the message names the URL and what failed."""

    def __init__(self, url: str, problem: str) -> None:
        self.url, self.problem = url, problem
        super().__init__(f"{url}: {problem}")


@dataclass
class Archive:
    """An open archive: the fsspec file system and the path of the URL inside it."""

    url: str
    endpoint_url: str | None
    fs: Any  # fsspec.AbstractFileSystem
    root: str

    @property
    def local(self) -> bool:
        return "file" in _protocols(self.fs)

    @property
    def s3(self) -> bool:
        return "s3" in _protocols(self.fs)

    def key(self, *parts: str) -> str:
        """The path of ``parts`` under the archive's root (``/`` separated, as every fsspec store uses)."""
        return "/".join([self.root, *parts]) if self.root else "/".join(parts)

    def parent_ready(self, key: str) -> None:
        """Make the folder of ``key`` on a file system that has folders (an object store has none)."""
        if self.local:
            self.fs.makedirs(key.rsplit("/", 1)[0], exist_ok=True)

    def sha256(self, key: str) -> str:
        """SHA-256 of the object as the archive returns it now (read back, not taken from our side)."""
        digest = hashlib.sha256()
        with self.fs.open(key, "rb", block_size=HASH_CHUNK_BYTES) as f:
            while chunk := f.read(HASH_CHUNK_BYTES):
                digest.update(chunk)
        return digest.hexdigest()

    def size(self, key: str) -> int | None:
        """The object's size in bytes, or None when there is no such object."""
        try:
            return int(self.fs.size(key))
        except FileNotFoundError:
            return None

    def sizes_under(self, bench_id: str) -> dict[str, int]:
        """The size of every object under the bench's folder, by key, from one listing (not a request per
        segment)."""
        try:
            found = self.fs.find(self.key(bench_id), detail=True)
        except FileNotFoundError:
            return {}
        return {path: int(info["size"]) for path, info in found.items() if info.get("type", "file") == "file"}

    def benches(self) -> list[str]:
        """Every bench with a catalog in the archive."""
        found = self.fs.glob(self.key("*", CATALOG))
        return sorted(path.rstrip("/").split("/")[-2] for path in found)

    def read_catalog(self, bench_id: str) -> dict[str, Any]:
        """The bench's catalog (an empty one if it has none yet); a catalog that is not ours is an error."""
        key = self.key(bench_id, CATALOG)
        try:
            raw = self.fs.cat_file(key)
        except FileNotFoundError:
            return {"format": CATALOG_FORMAT, "version": CATALOG_VERSION, "bench_id": bench_id, "segments": []}
        try:
            catalog = json.loads(raw)
        except (ValueError, UnicodeDecodeError):
            raise ArchiveError(self.url, f"{key}: not JSON; a catalog is written by acqd sync") from None
        if not isinstance(catalog, dict) or catalog.get("format") != CATALOG_FORMAT:
            raise ArchiveError(self.url, f"{key}: not an acqd catalog (format {CATALOG_FORMAT!r} expected)")
        if int(catalog.get("version", 0)) > CATALOG_VERSION:
            raise ArchiveError(self.url, f"{key}: catalog version {catalog.get('version')}; this acqd reads "
                                         f"up to {CATALOG_VERSION}")
        return catalog

    def write_catalog(self, bench_id: str, catalog: dict[str, Any], token: str) -> None:
        """Replace the bench's catalog whole, so that a reader sees the old catalog or the new one, never half
        of one: on an object store by one PUT (an object is replaced whole when its upload completes), on
        any other file system written beside it under a temporary name, then moved."""
        key = self.key(bench_id, CATALOG)
        text = (json.dumps(catalog, indent=1, sort_keys=True) + "\n").encode()
        if self.s3:
            self.fs.pipe_file(key, text)
            return
        temporary = self.key(bench_id, INCOMING, f"{CATALOG}.{token}")
        self.parent_ready(temporary)
        self.fs.pipe_file(temporary, text)
        self.fs.mv(temporary, key)


def _protocols(fs: Any) -> tuple[str, ...]:
    protocol = fs.protocol
    return (protocol,) if isinstance(protocol, str) else tuple(protocol)


def open_archive(url: str, endpoint_url: str | None = None) -> Archive:
    """The archive at ``url``; nothing is sent to it yet. ``endpoint_url`` (S3 only) overrides the
    endpoint the client would find in ``AWS_ENDPOINT_URL`` or its configuration."""
    import fsspec

    scheme, sep, _ = url.partition("://")
    if not sep or not scheme:
        raise ArchiveError(url, "not an archive URL; give one with a scheme, e.g. s3://bucket/prefix or "
                                "file:///mnt/share/acqd")
    options: dict[str, Any] = {}
    if endpoint_url:
        if scheme != "s3":
            raise ArchiveError(url, "--endpoint-url is for an s3:// archive only")
        options["endpoint_url"] = endpoint_url
    if scheme == "s3":
        options["skip_instance_cache"] = True  # a fresh listing cache: another process writes the archive too
    try:
        fs, root = fsspec.core.url_to_fs(url, **options)
    except (ValueError, ImportError) as exc:
        raise ArchiveError(url, f"fsspec cannot open it ({exc}); e.g. s3://bucket/prefix or "
                                "file:///mnt/share/acqd") from None
    return Archive(url, endpoint_url, fs, root.rstrip("/"))


@contextmanager
def reaching(archive: Archive, what: str) -> Iterator[None]:
    """Turn a failure of the archive's client (no route, refused credentials, a missing bucket) into one
    ArchiveError line naming the URL and the step that failed."""
    try:
        yield
    except AcqdError:
        raise
    except Exception as exc:  # noqa: BLE001 - the clients raise many kinds (OSError, botocore's, aiohttp's)
        text = " ".join(str(exc).split()) or type(exc).__name__
        raise ArchiveError(archive.url, f"{what} failed: {type(exc).__name__}: {text}") from None
