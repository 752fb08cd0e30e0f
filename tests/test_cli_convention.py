"""The CLI convention: every sub-command described, one meaning per option in every sub-command, and the
options it replaced refused with one error line.

The convention is the product's (README, "Commands"); the habits behind it are common practice for Unix
tools: the same option letter means the same thing in every sub-command, short options for the common
ones, a positional argument for the thing a command works on.
"""

from __future__ import annotations

import argparse
import csv
import json

import pytest

from acqd.cli import build_parser, main
from test_cli_output import demo_store  # noqa: F401 - the shared simulated-bench store (a fixture)

# option → (its long form, its metavar): one meaning wherever it appears.
CONVENTION = {"-r": ("--record", "N"), "-o": ("--out", "FILE"), "-p": ("--profile", "FILE"),
              "-n": ("--count", "N"), "-d": ("--data-dir", "DIR"), "--figures": ("--figures", "DIR"),
              "--last": ("--last", "N"), "--json": ("--json", None)}
# Which sub-command takes which of them, and which take a STORE as their positional argument.
EXPECTED = {"run": {"-o", "-n"}, "ls": {"--json"}, "show": {"-r", "--json"}, "export": {"-r", "-o"},
            "compare": {"-r", "-p", "--figures", "--json"}, "report": {"-o", "-p", "--last"},
            "daemon": {"-d"}, "status": {"-d", "--json"}, "drift": {"--figures", "--last", "--json"},
            "sim": {"--json"}, "replay": {"--json"}, "drivers": set(), "identify": set(), "plan": {"--json"},
            "sync": {"-d", "--json"}, "fleet": set()}
# acqd fleet's own sub-commands, checked the same way.
FLEET_EXPECTED = {"ls": {"--json"}, "drift": {"--figures", "--json"}, "compare": {"-p", "-o", "--json"}}
STORE_COMMANDS = {"ls", "show", "export", "compare", "report", "drift", "replay"}


def sub_commands() -> dict[str, argparse.ArgumentParser]:
    parser = build_parser()
    action = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    return dict(action.choices)


def one_liners() -> dict[str, str]:
    parser = build_parser()
    action = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    return {a.dest: a.help for a in action._choices_actions}


def options(parser: argparse.ArgumentParser) -> dict[str, argparse.Action]:
    return {s: a for a in parser._actions for s in a.option_strings}


def test_the_expected_sub_commands_exist():
    assert set(sub_commands()) == set(EXPECTED)


@pytest.mark.parametrize("name", sorted(EXPECTED))
def test_every_sub_command_has_a_one_line_help_and_a_description(capsys, name):
    parser = sub_commands()[name]
    help_line = one_liners()[name]
    assert help_line and "\n" not in help_line and len(help_line) <= 80
    assert parser.description and len(parser.description) > len(help_line)
    with pytest.raises(SystemExit) as exit_:  # argparse's -h prints the help and exits 0
        main([name, "--help"])
    out = capsys.readouterr().out
    assert exit_.value.code == 0 and out.startswith(f"usage: acqd {name}")
    assert " ".join(parser.description.split()[:4]) in " ".join(out.split())


@pytest.mark.parametrize("name", sorted(EXPECTED))
def test_each_option_means_the_same_in_every_sub_command(name):
    given = options(sub_commands()[name])
    assert {o for o in CONVENTION if o in given} == EXPECTED[name]
    for short, (long, metavar) in CONVENTION.items():
        if short in given or long in given:
            action = given.get(short) or given[long]
            assert set(action.option_strings) == ({short, long} if short != long else {long}), action.option_strings
            assert action.metavar == metavar
    positional = [a.metavar for a in sub_commands()[name]._actions if not a.option_strings and a.dest != "help"]
    assert ("STORE" in positional) == (name in STORE_COMMANDS)


def fleet_commands() -> dict[str, argparse.ArgumentParser]:
    fleet = sub_commands()["fleet"]
    action = next(a for a in fleet._actions if isinstance(a, argparse._SubParsersAction))
    return dict(action.choices)


