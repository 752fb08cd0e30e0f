"""The campaign daemon's cost per slot against the bare step test, and its memory over a long campaign,
measured side by side in one run on the simulated bench.

The simulated bench runs in a child process, as a real bench's instruments run outside the daemon (an
in-process simulated bench would compete with the daemon for the interpreter lock, which no real
instrument does; ``--in-process`` measures that case too). Both sides use the same profile, a visa bench
pointing at the child's servers.

1. bare step test: the profile's step test with the bench opened once, ``--bare`` times back to back.
2. what the daemon adds, each part timed on its own in the same run: comparing (the comparator on a record
   of step 1), storing (``RecordStore.append`` with the profile's fsync), logging (one slot's run-log lines
   and ledger transactions). The daemon compares and stores in its keeper thread while the next step test
   runs, so these parts overlap the step test instead of adding to it; they are printed to show what is
   being hidden.
3. the daemon: a back-to-back campaign of ``--slots`` slots on the same profile, run by ``Daemon``, once
   with the comparator and once with nothing to compare; the time per slot is the median time from one
   slot's start to the next one's (from the ledger), and the resident set size (``VmRSS`` of
   /proc/self/status) is read as slot 1 and the last slot end. The bare step test is timed one by one,
   half before and half after the daemon runs, and its median taken: other processes on a shared
   machine come and go, and medians of interleaved-in-time samples are what stays comparable.

Overhead = daemon time per slot / bare step-test time − 1. Targets: overhead under 20 %, memory growth
under 20 MB.

With ``--instrument-time`` the simulated scope completes an acquisition when a real one would (the next
edge of the 200 Hz stimulus, then the window), so the step test waits on the instrument as on a real bench
and the keeper's work can overlap it; without it the step test is pure CPU, the daemon's worst case.

    python bench/campaign.py [--slots 2000] [--bare 200] [--samples 1500] [--in-process] [--instrument-time]
"""

from __future__ import annotations

import argparse
import multiprocessing
import os
import statistics
import sys
import tempfile
import time
from datetime import datetime
from pathlib import Path
from typing import Any

from rich.console import Console

from acqd.benchsession import open_bench
from acqd.campaign.daemon import Daemon
from acqd.campaign.ledger import FILENAME, Ledger
from acqd.campaign.runlog import RunLog
from acqd.judge import make_judge
from acqd.profile import load_profile
from acqd.steptest import run_step_test
from acqd.store import RecordStore

SIMULATED = {"seed": 1, "noise_v_rms": 0.002, "dut": {"model": "series_rlc", "r_ohm": 22.0, "l_h": 3.3e-3, "c_f": 100e-9},
             "probes": {"CH1": "v_src", "CH3": "v_c"}}
