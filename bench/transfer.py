"""Block transfer speed, measured side by side in one run: acqd's block read against pyvisa-py's plain paths
and a raw socket reading the same block from the same simulated scope.

For each record length (float32 samples, REAL,32 big-endian, as ``TRACe? CH2`` of the simulated
``acqd-sim,DIG``) it prints MB/s of payload and each path's ratio to the raw socket:

  acqd             Session.query_block + scpi.decode_samples: header first, then the exact byte count
                   received straight into one buffer from pyvisa-py's socket
  acqd public API  the same through pyvisa's public API only: read_bytes(count) with the read
                   termination off (the path acqd takes on any other backend)
  pyvisa binary    pyvisa-py's plain query_binary_values (read termination NL)
  pyvisa ascii     query_ascii_values with the scope switched to FORMat ASCii
  raw socket       socket.recv_into a preallocated buffer: the ceiling for a Python client
  acqd HiSLIP      Session.query_block over the simulated bench's HiSLIP server (IVI-6.1), through
                   pyvisa-py's HiSLIP client (read_bytes: its receive fills one buffer from 1 MiB
                   Data messages)
  acqd VXI-11      the same over its VXI-11 server: pyvisa-py asks one device_read RPC per 1 MiB
                   (the server's maxRecvSize), each an XDR reply decoded and copied by pyvisa-py's
                   RPC client; that per-call copy and round trip is VXI-11's overhead

The simulated bench runs in a child process, so server and client do not share one interpreter lock, and
the scope's encoded reply is cached there per record: the figures compare transports, not the simulator's
per-request encoding. Best of ``--repeats`` runs per path. pyvisa-py's plain binary path slows with every
0x0A byte in the payload, so the run is made twice: with the 8-bit ADC's volts (few distinct values, few
0x0A bytes) and with unquantised volts (every bit pattern, about 1 byte in 256 is 0x0A); the share is
printed.

    python bench/transfer.py [--sizes 1e4,1e5,1e6,1e7] [--repeats 3] [--data quantised|continuous|both]
"""

from __future__ import annotations

import argparse
import math
import multiprocessing
import socket
import sys
import time
from collections.abc import Callable
from typing import Any

import numpy as np
import pyvisa

from acqd import scpi
from acqd.instruments import open_instrument
from acqd.record import Stimulus
from acqd.visa import Session

QUERY = "TRACe? CH2"
# Not a power of two, so volts per code is not a short binary fraction: the float32 samples then hold
# every byte value, 0x0A included, as a real scope's scaled codes do.
RANGE_V = 0.7
DATA_KINDS = {"quantised": "volts of the simulated 8-bit ADC (few distinct values)",
              "continuous": "unquantised volts, every float32 bit pattern possible (an averaged record)"}
# A path whose runs at a size would take longer than this, extrapolated linearly from the previous size,
# is skipped there (and the skip is printed).
SLOW_PATH_BUDGET_S = 60.0


def serve(conn: Any, quantise: bool) -> None:
    """Child process: the simulated bench, with the scope's block replies cached per record."""
    from acqd.sim.bench import TRANSPORTS, Serving, SimBench, SimBenchConfig

    config = SimBenchConfig(noise_v_rms=1e-3, jitter_s=0.0, quantise=quantise, wiring={"CH2": "v_c"})
    bench = SimBench(config, serving=Serving(TRANSPORTS)).start()
    scope = bench.scope
    original = scope._trace
    cache: dict[Any, Any] = {}

    def cached_trace(channel: int) -> Any:
        record = scope.acquisition.record
        if cache.get("record") is not record:  # a new capture: earlier replies are stale
            cache.clear()
            cache["record"] = record
        key = (channel, scope.settings.data_format, scope.settings.byte_order)
        if key not in cache:
            cache[key] = original(channel)
        return cache[key]

    scope._trace = cached_trace
    conn.send(bench.resources_by_transport)
    conn.recv()  # until the parent is done
    bench.stop()


def capture(scope: Any, n: int) -> None:
    """One record of ``n`` samples on the scope (the generator is already running)."""
    scope.configure_timebase(n * 1e-8, n, 0.1)
    scope.configure_channel("CH2", RANGE_V, 0.5, "dc")
    scope.configure_trigger("external", "rising", 0.5)
    scope.arm()
    scope.wait(120.0)


def acqd_path(resource: str, direct_socket: bool) -> Callable[[], np.ndarray]:
    session = Session(resource, timeout_s=120.0, direct_socket=direct_socket).open()
    return lambda: scpi.decode_samples(session.query_block(QUERY), "REAL,32", "NORMal")


def pyvisa_binary(inst: Any) -> Callable[[], np.ndarray]:
    return lambda: inst.query_binary_values(QUERY, datatype="f", is_big_endian=True, container=np.array)


def pyvisa_ascii(inst: Any) -> Callable[[], np.ndarray]:
    def run() -> np.ndarray:
        inst.write("FORMat ASCii")
        try:
            return inst.query_ascii_values(QUERY, container=np.array)
        finally:
            inst.write("FORMat REAL,32")
    return run


