"""Validated reading of TOML tables: every error names the file, the line where it can be found, the key
and what is allowed, and an unknown key (a typo) is an error rather than silently ignored.

Why a helper of our own instead of a schema library: messages must read like a bench engineer's checklist
("profiles/night.toml line 12: [stimulus] high_v: must be at most 5 V (limits.max_level_v)"), and the
set of types is small.
"""

from __future__ import annotations

import difflib
import math
import re
import tomllib
from collections.abc import Iterable, Mapping
from datetime import date, datetime
from pathlib import Path
from typing import Any

from .errors import ConfigError


MAX_FILE_BYTES = 20_000_000  # a profile or driver file is pages of text; read whole, so it is bounded


SHOWN_CHARS = 60  # of a value quoted in an error line, so a 400-digit number stays one short line


def shown(text: str) -> str:
    """``text`` quoted for an error line, cut to ``SHOWN_CHARS``."""
    text = text.strip()
    return repr(text) if len(text) <= SHOWN_CHARS else repr(text[:SHOWN_CHARS - 3] + "...")


def finite_float(source: str | Path, field: str, text: str) -> float:
    """``text`` as a finite float, or one ConfigError naming ``source`` and ``field`` (``nan`` and ``inf``
    are floats to Python, and no measured or given quantity here is either)."""
    try:
        value = float(text)
    except ValueError:
        raise ConfigError(source, field, f"{shown(text)} is not a number") from None
    if not math.isfinite(value):
        raise ConfigError(source, field, f"{shown(text)} is not a finite number")
    return value


def load_toml(path: str | Path) -> tuple[dict[str, Any], str]:
    """(parsed table, original text); unreadable or malformed files give one ConfigError line."""
    path = Path(path)
    if path.exists() and not path.is_file():  # a FIFO would block the read until a writer comes
        raise ConfigError(str(path), "", "is not a regular file (a folder, a device or a FIFO); name a TOML file")
    if path.is_file() and path.stat().st_size > MAX_FILE_BYTES:
        raise ConfigError(str(path), "", f"is {path.stat().st_size:,} bytes; a TOML file here has at most "
                                         f"{MAX_FILE_BYTES:,}")
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise ConfigError(str(path), "", "file not found") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(str(path), "", f"cannot be read ({exc.__class__.__name__}: {exc})") from None
    try:
        return tomllib.loads(text), text
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(str(path), "", f"not valid TOML: {exc}") from None
    except RecursionError:
        raise ConfigError(str(path), "", "not valid here: tables or lists nested too deeply") from None
    except ValueError as exc:  # e.g. an integer literal longer than Python converts (4300 digits)
        raise ConfigError(str(path), "", f"not valid TOML: {exc}") from None


# Every string a TOML file gives (names, units, descriptions, templates): a stated bound, so a 10 MB channel
# name is refused at once instead of spending minutes in the terminal; and no control character, which
# would reach the terminal in every line that names it (tab and newline are text).
MAX_STRING_CHARS = 4096
_CONTROL = frozenset(chr(c) for c in (*range(0x20), *range(0x7F, 0xA0)) if chr(c) not in "\t\n")


