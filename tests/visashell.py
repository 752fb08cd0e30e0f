"""pyvisa's own interactive shell (``pyvisa-shell -b py``) as an independent client, driven through its stdin.

The shell is pyvisa's program, not ours: it parses the resource string, opens the session through
pyvisa-py's client for that transport and prints each reply as ``Response: ...``. A test gives it a script
of shell commands and reads what it printed.
"""

from __future__ import annotations

import shutil
import subprocess
import sys
from collections.abc import Iterable
from pathlib import Path


def shell_command() -> list[str]:
    """``pyvisa-shell`` beside this Python (the venv's), else the one on PATH, with the pyvisa-py backend."""
    beside = Path(sys.executable).with_name("pyvisa-shell")
    found = str(beside) if beside.exists() else shutil.which("pyvisa-shell")
    assert found, "pyvisa-shell not found (pyvisa installs it)"
    return [found, "-b", "py"]


def session_script(resource: str, frequency_hz: int) -> list[str]:
    """Open ``resource`` (LF terminations, 2 s timeout), ask ``*IDN?``, set and read back a frequency, close."""
    return [f"open {resource}", "termchar LF LF", "timeout 2000", "query *IDN?", f"write FREQ {frequency_hz}",
            "query FREQ?", "close"]


def run_shell(lines: Iterable[str], timeout_s: float = 60.0) -> tuple[list[str], str]:
    """Feed ``lines`` (then ``exit``) to the shell; the replies it printed, in order, and all it printed."""
    done = subprocess.run(shell_command(), input="\n".join([*lines, "exit"]) + "\n", capture_output=True,
                          text=True, timeout=timeout_s)
    assert done.returncode == 0, done.stderr
    replies = [part.split("Response: ", 1)[1].strip() for part in done.stdout.split("\n") if "Response: " in part]
    return replies, done.stdout
