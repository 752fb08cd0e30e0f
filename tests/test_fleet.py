"""Many benches, one archive: ``acqd daemon --sync``, ``acqd sync`` and ``acqd fleet`` end to end.

Three simulated benches (each its own daemon, simulated bench on 127.0.0.1 and record store) run a short
campaign; the third bench's DUT has another resistor, so it reads apart from the other two. Their finished
segments go to two real archives: a directory (``file://``) and moto's standalone S3 server, started here
on 127.0.0.1 on a free port and stopped at the end — never a mock of the client. What is checked comes from
outside acqd: the objects read back with boto3 (another S3 client) and hashed with hashlib (SHA-256, FIPS
180-4), the local files byte for byte, ``acqd drift`` on each bench's own store, the textbook one-way
ANOVA and Welch t statistics computed here with numpy, pyarrow's reading of the Parquet table, and real
SIGKILLs (the store's kill switch, at named steps of an upload).
"""

from __future__ import annotations

import hashlib
import json
import os
import signal
import socket
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest

boto3 = pytest.importorskip("boto3")
pq = pytest.importorskip("pyarrow.parquet")
distributed = pytest.importorskip("distributed")

from acqd.campaign.runlog import read_runlog  # noqa: E402
from acqd.cli import main  # noqa: E402
from acqd.compare import compare_spec, parse_dut_table  # noqa: E402
from acqd.profile import load_profile  # noqa: E402
from acqd.store import RecordStore, open_records  # noqa: E402
from test_campaign_daemon import PROFILE, SIMULATED  # noqa: E402
from test_store import make_record  # noqa: E402

BUCKET = "fleet-archive"
BENCHES = {"b1": 22.0, "b2": 22.0, "b3": 26.0}  # the simulated DUT's resistor on each bench, ohms
SERIALS = {"b1": "KT9-0417", "b2": "KT9-0502", "b3": "KT9-0417"}  # b3 measures b1's unit after a rework
RECORDS = 3  # per bench: segments of 2 and 1 records (rotate_records = 2)

def write_profile(path: Path, bench: str, *, named: bool = True, tolerance_pct: float = 50.0, slots: int = RECORDS
                  ) -> Path:
    """The daemon tests' simulated-bench profile, with this bench's DUT resistor, seed and serial, R fitted,
    two records per segment and a back-to-back campaign of ``slots`` slots."""
    simulated = SIMULATED.format(log=path.with_suffix(".gen.log")).replace("seed = 5", f"seed = {bench[1:]}")
    simulated = simulated.replace("r_ohm = 22.0", f"r_ohm = {BENCHES.get(bench, 22.0)}")
    text = PROFILE.format(kind="simulated", generator_resource="", scope_resource="", simulated=simulated,
                          campaign=f'name = "night"\nback_to_back = true\nslots = {slots}')
    edits = {'kind = "simulated"': 'kind = "simulated"' + (f'\nbench_id = "{bench}"' if named else ""),
             "[dut]\n": f'[output]\nfsync = false\nrotate_records = 2\n\n[dut]\nserial = "{SERIALS.get(bench, "KT9-0001")}"\n',
             "[dut.tolerances]\nnrmse_max = 0.05": "[dut.fit]\nfree = [\"r_ohm\"]\n\n[dut.tolerances]\nnrmse_max = 0.05\n"
                                                 f"parameter_pct = {{ r_ohm = {tolerance_pct} }}"}
    for old, replacement in edits.items():
        assert text.count(old) == 1, old
        text = text.replace(old, replacement)
    path.write_text(text)
    return path


