"""Text from profiles, stored records and paths is printed as text: rich markup in it is not markup, and the
control characters in it never reach the terminal.

Run in a real pseudo-terminal (``os.openpty``), so rich's progress bar and styles are on, as for a person
at the bench, and through a pipe. References: rich's markup syntax (``[/x]`` closes a tag; an unmatched one
raises ``MarkupError``, rich's documentation "Console Markup"); ECMA-48 (ESC, 0x1B, introduces control
sequences; ``ESC ] 0 ; text BEL`` is the xterm operating-system command that sets the window title, from
memory).
"""

from __future__ import annotations

import dataclasses
import os
import subprocess
import sys
from pathlib import Path

from acqd.store import RecordStore
from test_run import profile_file
from test_store import make_record

ACQD = [sys.executable, "-m", "acqd"]
TITLE = "\x1b]0;owned\x07"  # would set the terminal's title


def in_terminal(argv: list[str], cwd: Path) -> tuple[int, str]:
    """Run ``argv`` with a pseudo-terminal as its stdin, stdout and stderr; (status, everything it wrote)."""
    master, slave = os.openpty()
    env = {**os.environ, "TERM": "xterm-256color", "COLUMNS": "160", "LINES": "50"}
    proc = subprocess.Popen(argv, stdin=slave, stdout=slave, stderr=slave, cwd=cwd, env=env)
    os.close(slave)
    chunks = []
    while True:
        try:
            data = os.read(master, 65536)
        except OSError:  # EIO: the child closed the terminal
            break
        if not data:
            break
        chunks.append(data)
    os.close(master)
    return proc.wait(timeout=120), b"".join(chunks).decode("utf-8", "replace")


def test_markup_in_names_and_paths_is_printed_as_text(tmp_path: Path) -> None:
    folder = tmp_path / "a[/x]"
    folder.mkdir(parents=True)  # the folder "a[" with "x]" in it
    profile = profile_file(tmp_path, ('name = "kt9-input-filter"', 'name = "[/bold]kt9"'),
                           ('name = "v_c"', 'name = "v_x[/x]"'), ('v_c = "v_c"', '"v_x[/x]" = "v_c"'),
                           ("[dut.tolerances.channels.v_c]", '[dut.tolerances.channels."v_x[/x]"]'))
    store = folder / "s.h5"
    profile.write_text(profile.read_text().replace(str(tmp_path / "records.h5"), str(store)))
    status, out = in_terminal([*ACQD, "run", str(profile), "-n", "2"], tmp_path)
    assert status == 0 and "Traceback" not in out, out
    assert "v_x[/x]" in out and f"stored in {store}" in out
    for command in (["ls", str(store)], ["show", str(store)], ["show", "-r", "0", str(store)]):
        status, out = in_terminal([*ACQD, *command], tmp_path)
        assert status == 0 and "Traceback" not in out, out
        assert "v_x[/x]" in out


def test_control_characters_from_a_stored_record_never_reach_the_terminal(tmp_path: Path) -> None:
    record = make_record(1)
    record.channels[0] = dataclasses.replace(record.channels[0], name=f"v{TITLE}c", unit=f"V{TITLE}")
    record.dut = {"name": f"unit {TITLE}"}
    store = tmp_path / "s.h5"
    with RecordStore(store) as writer:
        writer.append(record)
    for command in (["ls", str(store)], ["show", str(store)], ["show", "--json", str(store)]):
        status, out = in_terminal([*ACQD, *command], tmp_path)
        assert status == 0 and "Traceback" not in out, out
        assert "\x1b]" not in out and "\x07" not in out  # rich itself writes only CSI (ESC [) sequences
        piped = subprocess.run([*ACQD, *command], capture_output=True, text=True, cwd=tmp_path)
        assert piped.returncode == 0 and "\x1b" not in piped.stdout and "\x07" not in piped.stdout
