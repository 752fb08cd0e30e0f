"""The HDF5 record store on real files: round trip, index listing, rotation, h5dump, CSV, CLI, bad input.

Crash safety and the concurrent SWMR reader are in test_store_crash.py (they need real subprocesses).
"""

from __future__ import annotations

import csv
import json
import re
import shutil
import subprocess
import zlib
from pathlib import Path

import h5py
import numpy as np
import pytest

import acqd.cli as cli
from acqd.errors import ConfigError
from acqd.record import EDGES, LOADS, Channel, Record, Stimulus, TimeBase, profile_hash
from acqd.store import RecordStore, export_csv, open_records

PROFILE = "[bench]\nname = 'night run'\n" + "# a long profile, stored once per segment\n" * 100
CHANNELS = (("v_c", "V"), ("i_l", "A"), ("v_r", "V"))


def make_record(seed: int, n_channels: int = 2, n_samples: int = 64, dtype: type = np.float64) -> Record:
    """A deterministic record: numpy's seeded PCG64 generator regenerates the same samples from ``seed``."""
    rng = np.random.default_rng(seed)
    channels = [
        Channel(name, unit, rng.standard_normal(n_samples).astype(dtype), f"CH{k + 1}")
        for k, (name, unit) in enumerate(CHANNELS[:n_channels])
    ]
    return Record(
        channels=channels,
        timebase=TimeBase(1e-6, n_samples // 8, n_samples),
        stimulus=Stimulus("square", 0.0, 1.0 + seed % 3, 1e3, EDGES[seed % 2], LOADS[seed % 2]),
        identities={"generator": "acqd-sim,FG,0,1", "scope": "acqd-sim,DIG,0,1"},
        settings={"range_v": [1.0, 2.0], "points": n_samples},
        dut={"name": "series RLC", "R_ohm": 20.0},
        utc=f"2026-05-{1 + seed % 28:02d}T12:00:{seed % 60:02d}.000000+00:00",
        monotonic_s=0.5 * seed,
        profile_text=PROFILE,
        profile_sha256=profile_hash(PROFILE),
        averages=1 + seed % 4,
        analysis={"verdict": "pass" if seed % 2 else "fail", "fit": {"R_ohm": 20.0 + seed / 7}},
    )


def crc_of(record: Record) -> int:
    """CRC-32 (zlib, the ISO 3309 / RFC 1952 polynomial) of the samples as float64 little-endian, recomputed here."""
    crc = 0
    for ch in record.channels:
        crc = zlib.crc32(np.asarray(ch.samples, dtype="<f8").tobytes(), crc)
    return crc


def write_store(path: Path, seeds: list[int], **kwargs) -> list[int]:
    with RecordStore(path, **kwargs) as store:
        return [store.append(make_record(s)) for s in seeds]


def test_round_trip_is_lossless_with_several_channels(tmp_path: Path) -> None:
    originals = [make_record(s, n_channels=3, n_samples=500) for s in range(4)]
    originals.append(make_record(99, n_channels=3, n_samples=500, dtype=np.float32))  # raw float32 data
    with RecordStore(tmp_path / "night.h5") as store:
        indices = [store.append(r) for r in originals]
    assert indices == [0, 1, 2, 3, 4]
    assert [r.index for r in originals] == indices  # the store assigns Record.index
    with open_records(tmp_path / "night.h5") as reader:
        assert len(reader) == 5
        for original in originals:
            back = reader.read(original.index)
            # zlib.crc32 recomputed here over the original samples: the stored data is bit-identical.
            assert back.checksum() == crc_of(original)
            for a, b in zip(original.channels, back.channels, strict=True):
                assert (a.name, a.unit, a.source) == (b.name, b.unit, b.source)
                assert b.samples.dtype == a.samples.dtype  # float32 stays float32, float64 stays float64
                np.testing.assert_array_equal(b.samples, a.samples)  # numpy: exact equality
            for field in ("timebase", "stimulus", "identities", "settings", "dut", "utc", "monotonic_s",
                          "profile_text", "profile_sha256", "acqd_version", "averages", "analysis"):
                assert getattr(back, field) == getattr(original, field), field
    # h5py (an independent view of the file): the float32 record went to a float32 segment of its own.
    with h5py.File(tmp_path / "night.000001.h5", "r") as f:
        assert f["samples"].dtype == np.dtype("<f4")


def test_index_lists_2000_records_without_reading_samples(tmp_path: Path) -> None:
    seeds = list(range(2000))
    sample_bytes = 2000 * 2 * 1024 * 8
    with RecordStore(tmp_path / "big.h5", fsync=False, rotate_records=1000) as store:
        for s in seeds:
            store.append(make_record(s, n_samples=1024))
    # Linux proc(5): /proc/self/io "rchar" counts every byte this process reads with read(2)/pread(2).
    io_before = _rchar()
    with open_records(tmp_path / "big.h5") as reader:
        summaries = reader.index()
    read_bytes = _rchar() - io_before
    assert read_bytes < sample_bytes / 20, f"index() read {read_bytes} bytes; the samples are {sample_bytes}"
    assert [s.index for s in summaries] == seeds
    for s in summaries[::97]:
        expected = make_record(s.index, n_samples=1024)
        assert s.checksum == crc_of(expected)  # zlib CRC-32 recomputed from the regenerated samples
        assert s.channel_names == ("v_c", "i_l") and s.units == ("V", "A")
        assert (s.n_channels, s.n_samples, s.edge) == (2, 1024, expected.stimulus.edge)
        assert (s.low_v, s.high_v) == (expected.stimulus.low_v, expected.stimulus.high_v)
        assert s.verdict == expected.analysis["verdict"] and s.utc == expected.utc


def _rchar() -> int:
    text = Path("/proc/self/io").read_text()
    return int(re.search(r"^rchar: (\d+)$", text, re.M).group(1))


def test_analyses_are_read_back_for_every_record(tmp_path: Path) -> None:
    records = [make_record(s) for s in range(6)]
    records[3].analysis = None  # a record the comparator has not seen yet
    with RecordStore(tmp_path / "a.h5", rotate_records=4) as store:
        for r in records:
            store.append(r)
    with open_records(tmp_path / "a.h5") as reader:
        got = reader.analyses()
    # The reference is what was appended: every analysis, in order, with its record's time stamps.
    assert [(a.index, a.utc, a.monotonic_s, a.analysis) for a in got] == [
        (r.index, r.utc, r.monotonic_s, r.analysis) for r in records
    ]


def test_profile_text_is_stored_once_per_segment(tmp_path: Path) -> None:
    write_store(tmp_path / "p.h5", list(range(10)))
    with h5py.File(tmp_path / "p.000000.h5", "r") as f:  # h5py's view of the blob dataset
        blob_bytes = f["blobs"].shape[0]
    assert len(PROFILE) * 1 < blob_bytes < len(PROFILE) * 2  # ten records, one copy of the profile
    with open_records(tmp_path / "p.h5") as reader:
        assert all(r.profile_text == PROFILE for r in reader)


H5DUMP = shutil.which("h5dump")


def _h5dump(*args: str) -> str:
    proc = subprocess.run([H5DUMP, *args], capture_output=True, text=True, timeout=60)
    assert proc.returncode == 0, proc.stderr
    return proc.stdout


@pytest.mark.skipif(H5DUMP is None, reason="h5dump (Debian hdf5-tools) not installed")
def test_rotation_leaves_plain_files_that_hdf5_1_10_reads(tmp_path: Path) -> None:
    # Debian's hdf5-tools h5dump is an HDF5 1.10 reader independent of h5py's bundled 2.0 library.
    assert re.search(r"Version 1\.10\.", _h5dump("--version"))
    store = tmp_path / "night.h5"
    with RecordStore(store, rotate_records=3) as writer:
        for seed in range(7):
            writer.append(make_record(seed))
        writer.append(make_record(7, n_samples=32))  # a new record shape starts a new segment
    names = sorted(p.name for p in tmp_path.iterdir())
    assert names == [f"night.00000{k}.h5" for k in range(4)] + ["night.h5"]  # the overview; no lock file left
    expected_rows = {0: [0, 1, 2], 1: [3, 4, 5], 2: [6], 3: [7]}
    for number, seeds in expected_rows.items():
        path = tmp_path / f"night.{number:06d}.h5"
        with h5py.File(path, "r") as f:  # a plain, closed file: no SWMR needed
            assert list(f["index"]["index"]) == seeds
        header = _h5dump("-H", str(path))
        for dataset in ("samples", "index", "blobs"):
            assert f'DATASET "{dataset}"' in header
        n_samples = 32 if number == 3 else 64
        assert f"( {len(seeds)}, 2, {n_samples} ) / ( H5S_UNLIMITED, 2, {n_samples} )" in header
        text = _h5dump("-d", "/samples", "-m", "%.17g", "-y", "-w", "0", str(path))
        data = re.search(r"DATA \{(.*?)\}", text, re.S).group(1)
        values = np.array([float(v) for v in data.replace(",", " ").split()])
        # %.17g prints every float64 exactly (17 significant digits round-trip, IEEE 754 common practice).
        written = np.concatenate(
            [np.concatenate([c.samples for c in make_record(s, n_samples=n_samples).channels]) for s in seeds]
        )
        np.testing.assert_array_equal(values, written)


def test_csv_export_is_plain_csv_with_full_precision(tmp_path: Path) -> None:
    record = make_record(5, n_channels=3, n_samples=200)
    with RecordStore(tmp_path / "c.h5") as store:
        store.append(record)
    out = tmp_path / "rec5.csv"
    with open_records(tmp_path / "c.h5") as reader:
        meta_path = export_csv(reader, 0, out)
    with open(out, newline="") as fh:  # Python's csv module as the plain-CSV parser (RFC 4180 dialect)
        rows = list(csv.reader(fh))
    assert rows[0] == ["t [s]", "v_c [V]", "i_l [A]", "v_r [V]"]
    assert len(rows) == 201
    data = np.loadtxt(out, delimiter=",", skiprows=1)  # numpy's own parser, no comment handling needed
    np.testing.assert_array_equal(data[:, 0], record.timebase.times())
    for k, ch in enumerate(record.channels):
        np.testing.assert_array_equal(data[:, k + 1], ch.samples)  # repr round-trips float64 exactly
    meta = json.loads(meta_path.read_text())
    assert meta["checksum"] == crc_of(record) and meta["analysis"] == record.analysis
    assert meta["channels"][2] == {"name": "v_r", "unit": "V", "source": "CH3"}


def _acqd(args: list[str], monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture) -> tuple[int, str, str]:
    """Run the real ``acqd`` entry point with only the store's sub-commands registered."""
    monkeypatch.setattr(cli, "COMMAND_MODULES", ("store",))
    status = cli.main(args)
    out, err = capsys.readouterr()
    return status, out, err


def test_cli_ls_show_export(tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture) -> None:
    store = tmp_path / "night.h5"
    write_store(store, [0, 1, 2], rotate_records=2)
    status, out, _ = _acqd(["ls", str(store), "--json"], monkeypatch, capsys)
    listed = json.loads(out)
    assert status == 0 and [r["index"] for r in listed] == [0, 1, 2]
    assert listed[1]["verdict"] == "pass" and listed[1]["channel_names"] == ["v_c", "i_l"]
    status, out, _ = _acqd(["ls", str(store)], monkeypatch, capsys)
    assert status == 0 and "3 record(s)" in out and "FAIL" in out and "falling" in out
    status, out, _ = _acqd(["show", str(store), "-r", "2", "--json"], monkeypatch, capsys)
    meta = json.loads(out)
    assert status == 0 and meta["index"] == 2 and meta["profile_text"] == PROFILE
    assert meta["checksum"] == crc_of(make_record(2))
    status, out, _ = _acqd(["show", str(store), "--record", "1"], monkeypatch, capsys)
    assert status == 0 and "series RLC" in out
    csv_path = tmp_path / "one.csv"
    status, out, _ = _acqd(["export", str(store), "--record", "1", "-o", str(csv_path)], monkeypatch, capsys)
    assert status == 0 and csv_path.exists() and Path(str(csv_path) + ".json").exists()


@pytest.mark.parametrize(
    "args, expected",
    [
        (["ls", "{dir}/notes.txt"], "notes.txt: not an acqd record file: HDF5 cannot open it"),
        (["ls", "{dir}/other.h5"], "other.h5: not an acqd record file: root attribute acqd_format is None"),
        (["ls", "{dir}/missing.h5"], "missing.h5: no such record store"),
        (["ls", "{dir}"], "is a directory; name a store in it"),
        (["show", "{dir}/s.h5", "-r", "7"], "s.h5: record: 7 is not in this store; it holds records 0-1"),
        (["show", "{dir}/s.h5", "-r", "one"], "acqd show: --record: 'one' is not a whole number"),
        (["export", "{dir}/s.h5", "--record", "0", "--out", "{dir}/no/such/dir.csv"], "cannot write the export"),
    ],
)
def test_cli_bad_input_is_one_line(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture, args: list[str], expected: str
) -> None:
    (tmp_path / "notes.txt").write_text("not HDF5 at all\n")
    with h5py.File(tmp_path / "other.h5", "w") as f:  # valid HDF5 (h5py), but no acqd store
        f["x"] = np.arange(3)
    write_store(tmp_path / "s.h5", [0, 1])
    status, out, err = _acqd([a.format(dir=tmp_path) for a in args], monkeypatch, capsys)
    assert status == 2 and out == ""
    assert err.count("\n") == 1 and err.startswith("acqd: error: ") and expected in err


def test_writer_refuses_bad_input_with_one_clear_line(tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match=r"rotate_records: 0; must be an integer >= 1"):
        RecordStore(tmp_path / "x.h5", rotate_records=0)
    with pytest.raises(ConfigError, match=r"does not exist"):
        RecordStore(tmp_path / "no" / "x.h5")
    (tmp_path / "file.h5").write_bytes(b"")
    with pytest.raises(ConfigError, match=r"is an existing file"):
        RecordStore(tmp_path / "file.h5")
    with RecordStore(tmp_path / "x.h5") as store:
        with pytest.raises(ConfigError, match=r"another process is writing this store"):
            RecordStore(tmp_path / "x.h5")
        short = make_record(1)
        short.channels[1] = Channel("i_l", "A", np.zeros(10))
        with pytest.raises(ConfigError, match=r"record.channels\[i_l\]: shape \(10,\); must be \(64,\)"):
            store.append(short)
        odd = make_record(2)
        odd.settings = {"when": object()}
        with pytest.raises(ConfigError, match=r"record.settings: must be JSON-serialisable"):
            store.append(odd)
        assert store.append(make_record(3)) == 0  # refused records take no index
