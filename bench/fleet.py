"""Fleet benchmark: ``acqd sync`` against a plain upload, and ``acqd fleet compare`` on 1 and 2 workers.

    python bench/fleet.py [--records 2000] [--segment-records 200] [--sync-mb 64] [--sync-rounds 8] [--rounds 3]

1. Sync throughput. A data directory of finished segments (``--sync-mb`` MB in all, 3.2 MB records, 3
   to a segment) is sent to moto's S3 server on 127.0.0.1 (started here) and to a ``file://`` folder by
   ``acqd sync`` (one pass: hashed and sent; on S3 checked against the parts' and the object's ETags, on
   the share fsynced and its size checked; the catalog rewritten at most once a second), by ``acqd sync
   --verify readback``, and by a plain ``put_file`` of the same files through the same fsspec client (on
   the share also followed by an fsync of each copy, the part of the sync's cost that durability takes).
   Each of ``--sync-rounds`` rounds runs the sides in another order, each to a fresh prefix. Printed: MB/s
   of each and its ratio to the plain ``put_file`` (the median of the per-round ratios).
2. Fleet compare. ``--records`` records of the closed-form series-RLC step response with noise (1500
   samples, two channels, R fitted) are stored in segments of ``--segment-records`` and synced to a
   ``file://`` archive. Two LocalClusters stay up side by side, of 1 and of 2 worker processes; after a
   first task on each (imports, first calls), each of ``--rounds`` rounds runs every segment's task on
   both, the order alternating. Printed: records/s on each (wall clock), the workers' CPU time per record
   (``getrusage`` in each worker, which other load on the machine does not inflate) and the cores they kept
   busy, the median of the per-round 2 ÷ 1 speed-ups, and the speed-up the CPU time per record gives if
   each worker has a core of its own (2 × CPU per record on 1 worker ÷ on 2). On a machine shared with
   other sessions, Linux's autogroup scheduling gives one session's processes together one share of the
   cores, so a second worker may get no more CPU than the first had alone: the "cores busy" column says. Then, segment by segment, the same comparisons in this process (records
   already read from the local store) and as one task on the 1-worker cluster (reading the archive),
   interleaved because this machine's speed drifts: the per-record cost in wall and in CPU time. The load
   average is printed before and after, because other processes on the machine take cores from the
   workers.
"""

from __future__ import annotations

import argparse
import contextlib
import json
import math
import os
import resource
import socket
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from acqd.compare import compare_spec, parse_dut_table  # noqa: E402
from acqd.fleet.analysis import archived_segments, cluster, compare_task, run_per_segment  # noqa: E402
from acqd.fleet.archive import open_archive  # noqa: E402
from acqd.fleet.sync import sync  # noqa: E402
from acqd.fleet.transfer import VERIFY_READBACK, VERIFY_UPLOAD  # noqa: E402
from acqd.record import Channel, Record, Stimulus, TimeBase  # noqa: E402
from acqd.store import RecordStore, open_records  # noqa: E402
from acqd.store.naming import fsync_file  # noqa: E402

L_H, C_F, RS_OHM = 3.3e-3, 100e-9, 50.0
DUT = {"model": "series_rlc", "serial": "BENCH-0001", "r_ohm": 22.0, "l_h": L_H, "c_f": C_F,
       "fit": {"free": ["r_ohm"]}, "channels": {"v_c": "v_c"},
       "tolerances": {"nrmse_max": 0.05, "parameter_pct": {"r_ohm": 10.0}}}


def v_c_step(t: np.ndarray, r_total: float) -> np.ndarray:
    """The series RLC's capacitor voltage after a 1 V step from rest (0 < ζ < 1), zero before t = 0."""
    sigma = r_total / (2 * L_H)
    wd = math.sqrt(1 / (L_H * C_F) - sigma**2)
    tp = np.clip(t, 0, None)
    return np.where(t >= 0, 1 - np.exp(-sigma * tp) * (np.cos(wd * tp) + sigma / wd * np.sin(wd * tp)), 0.0)


def make_records_store(data: Path, records: int, per_segment: int, rng: np.random.Generator) -> None:
    timebase = TimeBase(1e-6, 300, 1500)
    src = np.where(timebase.times() >= 0, 1.0, 0.0)
    with RecordStore(data / "night.h5", fsync=False, rotate_records=per_segment) as store:
        for k in range(records):
            r = 22.0 + rng.normal(0, 0.2)
            channels = [Channel("v_src", "V", src + rng.normal(0, 2e-3, 1500), "CH1"),
                        Channel("v_c", "V", v_c_step(timebase.times(), r + RS_OHM) + rng.normal(0, 2e-3, 1500), "CH3")]
            store.append(Record(channels, timebase, Stimulus("square", 0.0, 1.0, 200.0, "rising", "high_z", RS_OHM),
                                dut=DUT, utc=f"2026-12-04T{k // 3600 % 24:02d}:{k // 60 % 60:02d}:{k % 60:02d}+00:00",
                                bench_id="bench-a"))


