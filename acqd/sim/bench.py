"""The simulated bench: a generator driving a DUT plant, watched by two scopes, each a SCPI server on TCP.

Wiring: the generator's open-circuit voltage (EMF, behind its 50 Ω) is the plant's input; scope channels
CH1..CH4 see the signals the profile wires them to (a model output or the difference of two); both scopes'
EXTernal trigger sees the stimulus at the generator terminal. The plant is asked for "now" at every
capture (``plant_source``), so a drifting plant can replace the fixed one without touching the scopes.

Profile table ``[bench.simulated]`` (every key optional; the defaults are a realistic, noisy bench with a
demo DUT of our own):

realtime      bool   false: captures complete at once; true: after the time a real scope would take
seed          int    seeds noise, jitter and free-run phase (each scope draws its own stream)
noise_v_rms   ≥ 0    gaussian noise at each ADC input, volts rms
bandwidth_hz  ≥ 0    scope front-end single-pole bandwidth; 0 switches it off
jitter_s      ≥ 0    rms trigger jitter
quantise      bool   8-bit ADC over each channel's span
clip          bool   clip at the span's edges (only visible with quantise off)
edge_time_s   ≥ 0    generator 10-90 % edge time (a linear ramp of edge_time_s / 0.8)
command_log   path   append every program message the generator receives (monotonic time, text)
dut           table  the DUT model, as acqd.models.build_model reads it; its source resistance must be
                     the generator's 50 Ω for the physics to match the bench
wiring        table  CH1..CH4 = "node" or "node_a - node_b"; an absent channel is left unconnected
drift         table  a slow change of one DUT parameter (below); absent: the DUT never changes
transport     str    how the embedded bench serves its instruments: socket (default), hislip (IVI-6.1 on a
                     port the OS picks) or vxi11 (no portmapper: the resources name the core channel's port)
fixture       table  a fixture of N units behind a simulated switch (acqd.sim.fixture); also made, with its
                     defaults, when the profile has a [batch]. The units replace ``dut`` (each is ``dut``
                     with its parts scattered) and a drift is not applied to them
faults        table  random faults at stated rates, with a seed (acqd.sim.faults lists the kinds)

``[bench.simulated.drift]`` makes the DUT age while the bench runs, so a campaign can be tried against a
known drift in minutes:

parameter     str    a scalar parameter of the DUT model: ``c_f`` of ``series_rlc``, an element (``C2``) of a
                     netlist (see acqd.models.parameter_infos)
per_hour      number relative change per simulated hour (0.02 = +2 %/h of the nominal value), linear in time
time_scale    > 0    simulated seconds per real second (default 1; 3600 makes each real second an hour)
since         time   the moment the drift starts (TOML date-time or ISO 8601 text); default: when the
                     bench starts

The drifted value is nominal × (1 + per_hour × simulated hours since ``since``), where nominal is the
``dut`` table's value (or the model's default) and simulated hours are real elapsed time × ``time_scale``
/ 3600; before ``since`` it is nominal. Without ``since`` the drift starts with each bench: a daemon that
closes the bench (after a fault, between slots further apart than keep_open_s, when it is restarted)
starts a new part when it opens it again. A campaign that should see one continuous drift sets ``since``
(with a time_scale above 1, the real time since then is scaled too: a day ago at 3600 is 86,400 hours).
The plant is rebuilt from the ``dut`` table with that value at every capture. Records carry real UTC
time stamps, so ``acqd drift`` reports the parameter's slope per hour of *record* time: per_hour ×
time_scale × nominal, in the parameter's own unit (c_f nominal 68 nF, per_hour 0.02, time_scale 3600:
4.9 µF/h — the run takes seconds, not a night). When a falling parameter would reach the end of its
allowed range (after 1/|per_hour| simulated hours for a positive one), the scopes refuse to capture with
error −300 naming it, rather than simulate a part that cannot exist.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from types import MappingProxyType
from typing import Any

import numpy as np

from ..config import Table
from ..errors import ConfigError
from ..models import Signal, StateSpace, build_model, parameter_infos
from .frontend import FrontEndSettings
from .generator import Generator
from .plant import Plant
from .scope import N_CHANNELS, DigitiserScope
from .engine import SCPIError, SCPIInstrument
from .hislip import HislipServer
from .rawsocket import SocketServer
from .serving import LoopThread, TransportServer
from .vxi11 import Vxi11Server
from .divscope import DivScope
from .faults import FaultPlan, FaultRates
from .fixture import Fixture, FixtureConfig
from .switch import SimSwitch

TABLE = "bench.simulated"
DRIFT_TABLE = f"{TABLE}.drift"
SECONDS_PER_HOUR = 3600.0
# Physical sanity for the front end's imperfections: beyond these no bench is being imitated, and the plant's
# arithmetic overflows (a 1e300 s jitter or edge time failed inside the scope's INITiate handler).
MAX_NOISE_V_RMS = 100.0
MAX_BANDWIDTH_HZ = 1e12
MAX_TIME_S = 1.0
# The demo DUT: a lightly damped series RLC (ζ ≈ 0.17 with the generator's 50 Ω, rings near 10.6 kHz).
DEMO_DUT: Mapping[str, Any] = MappingProxyType({"model": "series_rlc", "r_ohm": 27.0, "l_h": 3.3e-3,
                                                "c_f": 68e-9})
# CH1 the generator terminal, CH2 the capacitor, CH3 across the series resistor (floating: a difference).
DEMO_WIRING: Mapping[str, str] = MappingProxyType({"CH1": "v_src", "CH2": "v_c", "CH3": "v_src - v_rl"})


@dataclass(frozen=True)
class DriftConfig:
    """A validated ``[bench.simulated.drift]`` table: one DUT parameter changing linearly with time."""

    parameter: str
    per_hour: float
    time_scale: float = 1.0
    since: datetime | None = None  # drift counts from here; None: from when the bench started

    @classmethod
    def from_table(cls, table: Table) -> DriftConfig:
        values = cls(parameter=table.string("parameter"),
                     per_hour=table.number("per_hour", unit="relative change per simulated hour, 0.02 = +2 %/h"),
                     time_scale=table.number("time_scale", 1.0, positive=True,
                                             unit="simulated seconds per real second"),
                     since=table.moment("since"))
        table.done()
        return values

    def factor(self, elapsed_real_s: float) -> float:
        """Drifted value / nominal value after ``elapsed_real_s`` real seconds."""
        return 1.0 + self.per_hour * elapsed_real_s * self.time_scale / SECONDS_PER_HOUR


@dataclass(frozen=True)
class SimBenchConfig:
    """A validated ``[bench.simulated]`` table; the defaults are the demo bench."""

    realtime: bool = False
    seed: int = 20240611
    noise_v_rms: float = 2e-3
    bandwidth_hz: float = 100e6
    jitter_s: float = 1e-9
    quantise: bool = True
    clip: bool = True
    edge_time_s: float = 20e-9
    command_log: str | None = None
    dut: Mapping[str, Any] = field(default_factory=lambda: dict(DEMO_DUT))
    wiring: Mapping[str, str] = field(default_factory=lambda: dict(DEMO_WIRING))
    drift: DriftConfig | None = None
    fixture: FixtureConfig | None = None
    transport: str = "socket"
    faults: FaultRates | None = None
    source: str = "demo bench"
    model: StateSpace = field(init=False, compare=False, repr=False)  # built from ``dut``
    drift_nominal: float | None = field(init=False, compare=False, repr=False)  # the drifting parameter at t = 0

    def __post_init__(self) -> None:
        """Build the DUT model now, so a bad ``dut``, wiring or drift fails when the profile is read."""
        object.__setattr__(self, "model", build_model(self.dut, self.dut_source))
        _check_wiring(self.wiring, self.model, self.source)
        if self.drift is not None:
            object.__setattr__(self, "drift_nominal", _drift_nominal(self.drift, self.dut, self.model, self.source))

    @property
    def dut_source(self) -> str:
        return f"{self.source} [{TABLE}.dut]"

    @classmethod
    def from_mapping(cls, mapping: Mapping[str, Any], source: str, text: str = "",
                     batch_units: int | None = None) -> SimBenchConfig:
        """Validate the table; any problem is one ConfigError naming the file, key and what is allowed.

        ``batch_units``: the profile's [batch] holds this many units, so the bench gets a fixture (and a
        switch) of that many units even without a ``fixture`` table."""
        table = Table(mapping, source, TABLE, text)
        d = cls()
        values = dict(
            realtime=table.boolean("realtime", d.realtime),
            seed=table.integer("seed", d.seed, min=0),
            noise_v_rms=table.number("noise_v_rms", d.noise_v_rms, min=0, max=MAX_NOISE_V_RMS, unit="V rms"),
            bandwidth_hz=table.number("bandwidth_hz", d.bandwidth_hz, min=0, max=MAX_BANDWIDTH_HZ,
                                      unit="Hz; 0 = off"),
            jitter_s=table.number("jitter_s", d.jitter_s, min=0, max=MAX_TIME_S, unit="s rms"),
            quantise=table.boolean("quantise", d.quantise),
            clip=table.boolean("clip", d.clip),
            edge_time_s=table.number("edge_time_s", d.edge_time_s, min=0, max=MAX_TIME_S, unit="s, 10-90 %"),
            command_log=_command_log(table),
            dut=dict(table.table("dut", dict(DEMO_DUT)).data),
            wiring=_wiring_texts(table.table("wiring", dict(DEMO_WIRING))),
            drift=DriftConfig.from_table(table.table("drift")) if table.has("drift") else None,
            fixture=FixtureConfig.from_table(table.table("fixture", {}), batch_units)
            if table.has("fixture") or batch_units is not None else None,
            transport=table.string("transport", d.transport, choices=TRANSPORTS),
            faults=FaultRates.from_table(table.table("faults")) if table.has("faults") else None,
        )
        table.done()
        return cls(**values, source=source)

    def front_end(self) -> FrontEndSettings:
        return FrontEndSettings(bandwidth_hz=self.bandwidth_hz, noise_v_rms=self.noise_v_rms,
                                jitter_s=self.jitter_s, quantise=self.quantise, clip=self.clip)

    def parsed_wiring(self) -> dict[int, Signal]:
        return {int(name[2:]): Signal.parse(text) for name, text in self.wiring.items()}


def _drift_nominal(drift: DriftConfig, dut: Mapping[str, Any], model_built: StateSpace, source: str) -> float:
    """The drifting parameter's value at t = 0: the value the built model was given (the table's, the
    netlist's own, or the builder's default)."""
    model = dut.get("model")
    allowed = list(parameter_infos(dut, source))
    if not allowed:
        raise ConfigError(source, f"{DRIFT_TABLE}.parameter", f"model {model} has no scalar parameter that can "
                                                              "drift; use a circuit model such as series_rlc")
    if drift.parameter not in allowed:
        raise ConfigError(source, f"{DRIFT_TABLE}.parameter", f"{drift.parameter!r} is not a parameter of model "
                                                              f"{model}; allowed: {', '.join(allowed)}")
    return float(model_built.parameters[drift.parameter])


def _command_log(table: Table) -> str | None:
    """The command log's path, whose folder must exist: a log the generator cannot open would make it
    drop every message, which reads as a dead instrument ("no reply to '*IDN?'")."""
    path = table.string("command_log", None)
    if path is not None and not Path(path).expanduser().resolve().parent.is_dir():
        raise table.error("command_log", f"folder {str(Path(path).parent)!r} does not exist; create it or "
                                         f"give a path in an existing folder")
    return path


def _wiring_texts(table: Table) -> dict[str, str]:
    """Scope input → signal text, each checked as text (bounded, no control character) before it is parsed."""
    texts = {name: table.string(name) for name in list(table.data)}
    table.done()
    return texts


def _check_wiring(wiring: Mapping[str, Any], model: StateSpace, source: str) -> None:
    allowed_channels = [f"CH{n}" for n in range(1, N_CHANNELS + 1)]
    for name, text in wiring.items():
        field_name = f"{TABLE}.wiring.{name}"
        if name not in allowed_channels:
            raise ConfigError(source, field_name, f"not a scope channel; allowed: {', '.join(allowed_channels)}")
        try:
            fits = Signal.parse(text).fits(model)
        except ValueError:
            fits = False
        if not fits:
            raise ConfigError(source, field_name, f"{text!r} is not a signal of this DUT; write an output or "
                                                  f"'a - b' of outputs: {', '.join(model.outputs)}")


TRANSPORTS = ("socket", "hislip", "vxi11")


@dataclass(frozen=True)
class Serving:
    """Which transports a served bench offers its instruments over, and on which ports.

    ``hislip_port`` and ``vxi11_port`` (the VXI-11 core channel) 0: the OS picks one. ``portmapper_port``:
    where the VXI-11 portmapper listens (clients ask port 111); None: no portmapper, so clients give the core
    channel's port in the resource (``TCPIP0::host,PORT::inst0::INSTR``)."""

    transports: tuple[str, ...] = ("socket",)
    hislip_port: int = 0
    vxi11_port: int = 0
    portmapper_port: int | None = None

    def server(self, transport: str, instruments: dict[str, SCPIInstrument], host: str) -> TransportServer:
        if transport == "socket":
            return SocketServer(instruments, host)
        if transport == "hislip":
            return HislipServer(instruments, host, self.hislip_port)
        return Vxi11Server(instruments, host, self.vxi11_port, self.portmapper_port)


