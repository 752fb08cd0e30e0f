"""Symbols and SI prefixes for what a person reads (acqd.display).

Reference: the SI Brochure (BIPM, 9th edition, 2019), table 7 — the prefixes and their powers of ten —
and its rule that a prefix attaches to the unit symbol with no space, one space between number and unit.
"""

import math

import pytest

from acqd.display import edge_label, key_unit, label, quantity, si, si_alike


@pytest.mark.parametrize("value,unit,text", [
    (0.0032484, "H", "3.248 mH"),      # milli = 10^-3 (SI Brochure, table 7)
    (1.0216e-07, "F", "102.2 nF"),     # nano = 10^-9
    (1.5e-4, "s", "150.0 µs"),         # micro = 10^-6
    (22.0, "ohm", "22.00 Ω"),          # the ohm's symbol is Ω (SI Brochure, table 4)
    (4.7e3, "ohm", "4.700 kΩ"),        # kilo = 10^3
    (2.2e6, "Hz", "2.200 MHz"),        # mega = 10^6
    (3.3e-12, "F", "3.300 pF"),        # pico = 10^-12
])
def test_si_prefix_from_the_brochure(value, unit, text):
    assert si(value, unit) == text


def test_rounding_up_moves_to_the_next_prefix():
    # 999.96 µs at four figures is 1000 µs, which is written 1.000 ms (one prefix, mantissa 1–999).
    assert si(999.96e-6, "s") == "1.000 ms"


def test_zero_never_shows_a_sign():
    assert si(-0.0, "V") == "0 V"
    assert si(0.0, "V") == "0 V"


def test_ratios_take_no_prefix_and_non_finite_values_read_as_such():
    assert si(0.26, "%") == "0.2600 %"
    assert si(12.5, "") == "12.50"
    assert si(math.inf, "s") == "inf s"


@pytest.mark.parametrize("key,name,unit", [
    ("r_ohm", "R", "Ω"), ("l_h", "L", "H"), ("c_f", "C", "F"), ("wn_rad_s", "ωₙ", "rad/s"),
    ("zeta", "ζ", ""), ("settling_s", "settling time", "s"), ("delay_s", "delay", "s"),
])
def test_keys_read_as_symbols_with_their_units(key, name, unit):
    assert (label(key), key_unit(key)) == (name, unit)


def test_quantity_joins_symbol_value_and_unit():
    assert quantity("c_f", 100e-9) == "C = 100.0 nF"


def test_a_value_as_set_drops_trailing_zeros_and_no_value_shows_an_exponent():
    # A set level is exact (1 V, not 1.000 V); 130 mΩ at two figures is written out, not 1.3e+02 mΩ.
    assert si(1.0, "V", 6, trim=True) == "1 V" and si(2e-8, "s", trim=True) == "20 ns"
    assert si(0.13, "ohm", 2) == "130 mΩ" and si(0.1, "%", trim=True) == "0.1 %"


def test_levels_read_against_each_other_share_one_prefix_and_never_show_minus_zero():
    assert si_alike([-4e-5, 0.9994], "V") == ["0 V", "0.999 V"]   # -0.00004 V rounds to 0 at three decimals
    assert si_alike([0.0011, 0.0009], "V") == ["1.10 mV", "0.90 mV"]  # milli = 10^-3 (SI Brochure, table 7)


def test_an_edge_names_its_levels_in_the_order_it_takes_them():
    # A falling edge goes from the high level to the low one (common practice).
    assert edge_label("rising", 0.0, 1.0) == "rising 0 V → 1 V"
    assert edge_label("falling", 0.0, 1.0) == "falling 1 V → 0 V"
    assert edge_label("rising", -0.5, 2.5) == "rising -500 mV → 2.5 V"
