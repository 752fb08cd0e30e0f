"""How a person reads a quantity: symbols and SI prefixes for what files and JSON keep as keys.

Files, JSON and profiles keep the keys (``r_ohm``, ``l_h``, ``settling_s``) because scripts read them;
everything a person reads — terminal tables, the HTML report, figure axes — goes through here, so
``0.0032484 H`` is shown as ``3.248 mH`` and ``r_ohm`` as ``R`` in one way everywhere. The prefixes
are the SI Brochure's (BIPM, 9th edition, table 7), femto to tera, the range a bench meets.
"""

from __future__ import annotations

import math
from typing import Any

PREFIXES = {-15: "f", -12: "p", -9: "n", -6: "µ", -3: "m", 0: "", 3: "k", 6: "M", 9: "G", 12: "T"}

# Units spelt in keys and files, as a person writes them.
UNIT_SYMBOLS = {"ohm": "Ω", "rad_s": "rad/s", "pct": "%", "1": "", "v": "V", "h": "H", "f": "F", "s": "s",
                "hz": "Hz", "a": "A"}
# Units that take no prefix: ratios and percentages read as they are.
UNPREFIXED = {"", "%", "V/V", "dB"}

# Display names of parameter and metric keys; a key not listed shows its name without the unit suffix.
LABELS = {
    "r_ohm": "R", "l_h": "L", "c_f": "C", "source_resistance_ohm": "Rₛ", "wn_rad_s": "ωₙ", "zeta": "ζ",
    "gain": "gain", "overshoot_pct": "overshoot", "undershoot_pct": "undershoot",
    "settling_s": "settling time", "rise_time_s": "rise time", "fall_time_s": "fall time",
    "peak_time_s": "peak time", "ringing_hz": "ringing frequency", "nrmse": "NRMSE",
}
# Key suffixes that carry a unit, longest first so "_rad_s" wins over "_s".
_SUFFIXES = ("_rad_s", "_ohm", "_pct", "_hz", "_h", "_f", "_s", "_v", "_a")


def unit_symbol(unit: str) -> str:
    """``"ohm"`` → ``"Ω"``; a unit already written as a symbol comes back unchanged."""
    return UNIT_SYMBOLS.get(unit.lower(), unit)


def key_unit(key: str) -> str:
    """The unit symbol a key's suffix carries (``l_h`` → ``H``, ``zeta`` → ``""``)."""
    for suffix in _SUFFIXES:
        if key.endswith(suffix):
            return unit_symbol(suffix[1:])
    return ""


def label(key: str) -> str:
    """What a person calls the quantity a key names: ``r_ohm`` → ``R``, ``delay_s`` → ``delay``."""
    if key in LABELS:
        return LABELS[key]
    for suffix in _SUFFIXES:
        if key.endswith(suffix):
            return key[: -len(suffix)].replace("_", " ")
    return key.replace("_", " ")


def si(value: float, unit: str = "", digits: int = 4, trim: bool = False) -> str:
    """``value`` with ``digits`` significant figures and an SI prefix on ``unit``: ``3.248 mH``.

    Zero (of either sign) reads ``0``; a value whose rounding is zero never shows a minus sign, so a
    level that sits at −0.0001 V on a 1 V step reads ``0 V``, not ``-0.000 V``. A reading keeps its
    trailing zeros (they say how precise it is); ``trim`` drops them for a value as it was *set*
    (``1 V``, not ``1.000 V``), where they would claim a precision nobody measured.
    """
    symbol = unit_symbol(unit)
    space = " " if symbol else ""
    if not math.isfinite(value):
        return f"{value}{space}{symbol}"
    if value == 0:
        return f"0{space}{symbol}"
    if symbol in UNPREFIXED:
        return f"{_significant(value, digits, trim)}{space}{symbol}"
    exponent = _exponent(value, digits)
    return f"{_significant(value / 10.0 ** exponent, digits, trim)} {PREFIXES[exponent]}{symbol}"


def _exponent(value: float, digits: int = 4) -> int:
    """The power of ten of the prefix ``value`` reads in: its mantissa from 1 to below 1000 once rounded."""
    exponent = 3 * math.floor(math.log10(abs(value)) / 3)
    exponent = min(max(exponent, min(PREFIXES)), max(PREFIXES))
    if abs(float(f"{value / 10.0 ** exponent:.{digits}g}")) >= 1000 and exponent < max(PREFIXES):
        exponent += 3
    return exponent


