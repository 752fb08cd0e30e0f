"""What a scope channel sees of a model: one output, or the difference of two (a floating voltage such as
the drop across a series resistor). One definition for the simulated bench and the comparator, so a
profile's signal text means the same to both."""

from __future__ import annotations

import re
from dataclasses import dataclass

import numpy as np

from .statespace import StateSpace

# An output name: an identifier, or a netlist's v(node) / i(element).
_NAME = r"[A-Za-z_]\w*(?:\([A-Za-z0-9_.]+\))?"
_SIGNAL = re.compile(rf"^\s*({_NAME})\s*(?:-\s*({_NAME})\s*)?$")


@dataclass(frozen=True)
class Signal:
    """``plus`` − ``minus`` of a model's outputs; ``minus`` None for an earth-referenced node."""

    plus: str
    minus: str | None = None

    @classmethod
    def parse(cls, text: str) -> Signal:
        """``"v_c"`` or ``"v_src - v_rl"``; ValueError for anything else."""
        match = _SIGNAL.match(text) if isinstance(text, str) else None
        if not match:
            raise ValueError(f"signal {text!r} must be a node name or 'node_a - node_b'")
        return cls(match.group(1), match.group(2))

    @property
    def text(self) -> str:
        return self.plus if self.minus is None else f"{self.plus} - {self.minus}"

    def __str__(self) -> str:
        return self.text

    def fits(self, model: StateSpace) -> bool:
        """Whether every node it names is an output of ``model``."""
        return all(node in model.outputs for node in (self.plus, self.minus) if node is not None)

    def row(self, model: StateSpace) -> tuple[np.ndarray, float]:
        """(C row, D entry) of the quantity, so its value is x·c + d·u; KeyError for an unknown node."""
        i = model.output_index(self.plus)
        c, d = model.C[i].copy(), float(model.D[i, 0])
        if self.minus is not None:
            j = model.output_index(self.minus)
            c, d = c - model.C[j], d - float(model.D[j, 0])
        return c, d
