"""The ``acqd`` command: one sub-command module per job, each with ``register(subparsers)``.

Every sub-command's module sets ``func`` on its parser; ``main`` turns any ``AcqdError`` into one line on
stderr and exit status 2, so bad input never ends in a traceback. A reader that goes away (``| head``)
ends the command quietly with status 1, the status rich's console gives in the same case.
"""

from __future__ import annotations

import argparse
import importlib
import os
import sys

from .. import __version__
from ..errors import AcqdError
from .common import Parser, printable

# Sub-command modules, in the order of the data path; each owns its own flags.
COMMAND_MODULES = ("sim", "instruments", "plan", "run", "store", "compare", "report", "campaign", "fleet")

# rich's Console.on_broken_pipe exits with 1 after pointing stdout at /dev/null; plain prints do the same here.
BROKEN_PIPE_STATUS = 1


def build_parser() -> argparse.ArgumentParser:
    parser = Parser(prog="acqd", description="Automated step tests on the electronics bench.")
    parser.add_argument("-V", "--version", action="version", version=f"acqd {__version__}")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")
    for name in COMMAND_MODULES:
        importlib.import_module(f"{__name__}.{name}").register(sub)
    return parser


def main(argv: list[str] | None = None) -> int:
    try:
        args = build_parser().parse_args(argv)  # option types may raise AcqdError too
        status = int(args.func(args) or 0)
        sys.stdout.flush()  # a closed pipe shows here, inside the handler, not in the interpreter's exit
        return status
    except AcqdError as exc:
        print(f"acqd: error: {printable(str(exc))}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("acqd: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        _silence_stdout()
        return BROKEN_PIPE_STATUS


def _silence_stdout() -> None:
    """Point stdout at /dev/null, so the interpreter's final flush of what is still buffered for the
    vanished reader cannot raise a second BrokenPipeError at exit (Python's documentation, "Note on
    SIGPIPE", in the signal module)."""
    devnull = os.open(os.devnull, os.O_WRONLY)
    os.dup2(devnull, sys.stdout.fileno())


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
