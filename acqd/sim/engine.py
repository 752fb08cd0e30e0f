"""The SCPI engine of the simulated instruments: parser, command tree, IEEE 488.2 status, error queue, and
the message exchange with one client — everything but the bytes on the wire.

A simulated instrument is a real server, so the client code path — pyvisa, terminations, timeouts, block
reads — is the one used on a real bench. The transports (``rawsocket``: NL-terminated SCPI on a TCP port;
``hislip``: IVI-6.1; ``vxi11``: ONC RPC) each carry bytes between a client and one ``MessageExchange``,
which takes program messages and gives response messages; device clear is the exchange's own operation.
Clauses cited: IEEE 488.2-1992 (common commands, status, §5.8 device clear, §6.3.2.3 query
interruption) and SCPI-1999 Vol 1 §6.2 (headers) / §7 (parameters), Vol 2 §21.8 (error queue).

How the message exchange maps onto IEEE 488.2's (which assumes a bus with END and explicit reads),
documented because the standard cannot be followed literally over a raw socket:

* A reply counts as *read* once it has been handed to the transport. A query whose reply is still being
  produced (``*OPC?`` waiting for an acquisition, or a slow reply under fault injection) is *interrupted*
  when the next message arrives from that client: the pending reply is discarded and −410 "Query
  INTERRUPTED" is queued (§6.3.2.3). So a client that timed out never receives a stale ``1`` later.
* −420 "Query UNTERMINATED" is queued when the client goes while an unterminated message holding a
  query is buffered: the query can never be answered. An unterminated *command* is discarded (not
  executed — a half-sent ``VOLT 1`` of ``VOLT 10`` must not reach the output) and −100 is queued.
* After a command error (−1xx) the rest of the program message is skipped, since the parser's position in
  the tree can no longer be trusted; after an execution error (−2xx) the next message unit still runs.
  (Our choice; the standards leave the recovery point to the device, from memory.)
* A query on a header that only exists as a command (or the reverse) is −113: that header form is not
  defined on the device.
"""
from __future__ import annotations

import asyncio
import logging
import math
import re
import threading
import time
from collections import deque
from collections.abc import Awaitable, Callable, Iterable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, NamedTuple

from .. import __version__
from .. import scpi

_log = logging.getLogger(__name__)

# ---------------------------------------------------------------------------------------------------
# Errors and the error queue (SCPI-1999 Vol 2 §21.8)
# ---------------------------------------------------------------------------------------------------

ERROR_TEXT: dict[int, str] = {
    0: "No error",
    -100: "Command error", -102: "Syntax error", -104: "Data type error", -108: "Parameter not allowed",
    -109: "Missing parameter", -113: "Undefined header", -114: "Header suffix out of range",
    -120: "Numeric data error", -131: "Invalid suffix", -138: "Suffix not allowed",
    -221: "Settings conflict", -222: "Data out of range", -223: "Too much data",
    -224: "Illegal parameter value", -230: "Data corrupt or stale",
    -300: "Device-specific error", -350: "Queue overflow", -410: "Query INTERRUPTED", -420: "Query UNTERMINATED",
}

# Standard event status register bits (IEEE 488.2 §11.5.1).
ESR_OPC, ESR_QYE, ESR_DDE, ESR_EXE, ESR_CME, ESR_PON = 0x01, 0x04, 0x08, 0x10, 0x20, 0x80
# Status byte bits (IEEE 488.2 §11.2 with the SCPI assignments): error queue, MAV, ESB, MSS.
STB_EAV, STB_MAV, STB_ESB, STB_MSS = 0x04, 0x10, 0x20, 0x40


def esr_bit_for(code: int) -> int:
    """The event bit an error sets: −1xx CME, −2xx EXE, −3xx and device errors DDE, −4xx QYE."""
    if -199 <= code <= -100:
        return ESR_CME
    if -299 <= code <= -200:
        return ESR_EXE
    if -499 <= code <= -400:
        return ESR_QYE
    return ESR_DDE


class SCPIError(Exception):
    """An error the instrument reports through its queue, not to the socket."""

    def __init__(self, code: int, detail: str = "") -> None:
        if code not in ERROR_TEXT:
            raise ValueError(f"no text for error code {code}")
        self.code, self.detail = code, detail
        super().__init__(f"{code}: {ERROR_TEXT[code]}{'; ' + detail if detail else ''}")


class ErrorQueue:
    """First in, first out; when full the newest entry becomes −350 and later errors are lost (§21.8.1)."""

    CAPACITY = 20
    MAX_TEXT = 255  # characters in the quoted text (from memory)

    def __init__(self) -> None:
        self._entries: deque[tuple[int, str]] = deque()
        self._lock = threading.Lock()  # faults may push from a test's thread

    def push(self, code: int, detail: str = "") -> None:
        text = ERROR_TEXT.get(code, "Device-specific error")
        if detail:
            text = f"{text};{detail}"
        text = text.replace('"', "'").encode("ascii", "replace").decode("ascii")[: self.MAX_TEXT]
        with self._lock:
            if len(self._entries) < self.CAPACITY:
                self._entries.append((code, text))
            else:
                self._entries[-1] = (-350, ERROR_TEXT[-350])

    def pop(self) -> tuple[int, str]:
        with self._lock:
            return self._entries.popleft() if self._entries else (0, ERROR_TEXT[0])

    def clear(self) -> None:
        with self._lock:
            self._entries.clear()

    def __len__(self) -> int:
        return len(self._entries)