def raw_socket(resource: str) -> Callable[[], np.ndarray]:
    host, port = resource.split("::")[1:3]
    sock = socket.create_connection((host, int(port)))
    sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)

    def exact(count: int) -> bytearray:
        buf = bytearray(count)
        view, got = memoryview(buf), 0
        while got < count:
            n = sock.recv_into(view[got:], count - got)
            if not n:
                raise ConnectionError("server closed the connection")
            got += n
        return buf

    def run() -> np.ndarray:
        sock.sendall(QUERY.encode() + b"\n")
        head = exact(2)
        head += exact(scpi.block_header_length(head) - 2)
        _, count = scpi.parse_block_header(bytes(head))
        data = exact(count + 1)  # payload and the NL terminator
        return np.frombuffer(data, dtype=">f4", count=count // 4)
    return run


def time_once(run: Callable[[], np.ndarray], n: int, reference: np.ndarray) -> float:
    start = time.perf_counter()
    values = run()
    elapsed = time.perf_counter() - start
    if len(values) != n or not np.allclose(values, reference, rtol=0, atol=1e-6):
        raise SystemExit(f"a path returned different samples at n = {n}")
    return elapsed


def best_times(paths: dict[str, Callable[[], np.ndarray]], n: int, repeats: int,
               reference: np.ndarray) -> dict[str, float]:
    """Best time per path, the paths taking turns round by round so that a busy moment on a shared
    machine hits them all alike."""
    best = {name: math.inf for name in paths}
    for _ in range(repeats):
        for name, run in paths.items():
            best[name] = min(best[name], time_once(run, n, reference))
    return best


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--sizes", default="1e4,1e5,1e6,1e7", help="record lengths, comma-separated")
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--data", choices=(*DATA_KINDS, "both"), default="both",
                        help="quantised: the simulated 8-bit ADC's volts; continuous: unquantised volts "
                             "(an averaged or high-resolution record)")
    args = parser.parse_args(argv)
    sizes = [int(float(s)) for s in args.sizes.split(",")]
    for kind in DATA_KINDS if args.data == "both" else (args.data,):
        print(f"\n{kind} samples: {DATA_KINDS[kind]}")
        compare(kind == "quantised", sizes, args.repeats)
    return 0


def compare(quantise: bool, sizes: list[int], repeats: int) -> None:
    """All paths at every size against one simulated bench in a child process."""
    ctx = multiprocessing.get_context("spawn")
    parent, child = ctx.Pipe()
    server = ctx.Process(target=serve, args=(child, quantise), daemon=True)
    server.start()
    try:
        served = parent.recv()
        resources = served["socket"]
        generator = open_instrument(resources["generator"], "scpi-generator")
        generator.apply_stimulus(Stimulus("square", 0.0, 1.0, 1e3, "rising"))
        generator.output(True)
        scope = open_instrument(resources["scope"], "scpi-digitiser", timeout_s=120.0)
        inst = pyvisa.ResourceManager("@py").open_resource(resources["scope"], read_termination="\n",
                                                           write_termination="\n", timeout=600_000)
        paths: dict[str, Callable[[], np.ndarray]] = {
            "acqd": acqd_path(resources["scope"], direct_socket=True),
            "acqd public API": acqd_path(resources["scope"], direct_socket=False),
            "pyvisa binary": pyvisa_binary(inst),
            "pyvisa ascii": pyvisa_ascii(inst),
            "raw socket": raw_socket(resources["scope"]),
            "acqd HiSLIP": acqd_path(served["hislip"]["scope"], direct_socket=True),
            "acqd VXI-11": acqd_path(served["vxi11"]["scope"], direct_socket=True),
        }
        print(f"{'samples':>9} {'path':<17} {'MB/s':>9} {'÷ raw':>7}")
        cost_per_sample: dict[str, float] = {}  # a path's wall time at the last size, per sample
        for n in sizes:
            capture(scope, n)
            reference = paths["raw socket"]()
            active = {name: run for name, run in paths.items()
                      if cost_per_sample.get(name, 0.0) * n <= SLOW_PATH_BUDGET_S}
            # One untimed run each first (the simulator formats the ASCii reply once, here), then the rounds.
            first = {name: time_once(run, n, reference) for name, run in active.items()}
            results = best_times(active, n, repeats, reference)
            cost_per_sample = {name: (first[name] + repeats * results[name]) / n for name in active}
            newlines = np.count_nonzero(reference.astype(">f4").view(np.uint8) == 0x0A) / (4 * n)
            report(n, results, paths, newlines)
        generator.output(False)
    finally:
        parent.send("stop")
        server.join(30)


def report(n: int, results: dict[str, float], paths: dict[str, Callable[[], np.ndarray]],
           newlines: float) -> None:
    payload_mb = 4 * n / 1e6
    raw = results["raw socket"]
    for name in paths:
        if name in results:
            print(f"{n:>9.0e} {name:<17} {payload_mb / results[name]:>9.1f} {raw / results[name]:>7.3f}")
        else:
            print(f"{n:>9.0e} {name:<17} {'skipped':>9}   (from the previous size, its runs here would take "
                  f"over {SLOW_PATH_BUDGET_S:g} s)")
    speedup = (f"; acqd is {results['pyvisa binary'] / results['acqd']:.1f}x pyvisa-py's plain binary path"
               if "pyvisa binary" in results else "")
    print(f"{'':>9} {100 * newlines:.2f} % of the payload bytes are 0x0A{speedup}")
    sys.stdout.flush()


if __name__ == "__main__":
    sys.exit(main())
