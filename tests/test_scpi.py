"""acqd.scpi against the standards: NR1/NR3 text, blocks, sample formats, unit suffixes, injection safety.

References: IEEE 488.2-1992 (§7.7 program data, §8.7 response data), SCPI-1999 Vol 1 (§6.2.1 mnemonics,
§7.2 numbers and suffixes, §7.3 booleans), Vol 2 §21.8 (error entries); Python's ``struct`` module and
``float()`` serve as independent encoders/decoders.
"""

from __future__ import annotations

import math
import random
import struct

import numpy as np
import pytest

from acqd import scpi


# --- numbers out -----------------------------------------------------------------------------------

def test_format_number_is_nr3_shortest_round_trip():
    # IEEE 488.2 §8.7.4 NR3: mantissa, 'E', signed exponent, 0.0015 written with the fewest mantissa digits.
    # NR3 fixes no exponent width: the two-digit exponent ("E-03", not "E-3") is our convention (Python's
    # "E" format), which every NR3 reader accepts; the check below pins that convention, not the standard.
    assert scpi.format_number(0.0015) == "1.5E-03"
    assert scpi.format_number(-2e6) == "-2E+06"
    rng = random.Random(7)
    values = [1 / 3, 1e-300, 6.02214076e23, -0.1, 0.0, 5e-324] + [rng.uniform(-1e6, 1e6) for _ in range(200)]
    for value in values:
        text = scpi.format_number(value)
        assert "E" in text
        assert float(text) == value  # Python's float() as the independent reader: exact round trip


@pytest.mark.parametrize("bad", [math.nan, math.inf, -math.inf, True, "1.0", None])
def test_format_number_refuses_non_finite_and_non_numbers(bad):
    with pytest.raises(ValueError):
        scpi.format_number(bad)


def test_format_int_bool_enum():
    assert scpi.format_int(-42) == "-42"  # IEEE 488.2 §8.7.2 NR1
    assert scpi.format_int(np.int16(7)) == "7"
    for bad in (1.0, True, "3"):
        with pytest.raises(ValueError):
            scpi.format_int(bad)
    assert (scpi.format_bool(True), scpi.format_bool(False)) == ("ON", "OFF")  # SCPI-1999 Vol 1 §7.3
    with pytest.raises(ValueError):
        scpi.format_bool(1)
    assert scpi.format_enum("ext", ["EXTernal", "IMMediate"]) == "EXTernal"
    assert scpi.format_enum("Immediate", ["EXTernal", "IMMediate"]) == "IMMediate"
    with pytest.raises(ValueError):
        scpi.format_enum("EXTERN", ["EXTernal", "IMMediate"])  # SCPI-1999 Vol 1 §6.2.1: exact forms only
    with pytest.raises(ValueError, match="allowed: EXTernal, IMMediate"):
        scpi.format_enum("BUS", ["EXTernal", "IMMediate"])


# --- command building and injection ------------------------------------------------------------------

def test_command_fills_typed_values():
    text = scpi.command("SOUR:FREQ {f};:OUTP {on};:FORM {fmt};:VOLT{ch}:RANG {r}", f=1500.0, on=True,
                        fmt="REAL,32", ch=2, r=0.25)
    assert text == "SOUR:FREQ 1.5E+03;:OUTP ON;:FORM REAL,32;:VOLT2:RANG 2.5E-01"
    assert scpi.command("FORM {fmt}", fmt=("INT", 16)) == "FORM INT,16"


@pytest.mark.parametrize("evil", ["EXT;*RST", "1\nOUTP ON", "1\r", 'A"B', "A B", "SOUR:VOLT", "A\tB", "", "'x'",
                                  "EXT,;", "#15hello"])
def test_command_refuses_text_that_could_inject(evil):
    # A value must stay one parameter: ';' ends a unit, ':' roots a header, NL ends a message (IEEE 488.2
    # §7.5), quotes and whitespace change the data element — none may pass.
    with pytest.raises(ValueError):
        scpi.command("TRIG:SOUR {src}", src=evil)


def test_command_template_placeholders_must_match_values():
    with pytest.raises(ValueError, match="missing"):
        scpi.command("FREQ {f}")
    with pytest.raises(ValueError, match="unused"):
        scpi.command("FREQ {f}", f=1.0, g=2.0)
    with pytest.raises(ValueError, match="plain name"):
        scpi.command("FREQ {f:.3f}", f=1.0)
    with pytest.raises(ValueError):
        scpi.command("FREQ {f}", f=float("nan"))


