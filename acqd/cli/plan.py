"""``acqd plan PROFILE``: the acquisition the DUT's nominal model asks for, beside the profile's own."""

from __future__ import annotations

import argparse
import json
from pathlib import Path

from rich.table import Table
from rich.text import Text

from ..display import si
from ..plan import Plan, make_plan
from ..profile import load_profile
from .common import add_command, add_json, console


def register(sub: argparse._SubParsersAction) -> None:
    p = add_command(sub, "plan", help="propose the time base, ranges and trigger from the DUT's model",
                    description="Predict every mapped channel's step response from the profile's [dut] model "
                                "and stimulus, and propose the acquisition: window, samples, ranges, offsets, "
                                "trigger level and stimulus frequency, each with its reason, beside the "
                                "profile's own values. Warns where the profile would clip, alias, cut off the "
                                "settling or never trigger (exit status 1). Nothing is sent to an instrument; "
                                "[acquisition] auto = true makes run and daemon use the proposal.")
    p.add_argument("profile", type=Path, metavar="PROFILE", help="bench profile (TOML) with a [dut] model")
    add_json(p, "print the plan as JSON instead of a table")
    p.set_defaults(func=plan_command)


def plan_command(args: argparse.Namespace) -> int:
    plan = make_plan(load_profile(args.profile))
    if args.json:
        print(json.dumps(plan.to_dict()))
    else:
        _print(plan)
    return 1 if plan.warnings else 0


def _shown(value: float | None, unit: str) -> str:
    if value is None:
        return "—"  # the profile leaves it to acqd (auto = true, or the trigger's default)
    return si(value, unit, 3) if unit else f"{value:g}"


def _print(plan: Plan) -> None:
    screen = console(wide=True)
    table = Table(box=None, pad_edge=False)
    for heading in ("setting", "profile", "proposed", "why"):
        table.add_column(heading, overflow="fold")
    for p in plan.proposals:
        table.add_row(Text(p.key), Text(_shown(p.current, p.unit)), Text(_shown(p.proposed, p.unit)), Text(p.reason))
    screen.print(table)
    for note in plan.notes:
        screen.print(Text(f"note: {note}"))
    for warning in plan.warnings:
        screen.print(Text(f"warning: {warning}"))
    if not plan.warnings:
        screen.print(Text("the profile's own acquisition shows the predicted response"))
