"""Replay: the simulated DIG scope serving stored records instead of the plant.

Why: a profile, a driver or the comparator can be run again on yesterday's records with the bench switched
off, through exactly the client code that took them. The replay scope *is* the DIG scope — the same
command set, status registers, error queue and server (``DigitiserScope``), answering to the same
driver (``drivers/scpi-digitiser.toml``) — with one difference: where an armed acquisition's samples
come from. What a client can observe, and so what is promised:

* ``*IDN?`` is ``acqd-sim,DIG,REPLAY-<store file stem>,<acqd version>``, so the ``scpi-digitiser``
  driver accepts it and a profile needs no change.
* One stored record per armed acquisition (``INITiate``), in store order or in the order asked for
  (``records=[2, 0, 5]``; an index may repeat). It completes at once: there is no plant and no edge to
  wait for. A record that is the mean of N acquisitions is still one acquisition, so replay it with
  ``averages = 1`` in the profile (and ASCii, since a mean is not a float32 value, see below).
* Before a record is served the client's settings must be the record's: SWEep:POINts its sample count,
  SWEep:TIME / SWEep:POINts its sample interval (to 1 part in 10⁹), SWEep:OFFSet:POINts minus its
  pre-trigger samples, and the EXTernal trigger on the slope of its stimulus edge. Otherwise INITiate
  queues −221 "Settings conflict" naming each difference, nothing is armed and the record stays next.
  (The trigger level is not compared: it only moves t = 0 along the edge.)
* CH<n> serves the record's channel whose ``source`` is "CH<n>". Channels computed from others (any other
  source) are not served; the client computes them again. ``TRACe? CH<n>`` for an input the record does
  not have queues −221 naming the inputs it has, and sends nothing.
* Samples come back bit for bit through the client's decoding and scaling. REAL,32 carries the float32
  of each stored value, which must be that value (a scope's REAL,32 volts are). INTeger,8 and INTeger,16
  carry codes (v − volts_at_code_0) / volts_per_code at the channel's range and offset as the client set them, which
  must be whole, fit the word and give back v exactly as code × volts_per_code + volts_at_code_0. ASCii carries the
  shortest decimal that reads back as the same double, so it carries any record. A record the data
  format cannot carry exactly is −221 at INITiate (nothing armed), or at ``TRACe?`` if the format was
  changed after arming — never silently different data.
* ``TRACe:AXES?`` answers the record's sample interval and −(pre-trigger samples) × interval,
  so the client rebuilds the record's time base exactly.
* When the records run out, INITiate queues −300 "replay: all N records of <store> served" and the
  acquisition stays armed and never completes, like a trigger that never comes: ``*OPC?`` does not
  answer, ABORt ends it. We chose this over cycling so that a campaign replayed past its end fails
  loudly instead of comparing the same records again. *RST and ABORt do not rewind the sequence.
"""

from __future__ import annotations

import asyncio
import math
import re
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .. import __version__
from ..errors import AcqdError, ConfigError
from ..record import Record
from ..store import open_records
from .bench import ServedBench, Serving
from .generator import Generator
from .scope import (N_CHANNELS, CaptureRequest, Captured, DigitiserScope, channel_scaling, completed,
                    trace_reply, word_bits)
from .engine import SCPIError, SCPIInstrument

INTERVAL_REL_TOL = 1e-9  # SWEep:TIME / SWEep:POINts against the stored interval (both are decimal round trips)
_INPUT = re.compile(r"CH([0-9]+)")


class RecordSource:
    """The records to serve, in order, read from the store one at a time as they are armed.

    Not loaded up front: a night's store can hold thousands of records of megabytes each.
    """

    def __init__(self, path: str | Path, selection: Sequence[int] | None = None) -> None:
        self.path = Path(path)
        self._reader = open_records(self.path)
        try:
            self.order = self._resolve(selection)
        except BaseException:
            self._reader.close()
            raise
        self.served = 0
        self._upcoming: Record | None = None

    def _resolve(self, selection: Sequence[int] | None) -> list[int]:
        """Store indices in serving order; a selection naming a record the store lacks is one ConfigError."""
        held = [summary.index for summary in self._reader.index()]
        if not held:
            raise ConfigError(str(self.path), "", "the store holds no records; there is nothing to replay")
        if selection is None:
            return held
        missing = sorted(set(selection) - set(held))
        if missing:
            raise ConfigError(str(self.path), "records", f"{', '.join(map(str, missing[:5]))} not in this store; "
                                                         f"it holds {len(held)} records, {held[0]} to {held[-1]}")
        if not selection:
            raise ConfigError(str(self.path), "records", "an empty selection; name at least one record")
        return list(selection)

    @property
    def name(self) -> str:
        return self.path.stem

    def upcoming(self) -> tuple[int, Record] | None:
        """The next record to serve (read once and kept until taken), or None when all have been served."""
        if self.served >= len(self.order):
            return None
        index = self.order[self.served]
        if self._upcoming is None:
            try:
                self._upcoming = self._reader.read(index)
            except AcqdError as exc:
                raise SCPIError(-300, f"replay: record {index} cannot be read: {exc}") from None
        return index, self._upcoming

    def take(self) -> None:
        """The upcoming record has been served; move on."""
        self.served += 1
        self._upcoming = None

    def close(self) -> None:
        self._reader.close()


