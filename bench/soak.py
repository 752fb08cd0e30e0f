"""The soak: many records through `acqd run` on a simulated bench that misbehaves, with SIGKILLs and a full
disk, then every acknowledged record checked.

    python bench/soak.py [--records 1000] [--chunk 25] [--random-kills 30] [--chosen-kills 30]
                         [--daemon-kills 30] [--daemon-slots 400] [--disk-mib MIB] [--seed 1] [--work DIR]

The simulated bench runs in this process (so its fault counts and the generator's output state can be
read at any moment), behind a `kind = "visa"` profile; `[bench.simulated.faults]`-style rates are set so
that about one step test in ten meets a fault of some kind. `acqd run` processes of `--chunk` step tests
each append to one store until `--records` records are acknowledged (a record's line printed). Between
them: `--random-kills` runs are SIGKILLed at a random moment, `--chosen-kills` at a write point of the
store (`ACQD_STORE_KILL_AT`, a random step and occurrence), and once the store's disk - a tmpfs of
`--disk-mib` in a private mount namespace, when this runs as root or with user namespaces - is filled and,
after the run that meets it, freed. At the end every record is read back (its CRC-32 checked) and set
against what the runs acknowledged. With ``--daemon-kills``, ``acqd daemon`` then runs a back-to-back
campaign of ``--daemon-slots`` one-record slots on the same bench, SIGKILLed that many times (each at a
random moment 0.5-5 s after that start's first slot began) and restarted each time, and its store, ledger and run log are checked the same way.

It prints: records acknowledged, present and verifying, lost, duplicated, corrupt; faults injected by kind
and step tests not acquired; how each run ended; and the generator's output after each run ended.
"""

from __future__ import annotations

import acqd  # first: it sets the single-threaded BLAS that acqd runs with, before numpy loads  # noqa: F401

import argparse
import json
import os
import random
import shutil
import signal
import sqlite3
import subprocess
import sys
import tempfile
import threading
import time
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path

from acqd.errors import AcqdError
from acqd.sim.bench import SimBench, SimBenchConfig
from acqd.store import open_records
from acqd.store.faults import ENV as KILL_ENV

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "profiles" / "demo-bridge-filter.toml"
# Per chance (see acqd.sim.faults): with configure-once a step test is about 11 messages, 7 replies, 3
# block replies and one arming, so these add up to roughly one step test in ten.
RATES = {"seed": 0, "reply_delay_s": 3.0, "trigger_never": 0.02, "cut_block": 0.005, "garble_block": 0.005,
         "power_cycle": 0.002, "connection_reset": 0.001, "error_entry": 0.001, "reply_delay": 0.001,
         "slow_opc": 0.005, "short_read": 0.01}
RECORD_MIB = 0.55  # one demo record in a segment (4 channels × 15,000 float64 samples and its metadata)
MAX_STALLED_RUNS = 5
WRITE_POINTS = ("append:blobs", "append:samples", "append:data-flushed", "append:index", "append:flushed",
                "append:synced", "rotate:created", "rotate:closed", "rotate:renamed")


@dataclass
class Tally:
    acknowledged: dict[int, str] = field(default_factory=dict)  # index → the UTC second its line showed
    endings: Counter[str] = field(default_factory=Counter)
    output_after: Counter[str] = field(default_factory=Counter)
    not_acquired: int = 0
    twice: int = 0  # an index acknowledged by two runs


def visa_profile(work: Path, bench: SimBench, store: Path, rotate: int) -> Path:
    """The demo profile on the bench running here: kind = "visa", 2 s timeouts (a 3 s delay is late)."""
    text = DEMO.read_text()
    start, end = text.index("[bench.simulated]"), text.index("[limits]")
    text = text[:start] + text[end:]
    text = text.replace('kind = "simulated"', 'kind = "visa"')
    for role, driver in (("generator", "scpi-generator"), ("scope", "scpi-digitiser")):
        text = text.replace(f'driver = "{driver}"', f'driver = "{driver}"\nresource = "{bench.resources[role]}"\n'
                                                    f'timeout_s = 2.0', 1)
    text = text.replace('file = "data/kt9-demo.h5"', f'file = "{store}"\nrotate_records = {rotate}')
    path = work / "soak.toml"
    path.write_text(text)
    return path


