"""A run configures once: later step tests only arm, wait and fetch, with one ``*ESR?`` per instrument;
everything is set up and read back again after a fault. Checked on what reached the simulated instruments
(their command logs) over real TCP, and on the records a run stores against those of step tests that each
set everything up (the behaviour before), from the same fixed-seed bench.

References: the standard event status register — reading ``*ESR?`` clears it, bit 7 is power-on (IEEE
488.2 §11.5.1); the per-record queries are those the driver files name for arming, waiting and fetching.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from acqd.benchsession import open_bench
from acqd.cli import main
from acqd.compare import compare_spec, parse_dut_table
from acqd.errors import InstrumentError
from acqd.profile import load_profile
from acqd.steptest import Applied, output_guard, run_step_test
from acqd.store import open_records
from test_run import output_commands, profile_file

# What a step test whose plan did not change may send: the status check, then arm, error queue after
# arming, wait, and for each channel its trace and axes (drivers/scpi-generator.toml, scpi-digitizer.toml).
PER_RECORD = {"generator": ("*ESR?",),
              "scope": ("*ESR?", "INITiate", "SYSTem:ERRor?", "*OPC?", "TRACe? CH", "TRACe:AXES? CH")}
SHORT_WAIT = ("averages = 1", "averages = 1\ntimeout_s = 0.5")


def _set_up(sent: list[str], role: str) -> list[str]:
    """The messages that are not part of a plain repeated capture."""
    return [text for text in sent if not text.startswith(PER_RECORD[role])]


class Logs:
    """The generator's and the scope's messages since the last ``take``."""

    def __init__(self, simulated) -> None:
        simulated.scope.start_logging()
        self.logs = {"generator": simulated.generator.command_log, "scope": simulated.scope.command_log}
        self.seen = {role: len(log) for role, log in self.logs.items()}

    def take(self) -> dict[str, list[str]]:
        out = {role: [e.text for e in log[self.seen[role]:]] for role, log in self.logs.items()}
        self.seen = {role: len(log) for role, log in self.logs.items()}
        return out


def test_five_records_send_set_up_only_before_the_first_and_again_after_faults(tmp_path: Path):
    profile = load_profile(profile_file(tmp_path, SHORT_WAIT))
    with open_bench(profile) as bench:
        simulated, logs, applied = bench.simulated, Logs(bench.simulated), Applied()
        with output_guard(bench.generator):
            for k in range(5):
                run_step_test(profile, bench.generator, bench.scope, applied)
                sent = logs.take()
                for role in ("generator", "scope"):
                    if k == 0:
                        assert _set_up(sent[role], role), role  # the first record sets everything up
                    else:
                        assert _set_up(sent[role], role) == [], (k, role)
                        assert sent[role].count("*ESR?") == 1, (k, role)

            # A power cycle keeps the connection but loses every setting; only *ESR? (PON) can tell.
            simulated.call(simulated.scope.power_cycle)
            (record,) = run_step_test(profile, bench.generator, bench.scope, applied)
            sent = logs.take()
            for role in ("generator", "scope"):
                assert "*CLS" in sent[role] and _set_up(sent[role], role) != ["*CLS"], role
            assert record.settings["scope"]["n_samples"] == profile.acquisition.samples  # read back again

            # A timeout: the error switches the output off; the next record verifies everything again.
            simulated.scope.faults.trigger_never = True
            with pytest.raises(InstrumentError, match="acquisition not complete"):
                run_step_test(profile, bench.generator, bench.scope, applied)
            simulated.scope.faults.trigger_never = False
            assert output_commands(simulated.generator.command_log)[-1] == "OUTPUT OFF"
            logs.take()
            run_step_test(profile, bench.generator, bench.scope, applied)
            sent = logs.take()
            for role in ("generator", "scope"):
                assert "*CLS" in sent[role] and len(_set_up(sent[role], role)) > 5, role
            run_step_test(profile, bench.generator, bench.scope, applied)
            assert all(_set_up(texts, role) == [] for role, texts in logs.take().items())
        assert output_commands(simulated.generator.command_log)[-1] == "OUTPUT OFF"


def test_acqd_run_stores_the_records_and_verdicts_of_step_tests_that_set_everything_up(tmp_path: Path):
    # Reference: the same fixed-seed bench, each step test on its own (set-up, read-back and output off
    # every time, as before a run configured once), compared with a fit started at the nominal values.
    path = profile_file(tmp_path)
    profile = load_profile(path)
    spec = parse_dut_table(profile.dut, profile.source, profile.text)
    with open_bench(profile) as bench:
        reference = [run_step_test(profile, bench.generator, bench.scope)[0] for _ in range(5)]
    assert main(["run", str(path), "-n", "5"]) == 0
    with open_records(tmp_path / "records.h5") as reader:
        stored = [reader.read(i) for i in range(len(reader))]
    assert len(stored) == 5
    for old, new in zip(reference, stored):
        assert new.checksum() == old.checksum()
        assert new.settings == old.settings and new.stimulus == old.stimulus and new.timebase == old.timebase
        before = compare_spec(old, spec)
        assert new.analysis["verdict"] == before.verdict.status
        assert [c["passed"] for c in new.analysis["checks"]] == [c.passed for c in before.verdict.checks]
        for name in before.fit.fitted:
            lo, hi = before.fit.ci95[name]
            assert abs(new.analysis["fit"]["values"][name] - before.fit.values[name]) <= (hi - lo) / 100