@pytest.mark.parametrize("name", sorted(FLEET_EXPECTED))
def test_fleet_sub_commands_follow_the_convention(capsys, name):
    parser = fleet_commands()[name]
    given = options(parser)
    assert set(fleet_commands()) == set(FLEET_EXPECTED)
    assert {o for o in CONVENTION if o in given} == FLEET_EXPECTED[name]
    for short, (long, metavar) in CONVENTION.items():
        if short in given or long in given:
            action = given.get(short) or given[long]
            assert action.metavar == metavar
    assert parser.description and "URL" in [a.metavar for a in parser._actions if not a.option_strings]
    with pytest.raises(SystemExit) as exit_:
        main(["fleet", name, "--help"])
    assert exit_.value.code == 0 and capsys.readouterr().out.startswith(f"usage: acqd fleet {name}")


def test_options_shared_by_several_sub_commands_agree():
    seen: dict[str, tuple[tuple[str, ...], str | None, str]] = {}
    for name, parser in sorted(sub_commands().items()):
        for option, action in options(parser).items():
            if option in ("-h", "--help"):
                continue
            shape = (tuple(sorted(action.option_strings)), action.metavar)
            first = seen.setdefault(option, (*shape, name))
            assert shape == first[:2], f"{option}: {name} has {shape}, {first[2]} has {first[:2]}"


def test_record_defaults_to_the_last_record(capsys, demo_store, tmp_path):
    store, _ = demo_store
    assert main(["show", str(store), "--json"]) == 0
    last = json.loads(capsys.readouterr().out)
    assert main(["ls", str(store), "--json"]) == 0
    assert last["index"] == json.loads(capsys.readouterr().out)[-1]["index"] == 3
    assert main(["show", str(store), "--record", "3"]) == 0
    long_form = capsys.readouterr().out
    assert main(["show", str(store), "-r", "3"]) == 0 and capsys.readouterr().out == long_form
    assert main(["export", str(store), "-o", str(tmp_path / "last.csv")]) == 0
    with open(tmp_path / "last.csv.json", encoding="utf-8") as fh:
        assert json.load(fh)["index"] == 3
    with open(tmp_path / "last.csv", newline="", encoding="utf-8") as fh:  # Python's csv module as the reader
        assert next(csv.reader(fh))[0] == "t [s]"


@pytest.mark.parametrize("argv, named", [
    (["show", "{store}", "2"], "unrecognized arguments: 2"),                  # RECORD was a positional
    (["export", "{store}", "--csv", "{tmp}/x.csv"], "required: -o/--out"),     # now -o/--out FILE
    (["export", "{store}", "--csv", "{tmp}/x.csv", "-o", "{tmp}/x.csv"], "unrecognized arguments: --csv"),
    (["daemon", "--data", "{tmp}", "p.toml"], "--data"),                      # now -d/--data-dir (no prefixes)
    (["status", "{tmp}"], "unrecognized arguments"),                          # DATA_DIR was a positional
    (["drift", "{store}", "--out", "{tmp}/d"], "--out"),                      # a folder of figures: --figures
    (["run", "p.toml", "--record", "1"], "--record"),                         # not taken as --records
    (["show", "{store}", "-r", "one"], "--record: 'one' is not a whole number"),
    (["run", "p.toml", "-n", "0"], "--count: must be 1 or more"),
    (["drift", "{store}", "--last", "0"], "--last: must be 1 or more"),
    (["sim", "--transport", "usb"], "--transport: 'usb': give one or more of socket, hislip, vxi11"),
    (["replay", "{store}", "--hislip-port", "70000"], "--hislip-port: '70000' is not a TCP port"),
])
def test_old_and_wrong_options_are_one_error_line(capsys, demo_store, tmp_path, argv, named):
    store, _ = demo_store
    code = main([a.format(store=store, tmp=tmp_path) for a in argv])
    out, err = capsys.readouterr()
    assert code == 2 and out == ""
    assert err.count("\n") == 1 and err.startswith(f"acqd: error: acqd {argv[0]}: ") and named in err
    assert not (tmp_path / "x.csv").exists()