def one_run(profile: Path, count: int, tally: Tally, kill_after_s: float | None, kill_at: str) -> str:
    """One `acqd run`, perhaps killed; its acknowledged lines go into ``tally``. Returns how it ended."""
    env = {k: v for k, v in os.environ.items() if k != KILL_ENV}
    if kill_at:
        env[KILL_ENV] = kill_at
    proc = subprocess.Popen([sys.executable, "-m", "acqd", "run", str(profile), "-n", str(count)], env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    lines: list[str] = []
    reader = threading.Thread(target=lambda: lines.extend(proc.stdout), daemon=True)
    reader.start()
    if kill_after_s is not None:
        try:
            proc.wait(timeout=kill_after_s)
        except subprocess.TimeoutExpired:
            proc.send_signal(signal.SIGKILL)
    status = proc.wait()
    reader.join()
    err = proc.stderr.read()
    for line in lines:
        if line.startswith("#"):
            index_text, day, clock = line[1:].split()[:3]
            index = int(index_text)
            tally.twice += index in tally.acknowledged
            tally.acknowledged[index] = f"{day} {clock}"
        tally.not_acquired += line.startswith("not acquired:")
    ending = ("killed" if status == -signal.SIGKILL else "clean" if status in (0, 1) else "stopped with one line"
              if len(err.strip().splitlines()) == 1 and "Traceback" not in err else "TRACEBACK")
    tally.endings[ending] += 1
    return ending


def check(store: Path, tally: Tally) -> dict[str, int]:
    """Every stored record read back (CRC-32 checked by the reader) and set against the acknowledged ones."""
    present: dict[int, str] = {}
    seen: list[int] = []
    corrupt = 0
    with open_records(store) as reader:
        for summary in reader.index():
            seen.append(summary.index)
            try:
                record = reader.read(summary.index)
            except AcqdError:
                corrupt += 1
                continue
            present[summary.index] = record.utc[:19].replace("T", " ")
    acknowledged = tally.acknowledged
    return {"acknowledged": len(acknowledged), "present and verifying": len(present),
            "lost": sum(1 for i, utc in acknowledged.items() if present.get(i) != utc),
            "duplicated": len(seen) - len(set(seen)) + tally.twice, "corrupt": corrupt}


DAEMON_CAMPAIGN = "soak-daemon"
DAEMON_TIMEOUT_S = 600.0  # the last daemon start finishes the campaign: a bound so a hang ends the soak


def daemon_profile(run_profile: Path, slots: int) -> Path:
    """The run's profile with a back-to-back campaign of ``slots`` one-record slots."""
    path = run_profile.with_name("soak-daemon.toml")
    path.write_text(run_profile.read_text() + f'\n[campaign]\nname = "{DAEMON_CAMPAIGN}"\nback_to_back = true\n'
                                                f"slots = {slots}\n")
    return path


def start_daemon(profile: Path, data: Path) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-m", "acqd", "daemon", "--plain", "--data-dir", str(data), str(profile)],
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)


def daemon_phase(args: argparse.Namespace, rng: random.Random, bench: SimBench, run_profile: Path,
                 data: Path) -> dict[str, object]:
    """``--daemon-kills`` SIGKILLs of ``acqd daemon``, each 0.5-5 s after that start's first slot began and
    followed by a restart, then a last start that finishes the campaign; then every record and slot checked against what the daemon's
    run log acknowledged (a "record" event is written once the record is durable)."""
    profile = daemon_profile(run_profile, args.daemon_slots)
    kills, output_after_kill, finished_early = 0, Counter(), False
    while kills < args.daemon_kills:
        proc = start_daemon(profile, data)
        if not wait_for_a_slot(proc, data) or _ended_within(proc, rng.uniform(0.5, 5.0)):
            finished_early = True  # the campaign ended before every kill was made
            break
        proc.send_signal(signal.SIGKILL)
        proc.wait()
        kills += 1
        output_after_kill["on" if bench.generator.settings.output_on else "off"] += 1
    last = start_daemon(profile, data)
    _, err = last.communicate(timeout=DAEMON_TIMEOUT_S)
    return {"kills": kills, "finished before the kills were made": finished_early, "last start's status": last.returncode,
            "last start's stderr lines": len(err.strip().splitlines()), **daemon_check(data),
            "generator output after a kill": dict(output_after_kill),
            "generator output after the campaign": "on" if bench.generator.settings.output_on else "off"}