@dataclass(frozen=True)
class Replayed(Captured):
    """A stored record being served. ``request`` carries the record's time base and the client's channel
    settings; ``analog[n-1]`` is the stored volts of input CH<n>, or None when the record has none."""

    index: int
    averages: int

    def volts(self, channel: int) -> np.ndarray:
        samples = self.analog[channel - 1]
        if samples is None:
            held = ", ".join(f"CH{n + 1}" for n, a in enumerate(self.analog) if a is not None) or "none"
            raise SCPIError(-221, f"record {self.index} has no input CH{channel}; it holds {held} "
                                  "(computed channels are not served)")
        return samples


def stored_inputs(record: Record) -> tuple[np.ndarray | None, ...]:
    """Each scope input's stored volts as float64 (None where the record has no channel from that input)."""
    inputs: list[np.ndarray | None] = [None] * N_CHANNELS
    for ch in record.channels:
        match = _INPUT.fullmatch(ch.source)
        if match and 1 <= int(match.group(1)) <= N_CHANNELS and inputs[int(match.group(1)) - 1] is None:
            inputs[int(match.group(1)) - 1] = np.asarray(ch.samples, dtype=np.float64)
    return tuple(inputs)


def settings_conflicts(request: CaptureRequest, record: Record) -> list[str]:
    """How the client's time base and trigger differ from the record's (empty when they match)."""
    tb, edge = record.timebase, record.stimulus.edge
    out = []
    if request.n_samples != tb.n_samples:
        out.append(f"SWEep:POINts {request.n_samples} but the record has {tb.n_samples}")
    if not math.isclose(request.sample_interval_s, tb.sample_interval_s, rel_tol=INTERVAL_REL_TOL):
        out.append(f"sample interval (SWEep:TIME/POINts) {request.sample_interval_s:.9g} s but the record's is "
                   f"{tb.sample_interval_s:.9g} s")
    if request.first_index != -tb.pretrigger_samples:
        out.append(f"SWEep:OFFSet:POINts {request.first_index} but the record's is {-tb.pretrigger_samples}")
    if not request.external:
        out.append(f"TRIGger:SOURce IMMediate but the record was triggered on its {edge} edge (EXTernal)")
    elif request.rising != (edge == "rising"):
        out.append(f"TRIGger:SLOPe {'POSitive' if request.rising else 'NEGative'} but the record's edge is {edge}")
    return out


def served_values(replayed: Replayed, channel: int, fmt: str) -> np.ndarray:
    """What ``TRACe?`` encodes for this input in ``fmt``, chosen so the client's decoding and scaling give
    back the stored float64 exactly; -221 when the format cannot carry the record."""
    volts = replayed.volts(channel)
    where = f"record {replayed.index} CH{channel}"
    bits = word_bits(fmt)
    if bits is not None:
        per_code, at_zero = channel_scaling(replayed, channel, fmt)
        return _codes(volts, per_code, at_zero, bits, f"{where} in {fmt}")
    if fmt == "REAL,32":
        with np.errstate(over="ignore"):  # beyond float32's range becomes inf, which the check below refuses
            single = volts.astype(np.float32)
        if not np.array_equal(single.astype(np.float64), volts):
            mean = f" (a mean of {replayed.averages} acquisitions)" if replayed.averages > 1 else ""
            raise SCPIError(-221, f"{where} holds values that are not float32{mean}, so REAL,32 cannot carry it "
                                  "exactly; FORMat ASCii can")
        return single
    return volts  # ASCii: shortest round-trip decimals carry any double


