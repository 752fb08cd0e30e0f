"""The class of bad command lines: every option that takes a value, given values it must refuse — numbers
that are not numbers, negative, fractional, not finite or with 400 digits; paths in a folder that does not
exist, under /proc, a FIFO, /dev/null (through a link to it, so a command that replaced it would only
replace the link), a folder where a file is meant or a file where a folder is; and
the files a command reads (profile, store) missing, empty, binary, a FIFO or a folder.
Each case runs ``acqd.cli.main`` in this process and must be one ``acqd: error:`` line naming the option
or the path (``badinput.assert_one_clear_line``), never a hang on a FIFO.

References: POSIX mkfifo(3) (opening a FIFO for reading blocks until a writer comes, so a reader must look
before it opens); Linux proc(5) (nothing can be created under /proc); IEEE 754 binary64 (``nan`` and
``inf`` parse as Python floats); RFC 3986 (a URL's scheme).
"""

from __future__ import annotations

import os

import pytest

from acqd.cli import main
from badinput import assert_one_clear_line
from test_run import DEMO

# A command line the bad value goes into; {store}, {csv}, {profile}, {dir}, {file} stand for the fixture files.
BASES: dict[str, list[str]] = {
    "run": ["run", "{profile}", "-n", "1"],
    "ls": ["ls", "{store}"],
    "show": ["show", "{store}"],
    "export": ["export", "{store}", "-o", "{dir}/r.csv"],
    "report": ["report", "{store}", "-o", "{dir}/r.html"],
    "drift": ["drift", "{store}"],
    "compare": ["compare", "{csv}", "--model", "series_rlc", "--param", "r_ohm=22", "--param", "l_h=3.3e-3",
                "--param", "c_f=100e-9", "--map", "v_src=v_src", "--map", "v_c=v_c", "--stimulus-channel",
                "v_src", "--high", "1"],
    "compare-store": ["compare", "{store}", "-p", "{profile}"],
    "status": ["status", "-d", "{dir}"],
    "identify": ["identify", "TCPIP0::127.0.0.1::9::SOCKET", "--timeout-s", "0.5"],
    "sim": ["sim"],
    "plan": ["plan", "{profile}"],
}
NOT_WHOLE = {"a word": "x", "negative": "-1", "a fraction": "1.5", "1e999": "1e999", "400 digits": "9" * 400}
NOT_FINITE = {"a word": "x", "nan": "nan", "inf": "inf", "-inf": "-inf", "1e999": "1e999"}
# (base, option, allowed minimum of a whole number)
WHOLE_OPTIONS = (("run", "--count"), ("show", "--record"), ("export", "--record"), ("report", "--last"),
                 ("drift", "--last"), ("compare-store", "--record"), ("sim", "--hislip-port"),
                 ("sim", "--vxi11-port"))
NUMBER_OPTIONS = (("identify", "--timeout-s"), ("compare", "--nrmse-max"), ("compare", "--parameter-pct"),
                  ("compare", "--settling-band-pct"), ("compare", "--low"), ("compare", "--high"),
                  ("compare", "--edge-time"), ("compare", "--source-resistance"))
# (base, option) → values that are not among those allowed: native code by path, unknown names, bad lists
WORD_OPTIONS = {("identify", "--backend"): ("./libsomething.so", "/usr/lib/libc.so.6", "@nothing", ""),
                ("sim", "--transport"): ("telnet", ""), ("sim", "--host"): ("::1", "192.0.2.7", "no host here"),
                ("compare", "--model"): ("no_such_model",), ("compare", "--weighting"): ("loud",),
                ("compare", "--edge"): ("up",), ("compare", "--load"): ("75_ohm",),
                ("compare", "--map"): ("v_c", "=v_c"), ("compare", "--param"): ("r_ohm", "r_ohm=nan"),
                ("compare", "--overshoot"): ("v_c=60:45x",), ("report", "--full"): ("x", "0-99999999999")}
# (base, option, what the option names): paths a command writes
OUT_OPTIONS = (("run", "--out", "file"), ("export", "--out", "file"), ("report", "--out", "file"),
               ("drift", "--figures", "folder"), ("compare", "--figures", "folder"))
# (base, the argument that names a file it reads, by its position in the base)
READ_ARGUMENTS = (("run", 1), ("ls", 1), ("show", 1), ("export", 1), ("report", 1), ("drift", 1),
                  ("compare-store", 1), ("compare-store", 3), ("plan", 1))