# ---------------------------------------------------------------------------------------------------
# Parameter types (SCPI-1999 Vol 1 §7)
# ---------------------------------------------------------------------------------------------------

_NUMBER_START = re.compile(r"[+\-.0-9]")


def _data_kind(text: str) -> str:
    """'string', 'block', 'number' or 'char' by the first character (IEEE 488.2 §7.7 data elements)."""
    first = text[:1]
    if first in ("\"", "'"):
        return "string"
    if first == "#":
        return "block"
    if _NUMBER_START.match(first):
        return "number"
    return "char"


def _short_or_long(text: str, notation: str) -> bool:
    long_form, short = scpi.mnemonic_forms(notation)
    return text.upper() in (long_form, short)


class Param:
    """One parameter slot; ``parse`` turns program data text into a value or raises SCPIError."""

    optional = False

    def parse(self, text: str) -> Any:
        raise NotImplementedError

    def format(self, value: Any) -> str:
        raise NotImplementedError


@dataclass(frozen=True)
class Number(Param):
    """A decimal number in ``unit`` (SI suffixes accepted), MIN/MAX/DEF, and INF/NINF/NAN (§7.2)."""

    unit: str = ""
    minimum: float = -math.inf
    maximum: float = math.inf
    default: float | None = None
    optional: bool = False

    SPECIAL = {"INF": scpi.SCPI_INF, "INFINITY": scpi.SCPI_INF, "NINF": -scpi.SCPI_INF,
               "NINFINITY": -scpi.SCPI_INF, "NAN": scpi.SCPI_NAN}

    def limit(self, text: str) -> float | None:
        """The value MIN/MAX/DEF stand for, or None when ``text`` is none of them."""
        key = text.upper()
        for notation, value in (("MINimum", self.minimum), ("MAXimum", self.maximum), ("DEFault", self.default)):
            if _short_or_long(key, notation):
                if value is None or not math.isfinite(value):
                    raise SCPIError(-224, f"this parameter has no {notation.lower()}")
                return value
        return None

    def parse(self, text: str) -> float:
        kind = _data_kind(text)
        if kind == "char":
            limit = self.limit(text)
            if limit is not None:
                return self.convert(limit)
            if text.upper() not in self.SPECIAL:
                raise SCPIError(-104, f"expected a number, got {text}")
            value = self.SPECIAL[text.upper()]
        elif kind == "number":
            value = self._decimal(text)
        else:
            raise SCPIError(-104, f"expected a number, got {text[:20]}")
        if not (self.minimum <= value <= self.maximum):  # NaN fails here too
            raise SCPIError(-222, f"{text} outside {self.format(self.minimum)} to {self.format(self.maximum)}")
        return self.convert(value)

    def _decimal(self, text: str) -> float:
        try:
            return scpi.parse_value_with_unit(text, self.unit)
        except scpi.SuffixError as exc:
            raise SCPIError(-138 if not self.unit else -131, str(exc)) from None
        except ValueError:
            raise SCPIError(-120, f"malformed number {text[:20]}") from None

    def convert(self, value: float) -> Any:
        return float(value)

    def format(self, value: float) -> str:
        """NR3; infinities and NaN as SCPI's 9.9E37, -9.9E37 and 9.91E37 (SCPI-1999 Vol 1 §7.2.1)."""
        if math.isnan(value):
            return scpi.format_number(scpi.SCPI_NAN)
        if math.isinf(value):
            return scpi.format_number(math.copysign(scpi.SCPI_INF, value))
        return scpi.format_number(value)


@dataclass(frozen=True)
class Integer(Number):
    """A whole number; decimal input is rounded (SCPI-1999 Vol 1 §7.2.1, from memory); ``allowed`` limits it."""

    allowed: tuple[int, ...] = ()

    def convert(self, value: float) -> int:
        number = int(round(value))
        if self.allowed and number not in self.allowed:
            raise SCPIError(-224, f"{number} not one of {', '.join(map(str, self.allowed))}")
        return number

    def format(self, value: float) -> str:
        return scpi.format_int(int(value)) if math.isfinite(value) else super().format(value)


@dataclass(frozen=True)
class Boolean(Param):
    """ON|OFF|1|0 in, 1|0 out (SCPI-1999 Vol 1 §7.3)."""

    optional: bool = False

    def parse(self, text: str) -> bool:
        key = text.upper()
        if key in ("ON", "1"):
            return True
        if key in ("OFF", "0"):
            return False
        code = -224 if _data_kind(text) in ("char", "number") else -104
        raise SCPIError(code, f"expected ON|OFF|1|0, got {text[:20]}")

    def format(self, value: bool) -> str:
        return "1" if value else "0"


