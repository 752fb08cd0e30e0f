"""The campaign daemon's cost per slot against the bare step test, and its memory over a long campaign,
measured side by side in one run on the simulated bench.

The simulated bench runs in a child process, as a real bench's instruments run outside the daemon (an
in-process simulated bench would compete with the daemon for the interpreter lock, which no real
instrument does; ``--in-process`` measures that case too). Both sides use the same profile, a visa bench
pointing at the child's servers.

1. rounds (``--rounds``, default 10), each of three parts in turn, their order reversed every other round:
   a block of ``--bare`` bare step tests (the profile's step test, bench opened once, back to back); a
   back-to-back campaign of ``--round-slots`` slots run by ``Daemon`` with the comparator; the same
   campaign with nothing to compare. The daemon's time per slot is the median time from one slot's start
   to the next one's (from the ledger), the bare step test's the median of its block. Overhead = daemon
   time per slot / bare step-test time − 1, per round; the median over rounds is the figure. Other
   processes on a shared machine come and go: ratios of neighbours in time are what stays comparable.
2. a long campaign of ``--slots`` slots (with the comparator) between two more bare blocks, for memory:
   the resident set size (``VmRSS`` of /proc/PID/status) of the daemon's process plus its comparator
   worker, read as slot 1 and the last slot end, and the worker's alone. For a slot time that grows with
   the campaign (a query over every slot so far), the median slot time of its first and last
   ``WINDOW_SLOTS`` slots, and the CPU time of the daemon's own process per slot in each: CPU time is
   what other processes on a shared machine disturb least.
3. what the daemon adds, each part timed on its own: comparing (the comparator on records of the bench,
   in the daemon's process and through the worker process as the keeper waits for it), storing
   (``RecordStore.append`` with the profile's fsync), logging (one slot's run-log lines and ledger
   transactions). The keeper does these beside the next step test, so they overlap it instead of adding
   to it; they are printed to show what is being hidden.

Targets: overhead at most 5 %, memory growth at most 5 MB over 2,000 slots; the comparator worker's RSS is
printed on its own.

With ``--instrument-time`` the simulated scope completes an acquisition when a real one would (the next
edge of the 200 Hz stimulus, then the window), so the step test waits on the instrument as on a real bench
and the keeper's work can overlap it; without it the step test is pure CPU, the daemon's worst case.

    python bench/campaign.py [--rounds 10] [--round-slots 100] [--bare 40] [--slots 2000] [--samples 1500]
                             [--in-process] [--instrument-time]
"""

from __future__ import annotations

import argparse
import multiprocessing
import os
import statistics
import sys
import tempfile
import time
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from typing import Any

from rich.console import Console

from acqd.benchsession import open_bench
from acqd.campaign.comparing import ComparatorProcess
from acqd.campaign.daemon import Daemon
from acqd.campaign.ledger import FILENAME, Ledger
from acqd.campaign.runlog import RunLog
from acqd.judge import make_judge
from acqd.profile import load_profile
from acqd.steptest import run_step_test
from acqd.store import RecordStore

SIMULATED = {"seed": 1, "noise_v_rms": 0.002, "dut": {"model": "series_rlc", "r_ohm": 22.0, "l_h": 3.3e-3, "c_f": 100e-9},
             "wiring": {"CH1": "v_src", "CH3": "v_c"}}
IN_PROCESS = """
[bench]
kind = "simulated"
[bench.generator]
driver = "scpi-generator"
[bench.scope]
driver = "scpi-digitiser"
[bench.simulated]
seed = 1
noise_v_rms = 0.002
[bench.simulated.dut]
model = "series_rlc"
r_ohm = 22.0
l_h = 3.3e-3
c_f = 100e-9
[bench.simulated.wiring]
CH1 = "v_src"
CH3 = "v_c"
"""
CHILD_PROCESS = """
[bench]
kind = "visa"
[bench.generator]
driver = "scpi-generator"
resource = "{gen}"
[bench.scope]
driver = "scpi-digitiser"
resource = "{scope}"
"""
PROFILE = """
[profile]
name = "campaign-bench"
{bench}
[limits]
max_level_v = 2.0
max_frequency_hz = 10e3
[stimulus]
low_v = 0.0
high_v = 1.0
frequency_hz = 200.0
[acquisition]
window_s = 1.5e-3
samples = {samples}
[acquisition.channels.CH1]
name = "v_src"
range_v = 0.8
offset_v = 0.5
[acquisition.channels.CH3]
name = "v_c"
range_v = 1.0
offset_v = 0.75
[dut]
model = "series_rlc"
r_ohm = 22.0
l_h = 3.3e-3
c_f = 100e-9
[dut.channels]
v_c = "v_c"
[dut.tolerances]
nrmse_max = 0.05
[campaign]
name = "bench"
back_to_back = true
slots = {slots}
"""


