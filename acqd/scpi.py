"""The only place SCPI text is built or parsed: command values, replies, IEEE 488.2 blocks, sample formats.

Client (the instrument roles) and server (the simulated instruments) share this module so that both sides
agree byte for byte. Building is strict on purpose: a value that reaches a command has been typed and
formatted here, so nothing taken from a profile can smuggle a ``;``, ``:``, quote or newline onto the wire
and turn one setting into two commands.

Clauses cited: IEEE 488.2-1992 (§7.7 program data, §8.7 response data) and SCPI-1999 Vol 1 (§6.2 headers,
§7.2 numeric parameters and suffixes).
"""

from __future__ import annotations

import math
import numbers
import re
import string
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

# SCPI-1999 Vol 1 §7.2.1: the numeric encodings of the special values INFinity, NINFinity and NAN.
SCPI_INF = 9.9e37
SCPI_NAN = 9.91e37


class BlockError(ValueError):
    """An IEEE 488.2 arbitrary block is malformed (garbled header, wrong length, trailing bytes)."""


class SuffixError(ValueError):
    """A unit suffix is not allowed for the parameter, or is not a valid multiplier + unit."""


# ---------------------------------------------------------------------------------------------------
# Mnemonics
# ---------------------------------------------------------------------------------------------------

def mnemonic_forms(notation: str) -> tuple[str, str]:
    """(long form, short form) from the table notation where upper case marks the short form.

    ``"FREQuency"`` → ``("FREQUENCY", "FREQ")``. The short form is *read from the table*, never derived
    by the four-letter rule, because the rule has exceptions (SCPI-1999 Vol 1 §6.2.1) and a table is the
    authority; a notation whose capitals are not a prefix is rejected as a table error.
    """
    if not re.fullmatch(r"[A-Za-z][A-Za-z0-9_]*", notation):
        raise ValueError(f"mnemonic notation {notation!r} must be letters, digits or '_'")
    short = re.match(r"[A-Z0-9_]*", notation).group(0)
    if not short or any(c.isupper() for c in notation[len(short):]):
        raise ValueError(f"mnemonic notation {notation!r}: the short form must be its upper-case prefix")
    return notation.upper(), short


def short_form(notation: str) -> str:
    """The short form written in a table notation: ``"TINTerval"`` → ``"TINT"``."""
    return mnemonic_forms(notation)[1]


# ---------------------------------------------------------------------------------------------------
# Building command text
# ---------------------------------------------------------------------------------------------------

def _finite_real(value: Any, what: str) -> float:
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, numbers.Real):
        raise ValueError(f"{what} must be a number, not {value!r}")
    value = float(value)
    if not math.isfinite(value):
        raise ValueError(f"{what} must be finite, not {value!r}")
    return value


def format_number(value: Any) -> str:
    """NR3 text with the fewest digits that read back as the same double: 0.0015 → ``1.5E-03``.

    NR3 (IEEE 488.2 §8.7.4) is accepted by every numeric parameter, and shortest round-trip digits mean
    the instrument receives exactly the value that was validated.
    """
    x = _finite_real(value, "numeric value")
    for digits in range(17):
        text = f"{x:.{digits}E}"
        if float(text) == x:
            return text
    return f"{x:.16E}"


def format_int(value: Any) -> str:
    """NR1 text (IEEE 488.2 §8.7.2) of a whole number; bools and floats are refused, not truncated."""
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, numbers.Integral):
        raise ValueError(f"integer value must be a whole number, not {value!r}")
    return str(int(value))


def format_bool(value: Any) -> str:
    """``ON``/``OFF`` (SCPI-1999 Vol 1 §7.3) from a real bool only: 0/1 or "yes" are ambiguous here."""
    if not isinstance(value, (bool, np.bool_)):
        raise ValueError(f"boolean value must be true or false, not {value!r}")
    return "ON" if value else "OFF"


# A token of a text value: IEEE 488.2 §7.7.1 character program data (a letter, then letters, digits or
# '_') or a signed whole number; a list value ("REAL,32") joins tokens with ','.
_LIST_TOKEN = re.compile(r"[A-Za-z][A-Za-z0-9_]*|[+-]?[0-9]+")