@dataclass(frozen=True)
class Choice(Param):
    """Character data from a table of notations (``SQUare``); the value is the notation, the reply its short form."""

    notations: tuple[str, ...]
    optional: bool = False

    def parse(self, text: str) -> str:
        if _data_kind(text) != "char":
            raise SCPIError(-104, f"expected one of {'|'.join(self.notations)}, got {text[:20]}")
        for notation in self.notations:
            if _short_or_long(text, notation):
                return notation
        raise SCPIError(-224, f"{text[:20]} not one of {'|'.join(self.notations)}")

    def format(self, value: str) -> str:
        return scpi.short_form(value)


@dataclass(frozen=True)
class ChannelRef(Param):
    """``CH<n>`` naming an input, 1..count; the value is n."""

    count: int = 4
    prefix: str = "CH"
    optional: bool = False

    def parse(self, text: str) -> int:
        match = re.fullmatch(rf"{self.prefix}([0-9]+)", text, re.IGNORECASE)
        if not match:
            raise SCPIError(-104 if _data_kind(text) != "char" else -224,
                            f"expected {self.prefix}1..{self.prefix}{self.count}, got {text[:20]}")
        number = int(match.group(1))
        if not 1 <= number <= self.count:
            raise SCPIError(-224, f"{text} out of {self.prefix}1..{self.prefix}{self.count}")
        return number


@dataclass(frozen=True)
class LimitQuery(Param):
    """The optional MIN|MAX|DEF of a setting's query (``FREQ? MAX``, SCPI-1999 Vol 1 §6.2.3)."""

    of: Number
    optional: bool = True

    def parse(self, text: str) -> float:
        value = self.of.limit(text) if _data_kind(text) == "char" else None
        if value is None:
            raise SCPIError(-224, f"a query takes MIN, MAX or DEF here, got {text[:20]}")
        return value


# ---------------------------------------------------------------------------------------------------
# The command tree
# ---------------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class Node:
    """One header node: long/short form and the numeric suffixes it accepts (None: none)."""

    long: str
    short: str
    suffix: tuple[int, int] | None = None

    def accepts(self, name: str) -> bool:
        return name in (self.long, self.short)

    @property
    def passes_suffix(self) -> bool:
        """Only suffixes that select an instance (a range wider than one) reach the handler."""
        return self.suffix is not None and self.suffix[1] > self.suffix[0]


@dataclass(frozen=True)
class OptionalGroup:
    """``[...]``: one of the alternatives, or nothing (SCPI-1999 Vol 1 §6.2.2 default nodes)."""

    alternatives: tuple[tuple[Any, ...], ...]


_PATTERN_TOKEN = re.compile(r"\[|\]|\||:|([A-Za-z][A-Za-z0-9_]*)(?:<([0-9]+)(?:-([0-9]+))?>)?")


def compile_pattern(pattern: str) -> tuple[Any, ...]:
    """``[SOURce<1>:]FREQuency[:CW|:FIXed]`` → a sequence of Node / OptionalGroup elements.

    Notation: upper case marks the short form; ``<a-b>`` the numeric suffixes a node takes (``<1>``: only
    1, which may be omitted); ``[x|y]`` optional alternatives; ``:`` separates nodes and is otherwise ignored.
    """
    tokens: list[tuple[str, Any]] = []
    pos = 0
    for match in _PATTERN_TOKEN.finditer(pattern):
        if match.start() != pos:
            raise ValueError(f"command pattern {pattern!r}: unexpected text at {pos}")
        pos = match.end()
        if match.group(1):
            long_form, short = scpi.mnemonic_forms(match.group(1))
            low = match.group(2)
            suffix = (int(low), int(match.group(3) or low)) if low else None
            tokens.append(("node", Node(long_form, short, suffix)))
        elif match.group(0) != ":":
            tokens.append((match.group(0), None))
    if pos != len(pattern):
        raise ValueError(f"command pattern {pattern!r}: unexpected text at {pos}")
    seq, rest = _parse_sequence(tokens, pattern, in_optional=False)
    if rest:
        raise ValueError(f"command pattern {pattern!r}: unbalanced ']'")
    return seq


def _parse_sequence(tokens: list, pattern: str, in_optional: bool) -> tuple[tuple[Any, ...], list]:
    out: list[Any] = []
    while tokens and tokens[0][0] not in ("]", "|"):
        kind, node = tokens.pop(0)
        if kind == "node":
            if in_optional and node.passes_suffix:
                raise ValueError(f"command pattern {pattern!r}: an instance suffix may not sit in [ ]")
            out.append(node)
            continue
        alternatives = []
        while True:
            alt, tokens = _parse_sequence(tokens, pattern, in_optional=True)
            alternatives.append(alt)
            if not tokens:
                raise ValueError(f"command pattern {pattern!r}: '[' never closed")
            if tokens.pop(0)[0] == "]":
                break
        out.append(OptionalGroup(tuple(alternatives)))
    return tuple(out), tokens


class HeaderNode(NamedTuple):
    """A node as written in a message: upper-case mnemonic and its numeric suffix (None if omitted)."""

    name: str
    suffix: int | None