def serve(conn: Any, instrument_time: bool) -> None:
    """Child process: the simulated bench until the parent says it is done."""
    from acqd.sim.bench import SimBench, SimBenchConfig

    table = {**SIMULATED, "realtime": instrument_time}
    bench = SimBench(SimBenchConfig.from_mapping(table, "bench/campaign.py")).start()
    conn.send(bench.resources)
    conn.recv()
    bench.stop()


def rss_mb(pid: int | str = "self") -> float:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1]) / 1024
    raise RuntimeError(f"no VmRSS in /proc/{pid}/status")


def worker_rss_mb() -> float:
    """The daemon's comparator workers."""
    return sum(rss_mb(p.pid) for p in multiprocessing.active_children() if p.name == "acqd-comparator")


def daemon_rss_mb() -> tuple[float, float]:
    """(this process and its comparator workers, the workers alone); the simulated bench's process is not
    the daemon's."""
    workers = worker_rss_mb()
    return rss_mb() + workers, workers


def timed(func: Any) -> float:
    started = time.perf_counter()
    func()
    return time.perf_counter() - started


def per_call_s(func: Any, repeats: int) -> float:
    started = time.perf_counter()
    for _ in range(repeats):
        func()
    return (time.perf_counter() - started) / repeats


WINDOW_SLOTS = 200  # the long campaign's first and last slots compared


class MeasuredDaemon(Daemon):
    """The daemon, also noting the resident set size as the first and last slot end, and its process's CPU
    time at the edges of the first and last ``WINDOW_SLOTS`` (from its own run-log events)."""

    rss_at_slot: dict[int, tuple[float, float]]
    cpu_at_slot: dict[int, float]
    last_slot: int

    def _echo(self, entry: dict[str, Any]) -> None:
        if entry["event"] != "slot_done":
            return
        slot = entry["slot"]
        if slot in (1, self.last_slot):
            self.rss_at_slot[slot] = daemon_rss_mb()
        if slot in window_edges(self.last_slot):
            self.cpu_at_slot[slot] = time.process_time()


def window_edges(slots: int) -> tuple[int, ...]:
    """Slots whose end opens or closes the first and last window (none in a campaign too short for two)."""
    if slots < 2 * WINDOW_SLOTS + 1:
        return ()
    return 1, WINDOW_SLOTS + 1, slots - WINDOW_SLOTS, slots


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--rounds", type=int, default=10)
    ap.add_argument("--round-slots", type=int, default=100)
    ap.add_argument("--bare", type=int, default=40, help="bare step tests per block")
    ap.add_argument("--slots", type=int, default=2000, help="slots of the long campaign (memory)")
    ap.add_argument("--samples", type=int, default=1500)
    ap.add_argument("--in-process", action="store_true", help="simulated bench inside this process")
    ap.add_argument("--instrument-time", action="store_true",
                    help="the simulated scope takes as long as a real one (waits for the edge and the window), "
                         "so the step test waits on the instrument as it does on a real bench")
    args = ap.parse_args()
    if args.in_process:
        return measure(args, IN_PROCESS, "simulated bench in this process")
    ctx = multiprocessing.get_context("spawn")
    parent, child = ctx.Pipe()
    server = ctx.Process(target=serve, args=(child, args.instrument_time), daemon=True)
    server.start()
    try:
        resources = parent.recv()
        timing = "in instrument time" if args.instrument_time else "as fast as the CPU allows"
        return measure(args, CHILD_PROCESS.format(gen=resources["generator"], scope=resources["scope"]),
                       f"simulated bench in a child process, {timing}")
    finally:
        parent.send("done")
        server.join(10)


