"""Any linear DUT from its netlist: modified nodal analysis, reduced to a proper state-space model.

The netlist is written the way the trade has written circuits for decades (SPICE-style element lines):

    R1 in mid 22          resistor, ohms          L1 mid out 3.3m       inductor, henries
    C1 out 0 100n         capacitor, farads       K1 L1 L2 0.98         coupling of two inductors
    V1 in 0               independent source      I1 a b 0              independent current source
    E1 p n cp cn 10       voltage-controlled voltage source (gain)
    G1 p n cp cn 1m       voltage-controlled current source (transconductance, siemens)

Node ``0`` is ground; values take the usual suffixes (f p n u µ m k meg g t, case-insensitive; letters
after them are ignored, so ``100nF`` and ``1kohm`` read as meant); ``*`` starts a comment line, ``;`` a
comment to the end of a line, ``+`` continues the previous line, and ``.end`` is optional.

One voltage source is the generator's EMF (its name given): its value is the model's input, and the
generator's own output resistance is put in series with it, as in the built-in models. Every other
independent source must be 0 (a 0 V source is the usual way to measure a current), because acqd's models
have one input. The outputs are ``v_src`` (the generator's terminal), ``v(node)`` for every node, and
``i(name)`` for every resistor, inductor, voltage source and controlled voltage source (SPICE's sign: the
current flowing into the element's first node).

MNA gives the descriptor form C·x' + G·x = B·u over node voltages and branch currents. Splitting C by its
singular value decomposition separates the dynamic part from the algebraic equations; eliminating the
latter gives x' = A x + B u, which exists only when the algebraic part is solvable on its own (a circuit
of index one). The topological causes of failure are checked first, so that the error names elements:
a loop of capacitors and voltage sources, a cut-set of inductors and current sources, a node with no
path to ground, a source shorted on itself.
"""

from __future__ import annotations

import math
import re
from decimal import Decimal
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, replace

import numpy as np

from .statespace import StateSpace

GROUND = "0"
TERMINAL = "v_src"
# Scale suffixes as powers of ten, so "47n" reads as the float nearest 47e-9 (47 × 1e-9 is one ulp off).
SCALES = {"f": -15, "p": -12, "n": -9, "u": -6, "µ": -6, "m": -3, "k": 3, "meg": 6, "g": 9, "t": 12}
_VALUE = re.compile(r"^([+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?)(meg|[fpnuµmkgt])?[a-zA-Zµ]*$", re.IGNORECASE)
_NODE = re.compile(r"^[A-Za-z0-9_.]+$")
KINDS = {"R": 4, "L": 4, "C": 4, "V": None, "I": None, "K": 4, "E": 6, "G": 6}  # fields per line
UNITS = {"R": "ohm", "L": "H", "C": "F", "K": "1", "E": "V/V", "G": "S", "V": "V", "I": "A"}
# Element values a fit may vary, and on which scale: passive parts are positive (fitted on a log scale).
POSITIVE = {"R", "L", "C"}
RANK_TOLERANCE = 1e-12
_GENERATOR_NODE = "_emf"  # internal node between the generator's EMF and its output resistance


class NetlistError(ValueError):
    """A netlist that cannot become a model; the text names the line or the elements at fault."""


# A part's value beyond any real one (1e15 ohm is a good insulator; 1e15 F or H no part at all): larger ones
# overflow the exact discretisation (a 1e300 ohm resistor failed in an SVD, and inside the simulated scope).
MAX_MAGNITUDE = 1e15
MAX_NAME_CHARS = 64  # an element's name, a node's or a value's: they end up in messages, fits and records


@dataclass(frozen=True)
class Element:
    name: str
    kind: str
    nodes: tuple[str, ...]      # two for a two-terminal element, four for E and G (out +, out −, in +, in −)
    value: float
    couples: tuple[str, str] = ()  # K: the two inductors
    line: int = 0


