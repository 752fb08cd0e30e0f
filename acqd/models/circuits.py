"""Circuit models built from component values, with the generator's source resistance inside.

Each builder returns a ``StateSpace`` whose single input is the generator's open-circuit voltage (its
EMF) and whose outputs are the node voltages a scope can probe plus the state currents. Node names are
the same in the simulated bench and in the comparator, so a profile names a node once.
"""

from __future__ import annotations

import numpy as np

from .statespace import StateSpace

INPUT = ("u_emf",)


def _positive(**values: float) -> None:
    for name, value in values.items():
        if not (np.isfinite(value) and value > 0):
            raise ValueError(f"parameter {name} must be a positive number, not {value!r}")


def series_rlc(r_ohm: float, l_h: float, c_f: float, source_resistance_ohm: float = 50.0) -> StateSpace:
    """Generator (EMF u, source resistance Rs) → R → L → C → ground; states x = [v_C, i_L].

    Kirchhoff's voltage law round the loop: L di/dt = u − (Rs + R) i − v_C, C dv_C/dt = i.
    Nodes: ``v_src`` at the generator's terminal (u − Rs i), ``v_rl`` between R and L (u − (Rs+R) i),
    ``v_c`` across the capacitor; ``i_l`` is the loop current. The current is measured on a bench as the
    difference v_src − v_rl over R, since neither end of R is at earth.
    """
    _positive(r_ohm=r_ohm, l_h=l_h, c_f=c_f)
    if not (np.isfinite(source_resistance_ohm) and source_resistance_ohm >= 0):
        raise ValueError(f"source resistance must be zero or positive, not {source_resistance_ohm!r}")
    rs, r_total = source_resistance_ohm, source_resistance_ohm + r_ohm
    a = np.array([[0.0, 1.0 / c_f], [-1.0 / l_h, -r_total / l_h]])
    b = np.array([[0.0], [1.0 / l_h]])
    c = np.array([[0.0, -rs], [0.0, -r_total], [1.0, 0.0], [0.0, 1.0]])
    d = np.array([[1.0], [1.0], [0.0], [0.0]])
    return StateSpace(a, b, c, d, states=("v_c", "i_l"), inputs=INPUT,
                      outputs=("v_src", "v_rl", "v_c", "i_l"),
                      state_units=("V", "A"), output_units=("V", "V", "V", "A"),
                      parameters={"r_ohm": r_ohm, "l_h": l_h, "c_f": c_f,
                                  "source_resistance_ohm": source_resistance_ohm})
