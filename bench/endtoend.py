"""acqd end to end against a hand-written pyvisa loop, per record, measured side by side in one run.

    python bench/endtoend.py [--short 10] [--long 40] [--hand-short 2] [--hand-long 6]

1. ``acqd run`` of the demo profile (15,000 samples × 3 inputs on the embedded simulated bench, the
   three-parameter fit on every record, the store with fsync) for ``--short`` and ``--long`` records; the
   time per record is the slope (t_long − t_short) / (long − short), so start-up (imports, opening the
   bench, the store) cancels. With it, the CPU time per record of acqd's process and of the run's
   comparator worker (their slopes too), which the machine's load does not stretch.
2. The hand-written loop on a simulated bench of the same [bench.simulated] table, the way pyvisa's
   documentation shows it: a ResourceManager, ``open_resource`` with line terminations, ``write`` for
   settings and ``query``/``query_ascii_values`` for replies. It sets up once, then per record ``INITiate``,
   ``*OPC?``, the three channels as ASCii lists, and one CSV file written with the csv module. No fit, no
   read-back, no durability. Its time per record is the slope of ``--hand-short`` and ``--hand-long``.
3. Where acqd's record goes, from the same step tests as ``acqd run`` does them (``Applied``: set up once),
   each part timed on its own over ``--short`` records: capture (set-up if any, arm, wait), transfer
   (``fetch`` of every channel, REAL,32 blocks), store (``RecordStore.append`` with the profile's fsync),
   compare (the comparator with the fit, warm-started as in a run).
4. The fit of one demo record: the comparator with its exact sensitivities against the same comparator
   with a finite-difference Jacobian in their place (forward differences of the predicted channels, one
   per parameter and step, as the solver's default did before): best of five each, and how far apart
   the fitted values are in hundredths of their 95 % intervals. Then the fit alone (``_fit``, without the
   step parameters and metrics around it), best of five: from the nominal values with nothing remembered
   (a run's first record), and from the previous record's values (every later record of a run).

The machine is shared (the load average is printed at the start and the end): absolute times vary with
its load; the ratio, measured in one run, much less.
"""

from __future__ import annotations

import acqd  # first: it sets the single-threaded BLAS that acqd runs with, before numpy loads  # noqa: F401

import argparse
import contextlib
import csv
import io
import os
import resource
import tempfile
import time
from dataclasses import replace
from pathlib import Path
from collections.abc import Callable
from typing import Any

import numpy as np
import pyvisa

from acqd.benchsession import open_bench, simulated_bench
from acqd.cli import main
from acqd.compare import compare_spec, parse_dut_table
import acqd.compare.core as core
from acqd.compare.core import _fit, _setup, _Setup
from acqd.compare.memo import Memo
from acqd.judge import make_judge
from acqd.profile import Profile, load_profile
from acqd.steptest import Applied, output_guard, run_step_test
from acqd.store import RecordStore, open_records

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "profiles" / "demo-bridge-filter.toml"
FORWARD_STEP = float(np.sqrt(np.finfo(float).eps))  # the relative step of scipy's "2-point" default


def demo_profile(folder: Path, name: str) -> Path:
    """The demo profile with its store in ``folder``."""
    path = folder / f"{name}.toml"
    path.write_text(DEMO.read_text().replace('file = "data/kt9-demo.h5"', f'file = "{folder / name}.h5"'))
    return path


def cpu_s() -> tuple[float, float]:
    """CPU seconds (user + system) used so far by this process and by its children that have ended."""
    own, children = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)
    return own.ru_utime + own.ru_stime, children.ru_utime + children.ru_stime


def acqd_run_s(folder: Path, count: int) -> tuple[float, float, float]:
    """Wall seconds of ``acqd run -n count``, and the CPU seconds of this process and of the run's comparator
    worker (a child, counted once it has ended). CPU time is not stretched by other jobs' load, so it says
    what each process would need of a core of its own."""
    path = demo_profile(folder, f"run{count}")
    cpu_before = cpu_s()
    start = time.perf_counter()
    with contextlib.redirect_stdout(io.StringIO()):
        status = main(["run", str(path), "-n", str(count)])
    elapsed = time.perf_counter() - start
    if status != 0:
        raise SystemExit(f"acqd run -n {count} ended with status {status}")
    own, worker = (after - before for after, before in zip(cpu_s(), cpu_before))
    return elapsed, own, worker


