"""``acqd compare``: one record against a model.

The model, mapping and tolerances come from a profile's ``[dut]`` table, from the record's own ``[dut]``
(the profile it was captured with), or from options; options override table entries. Everything ends up
as one ``[dut]``-shaped table validated by ``acqd.compare.parse_dut_table``, so a value given as an option
is checked exactly like the same value in a profile, and the error names the option.

Exit status: 0 pass (or no tolerances), 1 a failed verdict, 2 bad input.
"""

from __future__ import annotations

import argparse
import copy
from typing import Any

from rich.text import Text

from ..compare import CompareResult, CompareSpec, compare_spec, parse_dut_table
from ..compare.csvinput import metadata_path, read_csv_record, read_exported_record
from ..compare.spec import WEIGHTINGS
from ..errors import ConfigError
from ..models import BUILDERS
from ..display import edge_label, si
from ..record import EDGES, LOADS, Record, Stimulus
from .common import (add_command, add_figures, add_json, add_profile, add_record, add_store, chosen_record, console,
                     finite_number, made_folder, utc_text)
from .results import renderables

CLI = "acqd compare"
STIMULUS_OPTIONS = ("low", "high", "edge", "load", "edge_time", "source_resistance")


def register(sub: argparse._SubParsersAction) -> None:
    p = add_command(sub, "compare", help="compare a record with a state-space model",
                    description="Compare one record (stored, or a CSV) with a model: metrics, IEEE 181 step "
                                "parameters, optional parameter fit, verdict. The model, mapping and tolerances "
                                "come from the record's own [dut] table, from --profile, or from options (which "
                                "override the table). Exit 0 pass, 1 fail, 2 bad input.")
    add_store(p, "a record store (e.g. data/night.h5), or a CSV file (time column + one column per channel)")
    add_record(p)
    add_profile(p, "take model, mapping, fit and tolerances from this profile's [dut] table")
    g = p.add_argument_group("model")
    g.add_argument("--model", metavar="NAME", help=f"one of {', '.join(sorted(BUILDERS))}")
    g.add_argument("--param", metavar="NAME=VALUE", action="append", default=[], help="a nominal parameter (SI)")
    g.add_argument("--free", metavar="NAME[,NAME]", help="parameters to fit; the rest stay nominal")
    g.add_argument("--hold", metavar="NAME[,NAME]", help="which free parameter to hold first if not identifiable")
    g.add_argument("--weighting", choices=WEIGHTINGS, help="residuals per channel over its noise RMS or its range")
    g = p.add_argument_group("channel mapping")
    g.add_argument("--map", metavar="CHANNEL=SIGNAL", action="append", default=[],
                   help="a record channel is a model output, or 'a - b' of two")
    g.add_argument("--gain", metavar="CHANNEL=G", action="append", default=[], help="channel = G × signal + offset")
    g.add_argument("--offset", metavar="CHANNEL=V", action="append", default=[], help="in the channel's unit")
    g.add_argument("--stimulus-channel", metavar="CHANNEL", help="a mapped channel that places the edge in time")
    g = p.add_argument_group("tolerances")
    g.add_argument("--nrmse-max", metavar="X", help="ceiling for every channel's NRMSE (0.05 = 5 %%)")
    g.add_argument("--parameter-pct", metavar="P", help="fitted parameters within ±P %% of nominal")
    g.add_argument("--overshoot", metavar="CHANNEL=LO:HI", action="append", default=[], help="overshoot band in %%")
    g.add_argument("--settling-max", metavar="CHANNEL=S", action="append", default=[], help="settling ceiling in s")
    g.add_argument("--settling-band-pct", metavar="P", help="settling band, %% of the step (default 2)")
    g = p.add_argument_group("CSV input (a stored record carries its own stimulus)")
    g.add_argument("--time-column", metavar="NAME", help="time column in seconds, t = 0 at the edge (default: first)")
    g.add_argument("--low", metavar="V", help="generator low level as set (default 0)")
    g.add_argument("--high", metavar="V", help="generator high level as set (required for CSV)")
    g.add_argument("--edge", choices=EDGES, help="captured edge (default rising)")
    g.add_argument("--load", choices=LOADS, help="generator load setting (default high_z)")
    g.add_argument("--edge-time", metavar="S", help="generator 10-90 %% edge time (default 0)")
    g.add_argument("--source-resistance", metavar="OHM", help="generator output resistance (default 50)")
    g = p.add_argument_group("output")
    add_json(g, "print the whole result as one JSON object instead of a table")
    add_figures(g, "write channels.png and trajectory.png into DIR", command=p.prog)
    p.set_defaults(func=run_compare)


# -- parsing option values ----------------------------------------------------------------------------
def _number(option: str, text: str) -> float:
    return finite_number(CLI, option, text)


