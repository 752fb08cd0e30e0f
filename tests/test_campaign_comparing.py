"""The campaign's comparator in its own process: the same analysis as in the daemon's process, and a
worker that dies, hangs or gets the terminal's Ctrl-C costs one record's analysis at most.

Reference: the in-process comparator (``acqd.judge.make_judge``) on the same record; the analysis is
deterministic, so the two must agree exactly. Signals are those of POSIX (SIGKILL cannot be caught,
SIGINT is what a terminal's Ctrl-C sends to the process group).
"""

from __future__ import annotations

import os
import signal
import time
from collections.abc import Callable, Iterator
from pathlib import Path

import pytest

from acqd.benchsession import open_bench
from acqd.campaign.comparing import ComparatorFailed, ComparatorProcess
from acqd.judge import make_judge
from acqd.profile import load_profile
from acqd.record import Record
from acqd.steptest import run_step_test

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "profiles" / "demo-bridge-filter.toml"


@pytest.fixture(scope="module")
def demo_records() -> tuple[object, list[Record]]:
    """Two records of the demo profile from the simulated bench (over TCP, as a campaign gets them)."""
    profile = load_profile(DEMO)
    with open_bench(profile) as bench:
        records = [run_step_test(profile, bench.generator, bench.scope)[0] for _ in range(2)]
    return profile, records


@pytest.fixture
def worker(demo_records) -> Iterator[Callable[..., ComparatorProcess]]:
    """Factory: ``worker(timeout_s=...)`` starts a comparator worker for the demo profile; all are closed
    after the test, whatever it left."""
    started: list[ComparatorProcess] = []

    def start(**kwargs) -> ComparatorProcess:
        started.append(ComparatorProcess(demo_records[0], **kwargs))
        return started[-1]

    yield start
    for comparator in started:
        comparator.close()


def test_worker_gives_the_analysis_the_daemon_process_would(demo_records, worker) -> None:
    profile, records = demo_records
    judge = make_judge(profile)
    comparator = worker()
    for record in records:
        assert comparator(record) == judge(record)  # reference: the in-process comparator
    comparator.close()
    assert comparator.pid is None  # closed: no worker left behind


def test_a_worker_killed_while_idle_costs_nothing(demo_records, worker) -> None:
    record = demo_records[1][0]
    comparator = worker()
    first = comparator(record)
    killed = comparator.pid
    os.kill(killed, signal.SIGKILL)  # POSIX: SIGKILL cannot be caught
    time.sleep(0.2)
    assert comparator(record) == first  # the record never reached the dead worker: a new one compared it
    assert comparator.restarts == 1 and comparator.pid != killed


def test_a_worker_killed_mid_comparison_costs_that_analysis_only(demo_records, worker, monkeypatch) -> None:
    record = demo_records[1][0]
    comparator = worker()
    first = comparator(record)
    send = comparator._send

    def send_then_kill(rec: Record) -> None:  # the worker dies once the record is handed over
        send(rec)
        os.kill(comparator.pid, signal.SIGKILL)

    monkeypatch.setattr(comparator, "_send", send_then_kill)
    # POSIX: killed by signal 9
    with pytest.raises(ComparatorFailed, match=r"ended while comparing this record \(exit code -9\)"):
        comparator(record)
    monkeypatch.undo()
    assert comparator(record) == first


def test_a_worker_that_stops_answering_is_killed_at_the_timeout(demo_records, worker) -> None:
    record = demo_records[1][0]
    comparator = worker()
    comparator.wait_ready()
    stopped = comparator.pid
    os.kill(stopped, signal.SIGSTOP)  # POSIX: a stopped process neither reads nor answers
    comparator.timeout_s = 1.0
    started = time.monotonic()
    with pytest.raises(ComparatorFailed):  # the send (the record is larger than a socket buffer) or the
        comparator(record)                 # answer times out, whichever comes first
    assert time.monotonic() - started < 1.0 + 5.0  # bounded by the timeout, plus the kill and join
    with pytest.raises(OSError):
        os.kill(stopped, 0)  # the stopped worker was killed, not left beside the new one
    comparator.timeout_s = 60.0
    assert "verdict" in comparator(record)


def test_a_worker_that_does_not_start_in_time_is_reported(demo_records, worker) -> None:
    record = demo_records[1][0]
    comparator = worker(timeout_s=0.001)  # far less than its imports take
    with pytest.raises(ComparatorFailed, match="did not start within 0.001 s"):
        comparator.wait_ready()
    assert comparator.pid is None  # killed, not left running
    comparator.timeout_s = 60.0
    assert "verdict" in comparator(record)


def test_ctrl_c_or_a_stop_leaves_a_started_worker_comparing(demo_records, worker) -> None:
    record = demo_records[1][0]
    comparator = worker()
    # POSIX: SIGINT is what a terminal's Ctrl-C sends to the process group, SIGTERM what systemd's stop
    # sends to the cgroup.
    comparator.wait_ready()
    os.kill(comparator.pid, signal.SIGINT)
    os.kill(comparator.pid, signal.SIGTERM)
    assert "verdict" in comparator(record)
    assert comparator.restarts == 0
