"""``acqd sim`` / ``acqd replay`` as a child process for the length of a test, stopped as a service is."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any


@contextmanager
def serving(*args: str) -> Iterator[dict[str, Any]]:
    """Start ``acqd ARGS --json``, yield the resources of its first line; on leaving, SIGTERM must end it
    with status 0 within 20 s (its clean stop), and it is killed if anything failed before that."""
    proc = subprocess.Popen([sys.executable, "-m", "acqd", *args, "--json"], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True, env={**os.environ, "PYTHONUNBUFFERED": "1"})
    try:
        yield json.loads(proc.stdout.readline())
        proc.send_signal(signal.SIGTERM)
        assert proc.wait(timeout=20) == 0, proc.stderr.read()
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