def wait_for_a_slot(proc: subprocess.Popen, data: Path) -> bool:
    """Wait until this daemon has started a slot (its start-up, with the comparator worker's, takes seconds
    on a loaded machine: a kill before it would test nothing); False if it ended first."""
    log = data / "runlog.jsonl"
    started = log.read_text().count('"slot_start"') if log.exists() else 0
    deadline = time.monotonic() + DAEMON_TIMEOUT_S
    while time.monotonic() < deadline:
        if proc.poll() is not None:
            return False
        if log.exists() and log.read_text().count('"slot_start"') > started:
            return True
        time.sleep(0.1)
    raise RuntimeError(f"acqd daemon started no slot in {DAEMON_TIMEOUT_S:g} s")


def _ended_within(proc: subprocess.Popen, seconds: float) -> bool:
    try:
        proc.wait(timeout=seconds)
        return True
    except subprocess.TimeoutExpired:
        return False


def daemon_check(data: Path) -> dict[str, object]:
    """Acknowledged (run log "record" events) against stored (every record read, CRC-32 checked), and every
    slot of the ledger accounted for once."""
    acknowledged: dict[int, tuple[int, int]] = {}
    for line in (data / "runlog.jsonl").read_text().splitlines():
        try:
            event = json.loads(line)
        except json.JSONDecodeError:
            continue  # a line a kill cut short
        if event.get("event") == "record":
            acknowledged[event["index"]] = (event["slot"], event["step"])
    stored: dict[int, tuple[int, int]] = {}
    corrupt = 0
    with open_records(data / f"{DAEMON_CAMPAIGN}.h5") as reader:
        for summary in reader.index():
            try:
                record = reader.read(summary.index)
            except AcqdError:
                corrupt += 1
                continue
            tag = record.settings["campaign"]
            stored[summary.index] = (tag["slot"], tag["step"])
    conn = sqlite3.connect(f"file:{data / 'campaigns.sqlite'}?mode=ro", uri=True)
    try:
        slots = conn.execute("SELECT first_slot, slot, state FROM acqd_slots WHERE campaign = ?",
                             (DAEMON_CAMPAIGN,)).fetchall()
    finally:
        conn.close()
    accounted = Counter(n for first, last, _ in slots for n in range(first, last + 1))
    return {"records acknowledged": len(acknowledged), "records present and verifying": len(stored),
            "lost": sum(1 for i, tag in acknowledged.items() if stored.get(i) != tag),
            "duplicated": len(stored) - len(set(stored.values())), "corrupt": corrupt,
            "gaps in the indices": (max(stored) + 1 - len(stored)) if stored else 0,
            "slots": len(accounted), "slots accounted twice": sum(1 for c in accounted.values() if c > 1),
            "slot states": dict(Counter(state for _, _, state in slots))}


def fill(disk: Path) -> Path:
    """Fill the disk with one file but a few KiB (the next run meets ENOSPC); returns the file."""
    filler = disk / "filler"
    with filler.open("wb") as fh:
        try:
            while True:
                fh.write(b"\0" * (1 << 20))
                fh.flush()
        except OSError:
            pass
    return filler