def _pair(option: str, text: str) -> tuple[str, str]:
    name, sep, value = text.partition("=")
    if not sep or not name.strip() or not value.strip():
        raise ConfigError(CLI, option, f"must look like NAME=VALUE, not {text!r}")
    return name.strip(), value.strip()


def _names(text: str) -> list[str]:
    return [n.strip() for n in text.split(",") if n.strip()]


# -- inputs ------------------------------------------------------------------------------------------
def _stored_record(path: str, number: int | None) -> Record:
    """Record ``number`` (its store index, as ``acqd ls`` shows it) or the last one."""
    from ..store import open_records  # h5py only when a store is read

    with open_records(path) as reader:
        return reader.read(chosen_record(reader, path, number))


def _csv_stimulus(args: argparse.Namespace) -> Stimulus:
    if args.high is None:
        raise ConfigError(CLI, "--high", "required with a CSV input: the generator's high level as set, in V")
    low, high = _number("--low", args.low or "0"), _number("--high", args.high)
    if high <= low:
        raise ConfigError(CLI, "--high", f"must be above --low ({low:g} V), not {high:g} V")
    edge_time = _number("--edge-time", args.edge_time or "0")
    rs = _number("--source-resistance", args.source_resistance or "50")
    if edge_time < 0 or rs < 0:
        raise ConfigError(CLI, "--edge-time" if edge_time < 0 else "--source-resistance", "must be 0 or more")
    return Stimulus("square", low, high, 0.0, args.edge or "rising", args.load or "high_z", rs, edge_time)


def _record(args: argparse.Namespace) -> Record:
    stimulus_given = [f"--{o.replace('_', '-')}" for o in STIMULUS_OPTIONS if getattr(args, o) is not None]
    if args.store.lower().endswith(".csv"):
        if args.record is not None:
            raise ConfigError(CLI, "--record", "only for a record store; a CSV holds one record")
        if metadata_path(args.store).exists():  # acqd's own export: the stimulus is in the JSON beside it
            if stimulus_given:
                raise ConfigError(CLI, stimulus_given[0], f"{metadata_path(args.store)} gives the stimulus; "
                                                          "leave the stimulus options out (or move the JSON away)")
            return read_exported_record(args.store, args.time_column)
        return read_csv_record(args.store, _csv_stimulus(args), args.time_column)
    given = [*stimulus_given, *(["--time-column"] if args.time_column is not None else [])]
    if given:
        raise ConfigError(CLI, given[0], "only for a CSV input; a stored record carries its own stimulus")
    return _stored_record(args.store, args.record)


# -- the [dut] table: base (profile or record) + options --------------------------------------------------
class _Table:
    """A [dut]-shaped table under construction, remembering which option set which key."""

    def __init__(self, data: dict[str, Any], source: str, text: str, path: str) -> None:
        self.data, self.source, self.text, self.path = copy.deepcopy(data), source, text, path
        self.options: dict[str, str] = {}

    def set(self, keys: tuple[str, ...], value: Any, option: str) -> None:
        node = self.data
        for key in keys[:-1]:
            node = node.setdefault(key, {})
        node[keys[-1]] = value
        self.options[".".join(keys)] = option

    def channel(self, name: str, option: str) -> dict[str, Any]:
        """The table entry of a mapped channel (a bare signal string becomes {signal = ...})."""
        channels = self.data.get("channels", {})
        if name not in channels:
            raise ConfigError(CLI, option, f"channel {name!r} is not mapped; add --map {name}=SIGNAL")
        if isinstance(channels[name], str):
            channels[name] = {"signal": channels[name]}
        return channels[name]

    def parse(self) -> CompareSpec:
        if "model" not in self.data:
            raise ConfigError(CLI, "--model", "missing: give --model NAME, or --profile PROFILE (or a stored "
                                              "record) whose [dut] table names a model")
        return parse_dut_table(self.data, self.source, self.text, self.path)

    def as_option(self, exc: ConfigError) -> ConfigError:
        """An error in a key an option set names the option, not the table (or the comparator's source)."""
        key = exc.field.removeprefix(f"{self.path}.") if self.path else exc.field
        for known in sorted(self.options, key=len, reverse=True):
            if key == known or key.startswith(f"{known}."):
                return ConfigError(CLI, self.options[known], exc.problem)
        return exc


def _base_table(args: argparse.Namespace, record: Record) -> _Table:
    if args.profile:
        from ..profile import load_profile  # only the [dut] table is used, but the profile must be valid
        profile = load_profile(args.profile)
        table = _Table(profile.dut, profile.source, profile.text, "dut")
    elif "model" in (record.dut or {}):
        source = (str(metadata_path(args.store)) if args.store.lower().endswith(".csv")
                  else f"{args.store} record {record.index}")
        table = _Table(record.dut, source, "", "dut")
    else:
        table = _Table({}, CLI, "", "")
    if args.model and table.data.get("model") not in (None, args.model):
        table.data = {k: v for k, v in table.data.items() if k in ("name", "serial")}  # other model: start over
    return table


