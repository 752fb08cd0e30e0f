"""``acqd sim``: serve the simulated bench (generator, SCPI-1999 scope, second-dialect scope) until stopped.

Runs in the foreground on its own event loop; SIGINT or SIGTERM stops the servers and exits 0. Only the
loopback interface is served unless ``--allow-remote``: the simulated instruments take commands from
anyone who can reach the port.
"""

from __future__ import annotations

import argparse
import asyncio
import ipaddress
import json
import signal
import sys

from ..config import load_toml
from ..errors import ConfigError
from ..sim.bench import TABLE, SimBench, SimBenchConfig


def register(subparsers: argparse._SubParsersAction) -> None:
    parser = subparsers.add_parser("sim", help="serve the simulated bench on TCP until interrupted")
    parser.add_argument("profile", nargs="?", metavar="PROFILE",
                        help=f"a profile whose [{TABLE}] table describes the bench (default: the demo bench)")
    parser.add_argument("--host", default="127.0.0.1", help="address to listen on (default 127.0.0.1)")
    parser.add_argument("--json", action="store_true",
                        help="print the resources as one JSON line first: {\"gen\": ..., \"scope\": ..., ...}")
    parser.add_argument("--allow-remote", action="store_true",
                        help="allow listening on an address other than loopback")
    parser.set_defaults(func=run)


def is_loopback(host: str) -> bool:
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


def load_config(profile: str | None) -> SimBenchConfig:
    """The demo bench without a profile; else the profile's ``[bench.simulated]`` table, validated."""
    if profile is None:
        return SimBenchConfig()
    data, text = load_toml(profile)
    table = data.get("bench", {}).get("simulated") if isinstance(data.get("bench"), dict) else None
    if table is None:
        raise ConfigError(profile, TABLE, f"missing: this profile has no [{TABLE}] table to serve; add one "
                                          "(every key is optional) or run `acqd sim` without a profile")
    return SimBenchConfig.from_mapping(table, profile, text)


def run(args: argparse.Namespace) -> int:
    if not (is_loopback(args.host) or args.allow_remote):
        raise ConfigError("command line", "--host", f"{args.host} is not a loopback address; the simulated "
                                                    "instruments obey anyone who reaches them, so only 127.0.0.1, "
                                                    "::1 or localhost are served unless --allow-remote is given")
    bench = SimBench(load_config(args.profile), host=args.host)
    asyncio.run(_serve(bench, args.json))
    return 0


async def _serve(bench: SimBench, as_json: bool) -> None:
    loop = asyncio.get_running_loop()
    stop = asyncio.Event()
    for sig in (signal.SIGINT, signal.SIGTERM):
        loop.add_signal_handler(sig, stop.set)
    try:
        await bench.astart()
    except OSError as exc:
        raise ConfigError("command line", "--host", f"cannot listen on {bench.host}: {exc.strerror or exc}") from None
    try:
        if as_json:
            print(json.dumps(bench.resources), flush=True)
        else:
            for name, resource in bench.resources.items():
                print(f"{name:<10} {resource}  ({bench.instruments[name].identity()})")
            print("serving the simulated bench; Ctrl-C stops it", flush=True)
        await stop.wait()
    finally:
        await bench.astop()
        print("acqd sim: stopped", file=sys.stderr)