def _codes(volts: np.ndarray, per_code: float, at_zero: float, bits: int, where: str) -> np.ndarray:
    """Integer codes c with c × per_code + at_zero == volts exactly, as the client computes it."""
    codes = np.round((volts - at_zero) / per_code)
    top = 2 ** (bits - 1)
    with np.errstate(invalid="ignore"):
        exact = np.array_equal(codes * per_code + at_zero, volts) and codes.min() >= -top and codes.max() < top
    if not exact:
        raise SCPIError(-221, f"{where} is not whole codes of {per_code:.6g} V from {at_zero:.6g} V at this range "
                              "and offset; set the range and offset it was taken with, or FORMat ASCii")
    return codes


class ReplayAcquisition:
    """The replay scope's acquisition engine: arming takes the next stored record and completes at once.

    Same surface as the plant's ``Acquisition`` (``state``, ``record``, ``done``, ``arm``, ``abort``).
    """

    def __init__(self, source: RecordSource, data_format: Callable[[], str], on_complete: Callable[[], None]) -> None:
        self.source, self._data_format, self._on_complete = source, data_format, on_complete
        self.state = "IDLE"
        self.record: Replayed | None = None
        self.done = asyncio.Event()
        self.done.set()  # nothing pending yet

    def arm(self, request: CaptureRequest) -> None:
        upcoming = self.source.upcoming()
        if upcoming is None:
            self.record, self.state = None, "WAIT"
            self.done.clear()
            raise SCPIError(-300, f"replay: all {len(self.source.order)} records of {self.source.name} served; "
                                  "this acquisition never completes")
        index, record = upcoming
        conflicts = settings_conflicts(request, record)
        if conflicts:
            raise SCPIError(-221, f"record {index}: " + "; ".join(conflicts))
        tb = record.timebase
        as_stored = CaptureRequest(tb.sample_interval_s, tb.n_samples, -tb.pretrigger_samples, request.external,
                                   request.rising, request.level_v, request.channels)
        replayed = Replayed(as_stored, stored_inputs(record), index, record.averages)
        for channel, samples in enumerate(replayed.analog, start=1):
            if samples is not None:
                served_values(replayed, channel, self._data_format())  # -221 now rather than at TRACe?
        self.source.take()
        self.record, self.state = replayed, "DONE"
        self.done.set()
        self._on_complete()

    def abort(self) -> None:
        """Back to idle; nothing is pending any more (an earlier ``*OPC`` is honoured)."""
        self.done.set()
        if self.state == "WAIT":
            self.state = "IDLE"
            self._on_complete()


class ReplayScope(DigitiserScope):
    """``acqd-sim,DIG`` whose acquisitions are stored records (see the module docstring)."""

    def __init__(self, bench: ReplayBench) -> None:
        super().__init__(bench, rng=None)  # nothing random: the samples are the record's

    def make_acquisition(self, rng: np.random.Generator | None) -> ReplayAcquisition:
        return ReplayAcquisition(self.bench.source, lambda: self.settings.data_format, self.operation_complete)

    def identity(self) -> str:
        serial = re.sub(r"[^A-Za-z0-9._-]", "_", self.bench.source.name)[:32]
        return f"{self.MANUFACTURER},{self.MODEL},REPLAY-{serial},{__version__}"

    def _trace(self, channel: int) -> bytes | str:
        replayed = completed(self.acquisition.record)
        values = served_values(replayed, channel, self.settings.data_format)
        return trace_reply(values, self.settings.data_format, self.settings.byte_order)


class ReplayBench(ServedBench):
    """Two SCPI servers: ``gen``, a plain simulated generator (so a profile's generator role has something
    to talk to; its output goes nowhere), and ``scope``, the replay scope serving the store at ``path``.

    ``records`` picks store indices in serving order (default: every record, in store order). The store
    is opened when the bench starts: a missing store or record is a ConfigError then, before serving.
    """

    def __init__(self, path: str | Path, records: Sequence[int] | None = None, host: str = "127.0.0.1",
                 serving: Serving | None = None) -> None:
        super().__init__(host, serving)
        self.path = Path(path)
        self.selection = None if records is None else list(records)
        self.source: RecordSource | None = None
        self.generator: Generator | None = None
        self.scope: ReplayScope | None = None

    def create_instruments(self) -> dict[str, SCPIInstrument]:
        self.source = RecordSource(self.path, self.selection)
        self.generator = Generator()
        self.scope = ReplayScope(self)
        return {"generator": self.generator, "scope": self.scope}

    async def astop(self) -> None:
        await super().astop()
        if self.source is not None:
            self.source.close()
            self.source = None
