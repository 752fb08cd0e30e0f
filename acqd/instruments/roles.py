"""The instrument roles the step test talks to: ``Generator`` and ``Scope``, typed methods in SI units.

A role knows *what* to set (a stimulus, a time base, a channel, a trigger) and the order that keeps the
DUT safe; its driver file knows *how* a given model says it. Three rules hold for every method:

* every value is checked and every command built before the first one is sent, so a refused value
  leaves the instrument untouched;
* after configuring, the instrument's error queue is read, and any entry is an InstrumentError that
  lists them (an instrument that silently ignored a setting would otherwise produce a wrong record);
* a timeout drains the session, so the next reply belongs to the next query.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

from .. import scpi
from ..errors import ConfigError, InstrumentError, SafetyError
from ..record import EDGES, Stimulus, TimeBase
from ..visa import DEFAULT_BACKEND, InstrumentTimeout, Session
from ..visa.session import CLEAR_STATUS, EVENT_STATUS
from .driver import Driver, Readback, load_driver
from .expression import ExpressionError
from .search import find_driver

ESR_OPERATION_COMPLETE = 0x01  # bit 0 of the standard event status register (IEEE 488.2 §11.5.1.1)


class _Role:
    """What both roles share: the session, the driver, setup, sending with an error-queue check, readback."""

    role = ""

    def __init__(self, session: Session, driver: Driver) -> None:
        if driver.role != self.role:
            raise ConfigError(driver.source, "driver.role", f"is {driver.role!r}; a {self.role} driver is needed")
        self.session = session
        self.driver = driver
        self.identity = session.identity

    @property
    def resource(self) -> str:
        return self.session.resource

    def setup(self) -> None:
        """Start from an empty error queue (old entries are not ours), then the driver's setup commands."""
        self._send([CLEAR_STATUS, *(self.driver.render(t) for t in self.driver.setup)], "setup")

    def status_changed(self) -> bool:
        """One ``*ESR?``: whether anything was flagged since it was last read or cleared — an error (its
        bits 2–5) or a power cycle (bit 7, PON) — reading it clears it (IEEE 488.2 §11.5.1; bit 0, operation
        complete, is not a change). The cheap per-record check of a run that sends no set-up."""
        reply = self.session.query(EVENT_STATUS)
        try:
            return bool(scpi.parse_nr1(reply) & ~ESR_OPERATION_COMPLETE)
        except ValueError as exc:
            raise InstrumentError(self.resource, f"reply {reply!r} to {EVENT_STATUS!r}: {exc}") from None

    def close(self) -> None:
        self.session.close()

    def __enter__(self) -> _Role:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def _send(self, commands: list[str], what: str) -> None:
        for command in commands:
            self.session.write(command)
        entries = self.session.query_error_queue()
        if entries:
            listed = "; ".join(f"{code},{text!r}" for code, text in entries)
            raise InstrumentError(self.resource, f"{what} refused by the instrument: {listed} "
                                                 f"(sent: {' | '.join(commands)})")

    def _read(self, readbacks: tuple[Readback, ...], **inputs: Any) -> dict[str, Any]:
        values: dict[str, Any] = {}
        for rb in readbacks:
            if rb.value is not None:
                values[rb.key] = self._computed(rb, values)
                continue
            query = self.driver.render(rb.query, **inputs)
            reply = self.session.query(query)
            try:
                values[rb.key] = self._parse(rb, reply)
            except ValueError as exc:
                raise InstrumentError(self.resource, f"reply {reply!r} to {query!r} ({rb.key}): {exc}") from None
        return values

    def _computed(self, rb: Readback, values: dict[str, Any]) -> float:
        try:
            return rb.value.evaluate(values)
        except ExpressionError as exc:
            raise InstrumentError(self.resource, f"readback {rb.key}: {exc}") from None

    def _parse(self, rb: Readback, reply: str) -> Any:
        if rb.enum is not None:
            return self.driver.enum_word(rb.enum, reply)
        return {"float": scpi.parse_number, "int": scpi.parse_nr1, "bool": scpi.parse_bool,
                "text": scpi.parse_string}[rb.reply](reply)