def parse_value(text: str) -> float:
    """``2.2m`` → 0.0022, ``47n`` → 4.7e-8, ``1meg`` → 1e6, ``100nF`` → 1e-7 (SPICE's scale suffixes)."""
    match = _VALUE.match(text.strip())
    if not match:
        raise ValueError(f"{text!r} is not a number with an optional scale suffix ({', '.join(SCALES)})")
    exponent = SCALES[match.group(2).lower()] if match.group(2) else 0
    value = float(Decimal(match.group(1)).scaleb(exponent))  # rounded once, from the exact decimal
    if not math.isfinite(value):
        raise ValueError(f"{text!r} is not a finite number")
    return value


def _logical_lines(text: str) -> Iterable[tuple[int, str]]:
    """(first line number, text) per element, comments removed and ``+`` continuations joined."""
    pending: tuple[int, str] | None = None
    for number, raw in enumerate(text.splitlines(), start=1):
        line = raw.split(";", 1)[0].strip()
        if not line or line.startswith("*"):
            continue
        if line.startswith("+"):
            if pending is None:
                raise NetlistError(f"line {number}: '+' continues nothing")
            pending = (pending[0], pending[1] + " " + line[1:].strip())
            continue
        if pending is not None:
            yield pending
        pending = (number, line)
    if pending is not None:
        yield pending


def parse_netlist(text: str) -> tuple[Element, ...]:
    """The elements of a netlist; one NetlistError naming the line for anything malformed."""
    elements: list[Element] = []
    seen: dict[str, int] = {}
    for number, line in _logical_lines(text):
        if line.lower() == ".end":
            break
        if line.startswith("."):
            raise NetlistError(f"line {number}: {line.split()[0]!r}: no dot-commands are read, only elements "
                               f"(the analysis is acqd's)")
        element = _element(number, line.split())
        key = element.name.upper()
        if key in seen:
            raise NetlistError(f"line {number}: {element.name} is already defined on line {seen[key]}")
        seen[key] = number
        elements.append(element)
    if not elements:
        raise NetlistError("holds no elements")
    _check_couplings(elements)
    return tuple(elements)


def _element(number: int, fields: list[str]) -> Element:
    name, kind = fields[0], fields[0][:1].upper()
    where = f"line {number}: {name}"
    if too_long := next((f for f in fields if len(f) > MAX_NAME_CHARS), None):
        raise NetlistError(f"line {number}: {too_long[:20]}...: {len(too_long):,} characters; an element's name, "
                           f"node or value has at most {MAX_NAME_CHARS}")
    if kind not in KINDS:
        raise NetlistError(f"{where}: unknown element letter {kind!r}; allowed: {', '.join(KINDS)}")
    if kind in "VI":
        rest = [f for f in fields[3:] if f.upper() != "DC"]
        if len(fields) < 3 or len(rest) > 1:
            raise NetlistError(f"{where}: write '{name} node+ node- [DC] [value]'")
        nodes, value_text = tuple(fields[1:3]), (rest[0] if rest else "0")
    else:
        if len(fields) != KINDS[kind]:
            shape = {"E": "n+ n- nc+ nc- gain", "G": "n+ n- nc+ nc- gm", "K": "L1 L2 k"}.get(kind, "node1 node2 value")
            raise NetlistError(f"{where}: write '{name} {shape}'")
        nodes, value_text = tuple(fields[1:-1]), fields[-1]
    try:
        value = parse_value(value_text)
    except ValueError as exc:
        raise NetlistError(f"{where}: {exc}") from None
    if kind == "K":
        if not 0 < abs(value) < 1:
            raise NetlistError(f"{where}: the coupling factor must lie between 0 and 1 (not 1: a perfect "
                               f"transformer has no state-space form), not {value:g}")
        return Element(name, kind, (), value, (nodes[0], nodes[1]), number)
    for node in nodes:
        if not _NODE.match(node):
            raise NetlistError(f"{where}: node {node!r} may hold only letters, digits, '_' and '.'")
    if kind in POSITIVE and not value > 0:
        raise NetlistError(f"{where}: the value must be greater than 0, not {value:g}")
    if abs(value) > MAX_MAGNITUDE:
        raise NetlistError(f"{where}: the value must be at most {MAX_MAGNITUDE:g} in magnitude, not {value:g}")
    return Element(name, kind, nodes, value, line=number)


