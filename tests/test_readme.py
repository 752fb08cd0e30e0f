"""The README's examples are run, and what they print is compared with what the README shows.

Every ``console`` and ``python`` block runs, in README order, in one working directory holding a copy of
``profiles/`` (as the tour says it was made), unless the line before it is a directive::

    <!-- readme-test: skip (why) -->                 not run; the reason says what covers it instead
    <!-- readme-test: write FILE from SOURCE -->     (a toml block) FILE = SOURCE's text + the block
    <!-- readme-test: sim [PROFILE] -->              with ``acqd sim [PROFILE] --json`` serving: a console
                                                     block's ``TCPIP0::127.0.0.1::PORT::SOCKET`` becomes the
                                                     scope's resource; a python block gets
                                                     ``first_line_of_acqd_sim_json``, and what it prints
                                                     must stand in the README after the block, in backticks
    <!-- readme-test: interrupt after 'TEXT' -->     Ctrl-C (SIGINT) once the output shows TEXT
    <!-- readme-test: numbers vary (why) -->         numbers and verdict words are compared as placeholders

The stable parts are compared exactly: times, ports, durations and paths are placeholders on both
sides, and a line ``…`` in the README stands for any number of lines.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import signal
import subprocess
import sys
from dataclasses import dataclass
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
README = ROOT / "README.md"
DIRECTIVE = re.compile(r"^<!-- readme-test: (.*) -->$")
FENCE = re.compile(r"^```(\w*)$")
# Where the README's outputs were made: the checkout and the tour's working directory.
README_ROOT, README_WORK = "/work/main", "/tmp/tour"
TIMEOUT_S = 120


@dataclass
class Block:
    line: int  # 1-based line of the opening fence
    language: str
    text: str
    directive: str

    def __str__(self) -> str:
        return f"README.md line {self.line}"


def readme_blocks() -> list[Block]:
    lines = README.read_text(encoding="utf-8").splitlines()
    blocks, k = [], 0
    while k < len(lines):
        fence = FENCE.match(lines[k])
        if not fence:
            k += 1
            continue
        end = next(j for j in range(k + 1, len(lines)) if lines[j] == "```")
        before = next((lines[j] for j in range(k - 1, -1, -1) if lines[j].strip()), "")
        directive = DIRECTIVE.match(before)
        blocks.append(Block(k + 1, fence.group(1), "\n".join(lines[k + 1:end]), directive.group(1) if directive else ""))
        k = end + 1
    return blocks


def runnable(block: Block) -> bool:
    if block.directive.startswith("skip"):
        return False
    return block.language in ("console", "python") or block.directive.startswith("write ")


@dataclass
class Step:
    command: str
    expected: list[str]


def console_steps(text: str) -> list[Step]:
    """``$ command`` lines (with ``\\`` continuations) and the output lines after each."""
    steps: list[Step] = []
    lines = text.splitlines()
    k = 0
    while k < len(lines):
        line = lines[k]
        if line.startswith("$ "):
            command = [line[2:]]
            while command[-1].endswith("\\") and k + 1 < len(lines):
                k += 1
                command.append(lines[k])
            steps.append(Step("\n".join(command), []))
        elif steps:
            steps[-1].expected.append(line)
        else:
            raise AssertionError(f"output before any command: {line!r}")
        k += 1
    return steps


def normalised(text: str, work: Path, numbers: bool = False) -> list[str]:
    """Placeholders for what changes from run to run; one space for runs of spaces (table padding)."""
    text = text.replace(str(work), "<work>").replace(README_WORK, "<work>")
    text = text.replace(str(ROOT), "<root>").replace(README_ROOT, "<root>")
    text = re.sub(r"\d{4}-\d\d-\d\d[T ]\d\d:\d\d:\d\d(\.\d+)?(\+00:00)?", "<time>", text)
    text = re.sub(r"127\.0\.0\.1::\d+", "127.0.0.1::<port>", text)
    text = re.sub(r"127\.0\.0\.1::hislip(\d),\d+", r"127.0.0.1::hislip\1,<port>", text)
    text = re.sub(r"127\.0\.0\.1,\d+::", "127.0.0.1,<port>::", text)
    text = re.sub(r"duration_s=[\d.]+", "duration_s=<s>", text)
    text = re.sub(r"pid \d+", "pid <pid>", text)
    if numbers:
        text = re.sub(r"[-+]?\d+(\.\d+)?(e[-+]?\d+)?", "<n>", text)
        text = re.sub(r"<n> [pnµmkM](?=[A-Za-zΩ])", "<n> ", text)  # 438.0 mΩ/h one run, 3.017 Ω/h the next
        text = re.sub(r"\b(pass|fail|PASS|FAIL)\b", "<verdict>", text)
        text = re.sub(r"\b[PF]+\b", "<verdicts>", text)
    text = re.sub(r"([━─═]+)", "━", text)
    return [re.sub(r" +", " ", line).strip() for line in text.splitlines()]


def matches(expected: list[str], actual: list[str]) -> bool:
    """Line by line, ``…`` in ``expected`` standing for any run of lines."""
    pattern = "".join(r"(?:[^\n]*\n)*?" if line == "…" else re.escape(line) + r"\n" for line in expected)
    return re.fullmatch(pattern, "".join(line + "\n" for line in actual)) is not None


def environment(work: Path) -> dict[str, str]:
    env = {k: v for k, v in os.environ.items() if k not in ("COLUMNS", "LINES", "FORCE_COLOR", "HDF5_VDS_PREFIX")}
    env["PATH"] = f"{Path(sys.executable).parent}{os.pathsep}{env.get('PATH', '')}"  # acqd beside this python
    env["HOME"] = str(work)
    return env


@pytest.fixture(scope="module")
def workspace(tmp_path_factory: pytest.TempPathFactory) -> Path:
    work = tmp_path_factory.mktemp("tour")
    shutil.copytree(ROOT / "profiles", work / "profiles")
    return work


class Sim:
    """``acqd sim [PROFILE] --json`` for the length of one block."""

    def __init__(self, work: Path, profile: str) -> None:
        args = [sys.executable, "-m", "acqd", "sim", *([profile] if profile else []), "--json"]
        self.process = subprocess.Popen(args, cwd=work, env=environment(work), stdout=subprocess.PIPE,
                                        stderr=subprocess.PIPE, text=True)
        self.first_line = self.process.stdout.readline().strip()
        assert self.first_line, self.process.stderr.read()
        self.resources = json.loads(self.first_line)

    def stop(self) -> None:
        self.process.send_signal(signal.SIGINT)
        self.process.communicate(timeout=30)


OUTSIDE_TOOLS = ("h5dump", "jq")
"""Programs from Debian's packages the README's blocks use beside acqd; `.ci/run` installs them."""


def skip_without_outside_tools(steps: list) -> None:
    """A block that reads with h5dump or jq is skipped where the tool is missing, as the README promises."""
    for tool in OUTSIDE_TOOLS:
        if any(re.search(rf"(^|[|;&(\s]){tool}\b", s.command) for s in steps) and shutil.which(tool) is None:
            pytest.skip(f"{tool} is not installed (.ci/run installs it)")


def run_console(block: Block, work: Path, sim: Sim | None) -> None:
    steps = console_steps(block.text)
    skip_without_outside_tools(steps)
    if block.directive.startswith("interrupt after"):
        (step,) = steps
        outputs = [interrupted(step.command, block.directive.split("'")[1], work)]
    else:
        outputs = run_script([s.command for s in steps], work, sim)
    numbers = block.directive.startswith("numbers vary")
    for step, output in zip(steps, outputs):
        want, got = normalised("\n".join(step.expected), work, numbers), normalised(output, work, numbers)
        assert matches(want, got), (f"{block}: `{step.command}` printed\n" + output
                                    + "\nwhere the README shows\n" + "\n".join(step.expected))


def run_script(commands: list[str], work: Path, sim: Sim | None) -> list[str]:
    """The commands in one shell (so ``echo $?`` sees the one before), each one's output apart."""
    marker = "@@readme-test-step@@"
    script = []
    for command in commands:
        if sim is not None:
            command = re.sub(r"TCPIP0::127\.0\.0\.1::\d+::SOCKET", sim.resources["scope"], command)
        script.append(f"{{ {command}\n}} 2>&1; __status=$?; printf '\\n{marker}\\n'; (exit $__status)")
    done = subprocess.run(["bash", "-c", "\n".join(script)], cwd=work, env=environment(work), capture_output=True,
                          text=True, timeout=TIMEOUT_S)
    parts = done.stdout.split(f"\n{marker}\n")
    assert len(parts) == len(commands) + 1, done.stdout + done.stderr
    return parts[:-1]