class Generator(_Role):
    """A function generator producing the step stimulus (a square wave or pulse between two levels)."""

    role = "generator"

    @property
    def limits(self) -> dict[str, Any]:
        """``max_level_v`` per load setting, ``min_frequency_hz``, ``max_frequency_hz``."""
        return self.driver.limits

    def check_stimulus(self, stimulus: Stimulus) -> None:
        """SafetyError if the stimulus is outside this driver's vocabulary or limits; sends nothing."""
        self._check_words(stimulus)
        self._check_numbers(stimulus)

    def _check_words(self, stimulus: Stimulus) -> None:
        for name in ("shape", "load"):
            offered = self.driver.enums.get(name, {})
            if getattr(stimulus, name) not in offered:
                raise SafetyError(self.driver.source, f"stimulus.{name}",
                                  f"{getattr(stimulus, name)!r} is not offered by driver {self.driver.name}; "
                                  f"allowed: {', '.join(offered)}")
        if stimulus.edge not in EDGES:
            raise SafetyError(self.driver.source, "stimulus.edge", f"{stimulus.edge!r}; allowed: {', '.join(EDGES)}")

    def _check_numbers(self, stimulus: Stimulus) -> None:
        src, limits = self.driver.source, self.limits
        for name in ("low_v", "high_v", "frequency_hz"):
            value = getattr(stimulus, name)
            if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
                raise SafetyError(src, f"stimulus.{name}", f"must be a finite number, not {value!r}")
        if stimulus.high_v <= stimulus.low_v:
            raise SafetyError(src, "stimulus.high_v", f"{stimulus.high_v:g} V must be above low_v "
                                                      f"{stimulus.low_v:g} V for a step")
        max_level = limits["max_level_v"][stimulus.load]
        for name in ("low_v", "high_v"):
            if abs(getattr(stimulus, name)) > max_level:
                raise SafetyError(src, f"limits.max_level_v.{stimulus.load}",
                                  f"stimulus {name} = {getattr(stimulus, name):g} V is outside ±{max_level:g} V "
                                  f"({stimulus.load} load setting); nothing was sent")
        lo, hi = limits["min_frequency_hz"], limits["max_frequency_hz"]
        if not lo <= stimulus.frequency_hz <= hi:
            raise SafetyError(src, "limits.frequency_hz", f"stimulus frequency_hz = {stimulus.frequency_hz:g} Hz "
                                                          f"is outside {lo:g} – {hi:g} Hz; nothing was sent")

    def apply_stimulus(self, stimulus: Stimulus) -> None:
        """Check first, then output OFF, shape, frequency, load setting, levels — the output stays off."""
        self.check_stimulus(stimulus)
        d = self.driver
        commands = [*d.commands("output", on=False), *d.commands("shape", shape=stimulus.shape),
                    *d.commands("frequency", frequency_hz=stimulus.frequency_hz),
                    *d.commands("load", load=stimulus.load),
                    *d.commands("levels", low_v=stimulus.low_v, high_v=stimulus.high_v)]
        self._send(commands, "stimulus")

    def output(self, on: bool) -> None:
        self._send(self.driver.commands("output", on=bool(on)), f"output {'on' if on else 'off'}")

    def read_settings(self) -> dict[str, Any]:
        """What the generator actually applied, read back (keys as named in the driver's [readback])."""
        return self._read(self.driver.readback)