def _check_couplings(elements: list[Element]) -> None:
    inductors = {e.name.upper() for e in elements if e.kind == "L"}
    for e in elements:
        if e.kind == "K":
            for target in e.couples:
                if target.upper() not in inductors:
                    raise NetlistError(f"line {e.line}: {e.name}: {target!r} is not an inductor of the netlist")
            if e.couples[0].upper() == e.couples[1].upper():
                raise NetlistError(f"line {e.line}: {e.name}: couples {e.couples[0]} with itself")


# ---------------------------------------------------------------------------------------------------
# Topology: the causes of a circuit with no state-space form, named by element
# ---------------------------------------------------------------------------------------------------

class _Components:
    """Union-find over node names."""

    def __init__(self) -> None:
        self.parent: dict[str, str] = {}

    def find(self, node: str) -> str:
        self.parent.setdefault(node, node)
        while self.parent[node] != node:
            self.parent[node] = self.parent[self.parent[node]]
            node = self.parent[node]
        return node

    def join(self, a: str, b: str) -> bool:
        """False when a and b were already joined (the new edge closes a loop)."""
        ra, rb = self.find(a), self.find(b)
        if ra == rb:
            return False
        self.parent[ra] = rb
        return True


def _branches(elements: Iterable[Element]) -> list[Element]:
    return [e for e in elements if e.kind != "K"]


def check_topology(elements: tuple[Element, ...], generator: str) -> None:
    """One NetlistError for the first structural fault, naming its elements."""
    branches = _branches(elements)
    for e in branches:
        if e.nodes[0] == e.nodes[1] and e.kind in "VIE":
            raise NetlistError(f"{e.name} is shorted: both its terminals are node {e.nodes[0]}")
    everything = _Components()
    for e in branches:
        for node in e.nodes:
            everything.join(e.nodes[0], node)
    everything.find(GROUND)
    floating = sorted(n for n in everything.parent if everything.find(n) != everything.find(GROUND))
    if floating:
        raise NetlistError(f"node(s) {', '.join(floating)} have no connection to ground (node 0)")
    _check_loops(branches, generator)
    _check_cutsets(branches)


def _check_loops(branches: list[Element], generator: str) -> None:
    """A loop of voltage sources, or of capacitors and at least one voltage source, fixes a voltage by
    the others: that capacitor has no state, and the source's current would need the input's derivative.
    A loop of capacitors alone is fine (parallel capacitors share one state)."""
    sources = [e for e in branches if e.kind in "VE" and e.name != generator]
    capacitors = [e for e in branches if e.kind == "C"]
    for base, what in (([], "voltage sources"), (capacitors, "capacitors and voltage sources")):
        joined = _Components()
        for c in base:
            joined.join(c.nodes[0], c.nodes[1])
        for k, e in enumerate(sources):
            a, b = e.nodes[0], e.nodes[1]
            if not joined.join(a, b):
                members = _loop_members(a, b, base + sources[:k])
                raise NetlistError(f"a loop of {what} ({', '.join(sorted(members + [e.name]))}) has no "
                                   f"state-space form: put a resistance in the loop")


def _loop_members(a: str, b: str, edges: list[Element]) -> list[str]:
    """Names of the elements on one path from a to b (breadth-first), to name a loop's members."""
    frontier, came = [a], {a: None}
    while frontier:
        node = frontier.pop(0)
        if node == b:
            break
        for e in edges:
            if node in e.nodes[:2]:
                other = e.nodes[1] if e.nodes[0] == node else e.nodes[0]
                if other not in came:
                    came[other] = (node, e.name)
                    frontier.append(other)
    names, node = [], b
    while came.get(node):
        node, name = came[node]
        names.append(name)
    return names


