"""Sending one finished segment to the archive in one pass over the local file, and checking what arrived.

Why one pass: a sync that hashes the file, uploads it and then reads the object back to hash it again
moves every byte three times; ``bench/fleet.py`` measured it at 0.37–0.48 of a plain upload to an S3 server.
Here each block of the file is read once into one buffer, hashed (SHA-256 for the catalog, MD5 for the
object store) and sent from that same buffer, so the hashes describe exactly the bytes that left.

What "verified" then means (``VERIFY_UPLOAD``, the default):

* **S3.** The ETag the server answers for each part (or for the single ``PUT`` of a file of at most one
  part) must be our MD5 of the bytes sent in it. After the upload a ``HEAD`` must show
  the object's size and the ETag S3 gives a multipart object: the MD5 of the parts' MD5 digests one after
  another, then ``-`` and the number of parts (for a single ``PUT``, the MD5 of the body). Those ETags are
  computed by the server from the bytes it stored; moto's server, which the tests use, computes them the
  same way from what it received. They are *not* an MD5 on AWS S3 for objects encrypted with SSE-KMS or
  SSE-C (AWS S3 user guide, "Checking object integrity"; common practice), and some S3-compatible stores
  give other ETags: for those, ``VERIFY_READBACK``.
* **A share** (``file://``). The copy is written from the buffer that was hashed, fsynced, and its size
  checked before it is renamed to its final name. Nothing reads it back: right after the write, a read
  would come from this machine's page cache, so it would check this kernel's copy, not the server's disk.
  ``VERIFY_READBACK`` re-reads and hashes it all the same, for those who want that check too.
* **Any other fsspec store**: read back and hashed (there is no server checksum we know how to check).

``VERIFY_READBACK`` on an object store sends through the client's own writer and hashes the object as the
store returns it: the slow, store-agnostic check.
"""

from __future__ import annotations

import hashlib
import os
from collections.abc import Iterator
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from ..store import faults
from ..store.naming import sync_directory
from .archive import HASH_CHUNK_BYTES, Archive, ArchiveError

VERIFY_UPLOAD, VERIFY_READBACK = "upload", "readback"
VERIFY_MODES = (VERIFY_UPLOAD, VERIFY_READBACK)
# The part size of a multipart upload (S3 allows 5 MiB and up), and the largest file sent in one PUT: per
# request an object store has a fixed cost, and one 16 MiB buffer is as much memory as a sync should hold.
PART_BYTES = 16 << 20


@dataclass(frozen=True)
class Sent:
    """What one pass over the local file found: its SHA-256 (for the catalog) and its S3 ETag."""

    sha256: str
    etag: str


def s3_etag(part_md5s: list[bytes]) -> str:
    """The ETag S3 gives an object from the MD5 digests of its parts: a single PUT's is the body's MD5; a
    multipart object's the MD5 of the digests one after another, ``-`` and the part count (common practice,
    as the AWS CLI and SDKs check it; not an MD5 under SSE-KMS or SSE-C)."""
    if len(part_md5s) == 1:
        return part_md5s[0].hex()
    return f"{hashlib.md5(b''.join(part_md5s)).hexdigest()}-{len(part_md5s)}"


def _blocks(path: Path, block_bytes: int) -> Iterator[memoryview]:
    """The file in blocks of ``block_bytes``, each in the same reused buffer (valid until the next one)."""
    buffer = bytearray(block_bytes)
    view = memoryview(buffer)
    with open(path, "rb", buffering=0) as f:
        while True:
            filled = 0
            while filled < block_bytes and (n := f.readinto(view[filled:])):
                filled += n
            if not filled:
                return
            yield view[:filled]
            if filled < block_bytes:
                return


def file_sha256(path: Path) -> str:
    """The file's SHA-256, read through one reused buffer (a listed segment checked against its catalog entry)."""
    digest = hashlib.sha256()
    for block in _blocks(path, HASH_CHUNK_BYTES):
        digest.update(block)
    return digest.hexdigest()


def local_hashes(path: Path) -> Sent:
    """The file's SHA-256 and the ETag its upload in ``PART_BYTES`` parts gets, in one read."""
    sha, md5s = hashlib.sha256(), []
    for block in _blocks(path, PART_BYTES):
        sha.update(block)
        md5s.append(hashlib.md5(block).digest())
    return Sent(sha.hexdigest(), s3_etag(md5s or [hashlib.md5(b"").digest()]))


# -- a share ----------------------------------------------------------------------------------------------
def send_to_share(archive: Archive, path: Path, target: str, size: int, verify: str) -> Sent:
    """Copy ``path`` to ``target`` (a temporary name) from the hashed buffer, fsync it, check its size
    (and with ``readback`` its SHA-256); the caller renames it into place."""
    sha = hashlib.sha256()
    with open(target, "wb") as out:
        for block in _blocks(path, HASH_CHUNK_BYTES):
            sha.update(block)
            out.write(block)
            faults.step("sync:chunk")
        out.flush()
        os.fsync(out.fileno())
    sent = Sent(sha.hexdigest(), "")
    faults.step("sync:uploaded")
    _check_size(archive, target, size)
    if verify == VERIFY_READBACK:
        _check_readback(archive, target, sent.sha256)
    return sent


def rename_on_share(target: str, key: str) -> None:
    """The verified copy to its final name, durably (the folder fsynced after the rename)."""
    os.replace(target, key)
    sync_directory(Path(key).parent)