class Table:
    """One TOML table being validated; call ``done()`` last so leftover (unknown) keys are reported."""

    def __init__(self, data: Mapping[str, Any], source: str, path: str = "", text: str = "") -> None:
        if not isinstance(data, Mapping):
            raise ConfigError(source, path or "(top level)", f"must be a table, not {_kind(data)}")
        self.data, self.source, self.path, self.text = data, source, path, text
        self._seen: set[str] = set()

    # -- locating -------------------------------------------------------------------------------
    def where(self, key: str) -> tuple[str, str]:
        """(source with line number where findable, dotted field name)."""
        field = f"{self.path}.{key}" if self.path else key
        line = _line_of(self.text, self.path, key) if self.text else None
        return (f"{self.source} line {line}" if line else self.source), field

    def error(self, key: str, problem: str) -> ConfigError:
        source, field = self.where(key)
        return ConfigError(source, field, problem)

    # -- typed getters --------------------------------------------------------------------------
    def has(self, key: str) -> bool:
        return key in self.data

    def raw(self, key: str, default: Any = ...) -> Any:
        self._seen.add(key)
        if key in self.data:
            return self.data[key]
        if default is ...:
            unread = [k for k in self.data if isinstance(k, str) and k not in self._seen]
            typo = difflib.get_close_matches(key, unread, n=1)
            if typo:
                raise self.error(typo[0], f"unknown key; did you mean {key!r} (required)?")
            raise self.error(key, "missing (required)")
        return default

    def number(self, key: str, default: Any = ..., *, min: float | None = None, max: float | None = None,
               positive: bool = False, unit: str = "") -> float:
        value = self.raw(key, default)
        if value is None:
            return value
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not _finite(value):
            raise self.error(key, f"must be a finite number{_unit(unit)}, not {_shown(value)}")
        if positive and value <= 0:
            raise self.error(key, f"must be greater than 0{_unit(unit)}, not {_shown(value)}")
        if min is not None and value < min:
            raise self.error(key, f"must be at least {min:g}{_unit(unit)}, not {_shown(value)}")
        if max is not None and value > max:
            raise self.error(key, f"must be at most {max:g}{_unit(unit)}, not {_shown(value)}")
        return float(value)

    def integer(self, key: str, default: Any = ..., *, min: int | None = None, max: int | None = None) -> int:
        value = self.raw(key, default)
        if value is None:  # only a None default gets here: TOML has no null
            return value
        if isinstance(value, bool) or not isinstance(value, int):
            raise self.error(key, f"must be a whole number, not {_shown(value)}")
        if (min is not None and value < min) or (max is not None and value > max):
            span = f"from {min} to {max}" if max is not None else f"at least {min}"
            raise self.error(key, f"must be {span}, not {_shown(value)}")
        return value

    def boolean(self, key: str, default: Any = ...) -> bool:
        value = self.raw(key, default)
        if not isinstance(value, bool):
            raise self.error(key, f"must be true or false, not {_shown(value)}")
        return value

    def string(self, key: str, default: Any = ..., *, choices: Iterable[str] | None = None) -> str:
        value = self.raw(key, default)
        if value is None:
            return value
        if not isinstance(value, str) or not value.strip():
            raise self.error(key, f"must be a non-empty string, not {_shown(value)}")
        if choices is not None and value not in (allowed := list(choices)):
            raise self.error(key, f"must be one of {', '.join(allowed)}, not {_shown(value)}")
        if len(value) > MAX_STRING_CHARS:
            raise self.error(key, f"{len(value):,} characters; at most {MAX_STRING_CHARS:,}")
        if any(ch in _CONTROL for ch in value):
            raise self.error(key, "contains a control character (such as ESC); only printable text, tabs and "
                                  "newlines are allowed")
        return value

    def moment(self, key: str, default: Any = None) -> datetime | None:
        """A TOML date-time or ISO 8601 text; without an offset it is the machine's local time."""
        value = self.raw(key, default)
        if value is None:
            return None
        if isinstance(value, str):
            try:
                value = datetime.fromisoformat(value)
            except ValueError:
                raise self.error(key, f"must be an ISO 8601 date-time such as 2026-12-03T06:00:00+01:00, "
                                      f"not {_shown(value)}") from None
        if not isinstance(value, datetime):
            kind = "a date without a time" if isinstance(value, date) else repr(value)
            raise self.error(key, f"must be a date-time such as 2026-12-03T06:00:00+01:00, not {kind}")
        return value if value.tzinfo is not None else value.astimezone()

    def table(self, key: str, default: Any = ...) -> Table:
        value = self.raw(key, default)
        path = f"{self.path}.{key}" if self.path else key
        if value is None:
            value = {}
        if not isinstance(value, Mapping):
            raise self.error(key, f"must be a table, not {_kind(value)}")
        return Table(value, self.source, path, self.text)

    def done(self) -> None:
        """Reject keys nobody asked for: a typo must not silently fall back to a default."""
        unknown = [k for k in self.data if k not in self._seen]
        if unknown:
            allowed = ", ".join(sorted(self._seen)) or "(none)"
            raise self.error(unknown[0], f"unknown key; allowed here: {allowed}")


def _finite(value: int | float) -> bool:
    """Whether a TOML number is one a float can hold: a 400-digit integer is not (and would overflow)."""
    return math.isfinite(value) if isinstance(value, float) else abs(value) <= 1e308


SHOWN_CHARS = 60


def _shown(value: Any) -> str:
    """A value as an error message quotes it: repr, cut to SHOWN_CHARS so a 10 MB string stays one line."""
    if isinstance(value, int) and not isinstance(value, bool) and abs(value) > 10 ** SHOWN_CHARS:
        return f"a {len(str(abs(value)))}-digit number"
    text = repr(value)
    return text if len(text) <= SHOWN_CHARS else text[:SHOWN_CHARS - 3] + "..."


def _unit(unit: str) -> str:
    return f" ({unit})" if unit else ""


def _kind(value: Any) -> str:
    return {dict: "a table", list: "a list", str: "a string", bool: "a boolean",
            int: "a number", float: "a number"}.get(type(value), type(value).__name__)


def _line_of(text: str, table_path: str, key: str) -> int | None:
    """1-based line of ``key = ...`` inside ``[table_path]`` (or of the table header), best effort."""
    header = re.compile(r"^\s*\[\[?\s*([^\]]+?)\s*\]\]?\s*(#.*)?$")
    key_line = re.compile(rf"^\s*\"?{re.escape(key)}\"?\s*=")
    current = ""
    for number, line in enumerate(text.splitlines(), start=1):
        if m := header.match(line):
            current = m.group(1).replace('"', "").replace(" ", "")
            if current == (f"{table_path}.{key}" if table_path else key):
                return number
            continue
        if current == table_path and key_line.match(line):
            return number
    return None