def format_enum(value: Any, allowed: Iterable[str]) -> str:
    """``value`` as one of ``allowed``, spelled as the allowed entry.

    Compared case-insensitively; an entry in table notation (``EXTernal``) also matches its short form.
    """
    options = list(allowed)
    if isinstance(value, str):
        for option in options:
            try:
                forms = set(mnemonic_forms(option))
            except ValueError:  # not a mnemonic in table notation ("REAL,32"): whole text only
                forms = {option.upper()}
            if value.upper() in forms:
                _check_token_list(option)
                return option
    raise ValueError(f"value {value!r} is not allowed; allowed: {', '.join(options)}")


def _check_token_list(text: str) -> str:
    if not all(_LIST_TOKEN.fullmatch(part) for part in text.split(",")):
        raise ValueError(f"text value {text!r} may only hold mnemonics or whole numbers separated by ','; "
                         f"no spaces, quotes, ';', ':' or line breaks")
    return text


def format_value(value: Any) -> str:
    """One typed value as program data: bool → ON/OFF, whole number → NR1, real → NR3, text → mnemonic(s).

    Text is only accepted as character data (``EXT``, ``CH1``) or a comma list of such tokens and whole
    numbers (``REAL,32``); anything else — spaces, quotes, ``;``, ``:``, CR, LF — raises ValueError.
    """
    if isinstance(value, (bool, np.bool_)):
        return format_bool(value)
    if isinstance(value, numbers.Integral):
        return format_int(value)
    if isinstance(value, numbers.Real):
        return format_number(value)
    if isinstance(value, str):
        return _check_token_list(value)
    if isinstance(value, ChannelList):
        return format_channel_list(value.channels)
    if isinstance(value, (tuple, list)):
        return ",".join(format_value(v) for v in value)
    raise ValueError(f"cannot send a value of type {type(value).__name__}: {value!r}")


def command(template: str, **values: Any) -> str:
    """Fill ``{name}`` placeholders of a trusted template with typed values: ``command("FREQ {f}", f=1e3)``.

    Every placeholder must be given and every value used; format specs and conversions are refused so that
    the text sent is exactly ``format_value`` of each value.
    """
    names: list[str] = []
    for _, field, spec, conversion in string.Formatter().parse(template):
        if field is None:
            continue
        if not field.isidentifier() or spec or conversion:
            raise ValueError(f"template {template!r}: placeholder {{{field}}} must be a plain name")
        names.append(field)
    missing = sorted(set(names) - set(values))
    extra = sorted(set(values) - set(names))
    if missing or extra:
        raise ValueError(f"template {template!r}: missing values {missing}, unused values {extra}")
    formatted = {}
    for name in names:
        try:
            formatted[name] = format_value(values[name])
        except ValueError as exc:
            raise ValueError(f"template {template!r}, value {name}: {exc}") from None
    return template.format(**formatted)


def single_message_problem(text: str) -> str | None:
    """Why ``text`` is not one program message unit, or None when it is.

    A ``;`` outside a quoted string starts a second message unit (IEEE 488.2 §7.1, (m)), and a line
    feed ends the message: a driver template holding either would send commands the driver does not
    declare and shift every later reply by one. Quoted strings (§7.7.5) may hold both.
    """
    quote = None
    for char in text:
        if quote:
            quote = None if char == quote else quote
        elif char in "\"'":
            quote = char
        elif char == ";":
            return "holds ';', which starts a second command; write one command per list entry"
        elif char in "\r\n":
            return "must be one line (a line break would end the message)"
    return "has an unclosed quoted string" if quote else None


# ---------------------------------------------------------------------------------------------------
# Parsing replies
# ---------------------------------------------------------------------------------------------------

_NR1 = re.compile(r"[+-]?[0-9]+")
# IEEE 488.2 §7.7.2 decimal numeric data (NRf): mantissa with optional point, optional exponent.
_NRF = re.compile(r"[+-]?(?:[0-9]+\.?[0-9]*|\.[0-9]+)(?:[eE][+-]?[0-9]+)?")