def axis_scale(value: float, unit: str) -> tuple[float, str]:
    """(factor, unit with its prefix) for an axis whose typical value is ``value``: ``(1e9, "nF")`` for
    102 nF, so a figure plots value × factor against ``C (nF)`` instead of bare farads under a ``1e-7``
    offset. A zero or non-finite value, or a unit that takes no prefix, gets (1, the unit's symbol)."""
    symbol = unit_symbol(unit)
    if symbol in UNPREFIXED or not math.isfinite(value) or value == 0:
        return 1.0, symbol
    exponent = _exponent(value)
    return 10.0 ** -exponent, f"{PREFIXES[exponent]}{symbol}"


def _significant(value: float, digits: int, trim: bool = False) -> str:
    """``digits`` significant figures, trailing zeros kept unless ``trim`` (a reading's precision shows),
    no ``-0``, and no exponent for a number with more integer digits than figures (``130``, not ``1.3e+02``)."""
    text = f"{value:#.{digits}g}"
    if "e" in text and abs(value) >= 1:
        text = f"{round(value, digits - 1 - math.floor(math.log10(abs(value)))):.0f}"
    elif "e" in text:
        text = f"{value:.{digits}g}"
    elif trim and "." in text:
        text = text.rstrip("0")
    text = text.rstrip(".")
    return text[1:] if text.startswith("-") and float(text) == 0 else text


def si_alike(values: list[float], unit: str = "", digits: int = 3) -> list[str]:
    """Numbers read against each other (a level before and after a step) in one prefix and with one
    number of decimals, set by the largest: ``digits`` significant figures for it, its mantissa between
    0.1 and 100, so a 1 V step reads ``0.001 V``, ``0.999 V`` (not ``1.000 mV``, ``999.0 mV``). A value
    that rounds to zero reads ``0`` without a sign (never ``-0.000``)."""
    symbol = unit_symbol(unit)
    largest = max((abs(v) for v in values if math.isfinite(v)), default=0.0)
    exponent, decimals = 0, digits - 1
    if largest > 0:
        if symbol not in UNPREFIXED:
            exponent = 3 * math.floor((math.log10(largest) + 1) / 3)
            exponent = min(max(exponent, min(PREFIXES)), max(PREFIXES))
        decimals = max(0, digits - 1 - math.floor(math.log10(largest / 10.0 ** exponent)))
    out = []
    for value in values:
        text = f"{value / 10.0 ** exponent:.{decimals}f}" if math.isfinite(value) else str(value)
        text = "0" if math.isfinite(value) and float(text) == 0 else text
        out.append(f"{text} {PREFIXES[exponent]}{symbol}".rstrip())
    return out


def edge_label(edge: str, low_v: float, high_v: float) -> str:
    """``rising 0 V → 1 V`` or ``falling 1 V → 0 V``: an edge named by its direction and the levels it
    goes between, as set on the generator, in the order the edge takes them — one wording everywhere."""
    start, end = (high_v, low_v) if edge == "falling" else (low_v, high_v)
    return f"{edge} {si(start, 'V', 6, trim=True)} → {si(end, 'V', 6, trim=True)}"


def stimulus_text(stimulus: dict[str, Any]) -> str:
    """``square 200 Hz, rising 0 V → 1 V, load high_z, source 50 Ω, edge time 20 ns``: a stored record's
    stimulus (its JSON form) as ``acqd show`` and the run report give it."""
    return (f"{stimulus['shape']} {si(stimulus['frequency_hz'], 'Hz', 6, trim=True)}, "
            f"{edge_label(stimulus['edge'], stimulus['low_v'], stimulus['high_v'])}, load {stimulus['load']}, "
            f"source {si(stimulus['source_resistance_ohm'], 'ohm', trim=True)}, "
            f"edge time {si(stimulus['edge_time_s'], 's', trim=True)}")


def quantity(key: str, value: float, digits: int = 4) -> str:
    """``"R = 22.00 Ω"`` for a parameter key and its SI value."""
    return f"{label(key)} = {si(value, key_unit(key), digits)}"