def _set(argv: list[str], option: str, value: str) -> list[str]:
    """``argv`` with ``option value``: replaced where it stands, else added."""
    argv = list(argv)
    if option in argv:
        argv[argv.index(option) + 1] = value
    else:
        argv += [option, value]
    return argv


def _bad_paths(kind: str) -> dict[str, str]:
    """Where a file (or a folder) cannot be written, by a name for the case."""
    paths = {"in a missing folder under /proc": "/proc/nope/out", "under /proc": "/proc/acqd-out",
             "a FIFO": "{fifo}", "/dev/null": "{null}"}
    paths.update({"a folder": "{dir}"} if kind == "file" else {"a file": "{file}"})
    return paths


def _cases() -> dict[str, tuple[list[str], tuple[str, ...]]]:
    cases: dict[str, tuple[list[str], tuple[str, ...]]] = {}
    for base, option in WHOLE_OPTIONS:
        for name, value in NOT_WHOLE.items():
            cases[f"{base} {option} {name}"] = (_set(BASES[base], option, value), (option,))
    for base, option in NUMBER_OPTIONS:
        for name, value in NOT_FINITE.items():
            cases[f"{base} {option} {name}"] = (_set(BASES[base], option, value), (option,))
    for (base, option), values in WORD_OPTIONS.items():
        for value in values:
            cases[f"{base} {option} {value!r}"] = (_set(BASES[base], option, value), (option,))
    for base, option, kind in OUT_OPTIONS:
        for name, value in _bad_paths(kind).items():
            suffix = {"run": ".h5", "export": ".csv", "report": ".html"}.get(base, "") if "{" not in value else ""
            path = value + suffix if value.startswith("/proc") else value
            cases[f"{base} {option} {name}"] = (_set(BASES[base], option, path), (path,))
    for base, at in READ_ARGUMENTS:
        for name, value in {"missing": "{dir}/nothing-here", "a folder": "{dir}", "a FIFO": "{fifo}",
                            "/dev/null": "{null}", "empty": "{empty}", "binary": "{binary}"}.items():
            argv = list(BASES[base])
            argv[at] = value
            cases[f"{base} reads {name}"] = (argv, (value,))
    return cases


CASES = _cases()


@pytest.fixture(scope="module")
def files(tmp_path_factory: pytest.TempPathFactory) -> dict[str, str]:
    """The fixture files the command lines name: a store of two demo records, a CSV, the demo profile, ..."""
    tmp = tmp_path_factory.mktemp("options")
    rows = [f"{k * 1e-6:.6g},{0 if k < 20 else 1},{0 if k < 25 else 1}" for k in range(200)]
    (tmp / "r.csv").write_text("t,v_src,v_c\n" + "\n".join(rows) + "\n")
    profile = tmp / "p.toml"
    profile.write_text(DEMO.read_text().replace('file = "data/kt9-demo.h5"', f'file = "{tmp / "records.h5"}"'))
    assert main(["run", str(profile), "-n", "2", "--out", str(tmp / "s.h5")]) == 0  # two records of the demo
    (tmp / "plain").write_text("a file\n")
    (tmp / "empty").write_bytes(b"")
    (tmp / "binary").write_bytes(bytes(range(256)) * 8)
    os.mkfifo(tmp / "fifo")
    (tmp / "null").symlink_to("/dev/null")  # /dev/null itself, but a command that replaced it replaces the link
    (tmp / "dir").mkdir()
    return {"store": str(tmp / "s.h5"), "csv": str(tmp / "r.csv"), "profile": str(profile), "dir": str(tmp / "dir"),
            "file": str(tmp / "plain"), "empty": str(tmp / "empty"), "binary": str(tmp / "binary"),
            "fifo": str(tmp / "fifo"), "null": str(tmp / "null")}


def _filled(argv: list[str], files: dict[str, str]) -> list[str]:
    return [word.format(**files) for word in argv]


@pytest.mark.parametrize("base", sorted(b for b in BASES if b not in ("sim", "status", "identify")))
def test_each_base_command_line_is_good(base: str, files: dict[str, str], capsys) -> None:
    """The cases' starting point is accepted, so each case's error is its one bad value."""
    assert main(_filled(BASES[base], files)) in (0, 1), capsys.readouterr().err


@pytest.mark.timeout(20)
@pytest.mark.parametrize("case", sorted(CASES))
def test_bad_option_is_one_clear_line(case: str, files: dict[str, str], capsys) -> None:
    argv, words = CASES[case]
    assert_one_clear_line(_filled(argv, files), tuple(_filled(list(words), files)), capsys)