def parse_nr1(text: str) -> int:
    """An NR1 reply (``+12``, ``-3``) as int; anything else is a ValueError naming the text."""
    t = text.strip()
    if not _NR1.fullmatch(t):
        raise ValueError(f"expected a whole number (NR1), got {text!r}")
    return int(t)


def parse_number(text: str) -> float:
    """An NR1/NR2/NR3 reply as float; SCPI's 9.9E37 / -9.9E37 / 9.91E37 become inf / -inf / nan.

    SCPI-1999 Vol 1 §7.2.1 encodes INFinity, NINFinity and NAN as those numbers, so a reader that kept
    them as huge finite values would compute nonsense; the mnemonics themselves are accepted too.
    """
    t = text.strip()
    special = {"INF": math.inf, "NINF": -math.inf, "NAN": math.nan}
    if t.upper() in special:
        return special[t.upper()]
    if not _NRF.fullmatch(t):
        raise ValueError(f"expected a number (NR1/NR2/NR3), got {text!r}")
    value = float(t)
    if value == SCPI_INF:
        return math.inf
    if value == -SCPI_INF:
        return -math.inf
    if value == SCPI_NAN:
        return math.nan
    return value


def parse_bool(text: str) -> bool:
    """``1``/``0`` (SCPI-1999 Vol 1 §7.3 boolean response) or ``ON``/``OFF``."""
    t = text.strip().upper()
    if t in ("1", "ON"):
        return True
    if t in ("0", "OFF"):
        return False
    raise ValueError(f"expected a boolean (1, 0, ON or OFF), got {text!r}")


def parse_string(text: str) -> str:
    """String response data (IEEE 488.2 §8.7.8): the quotes removed and each doubled inner quote halved;
    bare (unquoted) text is returned stripped."""
    t = text.strip()
    if len(t) >= 2 and t[0] in "\"'" and t[-1] == t[0]:
        quote = t[0]
        inner = t[1:-1]
        if re.search(f"(?<!{quote}){quote}(?:{quote}{quote})*(?!{quote})", inner):
            raise ValueError(f"unescaped quote inside string reply {text!r}")
        return inner.replace(quote * 2, quote)
    if t[:1] in ("\"", "'"):
        raise ValueError(f"unterminated string reply {text!r}")
    return t


def split_reply(text: str, sep: str = ";") -> list[str]:
    """Split a reply at ``sep`` outside quoted strings and parentheses: several queries' answers (``;``) or
    values (``,``). A parenthesised part is expression data (IEEE 488.2 §7.7.7), such as a channel list
    ``(@101,102)``, whose commas belong to it."""
    parts, current, quote, depth = [], [], "", 0
    for ch in text.strip():
        if quote:
            current.append(ch)
            if ch == quote:
                quote = ""  # a doubled quote re-opens at once on the next character
        elif ch in "\"'":
            quote = ch
            current.append(ch)
        elif ch in "()":
            depth += 1 if ch == "(" else -1
            current.append(ch)
        elif ch == sep and depth == 0:
            parts.append("".join(current).strip())
            current = []
        else:
            current.append(ch)
    if quote:
        raise ValueError(f"unterminated string in reply {text!r}")
    parts.append("".join(current).strip())
    return parts


def format_error_entry(code: int, text: str) -> str:
    """An error-queue reply (SCPI-1999 Vol 2 §21.8): ``-113,"Undefined header"``, quotes in the text doubled."""
    quoted = text.replace('"', '""')
    return f'{int(code)},"{quoted}"'


def parse_error_entry(text: str) -> tuple[int, str]:
    """One error-queue entry (SCPI-1999 Vol 2 §21.8): ``-113,"Undefined header"`` → (-113, text)."""
    parts = text.strip().split(",", 1)
    if len(parts) != 2:
        raise ValueError(f"expected an error entry <code>,\"<text>\", got {text!r}")
    return parse_nr1(parts[0]), parse_string(parts[1])


