"""The DUT plant behind the simulated bench: exact node values around one stimulus edge.

The generator drives the plant with a square wave of open-circuit voltage (EMF). The scope asks for a
window of samples around one edge; this module answers with the noise-free, exactly discretised response
(no Euler steps), starting from the square wave's periodic steady state, so the pre-trigger baseline is
what a real bench would show after many periods. Edge ramps are followed exactly: sample intervals that
contain a ramp corner are split at the corner (first-order hold is exact for piecewise-linear input).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy.linalg import expm

from ..models.signal import Signal
from ..models.statespace import StateSpace, discretise, propagate


class Plant:
    """A linear DUT with one input (the generator EMF) and named outputs (nodes and currents)."""

    def __init__(self, model: StateSpace) -> None:
        if len(model.inputs) != 1:
            raise ValueError("the simulated bench drives a plant with exactly one input (the generator EMF)")
        self.model = model

    def window(self, *, emf_before: float, emf_after: float, half_period_s: float | None,
               sample_interval_s: float, n_samples: int, first_sample_s: float,
               edge_time_s: float, signals: Sequence[Signal]) -> list[np.ndarray]:
        """Each signal's value at first_sample_s + k·dt, t = 0 being the start of the captured edge."""
        dt = float(sample_interval_s)
        times = first_sample_s + np.arange(n_samples) * dt
        wave = _SquareWave(emf_before, emf_after, half_period_s, edge_time_s)
        x_start = self._state_at(times[0], wave)
        states = self._states_on_grid(times, wave, x_start)
        u = wave.value(times)
        return [states @ c + u * d for c, d in (signal.row(self.model) for signal in signals)]

    def _state_at(self, t: float, wave: _SquareWave) -> np.ndarray:
        """State at time t from the periodic steady state, propagated with the level that holds there.

        Edge ramps are neglected in the steady-state solution only (their effect has decayed by the
        window when the half period is long against the DUT's settling, the usual bench set-up).
        """
        start, level = wave.segment_start(t)
        x_level = self.model.steady_state(level)
        if not math.isfinite(start):  # a single step, still before it: at rest on the first level
            return x_level
        x_edge = self._periodic_state(wave, level)
        phi = expm(self.model.A * (t - start))
        return x_level + phi @ (x_edge - x_level)

    def _periodic_state(self, wave: _SquareWave, level_after: float) -> np.ndarray:
        """State at an edge into ``level_after`` in periodic steady state.

        With Φ = e^{A·T/2}, x_a, x_b the steady states of the level before and after the edge:
        x_e = Φ x_s + (I − Φ) x_a and x_s = Φ x_e + (I − Φ) x_b  ⇒  (I − Φ²) x_e = Φ(I − Φ) x_b + (I − Φ) x_a.
        """
        level_before = wave.other_level(level_after)
        x_a = self.model.steady_state(level_before)
        if wave.half_period_s is None:
            return x_a
        x_b = self.model.steady_state(level_after)
        eye = np.eye(len(x_a))
        phi = expm(self.model.A * wave.half_period_s)
        lhs = eye - phi @ phi
        if np.linalg.cond(lhs) > 1e12:  # undamped or integrating plant: no periodic steady state
            return x_a
        return np.linalg.solve(lhs, phi @ (eye - phi) @ x_b + (eye - phi) @ x_a)

    def _states_on_grid(self, times: np.ndarray, wave: _SquareWave, x0: np.ndarray) -> np.ndarray:
        """Propagate with first-order hold; intervals holding a ramp corner are split at the corner.

        Each interval is driven from the input's right limit at its start to its left limit at its end,
        so a zero-time edge that falls exactly on a sample instant is a clean jump, not a ramp.
        """
        dt = times[1] - times[0] if len(times) > 1 else 1.0
        disc = discretise(self.model, dt, "foh")
        u, u_left = wave.value(times), wave.value(times, left=True)
        states = np.empty((len(times), len(x0)))
        states[0] = x0
        inside = [c for c in wave.corners(times[0], times[-1])
                  if not np.isclose((c - times[0]) / dt, np.round((c - times[0]) / dt), rtol=0, atol=1e-9)]
        split = sorted({int((c - times[0]) // dt) for c in inside} & set(range(len(times) - 1)))
        k0 = 0
        for k in split:
            if k > k0:
                states[k0:k + 1] = propagate(disc, u[k0:k + 1], states[k0], u_left[k0:k + 1])
            states[k + 1] = self._split_step(states[k], times[k], times[k + 1], wave)
            k0 = k + 1
        if k0 < len(times) - 1:
            states[k0:] = propagate(disc, u[k0:], states[k0], u_left[k0:])
        return states

    def _split_step(self, x: np.ndarray, t0: float, t1: float, wave: _SquareWave) -> np.ndarray:
        points = sorted({t0, t1, *(c for c in wave.corners(t0, t1) if t0 < c < t1)})
        for a, b in zip(points[:-1], points[1:]):
            sub = discretise(self.model, b - a, "foh")
            ua = wave.value(np.array([a]))[0]
            ub = wave.value(np.array([b]), left=True)[0]
            x = sub.Ad @ x + sub.B0[:, 0] * ua + sub.B1[:, 0] * ub
        return x


@dataclass(frozen=True)
class _SquareWave:
    """EMF versus time: the captured edge starts at t = 0; edges every half period; linear ramps."""

    before: float
    after: float
    half_period_s: float | None
    edge_time_s: float

    def other_level(self, level: float) -> float:
        return self.before if level == self.after else self.after

    def _edge_index_range(self, t0: float, t1: float) -> range:
        if self.half_period_s is None:
            return range(0, 1) if t1 >= 0 >= t0 - self.edge_time_s else range(0)
        first = math.floor((t0 - self.edge_time_s) / self.half_period_s)
        last = math.floor(t1 / self.half_period_s)
        return range(first, last + 1)

    def _level_after_edge(self, j: int) -> float:
        return self.after if j % 2 == 0 else self.before

    def segment_start(self, t: float) -> tuple[float, float]:
        """(time of the latest edge start at or before t, the level that edge leads to)."""
        if self.half_period_s is None:
            return (0.0, self.after) if t >= 0 else (-math.inf, self.before)
        j = math.floor(t / self.half_period_s)
        return j * self.half_period_s, self._level_after_edge(j)

    def corners(self, t0: float, t1: float) -> np.ndarray:
        """Instants where the EMF changes slope (edge starts and ends) within [t0, t1]."""
        pts = []
        for j in self._edge_index_range(t0, t1):
            start = j * (self.half_period_s or 0.0)
            pts.extend((start, start + self.edge_time_s))
        return np.array([p for p in pts if t0 <= p <= t1])

    def value(self, t: np.ndarray, left: bool = False) -> np.ndarray:
        """EMF at instants t; with ``left`` the limit from the left (differs only at a zero-time edge)."""
        t = np.asarray(t, dtype=float)
        if self.half_period_s is None:
            j = np.where((t > 0) if left else (t >= 0), 0, -1)
        elif left:
            j = np.ceil(t / self.half_period_s).astype(np.int64) - 1
        else:
            j = np.floor(t / self.half_period_s).astype(np.int64)
        start = j * (self.half_period_s or 0.0)
        new = np.where(j % 2 == 0, self.after, self.before)
        old = np.where(j % 2 == 0, self.before, self.after)
        if self.edge_time_s > 0:
            frac = np.clip((t - start) / self.edge_time_s, 0.0, 1.0)
        else:
            frac = np.ones_like(t)
        if self.half_period_s is None:
            return np.where(j < 0, self.before, old + (new - old) * frac)
        return old + (new - old) * frac
