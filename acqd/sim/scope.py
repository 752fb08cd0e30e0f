"""The simulated digitiser ``acqd-sim,DIG`` (SCPI-1999 SENSe/TRIGger/INITiate/FORMat/TRACe subset) and the
acquisition engine both scope dialects share.

An acquisition reads the bench as it is: the generator's settings and the plant "now". With the EXTernal
trigger it completes only when the stimulus has an edge of the armed slope that crosses the trigger level
— the level must lie strictly between the stimulus's two levels as seen at the generator terminal (their
DC values at the ``v_src`` node, or the EMF levels if the model has no such node). Otherwise it waits
forever, as a real scope would. A waiting acquisition is re-examined whenever the generator changes, so
"arm, then switch the output on" works.

Timing: t = 0 of a record is the trigger instant, where the (linear) edge ramp crosses the level; the
plant's t = 0 is the ramp's start. In fast mode an acquisition completes as soon as it can; in realtime
mode after the wall-clock time the instrument would need (the pre-trigger part, the wait for the next
matching edge, then the post-trigger part). Captures always start from the stimulus's periodic steady
state, even right after the output was switched on (a simplification).

Free-running captures (IMMediate / FREE) start at a random phase of the stimulus. A SINusoid stimulus is
supported for free-running captures only (its steady state from the frequency response); it never
triggers EXTernal. PULSe is simulated as a square wave (50 % duty); DC has no edges.
"""

from __future__ import annotations

import asyncio
import time
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Protocol

import numpy as np

from .. import scpi
from ..models import Signal, StateSpace
from . import frontend
from .frontend import ChannelSetup, FrontEndSettings
from .generator import Generator
from .plant import Plant
from .engine import Choice, ChannelRef, Cmd, Integer, Number, SCPIError, SCPIInstrument, setting

N_CHANNELS = 4
TERMINAL_NODE = "v_src"  # the generator terminal in the circuit builders' node names
MAX_POINTS = 10_000_000


class Bench(Protocol):
    """What a scope needs from the bench it is wired into."""

    generator: Generator
    realtime: bool
    front_end: FrontEndSettings
    wiring: Mapping[int, Signal]  # channel number → what it is connected to

    def plant_now(self) -> Plant: ...


@dataclass(frozen=True)
class CaptureRequest:
    """What an armed scope asks for; sample k is at (first_index + k)·dt from the trigger."""

    sample_interval_s: float
    n_samples: int
    first_index: int
    external: bool
    rising: bool
    level_v: float
    channels: tuple[ChannelSetup, ...]

    @property
    def pre_trigger_s(self) -> float:
        return max(0.0, -self.first_index * self.sample_interval_s)

    @property
    def post_trigger_s(self) -> float:
        return max(0.0, (self.first_index + self.n_samples) * self.sample_interval_s)


@dataclass(frozen=True)
class Captured:
    """A completed record: the analogue signal at each ADC input (before clipping and quantisation)."""

    request: CaptureRequest
    analog: tuple[np.ndarray, ...]

    def setup(self, channel: int) -> ChannelSetup:
        return self.request.channels[channel - 1]


@dataclass(frozen=True)
class _Edge:
    before_emf: float
    after_emf: float
    half_period_s: float
    trigger_delay_s: float  # from the ramp's start to the level crossing


def terminal_levels(plant: Plant, emf_low: float, emf_high: float) -> tuple[float, float]:
    """The stimulus's two settled levels at the generator terminal for the given EMF levels."""
    model = plant.model
    if TERMINAL_NODE not in model.outputs:
        return emf_low, emf_high
    row = model.output_index(TERMINAL_NODE)

    def settled(u: float) -> float:
        return float(model.C[row] @ model.steady_state(u) + model.D[row, 0] * u)

    return settled(emf_low), settled(emf_high)


def sine_steady_state(model: StateSpace, signals: Sequence[Signal], offset_emf: float, amplitude_emf: float,
                      frequency_hz: float, times_s: np.ndarray) -> list[np.ndarray]:
    """Each signal for u = offset + amplitude·sin(ωt) once transients have gone: DC gain plus H(jω)."""
    omega = 2 * np.pi * frequency_hz
    n = len(model.states)
    response = np.linalg.solve(1j * omega * np.eye(n) - model.A, model.B[:, 0])  # states per unit input
    rest = model.steady_state(offset_emf)
    phasor = np.exp(1j * omega * times_s)
    result = []
    for c, d in (signal.row(model) for signal in signals):
        dc = c @ rest + d * offset_emf
        result.append(dc + amplitude_emf * np.imag((c @ response + d) * phasor))
    return result


