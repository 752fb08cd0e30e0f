"""Bad input of every kind a probe found: each case one clear ``acqd: error:`` line on stderr naming where
(the file, the option or the resource) and what is allowed, a non-zero status, in under 10 s, and never a
traceback (an exception escaping ``acqd.cli.main`` fails the case).

References: POSIX mkfifo(3) (a FIFO is not a regular file); Python's float (IEEE 754 binary64: 1e308 is
near its largest finite value, 1.797e308, so its square overflows); pyvisa's resource-name grammar
(``TCPIP[board]::host::port::SOCKET``, "::"-separated, so an IPv6 host cannot be written in it).
"""

from __future__ import annotations

import os
from collections.abc import Callable
from pathlib import Path

import pytest

from badinput import assert_one_clear_line
from test_run import DEMO, profile_file


def _profile(*replacements: tuple[str, str]) -> Callable[[Path], list[str]]:
    return lambda tmp: ["run", str(profile_file(tmp, *replacements)), "-n", "1"]


def _fifo_out(tmp: Path) -> list[str]:
    fifo = tmp / "pipe"
    os.mkfifo(fifo)
    return ["run", str(DEMO), "-n", "1", "--out", str(fifo)]


def _huge_csv(tmp: Path) -> list[str]:
    rows = [f"{k * 1e-6},{0 if k < 20 else 1e308},{0 if k < 25 else 1.7e308}" for k in range(200)]
    path = tmp / "huge.csv"
    path.write_text("t,v_src,v_c\n" + "\n".join(rows) + "\n")
    return ["compare", str(path), "--model", "series_rlc", "--param", "r_ohm=22", "--param", "l_h=3.3e-3",
            "--param", "c_f=100e-9", "--map", "v_src=v_src", "--map", "v_c=v_c", "--stimulus-channel", "v_src",
            "--high", "1"]


def _nested_toml(tmp: Path) -> list[str]:
    path = tmp / "deep.toml"
    path.write_text("a = " + "[" * 100_000 + "]" * 100_000 + "\n")
    return ["run", str(path)]


def _not_a_store(tmp: Path) -> list[str]:
    path = tmp / "notes.h5"
    path.write_text("not HDF5\n")
    return ["ls", str(path)]


# case: (command line built in tmp_path, words the one line must contain)
CASES: dict[str, tuple[Callable[[Path], list[str]], tuple[str, ...]]] = {
    "--out is a FIFO": (_fifo_out, ("pipe", "not a regular file")),
    "GPIB without a GPIB library": (lambda tmp: ["identify", "GPIB0::5::INSTR"], ("GPIB0::5::INSTR", "cannot open")),
    "serial without pyserial": (lambda tmp: ["identify", "ASRL/dev/ttyS99::INSTR"], ("ASRL", "cannot open")),
    "sim --host ::1": (lambda tmp: ["sim", "--host", "::1"], ("--host", "IPv6", "127.0.0.1")),
    "sim --host remote": (lambda tmp: ["sim", "--host", "192.0.2.7"], ("--host", "--allow-remote")),
    "CSV values near 1e308": (_huge_csv, ("huge.csv", "line 22", "beyond")),
    "400-digit high_v": (_profile(("high_v = 1.0", "high_v = 1" + "0" * 400)), ("stimulus.high_v", "finite")),
    "TOML nested 100,000 deep": (_nested_toml, ("deep.toml", "nested too deeply")),
    "report --out in a missing folder": (lambda tmp: ["report", str(tmp / "none.h5"), "-o", "/proc/nope/r.html"],
                                         ("none.h5",)),
    "a generator driver as the scope": (_profile(('driver = "scpi-digitiser"', 'driver = "scpi-generator"')),
                                        ("bench.scope.driver", "generator driver")),
    "a library path as the backend": (_profile(('driver = "scpi-generator"',
                                                'driver = "scpi-generator"\nbackend = "./libsomething.so"')),
                                      ("bench.generator.backend", "@py")),
    "--count 0": (lambda tmp: ["run", str(DEMO), "-n", "0"], ("--count", "1 or more")),
    "not a store": (_not_a_store, ("notes.h5", "not an acqd record file")),
    "--records 0-999999999": (lambda tmp: ["run", str(DEMO), "--replay", str(tmp / "s.h5"), "--records",
                                           "0-999999999"], ("--records", "at most 1,000,000")),
    "a 10 MB channel name": (_profile(('name = "v_c"', f'name = "{"v" * 10_000_000}"')),
                             ("acquisition.channels.CH3.name", "at most 4,096")),
    "ESC in a channel name": (_profile(('name = "v_c"', 'name = "v\\u001b]0;owned\\u0007c"')),
                              ("acquisition.channels.CH3.name", "control character")),
}


@pytest.mark.parametrize("case", sorted(CASES))
def test_bad_input_is_one_clear_line(tmp_path: Path, case: str, capsys) -> None:
    build, words = CASES[case]
    assert_one_clear_line(build(tmp_path), words, capsys)
