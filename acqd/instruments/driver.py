"""Driver files: a TOML file per instrument model that maps the role's operations to SCPI command templates.

A new instrument is a new file, not new code. The file says which commands set each quantity (templates
with typed placeholders, filled through ``acqd.scpi``), how the instrument's units relate to the role's
(small safe expressions), how to wait for an acquisition, how to turn a block of codes into volts, which
``*IDN?`` replies it accepts and the hard limits of the instrument. The format is documented in
DEVELOPERS.md ("How to add a driver"); every mistake in a file is one ConfigError naming the file, line,
field and what is allowed, raised when the file is loaded — before any instrument is touched.
"""

from __future__ import annotations

import importlib
import math
import numbers
import os
import re
import string
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from .. import scpi
from ..config import Table, load_toml
from ..errors import ConfigError
from ..record import EDGES, LOADS
from .expression import Expression, ExpressionError

ROLES = ("generator", "scope", "switch")

# Each role's operations and the named inputs the role hands to them (SI units, role vocabulary).
OPERATIONS: dict[str, dict[str, tuple[str, ...]]] = {
    "generator": {
        "output": ("on",),
        "shape": ("shape",),
        "frequency": ("frequency_hz",),
        "load": ("load",),
        "levels": ("low_v", "high_v"),
    },
    "scope": {
        "timebase": ("window_s", "n_samples", "pretrigger_fraction"),
        "channel": ("channel", "range_v", "offset_v", "coupling"),
        "trigger": ("source", "slope", "level_v"),
        "arm": (),
        "abort": (),
    },
    "switch": {
        "close": ("channels",),
        "open": ("channels",),
        "open_all": (),
    },
}
# Operations a driver may leave out: without ``abort`` a timed-out acquisition is only drained.
OPTIONAL_OPERATIONS = frozenset({"abort"})

# The role's words for enumerated inputs; a driver's [enums] table maps (some of) them to its tokens.
VOCABULARY: dict[str, tuple[str, ...]] = {
    "shape": ("square", "pulse", "sine", "dc"),
    "load": LOADS,
    "coupling": ("dc", "ac"),
    "source": ("external", "immediate"),
    "slope": EDGES,
}

PLACEHOLDER_TYPES = ("float", "int", "bool", "enum", "channel", "channels")
REPLY_TYPES = ("float", "int", "bool", "text")
NUMERIC = ("float", "int")
SCALING_RULE = ("volts_per_code", "volts_at_code_0", "sample_interval_s", "first_sample_s")
HOOK_POINTS = ("after_fetch",)
# Sanity caps on a driver's own limits. 60 V d.c. is the usual bound of extra-low voltage that may be
# touched (common practice; local codes rule): a driver claiming more is refused, so a typo such as 1e308
# cannot let a dangerous level through. 10 GHz is beyond any bench function generator; the sample cap
# is the profile's own.
SANE_MAX_LEVEL_V = 60.0
SANE_MAX_FREQUENCY_HZ = 10e9
SANE_MAX_SAMPLES = 10_000_000
# A switch driver's own limits are capped like the generator's (the same 60 V extra-low-voltage bound);
# 10 A is beyond any signal-relay card, and a settling wait over 10 s is a typo for milliseconds.
SANE_MAX_SWITCH_CURRENT_A = 10.0
SANE_MAX_SETTLE_S = 10.0
# Hooks are code: a driver file may name one only from acqd's own hooks module or from the modules the
# operator lists in this environment variable (module names, separated by commas). Nothing is imported
# before the name is allowed, so a rejected hook runs no code.
HOOK_ALLOW_ENVIRONMENT = "ACQD_HOOK_MODULES"
OWN_HOOK_MODULE = "acqd.instruments.hooks"


# ---------------------------------------------------------------------------------------------------
# The parsed driver
# ---------------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class Template:
    """One command or query with typed placeholders: ``VOLTage{channel:channel}:RANGe {range_v:float}``.

    ``text`` keeps plain ``{name}`` fields for ``scpi.command``; ``types`` maps each name to its type.
    """

    text: str
    types: dict[str, str]

    def render(self, values: Mapping[str, Any]) -> str:
        """Command text for already converted values (see ``Driver.convert``)."""
        return scpi.command(self.text, **{name: values[name] for name in self.types})


