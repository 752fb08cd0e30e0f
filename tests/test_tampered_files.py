"""A hostile record file: its CRCs are recomputed after the edit, so only structure checks can catch it.

Each case edits a finished segment with h5py (a blob replaced, or one field of an index row), then seals
the row again with zlib's CRC-32 over the row's bytes (the store's documented row_crc, recomputed here
independently of acqd). Every reading command must then answer with one clear line or a note and its
status, in under 10 s, never a traceback (a traceback escapes ``main`` and fails the test); a row claiming
10^12 samples is also read in a child limited to 1 GiB of address space (RLIMIT_AS, POSIX getrlimit(2)).
"""

from __future__ import annotations

import json
import resource
import subprocess
import sys
import time
import zlib
from pathlib import Path

import h5py
import numpy as np
import pytest

from acqd.cli import main
from acqd.store import RecordStore
from test_store import make_record

ACQD = [sys.executable, "-m", "acqd"]
MEMORY_LIMIT_BYTES = 1 << 30


def _reseal(row: np.ndarray) -> None:
    """row_crc = CRC-32 (zlib) of every byte of the row before it, as the README's record-file section says."""
    raw = row.tobytes()
    row["row_crc"] = zlib.crc32(raw[:-4]) & 0xFFFFFFFF


def tamper_blob(segment: Path, part: str, raw: bytes) -> None:
    """Point record 0's ``part`` at new bytes appended to the blob dataset, with their CRC-32."""
    with h5py.File(segment, "r+") as f:
        blobs, index = f["blobs"], f["index"]
        end = blobs.shape[0]
        blobs.resize(end + len(raw), axis=0)
        blobs[end:] = np.frombuffer(raw, dtype=np.uint8)
        row = index[0:1]
        row[f"{part}_offset"], row[f"{part}_length"], row[f"{part}_crc"] = end, len(raw), zlib.crc32(raw)
        _reseal(row)
        index[0:1] = row


def tamper_row(segment: Path, field: str, value: object) -> None:
    with h5py.File(segment, "r+") as f:
        row = f["index"][0:1]
        row[field] = value
        _reseal(row)
        f["index"][0:1] = row


FIVE_CHANNELS = json.dumps([{"name": f"c{k}", "unit": "V", "source": f"CH{k}"} for k in range(5)]).encode()
CASES = {
    "channels not UTF-8": ("blob", "channels", b"\xff\xfe\x00"),
    "channels not JSON": ("blob", "channels", b"{not json"),
    "channels not a list": ("blob", "channels", b'"v_c"'),
    "more channels than samples hold": ("blob", "channels", FIVE_CHANNELS),
    "channel name not text": ("blob", "channels", b'[{"name": 1, "unit": "V", "source": "CH1"}, '
                                                    b'{"name": "b", "unit": "V", "source": "CH2"}]'),
    "settings not an object": ("blob", "settings", b"5"),
    "identities not text": ("blob", "identities", b'{"scope": 5}'),
    "profile text not text": ("blob", "profile_text", b"12"),
    "analysis a list": ("blob", "analysis", b"[1, 2]"),
    "10^12 samples claimed": ("row", "n_samples", 10**12),
    "7 channels claimed": ("row", "n_channels", 7),
    "negative pre-trigger": ("row", "pretrigger_samples", -5),
    "utc not UTF-8": ("row", "utc", b"\xff\xfe2026"),
    "blob before the file": ("row", "channels_offset", -100),
    "blob length 2^62": ("row", "analysis_length", 2**62),
    "zero sample interval": ("row", "sample_interval_s", 0.0),
}
COMMANDS = (["ls"], ["show"], ["show", "--json"], ["show", "-r", "0"], ["export", "-r", "0", "-o", "{out}/x.csv"],
            ["report", "-o", "{out}/r.html"], ["drift"])


def _limited() -> None:
    resource.setrlimit(resource.RLIMIT_AS, (MEMORY_LIMIT_BYTES, MEMORY_LIMIT_BYTES))


@pytest.mark.parametrize("case", sorted(CASES))
def test_a_tampered_file_is_one_clear_line_in_every_command(tmp_path: Path, case: str, capsys) -> None:
    store = tmp_path / "s.h5"
    with RecordStore(store) as writer:
        for seed in (1, 2):
            writer.append(make_record(seed))
    segment = tmp_path / "s.000000.h5"
    kind, name, value = CASES[case]
    (tamper_blob if kind == "blob" else tamper_row)(segment, name, value)
    for command in COMMANDS:
        argv = [*(a.replace("{out}", str(tmp_path)) for a in command), str(store)]
        started = time.monotonic()
        status = main(argv)
        out, err = capsys.readouterr()
        assert time.monotonic() - started < 10, argv
        said = err.strip().splitlines()
        assert all(line.startswith("acqd: ") for line in said), (argv, err)
        if status != 0:  # a command that needs what was tampered with: one error line, status 2
            assert status == 2 and said[-1].startswith("acqd: error: "), (argv, err)
    if kind == "row":  # the row no longer fits its segment: it and those after it are set aside, with a note
        assert main(["ls", "--json", str(store)]) == 0
        out, err = capsys.readouterr()
        assert json.loads(out) == [] and "s.000000.h5: row 0 fails its check" in err
    else:  # reading the whole record needs every blob: one line naming the record and the part
        assert main(["show", "--json", "-r", "0", str(store)]) == 2
        (line,) = capsys.readouterr().err.strip().splitlines()
        assert f"record 0: {name}" in line, line


def test_a_row_claiming_10_to_the_12_samples_is_read_in_bounded_memory(tmp_path: Path) -> None:
    """Before, reading it tried to allocate 7.28 TiB; now the row does not fit its segment and is set aside."""
    store = tmp_path / "s.h5"
    with RecordStore(store) as writer:
        writer.append(make_record(1))
    tamper_row(tmp_path / "s.000000.h5", "n_samples", 10**12)
    for command in (["show", "-r", "0"], ["export", "-r", "0", "-o", str(tmp_path / "x.csv")], ["ls"]):
        proc = subprocess.run([*ACQD, *command, str(store)], capture_output=True, text=True, timeout=60,
                              preexec_fn=_limited)
        assert "Traceback" not in proc.stderr and "MemoryError" not in proc.stderr, proc.stderr
        assert proc.returncode in (0, 2), proc.stderr
