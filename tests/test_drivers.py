"""Driver files: loading, validation (one line naming file and field), expressions, search, the CLI.

No instrument is needed here except for ``acqd identify``. References: Python's own tomllib and arithmetic,
``re``, and the SCPI / IEEE 488.2 clauses cited beside each check.
"""

from __future__ import annotations

import re
import shutil
import tomllib
from pathlib import Path

import pytest

from acqd import scpi
from acqd.cli import main as acqd_main
from acqd.errors import ConfigError
from acqd.instruments import find_driver, list_drivers, load_driver, match_driver
from acqd.instruments.expression import Expression, ExpressionError

DRIVERS = Path(__file__).resolve().parents[1] / "drivers"
SHIPPED = {"scpi-generator": "generator", "scpi-digitiser": "scope", "divscope": "scope"}


def one_line(exc: BaseException) -> str:
    text = str(exc)
    assert "\n" not in text
    return text


def variant(tmp_path: Path, name: str, old: str, new: str) -> Path:
    """A copy of a shipped driver with one piece of text replaced (the replacement must take place)."""
    text = (DRIVERS / f"{name}.toml").read_text()
    assert old in text
    path = tmp_path / f"{name}-variant.toml"
    path.write_text(text.replace(old, new, 1))
    return path


# --- the shipped drivers ------------------------------------------------------------------------------

def test_shipped_drivers_load_and_are_listed():
    found = {info.name: info for info in list_drivers()}
    assert {name: found[name].role for name in SHIPPED} == SHIPPED
    for name in SHIPPED:
        # Reference: tomllib parses each file, and the file's own idn pattern compiles with re.
        data = tomllib.loads((DRIVERS / f"{name}.toml").read_text())
        assert found[name].idn_pattern == re.compile(data["driver"]["idn"]).pattern


@pytest.mark.parametrize("idn, expected", [
    ("acqd-sim,DIG,0,0.1.0", "scpi-digitiser"),
    ("acqd-sim,DIVSCOPE,0,0.1.0", "divscope"),
    ("acqd-sim,FG,0,0.1.0", "scpi-generator"),
    ("Some Maker,Model 9,123,1.0", None),
])
def test_match_driver_by_idn(idn, expected):
    # IEEE 488.2 §10.14 (from memory): *IDN? answers manufacturer,model,serial,firmware.
    info = match_driver(idn)
    assert (info.name if info else None) == expected


def test_commands_follow_the_per_division_and_share_conventions():
    view = load_driver(find_driver("divscope"))
    dig = load_driver(find_driver("scpi-digitiser"))
    window, n, share, range_v = 2e-4, 2000, 0.2, 1.0
    # Reference: plain Python arithmetic of the DEVELOPERS.md tables: 10 horizontal divisions span the
    # window, 8 vertical divisions span offset ± range; the DIG's pre-trigger is a negative sample offset.
    sent = view.commands("timebase", window_s=window, n_samples=n, pretrigger_fraction=share)
    assert len(sent) == 3 and float(sent[0].split()[1]) == window / 10
    # The numbers are read back with Python's float() (an independent NR3 reader), not rebuilt with the
    # formatter under test.
    header, value = sent[2].split()
    assert sent[1] == f"SPAN:POINts {n}" and header == "SPAN:LEAD" and float(value) == share
    sent = view.commands("channel", channel="CH3", range_v=range_v, offset_v=0.5, coupling="dc")
    header, value = sent[0].split()
    assert header == "LANE3:PERDiv" and float(value) == 2 * range_v / 8
    assert dig.commands("timebase", window_s=window, n_samples=n, pretrigger_fraction=share)[2] == \
        f"SWEep:OFFSet:POINts {-round(share * n)}"
    # SCPI-1999 Vol 1 §7.2: a numeric value is NR1/NR2/NR3 text, parsed back to the same double here.
    level = dig.commands("trigger", source="external", slope="falling", level_v=0.1)
    assert level == ["TRIGger:SOURce EXTernal", "TRIGger:SLOPe NEGative", "TRIGger:LEVel 1E-01"]
    assert float(level[2].split()[1]) == 0.1


@pytest.mark.parametrize("operation, inputs, field", [
    ("trigger", {"source": "external;*RST", "slope": "rising", "level_v": 0.5}, "source"),
    ("channel", {"channel": "CH1;*RST", "range_v": 1.0, "offset_v": 0.0, "coupling": "dc"}, "channel"),
    ("channel", {"channel": "CH1", "range_v": float("nan"), "offset_v": 0.0, "coupling": "dc"}, "range_v"),
    ("channel", {"channel": "CH1", "range_v": "1\n*RST", "offset_v": 0.0, "coupling": "dc"}, "range_v"),
])
def test_values_cannot_carry_a_second_command(operation, inputs, field):
    # IEEE 488.2 §7.5 / SCPI-1999 §6.2.4: NL ends a message, ';' and ':' start a new unit or header.
    dig = load_driver(find_driver("scpi-digitiser"))
    with pytest.raises(ConfigError) as info:
        dig.commands(operation, **inputs)  # raises before any command text exists, so nothing can be sent
    assert info.value.field == field
    assert "allowed: " in one_line(info.value) or "must be a finite number" in str(info.value)