# -- S3 ---------------------------------------------------------------------------------------------------
def send_to_s3(archive: Archive, path: Path, key: str, size: int) -> Sent:
    """Upload ``path`` to ``key`` (one PUT, or part by part), checking each request's ETag against the MD5 of
    what it sent, then the whole object's size and ETag from a HEAD. An upload cut short leaves no object
    (S3 makes one only at completion); one that fails here is aborted, or removed if it completed with the
    wrong bytes."""
    bucket, name, _ = archive.fs.split_path(key)
    call = archive.fs.call_s3
    sha, md5s = hashlib.sha256(), []
    if size <= PART_BYTES:  # one PUT: S3's multipart minimum part is 5 MiB, and one request is cheaper
        answer, md5 = _send_hashing(call, path.read_bytes(), sha, "put_object", Bucket=bucket, Key=name)
        try:
            md5s.append(_checked_etag(archive, key, 1, answer, md5))
        except ArchiveError:
            archive.fs.rm_file(key)  # the PUT made an object, and not of these bytes
            raise
        faults.step("sync:chunk")
    else:
        upload = call("create_multipart_upload", Bucket=bucket, Key=name)["UploadId"]
        try:
            parts = []
            for number, block in enumerate(_blocks(path, PART_BYTES), 1):
                answer, md5 = _send_hashing(call, bytes(block), sha, "upload_part", Bucket=bucket, Key=name,
                                            UploadId=upload, PartNumber=number)
                md5s.append(_checked_etag(archive, key, number, answer, md5))
                parts.append({"PartNumber": number, "ETag": answer["ETag"]})
                faults.step("sync:chunk")
            call("complete_multipart_upload", Bucket=bucket, Key=name, UploadId=upload,
                 MultipartUpload={"Parts": parts})
        except BaseException:
            _abort(call, bucket, name, upload)
            raise
    sent = Sent(sha.hexdigest(), s3_etag(md5s))
    faults.step("sync:uploaded")
    archive.fs.invalidate_cache(key)
    problem = etag_problem(archive, key, size, sent.etag)
    if problem:
        archive.fs.rm_file(key)
        raise ArchiveError(archive.url, f"{problem}; nothing was kept")
    return sent


def _send_hashing(call: Any, body: bytes, sha: Any, method: str, **request: Any) -> tuple[dict[str, Any], bytes]:
    """Send ``body`` by ``method`` while this thread hashes it (SHA-256 into ``sha``, and its MD5): the
    request waits on the network and the server, the hashes on this core, so neither waits for the other.
    Returns the server's answer and the body's MD5 digest."""
    with ThreadPoolExecutor(1, thread_name_prefix="acqd-sync-send") as pool:
        answer = pool.submit(call, method, Body=body, **request)
        sha.update(body)
        md5 = hashlib.md5(body).digest()
        return answer.result(), md5


def etag_problem(archive: Archive, key: str, size: int, etag: str) -> str:
    """Why the object at ``key`` is not ``size`` bytes with ETag ``etag`` (from a HEAD), or ''."""
    info = archive.fs.info(key, refresh=True)
    found = str(info.get("ETag", "")).strip('"')
    if int(info["size"]) != size:
        return f"{key} has {info['size']} bytes, not {size} as sent"
    if found != etag:
        return (f"{key} has ETag {found}, not {etag} (the MD5s of what was sent); a store whose ETag is not an "
                "MD5 of the bytes (SSE-KMS, SSE-C) needs --verify readback")
    return ""


def _checked_etag(archive: Archive, key: str, number: int, answer: dict[str, Any], md5: bytes) -> bytes:
    """``md5``, once the ETag the server answered for that request (part ``number``) is that MD5."""
    found = str(answer.get("ETag", "")).strip('"')
    if found != md5.hex():
        raise ArchiveError(archive.url, f"{key}: part {number} stored with ETag {found}, not the MD5 of what was "
                                        f"sent ({md5.hex()}); a store whose ETag is not an MD5 of the bytes "
                                        "(SSE-KMS, SSE-C) needs --verify readback")
    return md5


def _abort(call: Any, bucket: str, name: str, upload: str) -> None:
    """Abort a multipart upload that failed; if even that fails, the store's lifecycle rule clears it."""
    try:
        call("abort_multipart_upload", Bucket=bucket, Key=name, UploadId=upload)
    except Exception:  # noqa: BLE001 - the upload's own error is the one to report
        pass


# -- any store: through the client's writer, read back ----------------------------------------------------
def send_and_read_back(archive: Archive, path: Path, target: str, size: int) -> Sent:
    """Send through the client's own writer (multipart on an object store) from the hashed buffer, then
    read the object back and hash it."""
    sha = hashlib.sha256()
    with archive.fs.open(target, "wb", block_size=PART_BYTES) as remote:
        for block in _blocks(path, HASH_CHUNK_BYTES):
            sha.update(block)
            remote.write(bytes(block))
            faults.step("sync:chunk")
    sent = Sent(sha.hexdigest(), "")
    faults.step("sync:uploaded")
    _check_size(archive, target, size)
    _check_readback(archive, target, sent.sha256)
    return sent


def _check_size(archive: Archive, target: str, size: int) -> None:
    got = archive.size(target)
    if got != size:
        archive.fs.rm_file(target)
        raise ArchiveError(archive.url, f"{target} has {got} bytes after the upload, not {size}; nothing was kept")


def _check_readback(archive: Archive, target: str, sha256: str) -> None:
    got = archive.sha256(target)
    if got != sha256:
        archive.fs.rm_file(target)
        raise ArchiveError(archive.url, f"{target} read back with SHA-256 {got}, not {sha256} as sent; "
                                        "nothing was kept")