# --- replies -------------------------------------------------------------------------------------------

def test_parse_numbers():
    assert scpi.parse_nr1("+12") == 12 and scpi.parse_nr1(" -3\n") == -3
    with pytest.raises(ValueError):
        scpi.parse_nr1("1.0")
    # NR1, NR2, NR3 (IEEE 488.2 §8.7.2-4)
    assert scpi.parse_number("15") == 15.0
    assert scpi.parse_number("-0.25") == -0.25
    assert scpi.parse_number("+1.5E-03") == 0.0015
    # SCPI-1999 Vol 1 §7.2.1: 9.9E37 is INFinity, -9.9E37 NINFinity, 9.91E37 NAN (from memory)
    assert scpi.parse_number("9.9E37") == math.inf
    assert scpi.parse_number("-9.9E+37") == -math.inf
    assert math.isnan(scpi.parse_number("9.91E37"))
    for bad in ("1,2", "abc", "1.0.0", ""):
        with pytest.raises(ValueError):
            scpi.parse_number(bad)


def test_parse_bool_string_error_entry_and_split():
    assert scpi.parse_bool("1") is True and scpi.parse_bool("OFF") is False  # SCPI-1999 Vol 1 §7.3
    with pytest.raises(ValueError):
        scpi.parse_bool("2")
    # IEEE 488.2 §8.7.8: a quote inside string data is doubled
    assert scpi.parse_string('"say ""hi"""') == 'say "hi"'
    assert scpi.parse_string("bare") == "bare"
    with pytest.raises(ValueError):
        scpi.parse_string('"open')
    # SCPI-1999 Vol 2 §21.8: <code>,"<text>", the text may hold commas and ';' + detail
    assert scpi.parse_error_entry('-113,"Undefined header"') == (-113, "Undefined header")
    assert scpi.parse_error_entry('-222,"Data out of range;low, high"') == (-222, "Data out of range;low, high")
    assert scpi.parse_error_entry('0,"No error"') == (0, "No error")
    # SCPI-1999 Vol 1 §6.2.3: replies of several queries are separated by ';' (not inside strings)
    assert scpi.split_reply('1E+03;"a;b";0') == ["1E+03", '"a;b"', "0"]
    assert scpi.split_reply("1,2,3", ",") == ["1", "2", "3"]


# --- IEEE 488.2 blocks ---------------------------------------------------------------------------------

def test_encode_block_matches_the_definite_form():
    # IEEE 488.2 §8.7.9: '#', one digit n, n digits of byte count, the bytes (STANDARDS: #3100 + 100 bytes)
    assert scpi.encode_block(b"hello") == b"#15hello"
    payload = bytes(range(100))
    assert scpi.encode_block(payload) == b"#3100" + payload
    assert scpi.encode_block(b"") == b"#10"


@pytest.mark.parametrize("size", [0, 1, 9, 10, 99, 100, 12345, 1_000_000])
def test_block_round_trip_and_header(size):
    payload = np.random.default_rng(size).integers(0, 256, size, dtype=np.uint8).tobytes()
    block = scpi.encode_block(payload)
    header_len = scpi.block_header_length(block[:2])
    assert header_len == 2 + len(str(size))
    assert scpi.parse_block_header(block[:header_len]) == (header_len, size)
    assert scpi.decode_block(block) == payload
    assert scpi.decode_block(block + b"\n") == payload  # the response terminator may follow


def test_indefinite_block():
    # IEEE 488.2 §8.7.10: #0, bytes, NL with END; the NL is not data
    assert scpi.parse_block_header(b"#0") == (2, None)
    assert scpi.decode_block(b"#0ab\ncd\n") == b"ab\ncd"
    with pytest.raises(scpi.BlockError, match="newline"):
        scpi.decode_block(b"#0abc")


@pytest.mark.parametrize("garbled, message", [
    (b"15hello", "start with '#'"),
    (b"#x5hello", "digit"),
    (b"#2a5hello", "ASCII digits"),
    (b"#3", "cut short"),
    (b"#", "at least 2 bytes"),
])
def test_garbled_block_headers_are_named(garbled, message):
    with pytest.raises(scpi.BlockError, match=message):
        scpi.parse_block_header(garbled)