class Scope(_Role):
    """A digitiser capturing the response, triggered by the stimulus edge; fetches volts with t = 0 at the trigger."""

    role = "scope"

    def __init__(self, session: Session, driver: Driver) -> None:
        super().__init__(session, driver)
        self.channels = list(driver.channels)
        self._configured: list[str] = []

    def configure_timebase(self, window_s: float, n_samples: int, pretrigger_fraction: float) -> None:
        limits, src = self.driver.limits, self.driver.source
        _require(src, "window_s", window_s, "must be a positive number of seconds", lambda v: v > 0)
        if isinstance(n_samples, bool) or not isinstance(n_samples, int) \
                or not limits["min_samples"] <= n_samples <= limits["max_samples"]:
            raise ConfigError(src, "limits.n_samples", f"n_samples = {n_samples!r} is outside "
                                                      f"{limits['min_samples']} – {limits['max_samples']}")
        _require(src, "limits.max_pretrigger_fraction", pretrigger_fraction,
                 f"pretrigger_fraction must lie in 0 – {limits['max_pretrigger_fraction']:g}",
                 lambda v: 0 <= v <= limits["max_pretrigger_fraction"])
        self._send(self.driver.commands("timebase", window_s=window_s, n_samples=n_samples,
                                        pretrigger_fraction=pretrigger_fraction), "time base")

    def configure_channel(self, channel: str, range_v: float, offset_v: float, coupling: str) -> None:
        """``range_v`` is half the span: the channel shows offset_v ± range_v."""
        src = self.driver.source
        _require(src, "range_v", range_v, "must be a positive number of volts (half the span)", lambda v: v > 0)
        _require(src, "offset_v", offset_v, "must be a finite number of volts")
        self._send(self.driver.commands("channel", channel=channel, range_v=range_v, offset_v=offset_v,
                                        coupling=coupling), f"channel {channel}")
        if channel not in self._configured:
            self._configured.append(channel)

    def configure_trigger(self, source: str, slope: str, level_v: float) -> None:
        _require(self.driver.source, "level_v", level_v, "must be a finite number of volts")
        self._send(self.driver.commands("trigger", source=source, slope=slope, level_v=level_v), "trigger")

    def arm(self) -> None:
        self._send(self.driver.commands("arm"), "arm")

    def wait(self, timeout_s: float) -> None:
        """Until the armed acquisition is complete; on timeout abort, drain and name the resource."""
        rule = self.driver.wait
        query = self.driver.render(rule.query)
        deadline = time.monotonic() + timeout_s
        try:
            if rule.poll_interval_s is None:
                reply = self.session.query(query, timeout_s, drain=False)
            else:
                while (reply := self.session.query(query)).strip().upper() != rule.done.upper():
                    if time.monotonic() >= deadline:
                        raise InstrumentTimeout(self.resource, f"{query!r} still answers {reply!r}")
                    time.sleep(rule.poll_interval_s)
        except InstrumentTimeout as exc:
            self._abandon()
            raise InstrumentError(self.resource, f"acquisition not complete within {timeout_s:g} s "
                                                 f"({exc.problem}); is the trigger source connected and the "
                                                 f"level between the stimulus levels?") from None
        if reply.strip().upper() != rule.done.upper():
            raise InstrumentError(self.resource, f"{query!r} answered {reply!r}, expected {rule.done!r}")

    def _abandon(self) -> None:
        """After a timed-out wait: stop the acquisition (if the driver can) and drop any late reply."""
        try:
            for command in self.driver.commands("abort"):
                self.session.write(command)
            self.session.drain()
        except InstrumentError:
            self.session.close()  # reopened on next use; the timeout is what gets reported

    def fetch(self, channel: str) -> tuple[np.ndarray, TimeBase]:
        """The last record of ``channel`` in volts (float64) and its time base (t = 0 at the trigger)."""
        rule = self.driver.fetch
        query = self.driver.render(rule.query, channel=channel)
        if rule.format == "ASC":
            codes = self._decode(self.session.query(query).encode("ascii"), query)
        else:
            codes = self._decode(self.session.query_block(query), query)
        scale = self._scaling(channel)
        volts = np.multiply(codes, scale["volts_per_code"], dtype=np.float64)
        volts += scale["volts_at_code_0"]
        dt = scale["sample_interval_s"]
        if not dt > 0:
            raise InstrumentError(self.resource, f"sample interval {dt!r} s from the scaling rule is not positive")
        timebase = TimeBase(dt, int(round(-scale["first_sample_s"] / dt)), len(volts))
        hook = self.driver.hooks.get("after_fetch")
        if hook is not None:
            volts, timebase = hook(volts, timebase, channel=channel, session=self.session)
        return volts, timebase

    def _decode(self, payload: bytes, query: str) -> np.ndarray:
        rule = self.driver.fetch
        try:
            return scpi.decode_samples(payload, rule.format, rule.byte_order)
        except ValueError as exc:
            raise InstrumentError(self.resource, f"reply to {query!r}: {exc}") from None

    def _scaling(self, channel: str) -> dict[str, float]:
        fields: dict[str, float] = {}
        for sq in self.driver.fetch.scaling_queries:
            query = self.driver.render(sq.query, channel=channel)
            reply = self.session.query(query)
            try:
                numbers = [scpi.parse_number(v) for v in scpi.split_reply(reply, ",")]
            except ValueError as exc:
                raise InstrumentError(self.resource, f"reply {reply!r} to {query!r}: {exc}") from None
            if len(numbers) != len(sq.fields):
                raise InstrumentError(self.resource, f"reply {reply!r} to {query!r} has {len(numbers)} values; "
                                                     f"the driver names {len(sq.fields)}: {', '.join(sq.fields)}")
            fields.update(zip(sq.fields, numbers))
        try:
            return {name: expr.evaluate(fields) for name, expr in self.driver.fetch.rule.items()}
        except ExpressionError as exc:
            raise InstrumentError(self.resource, f"scaling rule: {exc}") from None

    def read_settings(self) -> dict[str, Any]:
        """Instrument-wide settings read back, plus ``channels`` for every channel configured here."""
        settings = self._read(self.driver.readback)
        settings["channels"] = {ch: self._read(self.driver.channel_readback, channel=ch) for ch in self._configured}
        return settings


