"""Generator and Scope roles on the simulated bench, over real TCP through pyvisa-py.

The same acquisition code runs against both scope dialects with only the driver file changed; the volts are
checked against the series-RLC step response (Nilsson & Riedel, Electric Circuits ch. 8) and against each
other, within the 8-bit ADC's quantisation step (common practice for bench scopes).
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

from acqd.errors import ConfigError, InstrumentError, SafetyError
from acqd.instruments import Generator, Scope, open_instrument
from acqd.record import Stimulus

DRIVERS = Path(__file__).resolve().parents[1] / "drivers"
DIALECTS = {"scpi-digitiser": "scope", "divscope": "divscope"}  # driver → simulated bench resource
# The demo DUT (acqd.sim.bench.DEMO_DUT) behind the generator's 50 ohm source resistance.
R_OHM, L_H, C_F = 27.0 + 50.0, 3.3e-3, 68e-9
WINDOW_S, N, SHARE = 400e-6, 4000, 0.1
RANGE_V, OFFSET_V = 1.0, 0.75
LSB_V = 2 * RANGE_V / 256  # 8-bit ADC over offset ± range


def one_line(exc: BaseException) -> str:
    text = str(exc)
    assert "\n" not in text
    return text


def v_c_step(t: np.ndarray, volts: float) -> np.ndarray:
    """Textbook underdamped series RLC, capacitor voltage for a step of ``volts`` at t = 0 from rest:
    v_C = V[1 − e^{−σt}(cos ω_d t + σ/ω_d sin ω_d t)], σ = R/2L, ω_d = √(1/LC − σ²)."""
    sigma = R_OHM / (2 * L_H)
    omega_d = math.sqrt(1 / (L_H * C_F) - sigma ** 2)
    tt = np.clip(t, 0, None)
    v = volts * (1 - np.exp(-sigma * tt) * (np.cos(omega_d * tt) + sigma / omega_d * np.sin(omega_d * tt)))
    return np.where(t >= 0, v, 0.0)


@pytest.fixture
def bench(sim_bench, quiet_table):
    return sim_bench(quiet_table)


@pytest.fixture
def opened():
    roles: list = []

    def open_role(resource: str, driver: str | Path, **kwargs):
        role = open_instrument(resource, driver, **kwargs)
        roles.append(role)
        return role

    yield open_role
    for role in roles:
        role.close()


@pytest.fixture
def generator(bench, opened) -> Generator:
    """0 → 1 V square at 100 Hz, output on: each half period (5 ms) is 15 × the 2 % settling time 8L/R."""
    gen = opened(bench.resources["generator"], "scpi-generator")
    gen.apply_stimulus(Stimulus("square", 0.0, 1.0, 100.0, "rising"))
    gen.output(True)
    return gen


def acquire(scope: Scope, channel: str = "CH2", level_v: float = 0.5, timeout_s: float = 5.0):
    """The acquisition code the step test runs; identical for every dialect."""
    scope.configure_timebase(WINDOW_S, N, SHARE)
    scope.configure_channel(channel, RANGE_V, OFFSET_V, "dc")
    scope.configure_trigger("external", "rising", level_v)
    scope.arm()
    scope.wait(timeout_s)
    return scope.fetch(channel)


def test_same_code_both_dialects_gives_the_textbook_step(bench, opened, generator):
    captured = {}
    for driver, resource in DIALECTS.items():
        scope = opened(bench.resources[resource], driver)
        volts, timebase = acquire(scope)
        assert volts.dtype == np.float64
        # t = 0 at the trigger: window / n per sample, share × n samples before it.
        assert (timebase.sample_interval_s, timebase.pretrigger_samples, timebase.n_samples) == \
            (pytest.approx(WINDOW_S / N, rel=1e-12), round(SHARE * N), N)
        # The textbook response, quantised by an 8-bit ADC: within half a step, plus float32 rounding.
        expected = v_c_step(timebase.times(), 1.0)
        assert np.max(np.abs(volts - expected)) <= LSB_V / 2 + 1e-6
        captured[driver] = volts
    assert np.max(np.abs(captured["scpi-digitiser"] - captured["divscope"])) <= LSB_V


def test_generator_applies_in_order_and_reads_back(bench, opened):
    gen = opened(bench.resources["generator"], "scpi-generator")
    log = bench.generator.command_log
    before = len(log)
    gen.apply_stimulus(Stimulus("square", -0.5, 2.0, 250.0, "falling", load="matched"))
    sent = [entry.text for entry in log[before:]]
    # Output off before anything that shapes it (the project's safety rule, DEVELOPERS.md "Contracts": the
    # generator role turns the output off first).
    assert sent[0] == "OUTPut OFF"
    assert sent.index("FUNCtion SQUare") < sent.index("FREQuency 2.5E+02") < sent.index("OUTPut:LOADing MATChed")
    settings = gen.read_settings()
    assert (settings["low_v"], settings["high_v"], settings["frequency_hz"]) == (-0.5, 2.0, 250.0)
    assert (settings["shape"], settings["load"], settings["output"]) == ("square", "matched", False)
    assert settings["source_resistance_ohm"] == 50.0  # the simulated generator's documented 50 ohm


@pytest.mark.parametrize("stimulus, field", [
    (Stimulus("square", 0.0, 6.0, 100.0, "rising", load="matched"), "limits.max_level_v.matched"),
    (Stimulus("square", -11.0, 1.0, 100.0, "rising"), "limits.max_level_v.high_z"),
    (Stimulus("square", 0.0, 1.0, 2e6, "rising"), "limits.frequency_hz"),
    (Stimulus("triangle", 0.0, 1.0, 100.0, "rising"), "stimulus.shape"),
    (Stimulus("square;*RST", 0.0, 1.0, 100.0, "rising"), "stimulus.shape"),
    (Stimulus("square", 1.0, 0.0, 100.0, "rising"), "stimulus.high_v"),
    (Stimulus("square", 0.0, float("nan"), 100.0, "rising"), "stimulus.high_v"),
])
def test_refused_stimulus_sends_nothing(bench, opened, stimulus, field):
    gen = opened(bench.resources["generator"], "scpi-generator")
    log = bench.generator.command_log
    before = len(log)
    with pytest.raises(SafetyError) as info:
        gen.apply_stimulus(stimulus)
    text = one_line(info.value)
    assert text.startswith(str(DRIVERS / "scpi-generator.toml")) and field in text
    # The simulated generator logs every program message it receives: none arrived.
    assert len(log) == before


def test_instrument_refusal_is_read_from_the_error_queue(bench, opened):
    scope = opened(bench.resources["scope"], "scpi-digitiser")
    with pytest.raises(InstrumentError) as info:
        scope.configure_channel("CH1", 500.0, 0.0, "dc")  # the simulated DIG spans at most ±100 V
    text = one_line(info.value)
    # SCPI-1999 Vol 2 §21.8 / error list: −222 "Data out of range".
    assert text.startswith(bench.resources["scope"]) and "-222" in text


@pytest.mark.parametrize("driver", list(DIALECTS))
def test_trigger_that_never_comes_times_out_then_the_next_capture_works(bench, opened, generator, driver):
    scope = opened(bench.resources[DIALECTS[driver]], driver)
    with pytest.raises(InstrumentError) as info:
        acquire(scope, level_v=5.0, timeout_s=0.3)  # the stimulus never crosses 5 V
    text = one_line(info.value)
    assert text.startswith(bench.resources[DIALECTS[driver]]) and "not complete within 0.3 s" in text
    # The driver's abort operation disarmed it (SCPI-1999 ABORt; the second dialect's CATCh:HALT): a trigger
    # arriving late cannot complete the abandoned acquisition.
    assert getattr(bench, DIALECTS[driver]).acquisition.state == "IDLE"
    volts, timebase = acquire(scope)
    assert np.max(np.abs(volts - v_c_step(timebase.times(), 1.0))) <= LSB_V / 2 + 1e-6


def test_trigger_never_fault_on_the_digitiser(bench, opened, generator):
    scope = opened(bench.resources["scope"], "scpi-digitiser")
    bench.scope.faults.trigger_never = True
    with pytest.raises(InstrumentError) as info:
        acquire(scope, timeout_s=0.3)
    assert "not complete within 0.3 s" in one_line(info.value)
    bench.scope.faults.trigger_never = False
    assert len(acquire(scope)[0]) == N


def test_wrong_driver_for_the_instrument_is_refused(bench):
    with pytest.raises(InstrumentError) as info:
        open_instrument(bench.resources["divscope"], "scpi-digitiser")
    text = one_line(info.value)
    assert text.startswith(bench.resources["divscope"]) and "identifies as 'acqd-sim,DIVSCOPE" in text


@pytest.mark.parametrize("driver", list(DIALECTS))
def test_scope_settings_read_back_in_role_units(bench, opened, driver):
    scope = opened(bench.resources[DIALECTS[driver]], driver)
    scope.configure_timebase(WINDOW_S, N, SHARE)
    scope.configure_channel("CH3", 0.2, -0.1, "ac")
    scope.configure_trigger("external", "falling", 0.25)
    settings = scope.read_settings()
    assert settings["window_s"] == pytest.approx(WINDOW_S, rel=1e-12)
    assert (settings["n_samples"], settings["pretrigger_fraction"]) == (N, pytest.approx(SHARE, rel=1e-12))
    assert (settings["trigger_slope"], settings["trigger_level_v"]) == ("falling", 0.25)
    channel = settings["channels"]["CH3"]
    assert (channel["range_v"], channel["offset_v"], channel["coupling"]) == \
        (pytest.approx(0.2, rel=1e-12), -0.1, "ac")


def test_bad_role_values_are_one_line_and_send_nothing(bench, opened):
    scope = opened(bench.resources["scope"], "scpi-digitiser")
    with pytest.raises(ConfigError) as info:
        scope.configure_timebase(WINDOW_S, 20_000_000, SHARE)
    assert "limits.n_samples" in one_line(info.value)
    with pytest.raises(ConfigError) as info:
        scope.configure_channel("CH9", 1.0, 0.0, "dc")
    assert "allowed: CH1, CH2, CH3, CH4" in one_line(info.value)
    assert scope.session.query_error_queue() == []


def driver_variant(tmp_path: Path, old: str, new: str) -> Path:
    text = (DRIVERS / "scpi-digitiser.toml").read_text()
    assert old in text
    path = tmp_path / "digitiser-variant.toml"
    path.write_text(text.replace(old, new, 1))
    return path


def test_ascii_format_gives_the_same_volts(bench, opened, generator, tmp_path):
    ascii_driver = driver_variant(tmp_path, 'commands = ["FORMat REAL,32"', 'commands = ["FORMat ASCii"')
    ascii_driver.write_text(ascii_driver.read_text().replace('format = "REAL,32"', 'format = "ASCii"'))
    binary, _ = acquire(opened(bench.resources["scope"], "scpi-digitiser"))
    text, _ = acquire(opened(bench.resources["scope"], ascii_driver))
    # REAL,32 carries float32; ASCii the float64 value: they differ by float32 rounding only (numpy finfo).
    assert np.allclose(binary, text, rtol=float(np.finfo(np.float32).eps), atol=1e-7)


def test_after_fetch_hook_is_called(bench, opened, generator, tmp_path, monkeypatch):
    (tmp_path / "quirk_hook.py").write_text(
        "def invert(volts, timebase, *, channel, session):\n"
        "    return -volts, timebase\n")
    monkeypatch.syspath_prepend(str(tmp_path))
    monkeypatch.setenv("ACQD_HOOK_MODULES", "quirk_hook")
    hooked = driver_variant(tmp_path, 'channels = { CH1 = 1', 'hooks = { after_fetch = "quirk_hook:invert" }\n'
                                                             'channels = { CH1 = 1')
    plain, _ = acquire(opened(bench.resources["scope"], "scpi-digitiser"))
    inverted, _ = acquire(opened(bench.resources["scope"], hooked))
    np.testing.assert_array_equal(inverted, -plain)