@dataclass(frozen=True)
class Operation:
    name: str
    commands: tuple[Template, ...]
    computed: dict[str, Expression]


@dataclass(frozen=True)
class Readback:
    """A setting read back: a query with a reply type or enum, or a value computed from earlier ones."""

    key: str
    query: Template | None = None
    reply: str = "float"
    enum: str | None = None
    value: Expression | None = None


@dataclass(frozen=True)
class WaitRule:
    """How to know an acquisition is complete.

    Without ``poll_interval_s`` the query itself blocks until completion (``*OPC?``) and is given the
    caller's whole timeout; with it, the query is repeated until it answers ``done``.
    """

    query: Template
    done: str
    poll_interval_s: float | None


@dataclass(frozen=True)
class ScalingQuery:
    query: Template
    fields: tuple[str, ...]


@dataclass(frozen=True)
class FetchRule:
    """Block (or ASCii list) of codes → volts = code × volts_per_code + volts_at_code_0; time base alike."""

    query: Template
    format: str
    byte_order: str
    scaling_queries: tuple[ScalingQuery, ...]
    rule: dict[str, Expression]


@dataclass(frozen=True)
class SwitchRule:
    """A switch's channels, its settling wait and the query that verifies a path (one 1/0 per channel)."""

    channels: tuple[int, ...]
    settle_s: float
    closed_query: Template


@dataclass(frozen=True)
class Driver:
    path: Path
    name: str
    role: str
    description: str
    idn: re.Pattern[str]
    limits: dict[str, Any]
    channels: dict[str, int]
    enums: dict[str, dict[str, str]]
    setup: tuple[Template, ...]
    operations: dict[str, Operation]
    readback: tuple[Readback, ...]
    channel_readback: tuple[Readback, ...]
    wait: WaitRule | None
    fetch: FetchRule | None
    hooks: dict[str, Callable[..., Any]] = field(default_factory=dict)
    switch: SwitchRule | None = None

    @property
    def source(self) -> str:
        return str(self.path)

    def matches(self, idn: str) -> bool:
        """Whether this driver accepts an instrument answering ``idn`` to ``*IDN?``."""
        return self.idn.search(idn) is not None

    def commands(self, operation: str, **inputs: Any) -> list[str]:
        """Every command of ``operation`` for these role inputs, all built before any is sent.

        A value that the driver cannot express (an unknown channel or enum word, a non-finite number, a
        computed count that is not whole) is a ConfigError naming the input and what is allowed.
        """
        op = self.operations.get(operation)
        if op is None:
            return []  # an optional operation this driver does not have
        values = dict(inputs)
        for name, expression in op.computed.items():
            try:
                values[name] = expression.evaluate({k: values[k] for k in expression.names})
            except ExpressionError as exc:
                raise ConfigError(self.source, f"operations.{operation}.computed.{name}", str(exc)) from None
        return [t.render(self.convert(t, values)) for t in op.commands]

    def render(self, template: Template, **inputs: Any) -> str:
        """One template (a query, a setup command) filled from role inputs."""
        return template.render(self.convert(template, inputs))

    def convert(self, template: Template, values: Mapping[str, Any]) -> dict[str, Any]:
        """Role values → the typed values ``scpi.command`` formats (float, int, bool, token, suffix)."""
        converted = {}
        for name, kind in template.types.items():
            converted[name] = self._convert_one(name, kind, values[name])
        return converted

    def _convert_one(self, name: str, kind: str, value: Any) -> Any:
        if kind == "enum":
            mapping = self.enums[name]
            if not isinstance(value, str) or value not in mapping:
                raise ConfigError(self.source, name, f"{value!r} is not offered by driver {self.name}; "
                                                     f"allowed: {', '.join(mapping)}")
            return mapping[value]
        if kind == "channel":
            if not isinstance(value, str) or value not in self.channels:
                raise ConfigError(self.source, name, f"{value!r} is not a channel of driver {self.name}; "
                                                     f"allowed: {', '.join(self.channels)}")
            return self.channels[value]
        if kind == "channels":
            return self._channel_list(name, value)
        if kind == "bool":
            if not isinstance(value, bool):
                raise ConfigError(self.source, name, f"must be true or false, not {value!r}")
            return value
        if isinstance(value, bool) or not isinstance(value, numbers.Real) or not math.isfinite(value):
            raise ConfigError(self.source, name, f"must be a finite number, not {value!r}")
        if kind == "int":
            if float(value) != round(value):
                raise ConfigError(self.source, name, f"must be a whole number, not {value!r}")
            return int(round(value))
        return float(value)

    def _channel_list(self, name: str, value: Any) -> scpi.ChannelList:
        """A non-empty sequence of this switch's channel numbers, to be sent as one channel list."""
        known = set(self.switch.channels) if self.switch else set()
        if not isinstance(value, (tuple, list)) or not value:
            raise ConfigError(self.source, name, f"must be a non-empty list of channel numbers, not {value!r}")
        unknown = [c for c in value if isinstance(c, bool) or not isinstance(c, int) or c not in known]
        if unknown:
            raise ConfigError(self.source, name, f"{unknown[0]!r} is not a channel of switch driver {self.name}; "
                                                 f"allowed: {scpi.format_channel_list(sorted(known))}")
        return scpi.ChannelList(tuple(value))

    def enum_word(self, enum: str, reply: str) -> str:
        """The role word for an enum token read back (long or short form, any case): ``POS`` → rising."""
        for word, token in self.enums[enum].items():
            if reply.strip().upper() in scpi.mnemonic_forms(token):
                return word
        raise ValueError(f"{reply!r} is none of {', '.join(self.enums[enum].values())}")


