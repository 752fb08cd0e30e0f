"""The time per unit of a batch against the time per record without a switch, measured side by side.

One simulated bench with the batch demo's fixture (``profiles/demo-kt9-batch.toml``), in this process.
Each round times, in turn (the order reversed every other round):

1. ``--records`` bare step tests on one unit whose path was closed once beforehand: the time per record
   without any switching;
2. one pass of ``acqd.batch.run_unit`` over every unit with the switch driver's own settling wait
   (``settle_s`` after each of the three relay changes per unit): the time per unit;
3. the same pass with a copy of the driver whose ``settle_s`` is 0.1 ms: what the ROUTe commands and the
   path check cost without the wait.

Per round: overhead = time per unit / time per record − 1, and the part of it that is the settling wait.
The medians over rounds are printed; other processes on a shared machine come and go, so ratios of
neighbours in time are what stays comparable. No comparator runs (it is the same with or without a switch).

    python bench/batch.py [--rounds 5] [--records 8] [--samples 15000]
"""

from __future__ import annotations

import argparse
import statistics
import tempfile
import time
from pathlib import Path

from acqd.batch import open_left_closed, run_unit, unit_profile
from acqd.benchsession import open_bench
from acqd.profile import Profile, load_profile
from acqd.steptest import run_step_test

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "profiles" / "demo-kt9-batch.toml"
DRIVER = ROOT / "drivers" / "scpi-switch.toml"
QUICK_SETTLE_S = 1e-4


def profiles(folder: Path, samples: int) -> tuple[Profile, Profile]:
    """The demo batch with the driver's settling wait, and the same with a near-zero one."""
    text = DEMO.read_text().replace("samples = 15000", f"samples = {samples}")
    text = text.replace('file = "data/kt9-lot48.h5"', f'file = "{folder / "unused.h5"}"')
    quick_driver = folder / "quick-switch.toml"
    settle = next(line for line in DRIVER.read_text().splitlines() if line.startswith("settle_s"))
    quick_driver.write_text(DRIVER.read_text().replace(settle, f"settle_s = {QUICK_SETTLE_S}"))
    (folder / "own.toml").write_text(text)
    (folder / "quick.toml").write_text(text.replace('driver = "scpi-switch"', f'driver = "{quick_driver}"'))
    return load_profile(folder / "own.toml"), load_profile(folder / "quick.toml")


def time_bare(profile: Profile, bench, records: int) -> float:
    """Seconds per record, one unit connected all along."""
    unit = profile.batch.units[0]
    bench.switch.close_channels(unit.channels)
    single = unit_profile(profile, unit)
    started = time.perf_counter()
    for _ in range(records):
        run_step_test(single, bench.generator, bench.scope)
    elapsed = (time.perf_counter() - started) / records
    bench.switch.open_all()
    return elapsed


def time_units(profile: Profile, bench) -> float:
    """Seconds per unit, switching included."""
    started = time.perf_counter()
    for unit in profile.batch.units:
        result = run_unit(profile, unit, bench.generator, bench.scope, bench.switch)
        assert result.skipped is None, result.skipped
    return (time.perf_counter() - started) / len(profile.batch.units)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rounds", type=int, default=5)
    parser.add_argument("--records", type=int, default=8)
    parser.add_argument("--samples", type=int, default=15000)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        own, quick = profiles(Path(tmp), args.samples)
        settle_s = None
        rows = []
        with open_bench(own) as bench, open_bench(quick) as quick_bench:
            open_left_closed(bench.switch)
            settle_s = bench.switch.settle_s
            for round_ in range(args.rounds):
                parts = [("bare", lambda: time_bare(own, bench, args.records)),
                         ("unit", lambda: time_units(own, bench)),
                         ("quick", lambda: time_units(quick, quick_bench))]
                measured = dict((name, run()) for name, run in (parts if round_ % 2 == 0 else parts[::-1]))
                rows.append(measured)
    bare = statistics.median(r["bare"] for r in rows)
    unit = statistics.median(r["unit"] for r in rows)
    quick_unit = statistics.median(r["quick"] for r in rows)
    overhead = statistics.median(r["unit"] / r["bare"] - 1 for r in rows)
    commands = statistics.median(r["quick"] / r["bare"] - 1 for r in rows)
    print(f"{len(own.batch.units)} units, {args.samples} samples per channel, {args.rounds} rounds (medians)")
    print(f"time per record, no switching:        {1e3 * bare:8.1f} ms")
    print(f"time per unit, settle_s = {settle_s:g} s:    {1e3 * unit:8.1f} ms   overhead {100 * overhead:6.1f} %")
    print(f"time per unit, settle_s = {QUICK_SETTLE_S:g} s:  {1e3 * quick_unit:8.1f} ms   overhead {100 * commands:6.1f} %")
    print(f"settling wait per unit (3 changes):   {1e3 * 3 * settle_s:8.1f} ms; the ROUTe commands and the path "
          f"check cost the rest")


if __name__ == "__main__":
    main()
