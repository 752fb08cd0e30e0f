"""State-space models: the shared physics of the simulated bench and the comparator."""

from .circuits import series_rlc
from .statespace import Discrete, StateSpace, discretise, propagate, simulate

__all__ = ["StateSpace", "Discrete", "discretise", "propagate", "simulate", "series_rlc"]

from .spec import BUILDERS, build_model, model_parameters  # noqa: E402

__all__ += ["BUILDERS", "build_model", "model_parameters"]