def sha256_of(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()  # hashlib: SHA-256 as FIPS 180-4 defines it


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


# -- the archives and the cluster -------------------------------------------------------------------------
@pytest.fixture(scope="module")
def s3_server() -> Iterator[str]:
    """moto's standalone S3 server on 127.0.0.1, reached through the client's own environment variables."""
    port = free_port()
    proc = subprocess.Popen([sys.executable, "-m", "moto.server", "-H", "127.0.0.1", "-p", str(port)],
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    endpoint = f"http://127.0.0.1:{port}"
    saved = {k: os.environ.get(k) for k in ("AWS_ACCESS_KEY_ID", "AWS_SECRET_ACCESS_KEY", "AWS_ENDPOINT_URL",
                                            "AWS_DEFAULT_REGION")}
    os.environ.update(AWS_ACCESS_KEY_ID="fleet-test", AWS_SECRET_ACCESS_KEY="fleet-test-secret",
                      AWS_ENDPOINT_URL=endpoint, AWS_DEFAULT_REGION="us-east-1")
    try:
        deadline = time.monotonic() + 30
        while True:
            try:
                socket.create_connection(("127.0.0.1", port), timeout=0.5).close()
                break
            except OSError:
                assert proc.poll() is None and time.monotonic() < deadline, "moto's server did not start"
                time.sleep(0.1)
        boto3.client("s3").create_bucket(Bucket=BUCKET)
        yield endpoint
    finally:
        proc.terminate()
        proc.wait(timeout=10)
        for key, value in saved.items():
            if value is None:
                os.environ.pop(key, None)
            else:
                os.environ[key] = value


@pytest.fixture(scope="module")
def local_cluster() -> Iterator[Any]:
    """A LocalCluster of 2 worker processes on 127.0.0.1; the commands reach it with --scheduler."""
    cluster = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                       dashboard_address="127.0.0.1:0", host="127.0.0.1")
    try:
        yield cluster
    finally:
        cluster.close()


@pytest.fixture
def scheduler(local_cluster: Any) -> str:
    return local_cluster.scheduler_address


@pytest.fixture(scope="module")
def fleet(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    """Three benches' daemons, each syncing to the file:// archive from its background thread as it goes,
    and beside them a fourth whose archive is down (an S3 endpoint where nothing listens)."""
    root = tmp_path_factory.mktemp("fleet")
    archive = root / "share"
    data, running = {}, []
    down = root / "down"
    down.mkdir()
    dead = f"http://127.0.0.1:{free_port()}"
    env = {**os.environ, "AWS_ACCESS_KEY_ID": "x", "AWS_SECRET_ACCESS_KEY": "y", "AWS_MAX_ATTEMPTS": "1"}
    running.append(subprocess.Popen([sys.executable, "-m", "acqd", "daemon", "--plain",
                                     str(write_profile(down / "bench.toml", "b9", slots=2)), "-d", str(down / "data"),
                                     "--sync", f"s3://{BUCKET}/lab", "--endpoint-url", dead], env=env,
                                    stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True))
    for bench in BENCHES:  # the three daemons run side by side, as on a line of benches
        folder = root / bench
        folder.mkdir()
        # b3 names itself on the command line, b1 and b2 in their profiles
        profile = write_profile(folder / "bench.toml", bench, named=bench != "b3")
        argv = [sys.executable, "-m", "acqd", "daemon", "--plain", str(profile), "-d", str(folder / "data"),
                "--sync", archive.as_uri(), *(["--bench-id", "b3"] if bench == "b3" else []),
                *(["--sync-verify", "readback"] if bench == "b2" else [])]  # b2 reads each copy back
        running.append(subprocess.Popen(argv, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True))
        data[bench] = folder / "data"
    for proc in running:
        _, err = proc.communicate(timeout=120)
        assert proc.returncode == 0, err
    return {"root": root, "data": data, "file_url": archive.as_uri(), "down": down / "data"}


def archive_url(kind: str, fleet: dict[str, Any], request: pytest.FixtureRequest) -> str:
    if kind == "file":
        return fleet["file_url"]
    request.getfixturevalue("s3_server")
    return f"s3://{BUCKET}/lab"


def read_object(url: str, key: str) -> bytes | None:
    """An archived object's bytes through an independent reader (the file system, or boto3), or None."""
    if url.startswith("file://"):
        path = Path(url.removeprefix("file://")) / key
        return path.read_bytes() if path.is_file() else None
    bucket, _, prefix = url.removeprefix("s3://").partition("/")
    try:
        return boto3.client("s3").get_object(Bucket=bucket, Key=f"{prefix}/{key}")["Body"].read()
    except boto3.client("s3").exceptions.NoSuchKey:
        return None


def list_keys(url: str) -> list[str]:
    if url.startswith("file://"):
        top = Path(url.removeprefix("file://"))
        return sorted(str(p.relative_to(top)) for p in top.rglob("*") if p.is_file())
    bucket, _, prefix = url.removeprefix("s3://").partition("/")
    listed = boto3.client("s3").list_objects_v2(Bucket=bucket, Prefix=f"{prefix}/").get("Contents", [])
    return sorted(o["Key"].removeprefix(f"{prefix}/") for o in listed)


def finished(data: Path) -> list[Path]:
    return sorted(p for p in data.iterdir() if p.name.startswith("night.0") and p.suffix == ".h5")


def run_json(capsys: pytest.CaptureFixture, *argv: str) -> Any:
    capsys.readouterr()
    status = main(list(argv))
    out, err = capsys.readouterr()
    assert status == 0, err
    return json.loads(out)


# -- sync -------------------------------------------------------------------------------------------------
def test_the_daemons_synced_every_finished_segment_as_it_went(fleet: dict[str, Any]) -> None:
    url = fleet["file_url"]
    for bench, data in fleet["data"].items():
        local = finished(data)
        assert len(local) == 2 and not list(data.glob("*.part"))  # 2 + 1 records, both segments finished
        events = [e for e in read_runlog(data / "runlog.jsonl") if e["event"].startswith("sync_")]
        uploads = [e for e in events if e["event"] == "sync_upload"]
        assert sorted(e["segment"] for e in uploads) == [p.name for p in local]
        assert not [e for e in events if e["event"] == "sync_failed"]
        for path in local:  # the archived object is the local file, byte for byte
            assert read_object(url, f"{bench}/night/{path.name}") == path.read_bytes()
        catalog = json.loads(read_object(url, f"{bench}/catalog.json"))
        assert [(e["segment"], e["records"], e["sha256"]) for e in catalog["segments"]] == [
            (p.name, n, sha256_of(p.read_bytes())) for p, n in zip(local, (2, 1))]
    assert not [k for k in list_keys(url) if ".incoming" in k or k.endswith(".part")]


@pytest.mark.parametrize("kind", ["file", "s3"])
def test_sync_sends_each_segment_once_and_verified(kind: str, fleet: dict[str, Any], request, capsys) -> None:
    url = archive_url(kind, fleet, request)
    if kind == "file":  # the daemons filled it already: a sync by hand has nothing to send
        for data in fleet["data"].values():
            assert run_json(capsys, "sync", url, "-d", str(data), "--json")["uploaded"] == []
        return
    for bench, data in fleet["data"].items():
        report = run_json(capsys, "sync", url, "-d", str(data), "--json")
        assert [e["segment"] for e in report["uploaded"]] == [p.name for p in finished(data)]
    keys = list_keys(url)
    assert keys == sorted([f"{b}/catalog.json" for b in BENCHES] +
                          [f"{b}/night/{p.name}" for b, d in fleet["data"].items() for p in finished(d)])
    for bench, data in fleet["data"].items():
        for path in finished(data):
            assert sha256_of(read_object(url, f"{bench}/night/{path.name}")) == sha256_of(path.read_bytes())
    stamps = {o["Key"]: o["LastModified"] for o in boto3.client("s3").list_objects_v2(Bucket=BUCKET)["Contents"]}
    for data in fleet["data"].values():  # a second sync sends nothing and rewrites nothing
        report = run_json(capsys, "sync", url, "-d", str(data), "--json")
        assert report["uploaded"] == [] and report["already"] == 2 and report["bytes_uploaded"] == 0
    assert stamps == {o["Key"]: o["LastModified"] for o in boto3.client("s3").list_objects_v2(Bucket=BUCKET)["Contents"]}


def big_store(folder: Path, bench: str) -> Path:
    """A data directory with one finished segment of 19 MB: more than one part of an S3 upload
    (``transfer.PART_BYTES``), and many chunks on a share."""
    data = folder / "data"
    data.mkdir(parents=True)
    with RecordStore(data / "soak.h5", fsync=False) as store:
        for seed in range(6):
            record = make_record(seed, n_channels=2, n_samples=200_000)
            record.bench_id = bench
            store.append(record)
    return data


@pytest.mark.parametrize("kind, kill_at", [("file", "sync:chunk@2"), ("s3", "sync:chunk@2"),  # mid-upload
                                            ("file", "sync:uploaded"), ("s3", "sync:uploaded"),  # not read back
                                            ("file", "sync:moved")])  # at its name, not yet in the catalog
def test_a_sync_killed_mid_upload_is_finished_by_the_next(kind: str, kill_at: str, fleet, request, tmp_path,
                                                          capsys) -> None:
    url = archive_url(kind, fleet, request)
    bench = f"kill-{kind}-{kill_at.split(':')[1].split('@')[0]}"
    data = big_store(tmp_path, bench)
    (segment,) = finished_segments = sorted(data.glob("soak.0*.h5"))
    key = f"{bench}/soak/{segment.name}"
    env = {**os.environ, "ACQD_STORE_KILL_AT": kill_at}
    proc = subprocess.run([sys.executable, "-m", "acqd", "sync", url, "-d", str(data)], env=env,
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == -signal.SIGKILL, proc.stderr
    after_kill = read_object(url, key)
    # nothing that passes for complete: nothing at the final key, or only the whole segment, which the
    # catalog does not list until a sync has read it back and hashed it
    assert after_kill is None or after_kill == segment.read_bytes()
    object_expected = kill_at == "sync:moved" or (kind == "s3" and kill_at == "sync:uploaded")
    assert (after_kill is not None) == object_expected
    catalog = read_object(url, f"{bench}/catalog.json")
    assert catalog is None  # the catalog is written after the move, so it never lists a segment not there
    report = run_json(capsys, "sync", url, "-d", str(data), "--json")
    assert (len(report["uploaded"]), report["adopted"]) == ((1, 0) if after_kill is None else (0, 1))
    assert sha256_of(read_object(url, key)) == sha256_of(segment.read_bytes())
    listed = json.loads(read_object(url, f"{bench}/catalog.json"))["segments"]
    assert [(e["segment"], e["sha256"]) for e in listed] == [(segment.name, sha256_of(segment.read_bytes()))]
    assert not [k for k in list_keys(url) if k.startswith(f"{bench}/.incoming")]  # the leftover was removed
    assert finished_segments == sorted(data.glob("soak.0*.h5"))  # local files untouched


def test_bad_archive_input_is_one_line_and_touches_nothing(fleet: dict[str, Any], tmp_path: Path, capsys) -> None:
    data = fleet["data"]["b1"]
    before = sorted(p.name for p in data.iterdir())
    dead = f"http://127.0.0.1:{free_port()}"  # nothing listens there
    cases = [(["sync", "no-scheme", "-d", str(data)], "with a scheme"),
             (["sync", "file:///x", "-d", str(data), "--endpoint-url", dead], "s3:// archive only"),
             (["sync", "file:///x", "-d", str(tmp_path / "absent")], "no such data directory"),
             (["sync", f"s3://{BUCKET}/lab", "-d", str(data), "--endpoint-url", dead], "failed"),
             (["fleet", "compare", fleet["file_url"], "-o", str(tmp_path / "t.parquet")], "--profile"),
             (["fleet", "drift", (tmp_path / "empty").as_uri()], "no archived segment"),
             (["fleet", "drift", fleet["file_url"], "--scheduler", "nonsense"], "tcp://host:8786"),
             (["fleet", "drift", fleet["file_url"], "--since", "yesterday"], "ISO 8601")]
    env = {"AWS_ACCESS_KEY_ID": "x", "AWS_SECRET_ACCESS_KEY": "y", "AWS_MAX_ATTEMPTS": "1"}
    saved = {k: os.environ.get(k) for k in env}
    os.environ.update(env)
    try:
        for argv, named in cases:
            capsys.readouterr()
            assert main(argv) == 2, argv
            err = capsys.readouterr().err
            assert err.count("\n") == 1 and err.startswith("acqd: error: ") and named in err, err
    finally:
        for k, v in saved.items():
            os.environ.pop(k) if v is None else os.environ.__setitem__(k, v)
    assert sorted(p.name for p in data.iterdir()) == before and not (tmp_path / "t.parquet").exists()


def test_a_daemon_whose_archive_is_down_acquires_as_usual(fleet: dict[str, Any]) -> None:
    data = fleet["down"]  # its daemon exited 0 (the fixture checks)
    with open_records(data / "night.h5") as reader:
        assert len(reader) == 2
    events = [e["event"] for e in read_runlog(data / "runlog.jsonl")]
    assert "sync_failed" in events and "sync_upload" not in events
    assert events.count("slot_done") == 2 and "campaign_finished" in events  # the campaign ran regardless


# -- fleet ------------------------------------------------------------------------------------------------
@pytest.mark.parametrize("kind", ["file", "s3"])
def test_fleet_ls_lists_the_catalogs(kind: str, fleet, request, capsys) -> None:
    url = archive_url(kind, fleet, request)
    if kind == "s3":
        for data in fleet["data"].values():
            main(["sync", url, "-d", str(data)])
    rows = [r for r in run_json(capsys, "fleet", "ls", url, "--json") if r["bench"] in BENCHES]
    assert [(r["bench"], r["campaign"], r["segments"], r["records"]) for r in rows] == [
        (b, "night", 2, RECORDS) for b in BENCHES]
    for row in rows:
        with open_records(fleet["data"][row["bench"]] / "night.h5") as reader:
            utc = [s.utc for s in reader.index()]
        assert (row["first_utc"], row["last_utc"]) == (min(utc), max(utc))


@pytest.mark.parametrize("kind", ["file", "s3"])
def test_fleet_drift_equals_acqd_drift_on_each_bench(kind: str, fleet, request, scheduler, capsys) -> None:
    url = archive_url(kind, fleet, request)
    if kind == "s3":
        for data in fleet["data"].values():
            main(["sync", url, "-d", str(data)])
    drift = run_json(capsys, "fleet", "drift", url, "--scheduler", scheduler, "--json")
    per_bench = {s["store"]: s for s in drift["benches"]}
    for bench, data in fleet["data"].items():
        own = run_json(capsys, "drift", str(data / "night.h5"), "--json")
        fleet_view = per_bench[f"{bench}/night"]
        assert {**fleet_view, "store": own["store"], "notes": own["notes"]} == own
    serials = {s["store"]: s for s in drift["serials"]}
    assert set(serials) == {f"serial {s}" for s in SERIALS.values()}
    assert serials["serial KT9-0417"]["records"] == 2 * RECORDS  # b1's and b3's records of the same unit

    # the bench comparison against the textbook statistics, from each bench's own acqd drift
    values = {}
    for bench, data in fleet["data"].items():
        own = run_json(capsys, "drift", str(data / "night.h5"), "--json")
        values[bench] = np.array(next(s for s in own["series"] if s["name"] == "r_ohm")["values"])
    r = next(d for d in drift["distributions"] if d["parameter"] == "r_ohm")
    groups = list(values.values())
    grand = np.concatenate(groups)
    k, n = len(groups), grand.size
    # one-way ANOVA (Montgomery, Design and Analysis of Experiments, §3.3): F = MS_between / MS_within
    ms_between = sum(g.size * (g.mean() - grand.mean()) ** 2 for g in groups) / (k - 1)
    ms_within = sum(((g - g.mean()) ** 2).sum() for g in groups) / (n - k)
    assert r["anova"]["f"] == pytest.approx(ms_between / ms_within, rel=1e-9)
    for row in r["benches"]:
        own = values[row["bench"]]
        rest = np.concatenate([v for b, v in values.items() if b != row["bench"]])
        # Welch (1947): t = (m1 - m2) / sqrt(s1²/n1 + s2²/n2)
        t = (own.mean() - rest.mean()) / np.sqrt(own.var(ddof=1) / own.size + rest.var(ddof=1) / rest.size)
        assert row["welch_t"] == pytest.approx(t, rel=1e-9)
        assert row["differs"] == (row["bench"] == "b3")  # 26 Ω against 22 Ω on the others
    assert r["n"] == 3 * RECORDS and r["median"] == pytest.approx(float(np.median(grand)), rel=1e-12)


def test_fleet_drift_filters_and_figures(fleet, scheduler, tmp_path, capsys) -> None:
    url = fleet["file_url"]
    drift = run_json(capsys, "fleet", "drift", url, "--scheduler", scheduler, "--serial", "KT9-0502", "--json",
                     "--figures", str(tmp_path / "figs"))
    assert [s["store"] for s in drift["benches"]] == ["b2/night"]
    written = sorted(p.name for p in (tmp_path / "figs").iterdir())
    assert "distribution-r_ohm.png" in written and "fleet-drift.json" in written and "b2--night" in written
    png = (tmp_path / "figs" / "distribution-r_ohm.png").read_bytes()
    assert png[:8] == b"\x89PNG\r\n\x1a\n"  # the PNG signature (RFC 2083 §3.1)
    late = run_json(capsys, "fleet", "drift", url, "--scheduler", scheduler, "--since", "2999-01-01T00:00:00",
                    "--json")
    assert late["benches"] == [] and late["distributions"] == []
    with open_records(fleet["data"]["b2"] / "night.h5") as reader:
        second = reader.index()[1].utc  # b2's second record: it and the records after it are kept
    recent = run_json(capsys, "fleet", "drift", url, "--scheduler", scheduler, "--since", second, "--json")
    counts = {s["store"]: s["records"] for s in recent["benches"]}
    assert counts["b2/night"] == RECORDS - 1 and all(0 <= n <= RECORDS for n in counts.values())


def workers_now(cluster: Any, n: int) -> None:
    cluster.scale(n)
    with distributed.Client(cluster) as client:
        client.wait_for_workers(n, timeout=60)
        deadline = time.monotonic() + 60
        while len(client.scheduler_info()["workers"]) != n:
            assert time.monotonic() < deadline
            time.sleep(0.05)


def test_fleet_compare_gives_one_table_on_one_and_two_workers(fleet, local_cluster, scheduler, tmp_path,
                                                                capsys) -> None:
    url = fleet["file_url"]
    tight = write_profile(tmp_path / "tight.toml", "b1", tolerance_pct=5.0)  # R within 5 % of 22 Ω
    two = run_json(capsys, "fleet", "compare", url, "-p", str(tight), "-o", str(tmp_path / "two.parquet"),
                   "--scheduler", scheduler, "--json")
    workers_now(local_cluster, 1)
    try:
        one = run_json(capsys, "fleet", "compare", url, "-p", str(tight), "-o", str(tmp_path / "one.parquet"),
                       "--scheduler", scheduler, "--json")
    finally:
        workers_now(local_cluster, 2)
    table_two, table_one = pq.read_table(tmp_path / "two.parquet"), pq.read_table(tmp_path / "one.parquet")
    assert table_two.equals(table_one) and one == {**two, "out": one["out"]}
    rows = [r for r in table_two.to_pylist() if r["bench"] in BENCHES]
    assert [(r["bench"], r["index"]) for r in rows] == [(b, i) for b in BENCHES for i in range(RECORDS)]
    assert {r["bench"]: r["verdict"] for r in rows} == {"b1": "pass", "b2": "pass", "b3": "fail"}
    # the same comparison in this process, on the record from the bench's own store, gives the same numbers
    spec = parse_dut_table(load_profile(tight).dut, str(tight))
    with open_records(fleet["data"]["b3"] / "night.h5") as reader:
        here = compare_spec(reader.read(2), spec).to_dict()
    row = next(r for r in rows if (r["bench"], r["index"]) == ("b3", 2))
    assert row["r_ohm"] == here["fit"]["values"]["r_ohm"] and row["verdict"] == here["verdict"]
    assert [row["r_ohm_ci95_low"], row["r_ohm_ci95_high"]] == here["fit"]["ci95"]["r_ohm"]
    assert row["serial"] == SERIALS["b3"] and row["v_c_nrmse"] == here["channels"][0]["nrmse"]


# -- what "verified" rests on -----------------------------------------------------------------------------
def s3_etag_of(data: bytes, part_bytes: int) -> str:
    """The ETag S3 gives an object uploaded in parts of ``part_bytes``: the MD5 of the parts' MD5 digests
    one after another, "-", the part count; for a single PUT the MD5 of the body (common practice: the
    AWS CLI's and SDKs' check; MD5 as RFC 1321 defines it, through hashlib)."""
    parts = [data[i:i + part_bytes] for i in range(0, len(data), part_bytes)]
    if len(parts) == 1:
        return hashlib.md5(data).hexdigest()
    return hashlib.md5(b"".join(hashlib.md5(p).digest() for p in parts)).hexdigest() + f"-{len(parts)}"


def s3_key(url: str, key: str) -> tuple[str, str]:
    bucket, _, prefix = url.removeprefix("s3://").partition("/")
    return bucket, f"{prefix}/{key}"


def test_an_unlisted_object_with_other_bytes_is_sent_again_not_adopted(fleet, request, tmp_path, capsys) -> None:
    """A sync killed after its upload completed leaves an object the catalog does not list; if those bytes
    are then not the segment's (same size, one byte changed), the next sync must not adopt it: the object's
    ETag, computed by the server, is not the local file's."""
    url = archive_url("s3", fleet, request)
    data = big_store(tmp_path, "tampered")
    (segment,) = sorted(data.glob("soak.0*.h5"))
    bucket, key = s3_key(url, f"tampered/soak/{segment.name}")
    env = {**os.environ, "ACQD_STORE_KILL_AT": "sync:uploaded"}
    proc = subprocess.run([sys.executable, "-m", "acqd", "sync", url, "-d", str(data)], env=env,
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == -signal.SIGKILL, proc.stderr
    original = segment.read_bytes()
    head = boto3.client("s3").head_object(Bucket=bucket, Key=key)
    assert head["ETag"].strip('"') == s3_etag_of(original, 16 << 20)  # two parts of 16 MiB and less
    other = bytearray(original)
    other[len(other) // 2] ^= 0xFF
    boto3.client("s3").put_object(Bucket=bucket, Key=key, Body=bytes(other))
    report = run_json(capsys, "sync", url, "-d", str(data), "--json")
    assert (len(report["uploaded"]), report["adopted"]) == (1, 0)
    assert read_object(url, f"tampered/soak/{segment.name}") == original


@pytest.mark.parametrize("kind", ["file", "s3"])
def test_verify_readback_sends_and_reads_back(kind: str, fleet, request, tmp_path, capsys) -> None:
    url = archive_url(kind, fleet, request) + "/readback"
    data = big_store(tmp_path, "rb")
    (segment,) = sorted(data.glob("soak.0*.h5"))
    report = run_json(capsys, "sync", url, "-d", str(data), "--verify", "readback", "--json")
    assert [e["sha256"] for e in report["uploaded"]] == [sha256_of(segment.read_bytes())]
    assert read_object(url, f"rb/soak/{segment.name}") == segment.read_bytes()
    again = run_json(capsys, "sync", url, "-d", str(data), "--verify", "readback", "--json")
    assert again["uploaded"] == [] and again["already"] == 1
    capsys.readouterr()
    assert main(["sync", url, "-d", str(data), "--verify", "twice"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "--verify" in err and "upload, readback" in err, err


# -- prune ------------------------------------------------------------------------------------------------
def aged_record(seed: int, bench: str, days_ago: float) -> Any:
    record = make_record(seed)
    record.bench_id = bench
    record.utc = time.strftime("%Y-%m-%dT%H:%M:%S+00:00", time.gmtime(time.time() - days_ago * 86400))
    return record


def aged_store(data: Path, bench: str, days_ago: list[float]) -> list[Path]:
    """A store of one record per finished segment, each taken ``days_ago`` before now; its segments."""
    data.mkdir(parents=True, exist_ok=True)
    with RecordStore(data / "night.h5", fsync=False, rotate_records=1) as store:
        for seed, age in enumerate(days_ago):
            store.append(aged_record(seed, bench, age))
    return sorted(data.glob("night.0*.h5"))


@pytest.mark.parametrize("kind", ["file", "s3"])
def test_prune_removes_only_old_segments_verified_in_the_archive(kind: str, fleet, request, tmp_path,
                                                                 capsys) -> None:
    url = archive_url(kind, fleet, request)
    bench = f"prune-{kind}"
    data = tmp_path / "data"
    old0, old1, recent, old_newest = aged_store(data, bench, [40, 35, 2, 50])
    kept_bytes = {p: p.read_bytes() for p in (old0, old1, recent, old_newest)}
    with RecordStore(data / "night.h5", fsync=False) as live:  # a writer appending, as the daemon would
        live.append(aged_record(9, bench, 0))
        (part,) = data.glob("*.part")
        report = run_json(capsys, "sync", url, "-d", str(data), "--prune", "30", "--json")
        # the live .part is never sent nor removed; the newest finished segment is old but goes too here,
        # since the live one after it carries the store's numbering on
        assert sorted(report["pruned"]) == sorted(map(str, (old0, old1, old_newest)))
        assert part.exists() and recent.exists() and not old0.exists()
        for path in (old0, old1, old_newest):  # what was removed is in the archive, byte for byte
            assert read_object(url, f"{bench}/night/{path.name}") == kept_bytes[path]
        pruned = [e for e in read_runlog(data / "runlog.jsonl") if e["event"] == "sync_pruned"]
        assert sorted(e["segment"] for e in pruned) == sorted(p.name for p in (old0, old1, old_newest))
        assert {e["sha256"] for e in pruned} == {sha256_of(kept_bytes[p]) for p in (old0, old1, old_newest)}
        live.append(aged_record(10, bench, 0))  # the writer carries on, its indices after every one given out
    with open_records(data / "night.h5") as reader:
        assert [s.index for s in reader.index()] == [2, 4, 5]
    import h5py
    with h5py.File(data / "night.h5", "r") as overview:  # rewritten over the segments left
        assert sorted(overview["segments"]) == ["000002", "000004"]
    # with no writer, the newest finished segment stays whatever its age: the next writer numbers from it
    newest = sorted(data.glob("night.0*.h5"))[-1]
    report = run_json(capsys, "sync", url, "-d", str(data), "--prune", "0", "--json")
    assert report["pruned"] == [str(recent)] and newest.exists()


@pytest.mark.parametrize("kind", ["file", "s3"])
def test_prune_keeps_a_segment_whose_archived_copy_changed(kind: str, fleet, request, tmp_path, capsys) -> None:
    url = archive_url(kind, fleet, request)
    bench = f"prune-changed-{kind}"
    data = tmp_path / "data"
    segments = aged_store(data, bench, [40, 39])
    assert main(["sync", url, "-d", str(data)]) == 0
    archived = bytearray(segments[0].read_bytes())
    archived[len(archived) // 2] ^= 0xFF  # the archived copy damaged after it was verified, same size
    if kind == "file":
        (Path(url.removeprefix("file://")) / bench / "night" / segments[0].name).write_bytes(bytes(archived))
    else:
        bucket, key = s3_key(url, f"{bench}/night/{segments[0].name}")
        boto3.client("s3").put_object(Bucket=bucket, Key=key, Body=bytes(archived))
    capsys.readouterr()
    assert main(["sync", url, "-d", str(data), "--prune", "30"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and segments[0].name in err and "never replaced" in err, err
    assert all(p.exists() for p in segments)
