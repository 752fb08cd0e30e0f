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


def test_worker_gives_the_analysis_the_daemon_process_would(demo_records) -> None:
    profile, records = demo_records
    judge = make_judge(profile)
    comparator = ComparatorProcess(profile)
    try:
        for record in records:
            assert comparator(record) == judge(record)  # reference: the in-process comparator
    finally:
        comparator.close()
    assert comparator.pid is None  # closed: no worker left behind


def test_a_killed_worker_costs_one_analysis_and_is_started_again(demo_records) -> None:
    profile, (record, _) = demo_records
    comparator = ComparatorProcess(profile)
    try:
        first = comparator(record)
        os.kill(comparator.pid, signal.SIGKILL)
        time.sleep(0.2)
        with pytest.raises(ComparatorFailed, match="exit code -9"):  # POSIX: killed by signal 9
            comparator(record)
        assert comparator(record) == first
        assert comparator.restarts == 1
    finally:
        comparator.close()


def test_a_hung_worker_is_stopped_at_the_timeout(demo_records) -> None:
    profile, (record, _) = demo_records
    comparator = ComparatorProcess(profile, timeout_s=0.001)  # far less than the worker's start-up takes
    try:
        hung = comparator.pid
        with pytest.raises(ComparatorFailed, match="took over 0.001 s"):
            comparator(record)
        assert comparator.pid is None
        with pytest.raises(OSError):
            os.kill(hung, 0)  # the old worker is gone, not left running beside the new one
        comparator.timeout_s = 60.0
        assert "verdict" in comparator(record)
    finally:
        comparator.close()


def test_ctrl_c_to_the_process_group_leaves_the_worker_comparing(demo_records) -> None:
    profile, (record, _) = demo_records
    comparator = ComparatorProcess(profile)
    try:
        comparator(record)  # started and ready
        os.kill(comparator.pid, signal.SIGINT)
        os.kill(comparator.pid, signal.SIGTERM)
        assert "verdict" in comparator(record)
        assert comparator.restarts == 0
    finally:
        comparator.close()
