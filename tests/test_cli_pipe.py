"""The command line as a shell user meets it: ``--version``, and a reader that closes the pipe early."""

from __future__ import annotations

import subprocess
import sys

import pytest

import acqd

ACQD = [sys.executable, "-m", "acqd"]


def test_version_names_the_package_version():
    proc = subprocess.run([*ACQD, "--version"], capture_output=True, text=True, timeout=60)
    assert (proc.returncode, proc.stdout.strip()) == (0, f"acqd {acqd.__version__}")


@pytest.mark.parametrize("args", [["drivers"], ["sim", "--json"]], ids=["rich table", "plain json line"])
def test_a_reader_that_goes_away_ends_the_command_quietly(args):
    # `acqd ... | head -0`: the read end is closed before acqd writes, so its first write meets EPIPE
    # (Python ignores SIGPIPE, so it is a BrokenPipeError). No traceback (the simulated bench may still
    # say in one line that it stopped), and a non-zero status (1, as rich's own console exits), so
    # `set -o pipefail` still sees the output was not all read.
    proc = subprocess.Popen([*ACQD, *args], stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    proc.stdout.close()
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == 1 and b"Traceback" not in err and len(err.splitlines()) <= 1, err