@dataclass(frozen=True)
class DriverInfo:
    """What ``acqd drivers`` shows and ``match_driver`` returns, without opening an instrument."""

    name: str
    role: str
    path: Path
    idn_pattern: str
    description: str
    limits: dict[str, Any]


def driver_info(driver: Driver) -> DriverInfo:
    return DriverInfo(driver.name, driver.role, driver.path, driver.idn.pattern, driver.description,
                      dict(driver.limits))


# ---------------------------------------------------------------------------------------------------
# Loading
# ---------------------------------------------------------------------------------------------------

def load_driver(path: str | Path) -> Driver:
    """Parse and validate one driver file; any mistake is one ConfigError naming file, line and field."""
    path = Path(path)
    data, text = load_toml(path)
    top = Table(data, str(path), "", text)
    head = top.table("driver")
    role = head.string("role", choices=ROLES)
    description = head.string("description", None) or ""
    idn = _regex(head, "idn")
    channels = _channels(head) if role == "scope" else {}
    switch_channels = _switch_channels(head) if role == "switch" else ()
    settle_s = head.number("settle_s", positive=True, max=SANE_MAX_SETTLE_S, unit="s") if role == "switch" else 0.0
    hooks = _hooks(head.table("hooks", {}))
    head.done()

    enums = _enums(top.table("enums", {}), role)
    limits = _limits(top.table("limits"), role)
    builder = _TemplateReader(enums)
    setup = _setup(top.table("setup", {}), builder)
    operations = _operations(top.table("operations"), role, builder)
    readback = _readbacks(top.table("readback", {}), builder, {}, enums)
    channel_readback: tuple[Readback, ...] = ()
    wait = fetch = None
    if role == "scope":
        channel_readback = _readbacks(top.table("channel_readback", {}), builder, {"channel": "channel"}, enums)
        wait = _wait(top.table("wait"), builder)
        fetch = _fetch(top.table("fetch"), builder)
    switch = None
    if role == "switch":
        verify = top.table("verify")
        switch = SwitchRule(switch_channels, settle_s, builder.one(verify, "query", {"channels": "channels"}))
        verify.done()
    top.done()
    return Driver(path, path.stem, role, description, idn, limits, channels, enums, setup, operations,
                  readback, channel_readback, wait, fetch, hooks, switch)


def _regex(t: Table, key: str) -> re.Pattern[str]:
    pattern = t.string(key)
    try:
        return re.compile(pattern)
    except re.error as exc:
        raise t.error(key, f"not a valid regular expression ({exc})") from None


def _channels(t: Table) -> dict[str, int]:
    table = t.table("channels")
    channels = {name: table.integer(name, min=1) for name in list(table.data)}
    table.done()
    if not channels:
        raise t.error("channels", "needs at least one channel, e.g. channels = { CH1 = 1 }")
    return channels