def interrupted(command: str, text: str, work: Path) -> str:
    process = subprocess.Popen(["bash", "-c", f"exec {command}"], cwd=work, env=environment(work),
                               stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
    lines = []
    for line in process.stdout:
        lines.append(line)
        if text in line:
            break
    process.send_signal(signal.SIGINT)
    rest, _ = process.communicate(timeout=30)
    return "".join(lines) + rest


def run_python(block: Block, work: Path, sim: Sim | None) -> None:
    code = block.text
    if sim is not None:
        code = f"first_line_of_acqd_sim_json = {sim.first_line!r}\n" + code
    done = subprocess.run([sys.executable, "-c", code], cwd=work, env=environment(work), capture_output=True,
                          text=True, timeout=TIMEOUT_S)
    assert done.returncode == 0, f"{block}:\n{done.stderr}"
    printed = done.stdout.strip()
    if sim is not None and printed:
        after = README.read_text(encoding="utf-8").split(block.text, 1)[1]
        assert f"`{printed}`" in after.split("\n\n", 2)[1], f"{block} printed `{printed}`, which the README does not show"


def write_file(block: Block, work: Path) -> None:
    _, target, _, source = block.directive.split()
    text = (work / source).read_text(encoding="utf-8") if source != "nothing" else ""
    (work / target).write_text(text + "\n" + block.text + "\n", encoding="utf-8")


@pytest.mark.parametrize("block", [b for b in readme_blocks() if runnable(b)], ids=str)
def test_readme_block(block: Block, workspace: Path) -> None:
    if block.directive.startswith("write "):
        write_file(block, workspace)
        return
    sim = None
    if block.directive.startswith("sim"):
        sim = Sim(workspace, block.directive[len("sim"):].strip())
    try:
        (run_console if block.language == "console" else run_python)(block, workspace, sim)
    finally:
        if sim is not None:
            sim.stop()


def test_every_skipped_block_says_why() -> None:
    for block in readme_blocks():
        if block.directive.startswith("skip"):
            assert re.fullmatch(r"skip \(.{10,}\)", block.directive), f"{block}: skip (and the reason)"
        assert block.directive == "" or re.match(r"(skip|write|sim|interrupt after|numbers vary)\b", block.directive)


# Each line of the README's "When a profile is wrong" block, made from the demo profile with one change.
BROKEN_PROFILES = [
    [("frequency_hz = 200.0", "frequncy_hz = 200.0")],
    [("window_s = 1.5e-3", "window = 1.5e-3")],
    [('edge = "rising"', 'edge = "up"')],
    [("high_v = 1.0", "high_v = 2.5")],
    [('v_c = "v_c"', 'v_c = "v_cap"')],
    [('CH3 = "v_c"', 'CH3 = "v_x"')],
    [('driver = "scpi-digitiser"', 'driver = "scpi-digitser"')],
    [("max_level_v = 2.0", "max_level_v = 10.0"), ("high_v = 1.0", "high_v = 6.0"), ('load = "high_z"', 'load = "matched"')],
]


def test_profile_error_examples(tmp_path: Path) -> None:
    (block,) = [b for b in readme_blocks() if "$ acqd run night.toml" in b.text]
    (step,) = console_steps(block.text)
    demo = (ROOT / "profiles" / "demo-bridge-filter.toml").read_text(encoding="utf-8")
    printed = []
    for changes in BROKEN_PROFILES:
        text = demo
        for old, new in changes:
            assert text.count(old) == 1, old
            text = text.replace(old, new)
        (tmp_path / "night.toml").write_text(text, encoding="utf-8")
        done = subprocess.run([sys.executable, "-m", "acqd", "run", "night.toml"], cwd=tmp_path, capture_output=True,
                              text=True, timeout=TIMEOUT_S, env=environment(tmp_path))
        assert done.returncode == 2 and done.stdout == "", done.stdout + done.stderr  # no caution, nothing run
        printed.append(done.stderr.strip())
    assert normalised("\n".join(printed), tmp_path) == normalised("\n".join(step.expected), tmp_path), "\n".join(printed)
