"""The bench profile: one TOML file saying what to connect, what to apply, what to capture and where to
store it. ``load_profile`` turns it into frozen plans, or one ConfigError line naming file, line and key.

Every check that can be made without touching an instrument is made here, so a bad profile never sends a
command or creates a file.
"""

from __future__ import annotations

import hashlib
import string
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from . import scpi
from .config import Table, load_toml
from .record import EDGES, LOADS, Stimulus, bench_id_problem
from .visa import DEFAULT_BACKEND, NAMED_BACKENDS

SHAPES = ("square", "pulse")
BENCH_KINDS = ("simulated", "visa")
NETLIST_FILE = "netlist_file"  # a model table's key: the netlist in a file beside the profile
NETLIST_MAX_BYTES = 1_000_000  # a netlist is a page of text; anything larger is not one
COUPLINGS = ("dc", "ac")
# Physical sanity, beyond any bench this drives: a value past these is a typo (1e300 reached the scope as a
# range it refused, a step test "not acquired", instead of one line about the profile). The instruments'
# own, narrower limits come from their driver files.
MAX_VOLTS = 1000.0       # a level, range, offset or trigger level, V
MAX_FREQUENCY_HZ = 1e10  # the profile's frequency limit, Hz
MAX_WINDOW_S = 3600.0    # one capture's window, s
MAX_TIMEOUT_S = 86400.0  # waiting for an instrument or a capture, s


@dataclass(frozen=True)
class InstrumentPlan:
    """One instrument: its driver file (name or path) and, on a real bench, its VISA resource."""

    role: str
    driver: str
    resource: str | None
    timeout_s: float
    backend: str


@dataclass(frozen=True)
class BenchPlan:
    kind: str
    generator: InstrumentPlan
    scope: InstrumentPlan
    simulated: dict[str, Any] | None  # the [bench.simulated] table, validated by the simulated bench
    switch: InstrumentPlan | None = None  # optional: a bench without a switch tests one unit at a time
    bench_id: str = ""  # the bench's name, carried by every record it takes; "" when the profile gives none


@dataclass(frozen=True)
class StimulusPlan:
    shape: str
    low_v: float
    high_v: float
    frequency_hz: float
    edges: tuple[str, ...]
    load: str

    def stimulus(self, edge: str) -> Stimulus:
        return Stimulus(self.shape, self.low_v, self.high_v, self.frequency_hz, edge, self.load)


@dataclass(frozen=True)
class ChannelPlan:
    """A scope input: ``input`` is the instrument's name (CH1), ``name`` what the record calls it."""

    input: str
    name: str
    range_v: float | None  # None only with [acquisition] auto = true, until acqd.plan proposes it
    offset_v: float
    coupling: str


@dataclass(frozen=True)
class MathChannel:
    """A linear combination of captured channels: (Σ coefficient·channel + offset) / divide_by."""

    name: str
    unit: str
    terms: dict[str, float]
    divide_by: float = 1.0
    offset: float = 0.0

    def evaluate(self, channels: dict[str, np.ndarray]) -> np.ndarray:
        total = sum(coef * channels[name] for name, coef in self.terms.items())
        return (total + self.offset) / self.divide_by

    @property
    def source(self) -> str:
        """The formula as text, stored with the record so nobody must guess how a current was inferred."""
        terms = " ".join(f"{'+' if c >= 0 else '-'} {abs(c):g}*{n}" for n, c in self.terms.items()).lstrip("+ ")
        offset = f" + {self.offset:g}" if self.offset else ""
        return f"({terms}{offset}) / {self.divide_by:g}"


@dataclass(frozen=True)
class AcquisitionPlan:
    """The scope's set-up. With ``auto`` the time base and ranges may be None until acqd.plan fills them."""

    window_s: float | None
    pretrigger_fraction: float
    samples: int | None
    averages: int
    channels: tuple[ChannelPlan, ...]
    trigger_level_v: float | None
    timeout_s: float | None
    auto: bool = False


@dataclass(frozen=True)
class Limits:
    """The profile's own output limits (the DUT's ratings); drivers carry the instrument's."""

    max_level_v: float
    max_frequency_hz: float


@dataclass(frozen=True)
class OutputPlan:
    file: Path
    fsync: bool
    rotate_records: int


@dataclass(frozen=True)
class BatchUnit:
    """One unit of a batch: its serial, the switch channels that connect it, its own nominal values."""

    serial: str
    channels: tuple[int, ...]
    nominal: dict[str, Any]  # over the [dut] table's values for this unit (a part of another value)


@dataclass(frozen=True)
class Batch:
    name: str
    units: tuple[BatchUnit, ...]


