"""Crash safety and concurrent reading of the record store, with real writer processes and real SIGKILLs.

The writer is this file run as a program (``python tests/test_store_crash.py write ...``): it appends
records and prints ``INDEX SEED`` for each one *after* ``append()`` returned, flushing stdout, so the test
knows exactly which records were acknowledged. Three kinds of kill:

* at seeded random moments (SIGKILL from the test);
* at named steps inside a write, rotation or recovery (the store's ``ACQD_STORE_KILL_AT`` hook);
* at the N-th ``pwrite64`` system call, i.e. inside HDF5's own data and metadata writes (strace's
  syscall fault injection, ``-e inject=pwrite64:signal=SIGKILL:when=N``, strace(1) manual page).

Every time: the store opens after recovery, every acknowledged record is there and bit-identical (its
samples regenerated from the seed and its CRC-32 recomputed with zlib), and the recovered files are plain
HDF5 that h5py opens without SWMR and HDF5 1.10's h5dump lists.
"""

from __future__ import annotations

import os
import random
import re
import shutil
import signal
import subprocess
import sys
import threading
import time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import h5py
import numpy as np
import pytest

from acqd.store import RecordStore, open_records
from acqd.store.faults import ENV as KILL_ENV
from acqd.store.schema import BLOB_PARTS

try:
    from test_store import crc_of, make_record
except ImportError:  # pytest's importlib import mode does not put tests/ on sys.path
    sys.path.insert(0, str(Path(__file__).parent))
    from test_store import crc_of, make_record

HERE = Path(__file__).resolve()
H5DUMP = shutil.which("h5dump")
STRACE = shutil.which("strace")
LEFTOVER = re.compile(r"\.(part|init|recovering|damaged)$")


class Writer:
    """A writer process; a thread collects its stdout so the test never blocks on the pipe."""

    def __init__(self, store: Path, *, seed_base: int, count: int, rotate: int, pause_s: float = 0.0,
                 kill_at: str = "", prefix: list[str] | None = None) -> None:
        env = {k: v for k, v in os.environ.items() if k != KILL_ENV}
        if kill_at:
            env[KILL_ENV] = kill_at
        argv = [sys.executable, str(HERE), "write", str(store), str(seed_base), str(count), str(rotate), str(pause_s)]
        self.proc = subprocess.Popen([*(prefix or []), *argv], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                                     text=True, env=env)
        self.lines: list[str] = []
        self.ready = threading.Event()
        self._thread = threading.Thread(target=self._collect, daemon=True)
        self._thread.start()

    def _collect(self) -> None:
        for line in self.proc.stdout:
            if line.strip() == "ready":
                self.ready.set()
            else:
                self.lines.append(line)

    def finish(self, timeout_s: float = 30.0) -> dict[int, int]:
        """Wait for the process to end; the acknowledged records as {index: seed}."""
        self.proc.wait(timeout=timeout_s)
        self._thread.join(timeout=timeout_s)
        self.stderr = self.proc.stderr.read()
        self.proc.stderr.close()
        return dict(tuple(map(int, line.split())) for line in self.lines if line.endswith("\n"))

    def kill(self) -> dict[int, int]:
        self.proc.send_signal(signal.SIGKILL)
        return self.finish()

    def failure(self) -> str:
        """For an assertion message: stop the process and return what it printed on stderr."""
        self.kill()
        return self.stderr


def writer_main(argv: list[str]) -> None:
    """Child side: append records made from consecutive seeds; print each acknowledged index."""
    store, seed_base, count, rotate, pause_s = argv[0], int(argv[1]), int(argv[2]), int(argv[3]), float(argv[4])
    with RecordStore(store, rotate_records=rotate) as writer:
        print("ready", flush=True)
        for k in range(count):
            index = writer.append(make_record(seed_base + k))
            print(index, seed_base + k, flush=True)
            if pause_s:
                time.sleep(pause_s)