class ServedBench:
    """SCPI servers on one event loop for the instruments ``create_instruments`` makes, over each transport
    ``serving`` names (the raw socket unless told otherwise).

    Use ``start()``/``stop()`` (or ``with``) to run them in a background thread, or ``astart()``/
    ``astop()`` from a running event loop (the ``acqd sim`` and ``acqd replay`` foregrounds).
    """

    def __init__(self, host: str = "127.0.0.1", serving: Serving | None = None) -> None:
        self.host = host
        self.serving = serving or Serving()
        self._instruments: dict[str, SCPIInstrument] = {}
        self._servers: dict[str, TransportServer] = {}
        self._thread: LoopThread | None = None

    def create_instruments(self) -> dict[str, SCPIInstrument]:
        """The instruments by resource name; called in the loop that serves them (their asyncio state)."""
        raise NotImplementedError

    @property
    def resources(self) -> dict[str, str]:
        """VISA resource strings by name over the first transport served, e.g. ``{"generator":
        "TCPIP0::127.0.0.1::PORT::SOCKET", "scope": ...}``."""
        return next(iter(self.resources_by_transport.values()), {})

    @property
    def resources_by_transport(self) -> dict[str, dict[str, str]]:
        """``{"socket": {"generator": ..., ...}, "hislip": {...}}``: every resource string served."""
        return {transport: server.resources for transport, server in self._servers.items()}

    def transport_server(self, transport: str) -> TransportServer:
        """The server of one transport served (a test switches that transport's own faults through it)."""
        return self._servers[transport]

    @property
    def instruments(self) -> dict[str, SCPIInstrument]:
        return dict(self._instruments)

    async def astart(self) -> None:
        """Create the instruments and start listening on every transport."""
        self._instruments = self.create_instruments()
        try:
            for transport in self.serving.transports:
                server = self.serving.server(transport, self._instruments, self.host)
                self._servers[transport] = server
                await server.start()
        except OSError:
            await self.astop()
            raise

    async def astop(self) -> None:
        for server in self._servers.values():
            await server.stop()

    def start(self) -> ServedBench:
        self._thread = LoopThread()
        self._thread.start()
        try:
            self._thread.run(self.astart())
        except BaseException:
            self._thread.stop()
            self._thread = None
            raise
        return self

    def stop(self) -> None:
        if self._thread is not None:
            self._thread.run(self.astop())
            self._thread.stop()
            self._thread = None

    def call(self, func: Callable[..., Any], *args: Any) -> Any:
        """Run ``func(*args)`` in the bench's loop thread (to touch instrument state from a test)."""
        return self._thread.call(func, *args)

    def __enter__(self) -> ServedBench:
        return self.start()

    def __exit__(self, *exc: object) -> None:
        self.stop()


