"""The ``acqd`` command: one sub-command module per job, each with ``register(subparsers)``.

Every sub-command's module sets ``func`` on its parser; ``main`` turns any ``AcqdError`` into one line on
stderr and exit status 2, so bad input never ends in a traceback.
"""

from __future__ import annotations

import argparse
import importlib
import sys

from ..errors import AcqdError

# Sub-command modules, in the order of the data path; each owns its own flags.
COMMAND_MODULES = ("sim", "instruments", "run", "store", "compare", "campaign")


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="acqd", description="Automated step tests on the electronics bench.")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")
    for name in COMMAND_MODULES:
        importlib.import_module(f"{__name__}.{name}").register(sub)
    return parser


def main(argv: list[str] | None = None) -> int:
    try:
        args = build_parser().parse_args(argv)  # option types may raise AcqdError too
        return int(args.func(args) or 0)
    except AcqdError as exc:
        print(f"acqd: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("acqd: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