def hand_loop_s(profile: Profile, folder: Path, count: int) -> float:
    """The hand-written script, from opening the instruments to its last CSV file."""
    acq, stim = profile.acquisition, profile.stimulus
    bench = simulated_bench(profile).start()
    try:
        start = time.perf_counter()
        rm = pyvisa.ResourceManager("@py")
        gen = rm.open_resource(bench.resources["generator"], read_termination="\n", write_termination="\n")
        scope = rm.open_resource(bench.resources["scope"], read_termination="\n", write_termination="\n")
        for command in ("OUTPut OFF", "FUNCtion SQUare", f"FREQuency {stim.frequency_hz}",
                        f"VOLTage:HIGH {stim.high_v}", f"VOLTage:LOW {stim.low_v}", "OUTPut ON"):
            gen.write(command)
        scope.write(f"SWEep:TIME {acq.window_s}")
        scope.write(f"SWEep:POINts {acq.samples}")
        scope.write(f"SWEep:OFFSet:POINts {-round(acq.pretrigger_fraction * acq.samples)}")
        for n, ch in enumerate(acq.channels, start=1):
            scope.write(f"VOLTage{n}:RANGe {ch.range_v}")
            scope.write(f"VOLTage{n}:OFFSet {ch.offset_v}")
        scope.write("TRIGger:SOURce EXTernal")
        scope.write("TRIGger:SLOPe POSitive")
        scope.write(f"TRIGger:LEVel {(stim.low_v + stim.high_v) / 2}")
        scope.write("FORMat ASCii")
        for i in range(count):
            scope.write("INITiate")
            scope.query("*OPC?")
            columns = [scope.query_ascii_values(f"TRACe? CH{n}") for n in range(1, len(acq.channels) + 1)]
            with open(folder / f"hand{count}-{i:04d}.csv", "w", newline="") as f:
                writer = csv.writer(f)
                writer.writerow([ch.name for ch in acq.channels])
                writer.writerows(zip(*columns))
        gen.write("OUTPut OFF")
        gen.close()
        scope.close()
        rm.close()
        return time.perf_counter() - start
    finally:
        bench.stop()


def breakdown(profile: Profile, folder: Path, count: int) -> tuple[dict[str, float], Any]:
    """Seconds per record in each part, and the last record (for the fit comparison)."""
    judge = make_judge(profile)
    totals = {"capture": 0.0, "transfer": 0.0, "store": 0.0, "compare": 0.0}
    record = None
    with open_bench(profile) as bench, RecordStore(folder / "parts.h5", fsync=profile.output.fsync) as store:
        fetch = bench.scope.fetch

        def timed_fetch(channel: str) -> Any:
            t0 = time.perf_counter()
            try:
                return fetch(channel)
            finally:
                totals["transfer"] += time.perf_counter() - t0

        bench.scope.fetch = timed_fetch
        applied = Applied()
        with output_guard(bench.generator):
            for _ in range(count):
                t0 = time.perf_counter()
                before = totals["transfer"]
                (record,) = run_step_test(profile, bench.generator, bench.scope, applied)
                totals["capture"] += time.perf_counter() - t0 - (totals["transfer"] - before)
                t0 = time.perf_counter()
                record.analysis = judge(record)
                totals["compare"] += time.perf_counter() - t0
                t0 = time.perf_counter()
                store.append(record)
                totals["store"] += time.perf_counter() - t0
    return {k: v / count for k, v in totals.items()}, record