def _switch_channels(t: Table) -> tuple[int, ...]:
    """The channels a switch has, as one channel list: ``channels = "(@101:132,201:232)"``."""
    text = t.string("channels")
    try:
        channels = scpi.parse_channel_list(text)
    except ValueError as exc:
        raise t.error("channels", str(exc)) from None
    if not channels or len(set(channels)) != len(channels):
        raise t.error("channels", f"{text!r} must list at least one channel, each once")
    return channels


def _hooks(t: Table) -> dict[str, Callable[..., Any]]:
    hooks = {}
    for point in HOOK_POINTS:
        target = t.string(point, None)
        if target is not None:
            hooks[point] = _import_hook(t, point, target)
    t.done()
    return hooks


def allowed_hook_modules() -> tuple[str, ...]:
    """acqd's own hooks module and those the operator allowed in ``ACQD_HOOK_MODULES``."""
    listed = os.environ.get(HOOK_ALLOW_ENVIRONMENT, "")
    return (OWN_HOOK_MODULE, *(name.strip() for name in listed.split(",") if name.strip()))


def _import_hook(t: Table, point: str, target: str) -> Callable[..., Any]:
    module_name, _, attribute = target.partition(":")
    if not module_name or not attribute or not all(part.isidentifier() for part in module_name.split(".")) \
            or not attribute.isidentifier():
        raise t.error(point, f"must be 'package.module:function', not {target!r}")
    allowed = allowed_hook_modules()
    if module_name not in allowed:
        raise t.error(point, f"module {module_name!r} is not allowed; allowed: {', '.join(allowed)} "
                             f"(add a module to the {HOOK_ALLOW_ENVIRONMENT} environment variable)")
    try:
        function = getattr(importlib.import_module(module_name), attribute)
    except (ImportError, AttributeError) as exc:
        raise t.error(point, f"cannot import {target!r} ({exc})") from None
    if not callable(function):
        raise t.error(point, f"{target!r} is not a function")
    return function


def _enums(t: Table, role: str) -> dict[str, dict[str, str]]:
    inputs = {name for names in OPERATIONS[role].values() for name in names}
    enums = {}
    for name in list(t.data):
        if name not in VOCABULARY or name not in inputs:
            allowed = ", ".join(sorted(n for n in VOCABULARY if n in inputs))
            raise t.error(name, f"not an enumerated input of a {role}; allowed: {allowed}")
        table = t.table(name)
        mapping = {}
        for word in list(table.data):
            if word not in VOCABULARY[name]:
                raise table.error(word, f"not a {name} the role knows; allowed: {', '.join(VOCABULARY[name])}")
            token = table.string(word)
            try:
                scpi.mnemonic_forms(token)
            except ValueError as exc:
                raise table.error(word, str(exc)) from None
            mapping[word] = token
        table.done()
        if not mapping:
            raise t.error(name, f"needs at least one entry, e.g. {VOCABULARY[name][0]} = \"...\"")
        enums[name] = mapping
    t.done()
    return enums


def _limits(t: Table, role: str) -> dict[str, Any]:
    """The instrument's hard limits, each capped at a physical sanity value: a driver file is trusted to
    narrow what acqd may send, never to widen it past what a bench function generator or scope can be."""
    if role == "generator":
        levels = t.table("max_level_v")
        limits: dict[str, Any] = {"max_level_v": {load: levels.number(load, positive=True, max=SANE_MAX_LEVEL_V,
                                                                      unit="V")
                                                  for load in LOADS}}
        levels.done()
        limits["min_frequency_hz"] = t.number("min_frequency_hz", positive=True, max=SANE_MAX_FREQUENCY_HZ,
                                              unit="Hz")
        limits["max_frequency_hz"] = t.number("max_frequency_hz", min=limits["min_frequency_hz"],
                                              max=SANE_MAX_FREQUENCY_HZ, unit="Hz")
    elif role == "switch":
        limits = {"max_voltage_v": t.number("max_voltage_v", positive=True, max=SANE_MAX_LEVEL_V, unit="V"),
                  "max_current_a": t.number("max_current_a", positive=True, max=SANE_MAX_SWITCH_CURRENT_A,
                                            unit="A")}
    else:
        limits = {"min_samples": t.integer("min_samples", min=1, max=SANE_MAX_SAMPLES)}
        limits["max_samples"] = t.integer("max_samples", min=limits["min_samples"], max=SANE_MAX_SAMPLES)
        limits["max_pretrigger_fraction"] = t.number("max_pretrigger_fraction", min=0.0, max=1.0)
    t.done()
    return limits