class Acquisition:
    """One scope's acquisition engine: IDLE → armed (WAIT) → DONE, shared by both dialects."""

    def __init__(self, bench: Bench, rng: np.random.Generator, trigger_never: Callable[[], bool],
                 on_complete: Callable[[], None]) -> None:
        self.bench, self.rng = bench, rng
        self._trigger_never, self._on_complete = trigger_never, on_complete
        self.state = "IDLE"
        self.record: Captured | None = None
        self.done = asyncio.Event()
        self.done.set()  # nothing pending at power-on: *OPC? answers at once (IEEE 488.2 §12.5.3)
        self._request: CaptureRequest | None = None
        self._armed_at_s = 0.0
        self._timer: asyncio.TimerHandle | None = None
        bench.generator.listeners.append(self._plan)

    def arm(self, request: CaptureRequest) -> None:
        """Start one acquisition; the previous record is dropped (it would be stale)."""
        self._cancel_timer()
        self.record, self._request = None, request
        self.state, self._armed_at_s = "WAIT", time.monotonic()
        self.done.clear()
        self._plan()

    def abort(self) -> None:
        """Back to idle; nothing is pending any more (an earlier ``*OPC`` is honoured)."""
        self._cancel_timer()
        self.done.set()
        if self.state == "WAIT":
            self.state = "IDLE"
            self._on_complete()

    def _cancel_timer(self) -> None:
        if self._timer is not None:
            self._timer.cancel()
            self._timer = None

    def _plan(self) -> None:
        """Decide when (if ever) the armed acquisition completes; re-run whenever the generator changes."""
        if self.state != "WAIT":
            return
        self._cancel_timer()
        request = self._request
        if not request.external:
            self._schedule(request.n_samples * request.sample_interval_s, None)
            return
        edge = self._trigger_edge(request)
        if edge is None:
            return  # the trigger never comes
        now = time.monotonic()
        edge_at = self.bench.generator.next_edge_s(self._armed_at_s + request.pre_trigger_s, request.rising)
        self._schedule(max(0.0, edge_at + edge.trigger_delay_s + request.post_trigger_s - now), edge)

    def _schedule(self, realtime_delay_s: float, edge: _Edge | None) -> None:
        if self.bench.realtime and realtime_delay_s > 0:
            self._timer = asyncio.get_running_loop().call_later(realtime_delay_s, self._complete, edge)
        else:
            self._complete(edge)

    def _trigger_edge(self, request: CaptureRequest) -> _Edge | None:
        gen = self.bench.generator
        s = gen.settings
        if self._trigger_never() or not s.output_on or s.shape not in ("SQUare", "PULSe"):
            return None
        emf_low, emf_high = s.emf_levels()
        low, high = terminal_levels(self.bench.plant_now(), emf_low, emf_high)
        if not (min(low, high) < request.level_v < max(low, high)):
            return None
        fraction = (request.level_v - low) / (high - low)
        if not request.rising:
            fraction = 1.0 - fraction
        before, after = (emf_low, emf_high) if request.rising else (emf_high, emf_low)
        return _Edge(before, after, s.half_period_s(), fraction * gen.ramp_s)

    def _complete(self, edge: _Edge | None) -> None:
        self._timer = None
        request = self._request
        fe = self.bench.front_end
        dt = request.sample_interval_s
        first_s = request.first_index * dt + frontend.trigger_jitter_s(fe, self.rng)
        exact = self._exact(request, edge, first_s)
        analog = tuple(frontend.analogue(v, dt, setup, fe, self.rng) for v, setup in zip(exact, request.channels))
        self.record = Captured(request, analog)
        self.state = "DONE"
        self.done.set()
        self._on_complete()

    def _exact(self, request: CaptureRequest, edge: _Edge | None, first_s: float) -> list[np.ndarray]:
        """Noise-free value at every sample of every channel (zeros where nothing is connected)."""
        n, dt = request.n_samples, request.sample_interval_s
        signals = [self.bench.wiring.get(ch) for ch in range(1, N_CHANNELS + 1)]
        connected = [p for p in signals if p is not None]
        values = iter(self._signal_values(connected, edge, first_s, dt, n) if connected else [])
        return [next(values) if p is not None else np.zeros(n) for p in signals]

    def _signal_values(self, signals: list[Signal], edge: _Edge | None, first_s: float, dt: float,
                       n: int) -> list[np.ndarray]:
        gen = self.bench.generator
        s = gen.settings
        plant = self.bench.plant_now()
        common = dict(sample_interval_s=dt, n_samples=n, edge_time_s=gen.ramp_s, signals=signals)
        if edge is not None:
            return plant.window(emf_before=edge.before_emf, emf_after=edge.after_emf,
                                half_period_s=edge.half_period_s, first_sample_s=first_s + edge.trigger_delay_s,
                                **common)
        if not s.output_on:
            return plant.window(emf_before=0.0, emf_after=0.0, half_period_s=None, first_sample_s=first_s,
                                **common)
        emf_low, emf_high = s.emf_levels()
        phase_s = float(self.rng.uniform(0.0, 2 * s.half_period_s()))
        if s.shape == "SINusoid":
            times = first_s + phase_s + np.arange(n) * dt
            return sine_steady_state(plant.model, signals, (emf_low + emf_high) / 2, (emf_high - emf_low) / 2,
                                     s.frequency_hz, times)
        half = None if s.shape == "DC" else s.half_period_s()
        return plant.window(emf_before=emf_low, emf_after=emf_high, half_period_s=half,
                            first_sample_s=first_s + phase_s, **common)