IN_PROCESS = """
[bench]
kind = "simulated"
[bench.generator]
driver = "scpi-generator"
[bench.scope]
driver = "scpi-digitizer"
[bench.simulated]
seed = 1
noise_v_rms = 0.002
[bench.simulated.dut]
model = "series_rlc"
r_ohm = 22.0
l_h = 3.3e-3
c_f = 100e-9
[bench.simulated.probes]
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
driver = "scpi-digitizer"
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


def rss_mb() -> float:
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1]) / 1024
    raise RuntimeError("no VmRSS in /proc/self/status")


def timed(func: Any) -> float:
    started = time.perf_counter()
    func()
    return time.perf_counter() - started


def per_call_s(func: Any, repeats: int) -> float:
    started = time.perf_counter()
    for _ in range(repeats):
        func()
    return (time.perf_counter() - started) / repeats


class MeasuredDaemon(Daemon):
    """The daemon, also noting the resident set size as each slot ends (from its own run-log events)."""

    rss_at_slot: dict[int, float]

    def _echo(self, entry: dict[str, Any]) -> None:
        if entry["event"] == "slot_done":
            self.rss_at_slot[entry["slot"]] = rss_mb()


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--slots", type=int, default=2000)
    ap.add_argument("--bare", type=int, default=200)
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
        return measure(args, CHILD_PROCESS.format(gen=resources["gen"], scope=resources["scope"]),
                       f"simulated bench in a child process, {timing}")
    finally:
        parent.send("done")
        server.join(10)


def measure(args: argparse.Namespace, bench_table: str, where: str) -> int:
    work = Path(tempfile.mkdtemp(prefix="acqd-campaign-bench-"))
    path = work / "bench.toml"
    path.write_text(PROFILE.format(bench=bench_table, samples=args.samples, slots=args.slots))
    profile = load_profile(path)
    uncompared = work / "uncompared.toml"  # the same campaign with no model in [dut]: nothing compared
    uncompared.write_text(path.read_text().split("[dut]")[0] + "[campaign]" + path.read_text().split("[campaign]")[1])

    with open_bench(profile) as bench:
        run_step_test(profile, bench.generator, bench.scope)  # warm-up: connections, first allocations
        bare = [timed(lambda: run_step_test(profile, bench.generator, bench.scope)) for _ in range(args.bare)]
        records = [run_step_test(profile, bench.generator, bench.scope)[0] for _ in range(50)]
    judge = make_judge(profile)
    compare_s = statistics.median(timed(lambda: judge(r)) for r in records)  # each record once, as the daemon
    record = records[0]
    record.analysis = judge(record)
    (work / "parts").mkdir()
    with RecordStore(work / "parts" / "store.h5", fsync=profile.output.fsync) as store:
        store_s = per_call_s(lambda: store.append(record), 200)
    log_s = per_call_s(_one_slot_of_logging(work / "parts"), 200)

    results = [(label, *run_daemon(profile_path, work / profile_path.stem, args.slots)) for label, profile_path in
               (("daemon, comparator without fit", path), ("daemon, nothing compared", uncompared))]
    with open_bench(profile) as bench:  # the bare step test again, after: the machine's load drifts
        run_step_test(profile, bench.generator, bench.scope)
        bare += [timed(lambda: run_step_test(profile, bench.generator, bench.scope)) for _ in range(args.bare)]
    bare_s = statistics.median(bare)

    print(f"{where}; {args.samples} samples x 2 channels, fsync={profile.output.fsync}, {args.slots} slots back to back")
    print("medians (robust to another process's burst of load): step tests one by one; daemon slots start to start")
    print(f"{'bare step test':44s} {1e3 * bare_s:8.2f} ms   ({len(bare)} step tests, half before, half after)")
    for label, slot_s, rss in results:
        over = slot_s - bare_s
        print(f"{label + ', per slot':44s} {1e3 * slot_s:8.2f} ms   overhead {1e3 * over:6.2f} ms = "
              f"{100 * over / bare_s:5.1f} % of the bare step test (target < 20 %)")
        if 1 in rss and args.slots in rss:
            print(f"{'':44s} RSS at slot 1: {rss[1]:.1f} MB, at slot {args.slots}: {rss[args.slots]:.1f} MB, "
                  f"growth {rss[args.slots] - rss[1]:+.1f} MB (target < 20 MB)")
    print("parts the keeper thread does beside the next step test (each timed alone):")
    for name, part in (("  comparing", compare_s), ("  storing (append + fsync)", store_s),
                       ("  logging (run log + ledger, one slot)", log_s)):
        print(f"{name:44s} {1e3 * part:8.2f} ms   {100 * part / bare_s:5.1f} %")
    return 0


def run_daemon(profile: Path, data: Path, slots: int) -> tuple[float, dict[int, float]]:
    """(median time from one slot's start to the next one's, RSS in MB by slot)."""
    daemon = MeasuredDaemon([profile], data, Console(file=open(os.devnull, "w")), live=False)
    daemon.rss_at_slot = {}
    daemon.run()
    ledger = Ledger(data / FILENAME)
    rows = ledger.slots("bench")
    ledger.close()
    assert len(rows) == slots and all(r.state == "done" for r in rows), "every slot should be done"
    starts = [datetime.fromisoformat(r.started_utc) for r in rows]
    return statistics.median((b - a).total_seconds() for a, b in zip(starts, starts[1:])), daemon.rss_at_slot


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