# ---------------------------------------------------------------------------------------------------
# IEEE 488.2 arbitrary blocks
# ---------------------------------------------------------------------------------------------------

MAX_DEFINITE_DIGITS = 9


def encode_block(payload: bytes) -> bytes:
    """Definite length arbitrary block response data (IEEE 488.2 §8.7.9): ``#<n><len><bytes>``."""
    count = str(len(payload))
    if len(count) > MAX_DEFINITE_DIGITS:
        raise BlockError(f"a definite block holds at most 999999999 bytes, not {len(payload)}")
    return b"#" + str(len(count)).encode() + count.encode() + bytes(payload)


def block_header_length(prefix: bytes) -> int:
    """Total header length known from the first two bytes ``#<n>``: 2 + n (2 for indefinite ``#0``)."""
    if len(prefix) < 2:
        raise BlockError(f"a block header needs at least 2 bytes, got {bytes(prefix)!r}")
    if prefix[:1] != b"#":
        raise BlockError(f"a block must start with '#', got {bytes(prefix[:16])!r}")
    digit = prefix[1:2]
    if not digit.isdigit():
        raise BlockError(f"'#' must be followed by a digit 0-9, got {bytes(prefix[:16])!r}")
    return 2 + int(digit)


def parse_block_header(prefix: bytes) -> tuple[int, int | None]:
    """(header length, payload length) of the block that ``prefix`` starts; None length means ``#0``.

    Made for a transport that reads the header first and then exactly the payload: read two bytes, ask
    ``block_header_length``, read the rest of the header, call this, then read the payload and terminator.
    """
    header_len = block_header_length(prefix)
    if header_len == 2:
        return 2, None
    if len(prefix) < header_len:
        raise BlockError(f"block header {bytes(prefix)!r} is cut short: {header_len} bytes expected")
    digits = prefix[2:header_len]
    if not digits.isdigit():
        raise BlockError(f"block length field {bytes(digits)!r} must be {header_len - 2} ASCII digits")
    return header_len, int(digits)


def decode_block(data: bytes) -> bytes:
    """The payload of one whole block: definite (a trailing NL or CR NL is allowed) or indefinite ``#0``.

    An indefinite block (IEEE 488.2 §8.7.10) ends with NL (sent with END); that NL is not payload.
    """
    data = bytes(data)
    header_len, count = parse_block_header(data[:2 + MAX_DEFINITE_DIGITS])
    if count is None:
        if not data.endswith(b"\n"):
            raise BlockError("an indefinite block (#0) must end with a newline")
        return data[2:-1]
    end = header_len + count
    if len(data) < end:
        raise BlockError(f"block announces {count} bytes but holds only {len(data) - header_len}")
    tail = data[end:]
    if tail not in (b"", b"\n", b"\r\n"):
        raise BlockError(f"{len(tail)} unexpected bytes after a {count}-byte block: {tail[:16]!r}")
    return data[header_len:end]


# ---------------------------------------------------------------------------------------------------
# Sample formats (SCPI-1999 Vol 2 FORMat subsystem)
# ---------------------------------------------------------------------------------------------------

# canonical name → (numpy kind, bytes per sample); ASCii has no binary representation.
SAMPLE_FORMATS: dict[str, tuple[str, int]] = {"REAL,32": ("f", 4), "INT,8": ("i", 1), "INT,16": ("i", 2),
                                              "ASC": ("", 0)}
_FORMAT_ALIASES = {"REAL,32": "REAL,32", "INT,8": "INT,8", "INTEGER,8": "INT,8", "INT,16": "INT,16",
                   "INTEGER,16": "INT,16", "ASC": "ASC", "ASCII": "ASC"}
_BYTE_ORDERS = {"NORM": ">", "NORMAL": ">", "SWAP": "<", "SWAPPED": "<"}


def sample_format(fmt: str) -> str:
    """Canonical format name (``REAL,32``, ``INT,8``, ``INT,16``, ``ASC``) from long or short spelling."""
    key = fmt.replace(" ", "").upper()
    if key not in _FORMAT_ALIASES:
        raise ValueError(f"data format {fmt!r} is not supported; allowed: REAL,32, INTeger,8, INTeger,16, ASCii")
    return _FORMAT_ALIASES[key]