def check_store(store: Path, acked: dict[int, int], *, recover: bool, since: int = 0, damaged: int = 0) -> int:
    """Acknowledged records are present and exact; stored records from ``since`` on verify. Returns the count.
    With ``damaged`` segments set aside, the reader names each and their indices stay a hole, never reused."""
    if recover:
        RecordStore(store).close()  # the writer's start-up recovery, then a clean close
        assert not [p.name for p in store.parent.iterdir() if LEFTOVER.search(p.name)]
    with open_records(store) as reader:
        assert len(reader.notes) == damaged and all("damaged segment" in n for n in reader.notes)
        stored = [s.index for s in reader.index()]
        if damaged:
            assert stored == sorted(set(stored))
        else:
            assert stored == list(range(len(stored)))  # a crash never leaves a hole in the indices
        assert set(acked) <= set(stored)
        for index in stored[since:]:
            record = reader.read(index)  # read() checks the samples against the stored CRC-32
            seed = acked.get(index)
            if seed is not None:
                expected = make_record(seed)
                assert record.checksum() == crc_of(expected)  # zlib CRC-32 of the regenerated samples
                for got, want in zip(record.channels, expected.channels, strict=True):
                    np.testing.assert_array_equal(got.samples, want.samples)
                assert record.analysis == expected.analysis and record.utc == expected.utc
    return len(stored)


def check_plain_files(store: Path) -> None:
    """Finished segments are closed HDF5 files: h5py opens them without SWMR, h5dump 1.10 lists them."""
    for path in sorted(store.parent.glob(f"{store.stem}.*.h5")):
        with h5py.File(path, "r") as f:
            assert f.attrs["acqd_format"] == "acqd-records"
        if H5DUMP:  # Debian hdf5-tools 1.10: an independent reader of the file format
            proc = subprocess.run([H5DUMP, "-H", str(path)], capture_output=True, text=True, timeout=30)
            assert proc.returncode == 0 and 'DATASET "index"' in proc.stdout, proc.stderr


def in_parallel(job, items: list) -> list:
    """Run independent trials two at a time (the machine has two cores); re-raises a trial's failure."""
    with ThreadPoolExecutor(max_workers=2) as pool:
        return [future.result() for future in [pool.submit(job, item) for item in items]]


def random_kills(store: Path, seed: int, trials: int) -> int:
    """SIGKILL a writer of ``store`` at seeded random moments ``trials`` times.

    After every second kill the test checks the store (as a reader, then recovering it itself); after the
    others the next writer has to recover it before it can print "ready", so kills land in start-ups too.
    """
    rng = random.Random(seed)  # seeded: the same kill delays on every run
    acked: dict[int, int] = {}
    checked = 0  # records before this index were verified after an earlier kill
    for trial in range(trials):
        writer = Writer(store, seed_base=trial * 100_000, count=100_000, rotate=7)
        assert writer.ready.wait(timeout=30), writer.failure()
        if trial % 2:  # odd trials kill after the first acknowledged record, even ones at any moment
            assert wait_for(lambda w=writer: w.lines), writer.failure()
        time.sleep(rng.uniform(0.0, 0.1))
        acked.update(writer.kill())
        assert writer.proc.returncode == -signal.SIGKILL
        if trial % 2:  # after even trials the next writer recovers, so kills also land in its start-up
            check_store(store, acked, recover=False, since=checked)  # a reader copes with the dead writer's file
            checked = check_store(store, acked, recover=True, since=checked) - 1
    check_store(store, acked, recover=True)
    check_plain_files(store)
    return len(acked)


def wait_for(condition, timeout_s: float = 30.0) -> bool:
    deadline = time.monotonic() + timeout_s
    while not condition() and time.monotonic() < deadline:
        time.sleep(0.005)
    return bool(condition())


def test_sigkill_at_random_moments(tmp_path: Path) -> None:
    stores = [tmp_path / f"run{k}" / "night.h5" for k in range(2)]
    for store in stores:
        store.parent.mkdir()
    n_acked = in_parallel(lambda k: random_kills(stores[k], 20260501 + k, trials=10), [0, 1])
    assert min(n_acked) >= 5  # every odd trial acknowledged at least one record before its kill