def _check_cutsets(branches: list[Element]) -> None:
    """Nodes joined to the rest only through inductors and current sources: their currents are not free."""
    rest = _Components()
    for e in branches:
        for node in e.nodes[:2]:
            rest.find(node)
        if e.kind not in "LIG":  # an E's controlling pair draws no current: only its output is an edge
            rest.join(e.nodes[0], e.nodes[1])
    ground = rest.find(GROUND)
    cut = sorted({e.name for e in branches if e.kind in "LIG"
                  and (rest.find(e.nodes[0]) == ground) != (rest.find(e.nodes[1]) == ground)})
    if cut:
        raise NetlistError(f"a cut-set of inductors and current sources ({', '.join(cut)}) has no state-space "
                           f"form: give the node(s) between them a resistive path to ground")


# ---------------------------------------------------------------------------------------------------
# Modified nodal analysis and the reduction
# ---------------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class _Descriptor:
    """C·x' + G·x = B·u over ``variables`` (node voltages, then branch currents)."""

    C: np.ndarray
    G: np.ndarray
    B: np.ndarray
    nodes: tuple[str, ...]
    currents: tuple[str, ...]  # element names whose branch current is a variable


def _assemble(elements: tuple[Element, ...], generator: str) -> _Descriptor:
    branches = _branches(elements)
    nodes = tuple(dict.fromkeys(n for e in branches for n in e.nodes if n != GROUND))
    currents = tuple(e.name for e in branches if e.kind in "LVE")
    index = {n: i for i, n in enumerate(nodes)}
    size = len(nodes) + len(currents)
    C, G, B = np.zeros((size, size)), np.zeros((size, size)), np.zeros((size, 1))
    row = {name: len(nodes) + k for k, name in enumerate(currents)}

    def stamp(matrix: np.ndarray, a: str, b: str, value: float) -> None:
        """A conductance-like ``value`` between nodes a and b (current leaving a = value·(va − vb))."""
        for p, q, sign in ((a, a, 1), (b, b, 1), (a, b, -1), (b, a, -1)):
            if p != GROUND and q != GROUND:
                matrix[index[p], index[q]] += sign * value

    def leave(node: str, column: int, value: float) -> None:
        if node != GROUND:
            G[index[node], column] += value

    def voltage(matrix: np.ndarray, r: int, a: str, b: str, value: float) -> None:
        """Row r gets value·(va − vb)."""
        if a != GROUND:
            matrix[r, index[a]] += value
        if b != GROUND:
            matrix[r, index[b]] -= value

    for e in branches:
        a, b = e.nodes[0], e.nodes[1]
        if e.kind == "R":
            stamp(G, a, b, 1.0 / e.value)
        elif e.kind == "C":
            stamp(C, a, b, e.value)
        elif e.kind == "G":
            for node, sign in ((a, 1.0), (b, -1.0)):
                if node != GROUND:
                    voltage(G, index[node], e.nodes[2], e.nodes[3], sign * e.value)
        elif e.kind == "I":
            if e.value != 0:
                raise NetlistError(f"{e.name}: only the generator's source may be non-zero (acqd's models "
                                   f"have one input); set it to 0 or remove it")
        else:  # L, V, E: a branch current variable and its own equation
            r = row[e.name]
            leave(a, r, 1.0)
            leave(b, r, -1.0)
            voltage(G, r, a, b, 1.0)
            if e.kind == "L":
                C[r, r] -= e.value
            elif e.kind == "E":
                voltage(G, r, e.nodes[2], e.nodes[3], -e.value)
            elif e.name == generator:
                B[r, 0] = 1.0
            elif e.value != 0:
                raise NetlistError(f"{e.name}: only the generator's source may be non-zero (acqd's models "
                                   f"have one input); set it to 0 (an ammeter) or remove it")
    inductors = {e.name.upper(): e for e in branches if e.kind == "L"}
    for k in (e for e in elements if e.kind == "K"):
        l1, l2 = (inductors[n.upper()] for n in k.couples)
        mutual = k.value * math.sqrt(l1.value * l2.value)
        C[row[l1.name], row[l2.name]] -= mutual
        C[row[l2.name], row[l1.name]] -= mutual
    return _Descriptor(C, G, B, nodes, currents)