def make_sync_dir(data: Path, megabytes: float, rng: np.random.Generator) -> int:
    """Finished segments of 3 records of 3.2 MB each, ``megabytes`` in all; returns the bytes."""
    timebase = TimeBase(1e-6, 1000, 200_000)
    n = max(3, round(megabytes / 3.2))
    with RecordStore(data / "soak.h5", fsync=False, rotate_records=3) as store:
        for k in range(n):
            channels = [Channel(name, "V", rng.standard_normal(200_000), f"CH{i + 1}") for i, name in enumerate("ab")]
            store.append(Record(channels, timebase, Stimulus("square", 0.0, 1.0, 200.0, "rising"),
                                utc="2026-12-04T00:00:00+00:00", bench_id="bench-s"))
    return sum(p.stat().st_size for p in data.glob("soak.0*.h5"))


def moto_server() -> tuple[subprocess.Popen, str]:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    proc = subprocess.Popen([sys.executable, "-m", "moto.server", "-H", "127.0.0.1", "-p", str(port)],
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    os.environ.update(AWS_ACCESS_KEY_ID="bench", AWS_SECRET_ACCESS_KEY="bench-secret",
                      AWS_ENDPOINT_URL=f"http://127.0.0.1:{port}", AWS_DEFAULT_REGION="us-east-1")
    for _ in range(300):
        try:
            socket.create_connection(("127.0.0.1", port), timeout=0.5).close()
            break
        except OSError:
            time.sleep(0.1)
    import boto3

    boto3.client("s3").create_bucket(Bucket="bench")
    return proc, "s3://bench"


def timed_sync(data: Path, url: str, verify: str) -> float:
    archive = open_archive(url)
    start = time.perf_counter()
    report = sync(data, archive, verify=verify)
    seconds = time.perf_counter() - start
    assert len(report.uploaded) == len(list(data.glob("soak.0*.h5")))
    return seconds


def timed_plain(data: Path, url: str, fsync: bool) -> float:
    """A plain ``put_file`` of each segment through the same client (on a share, ``fsync`` each copy too)."""
    plain = open_archive(url)
    start = time.perf_counter()
    for path in sorted(data.glob("soak.0*.h5")):
        key = plain.key("bench-s", "soak", path.name)
        plain.parent_ready(key)
        plain.fs.put_file(str(path), key)
        if fsync:
            fsync_file(Path(key))
    return time.perf_counter() - start


def bench_sync(folder: Path, megabytes: float, rounds: int, rng: np.random.Generator) -> None:
    data = folder / "sync-data"
    data.mkdir()
    total = make_sync_dir(data, megabytes, rng)
    proc, s3 = moto_server()
    try:
        share = (folder / "share").as_uri()
        for name, base in (("file://", share), ("S3 (moto, 127.0.0.1)", s3)):
            sides = {"acqd sync": lambda url: timed_sync(data, url, VERIFY_UPLOAD),
                     "acqd sync --verify readback": lambda url: timed_sync(data, url, VERIFY_READBACK),
                     "plain put_file": lambda url: timed_plain(data, url, fsync=False)}
            if base == share:
                sides["plain put_file + fsync"] = lambda url: timed_plain(data, url, fsync=True)
            seconds = {side: [] for side in sides}
            for k in range(rounds):  # each round in another order, each side to a fresh prefix
                order = list(sides)[k % len(sides):] + list(sides)[:k % len(sides)]
                for j, side in enumerate(order):
                    seconds[side].append(sides[side](f"{base}/round-{k}-{j}"))
            plain = seconds["plain put_file"]
            mb = total / 1e6
            print(f"sync to {name}: {mb:.0f} MB in {len(list(data.glob('soak.0*.h5')))} segments, {rounds} rounds")
            for side, times in seconds.items():
                ratio = statistics.median(p / t for p, t in zip(plain, times))
                print(f"  {side}: {mb / statistics.median(times):.0f} MB/s, ÷ plain put_file {ratio:.2f} (median)")
    finally:
        proc.terminate()
        proc.wait(timeout=10)


def in_process(data: Path, first: int, last: int, spec) -> tuple[float, float]:
    """(wall, CPU) seconds to compare records ``first..last`` of the local store in this thread (its own CPU
    time: this process also runs the two clusters' schedulers, in threads of their own)."""
    with open_records(data / "night.h5") as reader:
        records = [reader.read(i) for i in range(first, last + 1)]
    wall, cpu = time.perf_counter(), time.thread_time()
    for record in records:
        compare_spec(record, spec).to_dict()
    return time.perf_counter() - wall, time.thread_time() - cpu


def worker_cpu_s() -> float:
    """This process's CPU time (run on each worker through ``Client.run``)."""
    usage = resource.getrusage(resource.RUSAGE_SELF)
    return usage.ru_utime + usage.ru_stime


def timed_compare(client, refs, options) -> tuple[float, float, int]:
    """(wall seconds, the workers' CPU seconds, rows) of ``fleet compare``'s tasks over ``refs``."""
    cpu = sum(client.run(worker_cpu_s).values())
    start = time.perf_counter()
    parts = run_per_segment(client, compare_task, refs, **options)
    wall = time.perf_counter() - start
    return wall, sum(client.run(worker_cpu_s).values()) - cpu, sum(len(p) for p in parts)


def load() -> str:
    return "load average " + ", ".join(f"{x:.1f}" for x in os.getloadavg())


def bench_compare(folder: Path, records: int, per_segment: int, rounds: int, rng: np.random.Generator) -> None:
    data = folder / "compare-data"
    data.mkdir()
    make_records_store(data, records, per_segment, rng)
    url = (folder / "compare-share").as_uri()
    sync(data, open_archive(url))
    refs = archived_segments(open_archive(url))
    options = {"url": url, "endpoint_url": None, "dut_json": json.dumps(DUT), "source": "bench [dut]"}
    spec = parse_dut_table(DUT, "bench [dut]")
    print(f"fleet compare: {records} records in {len(refs)} segments; {load()}")
    with contextlib.ExitStack() as stack:
        clients = {n: stack.enter_context(cluster(None, n)) for n in (1, 2)}  # both up: rounds interleave
        for client in clients.values():
            run_per_segment(client, compare_task, refs[:1], **options)  # imports and first-call costs, apart
        runs: dict[int, list[tuple[float, float, int]]] = {1: [], 2: []}
        for k in range(rounds):  # each round runs every segment on 1 and on 2 workers, the order alternating
            for n in ((1, 2) if k % 2 == 0 else (2, 1)):
                runs[n].append(timed_compare(clients[n], refs, options))
                assert runs[n][-1][2] == records
        cpu_ms = {}
        for n, timed in runs.items():
            rate = statistics.median(rows / wall for wall, _, rows in timed)
            cpu_ms[n] = statistics.median(1e3 * cpu / rows for _, cpu, rows in timed)
            cores = statistics.median(cpu / wall for wall, cpu, _ in timed)
            print(f"  {n} worker(s): {rate:.1f} records/s, the workers' CPU {cpu_ms[n]:.1f} ms a record, "
                  f"{cores:.2f} cores busy (medians of {rounds} rounds)")
        speedups = [one[0] / two[0] for one, two in zip(runs[1], runs[2])]
        print(f"  2 workers ÷ 1: {statistics.median(speedups):.2f}× (rounds {min(speedups):.2f}–{max(speedups):.2f}); "
              f"with a core for each worker, from the CPU time per record: {2 * cpu_ms[1] / cpu_ms[2]:.2f}×")
        walls, cpus = [], []
        for ref in refs[:max(rounds, 3)]:  # per-record cost, interleaved segment by segment
            here_wall, here_cpu = in_process(data, ref.first_index, ref.first_index + ref.records - 1, spec)
            there_wall, there_cpu, _ = timed_compare(clients[1], [ref], options)
            walls.append(there_wall / here_wall)
            cpus.append(there_cpu / here_cpu)
        print(f"  per-record cost, a 1-worker task ÷ in-process on the same segment ({len(walls)} interleaved "
              f"rounds): wall {statistics.median(walls):.2f} (rounds {min(walls):.2f}–{max(walls):.2f}), CPU "
              f"{statistics.median(cpus):.2f} (rounds {min(cpus):.2f}–{max(cpus):.2f})")
    print(f"  {load()}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--records", type=int, default=2000)
    parser.add_argument("--segment-records", type=int, default=200)
    parser.add_argument("--sync-mb", type=float, default=64.0)
    parser.add_argument("--rounds", type=int, default=3, help="rounds of fleet compare on 1 and 2 workers")
    parser.add_argument("--sync-rounds", type=int, default=8, help="rounds of the sync sides (a second or two each)")
    args = parser.parse_args()
    rng = np.random.default_rng(14)
    with tempfile.TemporaryDirectory(prefix="acqd-bench-fleet-") as tmp:
        bench_sync(Path(tmp), args.sync_mb, args.sync_rounds, rng)
        bench_compare(Path(tmp), args.records, args.segment_records, args.rounds, rng)


if __name__ == "__main__":
    main()
