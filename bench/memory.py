"""Peak memory of one record at the documented maximum length: one step test stored (`acqd run -n 1`), then
compared again (`acqd compare STORE`), each in a process of its own, set against the record's own size.

    python bench/memory.py [--samples 10000000] [--work DIR]

The demo profile on the built-in simulated bench with ``samples`` per channel (the window kept, so the
sample interval shrinks) and timeouts of 300 s (the simulated scope computes a long capture for seconds). Each command runs as a child; its peak resident set comes from wait4(2)'s
``ru_maxrss`` (Linux: KiB). The record's own size is its samples as float64: (scope channels + math
channels) × samples × 8 bytes. It prints, per command, the wall time, the peak and the peak as a multiple of
the record's size.
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "profiles" / "demo-bridge-filter.toml"
CHANNELS = 4  # the demo's three scope inputs and its math channel i_l
TIMEOUT_S = 300.0


def profile_with(samples: int, work: Path) -> Path:
    text = DEMO.read_text().replace("samples = 15000", f"samples = {samples}\ntimeout_s = {TIMEOUT_S}")
    for driver in ("scpi-generator", "scpi-digitiser"):  # the simulated scope computes a long capture for seconds
        text = text.replace(f'driver = "{driver}"', f'driver = "{driver}"\ntimeout_s = {TIMEOUT_S}')
    text = text.replace('file = "data/kt9-demo.h5"', f'file = "{work / "big.h5"}"')
    path = work / "big.toml"
    path.write_text(text)
    return path


def peak_of(argv: list[str]) -> tuple[int, float, float]:
    """(exit status, seconds, peak resident set in bytes) of ``acqd ARGV`` run as a child."""
    started = time.monotonic()
    proc = subprocess.Popen([sys.executable, "-m", "acqd", *argv], stdout=subprocess.DEVNULL)
    _, status, usage = os.wait4(proc.pid, 0)
    return os.waitstatus_to_exitcode(status), time.monotonic() - started, usage.ru_maxrss * 1024.0


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--samples", type=int, default=10_000_000)
    parser.add_argument("--work", default=None, help="folder for the profile and the store (kept)")
    args = parser.parse_args()
    work = Path(args.work or tempfile.mkdtemp(prefix="acqd-memory-"))
    work.mkdir(parents=True, exist_ok=True)
    profile = profile_with(args.samples, work)
    record_bytes = CHANNELS * args.samples * 8.0
    print(f"samples per channel: {args.samples:,}; the record's samples: {record_bytes / 2**20:,.0f} MiB")
    for name, argv in (("run -n 1 (step test, store, compare)", ["run", str(profile), "-n", "1"]),
                       ("compare STORE", ["compare", str(work / "big.h5")]),
                       ("show STORE", ["show", str(work / "big.h5")])):
        status, seconds, peak = peak_of(argv)
        print(f"{name:<38} status {status}  {seconds:7.1f} s  peak {peak / 2**20:8,.0f} MiB  "
              f"= {peak / record_bytes:5.1f} × the record")


if __name__ == "__main__":
    main()