@dataclass(frozen=True)
class Profile:
    path: Path
    text: str
    name: str
    bench: BenchPlan
    stimulus: StimulusPlan
    acquisition: AcquisitionPlan
    math: tuple[MathChannel, ...]
    dut: dict[str, Any]
    limits: Limits
    output: OutputPlan
    campaign: dict[str, Any] = field(default_factory=dict)
    batch: Batch | None = None

    @property
    def sha256(self) -> str:
        return hashlib.sha256(self.text.encode("utf-8")).hexdigest()

    @property
    def source(self) -> str:
        return str(self.path)


def load_profile(path: str | Path) -> Profile:
    """Read and validate a profile; any problem is one ConfigError naming file, line, key and what is allowed."""
    path = Path(path)
    data, text = load_toml(path)
    top = Table(data, str(path), "", text)
    name = top.table("profile", {}).string("name", path.stem)
    _done_profile_table(top)
    limits = _limits(top.table("limits"))
    bench = _bench(top.table("bench"), path.parent)
    stimulus = _stimulus(top.table("stimulus"), limits)
    acquisition = _acquisition(top.table("acquisition"))
    math = _math(top.table("math", {}), acquisition)
    dut = _dut(top.table("dut", {}), path.parent)
    output = _output(top.table("output", {}), path)
    campaign = dict(top.raw("campaign", {}))
    batch = _batch(top.table("batch"), name) if top.has("batch") else None
    if batch is not None and bench.switch is None:
        raise top.error("batch", "a batch needs a switch to step through its units: add [bench.switch] with "
                                 "its driver (e.g. driver = \"scpi-switch\")")
    top.done()
    return Profile(path, text, name, bench, stimulus, acquisition, math, dut, limits, output, campaign, batch)


def _done_profile_table(top: Table) -> None:
    info = top.table("profile", {})
    info.string("name", None)
    info.string("description", None)
    info.done()


def _limits(t: Table) -> Limits:
    limits = Limits(max_level_v=t.number("max_level_v", positive=True, max=MAX_VOLTS, unit="V"),
                    max_frequency_hz=t.number("max_frequency_hz", positive=True, max=MAX_FREQUENCY_HZ, unit="Hz"))
    t.done()
    return limits


def _instrument(t: Table, role: str, kind: str) -> InstrumentPlan:
    driver = t.string("driver")
    resource = t.string("resource", None)
    if kind == "visa" and resource is None:
        raise t.error("resource", "missing (required on a visa bench), e.g. 'TCPIP0::192.0.2.10::5025::SOCKET'")
    if kind == "simulated" and resource is not None:
        raise t.error("resource", "not allowed on the simulated bench (it picks its own ports)")
    plan = InstrumentPlan(role, driver, resource, t.number("timeout_s", 5.0, positive=True, max=MAX_TIMEOUT_S, unit="s"),
                          t.string("backend", DEFAULT_BACKEND, choices=NAMED_BACKENDS))
    t.done()
    return plan


def _bench(t: Table, profile_dir: Path) -> BenchPlan:
    kind = t.string("kind", choices=BENCH_KINDS)
    bench_id = t.string("bench_id", None) or ""
    if t.has("bench_id") and bench_id_problem(bench_id):
        raise t.error("bench_id", bench_id_problem(bench_id))
    generator = _instrument(t.table("generator"), "generator", kind)
    scope = _instrument(t.table("scope"), "scope", kind)
    switch = _instrument(t.table("switch"), "switch", kind) if t.has("switch") else None
    simulated = t.raw("simulated", None)
    if kind == "simulated" and simulated is None:
        simulated = {}
    if kind == "visa" and simulated is not None:
        raise t.error("simulated", "only allowed when kind = 'simulated'")
    if simulated is not None:
        table = t.table("simulated")  # type check only; the simulated bench validates its own keys
        if isinstance(simulated.get("dut"), dict):
            simulated = {**simulated, "dut": _inline_netlist_file(table.table("dut"), profile_dir)}
    t.done()
    return BenchPlan(kind, generator, scope, simulated, switch, bench_id)


def _batch(t: Table, profile_name: str) -> Batch:
    """``[[batch.units]]`` listed one by one, or ``[batch.range]`` with a serial pattern; not both."""
    name = t.string("name", profile_name)
    if t.has("units") == t.has("range"):
        raise t.error("units", "give the units either as [[batch.units]] (serial, channels) or as [batch.range] "
                               "(count, serial pattern, first unit's channels), exactly one of them")
    units = _listed_units(t) if t.has("units") else _ranged_units(t.table("range"))
    t.done()
    seen_serials: dict[str, int] = {}
    seen_paths: dict[tuple[int, ...], str] = {}
    for i, unit in enumerate(units):
        if unit.serial in seen_serials:
            raise t.error("units", f"serial {unit.serial!r} appears twice (units {seen_serials[unit.serial] + 1} "
                                   f"and {i + 1}); every unit needs its own")
        key = tuple(sorted(unit.channels))
        if key in seen_paths:
            raise t.error("units", f"units {seen_paths[key]!r} and {unit.serial!r} have the same switch path "
                                   f"{scpi.format_channel_list(unit.channels)}; one would be measured as the other")
        seen_serials[unit.serial] = i
        seen_paths[key] = unit.serial
    return Batch(name, tuple(units))