def _matches(elements: tuple[Any, ...], nodes: Sequence[HeaderNode], i: int, used: tuple):
    """Every way ``elements`` consume ``nodes[i:]``: yields (next index, ((Node, HeaderNode), ...))."""
    if not elements:
        yield i, used
        return
    head, rest = elements[0], elements[1:]
    if isinstance(head, Node):
        if i < len(nodes) and head.accepts(nodes[i].name):
            yield from _matches(rest, nodes, i + 1, used + ((head, nodes[i]),))
        return
    for alternative in head.alternatives:
        for j, got in _matches(alternative, nodes, i, used):
            yield from _matches(rest, nodes, j, got)
    yield from _matches(rest, nodes, i, used)


class _SuffixMismatch(Exception):
    def __init__(self, out_of_range: bool) -> None:
        self.out_of_range = out_of_range


def _instance_suffixes(used: tuple[tuple[Node, HeaderNode], ...]) -> tuple[int, ...]:
    """The suffixes a matched header passes to its handler (omitted = the lowest, §6.2.5).

    Raises _SuffixMismatch when a written suffix is out of the node's range (-114), or is written on a
    node that takes none (then the header is simply not this one).
    """
    values = []
    for spec, written in used:
        if written.suffix is not None:
            if spec.suffix is None:
                raise _SuffixMismatch(out_of_range=False)
            if not spec.suffix[0] <= written.suffix <= spec.suffix[1]:
                raise _SuffixMismatch(out_of_range=True)
        if spec.passes_suffix:
            values.append(spec.suffix[0] if written.suffix is None else written.suffix)
    return tuple(values)


Handler = Callable[..., Any]


@dataclass(frozen=True)
class Cmd:
    """One header: its pattern, the command form and/or the query form.

    ``set`` / ``query`` are method names of the instrument or callables ``f(instrument, *args)``; both get
    the instance suffixes first, then the parsed parameters. A query returns ``str`` (or ``bytes`` for a
    block) or an awaitable of one; a command may return an awaitable to hold off the next unit.
    """

    pattern: str
    set: str | Handler | None = None
    params: tuple[Param, ...] = ()
    query: str | Handler | None = None
    query_params: tuple[Param, ...] = ()

    def handler(self, query: bool) -> tuple[str | Handler | None, tuple[Param, ...]]:
        return (self.query, self.query_params) if query else (self.set, self.params)


def setting(pattern: str, attr: str, param: Param, check: str | None = None) -> Cmd:
    """A stored setting with its query (``FREQ?``, ``FREQ? MAX``): the common case, declared in one line.

    The value lives at ``instrument.settings.<attr>``, or per instance (channel n) at
    ``instrument.settings.channels[n-1].<attr>`` when the pattern carries an instance suffix. ``check``
    names an instrument method that may refuse a value (raising SCPIError) before it is stored.
    """

    def target(inst: SCPIInstrument, suffixes: tuple[int, ...]) -> Any:
        obj = inst.settings
        for n in suffixes:
            obj = obj.channels[n - 1]
        return obj

    def set_value(inst: SCPIInstrument, *args: Any) -> None:
        *suffixes, value = args
        if check:
            getattr(inst, check)(value, *suffixes)
        setattr(target(inst, tuple(suffixes)), attr, value)
        inst.settings_changed()

    def query_value(inst: SCPIInstrument, *args: Any) -> str:
        n_suffixes = sum(1 for n in _nodes(compiled) if n.passes_suffix)
        suffixes, limit = args[:n_suffixes], args[n_suffixes:]
        if limit:
            return param.format(limit[0])
        return param.format(getattr(target(inst, tuple(suffixes)), attr))

    compiled = compile_pattern(pattern)
    limit_query = (LimitQuery(param),) if isinstance(param, Number) else ()
    return Cmd(pattern, set=set_value, params=(param,), query=query_value, query_params=limit_query)


def _nodes(elements: Iterable[Any]) -> Iterable[Node]:
    for element in elements:
        if isinstance(element, Node):
            yield element
        else:
            for alternative in element.alternatives:
                yield from _nodes(alternative)


# ---------------------------------------------------------------------------------------------------
# Lexing program messages (IEEE 488.2 §7; SCPI-1999 Vol 1 §6.2)
# ---------------------------------------------------------------------------------------------------

def _split_outside_quotes(text: str, sep: str) -> list[str]:
    try:
        return scpi.split_reply(text, sep) if text.strip() else []
    except ValueError:
        raise SCPIError(-102, "unterminated quoted string") from None


_HEADER = re.compile(r"\s*(?P<root>:?)(?P<header>\*[A-Za-z]+|[A-Za-z][A-Za-z0-9_]*(?::[A-Za-z][A-Za-z0-9_]*)*)"
                     r"(?P<query>\?)?(?:\s+(?P<params>.*?))?\s*", re.DOTALL)
_MNEMONIC = re.compile(r"([A-Za-z][A-Za-z0-9_]*?)([0-9]+)?")


@dataclass(frozen=True)
class MessageUnit:
    """One parsed message unit: ``:SOUR:FREQ? MAX`` → rooted, nodes, query, params."""

    rooted: bool
    common: str | None
    nodes: tuple[HeaderNode, ...]
    query: bool
    params: tuple[str, ...]