# (kill point, acknowledged records, stored records after recovery) with rotate_records=4.
FAULT_POINTS = [
    ("append:blobs@3", 2, 2),  # blobs written, no sample chunk yet
    ("append:samples@3", 2, 2),  # sample chunk written, not flushed
    ("append:data-flushed@3", 2, 2),  # data flushed, index row not yet written
    ("append:index@3", 2, 2),  # index row written, its extent not flushed
    ("append:flushed@3", 2, 3),  # flushed, not fsynced: in the page cache, survives a kill
    ("append:synced@3", 2, 3),  # durable, but append() has not returned
    ("rotate:closed@1", 3, 4),  # 4th append: segment closed, not yet renamed
    ("rotate:renamed@1", 3, 4),  # renamed, directory not yet fsynced
    ("rotate:created@2", 4, 4),  # 5th append: next segment created under its temporary name
]


@pytest.mark.parametrize("kill_at, n_acked, n_stored", FAULT_POINTS)
def test_sigkill_at_chosen_steps_of_a_write(tmp_path: Path, kill_at: str, n_acked: int, n_stored: int) -> None:
    store = tmp_path / "s.h5"
    writer = Writer(store, seed_base=0, count=10, rotate=4, kill_at=kill_at)
    acked = writer.finish()
    assert writer.proc.returncode == -signal.SIGKILL, writer.stderr  # it died at the chosen step
    assert sorted(acked) == list(range(n_acked))
    assert check_store(store, acked, recover=True) == n_stored
    check_plain_files(store)


@pytest.mark.parametrize(
    "kill_at, left_behind",
    [
        ("recover:copied@1", ["s.000000.h5.part", "s.000000.h5.recovering"]),  # copy written, not renamed
        ("recover:renamed@1", ["s.000000.h5", "s.000000.h5.part"]),  # copy in place, .part not yet removed
    ],
)
def test_sigkill_during_recovery(tmp_path: Path, kill_at: str, left_behind: list[str]) -> None:
    store = tmp_path / "s.h5"
    acked = Writer(store, seed_base=0, count=10, rotate=4, kill_at="append:index@3").finish()
    second = Writer(store, seed_base=50, count=10, rotate=4, kill_at=kill_at)
    assert second.finish() == {} and second.proc.returncode == -signal.SIGKILL  # died while recovering
    assert sorted(p.name for p in tmp_path.glob("s.0*")) == left_behind
    assert check_store(store, acked, recover=True) == 2
    check_plain_files(store)


def test_unopenable_live_segment_is_moved_aside_not_deleted(tmp_path: Path) -> None:
    store = tmp_path / "s.h5"
    acked = Writer(store, seed_base=0, count=10, rotate=4, kill_at="append:index@7").finish()
    part = tmp_path / "s.000001.h5.part"  # records 4 and 5; segment 0 (records 0-3) is finished
    wrecked = b"\0" * 512 + part.read_bytes()[512:]  # no superblock: HDF5 finds no file signature
    part.write_bytes(wrecked)
    with open_records(store) as reader:  # a reader skips it, says so, and lists the rest
        assert [s.index for s in reader.index()] == [0, 1, 2, 3]
        assert len(reader.notes) == 1 and "s.000001.h5.part: skipped" in reader.notes[0]
    with RecordStore(store) as writer:
        assert len(writer.notes) == 2
        assert "cannot be read" in writer.notes[0] and "moved aside to s.000001.h5.damaged" in writer.notes[0]
        # Nobody can tell which indices it held: a whole segment's worth is skipped, none given out twice.
        assert "indices 4 to 1003 are left unused" in writer.notes[1]
        assert writer.append(make_record(99)) == 1004
    assert (tmp_path / "s.000001.h5.damaged").read_bytes() == wrecked  # kept byte for byte
    check_store(store, {i: acked[i] for i in range(4)}, recover=False, damaged=1)