def word_bits(fmt: str) -> int | None:
    """Bits per code of an integer format; None for the formats that carry volts (REAL,32, ASCii)."""
    return {"INT,8": 8, "INT,16": 16}.get(fmt)


def completed(record: Captured | None) -> Captured:
    if record is None:
        raise SCPIError(-230, "no completed acquisition")
    return record


def channel_scaling(record: Captured | None, channel: int, fmt: str) -> tuple[float, float]:
    """(volts per code, volts at code 0) of one channel's data: 1 and 0 for the formats carrying volts."""
    setup = completed(record).setup(channel)
    bits = word_bits(fmt)
    return (1.0, 0.0) if bits is None else (setup.volts_per_code(bits), setup.centre_v)


def trace_axes(record: Captured | None, channel: int, fmt: str) -> tuple[float, float, float, float]:
    """(seconds per sample, seconds at the first sample, volts per code, volts at code 0) of one channel's
    data. The first sample's time is relative to the trigger: negative when the window holds a pre-trigger
    baseline."""
    request = completed(record).request
    per_code, at_zero = channel_scaling(record, channel, fmt)
    return request.sample_interval_s, request.first_index * request.sample_interval_s, per_code, at_zero


def number_list(values: Iterable[float]) -> str:
    """A comma-separated reply of numbers, each as the simulated instruments format one."""
    return ",".join(Number().format(v) for v in values)


def channel_data(record: Captured | None, channel: int, fe: FrontEndSettings, fmt: str,
                 byteorder: str) -> bytes | str:
    """One channel's samples in a data format: a definite block, or NR3 text for ASCii."""
    record = completed(record)
    analog, setup = record.analog[channel - 1], record.setup(channel)
    bits = word_bits(fmt)
    values = frontend.digitise(analog, setup, fe, bits) if bits is not None else frontend.volts(analog, setup, fe)
    return trace_reply(values, fmt, byteorder)


def trace_reply(values: np.ndarray, fmt: str, byteorder: str) -> bytes | str:
    """``TRACe?``'s reply from codes (integer formats) or volts: a definite-length block, or NR3 text for ASCii."""
    payload = scpi.encode_samples(values, fmt, byteorder)
    return payload.decode("ascii") if fmt == "ASC" else scpi.encode_block(payload)


# ---------------------------------------------------------------------------------------------------
# The SCPI-1999 digitiser
# ---------------------------------------------------------------------------------------------------

@dataclass
class DigitiserChannel:
    range_v: float = 1.0     # half the span: the channel shows offset ± range
    offset_v: float = 0.0
    coupling: str = "DC"


@dataclass
class DigitiserSettings:
    """The ``*RST`` state."""

    sweep_time_s: float = 1e-3
    points: int = 1000
    offset_points: int = -100
    channels: list[DigitiserChannel] = field(default_factory=lambda: [DigitiserChannel() for _ in range(N_CHANNELS)])
    trigger_source: str = "EXTernal"
    slope: str = "POSitive"
    level_v: float = 0.0
    data_format: str = "ASC"   # scpi.sample_format name; ASCii is SCPI's *RST format (from memory)
    byte_order: str = "NORMal"


_CH = "[SENSe:]VOLTage<1-4>[:DC]"
_TRIGGER = "TRIGger[:SEQuence<1>]"
_FORMAT_KIND = Choice(("REAL", "INTeger", "ASCii"))
_FORMAT_BITS = Integer(minimum=1, maximum=64, optional=True)