# --- validation: each mistake is one line naming file and field ------------------------------------------

def test_malformed_toml_names_the_file(tmp_path):
    path = variant(tmp_path, "scpi-digitiser", 'role = "scope"', 'role = "scope')
    with pytest.raises(tomllib.TOMLDecodeError):  # reference: tomllib refuses the same text
        tomllib.loads(path.read_text())
    with pytest.raises(ConfigError) as info:
        load_driver(path)
    assert one_line(info.value).startswith(str(path)) and "TOML" in str(info.value)


@pytest.mark.parametrize("name, old, new, field, says", [
    ("scpi-digitiser", "[operations.arm]", "[operations.shoot]", "operations.shoot",
     "allowed: timebase, channel, trigger, arm, abort"),
    ("scpi-digitiser", "{window_s:float}", "{window_s}", "operations.timebase.commands[0]",
     "write {window_s:TYPE} with TYPE one of float, int, bool, enum, channel"),
    ("scpi-digitiser", "{window_s:float}", "{window_ms:float}", "operations.timebase.commands[0]",
     "not an input here"),
    ("scpi-digitiser", '[operations.arm]\ncommands = ["INITiate"]', "", "operations.arm",
     "required operation missing"),
    ("scpi-digitiser", "{coupling:enum}", "{coupling:float}", "operations.channel.commands[2]",
     "must have type enum"),
    ("scpi-digitiser", 'rising = "POSitive"', 'rissing = "POSitive"', "enums.slope.rissing",
     "allowed: rising, falling"),
    ("scpi-digitiser", 'done = "1"', 'done = "1"\npoll_every_s = 0.1', "wait.poll_every_s",
     "unknown key"),
    ("scpi-digitiser", "'^acqd-sim,DIG,'", "'^acqd-sim,(DIG'", "driver.idn", "regular expression"),
    ("scpi-digitiser", 'format = "REAL,32"', 'format = "REAL,64"', "fetch.format", "allowed"),
    ("divscope", '"window_s / 10"', '"__import__(\'os\').getcwd()"', "operations.timebase.computed",
     "only calls like round(x)"),
    ("divscope", '"window_s / 10"', '"window.s / 10"', "operations.timebase.computed", "not allowed"),
    ("divscope", '"window_s / 10"', '"span_s / 10"', "operations.timebase.computed", "names allowed here"),
    ("scpi-digitiser", "max_pretrigger_fraction = 1.0", "", "limits.max_pretrigger_fraction", "missing"),
    ("scpi-generator", '"FREQuency {frequency_hz:float}"', '"FREQuency {frequency_hz:float}\\n*RST"',
     "operations.frequency.commands[0]", "one line"),
    # A second message unit after ';' (IEEE 488.2 §7.1, program message unit separator, from memory) would
    # reach the wire undeclared and shift every later reply by one.
    ("scpi-generator", '"FREQuency {frequency_hz:float}"', '";*RST;:SYST:ERR?"',
     "operations.frequency.commands[0]", "second command"),
    ("scpi-generator", '"FREQuency {frequency_hz:float}"', '"FREQuency {frequency_hz:float};*RST"',
     "operations.frequency.commands[0]", "second command"),
    # Limits no bench generator has: a typo of 1e308 V must not open the door to any level.
    ("scpi-generator", "high_z = 10.0", "high_z = 1e308", "limits.max_level_v.high_z", "at most 60"),
    ("scpi-generator", "max_frequency_hz = 1e6", "max_frequency_hz = 1e300", "limits.max_frequency_hz",
     "at most"),
    ("scpi-digitiser", "max_samples = 10_000_000", "max_samples = 10_000_000_000", "limits.max_samples",
     "to 10000000"),
    ("scpi-digitiser", 'channels = { CH1 = 1', 'hooks = { after_fetch = "os:system" }\nchannels = { CH1 = 1',
     "driver.hooks.after_fetch", "not allowed"),
])
def test_each_mistake_is_one_line_naming_file_and_field(tmp_path, name, old, new, field, says):
    # Each variant is still valid TOML (reference: tomllib parses it), so the loader's own checks are what
    # refuse it; the message contract is DEVELOPERS.md's: one line naming file, field and what is allowed.
    path = variant(tmp_path, name, old, new)
    tomllib.loads(path.read_text())
    with pytest.raises(ConfigError) as info:
        load_driver(path)
    text = one_line(info.value)
    assert text.startswith(str(path)) and field in text and says in text, text