def soak(args: argparse.Namespace, disk: Path | None) -> None:
    rng = random.Random(args.seed)
    work = Path(args.work or tempfile.mkdtemp(prefix="acqd-soak-"))
    work.mkdir(parents=True, exist_ok=True)
    store_dir = disk or work
    table = {"seed": 9, "noise_v_rms": 0.002, "faults": {**RATES, "seed": args.seed}}
    bench = SimBench(SimBenchConfig.from_mapping(table, "bench/soak.py")).start()
    tally = Tally()
    try:
        profile = visa_profile(work, bench, store_dir / "soak.h5", rotate=max(2, args.chunk // 2))
        kills = ["random"] * args.random_kills + ["chosen"] * args.chosen_kills
        rng.shuffle(kills)
        filled_at = rng.randrange(len(kills) + 1) if disk is not None else None
        filler: Path | None = None
        runs = 0
        stalled = 0  # runs in a row that acknowledged nothing: a soak that cannot go on says so and ends
        while (len(tally.acknowledged) < args.records or kills) and stalled < MAX_STALLED_RUNS:
            before = len(tally.acknowledged)
            if filled_at is not None and runs == filled_at and filler is None:
                filler = fill(disk)
            kind = kills.pop() if kills else ""
            kill_after = rng.uniform(2.0, 8.0) if kind == "random" else None
            kill_at = f"{rng.choice(WRITE_POINTS)}@{rng.randint(1, args.chunk)}" if kind == "chosen" else ""
            ending = one_run(profile, args.chunk, tally, kill_after, kill_at)
            tally.output_after[f"{'on' if bench.generator.settings.output_on else 'off'} ({ending})"] += 1
            runs += 1
            stalled = stalled + 1 if len(tally.acknowledged) == before and not kind and filler is None else 0
            if filler is not None and filled_at is not None:
                filler.unlink()
                filled_at = None  # freed once; the next run recovers the store
        figures = check(store_dir / "soak.h5", tally)
        daemon = daemon_phase(args, rng, bench, profile, store_dir / "daemon") if args.daemon_kills else None
    finally:
        injected = Counter()
        for instrument in bench.instruments.values():
            if instrument.faults.plan is not None:
                injected.update(instrument.faults.plan.counts)
        bench.stop()
    width = max(len(k) for k in figures)
    for name, value in figures.items():
        print(f"{name:<{width}}  {value}")
    print(f"faults injected: {sum(injected.values())} ({', '.join(f'{k} {v}' for k, v in sorted(injected.items()))})")
    print(f"step tests not acquired (the run went on): {tally.not_acquired}")
    print(f"runs: {runs}; ended: {', '.join(f'{k} {v}' for k, v in sorted(tally.endings.items()))}")
    print(f"generator output when a run had ended: {', '.join(f'{k} {v}' for k, v in sorted(tally.output_after.items()))}")
    print(f"disk filled and freed: {'yes' if disk is not None else 'no (no tmpfs could be mounted here)'}")
    if stalled >= MAX_STALLED_RUNS:
        print(f"stopped early: {MAX_STALLED_RUNS} runs in a row stored nothing")
    if daemon is not None:
        print(f"the daemon ({args.daemon_slots} back-to-back slots on the same bench):")
        for name, value in daemon.items():
            print(f"  {name}: {value}")
    if not args.work:
        shutil.rmtree(work, ignore_errors=True)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--records", type=int, default=1000)
    parser.add_argument("--chunk", type=int, default=25, help="step tests per acqd run")
    parser.add_argument("--random-kills", type=int, default=30)
    parser.add_argument("--chosen-kills", type=int, default=30)
    parser.add_argument("--disk-mib", type=int, default=None,
                        help="tmpfs size for the store (default: room for every record and a segment's copy); "
                             "0: no full disk")
    parser.add_argument("--daemon-kills", type=int, default=0,
                        help="then SIGKILL acqd daemon this many times at random moments, restarting it each time")
    parser.add_argument("--daemon-slots", type=int, default=400, help="slots of the daemon's campaign")
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--work", default=None, help="folder for the profile (kept); default a temporary one")
    parser.add_argument("--mounted", default=None, help=argparse.SUPPRESS)  # set inside the namespace
    args = parser.parse_args()
    if args.disk_mib is None:
        daemon_records = args.daemon_slots if args.daemon_kills else 0
        args.disk_mib = int((args.records * 1.3 + 2 * args.chunk + daemon_records) * RECORD_MIB) + 16
    if args.mounted is not None:
        soak(args, Path(args.mounted))
    elif args.disk_mib and shutil.which("unshare"):
        disk = Path(tempfile.mkdtemp(prefix="acqd-soak-disk-"))
        inner = [sys.executable, __file__, *sys.argv[1:], "--mounted", str(disk)]
        script = f'mount -t tmpfs -o size={args.disk_mib}m acqd-soak "{disk}" && exec "$@"'
        prefix = ["unshare", "-m"] if os.geteuid() == 0 else ["unshare", "-rm"]
        done = subprocess.run([*prefix, "sh", "-c", script, "sh", *inner])
        disk.rmdir()
        if done.returncode != 0:
            sys.exit(done.returncode)
    else:
        soak(args, None)


if __name__ == "__main__":
    main()
