"""A full disk during `acqd run`, on a real small file system: a tmpfs of a few MiB.

Mounting needs root or a user namespace, so the scenario runs in a private mount namespace (``unshare -m``
as root, as CI runs; ``unshare -rm`` otherwise where the kernel allows unprivileged user namespaces) and
is skipped where neither works. The tmpfs exists only inside that namespace and goes away with it. The
simulated bench's TCP servers bind 127.0.0.1 in the host's network namespace as usual (no -n).

What is checked against the outside world: ENOSPC is the kernel's "No space left on device" (errno(3),
strerror text from the C library); records are read back with h5py under SWMR like any other reader; the
generator's output state is what the simulated generator logged receiving.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import h5py
import pytest

try:
    from test_run import profile_file
except ImportError:  # pytest's importlib import mode does not put tests/ on sys.path
    sys.path.insert(0, str(Path(__file__).parent))
    from test_run import profile_file

ACQD = [sys.executable, "-m", "acqd"]
TMPFS_MIB, FILLER_MIB = 6, 4  # room for two to three demo records (~0.6 MiB each) until the filler goes


def _namespace_prefix() -> list[str] | None:
    """The unshare invocation that may mount here, or None (then the test is skipped)."""
    unshare = shutil.which("unshare")
    if unshare is None:
        return None
    for prefix in ([unshare, "-m"], [unshare, "-rm"]) if os.geteuid() == 0 else ([unshare, "-rm"],):
        probe = subprocess.run([*prefix, "sh", "-c", "mount -t tmpfs -o size=1m acqd-probe /mnt"],
                               capture_output=True)
        if probe.returncode == 0:
            return prefix
    return None


PREFIX = _namespace_prefix()


@pytest.mark.skipif(PREFIX is None, reason="cannot mount a tmpfs here (needs root or user namespaces)")
def test_full_disk_stops_the_run_cleanly_and_loses_nothing(tmp_path: Path) -> None:
    disk = tmp_path / "disk"
    disk.mkdir()
    log = tmp_path / "generator.log"
    profile = profile_file(tmp_path, ("seed = 9\n", f'seed = 9\ncommand_log = "{log}"\n'))
    profile.write_text(profile.read_text().replace(str(tmp_path / "records.h5"), str(disk / "night.h5")))
    steps = [
        ["run", str(profile), "-n", "30"],  # fills the disk
        ["run", str(profile), "-n", "1"],   # the disk is still full: recovery cannot write its copy
        ["ls", "--json", str(disk / "night.h5")],
        "free",
        ["run", str(profile), "-n", "2"],   # recovery finishes the segment, the indices go on
        ["ls", "--json", str(disk / "night.h5")],
    ]
    results = _in_namespace(tmp_path, disk, steps)
    first, still_full, ls_full, after, ls_after = results

    # 1. The run that meets the full disk: one line, non-zero status, no traceback, output switched off.
    assert first.returncode != 0
    assert "Traceback" not in first.stderr
    error_lines = first.stderr.strip().splitlines()
    assert len(error_lines) == 1 and "No space left on device" in error_lines[0], first.stderr  # strerror(ENOSPC)
    acknowledged = [line for line in first.stdout.splitlines() if line.startswith("#")]
    assert len(acknowledged) >= 1
    assert output_states(log)[-1] == "OUTPUT OFF"

    # 2. Recovery that cannot write is refused, and the segment is not demoted to .damaged.
    assert still_full.returncode != 0 and "Traceback" not in still_full.stderr
    assert len(still_full.stderr.strip().splitlines()) == 1 and "cannot be recovered" in still_full.stderr
    names = json.loads(ls_full.stdout)
    assert ls_full.returncode == 0 and len(names) == len(acknowledged)  # every acknowledged record listed
    assert not list(tmp_path.glob("disk-after/*.damaged"))

    # 3. Space freed: the next run recovers and continues after the last acknowledged index.
    assert after.returncode == 0, after.stderr
    listed = [r["index"] for r in json.loads(ls_after.stdout)]
    assert listed == list(range(len(acknowledged) + 2))  # no index given twice, none lost
    for segment in sorted((tmp_path / "disk-after").glob("night.*.h5")):
        with h5py.File(segment, "r") as f:  # plain closed HDF5 after recovery (h5py, no SWMR)
            assert f["index"].shape[0] == f["samples"].shape[0]


def output_states(log: Path) -> list[str]:
    """The OUTPut state commands the simulated generator logged (``time<TAB>model<TAB>text`` lines)."""
    texts = [line.split("\t", 2)[2].upper() for line in log.read_text().splitlines()]
    return [t for t in texts if t.startswith("OUTP") and "?" not in t and "LOAD" not in t]


def _in_namespace(tmp_path: Path, disk: Path, steps: list) -> list[subprocess.CompletedProcess]:
    """Run the steps in one private mount namespace with a small tmpfs on ``disk``; each step's stdout,
    stderr and status come back through files outside the tmpfs. The store's files are copied out to
    ``disk-after`` at the end, so the test can look at them after the namespace is gone."""
    script = [f"mount -t tmpfs -o size={TMPFS_MIB}m acqd-full-disk {disk}",
              f"head -c {FILLER_MIB * 1024 * 1024} /dev/zero > {disk}/filler"]
    outputs = []
    for k, step in enumerate(steps):
        if step == "free":
            script.append(f"rm {disk}/filler")
            continue
        base = tmp_path / f"step{k}"
        argv = " ".join(f"'{a}'" for a in [*ACQD, *step])
        script.append(f"{argv} > {base}.out 2> {base}.err; echo $? > {base}.rc")
        outputs.append(base)
    script.append(f"mkdir {tmp_path}/disk-after && cp -a {disk}/. {tmp_path}/disk-after/")
    env = {**os.environ, "COLUMNS": "200"}
    subprocess.run([*PREFIX, "sh", "-c", " && ".join(script[:2]) + "; " + "; ".join(script[2:])],
                   check=True, env=env, timeout=300)
    return [subprocess.CompletedProcess(step, int(Path(f"{b}.rc").read_text()), Path(f"{b}.out").read_text(),
                                        Path(f"{b}.err").read_text()) for step, b in zip(
                [s for s in steps if s != "free"], outputs, strict=True)]
