"""The class of bad input files beside the profile: netlists (the demo ladder's file broken line by line),
CSV files given to ``acqd compare``, and files named as a store that are not one. Each case runs
``acqd.cli.main`` in this process and must be one ``acqd: error:`` line naming the file (and, where there is
one, the line or the element), never a traceback.

References: SPICE netlist conventions (an element line is a name whose first letter is its kind, its nodes,
then its value with SI suffixes; node 0 is ground; common practice, from memory); RFC 4180 (CSV: every
record has the same number of fields); the HDF5 file format's signature (the 8 bytes \\x89HDF\\r\\n\\x1a\\n at
the start, HDF5 File Format Specification §II.A).
"""

from __future__ import annotations

import shutil
from pathlib import Path

import h5py
import pytest

from badinput import assert_one_clear_line
from test_bad_options import BASES

PROFILES = Path(__file__).resolve().parents[1] / "profiles"
LADDER = (PROFILES / "sl2-ladder.cir").read_text()
# netlist case → the broken netlist text
NETLISTS = {
    "a zero capacitor": LADDER.replace("C1 n1 0 47n", "C1 n1 0 0"),
    "a negative inductor": LADDER.replace("L1 in n1 1.5m", "L1 in n1 -1.5m"),
    "a value that is no number": LADDER.replace("R2 out 0 180", "R2 out 0 abc"),
    "a value of nan": LADDER.replace("R2 out 0 180", "R2 out 0 nan"),
    "a value of 1e300": LADDER.replace("R2 out 0 180", "R2 out 0 1e300"),
    "an element without a value": LADDER.replace("R2 out 0 180", "R2 out 0"),
    "an element of no known kind": LADDER + "Q1 out n1 0 1\n",
    "an element named twice": LADDER + "C1 out 0 10n\n",
    "an element with one node": LADDER + "R9 out 1k\n",
    "a node reached by nothing but a capacitor": LADDER + "C9 out lonely 1n\n",
    "no ground": LADDER.replace(" 0 ", " gnd ").replace("V1 in 0", "V1 in gnd"),
    "no generator source": LADDER.replace("V1 in 0\n", ""),
    "a second voltage source": LADDER + "V2 out 0 1\n",
    "a coupling of an inductor that is not there": LADDER + "K1 L1 L9 0.5\n",
    "a coupling above 1": LADDER + "K1 L1 L2 1.5\n",
    "a 5000-character element name": LADDER + "R" + "x" * 5000 + " out 0 1k\n",
    "an ESC": LADDER.replace("R2 out 0 180", "R2 out\x1b[31m 0 180"),
    "a NUL": LADDER.replace("R2 out 0 180", "R2 out\x00 0 180"),
    "empty": "",
    "only comments": "* nothing here\n",
}
NETLIST_BYTES = {"not UTF-8": b"V1 in 0\nR1 in 0 \xff\xfe\n", "over 1 MB": b"* " + b"x" * 1_100_000 + b"\n"}

GOOD_CSV = "t,v_src,v_c\n" + "\n".join(f"{k * 1e-6:.6g},{0 if k < 20 else 1},{0 if k < 25 else 1}"
                                       for k in range(200)) + "\n"
_ROWS = GOOD_CSV.splitlines()
CSVS = {
    "empty": "",
    "only the header": _ROWS[0] + "\n",
    "a header and one row": "\n".join(_ROWS[:2]) + "\n",
    "a word in a cell": GOOD_CSV.replace("\n3e-05,1,1\n", "\n3e-05,one,1\n"),
    "a row too short": GOOD_CSV.replace("\n3e-05,1,1\n", "\n3e-05,1\n"),
    "a row too long": GOOD_CSV.replace("\n3e-05,1,1\n", "\n3e-05,1,1,7\n"),
    "nan in a cell": GOOD_CSV.replace("\n3e-05,1,1\n", "\n3e-05,nan,1\n"),
    "inf in a cell": GOOD_CSV.replace("\n3e-05,1,1\n", "\n3e-05,inf,1\n"),
    "time going back": GOOD_CSV.replace("\n3e-05,1,1\n", "\n1e-05,1,1\n"),
    "a time twice": GOOD_CSV.replace("\n3e-05,1,1\n", "\n2.9e-05,1,1\n", 1).replace("2.9e-05", "2e-05"),
    "no column the --map names": GOOD_CSV.replace("t,v_src,v_c", "t,v_src,v_out"),
    "a header cell twice": GOOD_CSV.replace("t,v_src,v_c", "t,v_src,v_src"),
    "a 5000-character cell": GOOD_CSV.replace("\n3e-05,1,1\n", f"\n3e-05,{'1' * 5000},1\n"),
    "an ESC in the header": GOOD_CSV.replace("t,v_src,v_c", "t,v_src,v_c\x1b[31m"),
}
CSV_BYTES = {"not UTF-8": GOOD_CSV.encode().replace(b"3e-05,1,1", b"3e-05,\xff,1"),
             "binary": bytes(range(256)) * 16}


