"""What every bad-input case shares: run ``acqd.cli.main`` in this process and check that the answer is one
clear line.

A case passes when ``main`` returns status 2 with exactly one line on stderr, that line starts with
``acqd: error:``, names what it was told (the file, the option or the field: every word given), and the
whole took under 10 s and raised the process's peak resident memory by less than 512 MiB. An exception
that escapes ``main`` (a traceback) fails the case by itself.
"""

from __future__ import annotations

import resource
import time

from acqd.cli import main

MAX_SECONDS = 10.0
MAX_GROWTH_KIB = 512 * 1024  # getrusage(2): ru_maxrss is the peak resident set, in KiB on Linux


def assert_one_clear_line(argv: list[str], words: tuple[str, ...], capsys) -> str:
    """Run ``acqd ARGV``; assert the one-line contract and return the line."""
    peak_before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    started = time.monotonic()
    status = main(argv)
    elapsed_s = time.monotonic() - started
    growth_kib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss - peak_before
    _, err = capsys.readouterr()
    lines = err.strip().splitlines()
    assert status == 2 and len(lines) == 1 and lines[0].startswith("acqd: error: "), (status, err)
    missing = [word for word in words if word not in lines[0]]
    assert not missing, f"{lines[0]!r} does not name {missing}"
    assert elapsed_s < MAX_SECONDS, f"took {elapsed_s:.1f} s"
    assert growth_kib < MAX_GROWTH_KIB, f"peak memory grew by {growth_kib / 1024:.0f} MiB"
    return lines[0]