def test_quoted_semicolon_is_one_command():
    # IEEE 488.2 §7.7.5 string program data (from memory): a ';' inside quotes is data, not a separator.
    assert scpi.single_message_problem('DISPlay:TEXT "ready; armed"') is None
    assert scpi.single_message_problem('DISPlay:TEXT "ready"; *RST') is not None


def test_a_refused_hook_runs_no_code(tmp_path, monkeypatch):
    # The module would leave a file behind if it were imported; refused by name, it must never be.
    marker = tmp_path / "imported"
    (tmp_path / "bench_quirks.py").write_text(f"open({str(marker)!r}, 'w').close()\n"
                                              "def fix(volts, timebase, *, channel, session):\n"
                                              "    return volts, timebase\n")
    monkeypatch.syspath_prepend(str(tmp_path))
    monkeypatch.delenv("ACQD_HOOK_MODULES", raising=False)
    path = variant(tmp_path, "scpi-digitiser", 'channels = { CH1 = 1',
                   'hooks = { after_fetch = "bench_quirks:fix" }\nchannels = { CH1 = 1')
    with pytest.raises(ConfigError, match="ACQD_HOOK_MODULES"):
        load_driver(path)
    assert not marker.exists()
    monkeypatch.setenv("ACQD_HOOK_MODULES", "bench_quirks")
    assert load_driver(path).hooks["after_fetch"].__name__ == "fix" and marker.exists()


def test_own_hooks_module_is_allowed_without_the_environment(tmp_path, monkeypatch):
    monkeypatch.delenv("ACQD_HOOK_MODULES", raising=False)
    path = variant(tmp_path, "scpi-digitiser", 'channels = { CH1 = 1',
                   'hooks = { after_fetch = "acqd.instruments.hooks:invert" }\nchannels = { CH1 = 1')
    assert load_driver(path).hooks["after_fetch"].__name__ == "invert"


# --- expressions --------------------------------------------------------------------------------------

@pytest.mark.parametrize("text", ["window_s / 10", "-round(pretrigger_fraction * n_samples)",
                                  "max(abs(a - 3), 2) * (a + 1)", "min(a, 2.5)"])
def test_expression_values_equal_python_arithmetic(text):
    values = {"window_s": 2e-4, "pretrigger_fraction": 0.2, "n_samples": 2000, "a": -1.5}
    expression = Expression.parse(text, values)
    # Reference: Python evaluating the same text (test-only, on constant inputs).
    assert expression.evaluate(values) == eval(text, {"round": round, "abs": abs, "min": min, "max": max}, values)


@pytest.mark.parametrize("text", ["__import__('os')", "a.real", "a[0]", "a ** 2", "(lambda: 1)()",
                                  "a if a else 1", "'text'", "round(a, ndigits=1)", "open('x')", "a == 1"])
def test_expression_whitelist_refuses_everything_else(text):
    with pytest.raises(ExpressionError):
        Expression.parse(text, ["a"])


def test_expression_division_by_zero_is_an_expression_error():
    with pytest.raises(ExpressionError):
        Expression.parse("1 / a", ["a"]).evaluate({"a": 0})


# --- search -------------------------------------------------------------------------------------------

def test_find_driver_by_name_path_and_environment(tmp_path, monkeypatch):
    assert find_driver("divscope") == DRIVERS / "divscope.toml"
    assert find_driver(str(DRIVERS / "divscope.toml")) == DRIVERS / "divscope.toml"
    own = tmp_path / "divscope.toml"  # a bench's own copy hides the shipped one
    shutil.copy(DRIVERS / "divscope.toml", own)
    monkeypatch.setenv("ACQD_DRIVERS", str(tmp_path))
    assert find_driver("divscope") == own
    with pytest.raises(ConfigError) as info:
        find_driver("no-such-driver")
    assert all(name in one_line(info.value) for name in SHIPPED) and "ACQD_DRIVERS" in str(info.value)


# --- command line -------------------------------------------------------------------------------------

def test_cli_drivers_lists_the_shipped_files(capsys):
    assert acqd_main(["drivers"]) == 0
    out = capsys.readouterr().out
    assert all(name in out for name in SHIPPED)


def test_cli_identify_names_the_fitting_driver(sim_bench, capsys):
    bench = sim_bench()
    assert acqd_main(["identify", bench.resources["divscope"]]) == 0
    assert "driver: divscope" in capsys.readouterr().out


def test_cli_identify_unreachable_is_one_line_exit_2(capsys):
    import socket
    sock = socket.socket()
    sock.bind(("127.0.0.1", 0))
    resource = f"TCPIP0::127.0.0.1::{sock.getsockname()[1]}::SOCKET"
    sock.close()
    assert acqd_main(["identify", resource, "--timeout-s", "1"]) == 2
    err = capsys.readouterr().err.strip()
    assert err.count("\n") == 0 and resource in err and "unreachable" in err