def forward_differences(setup: _Setup, values: dict[str, float], edge: Any, edge_parameter: str,
                        channel_scale: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """In place of ``_Setup.response_and_sensitivities``: the response and the finite-difference Jacobian
    the exact sensitivities replaced, one more prediction per parameter."""
    def predicted(v: dict[str, float]) -> np.ndarray:
        params = {k: x for k, x in v.items() if k != edge_parameter}
        _, channels, _ = setup.predict(setup.model(params), replace(edge, t50_s=v.get(edge_parameter, edge.t50_s)))
        return channels

    scale = np.reshape(channel_scale, (-1, 1))
    response = predicted(values)
    base, columns = (response * scale).ravel(), []
    for name, value in values.items():
        h = FORWARD_STEP * max(abs(value), 1e-300)
        columns.append(((predicted({**values, name: value + h}) * scale).ravel() - base) / h)
    return response, np.column_stack(columns)


def best_of_five(run: Callable[[], Any]) -> tuple[float, Any]:
    """The shortest of five runs and the last result."""
    times, result = [], None
    for _ in range(5):
        t0 = time.perf_counter()
        result = run()
        times.append(time.perf_counter() - t0)
    return min(times), result


def fit_alone_s(profile: Profile, record: Any, previous: Any) -> tuple[float, float]:
    """Best of five fits of R, L and C alone (``compare.core._fit``, without the step parameters and metrics
    a comparison adds around it): from the nominal values with nothing remembered, as the first record of a
    run is fitted, and from ``previous``'s fitted values with the nominal point's sensitivities remembered
    (its fit ran first), as every later record of a run is fitted."""
    spec = parse_dut_table(profile.dut, profile.source, profile.text)
    setup = _setup(record, spec, "the demo record")
    edge = setup.align(setup.model())

    def cold() -> Any:
        core._NOMINAL_SENSITIVITIES = Memo()
        return _fit(setup, edge)

    remembered = core._NOMINAL_SENSITIVITIES
    try:
        cold_s = best_of_five(cold)[0]
    finally:
        core._NOMINAL_SENSITIVITIES = remembered
    previous_setup = _setup(previous, spec, "the previous demo record")
    warm_start = _fit(previous_setup, previous_setup.align(previous_setup.model())).values
    return cold_s, best_of_five(lambda: _fit(setup, edge, warm_start))[0]


def fit_times(profile: Profile, record: Any) -> tuple[float, float, float, int, int]:
    """Best of five comparisons, exact and finite-difference, the largest gap in hundredths of an interval,
    and each one's solver evaluations."""
    spec = parse_dut_table(profile.dut, profile.source, profile.text)

    def best() -> tuple[float, Any]:
        return best_of_five(lambda: compare_spec(record, spec))

    exact_s, exact = best()
    original, remembered = _Setup.response_and_sensitivities, core._NOMINAL_SENSITIVITIES
    _Setup.response_and_sensitivities, core._NOMINAL_SENSITIVITIES = forward_differences, Memo(size=0)
    try:
        fd_s, fd = best()
    finally:
        _Setup.response_and_sensitivities, core._NOMINAL_SENSITIVITIES = original, remembered
    gap = max(abs(exact.fit.values[n] - fd.fit.values[n]) / (fd.fit.ci95[n][1] - fd.fit.ci95[n][0]) * 100
              for n in fd.fit.fitted)
    return exact_s, fd_s, gap, exact.fit.evaluations, fd.fit.evaluations


def main_bench() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--short", type=int, default=10)
    parser.add_argument("--long", type=int, default=40)
    parser.add_argument("--hand-short", type=int, default=2)
    parser.add_argument("--hand-long", type=int, default=6)
    args = parser.parse_args()
    print(f"load average {os.getloadavg()[0]:.2f} on {os.cpu_count()} CPUs at the start")
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        profile = load_profile(demo_profile(folder, "demo"))
        (acqd_short, *cpu_short), (acqd_long, *cpu_long) = acqd_run_s(folder, args.short), acqd_run_s(folder, args.long)
        hand_short = hand_loop_s(profile, folder, args.hand_short)
        hand_long = hand_loop_s(profile, folder, args.hand_long)
        parts, record = breakdown(profile, folder, args.short)
        exact_s, fd_s, gap, exact_n, fd_n = fit_times(profile, record)
        with open_records(folder / "parts.h5") as stored:  # the breakdown's records: the last but one
            previous = stored.read(len(stored) - 2)
        fit_s, warm_fit_s = fit_alone_s(profile, record, previous)
    acqd_per = (acqd_long - acqd_short) / (args.long - args.short)
    hand_per = (hand_long - hand_short) / (args.hand_long - args.hand_short)
    print(f"acqd run          {acqd_per * 1e3:8.1f} ms per record  (-n {args.short}: {acqd_short:.2f} s, "
          f"-n {args.long}: {acqd_long:.2f} s)")
    own_cpu, worker_cpu = ((b - a) / (args.long - args.short) for a, b in zip(cpu_short, cpu_long))
    print(f"                  CPU per record: {own_cpu * 1e3:.1f} ms in acqd's process, {worker_cpu * 1e3:.1f} ms "
          f"in its comparator worker (each needs a core of its own to keep pace)")
    print(f"hand pyvisa loop  {hand_per * 1e3:8.1f} ms per record  ({args.hand_short}: {hand_short:.2f} s, "
          f"{args.hand_long}: {hand_long:.2f} s)")
    print(f"ratio             {hand_per / acqd_per:8.1f} ×  (target ≥ 20 ×)")
    print(f"acqd per record, part by part over {args.short} records:")
    for name, seconds in parts.items():
        print(f"  {name:<9} {seconds * 1e3:8.1f} ms")
    print(f"  {'sum':<9} {sum(parts.values()) * 1e3:8.1f} ms")
    print(f"one comparison of a demo record (fit of R, L, C): exact sensitivities {exact_s * 1e3:.1f} ms "
          f"({exact_n} evaluations), finite-difference Jacobian {fd_s * 1e3:.1f} ms ({fd_n} evaluations), "
          f"{fd_s / exact_s:.2f} ×; fitted values {gap:.3f} hundredths of their 95 % interval apart")
    print(f"the fit alone (R, L, C from the nominal values, no step parameters): {fit_s * 1e3:.1f} ms "
          f"({'meets' if fit_s <= 0.015 else 'misses'} the target of at most 15 ms); from the previous "
          f"record's values, as in a run: {warm_fit_s * 1e3:.1f} ms")
    print(f"load average {os.getloadavg()[0]:.2f} on {os.cpu_count()} CPUs at the end")


if __name__ == "__main__":
    main_bench()
