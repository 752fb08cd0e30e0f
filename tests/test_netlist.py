"""Netlist models (modified nodal analysis reduced to state space) against outside references.

- ngspice (Debian's package, an independent circuit simulator, batch mode): the step response of
  generated ladders of 1–6 sections, a bridged-T and a transformer with coupling K, each driven through
  the generator's 50 Ω by a 100 ns ramp to 1 V. Our side is evaluated exactly at ngspice's own time points
  (matrix exponentials of the augmented system, at about 3,000 of ngspice's points spread over the whole
  run), so the difference is ngspice's integration error plus ours; with ngspice's tolerances at their
  tightest here (reltol 1e-10, trtol 1) and its largest step 1/100,000 of the run, it stays under the
  1e-6 of the step asked. That residual is ngspice's: on the 6-section ladder it fell from 9.8e-6 to
  1.6e-6 when trtol went from its default 7 to 1, and to 4.1e-7 when the largest step went from 1/20,000
  to 1/100,000 of the run, while the model did not change.
- Closed forms: the series RLC's poles −R/2L ± j·√(1/LC − (R/2L)²) (any circuits text); the doubly
  terminated third-order Butterworth LC ladder (1 Ω, C 1 F, L 2 H, C 1 F, 1 Ω; from memory, a standard
  table value) has its poles at −1 and −½ ± j·√3/2 rad/s, on the unit circle.
"""

from __future__ import annotations

import math
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest
from scipy.linalg import expm

from acqd.models import build_model
from acqd.models.netlist import Netlist, NetlistError, netlist_model, parse_value
from acqd.errors import ConfigError

RAMP_S = 1e-7
SOURCE_OHM = 50.0
NGSPICE = shutil.which("ngspice")
needs_ngspice = pytest.mark.skipif(NGSPICE is None, reason="ngspice (Debian package) is not installed")


def ladder(sections: int) -> tuple[str, list[str]]:
    """An RLC low-pass ladder: series R–L, shunt C per section, a 1 kΩ load; values of our own."""
    lines, node = ["V1 in 0"], "in"
    for k in range(1, sections + 1):
        lines += [f"R{k} {node} m{k} {10 + k}", f"L{k} m{k} n{k} {1 + 0.3 * k}m", f"C{k} n{k} 0 {47 + 10 * k}n"]
        node = f"n{k}"
    lines.append(f"Rload {node} 0 1k")
    return "\n".join(lines), [f"n{k}" for k in range(1, sections + 1)]


BRIDGED_T = """V1 in 0
R1 in a 100
C1 a out 10n
C2 in out 4.7n
R2 out 0 2.2k
L1 a 0 1m
R3 a 0 10k
""", ["a", "out"]

TRANSFORMER = """V1 in 0
R1 in p 10
L1 p 0 2m
L2 s 0 0.5m
K1 L1 L2 0.95
R2 s out 5
C1 out 0 220n
R3 out 0 470
""", ["p", "s", "out"]

NETWORKS = {**{f"ladder-{n}": ladder(n) for n in range(1, 7)}, "bridged-T": BRIDGED_T, "transformer": TRANSFORMER}


def exact_response(model, times: np.ndarray) -> np.ndarray:
    """Outputs at ``times`` for u ramping 0 → 1 over RAMP_S then held: exact via augmented exponentials."""
    n = len(model.states)
    ramp = np.zeros((n + 2, n + 2))
    ramp[:n, :n], ramp[:n, n], ramp[n, n + 1] = model.A, model.B[:, 0], 1.0 / RAMP_S
    hold = np.zeros((n + 1, n + 1))
    hold[:n, :n], hold[:n, n] = model.A, model.B[:, 0]
    start = np.r_[np.zeros(n), 0.0, 1.0]
    x_ramp_end = (expm(ramp * RAMP_S) @ start)[:n]
    rows = []
    for t in times:
        if t <= RAMP_S:
            z = expm(ramp * t) @ start
            x, u = z[:n], z[n]
        else:
            x, u = (expm(hold * (t - RAMP_S)) @ np.r_[x_ramp_end, 1.0])[:n], 1.0
        rows.append(model.C @ x + model.D[:, 0] * u)
    return np.array(rows)


