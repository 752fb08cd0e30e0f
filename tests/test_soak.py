"""The soak, short: `bench/soak.py` with a few runs, kills and (where a tmpfs can be mounted) a full disk.

What it checks is the store's promise, against an outside record of it: the lines `acqd run` printed
(a record's line is printed only once it is durable) and the records read back afterwards, each with its
CRC-32 checked (zlib's polynomial, ISO 3309). Nothing acknowledged may be lost, given twice or corrupt,
and no run may end in a traceback.
"""

from __future__ import annotations

import re
import subprocess
import sys
from pathlib import Path

SOAK = Path(__file__).resolve().parents[1] / "bench" / "soak.py"


def test_a_short_soak_loses_nothing() -> None:
    done = subprocess.run([sys.executable, str(SOAK), "--records", "20", "--chunk", "10", "--random-kills", "1",
                           "--chosen-kills", "2", "--disk-mib", "24", "--seed", "3"],
                          capture_output=True, text=True, timeout=600)
    assert done.returncode == 0, done.stderr
    figures = {m.group(1).strip(): int(m.group(2)) for m in re.finditer(r"^([a-z ]+?)\s+(\d+)$", done.stdout, re.M)}
    assert figures["acknowledged"] >= 20
    assert figures["present and verifying"] == figures["acknowledged"]
    assert figures["lost"] == figures["duplicated"] == figures["corrupt"] == 0
    assert "TRACEBACK" not in done.stdout and "Traceback" not in done.stderr