def test_block_length_mismatch():
    with pytest.raises(scpi.BlockError, match="holds only 3"):
        scpi.decode_block(b"#15abc")
    with pytest.raises(scpi.BlockError, match="unexpected bytes"):
        scpi.decode_block(b"#13abcdef")


# --- sample formats ------------------------------------------------------------------------------------

def test_real32_normal_is_big_endian_ieee754():
    values = [0.0, 1.5, -2.25, 3.0e-5]
    # SCPI-1999 Vol 2 FORMat: REAL,32 is IEEE 754 single; NORMal byte order sends the MSB first
    assert scpi.encode_samples(values, "REAL,32", "NORMal") == struct.pack(">4f", *values)
    assert scpi.encode_samples(values, "REAL,32", "SWAPped") == struct.pack("<4f", *values)
    decoded = scpi.decode_samples(struct.pack(">4f", *values), "REAL,32", "NORM")
    assert decoded.tolist() == np.array(values, dtype=np.float32).tolist()


def test_integer_formats_against_struct():
    codes = [-128, -1, 0, 1, 127]
    assert scpi.encode_samples(codes, "INTeger,8", "NORM") == struct.pack(">5b", *codes)
    wide = [-32768, -256, 0, 256, 32767]
    assert scpi.encode_samples(wide, "INT,16", "NORMal") == struct.pack(">5h", *wide)
    assert scpi.encode_samples(wide, "INT,16", "SWAP") == struct.pack("<5h", *wide)
    assert scpi.decode_samples(struct.pack("<5h", *wide), "INTEGER,16", "SWAPPED").tolist() == wide
    with pytest.raises(ValueError, match="-128 to 127"):
        scpi.encode_samples([128], "INT,8")
    with pytest.raises(ValueError):
        scpi.encode_samples([0.5], "INT,16")
    with pytest.raises(scpi.BlockError, match="whole number"):
        scpi.decode_samples(b"\x00\x01\x02", "INT,16")


def test_ascii_format_round_trip_and_names():
    values = np.array([0.001, -2.5, 1e-9])
    text = scpi.encode_samples(values, "ASCii")
    assert text == b"1E-03,-2.5E+00,1E-09"
    assert scpi.decode_samples(text, "ASC").tolist() == values.tolist()
    with pytest.raises(ValueError, match="allowed"):
        scpi.encode_samples(values, "REAL,64")
    with pytest.raises(ValueError, match="byte order"):
        scpi.encode_samples(values, "REAL,32", "LITTLE")


# --- unit suffixes (SCPI-1999 Vol 1 §7.2.2; IEEE 488.2 §7.7.3) -----------------------------------------

@pytest.mark.parametrize("text, unit, expected", [
    ("10mV", "V", 10e-3),          # M = milli, case-insensitive
    ("10 MV", "V", 10e-3),         # whitespace before the suffix is allowed; MV is still milli
    ("1.5MAV", "V", 1.5e6),        # MA = mega
    ("2kHz", "HZ", 2e3),
    ("1MHZ", "HZ", 1e6),           # defined exception: MHZ is megahertz
    ("1mHz", "HZ", 1e6),           # ... whatever the case (SCPI-1999 Vol 1 §7.2.2: mHz reads as mega)
    ("2MOHM", "OHM", 2e6),         # defined exception: MOHM is megohm
    ("50ohm", "OHM", 50.0),
    ("5us", "S", 5e-6),
    ("3NS", "S", 3e-9),
    ("20PS", "S", 20e-12),
    ("1E3", "HZ", 1e3),            # no suffix: SI as written
    ("7GHZ", "HZ", 7e9),
])
def test_unit_suffixes(text, unit, expected):
    assert scpi.parse_value_with_unit(text, unit) == pytest.approx(expected, rel=1e-12)


@pytest.mark.parametrize("text, unit", [("1V", "S"), ("10M", "V"), ("0.5V", ""), ("1XV", "V"), ("1 k Hz", "HZ")])
def test_bad_suffixes(text, unit):
    with pytest.raises(ValueError):
        scpi.parse_value_with_unit(text, unit)


def test_short_forms_come_from_the_table_notation():
    # SCPI-1999 Vol 1 §6.2.1: the upper-case part is the short form; not derived by rule
    assert scpi.short_form("FREQuency") == "FREQ"
    assert scpi.short_form("TINTerval") == "TINT"
    assert scpi.mnemonic_forms("THReshold") == ("THRESHOLD", "THR")
    with pytest.raises(ValueError):
        scpi.mnemonic_forms("FreQ")


