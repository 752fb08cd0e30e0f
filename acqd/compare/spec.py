"""The comparator's part of a profile's ``[dut]`` table, validated into frozen objects.

Schema (every key but ``model`` is optional; an unknown key is an error, as everywhere in a profile)::

    [dut]
    name = "KT-9 input filter"        # identity, carried into the report
    serial = "KT9-0417"
    model = "series_rlc"              # a name from acqd.models.BUILDERS
    r_ohm = 22.0                      # nominal parameters, flat, exactly as the simulated bench takes them
    l_h = 3.3e-3
    c_f = 100e-9
    # source_resistance_ohm: when absent, the generator's own (the record's stimulus) is used

    [dut.fit]
    free = ["r_ohm", "l_h", "c_f"]    # identified from the record; every other parameter stays nominal
    hold = ["l_h"]                    # held first when the data cannot determine every free parameter
    weighting = "noise"               # each channel's residuals divided by its noise RMS, or "amplitude"

    [dut.channels]                    # record channel = model output, or a table; default: the record's
    v_c = "v_c"                       #   channels whose names are model outputs, gain 1, offset 0
    v_r = { signal = "v_src - v_rl", gain = 1.0, offset = 0.0 }
    v_src = { signal = "v_src", stimulus = true }   # places the edge in time (see compare.stimulus)

    [dut.tolerances]
    nrmse_max = 0.05                  # every mapped channel
    parameter_pct = 20.0              # every fitted parameter within ±20 % of nominal; or { r_ohm = 10 }
    settling_band_pct = 2.0           # the band settling is measured into (IEEE 181; 2 % is common practice)
    [dut.tolerances.channels.v_c]     # per channel: overrides nrmse_max, adds step-parameter limits
    overshoot_pct = [25.0, 45.0]
    settling_s_max = 6e-4

A measured channel is modelled as ``gain × signal + offset``, where the signal is one model output or the
difference ``a - b`` of two (a floating voltage, such as the drop across a series resistor).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from functools import lru_cache
from typing import Any


from ..config import Table
from ..models import BUILDERS, ParameterInfo, Signal, StateSpace, build_model, model_parameters, parameter_infos

IDENTITY_KEYS = ("name", "serial")
WEIGHTINGS = ("noise", "amplitude")

# Which free parameter to hold first when the data cannot tell them apart: the reactive part (L, then C),
# so the fitted resistance absorbs the losses nominal values leave out (winding resistance, ESR).
DEFAULT_HOLD = {
    "series_rlc": ("l_h", "c_f", "r_ohm", "source_resistance_ohm"),
    "parallel_rlc": ("l_h", "c_f", "r_ohm", "source_resistance_ohm"),
    "rc_lowpass": ("c_f", "r_ohm", "source_resistance_ohm"),
    "series_rl": ("l_h", "r_ohm", "source_resistance_ohm"),
    "second_order": ("gain", "zeta", "wn_rad_s"),
}

@dataclass(frozen=True)
class ChannelMap:
    """A record channel modelled as ``gain × signal + offset``; ``stimulus`` marks the edge-timing channel."""

    channel: str
    signal: Signal
    gain: float = 1.0
    offset: float = 0.0
    stimulus: bool = False


@dataclass(frozen=True)
class FitSpec:
    free: tuple[str, ...] = ()
    hold: tuple[str, ...] = ()
    weighting: str = "noise"


@dataclass(frozen=True)
class ChannelLimits:
    nrmse_max: float | None = None
    overshoot_pct: tuple[float, float] | None = None
    settling_s_max: float | None = None


@dataclass(frozen=True)
class Tolerances:
    nrmse_max: float | None = None
    parameter_pct: dict[str, float] = field(default_factory=dict)
    settling_band_pct: float = 2.0
    channels: dict[str, ChannelLimits] = field(default_factory=dict)

    def for_channel(self, name: str) -> ChannelLimits:
        """A channel's limits, with the table-wide NRMSE ceiling where the channel sets none."""
        own = self.channels.get(name, ChannelLimits())
        nrmse = own.nrmse_max if own.nrmse_max is not None else self.nrmse_max
        return ChannelLimits(nrmse, own.overshoot_pct, own.settling_s_max)


