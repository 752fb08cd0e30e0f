"""The class of bad profiles, generated from the demo profile: every key of every table given a value of the
wrong type, an empty or over-long string or one with a control character, a number that is not finite or
is beyond any bench (±1e300), and every table given a key nobody reads; every required key and table taken
away. Each case is ``acqd run`` of the broken copy, run in this process, and must be one ``acqd: error:``
line naming the file and the field (``badinput.assert_one_clear_line``), before any instrument is opened.

References: TOML 1.0 (``nan``, ``inf`` and ``-inf`` are floats; a basic string's ``\\uXXXX`` escapes);
IEEE 754 binary64 (1e300 is finite, near the top of its range of about 1.8e308); which keys are required
is the README's profile section ("required" in its tables).
"""

from __future__ import annotations

import re
import tomllib
from collections.abc import Iterator
from pathlib import Path

import pytest

from badinput import assert_one_clear_line
from test_run import DEMO

HEADER = re.compile(r"^\[([\w.]+)\]\s*(#.*)?$")
KEY_LINE = re.compile(r"^(\w+)\s*=")
LONG_TEXT = "x" * 5000  # over the 4,096 characters a TOML text may have (the README's "Sizes are bounded")
# The README's profile tables mark these "required"; each taken away must be named as missing.
REQUIRED_KEYS = ("limits.max_level_v", "limits.max_frequency_hz", "bench.kind", "bench.generator.driver",
                 "bench.scope.driver", "stimulus.low_v", "stimulus.high_v", "stimulus.frequency_hz",
                 "acquisition.window_s", "acquisition.samples", "acquisition.channels.CH1.range_v",
                 "acquisition.channels.CH2.range_v", "acquisition.channels.CH3.range_v", "math.i_l.terms",
                 "bench.simulated.dut.model")
REQUIRED_TABLES = ("limits", "stimulus", "acquisition", "bench", "bench.generator", "bench.scope")
# Keys where a huge number has a meaning (a tolerance that accepts everything, a math channel's scale), so
# only their non-finite and wrongly typed values are bad.
ANY_SIZE = ("nrmse_max", "parameter_pct", "settling_s_max", "divide_by")


def _lines() -> Iterator[tuple[int, str, str]]:
    """(line number, table, key) of every ``key = value`` line of the demo profile."""
    table = ""
    for number, line in enumerate(DEMO.read_text().splitlines()):
        if m := HEADER.match(line):
            table = m.group(1)
        elif m := KEY_LINE.match(line):
            yield number, table, m.group(1)


def _value(table: str, key: str) -> object:
    data = tomllib.loads(DEMO.read_text())
    for part in table.split("."):
        data = data[part]
    return data[key]


def _bad_values(field: str, value: object) -> dict[str, str]:
    """What a key holding ``value`` is given instead (TOML text), by a name for the case."""
    if isinstance(value, bool):
        return {"a string": '"true"', "a number": "1"}
    if isinstance(value, (int, float)):
        bad = {"a string": '"1"', "nan": "nan", "inf": "inf", "-inf": "-inf", "a list": "[1]"}
        if not field.endswith(ANY_SIZE):
            bad.update({"1e300": "1e300", "-1e300": "-1e300"})
        if isinstance(value, int):
            bad["a fraction"] = "2.5"
        return bad
    if isinstance(value, str):
        return {"a number": "1.5", "empty": '""', "5000 characters": f'"{LONG_TEXT}"',
                "ESC": '"a\\u001b[31mb"', "NUL": '"a\\u0000b"', "a table": "{ a = 1 }"}
    if isinstance(value, list):
        return {"a number": "7", "a list of the wrong kind": '["a", "b"]' if isinstance(value[0], (int, float))
                else "[1, 2]"}
    return {"a number": "7", "a string": '"x"'}  # an inline table


def _text_with(number: int, new_line: str | None) -> str:
    lines = DEMO.read_text().splitlines()
    if new_line is None:
        del lines[number]
    else:
        lines[number] = new_line
    return "\n".join(lines) + "\n"


