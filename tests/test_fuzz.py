"""Property-based fuzzing (Hypothesis) of the text and bytes acqd parses without having written them.

- ``acqd.scpi.decode_block`` against IEEE 488.2 §8.7.9–10 (from memory): a definite block is ``#``, one
  digit n (1–9), n digits of length L, then exactly L bytes, with an optional NL or CR NL; an indefinite
  block is ``#0`` and bytes ending with NL. Any other input is a ``BlockError`` (a ValueError) — never
  another exception, never bytes that are not the announced payload.
- The simulated instruments' SCPI parser: any program message, from an SCPI-shaped grammar or plain
  printable noise, is executed without an exception; every query either gets its reply or leaves an
  error in the queue, and every queued code is one SCPI-1999 Vol 2 §21.8 defines a range for (negative
  standard codes −100 … −499 here; from memory). Over a real TCP connection, arbitrary bytes leave the
  server answering ``*IDN?`` on the next connection.
"""

from __future__ import annotations

import asyncio
import re
import socket

import numpy as np
import pytest
from hypothesis import HealthCheck, example, given, settings
from hypothesis import strategies as st

from acqd import scpi
from acqd.sim.bench import SimBench, SimBenchConfig

FUZZ = settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])


# --- IEEE 488.2 blocks ---------------------------------------------------------------------------------

def definite_payload(data: bytes) -> bytes | None:
    """The payload §8.7.9 gives ``data``, written straight from the clause (no acqd code), or None."""
    if len(data) < 2 or data[:1] != b"#" or data[1:2] not in b"123456789" or len(data[1:2]) != 1:
        return None
    n = int(data[1:2])
    digits = data[2:2 + n]
    if len(digits) != n or not all(48 <= c <= 57 for c in digits):
        return None
    start, length = 2 + n, int(digits)
    payload, tail = data[start:start + length], data[start + length:]
    return payload if len(payload) == length and tail in (b"", b"\n", b"\r\n") else None


@FUZZ
@given(st.binary(max_size=3000))
def test_definite_blocks_round_trip(payload):
    assert scpi.decode_block(scpi.encode_block(payload)) == payload


@FUZZ
@given(st.one_of(
    st.binary(max_size=64),
    st.builds(lambda n, body, tail: b"#" + str(n).encode() + body + tail,
              st.integers(0, 9), st.binary(max_size=40), st.sampled_from([b"", b"\n", b"\r\n", b"x"])),
    st.builds(lambda body, cut: scpi.encode_block(body)[:cut] if cut else scpi.encode_block(body) + b"\n",
              st.binary(max_size=40), st.integers(0, 50)),
))
def test_decode_block_returns_the_announced_payload_or_a_block_error(data):
    try:
        got = scpi.decode_block(data)
    except scpi.BlockError:
        got = None
    if data[:2] == b"#0":
        assert got == (data[2:-1] if data.endswith(b"\n") else None)
    else:
        assert got == definite_payload(data)


# --- the simulated instruments' parser ----------------------------------------------------------------

HEADERS = ["*IDN?", "*RST", "*CLS", "*OPC?", "*ESR?", "*STB?", "*SRE", "*ESE?", "SYST:ERR?", "SYSTem:ERRor:NEXT?",
           "FREQ", "FREQuency?", "VOLT", "VOLT:HIGH", "VOLT:LOW?", "VOLTage:OFFSet", "OUTP", "OUTPut:LOAD",
           "FUNC", "FUNCtion?", "SWE:TIME", "SWEep:POINts?", "TRIG:SOUR", "TRIGger:SLOPe?", "TRIG:LEV",
           "INIT", "ABORt", "FORM", "FORMat:BORDer?", "TRAC? CH1", "TRAC:AXES?", "VOLT3:RANG", "CHAN9:RANG",
           "LANE1:PERDiv", "SPAN:POINts?", "CATCh:STATe?", "BLOCk:WIDTh?", "NOSUCH:NODE", "STAT:OPER?"]
PARAMS = ["", " 1", " -2.5", " 1e3", " 1.5E-03", " MAX", " MIN", " DEF", " ON", " OFF", " SQU", " EXT",
          " POS", ' "text"', " 'x'", " CH1", " 2 KHZ", " 1,2", " #15hello", " 9e999", " nan", " ,", " \"open"]


@st.composite
def program_messages(draw) -> str:
    """SCPI-shaped program messages: units joined by ';', rooted or not, with parameters good and bad."""
    units = draw(st.lists(st.tuples(st.booleans(), st.sampled_from(HEADERS), st.sampled_from(PARAMS)),
                          min_size=1, max_size=5))
    return ";".join((":" if rooted and not h.startswith("*") else "") + h + p for rooted, h, p in units)


noise = st.text(st.characters(min_codepoint=32, max_codepoint=126), max_size=80)