@dataclass(frozen=True)
class CompareSpec:
    """Everything the comparator needs besides the record; ``source`` names where it came from."""

    model: str
    nominal: dict[str, Any]
    channels: tuple[ChannelMap, ...] | None  # None: map the record's channels named like model outputs
    fit: FitSpec
    tolerances: Tolerances
    source: str
    identity: dict[str, str] = field(default_factory=dict)
    parameters: dict[str, ParameterInfo] = field(default_factory=dict)  # scalars a fit or tolerance may name

    def build(self, parameters: Mapping[str, Any] | None = None) -> StateSpace:
        """The model at ``parameters`` (the nominal values where not given). Every comparison builds it
        three times at the same values, and a campaign without fits at the same values for every record:
        models of scalar parameters come from a small cache (a model's matrices are read-only)."""
        try:
            return _cached_model(self.model, tuple(self.nominal.items()), tuple((parameters or {}).items()),
                                 self.source)
        except TypeError:  # a parameter that cannot be a cache key (the matrices of a state_space model)
            return build_model({"model": self.model, **self.nominal}, self.source, parameters)


@lru_cache(maxsize=64)
def _cached_model(model: str, nominal: tuple[tuple[str, Any], ...], parameters: tuple[tuple[str, Any], ...],
                  source: str) -> StateSpace:
    return build_model({"model": model, **dict(nominal)}, source, dict(parameters))


def parse_dut_table(data: Mapping[str, Any], source: str, text: str = "", path: str = "dut") -> CompareSpec:
    """Validate a ``[dut]`` table; any problem is one ConfigError naming the source (and line), key and
    what is allowed. ``text`` is the profile's text, used only to find line numbers."""
    t = Table(data, source, path, text)
    identity = {k: v for k in IDENTITY_KEYS if (v := t.string(k, None)) is not None}
    model = t.string("model", choices=sorted(BUILDERS))
    model_source, _ = t.where("model")
    scalars = parameter_infos({key: t.raw(key, None) for key in ("model", "netlist", "source")}, model_source)
    nominal = _nominal(t, model, scalars)
    built = build_model({"model": model, **nominal}, model_source)
    fit = _fit(t.table("fit", {}), model, nominal, scalars)
    channels = _channels(t, built) if t.raw("channels", None) is not None else None
    tolerances = _tolerances(t.table("tolerances", {}), model, channels, scalars)
    t.done()
    return CompareSpec(model, nominal, channels, fit, tolerances, source, identity, dict(scalars))


def spec_from_parts(model_spec: Mapping[str, Any], channels: Mapping[str, Any] | None = None,
                    tolerances: Mapping[str, Any] | None = None, fit: Mapping[str, Any] | None = None,
                    source: str = "compare()") -> CompareSpec:
    """The same validation for a caller holding the pieces separately (the Python API)."""
    table = dict(model_spec)
    for key, value in (("channels", channels), ("tolerances", tolerances), ("fit", fit)):
        if value is not None:
            table[key] = value
    return parse_dut_table(table, source, path="")


def _nominal(t: Table, model: str, scalars: Mapping[str, ParameterInfo]) -> dict[str, Any]:
    """The table's model parameters: the builder's keywords and, for a netlist, element values by name."""
    nominal = {}
    for key in dict.fromkeys([*model_parameters(model), *scalars]):
        value = t.raw(key, None)
        if value is None:
            continue
        if key in scalars and (problem := scalars[key].problem(value)):
            raise t.error(key, problem)
        nominal[key] = float(value) if key in scalars else value
    return nominal


def _names(t: Table, key: str, allowed: list[str], what: str) -> tuple[str, ...]:
    """A string or a list of strings, each one of ``allowed``."""
    value = t.raw(key, [])
    items = [value] if isinstance(value, str) else value
    if not isinstance(items, list) or not all(isinstance(v, str) for v in items):
        raise t.error(key, f"must be a list of {what}, e.g. [{', '.join(repr(a) for a in allowed[:2])}]")
    for item in items:
        if item not in allowed:
            raise t.error(key, f"{item!r} is not one of the {what}: {', '.join(allowed) or '(none)'}")
    return tuple(items)