def ngspice_response(netlist: str, nodes: list[str], stop_s: float, tmp_path: Path) -> np.ndarray:
    """ngspice's transient: columns time, v(node)... at its own time points."""
    body = "\n".join(line for line in netlist.splitlines() if not line.startswith("V1"))
    out = tmp_path / "out.txt"
    deck = tmp_path / "deck.cir"
    deck.write_text(f"""* acqd netlist check
Vg emf 0 PWL(0 0 {RAMP_S} 1)
Rsource emf in {SOURCE_OHM}
{body}
.options reltol=1e-10 abstol=1e-15 vntol=1e-13 chgtol=1e-20 trtol=1
.tran {stop_s / 100000} {stop_s} 0 {stop_s / 100000}
.control
set wr_singlescale
set wr_vecnames
run
wrdata {out} {' '.join(f'v({n})' for n in nodes)}
.endc
.end
""")
    # ngspice's batch mode exits 1 after a good run with no .print lines; the data file is the proof.
    done = subprocess.run([NGSPICE, "-b", str(deck)], capture_output=True, text=True, timeout=120)
    assert out.exists() and "No. of Data Rows" in done.stdout, done.stdout[-2000:] + done.stderr[-2000:]
    return np.loadtxt(out, skiprows=1)


@needs_ngspice
@pytest.mark.parametrize("name", list(NETWORKS))
def test_step_response_matches_ngspice(name, tmp_path):
    netlist, nodes = NETWORKS[name]
    model = netlist_model(netlist, "V1", SOURCE_OHM)
    slowest = 1.0 / min(abs(np.linalg.eigvals(model.A).real))
    reference = ngspice_response(netlist, nodes, min(5 * slowest, 2e-3), tmp_path)
    reference = reference[::max(1, len(reference) // 3000)]  # every k-th of ngspice's points, start to end
    ours = exact_response(model, reference[:, 0])
    for k, node in enumerate(nodes, start=1):
        error = np.max(np.abs(ours[:, model.output_index(f"v({node})")] - reference[:, k]))
        assert error <= 1e-6, f"{name} v({node}): {error:.3g} of the 1 V step"


def test_series_rlc_poles_are_the_textbook_pair():
    r, l, c = 22.0 + SOURCE_OHM, 3.3e-3, 100e-9
    model = netlist_model("V1 in 0\nR1 in a 22\nL1 a b 3.3m\nC1 b 0 100n", "V1", SOURCE_OHM)
    alpha = r / (2 * l)
    expected = [complex(-alpha, -math.sqrt(1 / (l * c) - alpha ** 2)), complex(-alpha, math.sqrt(1 / (l * c) - alpha ** 2))]
    poles = sorted(np.linalg.eigvals(model.A), key=lambda p: p.imag)
    np.testing.assert_allclose(poles, expected, rtol=1e-12)


def test_third_order_butterworth_ladder_poles_lie_on_the_unit_circle():
    # Source resistance 1 Ω is the generator's own; the netlist holds C 1 F, L 2 H, C 1 F and the 1 Ω load.
    model = netlist_model("V1 in 0\nC1 in 0 1\nL1 in out 2\nC2 out 0 1\nRload out 0 1", "V1", 1.0)
    poles = sorted(np.linalg.eigvals(model.A), key=lambda p: (p.imag, p.real))
    expected = sorted([-1.0, complex(-0.5, -math.sqrt(3) / 2), complex(-0.5, math.sqrt(3) / 2)],
                      key=lambda p: (complex(p).imag, complex(p).real))
    np.testing.assert_allclose(poles, expected, atol=1e-12)
    # and the doubly terminated ladder passes half the EMF at DC (a 1 Ω / 1 Ω divider, Ohm's law)
    i = model.output_index("v(out)")
    dc = model.D[i, 0] - model.C[i] @ np.linalg.solve(model.A, model.B[:, 0])
    assert dc == pytest.approx(0.5, rel=1e-12)


def test_states_are_named_capacitor_voltages_and_inductor_currents():
    model = netlist_model("V1 in 0\nR1 in a 22\nL1 a b 3.3m\nC1 b 0 100n", "V1")
    assert set(model.states) == {"v(C1)", "i(L1)"}
    assert {"v_src", "v(in)", "v(a)", "v(b)", "i(L1)", "i(R1)", "i(V1)"} <= set(model.outputs)


def test_parallel_capacitors_make_one_state():
    # Two capacitors across the same nodes hold one voltage: one state, C1 + C2 (parallel capacitance).
    model = netlist_model("V1 in 0\nR1 in a 1k\nC1 a 0 10n\nC2 a 0 22n", "V1", 0.0)
    assert len(model.states) == 1
    assert np.linalg.eigvals(model.A)[0].real == pytest.approx(-1 / (1e3 * 32e-9), rel=1e-12)


@pytest.mark.parametrize("text,value", [
    ("2.2m", 2.2e-3), ("47n", 47e-9), ("1k", 1e3), ("1meg", 1e6), ("1MEG", 1e6), ("100nF", 100e-9),
    ("4.7u", 4.7e-6), ("10p", 10e-12), ("1e3", 1e3), ("3", 3.0), ("1kohm", 1e3), ("2M", 2e-3),
])
def test_values_take_the_spice_suffixes(text, value):
    # The scale suffixes are SPICE's (common practice): M is milli, MEG mega, case-insensitive.
    assert parse_value(text) == pytest.approx(value, rel=1e-15)


@pytest.mark.parametrize("netlist,words", [
    ("V1 in 0\nR1 in a 10\nC1 a 0 1n\nV2 a 0 0", ["C1", "V2", "loop of capacitors and voltage sources"]),
    ("V1 in 0\nR1 in a 10\nV2 a b 0\nV3 b a 0\nR2 a 0 1k", ["V2", "V3", "loop of voltage sources"]),
    ("V1 in 0\nR1 in a 10\nL1 a b 1m\nL2 b 0 1m\nR2 a 0 1k\nI1 b 0 0", ["cut-set", "I1", "L1", "L2"]),
    ("V1 in 0\nR1 in a 10\nC1 a 0 1n\nR2 x y 1k", ["x", "y", "no connection to ground"]),
    ("V1 in 0\nR1 in a 10\nV2 a a 0\nC1 a 0 1n", ["V2", "shorted"]),
    ("V1 in 0\nR1 in a 10\nV2 a b 5\nC1 b 0 1n", ["V2", "only the generator's source may be non-zero"]),
    ("V1 in 0\nR1 in a ten", ["line 2", "R1", "not a number"]),
    ("V1 in 0\nQ1 a b c model", ["line 2", "unknown element letter"]),
    ("V1 in 0\nL1 in a 1m\nL2 a 0 1m\nK1 L1 L3 0.9", ["K1", "'L3' is not an inductor"]),
    ("V1 in 0\nL1 in a 1m\nL2 a 0 1m\nK1 L1 L2 1.0", ["K1", "between 0 and 1"]),
    ("V1 in 0\nR1 in a 1k\nC1 a 0 1n\n.tran 1u 1m", ["line 4", "no dot-commands"]),
])
def test_each_singular_or_malformed_circuit_is_one_error_naming_elements(netlist, words):
    with pytest.raises(NetlistError) as info:
        Netlist.parse(netlist, "V1").model()
    for word in words:
        assert word in str(info.value), str(info.value)


def test_the_generator_source_must_exist():
    with pytest.raises(NetlistError, match="'Vgen' is not a voltage source.*V1"):
        Netlist.parse("V1 in 0\nR1 in 0 1k", "Vgen")


def test_a_profile_dut_table_builds_the_netlist_and_overrides_values():
    table = {"model": "netlist", "netlist": "V1 in 0\nR1 in a 22\nL1 a b 3.3m\nC1 b 0 100n", "source": "V1",
             "L1": 3.0e-3}
    model = build_model(table, "kt9.toml [dut]")
    assert model.parameters["L1"] == 3.0e-3
    with pytest.raises(ConfigError) as info:
        build_model({**table, "L9": 1.0}, "kt9.toml [dut]")
    assert "L9" in str(info.value) and "R1, L1, C1" in str(info.value)


# The built-in circuits as a person would draw them, with the outputs of each built-in named by its netlist
# equivalent. The built-in builders stay (they are what the simulated bench and older profiles use); this
# proves each equal to its netlist, output by output, through the transfer function C (sI − A)⁻¹ B + D,
# which does not depend on how either model chose its states (any linear-systems text: the transfer
# function is invariant under a change of state coordinates).
BUILT_IN_AS_NETLIST = {
    "series_rlc": ({"r_ohm": 22.0, "l_h": 3.3e-3, "c_f": 100e-9},
                   "V1 in 0\nR1 in mid 22\nL1 mid out 3.3m\nC1 out 0 100n",
                   {"v_src": "v_src", "v_rl": "v(mid)", "v_c": "v(out)", "i_l": "i(L1)"}),
    "parallel_rlc": ({"r_ohm": 470.0, "l_h": 1.5e-3, "c_f": 220e-9},
                     "V1 in 0\nR1 in 0 470\nL1 in 0 1.5m\nC1 in 0 220n",
                     {"v_src": "v_src", "v_c": "v(in)", "i_l": "i(L1)"}),
    "rc_lowpass": ({"r_ohm": 1000.0, "c_f": 47e-9}, "V1 in 0\nR1 in out 1k\nC1 out 0 47n",
                   {"v_src": "v_src", "v_c": "v(out)", "i_c": "i(R1)"}),
    "series_rl": ({"r_ohm": 68.0, "l_h": 10e-3}, "V1 in 0\nR1 in mid 68\nL1 mid 0 10m",
                  {"v_src": "v_src", "v_rl": "v(mid)", "i_l": "i(L1)"}),
}


def transfer(model, output: str, s: complex) -> complex:
    k = model.output_index(output)
    n = model.A.shape[0]
    return complex((model.C[k] @ np.linalg.solve(s * np.eye(n) - model.A, model.B[:, 0])) + model.D[k, 0])


@pytest.mark.parametrize("name", list(BUILT_IN_AS_NETLIST))
def test_each_built_in_circuit_equals_its_netlist(name):
    values, netlist, outputs = BUILT_IN_AS_NETLIST[name]
    built_in = build_model({"model": name, **values, "source_resistance_ohm": SOURCE_OHM}, "test")
    drawn = netlist_model(netlist, "V1", SOURCE_OHM)
    assert built_in.A.shape == drawn.A.shape  # the same number of states (one per C and L)
    np.testing.assert_allclose(np.sort_complex(np.linalg.eigvals(built_in.A)),
                               np.sort_complex(np.linalg.eigvals(drawn.A)), rtol=1e-9)
    corner = max(abs(np.linalg.eigvals(built_in.A)))
    points = [0.0, *(1j * corner * f for f in (0.01, 0.3, 1.0, 3.0, 100.0))]
    for ours, theirs in outputs.items():
        a = np.array([transfer(built_in, ours, s) for s in points])
        b = np.array([transfer(drawn, theirs, s) for s in points])
        # relative to the output's largest response: v_rl has a zero at resonance, where both are ~1e-16
        np.testing.assert_allclose(a, b, rtol=0, atol=1e-9 * np.max(np.abs(a)), err_msg=f"{name} {ours}")