def _reduce(d: _Descriptor) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """(A, B, X, Xu): x' = A z + B u on the dynamic coordinates z, and the MNA variables x = X z + Xu u."""
    U, s, Vt = np.linalg.svd(d.C)
    rank = int(np.sum(s > RANK_TOLERANCE * max(s[0] if s.size else 0.0, 1e-300)))
    V = Vt.T
    Gt, Bt = U.T @ d.G @ V, U.T @ d.B
    G11, G12, G21, G22 = Gt[:rank, :rank], Gt[:rank, rank:], Gt[rank:, :rank], Gt[rank:, rank:]
    if G22.size and np.linalg.cond(G22) > 1e12:
        raise NetlistError("the circuit's algebraic equations are singular (a controlled source or coupling "
                           "makes a loop or cut-set the topology checks cannot see)")
    solve = (lambda m: np.linalg.solve(G22, m)) if G22.size else (lambda m: np.zeros((0, m.shape[1])))
    K21, K2u = solve(G21), solve(Bt[rank:])
    S1 = s[:rank]
    A = -(G11 - G12 @ K21) / S1[:, None]
    B = (Bt[:rank] - G12 @ K2u) / S1[:, None]
    X = V[:, :rank] - V[:, rank:] @ K21
    Xu = V[:, rank:] @ K2u
    return A, B, X, Xu


def _physical_states(elements: tuple[Element, ...], d: _Descriptor,
                     X: np.ndarray) -> tuple[np.ndarray, list[str], list[str]]:
    """Rows that express capacitor voltages and inductor currents in z, the first independent ones chosen:
    named states read better on a trajectory plot than abstract coordinates."""
    rows, names, units = [], [], []
    index = {n: i for i, n in enumerate(d.nodes)}
    for e in _branches(elements):
        if e.kind == "C":
            r = np.zeros(X.shape[0])
            for node, sign in ((e.nodes[0], 1.0), (e.nodes[1], -1.0)):
                if node != GROUND:
                    r[index[node]] += sign
            candidate, name, unit = r @ X, f"v({e.name})", "V"
        elif e.kind == "L":
            candidate, name, unit = X[len(d.nodes) + d.currents.index(e.name)], f"i({e.name})", "A"
        else:
            continue
        trial = np.vstack([*rows, candidate])
        if np.linalg.matrix_rank(trial, tol=1e-9 * max(np.abs(trial).max(), 1e-300)) == len(rows) + 1:
            rows.append(candidate)
            names.append(name)
            units.append(unit)
    return np.array(rows).reshape(len(rows), X.shape[1]), names, units