class Switch(_Role):
    """A relay multiplexer between the instruments and a fixture of units: channel lists closed and opened.

    Every change is followed by the driver's settling wait (relay contacts bounce for a few milliseconds
    after they move), so whatever is measured next sees a settled path.
    """

    role = "switch"

    @property
    def channels(self) -> tuple[int, ...]:
        return self.driver.switch.channels

    @property
    def settle_s(self) -> float:
        return self.driver.switch.settle_s

    def check_stimulus(self, stimulus: Stimulus) -> None:
        """SafetyError if the stimulus could drive more voltage or current through a relay than it is rated
        for; sends nothing. The worst case is the generator's open-circuit voltage (EMF) across the open
        contacts, and that EMF into a short behind the generator's source resistance through closed ones."""
        limits, src = self.driver.limits, self.driver.source
        peak_v = max(abs(v) for v in stimulus.levels_emf())
        if peak_v > limits["max_voltage_v"]:
            raise SafetyError(src, "limits.max_voltage_v", f"the stimulus reaches {peak_v:g} V open-circuit, over "
                                                          f"the switch's {limits['max_voltage_v']:g} V; nothing "
                                                          f"was closed")
        peak_a = peak_v / stimulus.source_resistance_ohm
        if peak_a > limits["max_current_a"]:
            raise SafetyError(src, "limits.max_current_a", f"the stimulus can drive {peak_a:g} A into a short "
                                                          f"({peak_v:g} V behind {stimulus.source_resistance_ohm:g} "
                                                          f"ohm), over the switch's {limits['max_current_a']:g} A; "
                                                          f"nothing was closed")

    def close_channels(self, channels: tuple[int, ...]) -> None:
        """Close these relays (``close`` alone is the role's: it closes the connection)."""
        self._change("close", channels)

    def open_channels(self, channels: tuple[int, ...]) -> None:
        self._change("open", channels)

    def open_all(self) -> None:
        self._change("open_all", None)

    def _change(self, operation: str, channels: tuple[int, ...] | None) -> None:
        inputs = {} if channels is None else {"channels": tuple(channels)}
        self._send(self.driver.commands(operation, **inputs), f"switch {operation.replace('_', ' ')}")
        time.sleep(self.settle_s)

    def closed(self, channels: tuple[int, ...]) -> tuple[bool, ...]:
        """Whether each channel is closed, as the switch reports it (one answer per channel asked)."""
        query = self.driver.render(self.driver.switch.closed_query, channels=tuple(channels))
        reply = self.session.query(query)
        try:
            states = scpi.parse_bool_list(reply)
        except ValueError as exc:
            raise InstrumentError(self.resource, f"reply {reply!r} to {query!r}: {exc}") from None
        if len(states) != len(channels):
            raise InstrumentError(self.resource, f"reply {reply!r} to {query!r} has {len(states)} states for "
                                                 f"{len(channels)} channels")
        return states

    def closed_channels(self) -> tuple[int, ...]:
        """Every channel of the switch that is closed now (an earlier run may have left some closed)."""
        return tuple(c for c, on in zip(self.channels, self.closed(self.channels)) if on)

    def read_settings(self) -> dict[str, Any]:
        return self._read(self.driver.readback)


def _require(source: str, field: str, value: Any, problem: str,
             ok: Callable[[float], bool] = lambda v: True) -> None:
    """ConfigError unless ``value`` is a finite number (not a bool) for which ``ok`` holds."""
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value) or not ok(value):
        raise ConfigError(source, field, f"{problem}, not {value!r}")


def open_instrument(resource: str, driver: str | Path, *, backend: str = DEFAULT_BACKEND,
                    timeout_s: float = 5.0) -> Generator | Scope | Switch:
    """Load the driver, connect, check ``*IDN?`` against it, run its setup; the role the driver declares.

    The driver file is validated before the instrument is touched; an identity the driver does not accept
    closes the connection and says which driver would fit (``acqd identify``).
    """
    drv = load_driver(find_driver(driver))
    session = Session(resource, backend=backend, timeout_s=timeout_s).open()
    try:
        if not drv.matches(session.identity):
            raise InstrumentError(resource, f"identifies as {session.identity!r}, which driver {drv.name} does "
                                            f"not accept (idn = {drv.idn.pattern!r}); `acqd identify {resource}` "
                                            f"names a driver that fits")
        role = {"generator": Generator, "scope": Scope, "switch": Switch}[drv.role](session, drv)
        role.setup()
    except BaseException:
        session.close()
        raise
    return role
