"""Continuous-time linear state-space models and their exact discretisation.

Why exact discretisation: for an input that is piecewise constant (zero-order hold) or piecewise linear
(first-order hold) between samples, one matrix exponential of an augmented matrix gives the sampled
response with no truncation error, and stepping it is far cheaper than a general ODE solver.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy.linalg import expm
from scipy.signal import lfilter

HOLDS = ("zoh", "foh")


@dataclass(frozen=True)
class StateSpace:
    """dx/dt = A x + B u, y = C x + D u with named states, inputs and outputs (units in SI)."""

    A: np.ndarray
    B: np.ndarray
    C: np.ndarray
    D: np.ndarray
    states: tuple[str, ...]
    inputs: tuple[str, ...]
    outputs: tuple[str, ...]
    state_units: tuple[str, ...] = ()
    output_units: tuple[str, ...] = ()
    parameters: dict[str, float] = field(default_factory=dict)

    def __post_init__(self) -> None:
        n, m, p = len(self.states), len(self.inputs), len(self.outputs)
        for name, mat, shape in (("A", self.A, (n, n)), ("B", self.B, (n, m)),
                                 ("C", self.C, (p, n)), ("D", self.D, (p, m))):
            if np.shape(mat) != shape:
                raise ValueError(f"matrix {name} has shape {np.shape(mat)}, expected {shape}")
            if not np.all(np.isfinite(mat)):
                raise ValueError(f"matrix {name} holds a value that is not finite")
            own = np.array(mat, dtype=float)  # a copy: the caller's array stays the caller's
            own.flags.writeable = False  # a model is a value: shared by caches, never changed in place
            object.__setattr__(self, name, own)

    def output_index(self, name: str) -> int:
        try:
            return self.outputs.index(name)
        except ValueError:
            raise KeyError(f"no output {name!r}; outputs are {list(self.outputs)}") from None

    def output_unit(self, name: str) -> str:
        return self.output_units[self.output_index(name)] if self.output_units else ""

    def steady_state(self, u: np.ndarray | float) -> np.ndarray:
        """The equilibrium state for a constant input: solve A x = −B u (least squares if A is singular)."""
        u = np.atleast_1d(np.asarray(u, dtype=float))
        x, *_ = np.linalg.lstsq(self.A, -self.B @ u, rcond=None)
        return x


@dataclass(frozen=True)
class Discrete:
    """x[k+1] = Ad x[k] + B0 u[k] + B1 u[k+1]; B1 is zero for a zero-order hold."""

    Ad: np.ndarray
    B0: np.ndarray
    B1: np.ndarray
    dt: float


def discretise(model: StateSpace, dt: float, hold: str = "foh") -> Discrete:
    """Exact discretisation over one interval ``dt`` from a single exponential of an augmented matrix.

    ZOH: expm([[A, B], [0, 0]]·dt) = [[Ad, Γ0], [0, I]].
    FOH: expm([[A, B, 0], [0, 0, I/dt], [0, 0, 0]]·dt) = [[Ad, Γ1, Γ2], ...]; with u ramping linearly
    from u[k] to u[k+1], x[k+1] = Ad x[k] + (Γ1 − Γ2) u[k] + Γ2 u[k+1].
    """
    if hold not in HOLDS:
        raise ValueError(f"hold must be one of {HOLDS}, not {hold!r}")
    if not (dt > 0 and np.isfinite(dt)):
        raise ValueError(f"sample interval must be a positive number of seconds, not {dt!r}")
    n, m = model.B.shape
    if hold == "zoh":
        aug = np.zeros((n + m, n + m))
        aug[:n, :n], aug[:n, n:] = model.A, model.B
        e = expm(aug * dt)
        return Discrete(e[:n, :n], e[:n, n:], np.zeros((n, m)), dt)
    aug = np.zeros((n + 2 * m, n + 2 * m))
    aug[:n, :n] = model.A
    aug[:n, n:n + m] = model.B
    aug[n:n + m, n + m:] = np.eye(m) / dt
    e = expm(aug * dt)
    g1, g2 = e[:n, n:n + m], e[:n, n + m:]
    return Discrete(e[:n, :n], g1 - g2, g2, dt)


def with_sensitivities(model: StateSpace, d_a: list[np.ndarray], d_b: list[np.ndarray]) -> StateSpace:
    """The model with the sensitivity states ∂x/∂p_j appended, one block per parameter, and no outputs.

    Differentiating dx/dt = A x + B u by p_j gives ds_j/dt = A s_j + (∂A/∂p_j) x + (∂B/∂p_j) u: a block
    lower-triangular system whose exponential holds the derivative of the state transition in its
    off-diagonal blocks (Van Loan 1978, "Computing integrals involving the matrix exponential", IEEE
    Trans. Autom. Control 23(3):395–404). So one discretisation and one propagation of this system give
    the response and its exact derivative by every parameter, where finite differences need two
    simulations per parameter and are only as accurate as their step allows. Its rest state is the
    model's rest state with the rest state's own derivatives below it, so a step from rest needs nothing
    more.
    """
    n, blocks = len(model.states), len(d_a) + 1
    a = np.kron(np.eye(blocks), model.A)
    for j, (da, db) in enumerate(zip(d_a, d_b), start=1):
        a[j * n:(j + 1) * n, :n] = da
    b = np.vstack([model.B, *d_b])
    states = tuple(f"d{s}/dp{j}" if j else s for j in range(blocks) for s in model.states)
    return StateSpace(a, b, np.zeros((0, n * blocks)), np.zeros((0, b.shape[1])), states=states,
                      inputs=model.inputs, outputs=())


def propagate(disc: Discrete, u: np.ndarray, x0: np.ndarray, u_left: np.ndarray | None = None) -> np.ndarray:
    """States at every sample for the input samples ``u`` (shape (N,) or (N, m)), starting at ``x0``.

    ``u_left`` gives the input's left limits at the samples where it jumps (a zero-time edge on a sample
    instant): interval k is then driven from ``u[k]`` to ``u_left[k+1]``. Without it the input is continuous.

    A step test's input is constant for long runs (before the edge, after it), and there the state has a
    closed form, the powers of one matrix, evaluated for a whole run as one matrix product written
    straight into the result (``_constant_run``). Any other input goes through the general recursion
    (``_recursion``). Finding the runs is one comparison of neighbouring input samples: with the product,
    the only passes over the whole length.
    """
    u = _as_columns(u)
    ends = u if u_left is None else _as_columns(u_left)
    x = np.empty((u.shape[0], len(x0)))
    x[0] = np.asarray(x0, dtype=float)
    if len(u) < 2:
        return x
    starts_, ends_ = u[:-1], ends[1:]  # interval k is driven from starts_[k] to ends_[k]
    u_changes = _row_changes(u)
    flags = u_changes[:-1]  # flags[k−1]: interval k's drive differs from interval k−1's
    if disc.B1.any():  # a first-order hold: the drive changes where either end does
        end_changes = u_changes if u_left is None else _row_changes(ends)
        flags = flags | end_changes[1:]
    changes = np.flatnonzero(flags) + 1 if flags.any() else []  # (any() is a quicker pass than flatnonzero)
    if len(changes) > MAX_CONSTANT_RUNS:
        return _recursion(disc.Ad, starts_ @ disc.B0.T + ends_ @ disc.B1.T, x[0], x)
    for a, b in zip([0, *changes], [*changes, len(starts_)]):  # the drive is constant over intervals a..b-1
        d = disc.B0 @ starts_[a] + disc.B1 @ ends_[a]
        if b - a < MIN_CONSTANT_RUN:
            _recursion(disc.Ad, np.broadcast_to(d, (b - a, len(d))), x[a], x[a:b + 1])
        else:
            _constant_run(disc.Ad, d, x[a:b + 1])
    return x


def _row_changes(v: np.ndarray) -> np.ndarray:
    """changes[k] is True where row k+1 of ``v`` differs from row k (one pass per column)."""
    if v.shape[1] == 0:
        return np.zeros(len(v) - 1, dtype=bool)
    changes = v[1:, 0] != v[:-1, 0]
    for column in v.T[1:]:
        changes |= column[1:] != column[:-1]
    return changes


MAX_CONSTANT_RUNS = 16  # more runs than this: a sampled input, for the general recursion
MIN_CONSTANT_RUN = 64  # shorter runs are cheaper stepped than set up


def _constant_run(ad: np.ndarray, d: np.ndarray, out: np.ndarray) -> None:
    """Fill ``out[1:]`` from ``out[0]`` for a constant drive ``d`` (``out`` one C-contiguous block).

    With the state extended by a constant 1, z = (x, 1), the recursion is z[k+1] = Ā z[k] with
    Ā = [[Ad, d], [0, 1]], so x[jB + k] = (Ā^k z_j)[:n] where z_j = Ā^{jB} z[0], B = ⌈√N⌉. That needs no
    equilibrium (an integrator, whose Ad has an eigenvalue 1, has none) and keeps z's last entry exactly 1.
    B powers of Ā and N/B block starts come by repeated doubling (about log2 N small products); then the
    (N/B × n+1)·(n+1 × B·n) product writes the states of every whole block in sample order straight into
    ``out`` (a second, small product the last part-block). For a long record that product is the whole
    cost. It runs a few block rows at a time (``_BYTES_PER_PRODUCT`` of states each) because the BLAS
    first clears its output and then adds to it: over the whole length that is two passes through
    memory, over a part that stays in the core's cache one. Ā^0 is exactly I, so ``out[0]`` comes back
    unchanged.
    """
    n_samples, n = out.shape
    a_bar = np.zeros((n + 1, n + 1))
    a_bar[:n, :n], a_bar[:n, n], a_bar[n, n] = ad, d, 1.0
    block = math.isqrt(n_samples - 1) + 1  # ⌈√N⌉
    powers = _right_powers(np.eye(n + 1), a_bar, block)  # Ā^0 .. Ā^(B-1)
    z0 = np.append(out[0], 1.0)
    starts = _right_powers(z0[None, :], (powers[-1] @ a_bar).T, -(-n_samples // block))[:, 0]  # z_j as rows
    # weights[b, k·n + a] = (Ā^k)[a, b], so (starts @ weights)[j, k·n + a] = x[jB + k, a]
    weights = powers[:, :n].transpose(2, 0, 1).reshape(n + 1, block * n)
    full = n_samples // block
    rows = out[:full * block].reshape(full, block * n)
    step = max(1, _BYTES_PER_PRODUCT // weights[0].nbytes)
    for first in range(0, full, step):
        last = min(first + step, full)
        np.matmul(starts[first:last], weights, out=rows[first:last])
    rest = n_samples - full * block
    if rest:
        out[full * block:] = (starts[full] @ weights[:, :rest * n]).reshape(rest, n)


_BYTES_PER_PRODUCT = 128 * 1024  # of states written by one product in ``_constant_run``: well inside a core's L2


def _right_powers(first: np.ndarray, step: np.ndarray, count: int) -> np.ndarray:
    """first · step^k for k = 0 .. count−1, shape (count, *first.shape), doubling the filled part each pass.

    Each pass is one 2-D product of all the rows filled so far by step^filled (the items stacked as rows),
    so log2(count) products in all, where a stack of small products would cost a BLAS call per item.
    """
    rows, n = first.shape
    seq = np.empty((count, rows, n))
    flat = seq.reshape(count * rows, n)
    seq[0] = first
    filled = 1
    while filled < count:
        take = min(filled, count - filled)
        np.matmul(flat[:take * rows], step, out=flat[filled * rows:(filled + take) * rows])
        filled += take
        step = step @ step
    return seq


def _recursion(ad: np.ndarray, drive: np.ndarray, x0: np.ndarray, out: np.ndarray) -> np.ndarray:
    """x[k+1] = Ad x[k] + drive[k] into ``out`` (out[0] = x0), for any input.

    It runs in modal coordinates, one first-order IIR filter per eigenvalue through ``scipy.signal.lfilter``
    (a C loop). When Ad is defective or its eigenvectors are ill-conditioned (a critically damped circuit),
    it falls back to the plain loop.
    """
    eigvals, vecs = np.linalg.eig(ad)
    out[0] = x0
    if np.linalg.cond(vecs) < 1e8:
        inv = np.linalg.inv(vecs)
        z_drive = drive @ inv.T
        z0 = inv @ x0
        z = np.empty((len(drive) + 1, len(eigvals)), dtype=complex)
        z[0] = z0
        for i, lam in enumerate(eigvals):
            # z[k+1] = lam z[k] + d[k]: the filter b=[1, 0], a=[1, -lam] whose state starts at lam·z0
            z[1:, i], _ = lfilter([1.0, 0.0], [1.0, -lam], z_drive[:, i], zi=[lam * z0[i]])
        out[:] = (z @ vecs.T).real
    else:
        for k in range(len(drive)):
            out[k + 1] = ad @ out[k] + drive[k]
    return out


def _as_columns(u: np.ndarray) -> np.ndarray:
    u = np.asarray(u, dtype=float)
    return u[:, None] if u.ndim == 1 else u


def simulate(model: StateSpace, u: np.ndarray, dt: float, x0: np.ndarray | None = None,
             hold: str = "foh") -> tuple[np.ndarray, np.ndarray]:
    """Sampled states and outputs for input samples ``u`` at interval ``dt``: returns (x, y)."""
    u2 = _as_columns(u)
    if x0 is None:
        x0 = np.zeros(len(model.states))
    x = propagate(discretise(model, dt, hold), u2, x0)
    y = x @ model.C.T + u2 @ model.D.T
    return x, y