def test_error_entry_round_trip_with_quotes() -> None:
    """SCPI-1999 Vol 2 §21.8 error entries are <code>,<string>; IEEE 488.2 §7.7.5 (from memory) doubles an
    embedded quote inside a string, so a detail quoting a header survives the round trip."""
    text = 'Undefined header;"FREQU"'
    entry = scpi.format_error_entry(-113, text)
    assert entry == '-113,"Undefined header;""FREQU"""'
    assert scpi.parse_error_entry(entry) == (-113, text)


# --- gaps that mutation testing found (python tools/mutate.py scpi) -------------------------------------

class Widget:
    """A value of a type no SCPI data element has."""


@pytest.mark.parametrize("call, bad", [
    (scpi.mnemonic_forms, "FREQ-1"),
    (scpi.mnemonic_forms, "FREquency2X"),
    (scpi.format_number, "1.0"),
    (scpi.format_number, math.inf),
    (scpi.format_int, 2.5),
    (scpi.format_bool, "yes"),
    (scpi.format_value, "A B"),
    (scpi.parse_nr1, "1.5"),
    (scpi.parse_number, "1.0.0"),
    (scpi.parse_bool, "maybe"),
    (scpi.parse_string, '"a"b"'),
    (scpi.parse_string, "'open"),
    (scpi.split_reply, '1;"open'),
    (scpi.parse_error_entry, "-113"),
])
def test_errors_name_the_refused_text(call, bad):
    # The project's rule for bad input: one clear error that names what was refused. Every refusal of the
    # SCPI layer quotes the offending text as Python's repr() writes it.
    with pytest.raises(ValueError) as caught:
        call(bad)
    assert repr(bad) in str(caught.value)


def test_errors_say_what_was_expected():
    with pytest.raises(ValueError, match="numeric value"):
        scpi.format_number("x")
    with pytest.raises(ValueError, match="type Widget"):
        scpi.format_value(Widget())
    with pytest.raises(ValueError, match=r"'FREQ \{f\}', value f: .*nan"):
        scpi.command("FREQ {f}", f=float("nan"))
    with pytest.raises(ValueError, match="optional V suffix") as caught:
        scpi.parse_value_with_unit("ten volts", "V")
    assert "'ten volts'" in str(caught.value)
    for suffix, unit in (("V", ""), ("HZ", "V"), ("QV", "V")):
        with pytest.raises(scpi.SuffixError, match=repr(suffix)):
            scpi.suffix_multiplier(suffix, unit)
    # IEEE 488.2 §8.7.9: the header's digit says how many length digits follow; the message repeats it.
    with pytest.raises(scpi.BlockError, match="must be 3 ASCII digits"):
        scpi.parse_block_header(b"#3a1b")


def test_enum_entries_outside_table_notation_match_whole_and_caselessly():
    # IEEE 488.2 §7.7.1.2: character program data is case-insensitive; an entry such as REAL,32 is no
    # mnemonic in table notation, so only its whole text matches.
    assert scpi.format_enum("real,32", ["REAL,32", "INT,8"]) == "REAL,32"
    assert scpi.format_enum("INT,8", ["REAL,32", "INT,8"]) == "INT,8"
    with pytest.raises(ValueError):
        scpi.format_enum("REAL", ["REAL,32", "INT,8"])


def test_command_template_follows_python_format_string_rules():
    # Python's format-string syntax (library reference, "Format String Syntax"): a doubled brace is a
    # literal brace, and placeholders after it are still filled.
    assert scpi.command("DISP:DATA {{0}} {v}", v=2) == "DISP:DATA {0} 2"


@pytest.mark.parametrize("text, expected", [("INF", math.inf), ("inf", math.inf), ("NINF", -math.inf),
                                            ("ninf", -math.inf), (" Inf ", math.inf)])
def test_infinity_mnemonics(text, expected):
    # SCPI-1999 Vol 1 §7.2.1.5: INFinity and NINFinity are accepted as numeric data, in any case (from memory).
    assert scpi.parse_number(text) == expected


def test_not_a_number_mnemonic():
    assert math.isnan(scpi.parse_number("NAN")) and math.isnan(scpi.parse_number("nan"))


@pytest.mark.parametrize("text, expected", [("1", True), ("ON", True), ("on", True), ("0", False),
                                            ("OFF", False), ("off\n", False)])