class SimBench(ServedBench):
    """Three SCPI servers: ``gen``, ``scope`` (DIG) and ``divscope``, around one DUT plant; with a fixture a
    fourth, ``switch`` (SW), choosing which of the fixture's units the others see."""

    def __init__(self, config: SimBenchConfig | None = None, host: str = "127.0.0.1",
                 serving: Serving | None = None) -> None:
        self.config = config or SimBenchConfig()
        super().__init__(host, serving or Serving((self.config.transport,)))
        self.realtime = self.config.realtime
        self.front_end = self.config.front_end()
        self.wiring = self.config.parsed_wiring()
        self._plant = Plant(self.config.model)
        self.plant_source: Callable[[], Plant] = self._drifted_plant if self.config.drift else lambda: self._plant
        self.fixture: Fixture | None = None
        self.switch: SimSwitch | None = None
        if self.config.fixture is not None:
            self.fixture = Fixture.build(self.config.fixture, self.config.dut, self.config.dut_source)
            self.plant_source = self._fixture_plant
        self.generator: Generator | None = None
        self.scope: DigitiserScope | None = None
        self.divscope: DivScope | None = None
        self._started_s: float | None = None

    def plant_now(self) -> Plant:
        """The plant as it is at this moment (``plant_source``; a drifting bench rebuilds it each time)."""
        return self.plant_source()

    def _elapsed_real_s(self) -> float:
        """Real seconds the drift has run: since its ``since`` (never negative), else since the bench started."""
        drift = self.config.drift
        if drift is not None and drift.since is not None:
            return max((datetime.now(UTC) - drift.since).total_seconds(), 0.0)
        return 0.0 if self._started_s is None else time.monotonic() - self._started_s

    def simulated_elapsed_s(self) -> float:
        """Simulated seconds the drift has run: real seconds × the drift's ``time_scale`` (1 without)."""
        if self._started_s is None:
            return 0.0
        scale = self.config.drift.time_scale if self.config.drift else 1.0
        return self._elapsed_real_s() * scale

    def dut_now(self) -> dict[str, Any]:
        """The DUT table as the plant is built from it now: the drifting parameter at its present value."""
        dut = dict(self.config.dut)
        drift = self.config.drift
        if drift is not None and self._started_s is not None:
            dut[drift.parameter] = self.config.drift_nominal * drift.factor(self._elapsed_real_s())
        return dut

    def _drifted_plant(self) -> Plant:
        """The plant rebuilt with the drifted value; -300 once the value is one the model refuses."""
        dut = self.dut_now()
        try:
            return Plant(build_model(dut, self.config.dut_source))
        except ConfigError as exc:
            name = self.config.drift.parameter
            hours = self.simulated_elapsed_s() / SECONDS_PER_HOUR
            raise SCPIError(-300, f"simulated drift took {name} to {dut[name]:.6g} after {hours:.4g} h; "
                                  f"{exc.field} {exc.problem}") from None

    def _fixture_plant(self) -> Any:
        """The unit the switch connects now, seen through its relays (−300 when none or two are connected)."""
        s = self.switch.settings
        return self.fixture.plant(s.closed, s.last_close_s)

    def create_instruments(self) -> dict[str, SCPIInstrument]:
        scope_seed, divscope_seed = np.random.SeedSequence(self.config.seed).spawn(2)
        self.generator = Generator(edge_time_s=self.config.edge_time_s, log_path=self.config.command_log)
        self.scope = DigitiserScope(self, np.random.default_rng(scope_seed))
        self.divscope = DivScope(self, np.random.default_rng(divscope_seed))
        self._started_s = time.monotonic()
        instruments: dict[str, SCPIInstrument] = {"generator": self.generator, "scope": self.scope,
                                                  "divscope": self.divscope}
        if self.fixture is not None:
            self.switch = SimSwitch(log_path=self.config.command_log)
            instruments["switch"] = self.switch
        if self.config.faults is not None:  # each instrument its own stream of draws under the one seed
            for stream, instrument in enumerate(instruments.values()):
                instrument.faults.plan = FaultPlan(self.config.faults, stream)
        return instruments