def test_damage_before_the_last_row_keeps_the_original(tmp_path: Path) -> None:
    store = tmp_path / "s.h5"
    acked = Writer(store, seed_base=0, count=10, rotate=10, kill_at="append:index@6").finish()
    part = tmp_path / "s.000000.h5.part"
    with h5py.File(part, "r", swmr=True) as f:  # h5py: where the second record's first chunk lies
        chunk = f["samples"].id.get_chunk_info_by_coord((1, 0, 0))
    with open(part, "r+b") as fh:  # flip bytes of an acknowledged record, as a failing disk would
        fh.seek(chunk.byte_offset + 8)
        fh.write(b"\xff" * 8)
    with RecordStore(store) as writer:
        assert "recovered 1 record(s)" in writer.notes[0] and "kept as s.000000.h5.damaged" in writer.notes[0]
        # Records 1-4 were acknowledged, only their copy in the .damaged file is left: never reuse their indices.
        assert writer.append(make_record(99)) > max(acked)
    assert (tmp_path / "s.000000.h5.damaged").exists()
    with open_records(store) as reader:  # the damaged segment is named with what it holds
        (note,) = [n for n in reader.notes if "s.000000.h5.damaged" in n]
        assert f"holds {len(acked)} record(s) (records 0-{len(acked) - 1})" in note
    check_store(store, {0: acked[0]}, recover=False, damaged=1)


def _traced_dry_run(tmp_path: Path, count: int, rotate: int, calls: str) -> tuple[Writer, Path]:
    """A writer run to the end under strace(1) ``-e trace=CALLS``, to count the write calls a kill can
    land on; skipped where ptrace is not allowed."""
    trace = tmp_path / "trace.txt"
    dry = Writer(tmp_path / "dry.h5", seed_base=0, count=count, rotate=rotate,
                 prefix=[STRACE, "-f", "-qq", "-e", f"trace={calls}", "-o", str(trace)])
    dry.finish()
    if dry.proc.returncode != 0 and "ptrace" in dry.stderr:
        pytest.skip(f"strace cannot trace here: {dry.stderr.strip().splitlines()[-1]}")
    return dry, trace


@pytest.mark.skipif(STRACE is None, reason="strace not installed")
def test_sigkill_inside_hdf5_writes(tmp_path: Path) -> None:
    """strace(1) ``-e inject=pwrite64:signal=SIGKILL:when=N`` kills the writer as it enters its N-th pwrite64."""
    dry, trace = _traced_dry_run(tmp_path, count=12, rotate=5, calls="pwrite64")
    n_writes = trace.read_text().count("pwrite64(")
    assert dry.proc.returncode == 0 and n_writes > 12 * 3  # blobs, samples, index, metadata per record
    rng = random.Random(77)

    def kill_at(when: int) -> None:
        store = tmp_path / f"at{when}" / "s.h5"
        store.parent.mkdir()
        inject = ["-e", "trace=pwrite64", "-e", f"inject=pwrite64:signal=SIGKILL:when={when}"]
        writer = Writer(store, seed_base=0, count=12, rotate=5,  # same records as the dry run: same writes
                        prefix=[STRACE, "-f", "-qq", "-o", os.devnull, *inject])
        acked = writer.finish()
        assert writer.proc.returncode == -signal.SIGKILL, f"pwrite64 #{when} was not reached"
        check_store(store, acked, recover=True)
        check_plain_files(store)

    in_parallel(kill_at, sorted(rng.sample(range(1, n_writes + 1), 8)))


def pwrites_of_one_append(trace: str, record: int) -> range:
    """The pwrite64 numbers (1-based, as strace's ``when=`` counts them) inside the append of ``record``.

    The writer's stdout marks the bounds: it prints "ready", then one acknowledgement line per record,
    each ending in its own write(2) of "\\n" (print(..., flush=True)), and strace logs those writes in order
    with the pwrite64 calls."""
    pwrites, ends = 0, []
    for line in trace.splitlines():
        if "pwrite64(" in line:
            pwrites += 1
        elif 'write(1, "\\n", 1)' in line:
            ends.append(pwrites)
    first, last = ends[record], ends[record + 1]  # ends[0] is after "ready", ends[k + 1] after record k
    return range(first + 1, last + 1)