def _dtype(fmt: str, byteorder: str) -> np.dtype:
    kind, size = SAMPLE_FORMATS[fmt]
    order = _BYTE_ORDERS.get(byteorder.upper())
    if order is None:
        raise ValueError(f"byte order {byteorder!r} is not supported; allowed: NORMal (big-endian), SWAPped")
    return np.dtype(f"{order}{kind}{size}")


def encode_samples(values: Sequence[float] | np.ndarray, fmt: str, byteorder: str = "NORM") -> bytes:
    """Block payload for ``fmt`` (REAL,32 floats; INT,8 / INT,16 codes), or ASCii NR3 text joined by ','.

    Integer formats take codes, not volts: a code that does not fit is an error, never a silent wrap.
    """
    fmt = sample_format(fmt)
    array = np.asarray(values)
    if fmt == "ASC":
        return ",".join(format_number(v) for v in array.astype(float)).encode("ascii")
    dtype = _dtype(fmt, byteorder)
    if dtype.kind == "i":
        info = np.iinfo(dtype)
        if array.size and (not np.all(np.equal(np.round(array), array))
                           or array.min() < info.min or array.max() > info.max):
            raise ValueError(f"{fmt} codes must be whole numbers from {info.min} to {info.max}")
    return array.astype(dtype).tobytes()


def decode_samples(data: bytes, fmt: str, byteorder: str = "NORM") -> np.ndarray:
    """Samples from a block payload (native-endian float32/int8/int16) or ASCii text (float64)."""
    fmt = sample_format(fmt)
    if fmt == "ASC":
        text = bytes(data).decode("ascii").strip()
        return np.array([parse_number(v) for v in text.split(",")] if text else [], dtype=float)
    dtype = _dtype(fmt, byteorder)
    if len(data) % dtype.itemsize:
        raise BlockError(f"{len(data)} bytes is not a whole number of {fmt} samples ({dtype.itemsize} bytes each)")
    # frombuffer takes bytes, bytearray or memoryview as they are: one copy (the byte-order conversion) in all.
    return np.frombuffer(data, dtype=dtype).astype(dtype.newbyteorder("="))


# ---------------------------------------------------------------------------------------------------
# Unit suffixes (SCPI-1999 Vol 1 §7.2.2; IEEE 488.2 §7.7.3)
# ---------------------------------------------------------------------------------------------------

# Multipliers are case-insensitive, so mega is MA and M is milli (IEEE 488.2 §7.7.3.4, from memory).
MULTIPLIERS: dict[str, float] = {"EX": 1e18, "PE": 1e15, "T": 1e12, "G": 1e9, "MA": 1e6, "K": 1e3,
                                 "M": 1e-3, "U": 1e-6, "N": 1e-9, "P": 1e-12, "F": 1e-15, "A": 1e-18}
# The defined exceptions: with these units a bare M means mega (MHZ megahertz, MOHM megohm).
MEGA_WITH_M = ("HZ", "OHM")

_VALUE_WITH_SUFFIX = re.compile(r"\s*(" + _NRF.pattern + r")\s*([A-Za-z]*)\s*")


def suffix_multiplier(suffix: str, unit: str) -> float:
    """The factor a suffix applies for a parameter in ``unit``: ``MV``/V → 1e-3, ``MHZ``/HZ → 1e6.

    An empty suffix is 1. The unit must come last (a multiplier alone is refused, so ``10M`` cannot be
    misread); ``unit=""`` means the parameter takes no suffix at all.
    """
    s, u = suffix.upper(), unit.upper()
    if not s:
        return 1.0
    if not u:
        raise SuffixError(f"suffix {suffix!r} not allowed: this value takes no unit")
    if not s.endswith(u):
        raise SuffixError(f"suffix {suffix!r} is not a multiple of {unit}")
    prefix = s[: -len(u)]
    if not prefix:
        return 1.0
    if prefix == "M" and u in MEGA_WITH_M:
        return 1e6
    if prefix not in MULTIPLIERS:
        raise SuffixError(f"suffix {suffix!r}: {prefix!r} is not an SI multiplier "
                          f"({', '.join(MULTIPLIERS)})")
    return MULTIPLIERS[prefix]