def parse_unit(text: str) -> MessageUnit:
    match = _HEADER.fullmatch(text)
    if not match:
        raise SCPIError(-102, f"cannot parse {text.strip()[:40]!r}")
    header = match.group("header")
    params = tuple(_split_outside_quotes(match.group("params") or "", ","))
    if any(p == "" for p in params):
        raise SCPIError(-102, "empty parameter")
    if header.startswith("*"):
        if match.group("root"):
            raise SCPIError(-102, "a common command takes no leading ':'")
        return MessageUnit(False, header.upper(), (), bool(match.group("query")), params)
    nodes = []
    for mnemonic in header.split(":"):
        name, digits = _MNEMONIC.fullmatch(mnemonic).groups()
        nodes.append(HeaderNode(name.upper(), int(digits) if digits else None))
    return MessageUnit(bool(match.group("root")), None, tuple(nodes), bool(match.group("query")), params)


# ---------------------------------------------------------------------------------------------------
# Instruments
# ---------------------------------------------------------------------------------------------------

SHORT_READ_PAUSE_S = 0.05  # between the two halves of a reply under the short_read fault


@dataclass
class Faults:
    """Fault injection, switched per instrument (attributes may be set from any thread)."""

    reply_delay_s: float = 0.0          # every reply waits this long before it is sent
    drop_mid_block: bool = False        # a reply holding a block is cut half-way and the connection closed
    garble_block_header: bool = False   # the block header's digit count is replaced by a non-digit
    trigger_never: bool = False         # an armed acquisition never sees its trigger
    short_read: bool = False            # every reply comes in two parts, short_read_pause_s apart
    short_read_pause_s: float = SHORT_READ_PAUSE_S  # longer than a client's timeout: a stall mid-reply
    plan: Any = None                    # acqd.sim.faults.FaultPlan: random faults at stated rates

    def hit(self, kind: str) -> bool:
        """Whether fault ``kind`` (acqd.sim.faults.KINDS) strikes now: switched on here, or drawn by the plan."""
        switched = {"cut_block": self.drop_mid_block, "garble_block": self.garble_block_header,
                    "trigger_never": self.trigger_never, "short_read": self.short_read}.get(kind, False)
        return switched or (self.plan is not None and self.plan.draw(kind))

    def delay_s(self, kind: str) -> float:
        """The wait before a reply: the switched-on delay, or the plan's when ``kind`` strikes."""
        if self.reply_delay_s > 0:
            return self.reply_delay_s
        return self.plan.rates.reply_delay_s if self.plan is not None and self.plan.draw(kind) else 0.0


class LoggedMessage(NamedTuple):
    monotonic_s: float
    text: str


class QueryInterrupted(Exception):
    """A new message arrived before the pending reply could be sent (IEEE 488.2 §6.3.2.3)."""


class ConnectionLost(Exception):
    """The peer went away while a unit was blocked; the rest of its messages cannot be answered."""


Reply = str | bytes

BASE_COMMANDS = (Cmd("SYSTem:ERRor[:NEXT]", query="_error_next"),)


