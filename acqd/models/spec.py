"""Build a model from a profile's table: ``{"model": "series_rlc", "r_ohm": 10, ...}``.

One registry for the simulated bench and the comparator, so a DUT is described once and both sides
simulate the same equations. Errors name the table and key, because these come from users' profiles.
"""

from __future__ import annotations

import functools
import inspect
import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..errors import ConfigError
from .circuits import parallel_rlc, rc_lowpass, second_order, series_rl, series_rlc
from .netlist import MAX_MAGNITUDE, Netlist, NetlistError, netlist_model
from .statespace import StateSpace

ModelBuilder = Callable[..., StateSpace]

BUILDERS: dict[str, ModelBuilder] = {
    "series_rlc": series_rlc,
    "parallel_rlc": parallel_rlc,
    "rc_lowpass": rc_lowpass,
    "series_rl": series_rl,
    "second_order": second_order,
    "netlist": netlist_model,
}


@dataclass(frozen=True)
class ParameterInfo:
    """A scalar model parameter: its unit and the values it may take ("positive", "non_negative", "any")."""

    unit: str
    sign: str = "positive"

    def problem(self, value: Any) -> str | None:
        """Why ``value`` is not allowed, or None when it is."""
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
            return f"must be a finite number ({self.unit}), not {value!r}"
        if self.sign == "positive" and value <= 0:
            return f"must be greater than 0 ({self.unit}), not {value!r}"
        if self.sign == "non_negative" and value < 0:
            return f"must be 0 or more ({self.unit}), not {value!r}"
        if abs(value) > MAX_MAGNITUDE:
            return f"must be at most {MAX_MAGNITUDE:g} in magnitude ({self.unit}), not {value!r}"
        return None


_R, _L, _C = ParameterInfo("ohm"), ParameterInfo("H"), ParameterInfo("F")
_RS = ParameterInfo("ohm", "non_negative")

# Scalar parameters of each circuit model, for validation messages and fits (the matrix model has none).
PARAMETERS: dict[str, dict[str, ParameterInfo]] = {
    "series_rlc": {"r_ohm": _R, "l_h": _L, "c_f": _C, "source_resistance_ohm": _RS},
    "parallel_rlc": {"r_ohm": _R, "l_h": _L, "c_f": _C, "source_resistance_ohm": ParameterInfo("ohm")},
    "rc_lowpass": {"r_ohm": _R, "c_f": _C, "source_resistance_ohm": _RS},
    "series_rl": {"r_ohm": _R, "l_h": _L, "source_resistance_ohm": _RS},
    "second_order": {"wn_rad_s": ParameterInfo("rad/s"), "zeta": ParameterInfo("1", "non_negative"),
                     "gain": ParameterInfo("V/V", "any")},
}


def parameter_infos(spec: Mapping[str, Any], source: str) -> dict[str, ParameterInfo]:
    """The scalar parameters a model table offers to fits, tolerances and drift: a built-in circuit's fixed
    set, or a netlist's element values by element name (``R1``, ``L2``) and the generator's resistance.

    A netlist's set depends on its text, which is why this takes the table and not the model's name.
    """
    if spec.get("model") != "netlist":
        return PARAMETERS.get(spec.get("model"), {})
    text, generator = spec.get("netlist"), spec.get("source")
    if not isinstance(text, str) or not isinstance(generator, str):
        key = "netlist" if not isinstance(text, str) else "source"
        raise ConfigError(source, key, "missing or not a string; a netlist model needs the netlist text and "
                                       "the name of its generator source")
    try:
        netlist = Netlist.parse(text, generator)
    except NetlistError as exc:
        raise ConfigError(source, "netlist", str(exc)) from None
    positive = netlist.positive()
    elements = {name: ParameterInfo(unit, "positive" if name in positive else "any")
                for name, unit in netlist.units().items()}
    return {**elements, "source_resistance_ohm": _RS}


def _matrix_model(A: Any, B: Any, C: Any, D: Any, states: Any, outputs: Any,
                  output_units: Any = None) -> StateSpace:
    """Any A, B, C, D from a profile; the single input is the generator's open-circuit voltage."""
    outputs = tuple(outputs)
    units = tuple(output_units) if output_units is not None else ("V",) * len(outputs)
    return StateSpace(np.asarray(A, float), np.asarray(B, float).reshape(len(states), -1),
                      np.asarray(C, float).reshape(len(outputs), len(states)),
                      np.asarray(D, float).reshape(len(outputs), -1),
                      states=tuple(states), inputs=("u_emf",), outputs=outputs, output_units=units)


BUILDERS["state_space"] = _matrix_model


def model_parameters(name: str) -> list[str]:
    """Keyword parameters a named model takes (for validation messages and fits); a netlist's element
    values come on top of these, by element name."""
    return [p.name for p in _signature(BUILDERS[name]).parameters.values() if p.kind is not p.VAR_KEYWORD]


def _takes_any_name(name: str) -> bool:
    """A builder whose parameters depend on its own data (the netlist's elements) checks names itself."""
    return any(p.kind is p.VAR_KEYWORD for p in _signature(BUILDERS[name]).parameters.values())


@functools.lru_cache(maxsize=None)
def _signature(builder: ModelBuilder) -> inspect.Signature:
    """Reading a signature costs more than building a small model, and every comparison builds several."""
    return inspect.signature(builder)


def _required(name: str) -> list[str]:
    return [p.name for p in _signature(BUILDERS[name]).parameters.values()
            if p.default is inspect.Parameter.empty and p.kind is not p.VAR_KEYWORD]


def build_model(spec: Mapping[str, Any], source: str, overrides: Mapping[str, float] | None = None) -> StateSpace:
    """The model a profile table describes; ``overrides`` replaces parameters (the comparator's fits)."""
    name = spec.get("model")
    if not isinstance(name, str) or name not in BUILDERS:
        shown = repr(name) if len(repr(name)) <= 60 else repr(name)[:57] + "..."
        raise ConfigError(source, "model", f"unknown model {shown}; allowed: {', '.join(sorted(BUILDERS))}")
    allowed = model_parameters(name)
    params = {k: v for k, v in spec.items() if k != "model"}
    for key in params:
        if key not in allowed and not _takes_any_name(name):
            raise ConfigError(source, key, f"not a parameter of model {name}; allowed: {', '.join(allowed)}")
    for key in _required(name):
        if key not in params:
            raise ConfigError(source, key, f"missing; model {name} needs {', '.join(_required(name))}")
    params.update(overrides or {})
    for key, info in PARAMETERS.get(name, {}).items():
        if key in params and (problem := info.problem(params[key])):
            raise ConfigError(source, key, problem)
    try:
        return BUILDERS[name](**params)
    except TypeError as exc:
        raise ConfigError(source, "model", f"{name}: {exc}") from None
    except ValueError as exc:
        raise ConfigError(source, "model", str(exc)) from None
