"""The comparator: simulate a record's stimulus through a model, measure agreement, fit, judge.

``compare(record, model_spec, mapping, tolerances, fit)`` takes plain tables; ``parse_dut_table`` validates
a profile's ``[dut]`` table into a ``CompareSpec`` for ``compare_spec``. Imports only ``record`` and
``models`` from the rest of acqd (plus the shared error and TOML-table helpers).
"""

from .core import CompareResult, Traces, compare, compare_spec, stored_traces
from .fit import FitError, FitResult
from .ieee181 import StepError, StepParameters, histogram_levels, step_parameters
from .metrics import NRMSE_BASIS, ChannelResult
from .spec import CompareSpec, parse_dut_table, spec_from_parts
from .stimulus import Edge, edge_response
from .verdict import Check, Verdict

__all__ = ["compare", "compare_spec", "stored_traces", "CompareResult", "Traces", "FitResult", "FitError", "StepParameters",
           "StepError", "step_parameters", "histogram_levels", "ChannelResult", "NRMSE_BASIS", "CompareSpec",
           "parse_dut_table", "spec_from_parts", "Edge", "edge_response", "Check", "Verdict"]