class SCPIInstrument:
    """A simulated instrument: a command table, settings, status registers and an error queue.

    Subclasses set ``MODEL``, ``COMMANDS`` and a ``make_settings()`` that returns the ``*RST`` state.
    """

    MANUFACTURER = "acqd-sim"
    MODEL = "INSTR"
    COMMANDS: tuple[Cmd, ...] = ()

    def __init__(self, *, log_messages: bool = False, log_path: str | Path | None = None) -> None:
        self.errors = ErrorQueue()
        self.faults = Faults()
        self.esr = ESR_PON  # power-on sets PON (IEEE 488.2 §11.5.1.1.1, from memory)
        self.ese = 0
        self.sre = 0
        self.settings = self.make_settings()
        self.command_log: list[LoggedMessage] = []
        self._log_messages = log_messages or log_path is not None
        self._log_path = Path(log_path) if log_path else None
        self._opc_armed = False  # *OPC received; set ESR bit 0 when pending operations finish
        self.remote = False  # remote/local state as a LAN transport sets it (no front panel to lock out)
        self.local_lockout = False
        self._output_pending = False
        self._table = [(compile_pattern(c.pattern), c) for c in BASE_COMMANDS + self.COMMANDS]

    # -- hooks for subclasses -------------------------------------------------------------------
    def make_settings(self) -> Any:
        return None

    def reset(self) -> None:
        """``*RST``: settings back to defaults; status, masks and queues untouched (IEEE 488.2 §10.32)."""
        self.settings = self.make_settings()
        self.settings_changed()

    def settings_changed(self) -> None:
        """Called after every stored setting changes (the generator tells the scopes)."""

    def busy(self) -> bool:
        """True while an operation is pending (an armed acquisition) for ``*OPC``, ``*OPC?``, ``*WAI``."""
        return False

    async def wait_idle(self) -> None:
        """Return once no operation is pending."""

    def identity(self) -> str:
        return f"{self.MANUFACTURER},{self.MODEL},0,{__version__}"

    # -- status ----------------------------------------------------------------------------------
    def push_error(self, code: int, detail: str = "") -> None:
        """Queue an error and set its event bit (also the fault-injection entry point)."""
        self.errors.push(code, detail)
        self.esr |= esr_bit_for(code)

    def status_byte(self) -> int:
        stb = 0
        if len(self.errors):
            stb |= STB_EAV
        if self._output_pending:
            stb |= STB_MAV
        if self.esr & self.ese:
            stb |= STB_ESB
        if stb & self.sre & ~STB_MSS:
            stb |= STB_MSS
        return stb

    def operation_complete(self) -> None:
        """Pending operations finished: honour an earlier ``*OPC``."""
        if self._opc_armed:
            self._opc_armed = False
            self.esr |= ESR_OPC

    def device_cleared(self) -> None:
        """A client cleared the device: a received ``*OPC`` no longer waits to set ESR bit 0 (§12.5.2)."""
        self._opc_armed = False

    def remote_local(self, remote: bool | None, lockout: bool | None) -> None:
        """A transport's remote/local control (HiSLIP AsyncRemoteLocalControl, VXI-11 device_remote and
        device_local); None leaves that state unchanged. Kept and reported only: there is no front panel."""
        if remote is not None:
            self.remote = remote
        if lockout is not None:
            self.local_lockout = lockout

    def power_cycle(self) -> None:
        """Fault injection "a reset": defaults, empty queue, PON set, as after switching off and on."""
        self.reset()
        self.errors.clear()
        self.ese = self.sre = 0
        self.esr = ESR_PON
        self._opc_armed = False

    # -- messages ----------------------------------------------------------------------------------
    def start_logging(self) -> None:
        """Keep every program message received from now on in ``command_log`` (what tests check reached
        the wire); the generator always does."""
        self._log_messages = True

    def log_message(self, text: str) -> None:
        if not self._log_messages:
            return
        entry = LoggedMessage(time.monotonic(), text)
        self.command_log.append(entry)
        if self._log_path is not None:
            with self._log_path.open("a", encoding="utf-8") as fh:
                fh.write(f"{entry.monotonic_s:.6f}\t{self.MODEL}\t{text}\n")

    async def execute(self, message: str, wait: Callable[[Awaitable[Any], bool], Awaitable[Any]]) -> list[Reply]:
        """Run one program message; returns its replies (one per query, in order).

        ``wait(awaitable, reply_pending)`` is how a unit blocks (``*OPC?``, ``*WAI``): the connection may
        interrupt it when new input arrives while a reply is pending.
        """
        replies: list[Reply] = []
        path: tuple[HeaderNode, ...] = ()
        try:
            units = [u for u in _split_outside_quotes(message, ";") if u.strip()]
        except SCPIError as exc:
            self.push_error(exc.code, exc.detail)
            return replies
        for text in units:
            self._output_pending = bool(replies)
            try:
                unit = parse_unit(text)
                if unit.common:
                    cmd, suffixes = self._common(unit.common), ()
                else:
                    nodes = unit.nodes if unit.rooted else path + unit.nodes
                    cmd, suffixes = self._lookup(nodes, unit.query)
                    path = nodes[:-1]  # §6.2.4: the next header resolves under this one's parent
                result = self._execute_unit(cmd, unit, suffixes)
                if isinstance(result, Awaitable):
                    result = await wait(result, bool(replies) or unit.query)
                if unit.query:
                    replies.append(result)
            except SCPIError as exc:
                self.push_error(exc.code, exc.detail)
                if -199 <= exc.code <= -100:
                    break
            finally:
                self._output_pending = False
        return replies

    def _lookup(self, nodes: tuple[HeaderNode, ...], query: bool) -> tuple[Cmd, tuple[int, ...]]:
        """The command a header names, and its instance suffixes; -114 / -113 when there is none."""
        shown = ":".join(n.name + (str(n.suffix) if n.suffix is not None else "") for n in nodes)
        bad_suffix = wrong_form = False
        for elements, cmd in self._table:
            for end, used in _matches(elements, nodes, 0, ()):
                if end != len(nodes):
                    continue
                try:
                    suffixes = _instance_suffixes(used)
                except _SuffixMismatch as exc:
                    bad_suffix |= exc.out_of_range
                    continue
                if cmd.handler(query)[0] is None:
                    wrong_form = True
                    continue
                return cmd, suffixes
        if bad_suffix:
            raise SCPIError(-114, shown)
        if wrong_form:
            raise SCPIError(-113, f"{shown}{'?' if query else ''}: {'command' if query else 'query'} only")
        raise SCPIError(-113, shown)

    def _common(self, name: str) -> Cmd:
        cmd = COMMON_COMMANDS.get(name)
        if cmd is None:
            raise SCPIError(-113, name)
        return cmd

    def _execute_unit(self, cmd: Cmd, unit: MessageUnit, suffixes: tuple[int, ...]) -> Any:
        """Run a handler; a fault inside the simulation becomes -300 instead of a dead connection."""
        try:
            return self._run(cmd, unit, suffixes)
        except SCPIError:
            raise
        except Exception as exc:
            _log.exception("%s: handler failed on %r", self.MODEL, unit)
            raise SCPIError(-300, f"internal: {type(exc).__name__}") from exc

    def _run(self, cmd: Cmd, unit: MessageUnit, suffixes: tuple[int, ...]) -> Any:
        handler, params = cmd.handler(unit.query)
        if handler is None:
            raise SCPIError(-113, f"{unit.common}{'?' if unit.query else ''}")
        if len(unit.params) > len(params):
            raise SCPIError(-108, f"{len(unit.params)} parameters given, at most {len(params)} taken")
        required = sum(1 for p in params if not p.optional)
        if len(unit.params) < required:
            raise SCPIError(-109, f"{required} parameters needed")
        values = [p.parse(text) for p, text in zip(params, unit.params)]
        func = getattr(self, handler) if isinstance(handler, str) else (lambda *a: handler(self, *a))
        return func(*suffixes, *values)

    # -- IEEE 488.2 common commands and SYSTem:ERRor ---------------------------------------------
    def _error_next(self) -> str:
        return scpi.format_error_entry(*self.errors.pop())

    def _idn(self) -> str:
        return self.identity()

    def _rst(self) -> None:
        self._opc_armed = False
        self.reset()

    def _cls(self) -> None:
        self.esr = 0
        self.errors.clear()
        self._opc_armed = False

    def _opc(self) -> None:
        if self.busy():
            self._opc_armed = True
        else:
            self.esr |= ESR_OPC

    async def _opc_query(self) -> str:
        await self.wait_idle()
        return "1"

    def _wai(self) -> Awaitable[None] | None:
        return self.wait_idle() if self.busy() else None

    def _esr_query(self) -> str:
        value, self.esr = self.esr, 0
        return str(value)

    def _set_ese(self, value: int) -> None:
        self.ese = value

    def _set_sre(self, value: int) -> None:
        self.sre = value & ~STB_MSS  # bit 6 cannot be enabled (IEEE 488.2 §11.3.2, from memory)

    def _stb_query(self) -> str:
        return str(self.status_byte())