def _not_hdf5(path: Path) -> None:
    path.write_bytes(b"\x89HDF\r\n\x1a\n" + b"\0" * 64)  # the signature, then nothing of a file


def _plain_hdf5(path: Path) -> None:
    with h5py.File(path, "w") as f:
        f["data"] = [1, 2, 3]


def _truncated_segment(path: Path, store: Path) -> None:
    segment = next(store.parent.glob(f"{store.stem}.000000.h5"))
    path.write_bytes(segment.read_bytes()[: segment.stat().st_size // 2])


def _index_removed(path: Path, store: Path) -> None:
    shutil.copy(next(store.parent.glob(f"{store.stem}.000000.h5")), path)
    with h5py.File(path, "r+") as f:
        del f["index"]


STORES = {"HDF5's signature and nothing else": _not_hdf5, "an HDF5 file acqd did not write": _plain_hdf5}
SEGMENTS = {"a segment cut in half": _truncated_segment, "a segment without its index": _index_removed}


def _netlist_case(tmp: Path, content: str | bytes) -> list[str]:
    profile = (PROFILES / "demo-sensor-ladder.toml").read_text()
    (tmp / "p.toml").write_text(profile.replace('file = "data/', f'file = "{tmp}/'))
    (tmp / "sl2-ladder.cir").write_bytes(content if isinstance(content, bytes) else content.encode())
    return ["run", str(tmp / "p.toml"), "-n", "1"]


def _csv_case(tmp: Path, content: str | bytes) -> list[str]:
    path = tmp / "r.csv"
    path.write_bytes(content if isinstance(content, bytes) else content.encode())
    return [word.format(csv=path) for word in BASES["compare"]]


CASES = {**{f"netlist: {k}": ("netlist", v) for k, v in {**NETLISTS, **NETLIST_BYTES}.items()},
         **{f"CSV: {k}": ("csv", v) for k, v in {**CSVS, **CSV_BYTES}.items()},
         **{f"store: {k}": ("store", k) for k in STORES}, **{f"store: {k}": ("segment", k) for k in SEGMENTS}}


@pytest.fixture(scope="module")
def demo_store(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A store of two demo records, finished segments of one record each (so segment 0 is a plain file)."""
    from acqd.cli import main

    tmp = tmp_path_factory.mktemp("files")
    profile = (PROFILES / "demo-bridge-filter.toml").read_text().replace('file = "data/kt9-demo.h5"',
                                                                         f'file = "{tmp / "s.h5"}"\nrotate_records = 1')
    (tmp / "p.toml").write_text(profile)
    assert main(["run", str(tmp / "p.toml"), "-n", "2"]) == 0
    return tmp / "s.h5"


@pytest.mark.parametrize("case", sorted(CASES))
def test_bad_file_is_one_clear_line(tmp_path: Path, case: str, capsys, demo_store: Path) -> None:
    kind, what = CASES[case]
    if kind == "netlist":
        # a file's text is named as the profile's netlist or model (it is read in, so records keep the circuit)
        argv, named = _netlist_case(tmp_path, what), "sl2-ladder.cir" if isinstance(what, bytes) else "p.toml"
    elif kind == "csv":
        argv, named = _csv_case(tmp_path, what), "r.csv"
    else:
        path = tmp_path / "x.h5"
        STORES[what](path) if kind == "store" else SEGMENTS[what](path, demo_store)
        argv, named = ["show", str(path)], "x.h5"
    line = assert_one_clear_line(argv, (named,), capsys)
    assert kind != "netlist" or "netlist" in line or "model" in line, line