def _listed_units(t: Table) -> list[BatchUnit]:
    raw = t.raw("units")
    if not isinstance(raw, list) or not raw or not all(isinstance(u, dict) for u in raw):
        raise t.error("units", "must be a non-empty array of tables: [[batch.units]] serial = ..., channels = ...")
    units = []
    for i, entry in enumerate(raw):
        u = Table(entry, t.source, f"{t.path}.units[{i}]", t.text)
        nominal = u.table("nominal", {})
        unit = BatchUnit(u.string("serial"), _channel_list(u, "channels"), _nominal(nominal))
        nominal.done()
        u.done()
        units.append(unit)
    return units


def _nominal(t: Table) -> dict[str, Any]:
    """A unit's own nominal values: numbers only (the comparator checks that each names a model part)."""
    return {name: t.number(name) for name in list(t.data)}


def _ranged_units(t: Table) -> list[BatchUnit]:
    """``count`` units: serial ``pattern.format(n=first + i)``, channels the first unit's + i × channel_step."""
    count = t.integer("count", min=1, max=10_000)
    first = t.integer("first", 1, min=0)
    pattern = _serial_pattern(t, "serial", first)
    channels = _channel_list(t, "channels")
    step = t.integer("channel_step", 1, min=1)
    t.done()
    return [BatchUnit(pattern.format(n=first + i), tuple(c + i * step for c in channels), {}) for i in range(count)]


def _serial_pattern(t: Table, key: str, first: int) -> str:
    """A serial pattern with one ``{n}`` (optionally ``{n:04d}``) for the unit number."""
    pattern = t.string(key)
    try:
        fields = [(name, spec) for _, name, spec, _ in string.Formatter().parse(pattern) if name is not None]
        if [name for name, _ in fields] != ["n"]:
            raise ValueError("needs exactly one {n}")
        pattern.format(n=first)
    except (ValueError, IndexError, KeyError) as exc:
        raise t.error(key, f"{pattern!r} is not a serial pattern ({exc}); write e.g. \"KT9-48{{n:02d}}\"") from None
    return pattern


def _channel_list(t: Table, key: str) -> tuple[int, ...]:
    """Channels as a channel list ``"(@101,201)"`` or an array ``[101, 201]``: each once, at least one."""
    raw = t.raw(key)
    try:
        if isinstance(raw, str):
            channels = scpi.parse_channel_list(raw)
        elif isinstance(raw, list) and all(isinstance(c, int) and not isinstance(c, bool) and c > 0 for c in raw):
            channels = tuple(raw)
        else:
            raise ValueError(f"not a channel list, got {raw!r}")
    except ValueError as exc:
        raise t.error(key, f"{exc}; write \"(@101,201)\" or [101, 201]") from None
    if not channels or len(set(channels)) != len(channels):
        raise t.error(key, f"{raw!r} must name at least one channel, each once")
    return channels


def _inline_netlist_file(t: Table, profile_dir: Path) -> dict[str, Any]:
    """A model table with ``netlist_file = "ladder.cir"`` (relative to the profile) gets the file's text
    as its ``netlist``, so a record stores the circuit itself, not a path whose file may change later."""
    data = dict(t.data)
    if NETLIST_FILE not in data:
        return data
    if "netlist" in data:
        raise t.error(NETLIST_FILE, "give the netlist inline (netlist) or as a file (netlist_file), not both")
    path = profile_dir / t.string(NETLIST_FILE)
    try:
        size = path.stat().st_size
        if size > NETLIST_MAX_BYTES:
            raise t.error(NETLIST_FILE, f"{path} is {size} bytes; a netlist file has at most {NETLIST_MAX_BYTES}")
        data["netlist"] = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise t.error(NETLIST_FILE, f"cannot read {path}: {exc.strerror}") from None
    except UnicodeDecodeError:
        raise t.error(NETLIST_FILE, f"{path} is not UTF-8 text") from None
    del data[NETLIST_FILE]
    return data


