"""Record store benchmark: the store against plain file writes, measured side by side in one run.

    python bench/store.py [--dir DIR]

1. Throughput: records of 2 x 1e5 float64 samples (1.6 MB) appended through ``RecordStore`` (fsync on,
   the default) against the same bytes written with ``open().write()`` + flush + ``os.fsync`` per record.
   Rounds alternate so that both see the same disk, and the side that goes first alternates too (plain
   first in even rounds, the store first in odd ones); the ratio of the medians is the figure to quote
   (absolute MB/s vary by about +-25 % between runs on a shared VM).
2. Flatness: the time per append at records 1-100 and 9,901-10,000 of one 10,000-record file of small
   records (2 x 1,000 samples), with fsync off (HDF5's own cost) and on. Beside each window, a plain
   write (+ fsync) of the same bytes beside each append (after it on even records, before it on odd ones)
   is a control: on this shared VM an fsync sometimes takes ~4 ms instead of ~0.2-0.7 ms for reasons
   outside the process (other processes' syncs to the same file system), and the control shows when
   that, not the file's size, moved a figure.
3. Memory: resident set size at start and end, and its peak.
"""

from __future__ import annotations

import argparse
import os
import statistics
import tempfile
import time
from pathlib import Path

import numpy as np

from acqd.record import Channel, Record, Stimulus, TimeBase
from acqd.store import RecordStore

BIG_SAMPLES, BIG_RECORDS, ROUNDS = 100_000, 40, 4  # ROUNDS even: each side goes first in half
SMALL_SAMPLES, SMALL_RECORDS, WINDOW = 1_000, 10_000, 100


def make_record(n_samples: int, seed: int = 0) -> Record:
    rng = np.random.default_rng(seed)
    names = ("v_c", "v_r")
    channels = [Channel(name, "V", rng.standard_normal(n_samples), f"CH{k + 1}") for k, name in enumerate(names)]
    return Record(
        channels=channels,
        timebase=TimeBase(1e-7, n_samples // 10, n_samples),
        stimulus=Stimulus("square", 0.0, 1.0, 100.0, "rising"),
        identities={"scope": "acqd-sim,DIG,0,1"},
        settings={"points": n_samples},
        utc="2026-05-01T00:00:00+00:00",
        profile_text="[bench]\n" * 50,
        analysis={"verdict": "pass", "fit": {"R_ohm": 20.1}},
    )


def rss_mb(field: str = "VmRSS") -> float:
    """Resident memory from /proc/self/status (Linux), in MB."""
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith(field + ":"):
            return int(line.split()[1]) / 1024
    return float("nan")


def plain_mb_s(path: Path, record: Record, n: int) -> float:
    """The lower bound of any durable store: raw write() + flush + fsync of the same bytes per record."""
    start = time.perf_counter()
    with open(path, "wb") as fh:
        for _ in range(n):
            for ch in record.channels:
                fh.write(memoryview(ch.samples))
            fh.flush()
            os.fsync(fh.fileno())
    return n * _sample_bytes(record) / (time.perf_counter() - start) / 1e6


def store_mb_s(path: Path, record: Record, n: int) -> float:
    start = time.perf_counter()
    with RecordStore(path) as store:
        for _ in range(n):
            store.append(record)
    return n * _sample_bytes(record) / (time.perf_counter() - start) / 1e6


def _sample_bytes(record: Record) -> int:
    return sum(ch.samples.nbytes for ch in record.channels)


def append_times_s(path: Path, record: Record, n: int, *, fsync: bool) -> tuple[list[float], list[float]]:
    """Seconds per append for every append of an n-record file (one segment: no rotation), and seconds
    per plain write (+ fsync if on) of the same bytes to a control file beside each append, before it on
    odd records and after it on even ones: both see the same disk state at the same moment, and neither
    always follows the other's fsync.
    """
    times, control = [], []

    def plain_write(fh) -> None:
        start = time.perf_counter()
        for ch in record.channels:
            fh.write(memoryview(ch.samples))
        fh.flush()
        if fsync:
            os.fsync(fh.fileno())
        control.append(time.perf_counter() - start)

    with RecordStore(path, fsync=fsync, rotate_records=n) as store, open(path.with_suffix(".ctl"), "wb") as fh:
        for i in range(n):
            if i % 2:
                plain_write(fh)
            start = time.perf_counter()
            store.append(record)
            times.append(time.perf_counter() - start)
            if not i % 2:
                plain_write(fh)
    return times, control


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--dir", type=Path, default=None, help="where to write (default: a temporary directory)")
    args = parser.parse_args()
    rss_start = rss_mb()
    with tempfile.TemporaryDirectory(dir=args.dir) as tmp:
        work = Path(tmp)
        big = make_record(BIG_SAMPLES)
        plain, store = [], []
        for k in range(ROUNDS):
            sides = [lambda: plain.append(plain_mb_s(work / f"plain{k}.bin", big, BIG_RECORDS)),
                     lambda: store.append(store_mb_s(work / f"store{k}.h5", big, BIG_RECORDS))]
            for side in sides if k % 2 == 0 else sides[::-1]:  # each side goes first in half the rounds
                side()
            for leftover in work.iterdir():
                leftover.unlink()
        p, s = statistics.median(plain), statistics.median(store)
        print(f"throughput, {BIG_RECORDS} records of 2 x {BIG_SAMPLES:.0e} float64 "
              f"({_sample_bytes(big) / 1e6:.1f} MB), fsync per record, median of {ROUNDS} rounds, "
              f"each side first in half of them:")
        print(f"  plain write()+fsync  {p:8.0f} MB/s   rounds: {', '.join(f'{x:.0f}' for x in plain)}")
        print(f"  RecordStore.append   {s:8.0f} MB/s   rounds: {', '.join(f'{x:.0f}' for x in store)}")
        print(f"  ratio store/plain    {s / p:8.2f}      (required >= 0.4, aim 0.9)")

        small = make_record(SMALL_SAMPLES, seed=1)
        print(f"time per append, one file of {SMALL_RECORDS} records of 2 x {SMALL_SAMPLES} samples "
              f"(median of {WINDOW}):")
        for fsync in (False, True):
            times, control = append_times_s(work / f"small-{fsync}.h5", small, SMALL_RECORDS, fsync=fsync)
            first, last = statistics.median(times[:WINDOW]), statistics.median(times[-WINDOW:])
            c_first, c_last = statistics.median(control[:WINDOW]), statistics.median(control[-WINDOW:])
            print(f"  fsync {'on ' if fsync else 'off'}  records 1-{WINDOW}: {first * 1e3:6.3f} ms   "
                  f"records {SMALL_RECORDS - WINDOW + 1}-{SMALL_RECORDS}: {last * 1e3:6.3f} ms   "
                  f"ratio {last / first:4.2f} (required <= 1.5)")
            print(f"             plain control at the same moments: {c_first * 1e3:6.3f} ms, {c_last * 1e3:6.3f} ms")
            for name, series in (("store", times), ("plain", control)):
                blocks = [statistics.median(series[k : k + 1000]) * 1e3 for k in range(0, SMALL_RECORDS, 1000)]
                print(f"             {name} medians per 1000 records, ms: {' '.join(f'{b:.2f}' for b in blocks)}")
    print(f"RSS: start {rss_start:.0f} MB, end {rss_mb():.0f} MB, peak {rss_mb('VmHWM'):.0f} MB")


if __name__ == "__main__":
    main()