_MASK = Integer(minimum=0, maximum=255)
COMMON_COMMANDS: dict[str, Cmd] = {
    "*IDN": Cmd("IDN", query="_idn"),
    "*RST": Cmd("RST", set="_rst"),
    "*CLS": Cmd("CLS", set="_cls"),
    "*OPC": Cmd("OPC", set="_opc", query="_opc_query"),
    "*WAI": Cmd("WAI", set="_wai"),
    "*ESR": Cmd("ESR", query="_esr_query"),
    "*ESE": Cmd("ESE", set="_set_ese", params=(_MASK,), query=lambda inst: str(inst.ese)),
    "*SRE": Cmd("SRE", set="_set_sre", params=(_MASK,), query=lambda inst: str(inst.sre)),
    "*STB": Cmd("STB", query="_stb_query"),
    "*TST": Cmd("TST", query=lambda inst: "0"),
}


# ---------------------------------------------------------------------------------------------------
# The message exchange with one client, whatever transport carries its bytes (IEEE 488.2 §6)
# ---------------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class Response:
    """One response message: the replies joined by ``;`` and ended by NL (IEEE 488.2 §8.4: the response
    message terminator is NL with END; the transport adds END its own way).

    ``tag`` is what the transport passed with the program message that produced it (HiSLIP: the message
    ID). Fault injection: ``cut_at`` says to send only that many bytes and then drop the connection (0 with
    no data: the connection reset between messages); ``pause_at`` to send the reply in two parts split there,
    ``pause_s`` apart (each transport its own way: two TCP writes, two HiSLIP messages, a short VXI-11 read)."""

    data: bytes
    tag: Any = None
    cut_at: int | None = None
    pause_at: int | None = None
    pause_s: float = SHORT_READ_PAUSE_S


class DeviceCleared(Exception):
    """The client cleared the device (IEEE 488.2 §5.8) while a unit was blocked or a reply was pending."""