def _stimulus(t: Table, limits: Limits) -> StimulusPlan:
    shape = t.string("shape", "square", choices=SHAPES)
    if t.has("amplitude_vpp") or t.has("offset_v"):
        if t.has("low_v") or t.has("high_v"):
            raise t.error("amplitude_vpp", "give either low_v/high_v or amplitude_vpp/offset_v, not both")
        amplitude = t.number("amplitude_vpp", positive=True, unit="V peak-to-peak")
        offset = t.number("offset_v", 0.0, unit="V")
        low, high = offset - amplitude / 2, offset + amplitude / 2
        level_key = "amplitude_vpp"
    else:
        low, high = t.number("low_v", unit="V"), t.number("high_v", unit="V")
        if high <= low:
            raise t.error("high_v", f"must be above low_v ({low:g} V), not {high:g} V")
        level_key = "high_v" if abs(high) >= abs(low) else "low_v"
    if max(abs(low), abs(high)) > limits.max_level_v:
        raise t.error(level_key, f"puts a level at {max(abs(low), abs(high)):g} V, over the profile's "
                                 f"limit limits.max_level_v = {limits.max_level_v:g} V; nothing was sent")
    frequency = t.number("frequency_hz", positive=True, unit="Hz", max=limits.max_frequency_hz)
    edge = t.string("edge", "rising", choices=(*EDGES, "both"))
    plan = StimulusPlan(shape, low, high, frequency, EDGES if edge == "both" else (edge,),
                        t.string("load", "high_z", choices=LOADS))
    t.done()
    return plan


def _acquisition(t: Table) -> AcquisitionPlan:
    """With ``auto = true`` the time base, ranges and trigger level may be left out: acqd.plan proposes
    them from the DUT's model (values given anyway are checked against the proposal, and replaced)."""
    auto = t.boolean("auto", False)
    optional = None if auto else ...
    window = t.number("window_s", optional, positive=True, max=MAX_WINDOW_S, unit="s")
    fraction = t.number("pretrigger_fraction", 0.2, min=0.0, max=0.9)
    samples = t.integer("samples", optional, min=16, max=10_000_000)
    averages = t.integer("averages", 1, min=1, max=10_000)
    channels_table = t.table("channels")
    channels = []
    for key in list(channels_table.data):
        channels.append(_channel(channels_table.table(key), key, auto))
    channels_table.done()
    if not channels:
        raise t.error("channels", "at least one channel is needed, e.g. [acquisition.channels.CH1]")
    names = [c.name for c in channels]
    if len(set(names)) != len(names):
        raise t.error("channels", f"channel names must be unique, got {names}")
    plan = AcquisitionPlan(window, fraction, samples, averages, tuple(channels),
                           t.number("trigger_level_v", None, min=-MAX_VOLTS, max=MAX_VOLTS, unit="V"),
                           t.number("timeout_s", None, positive=True, max=MAX_TIMEOUT_S, unit="s"), auto)
    t.done()
    return plan


def _channel(t: Table, scope_input: str, auto: bool) -> ChannelPlan:
    plan = ChannelPlan(scope_input, t.string("name", scope_input),
                       t.number("range_v", None if auto else ..., positive=True, max=MAX_VOLTS,
                                unit="V, half the span around offset_v"),
                       t.number("offset_v", 0.0, min=-MAX_VOLTS, max=MAX_VOLTS, unit="V"), t.string("coupling", "dc", choices=COUPLINGS))
    t.done()
    return plan


def _math(t: Table, acquisition: AcquisitionPlan) -> tuple[MathChannel, ...]:
    captured = [c.name for c in acquisition.channels]
    channels = []
    for name in list(t.data):
        m = t.table(name)
        terms_table = m.table("terms")
        terms = {}
        for term in list(terms_table.data):
            if term not in captured:
                raise terms_table.error(term, f"not a captured channel; channels are {', '.join(captured)}")
            terms[term] = terms_table.number(term)
        terms_table.done()
        if not terms:
            raise m.error("terms", "needs at least one channel, e.g. terms = { v_src = 1.0, v_rl = -1.0 }")
        if name in captured:
            raise t.error(name, "a math channel cannot reuse a captured channel's name")
        channels.append(MathChannel(name, m.string("unit", "V"), terms,
                                    m.number("divide_by", 1.0), m.number("offset", 0.0)))
        if channels[-1].divide_by == 0:
            raise m.error("divide_by", "must not be 0")
        m.done()
    t.done()
    return tuple(channels)


def _dut(t: Table, profile_dir: Path) -> dict[str, Any]:
    """The [dut] table as it is (a netlist file read in); with a ``model`` the comparator validates it
    (acqd.judge), without one only the device's identity may be given, so a misspelt ``model`` is not
    silently a DUT without one."""
    if not t.has("model"):
        t.string("name", None)
        t.string("serial", None)
        t.done()
    return _inline_netlist_file(t, profile_dir)


def _output(t: Table, profile_path: Path) -> OutputPlan:
    file = Path(t.string("file", f"data/{profile_path.stem}.h5"))
    if file.suffix != ".h5":
        raise t.error("file", f"must end in .h5, not {file.name!r}")
    plan = OutputPlan(file, t.boolean("fsync", True), t.integer("rotate_records", 1000, min=1))
    t.done()
    return plan