class _TemplateReader:
    """Reads template strings from the file, checking each placeholder's name and type where it stands."""

    def __init__(self, enums: dict[str, dict[str, str]]) -> None:
        self.enums = enums

    def one(self, t: Table, key: str, names: Mapping[str, str | None]) -> Template:
        """``names`` maps the names allowed here to a forced type (None: any numeric type)."""
        return self.parse(t, key, t.raw(key), names)

    def list(self, t: Table, key: str, names: Mapping[str, str | None], *,
             required: bool = True) -> list[Template]:
        raw = t.raw(key) if required else t.raw(key, [])
        if isinstance(raw, str):
            raw = [raw]
        if not isinstance(raw, list) or (required and not raw):
            raise t.error(key, "must be a command or a non-empty list of commands")
        return [self.parse(t, f"{key}[{i}]", item, names, table_key=key) for i, item in enumerate(raw)]

    def parse(self, t: Table, key: str, raw: Any, names: Mapping[str, str | None],
              table_key: str | None = None) -> Template:
        source, _ = t.where(table_key or key)  # the line of the key; the field names the list entry too
        field = f"{t.path}.{key}" if t.path else key

        def fail(problem: str) -> ConfigError:
            return ConfigError(source, field, problem)

        if not isinstance(raw, str) or not raw.strip():
            raise fail(f"must be SCPI command text, not {raw!r}")
        if problem := scpi.single_message_problem(raw):
            raise fail(problem)
        types: dict[str, str] = {}
        plain = []
        try:
            parsed = list(string.Formatter().parse(raw))
        except ValueError as exc:
            raise fail(f"broken placeholder ({exc}); write {{name:type}}") from None
        for literal, name, kind, conversion in parsed:
            plain.append(literal.replace("{", "{{").replace("}", "}}"))
            if name is None:
                continue
            if not kind:
                raise fail(f"placeholder {{{name}}} has no type; write {{{name}:TYPE}} with TYPE one of "
                           f"{', '.join(PLACEHOLDER_TYPES)}")
            if conversion or kind not in PLACEHOLDER_TYPES:
                raise fail(f"placeholder {{{name}:{kind}}}: type must be one of {', '.join(PLACEHOLDER_TYPES)}")
            if name not in names:
                raise fail(f"placeholder {{{name}}} is not an input here; allowed: "
                           f"{', '.join(names) or '(none)'}")
            forced = names[name]
            if forced is not None and kind != forced:
                raise fail(f"placeholder {{{name}}} must have type {forced}")
            if forced is None and kind in ("enum", "channel", "channels", "bool"):
                raise fail(f"placeholder {{{name}}} is a number; type must be float or int")
            if kind == "enum" and name not in self.enums:
                raise fail(f"placeholder {{{name}:enum}} needs an [enums] table '{name}' mapping the role's "
                           f"words to this instrument's tokens")
            types[name] = kind
            plain.append("{" + name + "}")
        return Template("".join(plain), types)


def _input_types(inputs: tuple[str, ...], computed: Mapping[str, Expression]) -> dict[str, str | None]:
    """Placeholder type each input may take: enumerated inputs enum, channel channel, on bool, numbers free."""
    names: dict[str, str | None] = {}
    for name in (*inputs, *computed):
        if name in VOCABULARY:
            names[name] = "enum"
        elif name in ("channel", "channels"):
            names[name] = name
        elif name == "on":
            names[name] = "bool"
        else:
            names[name] = None
    return names


def _setup(t: Table, builder: _TemplateReader) -> tuple[Template, ...]:
    commands = builder.list(t, "commands", {}, required=False)
    t.done()
    return tuple(commands)