@dataclass(frozen=True)
class Netlist:
    """A parsed netlist and the name of its generator source; ``model()`` builds the state-space form."""

    elements: tuple[Element, ...]
    generator: str

    @classmethod
    def parse(cls, text: str, generator: str) -> Netlist:
        elements = parse_netlist(text)
        sources = {e.name.upper(): e for e in elements if e.kind == "V"}
        if generator.upper() not in sources:
            named = ", ".join(e.name for e in sources.values()) or "none"
            raise NetlistError(f"the generator source {generator!r} is not a voltage source of the netlist "
                               f"(voltage sources: {named})")
        netlist = cls(elements, sources[generator.upper()].name)
        check_topology(elements, netlist.generator)
        return netlist

    def values(self) -> dict[str, float]:
        """Element values a table may override or a fit may vary, by element name."""
        return {e.name: e.value for e in self.elements if e.kind in "RLCKEG"}

    def units(self) -> dict[str, str]:
        return {e.name: UNITS[e.kind] for e in self.elements if e.kind in "RLCKEG"}

    def positive(self) -> set[str]:
        return {e.name for e in self.elements if e.kind in POSITIVE}

    def with_values(self, values: Mapping[str, float]) -> Netlist:
        known = {name.upper(): name for name in self.values()}
        for name in values:
            if name.upper() not in known:
                raise NetlistError(f"{name!r} is not an element of the netlist with a value; elements: "
                                   f"{', '.join(known.values())}")
        by_upper = {k.upper(): float(v) for k, v in values.items()}
        elements = tuple(replace(e, value=by_upper.get(e.name.upper(), e.value)) for e in self.elements)
        for e in elements:
            if e.kind in POSITIVE and not e.value > 0:
                raise NetlistError(f"{e.name}: the value must be greater than 0, not {e.value:g}")
        return Netlist(elements, self.generator)

    def with_source_resistance(self, source_resistance_ohm: float) -> tuple[Element, ...]:
        """The elements with the generator's output resistance between its EMF and its terminal."""
        if source_resistance_ohm == 0:
            return self.elements
        out = []
        for e in self.elements:
            if e.name == self.generator:
                out.append(replace(e, nodes=(_GENERATOR_NODE, e.nodes[1])))
                out.append(Element("_Rsource", "R", (_GENERATOR_NODE, e.nodes[0]), source_resistance_ohm))
            else:
                out.append(e)
        return tuple(out)

    def model(self, source_resistance_ohm: float = 50.0) -> StateSpace:
        if not (math.isfinite(source_resistance_ohm) and source_resistance_ohm >= 0):
            raise NetlistError(f"source_resistance_ohm must be zero or more, not {source_resistance_ohm!r}")
        elements = self.with_source_resistance(source_resistance_ohm)
        d = _assemble(elements, self.generator)
        A, B, X, Xu = _reduce(d)
        T, names, units = _physical_states(self.elements, d, X)
        if len(names) == A.shape[0]:
            T_inv = np.linalg.inv(T)
            A, B, X = T @ A @ T_inv, T @ B, X @ T_inv
        else:
            names = [f"x{k + 1}" for k in range(A.shape[0])]
            units = [""] * A.shape[0]
        C_rows, D_rows, outputs, output_units = self._outputs(elements, d, X, Xu)
        return StateSpace(A, B, np.array(C_rows).reshape(len(outputs), A.shape[0]),
                          np.array(D_rows).reshape(len(outputs), 1), states=tuple(names), inputs=("u_emf",),
                          outputs=tuple(outputs), state_units=tuple(units), output_units=tuple(output_units),
                          parameters={**self.values(), "source_resistance_ohm": source_resistance_ohm})

    def _outputs(self, elements: tuple[Element, ...], d: _Descriptor, X: np.ndarray,
                 Xu: np.ndarray) -> tuple[list[np.ndarray], list[float], list[str], list[str]]:
        index = {n: i for i, n in enumerate(d.nodes)}

        def node_row(node: str) -> tuple[np.ndarray, float]:
            if node == GROUND:
                return np.zeros(X.shape[1]), 0.0
            return X[index[node]], float(Xu[index[node], 0])

        rows: list[np.ndarray] = []
        feed: list[float] = []
        names: list[str] = []
        units: list[str] = []

        def add(name: str, row: np.ndarray, d_value: float, unit: str) -> None:
            rows.append(row)
            feed.append(d_value)
            names.append(name)
            units.append(unit)

        source = next(e for e in self.elements if e.name == self.generator)
        (cp, dp), (cn, dn) = node_row(source.nodes[0]), node_row(source.nodes[1])
        add(TERMINAL, cp - cn, dp - dn, "V")
        for node in d.nodes:
            if node != _GENERATOR_NODE:
                add(f"v({node})", *node_row(node), "V")
        for e in _branches(elements):
            if e.kind in "LVE" and e.name != "_Rsource":
                k = len(d.nodes) + d.currents.index(e.name)
                add(f"i({e.name})", X[k], float(Xu[k, 0]), "A")
            elif e.kind == "R" and e.name != "_Rsource":
                (ca, da), (cb, db) = node_row(e.nodes[0]), node_row(e.nodes[1])
                add(f"i({e.name})", (ca - cb) / e.value, (da - db) / e.value, "A")
        return rows, feed, names, units


def netlist_model(netlist: str, source: str, source_resistance_ohm: float = 50.0,
                  **values: float) -> StateSpace:
    """The registry's builder: ``[dut] model = "netlist"``, its text, the generator source's name, and
    element values by name (a fit's parameters; the netlist's own values otherwise)."""
    return Netlist.parse(netlist, source).with_values(values).model(source_resistance_ohm)