def _fit(t: Table, model: str, nominal: Mapping[str, Any], scalars: Mapping[str, ParameterInfo]) -> FitSpec:
    free = _names(t, "free", list(scalars), f"scalar parameters of {model}")
    for name in free:
        if scalars[name].sign != "any" and nominal.get(name, 1.0) == 0:
            raise t.error("free", f"{name} cannot be fitted from a nominal value of 0 (it is fitted on a "
                                  "log scale); give a small positive nominal value")
    spec = FitSpec(free, _names(t, "hold", list(free), "free parameters"),
                   t.string("weighting", "noise", choices=WEIGHTINGS))
    t.done()
    return spec


def parse_signal(text: Any, model: StateSpace) -> Signal | None:
    """The signal ``text`` names, or None when it is not 'output' or 'output - output' of ``model``."""
    try:
        signal = Signal.parse(text)
    except ValueError:
        return None
    return signal if signal.fits(model) else None


def _channels(dut: Table, model: StateSpace) -> tuple[ChannelMap, ...]:
    t = dut.table("channels")
    mapped = []
    for name in list(t.data):
        entry = t.raw(name)
        entry_table = t.table(name) if isinstance(entry, Mapping) else None
        text = entry_table.raw("signal") if entry_table else entry
        signal = parse_signal(text, model)
        if signal is None:
            where, key = (entry_table, "signal") if entry_table else (t, name)
            raise where.error(key, f"must name a model output or 'a - b' of two; outputs are "
                                   f"{', '.join(model.outputs)}, not {text!r}")
        if entry_table is None:
            mapped.append(ChannelMap(name, signal))
            continue
        gain = entry_table.number("gain", 1.0)
        if gain == 0:
            raise entry_table.error("gain", "must not be 0")
        mapped.append(ChannelMap(name, signal, gain, entry_table.number("offset", 0.0),
                                 entry_table.boolean("stimulus", False)))
        entry_table.done()
    if not mapped:
        raise dut.error("channels", "maps no channel; remove the table to map the record's channels by name")
    if sum(m.stimulus for m in mapped) > 1:
        raise dut.error("channels", "at most one channel may be marked stimulus = true")
    t.done()
    return tuple(mapped)


def _band(t: Table, key: str) -> tuple[float, float] | None:
    value = t.raw(key, None)
    if value is None:
        return None
    ok = (isinstance(value, list) and len(value) == 2
          and all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in value) and value[0] <= value[1])
    if not ok:
        raise t.error(key, f"must be [lowest, highest] in percent, e.g. [20.0, 40.0], not {value!r}")
    return float(value[0]), float(value[1])


def _tolerances(t: Table, model: str, channels: tuple[ChannelMap, ...] | None,
                scalars: Mapping[str, ParameterInfo]) -> Tolerances:
    nrmse = t.number("nrmse_max", None, positive=True, unit="fraction of the simulated peak-to-peak")
    pct = t.raw("parameter_pct", None)
    if isinstance(pct, Mapping):
        pct_table = t.table("parameter_pct")
        for key in pct_table.data:
            if key not in scalars:
                raise pct_table.error(key, f"not a scalar parameter of {model}; allowed: {', '.join(scalars)}")
        parameter_pct = {k: pct_table.number(k, positive=True, unit="%") for k in list(pct_table.data)}
        pct_table.done()
    else:
        parameter_pct = {"*": t.number("parameter_pct", positive=True, unit="%")} if pct is not None else {}
    band = t.number("settling_band_pct", 2.0, positive=True, max=50.0, unit="% of |A|")
    per_channel = {}
    channel_table = t.table("channels", {})
    mapped_names = [c.channel for c in channels] if channels is not None else None
    for name in list(channel_table.data):
        if mapped_names is not None and name not in mapped_names:
            raise channel_table.error(name, f"not a mapped channel; mapped: {', '.join(mapped_names)}")
        c = channel_table.table(name)
        per_channel[name] = ChannelLimits(c.number("nrmse_max", None, positive=True),
                                          _band(c, "overshoot_pct"),
                                          c.number("settling_s_max", None, positive=True, unit="s"))
        c.done()
    channel_table.done()
    t.done()
    return Tolerances(nrmse, parameter_pct, band, per_channel)
