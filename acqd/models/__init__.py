"""State-space models: the shared physics of the simulated bench and the comparator."""

from .circuits import parallel_rlc, rc_lowpass, second_order, series_rl, series_rlc
from .signal import Signal
from .spec import BUILDERS, PARAMETERS, ParameterInfo, build_model, model_parameters, parameter_infos
from .statespace import Discrete, StateSpace, discretise, propagate, simulate, with_sensitivities

__all__ = ["StateSpace", "Discrete", "discretise", "propagate", "simulate", "with_sensitivities",
           "series_rlc", "parallel_rlc", "rc_lowpass", "series_rl", "second_order",
           "Signal", "BUILDERS", "PARAMETERS", "ParameterInfo", "build_model", "model_parameters",
           "parameter_infos"]