class MessageExchange:
    """The message exchange between one client and the instrument: program messages in, responses out.

    A transport hands over the bytes it received (``receive``) and the end of its input (``end_of_input``),
    runs ``run()`` for as long as the client is there, and gets each response through ``respond``. NL
    ends a program message, and so does END where the transport carries one (HiSLIP DataEnd, VXI-11's END
    flag). ``device_clear()`` is the engine's own device clear; status and settings are the instrument's.
    """

    MAX_MESSAGE_BYTES = 1 << 20

    def __init__(self, instrument: SCPIInstrument, respond: Callable[[Response], Awaitable[None]]) -> None:
        self.instrument, self.respond = instrument, respond
        self._messages: asyncio.Queue[tuple[str, Any] | None] = asyncio.Queue()
        self._partial = bytearray()
        self._input_arrived = asyncio.Event()
        self._closed = asyncio.Event()
        self._cleared = asyncio.Event()  # replaced at every clear: a waiter holds the one it started with
        self.interrupt_queries = True  # False: new input waits its turn behind a pending reply (HiSLIP overlapped mode)

    # -- input ---------------------------------------------------------------------------------------
    def receive(self, data: bytes, end: bool = False, tag: Any = None) -> None:
        """Bytes from the client; every NL, and END (``end``), completes a program message."""
        self._partial += data
        *complete, rest = self._partial.split(b"\n")
        if end and rest:
            complete.append(rest)
            rest = bytearray()
        if len(rest) > self.MAX_MESSAGE_BYTES:
            self.instrument.push_error(-223, "message longer than 1 MiB discarded")
            rest = bytearray()
        self._partial = bytearray(rest)
        for message in complete:
            text = bytes(message).decode("latin-1").rstrip("\r")
            self.instrument.log_message(text)
            self._messages.put_nowait((text, tag))
            self._input_arrived.set()

    def end_of_input(self, partial: bytes = b"") -> None:
        """The client is gone. An unterminated query can never be answered (−420); an unterminated command
        is discarded, not executed (−100): a half-sent ``VOLT 1`` of ``VOLT 10`` must not reach the output."""
        text = (bytes(self._partial) + partial).decode("latin-1")
        self._partial = bytearray()
        if text.strip():
            self.instrument.log_message(text)
            if "?" in text:
                self.instrument.push_error(-420, "connection closed before the query was terminated")
            else:
                self.instrument.push_error(-100, "unterminated message discarded when the connection closed")
        self._closed.set()
        self._messages.put_nowait(None)

    def device_clear(self) -> None:
        """IEEE 488.2 §5.8 device clear: input buffer and output queue emptied, the parser reset, a blocked
        ``*OPC?``/``*WAI`` abandoned and ``*OPC`` disarmed (§12.5, the OPC state machines back to idle, from
        memory); settings, status registers, the error queue and an armed acquisition stay as they are."""
        self._partial = bytearray()
        while not self._messages.empty():
            if self._messages.get_nowait() is None:  # the client left meanwhile: keep telling run()
                self._messages.put_nowait(None)
                break
        self._input_arrived.clear()
        self.instrument.device_cleared()
        self._cleared.set()
        self._cleared = asyncio.Event()

    # -- execution -----------------------------------------------------------------------------------
    async def run(self) -> None:
        """Execute the program messages one at a time until the client is gone."""
        while (item := await self._messages.get()) is not None:
            message, tag = item
            if self._messages.empty():
                self._input_arrived.clear()
            faults = self.instrument.faults
            if faults.hit("connection_reset"):  # between messages: this one is never read
                try:
                    await self.respond(Response(b"", tag, cut_at=0))
                except (ConnectionLost, ConnectionError):
                    pass
                return
            if faults.hit("power_cycle"):
                self.instrument.power_cycle()
            try:
                if "*OPC?" in message.upper() and (delay := faults.delay_s("slow_opc")):
                    await self._wait(asyncio.sleep(delay), True)
                replies = await self.instrument.execute(message, self._wait)
                if faults.hit("error_entry"):
                    self.instrument.push_error(-200, "execution error (injected fault)")
                if replies:
                    if delay := faults.delay_s("reply_delay"):
                        await self._wait(asyncio.sleep(delay), True)
                    await self.respond(self._response(replies, tag))
            except QueryInterrupted:
                self.instrument.push_error(-410, "a new message arrived before the reply was sent")
            except DeviceCleared:
                continue
            except (ConnectionLost, ConnectionError):
                return

    async def _wait(self, awaitable: Awaitable[Any], reply_pending: bool) -> Any:
        """Await a blocked unit; give up with −410 if new input arrives while a reply is pending (§6.3.2.3),
        quietly on a device clear."""
        task = asyncio.ensure_future(awaitable)
        watchers = [asyncio.ensure_future(self._closed.wait()), asyncio.ensure_future(self._cleared.wait())]
        if reply_pending and self.interrupt_queries:
            watchers.append(asyncio.ensure_future(self._input_arrived.wait()))
        try:
            done, _ = await asyncio.wait({task, *watchers}, return_when=asyncio.FIRST_COMPLETED)
        except asyncio.CancelledError:
            task.cancel()  # the server is stopping: the blocked unit goes too, not left pending at loop close
            raise
        finally:
            for w in watchers:
                w.cancel()
        if task in done:
            return task.result()
        task.cancel()
        if self._closed.is_set():
            raise ConnectionLost
        if watchers[1] in done:
            raise DeviceCleared
        raise QueryInterrupted

    def _response(self, replies: list[Reply], tag: Any) -> Response:
        """The response message, with the block faults applied to its first block."""
        faults = self.instrument.faults
        parts = [r.encode("ascii") if isinstance(r, str) else r for r in replies]
        block_at = _first_block_offset(replies, parts)
        data = b";".join(parts) + b"\n"
        if block_at is not None and faults.hit("garble_block"):
            data = data[:block_at + 1] + b"?" + data[block_at + 2:]
        cut_at = block_at + (len(data) - block_at) // 2 if block_at is not None and faults.hit("cut_block") else None
        pause_at = len(data) // 2 if cut_at is None and len(data) > 1 and faults.hit("short_read") else None
        return Response(data, tag, cut_at, pause_at, faults.short_read_pause_s)


def _first_block_offset(replies: list[Reply], parts: list[bytes]) -> int | None:
    offset = 0
    for reply, part in zip(replies, parts):
        if isinstance(reply, bytes):
            return offset
        offset += len(part) + 1
    return None