def _operations(t: Table, role: str, builder: _TemplateReader) -> dict[str, Operation]:
    known = OPERATIONS[role]
    operations = {}
    for name in list(t.data):
        if name not in known:
            raise t.error(name, f"not an operation of a {role}; allowed: {', '.join(known)}")
        op = t.table(name)
        numeric_inputs = [i for i, kind in _input_types(known[name], {}).items() if kind is None]
        computed = _computed(op.table("computed", {}), known[name], numeric_inputs)
        commands = builder.list(op, "commands", _input_types(known[name], computed))
        op.done()
        operations[name] = Operation(name, tuple(commands), computed)
    missing = [name for name in known if name not in operations and name not in OPTIONAL_OPERATIONS]
    if missing:
        raise t.error(missing[0], f"required operation missing; a {role} driver needs "
                                  f"{', '.join(n for n in known if n not in OPTIONAL_OPERATIONS)}")
    t.done()
    return operations


def _computed(t: Table, inputs: tuple[str, ...], numeric_inputs: list[str]) -> dict[str, Expression]:
    computed = {}
    for name in list(t.data):
        if not name.isidentifier() or name in inputs:
            raise t.error(name, "a computed name must be a new identifier, not one of the inputs "
                                f"({', '.join(inputs)})")
        computed[name] = _expression(t, name, numeric_inputs)
    t.done()
    return computed


def _expression(t: Table, key: str, names: list[str] | tuple[str, ...]) -> Expression:
    try:
        return Expression.parse(t.raw(key), names)
    except ExpressionError as exc:
        raise t.error(key, str(exc)) from None


def _readbacks(t: Table, builder: _TemplateReader, placeholders: dict[str, str | None],
               enums: dict[str, dict[str, str]]) -> tuple[Readback, ...]:
    readbacks: list[Readback] = []
    for key in list(t.data):
        entry = t.table(key)
        earlier = [r.key for r in readbacks if r.value is not None or (r.enum is None and r.reply in NUMERIC)]
        if entry.has("value"):
            readbacks.append(Readback(key, value=_expression(entry, "value", earlier)))
        else:
            query = builder.one(entry, "query", placeholders)
            enum = entry.string("enum", None)
            if enum is not None and enum not in enums:
                raise entry.error("enum", f"no [enums] table {enum!r}; tables: {', '.join(enums) or '(none)'}")
            reply = entry.string("reply", "float", choices=REPLY_TYPES)
            readbacks.append(Readback(key, query=query, reply=reply, enum=enum))
        entry.done()
    t.done()
    return tuple(readbacks)


def _wait(t: Table, builder: _TemplateReader) -> WaitRule:
    rule = WaitRule(builder.one(t, "query", {}), t.string("done"),
                    t.number("poll_interval_s", None, positive=True, unit="s"))
    t.done()
    return rule


def _fetch(t: Table, builder: _TemplateReader) -> FetchRule:
    query = builder.one(t, "query", {"channel": "channel"})
    try:
        fmt = scpi.sample_format(t.string("format"))
    except ValueError as exc:
        raise t.error("format", str(exc)) from None
    byte_order = t.string("byte_order", "NORMal")
    try:  # let acqd.scpi, which decodes the samples, be the judge of the spelling
        scpi.decode_samples(b"", "INT,16", byte_order)
    except ValueError as exc:
        raise t.error("byte_order", str(exc)) from None
    scaling = t.table("scaling")
    queries, fields = [], []
    raw_queries = scaling.raw("queries", [])
    if not isinstance(raw_queries, list):
        raise scaling.error("queries", "must be a list of { query = \"...\", fields = [\"name\", ...] }")
    for i, raw in enumerate(raw_queries):
        entry = Table(raw, scaling.source, f"{scaling.path}.queries[{i}]", scaling.text)
        q = builder.one(entry, "query", {"channel": "channel"})
        names = entry.raw("fields")
        if not isinstance(names, list) or not names or not all(isinstance(n, str) and n.isidentifier()
                                                               for n in names):
            raise entry.error("fields", "must be a non-empty list of names, one per comma-separated reply value")
        entry.done()
        queries.append(ScalingQuery(q, tuple(names)))
        fields.extend(names)
    rule = {name: _expression(scaling, name, fields) for name in SCALING_RULE}
    scaling.done()
    t.done()
    return FetchRule(query, fmt, byte_order, tuple(queries), rule)