def test_parse_bool_every_form(text, expected):
    # SCPI-1999 Vol 1 §7.3: booleans are 1/0 in replies, ON/OFF accepted in any case.
    assert scpi.parse_bool(text) is expected


def test_string_response_edge_cases():
    # IEEE 488.2 §8.7.8: string response data may be empty (two quotes), in double or single quotes.
    assert scpi.parse_string('""') == "" and scpi.parse_string("''") == ""
    assert scpi.parse_string("'it''s'") == "it's"
    # Bare text is returned stripped, whatever letters it starts and ends with.
    for bare in ("XAX", "X", "CH1", "SQU"):
        assert scpi.parse_string(f" {bare} ") == bare
    with pytest.raises(ValueError, match="unterminated"):
        scpi.parse_string("'open")


def test_longest_definite_block_header():
    # IEEE 488.2 §8.7.9: the length digit is 1-9, so a 9-digit length (up to 999,999,999 bytes) is legal.
    payload = bytes(100_000_000)
    assert scpi.encode_block(payload)[:11] == b"#9100000000"
    with pytest.raises(scpi.BlockError, match="999999999"):
        scpi.encode_block(_Huge())


class _Huge(bytes):
    """Reports a length of 10^9 bytes without holding them: the first size that needs ten digits."""

    def __len__(self) -> int:
        return 1_000_000_000


@pytest.mark.parametrize("block, payload", [
    (b"#15hello", b"hello"), (b"#15hello\n", b"hello"), (b"#15hello\r\n", b"hello"),
    (b"#10", b""), (b"#0hello\n", b"hello"), (b"#0\n", b""),
])
def test_decode_block_boundaries(block, payload):
    # IEEE 488.2 §8.7.9 definite length (#<n><length><bytes>) and §8.7.10 indefinite (#0<bytes>NL^END);
    # the response message terminator (§8.5: NL, which a CR may precede on many transports — common
    # practice) may follow a definite block.
    assert scpi.decode_block(block) == payload


@pytest.mark.parametrize("block", [b"#15hell", b"#15hel", b"#16hello", b"#15hello!", b"#15helloo\n",
                                   b"#15hello\n\n", b"#0hello", b"#25hello"])
def test_decode_block_refuses_short_and_long_blocks(block):
    # §8.7.9: exactly <length> bytes follow the header; one byte short or long is a malformed block, never
    # a payload of another length.
    with pytest.raises(scpi.BlockError):
        scpi.decode_block(block)


def test_sample_format_names_allow_space_after_comma():
    # IEEE 488.2 §7.4.2: white space may follow the comma that separates program data.
    assert scpi.sample_format("INTeger, 16") == "INT,16"
    assert scpi.sample_format("real , 32") == "REAL,32"


def test_decoded_samples_are_native_dtype():
    # The docstring's promise: REAL,32 → native float32, INT,16 → native int16; ASCii of nothing → empty.
    real = scpi.decode_samples(struct.pack(">2f", 1.5, -2.0), "REAL,32")
    assert real.dtype == np.dtype("=f4") and real.tolist() == [1.5, -2.0]
    codes = scpi.decode_samples(struct.pack("<2h", -3, 300), "INT,16", "SWAP")
    assert codes.dtype == np.dtype("=i2") and codes.tolist() == [-3, 300]
    empty = scpi.decode_samples(b"", "ASC")
    assert empty.shape == (0,) and empty.dtype == np.float64


@pytest.mark.parametrize("text, problem", [
    ('DISP:TEXT "ready; armed"', None), ("DISP:TEXT 'a;b'", None), ('DISP:TEXT "say ""x;y"""', None),
    ("DISP:TEXT 'it''s'", None), ('DISP:TEXT "a\'b"', None), ("*RST", None),
    ('DISP:TEXT "ready"; *RST', "holds ';'"), ("FREQ 1;VOLT 2", "holds ';'"), ("FREQ 1\nOUTP ON", "one line"),
    ("FREQ 1\r", "one line"), ('DISP:TEXT "open', "unclosed"), ("DISP:TEXT 'open", "unclosed"),
    ("DISP:TEXT 'a\"", "unclosed"),
])
def test_single_message_problem(text, problem):
    # IEEE 488.2 §7.4.1: ';' separates program message units and NL ends the message, except inside string
    # program data (§7.7.5), which is quoted with " or ' and doubles its own quote; the other quote character
    # is plain text inside it.
    found = scpi.single_message_problem(text)
    assert (found is None) if problem is None else (problem in found)