def write_profiles(work: Path, bench_table: str, samples: int, slots: int) -> tuple[Path, Path]:
    """The campaign profile, and the same campaign with no model in [dut] (nothing compared)."""
    text = PROFILE.format(bench=bench_table, samples=samples, slots=slots)
    compared, uncompared = work / f"compared-{slots}.toml", work / f"uncompared-{slots}.toml"
    compared.write_text(text)
    uncompared.write_text(text.split("[dut]")[0] + "[campaign]" + text.split("[campaign]")[1])
    return compared, uncompared


def bare_block(profile: Any, count: int) -> float:
    """Median time of ``count`` bare step tests, the bench opened once (and one warm-up test)."""
    with open_bench(profile) as bench:
        run_step_test(profile, bench.generator, bench.scope)
        return statistics.median(timed(lambda: run_step_test(profile, bench.generator, bench.scope))
                                 for _ in range(count))


def measure(args: argparse.Namespace, bench_table: str, where: str) -> int:
    work = Path(tempfile.mkdtemp(prefix="acqd-campaign-bench-"))
    short = write_profiles(work, bench_table, args.samples, args.round_slots)
    long_compared, _ = write_profiles(work, bench_table, args.samples, args.slots)
    profile = load_profile(long_compared)
    print(f"{where}; {args.samples} samples x 2 channels, fsync={profile.output.fsync}, campaigns back to back")
    print(f"{'round':>5s} {'bare step test':>15s} {'daemon + comparator':>24s} {'daemon, nothing compared':>26s}")
    overheads: dict[str, list[float]] = {"compared": [], "nothing": []}
    for n in range(1, args.rounds + 1):
        parts = {"bare": lambda: bare_block(profile, args.bare),
                 "compared": lambda: run_daemon(short[0], work / f"round{n}-compared", args.round_slots).slot_s,
                 "nothing": lambda: run_daemon(short[1], work / f"round{n}-nothing", args.round_slots).slot_s}
        order = list(parts) if n % 2 else list(reversed(parts))
        t = {name: parts[name]() for name in order}
        for name in overheads:
            overheads[name].append(t[name] / t["bare"] - 1)
        print(f"{n:5d} {1e3 * t['bare']:12.2f} ms {1e3 * t['compared']:11.2f} ms {100 * overheads['compared'][-1]:+7.1f} % "
              f"{1e3 * t['nothing']:11.2f} ms {100 * overheads['nothing'][-1]:+7.1f} %")
    for name, label in (("compared", "daemon + comparator"), ("nothing", "daemon, nothing compared")):
        o = overheads[name]
        print(f"{label + ' overhead, median of rounds':44s} {100 * statistics.median(o):5.1f} %   "
              f"(rounds {100 * min(o):+.1f} .. {100 * max(o):+.1f} %; target at most 5 %)")

    before = bare_block(profile, args.bare)
    daemon = run_daemon(long_compared, work / "long", args.slots)
    after = bare_block(profile, args.bare)
    bare_s = statistics.median([before, after])
    slot_s, rss = daemon.slot_s, daemon.rss_at_slot
    print(f"long campaign, {args.slots} slots with the comparator: {1e3 * slot_s:.2f} ms per slot against "
          f"{1e3 * before:.2f} / {1e3 * after:.2f} ms bare before / after: overhead {100 * (slot_s / bare_s - 1):.1f} %")
    print_windows(daemon)
    if 1 in rss and args.slots in rss:  # (run_daemon has already asserted that every slot is done)
        (first, first_worker), (last, last_worker) = rss[1], rss[args.slots]
        print(f"   RSS of the daemon + its comparator worker at slot 1: {first:.1f} MB, at slot {args.slots}: "
              f"{last:.1f} MB, growth {last - first:+.1f} MB (target at most 5 MB)")
        print(f"   of which the comparator worker: {first_worker:.1f} MB at slot 1, {last_worker:.1f} MB at slot "
              f"{args.slots}")
    print_parts(work, profile, bare_s)
    return 0


def print_windows(daemon: DaemonRun) -> None:
    """The first and last ``WINDOW_SLOTS`` slots of a long campaign side by side: a slot time that grows
    with the campaign shows as a ratio over 1 in both wall and CPU time."""
    edges = window_edges(len(daemon.gaps_s) + 1)
    if not edges or any(e not in daemon.cpu_at_slot for e in edges):
        return
    first_wall = statistics.median(daemon.gaps_s[:WINDOW_SLOTS])
    last_wall = statistics.median(daemon.gaps_s[-WINDOW_SLOTS:])
    cpu = daemon.cpu_at_slot
    first_cpu = (cpu[edges[1]] - cpu[edges[0]]) / WINDOW_SLOTS
    last_cpu = (cpu[edges[3]] - cpu[edges[2]]) / WINDOW_SLOTS
    print(f"   first / last {WINDOW_SLOTS} slots: {1e3 * first_wall:.2f} / {1e3 * last_wall:.2f} ms per slot "
          f"(x{last_wall / first_wall:.2f}); CPU time of the daemon's process {1e3 * first_cpu:.2f} / "
          f"{1e3 * last_cpu:.2f} ms per slot (x{last_cpu / first_cpu:.2f})")