@pytest.mark.skipif(STRACE is None, reason="strace not installed")
def test_no_kill_inside_an_append_leaves_a_row_whose_data_is_missing(tmp_path: Path) -> None:
    """The store's write order (acqd/store/segment.py): a record's blobs and sample chunks reach the file,
    and HDF5's flush writes their metadata, before its index row is written. So wherever a kill lands in
    an append, the dead writer's file holds no index row ahead of its data: read with h5py (the HDF5
    project's binding, not acqd's reader), the index dataset is never longer than the samples dataset and
    no row points past the end of the blobs. And a reader, before any recovery, lists only records whose
    data is all there: each reads back with its samples' CRC-32 matching (checked by ``read()``) and
    bit-identical to the regenerated record, and the acknowledged ones are all listed. Killed at every
    pwrite64 of the third append (strace(1) ``inject=pwrite64:signal=SIGKILL:when=N``).

    The first check is the one that finds an index row written before the data flush: acqd's reader
    hides such a row (it reads no further than the shorter of index and samples), so only the file itself
    shows that the order was broken."""
    dry, trace = _traced_dry_run(tmp_path, count=3, rotate=100, calls="pwrite64,write")
    assert dry.proc.returncode == 0, dry.stderr
    writes = pwrites_of_one_append(trace.read_text(), 2)
    assert len(writes) >= 4  # sample chunks, their metadata, the index chunk, its metadata

    def kill_at(when: int) -> None:
        store = tmp_path / f"at{when}" / "s.h5"
        store.parent.mkdir()
        inject = ["-e", "trace=pwrite64", "-e", f"inject=pwrite64:signal=SIGKILL:when={when}"]
        writer = Writer(store, seed_base=0, count=3, rotate=100, prefix=[STRACE, "-f", "-qq", "-o", os.devnull, *inject])
        acked = writer.finish()
        assert writer.proc.returncode == -signal.SIGKILL and sorted(acked) == [0, 1], (when, writer.stderr)
        with h5py.File(store.parent / "s.000000.h5.part", "r", swmr=True) as f:
            rows, n_positions, n_blob_bytes = f["index"][:], f["samples"].shape[0], f["blobs"].shape[0]
        assert len(rows) <= n_positions, f"pwrite64 #{when}: {len(rows)} index rows, {n_positions} sample positions"
        for part in BLOB_PARTS:
            ends = rows[f"{part}_offset"].astype(np.int64) + rows[f"{part}_length"]
            assert (ends <= n_blob_bytes).all(), f"pwrite64 #{when}: a row's {part} ends past the {n_blob_bytes} blob bytes"
        with open_records(store) as reader:  # the live .part as the writer left it, no recovery
            listed = [summary.index for summary in reader.index()]
            assert listed in ([0, 1], [0, 1, 2]), (when, listed)
            for index in listed:
                record = reader.read(index)  # raises if its samples do not match the row's CRC-32
                assert record.checksum() == crc_of(make_record(index)), (when, index)  # zlib over the regenerated samples
        check_store(store, acked, recover=True)

    in_parallel(kill_at, list(writes))


def test_swmr_reader_sees_records_while_the_writer_appends(tmp_path: Path) -> None:
    store = tmp_path / "live.h5"
    writer = Writer(store, seed_base=500, count=40, rotate=1000, pause_s=0.03)
    assert writer.ready.wait(timeout=30), writer.failure()
    assert wait_for(lambda: writer.lines), writer.failure()
    deadline = time.monotonic() + 20
    seen_while_running = []
    with open_records(store) as reader:  # opens live.000000.h5.part with swmr=True
        while time.monotonic() < deadline and writer.proc.poll() is None:
            count = reader.refresh()
            if writer.proc.poll() is None:  # still appending when this count was observed
                seen_while_running.append(count)
            time.sleep(0.01)
        acked = writer.finish()
        assert writer.proc.returncode == 0, writer.stderr
        assert reader.refresh() == 40  # the file was renamed under the open reader; it reads on
        for record in reader:
            expected = make_record(acked[record.index])
            assert record.checksum() == crc_of(expected)  # zlib CRC-32 of the regenerated samples
    growing = sorted(set(c for c in seen_while_running if c < 40))
    assert len(growing) >= 5  # the reader saw the store grow at least five times while it was written
    assert sorted(acked) == list(range(40))


if __name__ == "__main__":
    if sys.argv[1:2] == ["write"]:
        writer_main(sys.argv[2:])