def parse_value_with_unit(text: str, unit: str) -> float:
    """A decimal number with an optional suffix, in SI: ``("10 mV", "V")`` → 0.01, ``("1MHZ", "HZ")`` → 1e6."""
    match = _VALUE_WITH_SUFFIX.fullmatch(text)
    if not match:
        raise ValueError(f"expected a number with an optional {unit or 'unit'} suffix, got {text!r}")
    return float(match.group(1)) * suffix_multiplier(match.group(2), unit)


# ---------------------------------------------------------------------------------------------------
# Channel lists (SCPI-1999 Vol 1 §8.3.2, from memory): ``(@101,102)``, ranges ``(@101:108)``
# ---------------------------------------------------------------------------------------------------

_CHANNEL_LIST = re.compile(r"\(\s*@(?P<body>[^()]*)\)")
_CHANNEL_ENTRY = re.compile(r"([0-9]+)(?:\s*:\s*([0-9]+))?")
MAX_CHANNEL_LIST_ENTRIES = 10_000  # a range wider than a whole switch frame is a typo, not a path


@dataclass(frozen=True)
class ChannelList:
    """Switch channel numbers to be sent as one channel list: ``format_value`` writes ``(@101,102)``."""

    channels: tuple[int, ...]


def format_channel_list(channels: Iterable[int]) -> str:
    """``(@101,102,105:108)``: the channels in the order given, a run of three or more as a range.

    Order matters to a switch (it acts on the list in turn), so the list is never sorted.
    """
    numbers_ = [_channel_number(c) for c in channels]
    entries: list[str] = []
    i = 0
    while i < len(numbers_):
        j = i
        while j + 1 < len(numbers_) and numbers_[j + 1] == numbers_[j] + 1:
            j += 1
        if j - i >= 2:
            entries.append(f"{numbers_[i]}:{numbers_[j]}")
        else:
            entries.extend(str(n) for n in numbers_[i:j + 1])
        i = j + 1
    return "(@" + ",".join(entries) + ")"


def _channel_number(value: Any) -> int:
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, numbers.Integral) or value < 1:
        raise ValueError(f"a switch channel is a positive whole number, not {value!r}")
    return int(value)


def parse_channel_list(text: str) -> tuple[int, ...]:
    """``(@101,103:105)`` → (101, 103, 104, 105); a descending range ``105:103`` lists 105, 104, 103.

    Only the flat numeric form: module-qualified (``1!101``) and multi-dimensional entries are refused,
    as is an empty entry; ``(@)`` is the empty list.
    """
    match = _CHANNEL_LIST.fullmatch(text.strip())
    if not match:
        raise ValueError(f"expected a channel list such as (@101,102) or (@101:108), got {text!r}")
    body = match.group("body").strip()
    if not body:
        return ()
    channels: list[int] = []
    for entry in body.split(","):
        part = _CHANNEL_ENTRY.fullmatch(entry.strip())
        if not part:
            raise ValueError(f"channel list {text!r}: entry {entry.strip()!r} is not a channel or a range "
                             f"first:last of channel numbers")
        first = int(part.group(1))
        last = int(part.group(2) or first)
        step = 1 if last >= first else -1
        if abs(last - first) + len(channels) >= MAX_CHANNEL_LIST_ENTRIES:
            raise ValueError(f"channel list {text!r} holds more than {MAX_CHANNEL_LIST_ENTRIES} channels")
        channels.extend(range(first, last + step, step))
    return tuple(channels)


def parse_bool_list(text: str) -> tuple[bool, ...]:
    """A comma-separated list of 1/0 (ON/OFF), one per channel asked about (``ROUTe:CLOSe?``)."""
    return tuple(parse_bool(v) for v in split_reply(text, ",")) if text.strip() else ()
