"""The stimulus the model is driven with: the generator's EMF around the captured edge, and its exact response.

Why not simply sample the EMF and call ``simulate``: a hold only reproduces a piecewise-linear input exactly
when its corners fall on sample instants. The scope triggers when the stimulus passes the trigger level, so
the edge sits at t = 0 only to within the trigger jitter, and a measured stimulus channel may place it
between samples. ``edge_response`` therefore steps exactly to each corner of the edge and back onto the
sample grid, so the response is exact for an edge at any instant and of any duration.

Convention: the EMF is a linear ramp from the 'before' to the 'after' level whose half-way point is at
``t50_s`` (0 = the trigger, which the step test sets half-way between the levels) and whose full duration is
the generator's 10–90 % edge time divided by 0.8 (a linear ramp spends 80 % of its duration between 10 %
and 90 %). Before the ramp the circuit rests in the steady state of the 'before' level.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
from scipy.optimize import minimize_scalar

from ..models import Discrete, StateSpace, discretise, propagate
from ..record import Stimulus
from .memo import Memo

RAMP_SHARE_10_90 = 0.8  # share of a linear ramp's duration spent between its 10 % and 90 % points
RESOLVED_SAMPLES = 2.0  # a ramp at least this many sample intervals long shows where it is between samples


@dataclass(frozen=True)
class Edge:
    """The generator's open-circuit voltage: ``before_v`` until the ramp, ``after_v`` after it."""

    before_v: float
    after_v: float
    t50_s: float = 0.0
    duration_s: float = 0.0

    @classmethod
    def from_stimulus(cls, stimulus: Stimulus) -> Edge:
        before, after = stimulus.levels_emf()
        return cls(before, after, 0.0, stimulus.edge_time_s / RAMP_SHARE_10_90)

    @property
    def start_s(self) -> float:
        return self.t50_s - self.duration_s / 2

    @property
    def end_s(self) -> float:
        return self.t50_s + self.duration_s / 2

    def resolved(self, dt: float) -> bool:
        """Whether samples dt apart can place this edge between samples (its ramp spans a few of them)."""
        return self.duration_s >= RESOLVED_SAMPLES * dt

    def emf(self, times: np.ndarray) -> np.ndarray:
        """EMF at ``times``; right-continuous at an ideal step (the 'after' level from t50 on)."""
        if self.duration_s == 0:
            return np.where(times >= self.t50_s, self.after_v, self.before_v)
        share = np.clip((times - self.start_s) / self.duration_s, 0.0, 1.0)
        return self.before_v + share * (self.after_v - self.before_v)


    def slope(self, times: np.ndarray) -> np.ndarray:
        """dEMF/dt at ``times``: the ramp's slope inside it, 0 outside (and everywhere for an ideal step)."""
        if self.duration_s == 0:
            return np.zeros(len(times))
        inside = (times > self.start_s) & (times < self.end_s)
        return np.where(inside, (self.after_v - self.before_v) / self.duration_s, 0.0)


def steady_state(model: StateSpace, u: float) -> np.ndarray:
    """The rest state for a constant EMF; refuses a model that has none (an integrator, a free oscillator)."""
    x = model.steady_state(u)
    scale = np.linalg.norm(model.A) * np.linalg.norm(x) + np.linalg.norm(model.B) * abs(u)
    if np.linalg.norm(model.A @ x + model.B[:, 0] * u) > 1e-9 * scale:
        raise ValueError("the model has no steady state for a constant input, so the pre-trigger rest "
                         "state is undefined; check its A matrix")
    return x


