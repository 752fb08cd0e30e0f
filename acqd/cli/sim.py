"""``acqd sim``: serve the simulated bench (generator, SCPI-1999 scope, second-dialect scope) until stopped.
``acqd replay FILE``: serve a record store's records through the simulated DIG scope (``acqd.sim.replay``).

Both run in the foreground on their own event loop; SIGINT or SIGTERM stops the servers and exits 0. Only
the loopback interface is served unless ``--allow-remote``: the simulated instruments take commands from
anyone who can reach the port. ``--transport`` picks the interfaces served (raw socket, HiSLIP on
``--hislip-port``, VXI-11 with its portmapper on port 111 unless ``--no-portmapper``). ``--json`` prints
the resources as the first stdout line, one JSON object: ``{name: resource}`` for one transport,
``{transport: {name: resource}}`` for several.
"""

from __future__ import annotations

import argparse
import asyncio
import dataclasses
import ipaddress
import json
import re
import signal
import sys
from collections.abc import Callable

from ..config import Table, load_toml
from ..errors import ConfigError
from ..sim.bench import TABLE, TRANSPORTS, ServedBench, Serving, SimBench, SimBenchConfig
from ..sim.hislip import DEFAULT_PORT as HISLIP_PORT
from ..sim.oncrpc import PORTMAPPER_PORT
from ..sim.serving import ListenError
from ..sim.faults import TABLE as FAULTS_TABLE
from ..sim.faults import FaultRates
from .common import add_command, add_json, add_store


def register(subparsers: argparse._SubParsersAction) -> None:
    parser = add_command(subparsers, "sim", help="serve the simulated bench on TCP until interrupted",
                         description="Serve the simulated bench (a function generator and two scope dialects "
                                     "behind a physical DUT model) as SCPI servers on 127.0.0.1 until Ctrl-C or "
                                     "SIGTERM: the demo bench, or the one PROFILE's [bench.simulated] table "
                                     "describes. Profiles with kind = \"visa\" can then name its resources.")
    parser.add_argument("profile", nargs="?", metavar="PROFILE",
                        help=f"a profile whose [{TABLE}] table describes the bench (default: the demo bench)")
    parser.add_argument("--faults", metavar="FILE", default=None,
                        help=f"a TOML file of fault rates and a seed, as in [{FAULTS_TABLE}] (replaces the "
                             "profile's): rehearse a bad night")
    _serving_options(parser)
    parser.set_defaults(func=run)

    replay = add_command(subparsers, "replay", help="serve stored records as the simulated DIG scope until interrupted",
                         description="Serve the records of STORE through the simulated DIG scope (with a generator "
                                     "beside it) on 127.0.0.1 until Ctrl-C or SIGTERM: each capture answers with the "
                                     "next stored record, so a run can be repeated against what was measured.")
    add_store(replay, "the record store to serve (the path given to the store)")
    replay.add_argument("--records", metavar="LIST",
                        help="store indices to serve, in this order: 0,2,5-9 (default: all, in store order)")
    _serving_options(replay)
    replay.set_defaults(func=run_replay)


