"""Malformed profiles: each gives one clear line naming the file, the key and what is allowed.

The checks here are about the profile alone; those that need the bench (unknown driver, unknown probe
node) run through `acqd run` in test_run.py, where we also check that nothing reached an instrument.
"""

from pathlib import Path

import pytest

from acqd.errors import ConfigError
from acqd.profile import load_profile

DEMO = Path(__file__).resolve().parents[1] / "profiles" / "demo-bridge-filter.toml"


def variant(tmp_path: Path, old: str, new: str) -> Path:
    text = DEMO.read_text()
    assert old in text, f"test fixture out of date: {old!r} not in the demo profile"
    path = tmp_path / "bad.toml"
    path.write_text(text.replace(old, new, 1))
    return path


def test_demo_profile_loads() -> None:
    p = load_profile(DEMO)
    assert p.stimulus.edges == ("rising",)
    assert [c.name for c in p.acquisition.channels] == ["v_src", "v_rl", "v_c"]
    assert p.math[0].terms == {"v_src": 1.0, "v_rl": -1.0}


# (old text, new text, words the one-line message must contain)
CASES = [
    ("high_v = 1.0", 'high_v = "one"', ["stimulus.high_v", "finite number"]),
    ("high_v = 1.0", "high_v = 3.0", ["stimulus.high_v", "max_level_v", "nothing was sent"]),
    ("high_v = 1.0", "high_v = -0.5", ["stimulus.high_v", "above low_v"]),
    ("window_s = 1.5e-3", "window_s = -1.5e-3", ["acquisition.window_s", "greater than 0"]),
    ("window_s = 1.5e-3", "windw_s = 1.5e-3", ["acquisition.windw_s", "unknown key", "did you mean 'window_s'"]),
    ("samples = 15000", "samples = 15000.5", ["acquisition.samples", "whole number"]),
    ("samples = 15000", "samples = 4", ["acquisition.samples", "from 16"]),
    ("pretrigger_fraction = 0.2", "pretrigger_fraction = 1.5", ["pretrigger_fraction", "at most 0.9"]),
    ('edge = "rising"', 'edge = "up"', ["stimulus.edge", "rising, falling, both"]),
    ('load = "high_z"', 'load = "50"', ["stimulus.load", "high_z, matched"]),
    ('kind = "simulated"', 'kind = "virtual"', ["bench.kind", "simulated, visa"]),
    ('driver = "scpi-generator"\n', "", ["bench.generator.driver", "missing"]),
    ("frequency_hz = 200.0", "frequency_hz = 50e3", ["stimulus.frequency_hz", "at most 10000"]),
    ("range_v = 1.2", "range_v = 0", ["acquisition.channels.CH3.range_v", "greater than 0"]),
    ('name = "v_c"', 'name = "v_rl"', ["acquisition.channels", "unique"]),
    ("terms = { v_src = 1.0, v_rl = -1.0 }", "terms = { v_src = 1.0, v_x = -1.0 }",
     ["math.i_l.terms.v_x", "not a captured channel"]),
    ("divide_by = 22.0", "divide_by = 0.0", ["math.i_l.divide_by", "not be 0"]),
    ('file = "data/kt9-demo.h5"', 'file = "data/kt9-demo.csv"', ["output.file", ".h5"]),
    ("[limits]", "[limitz]", ["limitz", "unknown key"]),
    ("max_level_v = 2.0", "max_level_v = true", ["limits.max_level_v", "finite number"]),
    ('[bench.generator]\ndriver = "scpi-generator"',
     '[bench.generator]\ndriver = "scpi-generator"\nresource = "TCPIP0::127.0.0.1::5025::SOCKET"',
     ["bench.generator.resource", "not allowed on the simulated bench"]),
    ("[stimulus]", "[stimulus\n", ["not valid TOML"]),
    ('model = "series_rlc"\nr_ohm = 22.0', 'modle = "series_rlc"\nr_ohm = 22.0', ["dut.modle", "unknown key"]),
    # Hostile input: a 400-digit level is no float (IEEE 754 binary64 tops out near 1.8e308, common
    # practice), a 5000-digit one is beyond what Python converts; 100,000 nested arrays; a 1 MB name.
    ("high_v = 1.0", "high_v = " + "9" * 400, ["stimulus.high_v", "finite number", "400-digit"]),
    ("high_v = 1.0", "high_v = " + "9" * 5000, ["not valid TOML"]),
    ("high_v = 1.0", "high_v = " + "[" * 100_000 + "]" * 100_000, ["nested too deeply"]),
    ('edge = "rising"', 'edge = "' + "u" * 1_000_000 + '"', ["stimulus.edge", "rising, falling, both", "..."]),
    ('driver = "scpi-generator"\n', 'driver = "scpi-generator"\nbackend = "./libsomething.so"\n',
     ["bench.generator.backend", "@py, @ivi"]),
]


@pytest.mark.parametrize("old,new,words", CASES, ids=[f"{c[2][0]}-{i}" for i, c in enumerate(CASES)])
def test_malformed_profile_is_one_clear_line(tmp_path: Path, old: str, new: str, words: list[str]) -> None:
    path = variant(tmp_path, old, new)
    with pytest.raises(ConfigError) as info:
        load_profile(path)
    message = str(info.value)
    assert "\n" not in message and len(message) < 1000
    assert message.startswith(str(path))
    for word in words:
        assert word in message, message


def test_line_number_is_given(tmp_path: Path) -> None:
    path = variant(tmp_path, "window_s = 1.5e-3", "window_s = -1.5e-3")
    expected = 1 + path.read_text().splitlines().index("window_s = -1.5e-3")
    with pytest.raises(ConfigError, match=f"line {expected}:"):
        load_profile(path)


def test_unreadable_and_missing_files(tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match="file not found"):
        load_profile(tmp_path / "nope.toml")
    binary = tmp_path / "binary.toml"
    binary.write_bytes(b"\xff\xfe\x00bad")
    with pytest.raises(ConfigError, match="cannot be read"):
        load_profile(binary)
