"""Circuit models built from component values, with the generator's source resistance inside.

Each builder returns a ``StateSpace`` whose single input is the generator's open-circuit voltage (its
EMF) and whose outputs are the node voltages a scope can probe plus the state currents. Node names are
the same in the simulated bench and in the comparator, so a profile names a node once. Shared node names:
``v_src`` is always the generator's terminal (after its source resistance), ``v_c`` a capacitor voltage,
``v_rl`` the junction between a series resistor and an inductor, ``i_l`` an inductor current.
"""

from __future__ import annotations

import numpy as np

from .statespace import StateSpace

INPUT = ("u_emf",)


def _positive(**values: float) -> None:
    for name, value in values.items():
        if not (np.isfinite(value) and value > 0):
            raise ValueError(f"parameter {name} must be a positive number, not {value!r}")


def _non_negative(**values: float) -> None:
    for name, value in values.items():
        if not (np.isfinite(value) and value >= 0):
            raise ValueError(f"parameter {name} must be zero or a positive number, not {value!r}")


def series_rlc(r_ohm: float, l_h: float, c_f: float, source_resistance_ohm: float = 50.0) -> StateSpace:
    """Generator (EMF u, source resistance Rs) → R → L → C → ground; states x = [v_C, i_L].

    Kirchhoff's voltage law round the loop: L di/dt = u − (Rs + R) i − v_C, C dv_C/dt = i.
    Nodes: ``v_src`` at the generator's terminal (u − Rs i), ``v_rl`` between R and L (u − (Rs+R) i),
    ``v_c`` across the capacitor; ``i_l`` is the loop current. The current is measured on a bench as the
    difference v_src − v_rl over R, since neither end of R is at earth.
    """
    _positive(r_ohm=r_ohm, l_h=l_h, c_f=c_f)
    _non_negative(source_resistance_ohm=source_resistance_ohm)
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


def parallel_rlc(r_ohm: float, l_h: float, c_f: float, source_resistance_ohm: float = 50.0) -> StateSpace:
    """Generator (EMF u, source resistance Rs) feeding a tank of R, L and C in parallel to ground.

    Kirchhoff's current law at the tank node (voltage v_C): C dv_C/dt = (u − v_C)/Rs − v_C/R − i_L and
    L di_L/dt = v_C. The generator's terminal *is* the tank node, so ``v_src`` and ``v_c`` are the same
    voltage (both names are kept so a profile can say either); ``i_src`` is the generator's current.
    A step drives the tank into ringing that decays back to 0 V, since the inductor shorts DC. Rs must be
    above zero: an ideal voltage source across a capacitor has no state left to evolve.
    """
    _positive(r_ohm=r_ohm, l_h=l_h, c_f=c_f, source_resistance_ohm=source_resistance_ohm)
    g = 1.0 / source_resistance_ohm + 1.0 / r_ohm
    a = np.array([[-g / c_f, -1.0 / c_f], [1.0 / l_h, 0.0]])
    b = np.array([[1.0 / (source_resistance_ohm * c_f)], [0.0]])
    c = np.array([[1.0, 0.0], [1.0, 0.0], [0.0, 1.0], [-1.0 / source_resistance_ohm, 0.0]])
    d = np.array([[0.0], [0.0], [0.0], [1.0 / source_resistance_ohm]])
    return StateSpace(a, b, c, d, states=("v_c", "i_l"), inputs=INPUT,
                      outputs=("v_src", "v_c", "i_l", "i_src"),
                      state_units=("V", "A"), output_units=("V", "V", "A", "A"),
                      parameters={"r_ohm": r_ohm, "l_h": l_h, "c_f": c_f,
                                  "source_resistance_ohm": source_resistance_ohm})


def rc_lowpass(r_ohm: float, c_f: float, source_resistance_ohm: float = 50.0) -> StateSpace:
    """Generator (EMF u, Rs) → series R → node ``v_c`` → C → ground; state x = [v_C].

    The loop current is i = (u − v_C)/(Rs + R) and C dv_C/dt = i, a single time constant (Rs + R)·C.
    ``v_src`` = u − Rs·i = (R·u + Rs·v_C)/(Rs + R); ``i_c`` is the loop (capacitor) current.
    """
    _positive(r_ohm=r_ohm, c_f=c_f)
    _non_negative(source_resistance_ohm=source_resistance_ohm)
    r_total = source_resistance_ohm + r_ohm
    a = np.array([[-1.0 / (r_total * c_f)]])
    b = np.array([[1.0 / (r_total * c_f)]])
    c = np.array([[source_resistance_ohm / r_total], [1.0], [-1.0 / r_total]])
    d = np.array([[r_ohm / r_total], [0.0], [1.0 / r_total]])
    return StateSpace(a, b, c, d, states=("v_c",), inputs=INPUT, outputs=("v_src", "v_c", "i_c"),
                      state_units=("V",), output_units=("V", "V", "A"),
                      parameters={"r_ohm": r_ohm, "c_f": c_f, "source_resistance_ohm": source_resistance_ohm})


def series_rl(r_ohm: float, l_h: float, source_resistance_ohm: float = 50.0) -> StateSpace:
    """Generator (EMF u, Rs) → series R → node ``v_rl`` → L → ground; state x = [i_L].

    L di/dt = u − (Rs + R) i: a single time constant L/(Rs + R). ``v_rl`` = u − (Rs + R) i is the voltage
    across the inductor, ``v_src`` = u − Rs·i the generator's terminal.
    """
    _positive(r_ohm=r_ohm, l_h=l_h)
    _non_negative(source_resistance_ohm=source_resistance_ohm)
    r_total = source_resistance_ohm + r_ohm
    a = np.array([[-r_total / l_h]])
    b = np.array([[1.0 / l_h]])
    c = np.array([[-source_resistance_ohm], [-r_total], [1.0]])
    d = np.array([[1.0], [1.0], [0.0]])
    return StateSpace(a, b, c, d, states=("i_l",), inputs=INPUT, outputs=("v_src", "v_rl", "i_l"),
                      state_units=("A",), output_units=("V", "V", "A"),
                      parameters={"r_ohm": r_ohm, "l_h": l_h, "source_resistance_ohm": source_resistance_ohm})


def second_order(wn_rad_s: float, zeta: float, gain: float = 1.0) -> StateSpace:
    """A generic second-order section H(s) = gain·ω_n² / (s² + 2ζω_n s + ω_n²), driven by the EMF directly.

    For a DUT that is not (or not only) a passive network: an amplifier stage, a sensor, a filter IC.
    It has no source resistance (the section is defined by its transfer function, not its parts).
    States x = [y, dy/dt]; outputs ``y`` and ``dy_dt``.
    """
    _positive(wn_rad_s=wn_rad_s)
    _non_negative(zeta=zeta)
    if not np.isfinite(gain):
        raise ValueError(f"parameter gain must be a finite number, not {gain!r}")
    a = np.array([[0.0, 1.0], [-wn_rad_s**2, -2.0 * zeta * wn_rad_s]])
    b = np.array([[0.0], [gain * wn_rad_s**2]])
    return StateSpace(a, b, np.eye(2), np.zeros((2, 1)), states=("y", "dy_dt"), inputs=INPUT,
                      outputs=("y", "dy_dt"), state_units=("V", "V/s"), output_units=("V", "V/s"),
                      parameters={"wn_rad_s": wn_rad_s, "zeta": zeta, "gain": gain})