def _serving_options(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--host", default="127.0.0.1", help="address to listen on (default 127.0.0.1)")
    add_json(parser, "print the resources as one JSON line first: {\"generator\": ..., \"scope\": ..., ...}, "
                     "or {\"socket\": {...}, \"hislip\": {...}} for several transports")
    parser.add_argument("--allow-remote", action="store_true",
                        help="allow listening on an address other than loopback")
    parser.add_argument("--transport", metavar="LIST", type=transports(parser.prog),
                        help=f"what to serve the instruments over: {', '.join(TRANSPORTS)} or all, comma-separated "
                             "(default: the profile's [bench.simulated] transport, else socket)")
    parser.add_argument("--hislip-port", metavar="PORT", type=port_number(parser.prog, "--hislip-port"),
                        default=HISLIP_PORT, help=f"the HiSLIP port, both channels (default {HISLIP_PORT}; 0: any free one)")
    parser.add_argument("--vxi11-port", metavar="PORT", type=port_number(parser.prog, "--vxi11-port"), default=0,
                        help="the VXI-11 core channel's port (default: any free one; the portmapper tells clients)")
    parser.add_argument("--no-portmapper", action="store_true",
                        help=f"serve VXI-11 without the portmapper on port {PORTMAPPER_PORT}; the resources then "
                             "name the core channel's port (TCPIP0::HOST,PORT::inst0::INSTR)")


def transports(command: str) -> Callable[[str], tuple[str, ...]]:
    """An argparse ``type`` for ``socket,hislip`` or ``all`` → the transports in the order given."""
    def parse(text: str) -> tuple[str, ...]:
        names = [name.strip() for name in text.split(",")]
        if names == ["all"]:
            return TRANSPORTS
        wrong = [name for name in names if name not in TRANSPORTS]
        if wrong or len(set(names)) != len(names):
            raise ConfigError(command, "--transport", f"{text!r}: give one or more of {', '.join(TRANSPORTS)} "
                                                      "separated by commas, each once, or all")
        return tuple(names)
    return parse


def port_number(command: str, option: str) -> Callable[[str], int]:
    """An argparse ``type`` for a TCP port, 0 (any free one) to 65535."""
    def parse(text: str) -> int:
        if not text.isdigit() or int(text) > 65535:
            raise ConfigError(command, option, f"{text!r} is not a TCP port; give 0 to 65535 (0: any free one)")
        return int(text)
    return parse


def serving(args: argparse.Namespace, default: str) -> Serving:
    """The transports and ports the command line asks for; ``default`` when it names no transport."""
    return Serving(args.transport or (default,), hislip_port=args.hislip_port, vxi11_port=args.vxi11_port,
                   portmapper_port=None if args.no_portmapper else PORTMAPPER_PORT)


MAX_SELECTED = 1_000_000  # records one --records/--full list may name (a range of 10^9 took 11 GB)
_SELECTION_ITEM = re.compile(r"\s*([0-9]+)\s*(?:-\s*([0-9]+)\s*)?")


def parse_selection(text: str, option: str = "--records") -> list[int]:
    """``0,2,5-9`` → [0, 2, 5, 6, 7, 8, 9], in the order written (a ConfigError line naming ``option``
    otherwise)."""
    indices: list[int] = []
    for item in text.split(","):
        match = _SELECTION_ITEM.fullmatch(item)
        if not match or (match.group(2) is not None and int(match.group(2)) < int(match.group(1))):
            raise ConfigError("command line", option, f"{item.strip()!r} in {text!r}: write record indices and "
                                                 "rising ranges separated by commas, e.g. 0,2,5-9")
        first, last = int(match.group(1)), int(match.group(2) or match.group(1))
        if len(indices) + last - first + 1 > MAX_SELECTED:  # checked before the list is built: 0-999999999
            raise ConfigError("command line", option, f"{text[:40]!r} selects over {MAX_SELECTED:,} records; "
                                                      f"at most {MAX_SELECTED:,} at a time")
        indices.extend(range(first, last + 1))
    return indices


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


def _check_host(args: argparse.Namespace) -> None:
    """Loopback only, unless ``--allow-remote``, and then said loudly; never an IPv6 address, which a VISA
    resource string (``TCPIP0::host::port::SOCKET``, "::"-separated) cannot name, so nothing could open it."""
    if ":" in args.host:
        raise ConfigError("command line", "--host", f"{args.host} is an IPv6 address, which a VISA resource "
                                                    "string cannot name; use 127.0.0.1 (or an IPv4 address)")
    if not (is_loopback(args.host) or args.allow_remote):
        raise ConfigError("command line", "--host", f"{args.host} is not a loopback address; the simulated "
                                                    "instruments obey anyone who reaches them, so only 127.0.0.1 "
                                                    "or localhost are served unless --allow-remote is given")
    if not is_loopback(args.host):
        where = "every interface of this machine" if args.host in ("0.0.0.0", "") else f"the interface {args.host}"
        print(f"acqd: warning: serving on {where} with no authentication: anyone who can reach these ports can "
              f"drive the simulated instruments and read what they serve", file=sys.stderr)


def run(args: argparse.Namespace) -> int:
    _check_host(args)
    config = load_config(args.profile)
    if args.faults is not None:
        data, text = load_toml(args.faults)
        config = dataclasses.replace(config, faults=FaultRates.from_table(Table(data, args.faults, "", text)))
    bench = SimBench(config, host=args.host, serving=serving(args, config.transport))
    asyncio.run(_serve(bench, args.json, "acqd sim", "the simulated bench"))
    return 0


def run_replay(args: argparse.Namespace) -> int:
    from ..sim.replay import ReplayBench  # imports the record store, which `acqd sim` does not need

    _check_host(args)
    records = parse_selection(args.records) if args.records is not None else None
    bench = ReplayBench(args.store, records=records, host=args.host, serving=serving(args, "socket"))
    asyncio.run(_serve(bench, args.json, "acqd replay", f"the records of {args.store}"))
    return 0


async def _serve(bench: ServedBench, as_json: bool, command: str, what: str) -> None:
    loop = asyncio.get_running_loop()
    stop = asyncio.Event()
    for sig in (signal.SIGINT, signal.SIGTERM):
        loop.add_signal_handler(sig, stop.set)
    try:
        await bench.astart()
    except ListenError as exc:
        raise _listen_error(exc) from None
    served = bench.resources_by_transport
    try:
        if as_json:
            print(json.dumps(bench.resources if len(served) == 1 else served), flush=True)
        else:
            for transport, resources in served.items():
                for name, resource in resources.items():
                    print(f"{name:<10} {resource}  ({bench.instruments[name].identity()})")
            print(f"serving {what}; Ctrl-C stops it", flush=True)
        await stop.wait()
    finally:
        await bench.astop()
        print(f"{command}: stopped", file=sys.stderr)


# What to change when a listener cannot start, by the listener's name (acqd.sim.serving.ListenError.what).
_LISTEN_OPTIONS = {"hislip": "--hislip-port", "vxi11": "--vxi11-port", "portmapper": "--no-portmapper"}


def _listen_error(exc: ListenError) -> ConfigError:
    """One line naming the option that chose the port, with the way out for the portmapper's port 111."""
    hint = ""
    if exc.what == "portmapper":
        hint = ("; port 111 needs root or a network namespace of its own (run it under `unshare -rn`), or give "
                "--no-portmapper and reach the instruments at the core channel's port")
    elif exc.what == "hislip":
        hint = "; another server may hold it: give another --hislip-port, or 0 for any free one"
    return ConfigError("command line", _LISTEN_OPTIONS.get(exc.what, "--host"), f"{exc}{hint}")