def print_parts(work: Path, profile: Any, bare_s: float) -> None:
    """The keeper's parts, each timed on its own, as shares of the bare step test."""
    with open_bench(profile) as bench:
        records = [run_step_test(profile, bench.generator, bench.scope)[0] for _ in range(50)]
    judge = make_judge(profile)
    compare_s = statistics.median(timed(lambda: judge(r)) for r in records)  # each record once, as the daemon
    worker = ComparatorProcess(profile)
    try:
        worker(records[0])  # started
        worker_s = statistics.median(timed(lambda: worker(r)) for r in records)
    finally:
        worker.close()
    record = records[0]
    record.analysis = judge(record)
    (work / "parts").mkdir()
    with RecordStore(work / "parts" / "store.h5", fsync=profile.output.fsync) as store:
        store_s = per_call_s(lambda: store.append(record), 200)
    log_s = per_call_s(_one_slot_of_logging(work / "parts"), 200)
    print("parts the keeper does beside the next step test (each timed alone, as shares of the bare step test):")
    for name, part in (("  comparing, in the daemon's process", compare_s),
                       ("  comparing, through the comparator worker", worker_s),
                       ("  storing (append + fsync)", store_s),
                       ("  logging (run log + ledger, one slot)", log_s)):
        print(f"{name:44s} {1e3 * part:8.2f} ms   {100 * part / bare_s:5.1f} %")


@dataclass(frozen=True)
class DaemonRun:
    gaps_s: list[float]  # from each slot's start to the next one's, from the ledger
    rss_at_slot: dict[int, tuple[float, float]]  # MB at slot 1 and the last: daemon with its worker, worker alone
    cpu_at_slot: dict[int, float]  # the daemon process's CPU time at the window edges

    @property
    def slot_s(self) -> float:
        return statistics.median(self.gaps_s)


def run_daemon(profile: Path, data: Path, slots: int) -> DaemonRun:
    daemon = MeasuredDaemon([profile], data, Console(file=open(os.devnull, "w")), live=False)
    daemon.rss_at_slot, daemon.cpu_at_slot, daemon.last_slot = {}, {}, slots
    daemon.run()
    ledger = Ledger(data / FILENAME)
    rows = ledger.slots("bench")
    ledger.close()
    assert len(rows) == slots and all(r.state == "done" for r in rows), "every slot should be done"
    starts = [datetime.fromisoformat(r.started_utc) for r in rows]
    return DaemonRun([(b - a).total_seconds() for a, b in zip(starts, starts[1:])], daemon.rss_at_slot,
                     daemon.cpu_at_slot)


def _one_slot_of_logging(directory: Path) -> Any:
    """A slot's bookkeeping as the runner does it for a one-record slot: five run-log lines (one synced)
    and four ledger transactions."""
    ledger = Ledger(directory / FILENAME)
    log = RunLog(directory / "runlog.jsonl")
    counter = iter(range(1, 10**9))

    def slot() -> None:
        n = next(counter)
        now = datetime.now().astimezone()
        ledger.last_slot("parts")
        ledger.begin_slot("parts", n, now, now)
        log.write("slot_start", "parts", slot=n, scheduled_utc=now.isoformat(), late_s=0.001, steps=1)
        log.write("attempt", "parts", slot=n, step=1, setting="rising", attempt=1)
        ledger.add_record("parts", n, 1, n, now.isoformat(), "pass")
        log.write("record", "parts", slot=n, step=1, index=n, setting="rising", verdict="pass")
        ledger.end_slot("parts", n, "done", now, 0)
        log.write("slot_done", "parts", slot=n, records=1, faults=0, verdicts={"pass": 1}, duration_s=0.05)
        log.sync()

    return slot


if __name__ == "__main__":
    sys.exit(main())
