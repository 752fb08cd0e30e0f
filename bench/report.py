"""Run-report benchmark: ``acqd report`` from the stored analysis against comparing and drawing every record.

    python bench/report.py [--records 200] [--store FILE] [--screenshot FILE]

A store of ``--records`` records (default 200; both edges of the demo profile, so half rising, half falling)
is made with ``acqd run`` on the simulated bench, each record compared and its analysis stored as a
campaign stores it; or ``--store FILE`` names one already made. Then, one after the other, as a user runs
them (wall time of the whole command, interpreter start included):

1. ``acqd report STORE -o …``: the stored analysis reused, one thumbnail per record, full figures for the
   failed records only (the default);
2. ``--recompute``: every record compared (fitted) again, thumbnails only;
3. ``--recompute --full 0-N``: every record compared again and drawn in full - what ``acqd report`` did
   before it reused the stored analysis (a fit and two full-size figures per record).

Printed: time, page size and the verdict counts of each, and the ratios to (3). The verdict counts of (1)
are checked against the store's own index (the verdict kept beside each record), so the fast page is the
stored analysis and not an empty one. ``--screenshot FILE`` takes a picture of page (1) with headless
Chromium (Debian's ``chromium``) for a person to look at.
"""

from __future__ import annotations

import argparse
import re
import shutil
import subprocess
import sys
import tempfile
import time
from collections import Counter
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "profiles" / "demo-bridge-filter.toml"
ACQD = [sys.executable, "-m", "acqd"]
COUNTS = re.compile(r"(\d+) record\(s\), (\d+) pass, (\d+) fail, (\d+) untested, (\d+) not compared")


def make_store(folder: Path, records: int) -> Path:
    """``records`` records of the demo profile on the simulated bench, both edges of each step test."""
    text = DEMO.read_text(encoding="utf-8").replace('\nedge = "rising"', '\nedge = "both"')
    profile = folder / "both.toml"
    profile.write_text(text, encoding="utf-8")
    store = folder / "night.h5"
    start = time.perf_counter()
    subprocess.run([*ACQD, "run", str(profile), "-n", str((records + 1) // 2), "-o", str(store)], check=True,
                   cwd=folder, stdout=subprocess.DEVNULL)
    print(f"made {store}: {records} records in {time.perf_counter() - start:.0f} s (acqd run, compared as stored)")
    return store


def store_verdicts(store: Path) -> Counter:
    from acqd.store import open_records  # the store's index, not the report's reading of it

    with open_records(store) as reader:
        return Counter(s.verdict or "not compared" for s in reader.index())


def timed_report(store: Path, out: Path, *options: str) -> tuple[float, int, tuple[int, ...]]:
    """(wall seconds, page bytes, (records, pass, fail, untested, not compared)) of one acqd report."""
    start = time.perf_counter()
    proc = subprocess.run([*ACQD, "report", str(store), "-o", str(out), *options], capture_output=True, text=True,
                          check=True)
    seconds = time.perf_counter() - start
    counts = COUNTS.search(proc.stdout)
    assert counts, proc.stdout
    return seconds, out.stat().st_size, tuple(int(n) for n in counts.groups())


def screenshot(page: Path, shot: Path) -> None:
    browser = shutil.which("chromium") or shutil.which("chromium-browser")
    if browser is None:
        print("no screenshot: Debian's chromium is not installed")
        return
    subprocess.run([browser, "--headless", "--no-sandbox", "--disable-gpu", "--hide-scrollbars",
                    "--window-size=1280,2400", f"--screenshot={shot.resolve()}", page.resolve().as_uri()],
                   check=True, capture_output=True)
    print(f"screenshot of page 1: {shot}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--records", type=int, default=200, help="records in the store made (default 200)")
    parser.add_argument("--store", type=Path, help="report this store instead of making one")
    parser.add_argument("--screenshot", type=Path, metavar="FILE", help="a PNG of the default page")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory(prefix="acqd-bench-report-") as tmp:
        folder = Path(tmp)
        store = args.store or make_store(folder, args.records)
        verdicts = store_verdicts(store)
        total = sum(verdicts.values())
        runs = [("stored analysis (default)", ()), ("--recompute", ("--recompute",)),
                ("--recompute --full all (as before)", ("--recompute", "--full", f"0-{total - 1}"))]
        results = []
        for k, (name, options) in enumerate(runs, 1):
            page = folder / f"page{k}.html"
            results.append((name, page, *timed_report(store, page, *options)))
        _, _, base_s, base_bytes, _ = results[-1]
        print(f"\nacqd report on {total} records (store index: "
              + ", ".join(f"{n} {v}" for v, n in sorted(verdicts.items())) + ")")
        print(f"{'':36} {'time':>8} {'page':>9} {'faster':>11} {'smaller':>11}  verdicts on the page")
        for name, _, seconds, size, counts in results:
            print(f"{name:36} {seconds:7.1f}s {size / 1e6:7.2f}MB {base_s / seconds:10.1f}x {base_bytes / size:10.1f}x"
                  f"  {counts[1]} pass, {counts[2]} fail, {counts[3]} untested, {counts[4]} not compared")
        stored = results[0][4]
        agree = (stored[1], stored[2], stored[4]) == (verdicts["pass"], verdicts["fail"], verdicts["not compared"])
        print(f"page 1's verdicts {'agree' if agree else 'DISAGREE'} with the store's index")
        if args.screenshot:
            screenshot(results[0][1], args.screenshot)


if __name__ == "__main__":
    main()