def _without_table(table: str) -> str:
    """The demo without ``[table]`` and its keys (its subtables stay)."""
    kept, skipping = [], False
    for line in DEMO.read_text().splitlines():
        if m := HEADER.match(line):
            skipping = m.group(1) == table
        if not skipping:
            kept.append(line)
    return "\n".join(kept) + "\n"


def _with_surplus_key(table: str) -> str:
    lines = DEMO.read_text().splitlines()
    at = next(i for i, line in enumerate(lines) if (m := HEADER.match(line)) and m.group(1) == table)
    lines.insert(at + 1, "surplus_key = 1")
    return "\n".join(lines) + "\n"


def _cases() -> dict[str, tuple[str, tuple[str, ...]]]:
    """case name → (profile text, words the error line must contain)."""
    cases: dict[str, tuple[str, tuple[str, ...]]] = {}
    tables = []
    for number, table, key in _lines():
        field = f"{table}.{key}" if table else key
        for name, text in _bad_values(field, _value(table, key)).items():
            cases[f"{field} = {name}"] = (_text_with(number, f"{key} = {text}"), (table, key))
        if field in REQUIRED_KEYS:
            cases[f"{field} missing"] = (_text_with(number, None), (key,))
        if table not in tables:
            tables.append(table)
    for table in tables:
        cases[f"[{table}] with a surplus key"] = (_with_surplus_key(table), ("surplus_key",))
    cases["a surplus key at the top"] = ("surplus_key = 1\n" + DEMO.read_text(), ("surplus_key",))
    for table in REQUIRED_TABLES:
        cases[f"[{table}] missing"] = (_without_table(table), (table.rsplit(".", 1)[-1],))
    return {**cases, **_single_cases()}


def _single_cases() -> dict[str, tuple[str, tuple[str, ...]]]:
    """Mistakes a key-by-key walk cannot make: keys that exclude each other, files and folders they name."""
    demo = DEMO.read_text()
    return {
        "a command log in a missing folder": (demo.replace("seed = 9", 'seed = 9\ncommand_log = "/no-such-folder/g.log"'),
                                              ("bench.simulated.command_log", "does not exist")),
        "a library path as a backend": (demo.replace('driver = "scpi-digitiser"',
                                                     'driver = "scpi-digitiser"\nbackend = "/usr/lib/libvisa.so"'),
                                        ("bench.scope.backend", "@py")),
        "levels and an amplitude": (demo.replace("high_v = 1.0", "high_v = 1.0\namplitude_vpp = 1.0"),
                                    ("stimulus.amplitude_vpp", "not both")),
        "a resource on the simulated bench": (demo.replace('driver = "scpi-generator"', 'driver = "scpi-generator"\n'
                                                           'resource = "TCPIP0::127.0.0.1::5025::SOCKET"'),
                                              ("bench.generator.resource", "simulated")),
        "a visa bench without resources": (demo.replace('kind = "simulated"', 'kind = "visa"'),
                                           ("resource", "required")),
        "a netlist file that is not there": (demo.replace('model = "series_rlc"\nr_ohm = 22.4',
                                                          'model = "netlist"\nnetlist_file = "none.cir"\nr_ohm = 22.4'),
                                             ("netlist_file", "none.cir")),
        "a store that is not .h5": (demo.replace('file = "data/kt9-demo.h5"', 'file = "records.csv"'),
                                    ("output.file", ".h5")),
        "the same table twice": (demo + "\n[limits]\nmax_level_v = 1.0\n", ("not valid TOML",)),
        "a math channel named as a captured one": (demo.replace("[math.i_l]", "[math.v_c]"), ("math.v_c",)),
        "two channels of one name": (demo.replace('name = "v_rl"', 'name = "v_src"'), ("acquisition.channels",)),
    }


CASES = _cases()


@pytest.mark.parametrize("case", sorted(CASES))
def test_bad_profile_is_one_clear_line(tmp_path: Path, case: str, capsys) -> None:
    text, words = CASES[case]
    path = tmp_path / "p.toml"
    path.write_text(text.replace('file = "data/kt9-demo.h5"', f'file = "{tmp_path / "records.h5"}"'))
    assert_one_clear_line(["run", str(path), "-n", "1"], ("p.toml", *words), capsys)
    assert not (tmp_path / "records.h5").exists() and not list(tmp_path.glob("records.*"))
