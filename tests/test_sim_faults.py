"""``[bench.simulated.faults]``: random faults at stated rates, seen from a plain pyvisa-py session over real
TCP (and through ``acqd run``), each kind at rate 1, and a rate's draws against the binomial distribution.

References: IEEE 488.2 §10.12 (``*OPC?``) and §11.5.1 (a power-on resets the settings to their ``*RST``
values; 1 kHz is the simulated generator's, DEVELOPERS.md's table); SCPI-1999 Vol 2 §21.8 (−200 is
"Execution error"); the binomial distribution's mean np and standard deviation √(np(1−p)) (common
practice).
"""

from __future__ import annotations

import math
import time
from pathlib import Path

import pytest
import pyvisa

from acqd.cli import main
from test_run import profile_file

def _faults(**rates: float) -> dict:
    return {"faults": {"seed": 4, **rates}}


def test_a_reply_delay_and_a_slow_opc_wait_before_the_reply(sim_bench, visa) -> None:
    bench = sim_bench(_faults(reply_delay=1.0, reply_delay_s=0.3))
    session = visa(bench.resources["generator"])
    started = time.monotonic()
    assert session.query("*IDN?").startswith("acqd-sim,FG")
    assert time.monotonic() - started >= 0.3
    slow = sim_bench(_faults(slow_opc=1.0, reply_delay_s=0.3))
    session = visa(slow.resources["generator"])
    started = time.monotonic()
    assert session.query("*IDN?").startswith("acqd-sim,FG")  # only *OPC? is slow
    assert time.monotonic() - started < 0.3
    started = time.monotonic()
    assert session.query("*OPC?") == "1"
    assert time.monotonic() - started >= 0.3


def test_a_short_read_still_delivers_the_whole_reply(sim_bench, visa) -> None:
    bench = sim_bench(_faults(short_read=1.0))
    session = visa(bench.resources["generator"])
    assert session.query("*IDN?").startswith("acqd-sim,FG,0,")


def test_an_error_entry_follows_each_message(sim_bench, visa) -> None:
    bench = sim_bench(_faults(error_entry=1.0))
    session = visa(bench.resources["generator"])
    session.write("*CLS")
    code, _ = session.query("SYSTem:ERRor?").split(",", 1)
    assert int(code) == -200  # SCPI-1999: Execution error


def test_a_power_cycle_loses_the_settings(sim_bench, visa) -> None:
    bench = sim_bench(_faults(power_cycle=1.0))
    session = visa(bench.resources["generator"])
    session.write("FREQuency 2500")
    assert float(session.query("FREQuency?")) == 1000.0  # the *RST frequency, not the 2.5 kHz just set
    assert int(session.query("*ESR?")) & 0x80  # PON


def test_a_connection_reset_between_messages(sim_bench, visa) -> None:
    bench = sim_bench(_faults(connection_reset=1.0))
    session = visa(bench.resources["generator"], timeout_ms=1000)
    with pytest.raises((pyvisa.errors.VisaIOError, ConnectionError, OSError)):
        session.query("*IDN?")


@pytest.mark.parametrize("kind", ["cut_block", "garble_block", "trigger_never"])
def test_capture_faults_stop_acqd_run_after_the_stated_failures(tmp_path: Path, kind: str, capsys) -> None:
    extra = f'\n[bench.simulated.faults]\nseed = 1\n{kind} = 1.0\n'
    profile = profile_file(tmp_path, ("[bench.simulated.dut]", extra + "\n[bench.simulated.dut]"),
                           ("averages = 1", "averages = 1\ntimeout_s = 0.5"))
    assert main(["run", str(profile), "-n", "20"]) == 2
    out, err = capsys.readouterr()
    assert out.count("not acquired:") == 5 and "5 step tests in a row not acquired" in err


def test_a_rate_is_drawn_as_stated_and_repeats_with_its_seed(sim_bench, visa) -> None:
    n, p = 400, 0.3
    counts = []
    for _ in range(2):
        bench = sim_bench({"faults": {"seed": 11, "error_entry": p}})
        session = visa(bench.resources["generator"])
        for _ in range(n):
            session.write("*CLS")
        assert session.query("*OPC?") == "1"  # every message before it has been executed: n + 1 chances
        counts.append(bench.generator.faults.plan.counts["error_entry"])
    assert counts[0] == counts[1]  # the same seed, the same faults
    mean, sd = (n + 1) * p, math.sqrt((n + 1) * p * (1 - p))  # binomial
    assert abs(counts[0] - mean) < 5 * sd