def _apply_options(table: _Table, args: argparse.Namespace) -> None:
    if args.model:
        table.set(("model",), args.model, "--model")
    for text in args.param:
        name, value = _pair("--param", text)
        table.set((name,), _number(f"--param {name}", value), f"--param {name}")
    for option, key in (("--free", "free"), ("--hold", "hold")):
        if (value := getattr(args, key)) is not None:
            table.set(("fit", key), _names(value), option)
    if args.weighting:
        table.set(("fit", "weighting"), args.weighting, "--weighting")
    for text in args.map:
        name, signal = _pair("--map", text)
        table.set(("channels", name), {"signal": signal}, f"--map {name}")
    for option, key in (("--gain", "gain"), ("--offset", "offset")):
        for text in getattr(args, key):
            name, value = _pair(option, text)
            table.channel(name, f"{option} {name}")[key] = _number(f"{option} {name}", value)
            table.options[f"channels.{name}.{key}"] = f"{option} {name}"
    if args.stimulus_channel:
        table.channel(args.stimulus_channel, "--stimulus-channel")["stimulus"] = True
        table.options[f"channels.{args.stimulus_channel}.stimulus"] = "--stimulus-channel"
    _apply_tolerances(table, args)


def _apply_tolerances(table: _Table, args: argparse.Namespace) -> None:
    for option, key in (("--nrmse-max", "nrmse_max"), ("--parameter-pct", "parameter_pct"),
                        ("--settling-band-pct", "settling_band_pct")):
        if (text := getattr(args, key)) is not None:
            table.set(("tolerances", key), _number(option, text), option)
    for text in args.overshoot:
        name, band = _pair("--overshoot", text)
        lo, sep, hi = band.partition(":")
        if not sep:
            raise ConfigError(CLI, f"--overshoot {name}", f"must look like CHANNEL=LO:HI in percent, not {text!r}")
        option = f"--overshoot {name}"
        table.set(("tolerances", "channels", name, "overshoot_pct"), [_number(option, lo), _number(option, hi)], option)
        table.options.setdefault(f"tolerances.channels.{name}", option)
    for text in args.settling_max:
        name, value = _pair("--settling-max", text)
        option = f"--settling-max {name}"
        table.set(("tolerances", "channels", name, "settling_s_max"), _number(option, value), option)
        table.options.setdefault(f"tolerances.channels.{name}", option)


# -- output --------------------------------------------------------------------------------------------
def headline(result: CompareResult, stimulus: Stimulus, label: str) -> str:
    """``data/kt9.h5 record 2 (2026-12-02 04:46:49 UTC) vs series_rlc: rising 0 V → 1 V, timing …``.

    The edge is named as everywhere else, by the levels as set; when the generator's open-circuit
    voltage (what the model is driven with) differs from them — a matched-load setting doubles it — the
    EMF is given as well.
    """
    stim = result.stimulus
    when = f" ({utc_text(result.record['utc'])} UTC)" if result.record["utc"] else ""
    edge = edge_label(stimulus.edge, stimulus.low_v, stimulus.high_v)
    start, end = (stimulus.high_v, stimulus.low_v) if stimulus.edge == "falling" else (stimulus.low_v, stimulus.high_v)
    if (stim["before_v"], stim["after_v"]) != (start, end):
        edge += f" (open-circuit {si(stim['before_v'], 'V', 6, trim=True)} → {si(stim['after_v'], 'V', 6, trim=True)})"
    return f"{label}{when} vs {result.model}: {edge}, timing {stim['timing']}"


def run_compare(args: argparse.Namespace) -> int:
    if args.figures:  # before the fit, so a folder that cannot be made costs no time
        made_folder(args.figures, CLI, "--figures")
    record = _record(args)
    table = _base_table(args, record)
    _apply_options(table, args)
    label = args.store if record.index is None else f"{args.store} record {record.index}"
    try:
        result = compare_spec(record, table.parse(), label)
    except ConfigError as exc:
        raise table.as_option(exc) from None
    if args.figures:
        from ..report import save_figures  # matplotlib only when figures are asked for
        save_figures(result, args.figures)
    if args.json:
        print(result.to_json())
    else:
        out = console(wide=True)
        out.print(Text(headline(result, record.stimulus, label)), soft_wrap=True)
        for part in renderables(result.to_dict()):
            out.print(part, soft_wrap=isinstance(part, Text))
    return 1 if result.verdict.status == "fail" else 0
