"""Build a model from a profile's table: ``{"model": "series_rlc", "r_ohm": 10, ...}``.

One registry for the simulated bench and the comparator, so a DUT is described once and both sides
simulate the same equations. Errors name the table and key, because these come from users' profiles.
"""

from __future__ import annotations

import inspect
from collections.abc import Callable, Mapping
from typing import Any

import numpy as np

from ..errors import ConfigError
from .circuits import series_rlc
from .statespace import StateSpace

ModelBuilder = Callable[..., StateSpace]

BUILDERS: dict[str, ModelBuilder] = {"series_rlc": series_rlc}


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
    """Keyword parameters a named model takes (for validation messages and fits)."""
    return list(inspect.signature(BUILDERS[name]).parameters)


def build_model(spec: Mapping[str, Any], source: str, overrides: Mapping[str, float] | None = None) -> StateSpace:
    """The model a profile table describes; ``overrides`` replaces parameters (the comparator's fits)."""
    name = spec.get("model")
    if name not in BUILDERS:
        raise ConfigError(source, "model", f"unknown model {name!r}; allowed: {', '.join(sorted(BUILDERS))}")
    allowed = model_parameters(name)
    params = {k: v for k, v in spec.items() if k != "model"}
    for key in params:
        if key not in allowed:
            raise ConfigError(source, key, f"not a parameter of model {name}; allowed: {', '.join(allowed)}")
    params.update(overrides or {})
    try:
        return BUILDERS[name](**params)
    except TypeError as exc:
        raise ConfigError(source, "model", f"{name}: {exc}") from None
    except ValueError as exc:
        raise ConfigError(source, "model", str(exc)) from None