class DigitiserScope(SCPIInstrument):
    MODEL = "DIG"
    COMMANDS = (
        setting("[SENSe:]SWEep:TIME", "sweep_time_s", Number("S", 1e-9, 1e3, default=1e-3)),
        setting("[SENSe:]SWEep:POINts", "points", Integer(minimum=16, maximum=MAX_POINTS, default=1000)),
        setting("[SENSe:]SWEep:OFFSet:POINts", "offset_points",
                Integer(minimum=-MAX_POINTS, maximum=MAX_POINTS, default=-100)),
        Cmd("[SENSe:]SWEep:TINTerval", query=lambda inst: Number().format(inst.sample_interval_s)),
        setting(_CH + ":RANGe[:UPPer]", "range_v", Number("V", 1e-3, 100.0, default=1.0)),
        setting(_CH + ":OFFSet", "offset_v", Number("V", -100.0, 100.0, default=0.0)),
        setting("INPut<1-4>:COUPling", "coupling", Choice(("AC", "DC"))),
        setting(_TRIGGER + ":SOURce", "trigger_source", Choice(("EXTernal", "IMMediate"))),
        setting(_TRIGGER + ":SLOPe", "slope", Choice(("POSitive", "NEGative"))),
        setting(_TRIGGER + ":LEVel", "level_v", Number("V", -100.0, 100.0, default=0.0)),
        Cmd("INITiate[:IMMediate]", set="_initiate"),
        Cmd("ABORt", set=lambda inst: inst.acquisition.abort()),
        Cmd("FORMat[:DATA]", set="_set_format", params=(_FORMAT_KIND, _FORMAT_BITS),
            query=lambda inst: inst.settings.data_format),
        setting("FORMat:BORDer", "byte_order", Choice(("NORMal", "SWAPped"))),
        Cmd("TRACe[:DATA]", query="_trace", query_params=(ChannelRef(),)),
        Cmd("TRACe:AXES", query="_axes", query_params=(ChannelRef(),)),
        Cmd("TRACe:POINts", query=lambda inst: str(inst._request().n_samples)),
    )

    def __init__(self, bench: Bench, rng: np.random.Generator | None) -> None:
        super().__init__()
        self.bench = bench
        self.acquisition = self.make_acquisition(rng)

    def make_acquisition(self, rng: np.random.Generator | None) -> Acquisition:
        """The engine that fills a record when armed: here the plant behind the bench's generator. Replay
        substitutes one that serves stored records, keeping this command set (``acqd.sim.replay``)."""
        return Acquisition(self.bench, rng, lambda: self.faults.hit("trigger_never"), self.operation_complete)

    def make_settings(self) -> DigitiserSettings:
        return DigitiserSettings()

    def reset(self) -> None:
        self.acquisition.abort()
        super().reset()

    def busy(self) -> bool:
        """``*OPC``, ``*OPC?`` and ``*WAI`` cover the armed acquisition (our choice; the standards leave
        it open)."""
        return self.acquisition.state == "WAIT"

    async def wait_idle(self) -> None:
        await self.acquisition.done.wait()

    @property
    def sample_interval_s(self) -> float:
        return self.settings.sweep_time_s / self.settings.points

    def _initiate(self) -> None:
        self.acquisition.arm(self.capture_request())

    def capture_request(self) -> CaptureRequest:
        """What the present settings ask an acquisition for; -221 when they contradict each other."""
        s = self.settings
        if s.offset_points < -s.points:
            raise SCPIError(-221, f"SWEep:OFFSet:POINts {s.offset_points} puts the trigger after the window "
                                  f"of {s.points} points")
        return CaptureRequest(
            sample_interval_s=self.sample_interval_s, n_samples=s.points, first_index=s.offset_points,
            external=s.trigger_source == "EXTernal", rising=s.slope == "POSitive", level_v=s.level_v,
            channels=tuple(ChannelSetup(c.offset_v, c.range_v, c.coupling) for c in s.channels))

    def _set_format(self, kind: str, bits: int | None = None) -> None:
        combos = {("REAL", None): "REAL,32", ("REAL", 32): "REAL,32", ("INTeger", None): "INT,8",
                  ("INTeger", 8): "INT,8", ("INTeger", 16): "INT,16", ("ASCii", None): "ASC"}
        if (kind, bits) not in combos:
            raise SCPIError(-224, f"format {kind},{bits}; allowed REAL,32 INTeger,8 INTeger,16 ASCii")
        self.settings.data_format = combos[(kind, bits)]

    def _request(self) -> CaptureRequest:
        return completed(self.acquisition.record).request

    def _axes(self, channel: int) -> str:
        """``TRACe:AXES? CH<n>``: both axes of a channel's trace in one reply (one round trip, not four)."""
        return number_list(trace_axes(self.acquisition.record, channel, self.settings.data_format))

    def _trace(self, channel: int) -> bytes | str:
        return channel_data(self.acquisition.record, channel, self.bench.front_end, self.settings.data_format,
                            self.settings.byte_order)