def edge_response(model: StateSpace, times: np.ndarray, edge: Edge) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(states, outputs, EMF) at uniformly spaced ``times`` for the edge, starting from rest (``edge_states``
    and the model's outputs from them)."""
    x, u = edge_states(model, times, edge)
    return x, x @ model.C.T + np.outer(u, model.D[:, 0]), u


def edge_states(model: StateSpace, times: np.ndarray, edge: Edge) -> tuple[np.ndarray, np.ndarray]:
    """(states, EMF) at uniformly spaced ``times`` for the edge, starting from rest: what the comparator
    needs, which builds its channels from the states itself (the model's own outputs would be work thrown
    away on every step of a fit).

    Exact up to rounding: the pre-edge part is the steady state, each corner of the ramp is reached with a
    fractional first-order-hold step, and the uniform stretches are propagated with one discretisation.
    Discretisations are shared between steps of equal length (an edge on a sample needs only one).
    """
    times = np.asarray(times, dtype=float)
    n = len(times)
    u = edge.emf(times)
    x = np.empty((n, len(model.states)))
    discs: dict[float, Discrete] = {}

    def disc(tau: float) -> Discrete:
        if tau not in discs:
            discs[tau] = discretise(model, tau, "foh")
        return discs[tau]

    def step(state: np.ndarray, tau: float, u0: float, u1: float) -> np.ndarray:
        """State after ``tau`` s with the EMF ramping linearly from u0 to u1 (first-order hold is exact)."""
        if tau <= 0:
            return state
        d = disc(tau)
        return d.Ad @ state + d.B0[:, 0] * u0 + d.B1[:, 0] * u1

    state = steady_state(model, edge.before_v)
    first = int(np.searchsorted(times, edge.start_s, side="right"))  # first sample after the ramp starts
    x[:first] = state
    if first < n:
        dt = times[1] - times[0] if n > 1 else 1.0
        in_ramp_end = int(np.searchsorted(times, edge.end_s, side="right")) if edge.duration_s > 0 else first
        t_prev, u_prev = edge.start_s, edge.before_v
        if in_ramp_end > first:  # samples inside the ramp
            x[first] = step(state, times[first] - edge.start_s, edge.before_v, u[first])
            x[first:in_ramp_end] = propagate(disc(dt), u[first:in_ramp_end], x[first])
            state, t_prev, u_prev = x[in_ramp_end - 1], times[in_ramp_end - 1], u[in_ramp_end - 1]
        state = step(state, edge.end_s - t_prev, u_prev, edge.after_v)
        if in_ramp_end < n:
            x[in_ramp_end] = step(state, times[in_ramp_end] - edge.end_s, edge.after_v, edge.after_v)
            x[in_ramp_end:] = propagate(disc(dt), u[in_ramp_end:], x[in_ramp_end])
    return x, u


_PADDED_PREDICTIONS = Memo()  # align_edge's prediction of the stimulus channel around the nominal edge


def align_edge(model: StateSpace, times: np.ndarray, edge: Edge, measured: np.ndarray,
               c_row: np.ndarray, d_value: float, search_s: float) -> Edge:
    """The edge moved in time so the model's prediction of a measured stimulus channel fits it best.

    The channel (say the generator's terminal) is *not* the EMF: after the source resistance it carries
    the DUT's loading. So the EMF's levels stay those the generator was set to, and only the instant is
    taken from the measurement, by least squares of measured against predicted over shifts within
    ±``search_s``: a scan in whole sample intervals, which is all an edge shorter than about two samples
    can tell (its samples only say between which two it happened), then, for a ramp spanning
    ``RESOLVED_SAMPLES`` or more, a bounded refinement between samples.
    """
    dt = times[1] - times[0]

    def cost(t50: float) -> float:
        x, u = edge_states(model, times, replace(edge, t50_s=t50))
        return float(np.sum((measured - x @ c_row - d_value * u) ** 2))

    nearest, span = int(np.argmin(np.abs(times - edge.t50_s))), int(np.ceil(search_s / dt))
    shifts = np.arange(max(0, nearest - span), min(len(times) - 1, nearest + span) + 1) - nearest
    # A whole-sample shift of the edge shifts the response by as many samples (the model is time-invariant
    # and starts at rest), so one response on a grid padded by the search span serves every candidate.
    n = len(times)

    def padded_prediction() -> np.ndarray:
        padded = times[0] + (np.arange(n + 2 * span) - span) * dt
        x, u = edge_states(model, padded, replace(edge, t50_s=float(times[nearest])))
        return x @ c_row + d_value * u

    # the same for every record of a run whose edge falls near the same sample: the grid is uniform, so its
    # start, step and length name it
    predicted = _PADDED_PREDICTIONS.get((model.A, model.B, c_row, d_value, float(times[0]), float(dt), n, span,
                                         replace(edge, t50_s=float(times[nearest]))), padded_prediction)
    costs = [float(np.sum((measured - predicted[span - s:span - s + n]) ** 2)) for s in shifts]
    best = float(times[nearest + shifts[int(np.argmin(costs))]])  # exactly on a sample, no rounding drift
    if edge.resolved(dt):
        best = float(minimize_scalar(cost, bounds=(best - dt, best + dt), method="bounded",
                                     options={"xatol": dt * 1e-3}).x)
    return replace(edge, t50_s=best)