@pytest.fixture(scope="module")
def instruments():
    """The three simulated instruments of a running bench (their parser runs in the bench's own loop)."""
    bench = SimBench(SimBenchConfig()).start()
    yield bench, {"generator": bench.generator, "scope": bench.scope, "divscope": bench.divscope}
    bench.stop()


@pytest.fixture(scope="module")
def tcp_bench():
    """A bench of its own for the bytes sent over TCP, which its server runs while other tests go on."""
    bench = SimBench(SimBenchConfig()).start()
    yield bench
    bench.stop()


async def _no_wait(awaitable, reply_pending):
    """A unit that would block (``*OPC?`` on an armed scope) is given up at once: only parsing is fuzzed."""
    task = asyncio.ensure_future(awaitable)
    await asyncio.sleep(0)
    if not task.done():
        task.cancel()
        raise asyncio.CancelledError
    return task.result()


ERROR_ENTRY = re.compile(r'([+-]?\d+),".*"', re.DOTALL)


def _error_entry(reply) -> tuple[int, str] | None:
    """A reply that is an error-queue entry other than 0 (SCPI-1999 vol. 2 §21.8: ``<code>,"<text>"``): a
    ``:SYST:ERR?`` in the message has already taken that error off the queue and reported it."""
    text = reply.decode("latin-1") if isinstance(reply, (bytes, bytearray)) else str(reply)
    match = ERROR_ENTRY.fullmatch(text.strip())
    return (int(match.group(1)), text) if match and int(match.group(1)) != 0 else None


def run_message(instrument, message: str) -> tuple[list, list[tuple[int, str]]]:
    """Execute one program message; (replies, drained error queue)."""
    async def go():
        try:
            replies = await instrument.execute(message, _no_wait)
        except asyncio.CancelledError:
            replies = None
        errors = [entry for entry in map(_error_entry, replies or []) if entry is not None]
        while len(instrument.errors):
            errors.append(instrument.errors.pop())
        return replies, errors
    return asyncio.run(go())


def query_units(message: str) -> int | None:
    """How many message units are queries, read from IEEE 488.2 §7 alone: units split at ';' outside
    quoted strings (§7.7.5), a unit a query when its header (the text before white space) ends in '?'.
    None for a message with an unclosed quote, where the count is not defined."""
    units, unit, quote = [], "", None
    for char in message:
        if quote:
            quote = None if char == quote else quote
        elif char in "\"'":
            quote = char
        elif char == ";":
            units.append(unit)
            unit = ""
            continue
        unit += char
    if quote:
        return None
    units.append(unit)
    return sum(1 for u in units if u.split() and u.split()[0].endswith("?"))


def check_message(instruments, message: str) -> None:
    _, by_role = instruments
    queries = query_units(message)
    for role, instrument in by_role.items():
        replies, errors = run_message(instrument, message)
        if replies is None:  # a unit waited on a pending operation: abort it and go on
            instrument.reset()
            continue
        if queries is not None:
            assert len(replies) <= queries, (role, message, replies)
            if len(replies) < queries:
                assert errors, f"{role}: {message!r} answered {len(replies)} of {queries} queries, no error queued"
        elif not replies:
            assert errors, f"{role}: {message!r} (an unclosed quote) was taken without an error"
        for code, _ in errors:
            assert -499 <= code <= -100 or code > 0, (role, message, code)
        instrument.reset()


@FUZZ
@given(program_messages())
@example(message="SWEep:POINts? 1;:SYST:ERR?")  # found by Hypothesis: the error is the second query's reply
def test_scpi_shaped_messages_are_answered_or_queued_as_errors(instruments, message):
    check_message(instruments, message)


@FUZZ
@given(noise)
def test_printable_noise_is_answered_or_queued_as_errors(instruments, message):
    check_message(instruments, message)


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.binary(min_size=1, max_size=300))
def test_arbitrary_bytes_over_tcp_leave_the_server_answering(tcp_bench, data):
    bench = tcp_bench
    host, port = bench.resources["generator"].split("::")[1:3]
    with socket.create_connection((host, int(port)), timeout=2) as raw:
        raw.sendall(data + b"\n")
    with socket.create_connection((host, int(port)), timeout=2) as raw:
        raw.sendall(b"*IDN?\n")
        reply = b""
        while not reply.endswith(b"\n"):
            chunk = raw.recv(4096)
            assert chunk, "connection closed without a reply"
            reply += chunk
    assert reply.decode().startswith("acqd-sim,FG,")


def test_the_fuzz_inputs_reach_the_parser_error_paths(instruments):
    """Not a fuzz case: the grammar must produce undefined headers (−113) and bad data, or it tests little."""
    _, by_role = instruments
    _, errors = run_message(by_role["generator"], "NOSUCH:NODE 1;FREQ nan")
    assert [code for code, _ in errors][:1] == [-113]
    assert np.isfinite(float(run_message(by_role["generator"], "FREQ?")[0][0]))
