"""The class of bad driver files, generated from the shipped generator and digitiser drivers: every command
template and query given a second program message (``;*RST``, ``;:SYST:ERR?``) or a terminator (newline,
carriage return) of its own; every limit given a value past physical sanity, not finite, negative or of the
wrong type; hooks outside acqd's own module and the allow-list (the module must not even be imported); a
surplus key in every table; a wrong role and a broken ``*IDN?`` pattern. Each case is ``acqd run`` of the
demo profile with the broken file as its driver, in this process: one ``acqd: error:`` line naming the
driver file and the field, before any instrument is opened.

References: IEEE 488.2 §7.3 (a ``;`` separates program message units; the newline terminates a program
message, and a carriage return before it is taken as white space by some parsers, so it must not be
accepted in a template either); Python's ``re`` (an unbalanced ``(`` is an error).
"""

from __future__ import annotations

import re
import sys
import tomllib
from collections.abc import Iterator
from pathlib import Path

import pytest

from badinput import assert_one_clear_line
from test_run import DEMO

DRIVERS = Path(__file__).resolve().parents[1] / "drivers"
ROLES = {"generator": "scpi-generator", "scope": "scpi-digitiser"}
SECOND_MESSAGES = {"a ;*RST": ";*RST", "a ;:SYST:ERR?": ";:SYST:ERR?", "a newline": "\\n*RST", "a carriage return": "\\r"}
BAD_LIMITS = {"1e308": "1e308", "nan": "nan", "-1": "-1", "a string": '"10"'}
PROBE_MODULE = "acqd_probe_hook"  # a module that records being imported; the loader must never import it
BAD_HOOKS = {"os:system": "os:system", "this:s": "this:s", "a module on the path": f"{PROBE_MODULE}:hook",
             "not module:function": "system", "acqd's own module, a missing function": "acqd.instruments.hooks:nope"}


def _templates(data: object) -> Iterator[str]:
    """Every command template and query text of a driver file's table, however deep."""
    if isinstance(data, dict):
        for key, value in data.items():
            if key == "commands" and isinstance(value, list):
                yield from value
            elif key == "query" and isinstance(value, str):
                yield value
            else:
                yield from _templates(value)
    elif isinstance(data, list):
        for item in data:
            yield from _templates(item)


def _limits(text: str) -> Iterator[str]:
    """The ``key = number`` lines of the [limits] table (an inline table of numbers counts as one)."""
    body = text.split("[limits]", 1)[1].split("\n[", 1)[0]
    yield from (m.group(0) for m in re.finditer(r"(?m)^\w+ = .+$", body))


def _headers(text: str) -> list[str]:
    return re.findall(r"(?m)^\[[^\[\]]+\]$", text)


def _cases() -> dict[str, tuple[str, str, tuple[str, ...]]]:
    """case → (role, driver file text, words the line must contain beside the file's name)."""
    cases: dict[str, tuple[str, str, tuple[str, ...]]] = {}
    for role, name in ROLES.items():
        text = (DRIVERS / f"{name}.toml").read_text()
        for template in dict.fromkeys(_templates(tomllib.loads(text))):
            for what, extra in SECOND_MESSAGES.items():
                quoted = f'"{template}"'
                assert quoted in text, quoted
                cases[f"{name}: {template!r} with {what}"] = (role, text.replace(quoted, f'"{template}{extra}"', 1), ())
        for line in _limits(text):
            key, value = line.split(" = ", 1)
            for what, bad in BAD_LIMITS.items():
                new = re.sub(r"-?[\d.]+(e-?\d+)?(?=[ ,}]|$)", bad, value) if "{" in value else bad
                cases[f"{name}: limits.{key} = {what}"] = (role, text.replace(line, f"{key} = {new}", 1),
                                                           (f"limits.{key}",))
        for header in _headers(text):
            cases[f"{name}: {header} with a surplus key"] = (role, text.replace(header, f"{header}\nsurplus_key = 1", 1),
                                                             ("surplus_key",))
        for what, hook in BAD_HOOKS.items():
            cases[f"{name}: hook {what}"] = (role, text.replace("[driver]", f'[driver]\nhooks = {{ after_fetch = "{hook}" }}', 1),
                                             ("hooks.after_fetch",))
        other = "scope" if role == "generator" else "generator"
        cases[f"{name}: role {other}"] = (role, text.replace(f'role = "{role}"', f'role = "{other}"', 1), ("driver",))
        cases[f"{name}: role switchboard"] = (role, text.replace(f'role = "{role}"', 'role = "switchboard"', 1),
                                              ("driver.role",))
        cases[f"{name}: idn not a pattern"] = (role, re.sub(r"idn = '[^']*'", "idn = '^acqd-sim,(FG'", text, count=1),
                                               ("driver.idn",))
    return cases


CASES = _cases()


@pytest.mark.parametrize("case", sorted(CASES))
def test_bad_driver_is_one_clear_line(tmp_path: Path, case: str, capsys, monkeypatch) -> None:
    role, text, words = CASES[case]
    probe = tmp_path / "probe"
    probe.mkdir()
    (probe / f"{PROBE_MODULE}.py").write_text(f"open({str(tmp_path / 'imported')!r}, 'w').close()\nhook = print\n")
    monkeypatch.syspath_prepend(str(probe))
    driver = tmp_path / "bad-driver.toml"
    driver.write_text(text)
    profile = DEMO.read_text().replace(f'driver = "{ROLES[role]}"', f'driver = "{driver}"', 1)
    path = tmp_path / "p.toml"
    path.write_text(profile.replace('file = "data/kt9-demo.h5"', f'file = "{tmp_path / "records.h5"}"'))
    assert_one_clear_line(["run", str(path), "-n", "1"], ("bad-driver.toml", *words), capsys)
    assert not (tmp_path / "imported").exists() and PROBE_MODULE not in sys.modules
    assert not (tmp_path / "records.h5").exists()
