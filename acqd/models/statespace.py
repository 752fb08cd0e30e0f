"""Continuous-time linear state-space models and their exact discretisation.

Why exact discretisation: for an input that is piecewise constant (zero-order hold) or piecewise linear
(first-order hold) between samples, one matrix exponential of an augmented matrix gives the sampled
response with no truncation error, and stepping it is far cheaper than a general ODE solver.
"""

from __future__ import annotations

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


def propagate(disc: Discrete, u: np.ndarray, x0: np.ndarray, u_left: np.ndarray | None = None) -> np.ndarray:
    """States at every sample for the input samples ``u`` (shape (N,) or (N, m)), starting at ``x0``.

    ``u_left`` gives the input's left limits at the samples where it jumps (a zero-time edge on a sample
    instant): interval k is then driven from ``u[k]`` to ``u_left[k+1]``. Without it the input is continuous.

    The recursion runs in modal coordinates, one first-order IIR filter per eigenvalue through
    ``scipy.signal.lfilter`` (a C loop), so a million samples take milliseconds. When Ad is defective or its
    eigenvectors are ill-conditioned (a critically damped circuit), it falls back to the plain recursion.
    """
    u = _as_columns(u)
    ends = u if u_left is None else _as_columns(u_left)
    n_samples = u.shape[0]
    drive = u[:-1] @ disc.B0.T + ends[1:] @ disc.B1.T  # (N-1, n): what enters between k and k+1
    x0 = np.asarray(x0, dtype=float)
    eigvals, vecs = np.linalg.eig(disc.Ad)
    if np.linalg.cond(vecs) < 1e8:
        inv = np.linalg.inv(vecs)
        z_drive = drive @ inv.T
        z0 = inv @ x0
        z = np.empty((n_samples, len(eigvals)), dtype=complex)
        z[0] = z0
        for i, lam in enumerate(eigvals):
            # z[k+1] = lam z[k] + d[k]: the filter b=[1, 0], a=[1, -lam] whose state starts at lam·z0
            out, _ = lfilter([1.0, 0.0], [1.0, -lam], z_drive[:, i], zi=[lam * z0[i]])
            z[1:, i] = out
        x = (z @ vecs.T).real
    else:
        x = np.empty((n_samples, len(x0)))
        x[0] = x0
        for k in range(n_samples - 1):
            x[k + 1] = disc.Ad @ x[k] + drive[k]
    return x


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
