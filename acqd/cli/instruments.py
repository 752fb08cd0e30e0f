"""``acqd drivers`` and ``acqd identify``: which driver files exist, and which one fits an instrument.

``identify`` is the first thing to run against a new bench: it proves the resource answers and names the
driver to put in the profile, or says that none fits (then a new driver file is the way forward:
DEVELOPERS.md, "How to add a driver").
"""

from __future__ import annotations

import argparse
from pathlib import Path
from typing import Any

from rich.markup import escape
from rich.table import Table
from rich.text import Text

from ..instruments import driver_dirs, list_drivers, match_driver
from ..instruments.search import ENVIRONMENT
from ..visa import DEFAULT_BACKEND, NAMED_BACKENDS, identify
from ..errors import ConfigError
from .common import add_command, console, finite_number

MAX_TIMEOUT_S = 3600.0  # an answer later than an hour is no answer


def register(subparsers: argparse._SubParsersAction) -> None:
    drivers = add_command(subparsers, "drivers", help="list the driver files found (name, role, *IDN? match, limits)",
                          description="List every driver file found, with its role, the *IDN? reply it fits, the "
                                      f"instrument's hard limits and the folders searched ({ENVIRONMENT}, then "
                                      "drivers/ of the checkout, then the installed package).")
    drivers.set_defaults(func=_drivers)

    ident = add_command(subparsers, "identify", help="ask an instrument for *IDN? and name the driver that fits",
                        description="Open RESOURCE over VISA, ask it for *IDN? and name the driver file that fits: "
                                    "the first thing to run against a new bench. Exit 1 when no driver fits.")
    ident.add_argument("resource", metavar="RESOURCE", help="VISA resource, e.g. TCPIP0::192.0.2.10::5025::SOCKET")
    library = ident.add_mutually_exclusive_group()
    library.add_argument("--backend", default=DEFAULT_BACKEND, choices=NAMED_BACKENDS,
                         help=f"pyvisa backend by name (default {DEFAULT_BACKEND})")
    library.add_argument("--visa-library", type=Path, metavar="PATH",
                         help="a VISA shared library file to load instead (native code: only from here)")
    ident.add_argument("--timeout-s", type=_timeout_s, default=5.0, metavar="S", help="reply timeout in seconds")
    ident.set_defaults(func=_identify)


def _timeout_s(text: str) -> float:
    value = finite_number("acqd identify", "--timeout-s", text)
    if not 0 < value <= MAX_TIMEOUT_S:
        raise ConfigError("acqd identify", "--timeout-s", f"must be above 0 and at most {MAX_TIMEOUT_S:g} s, "
                                                          f"not {value:g}")
    return value


def _limits_text(limits: dict[str, Any]) -> str:
    parts = []
    for key, value in limits.items():
        if isinstance(value, dict):
            value = ", ".join(f"{k} {v:g}" for k, v in value.items())
        elif isinstance(value, float):
            value = f"{value:g}"
        parts.append(f"{key}: {value}")
    return "\n".join(parts)


def _drivers(args: argparse.Namespace) -> int:
    table = Table(title="acqd drivers", caption=f"searched: {', '.join(str(d) for d in driver_dirs())}")
    for column in ("name", "role", "*IDN? match", "limits", "description"):
        table.add_column(column, overflow="fold")
    for info in list_drivers():
        table.add_row(info.name, info.role, escape(info.idn_pattern), escape(_limits_text(info.limits)),
                      escape(info.description))
    console().print(table)
    return 0


def _identify(args: argparse.Namespace) -> int:
    idn = identify(args.resource, backend=args.visa_library or args.backend, timeout_s=args.timeout_s)
    info = match_driver(idn)
    screen = console()
    screen.print(Text(f"{args.resource}: {idn}"))
    if info is None:
        screen.print(Text(f"no driver fits; add one to drivers/ or a folder in {ENVIRONMENT} "
                          f"(DEVELOPERS.md, 'How to add a driver')"))
        return 1
    screen.print(Text(f"driver: {info.name} ({info.role}, {info.path})"))
    return 0
