"""Levenberg–Marquardt on an exact Jacobian: the one solver loop of the comparator's least-squares fits.

Why our own loop rather than ``scipy.optimize.least_squares``: every fit here has a handful of unknowns
and an exact Jacobian from the caller, so a step is one small symmetric solve of the normal equations
JᵀJ·δ = −Jᵀr (p × p). The general solver decomposes the whole m × p Jacobian at every step (its 'trf'
method an SVD of the 45,000 × 4 matrix of a demo fit, about as long as the model evaluation that gave it)
and spends more on its set-up and checks than the damped fits' arithmetic on their 600 block means.

The normal equations square the Jacobian's condition number, but only the direction of a step comes from
them: the gradient Jᵀr is formed directly, each trial point's cost is evaluated exactly, and a step is
taken only when it lowers that cost, so an inexact direction costs at most another step (the iteration
refines it) and never moves the optimum. The fits that use it hold back every direction a rank test finds
flat (``fit``), or have two well-scaled unknowns (``transient``).

The loop: Marquardt's diagonal scaling (Marquardt 1963, J. SIAM 11(2):431–441: the damped system is
(JᵀJ + μ·diag(JᵀJ))·δ = −Jᵀr, so μ is a share of each direction's own curvature and the step does not
depend on the units of the coordinates), μ starting at 10⁻³ unless the caller says otherwise, divided by
10 after a step that lowered the cost and multiplied by 10 after one that did not, and MINPACK's stopping
tests at ``tolerance`` (a relative reduction of the cost or a relative step below it, or a gradient
orthogonal to the residual within it). A caller may also say when the undamped (Gauss–Newton) step from
the current point is small enough to be taken on the linearised residual (``negligible``): the loop then
ends at the step's end, with the residual r + J·δ and the Jacobian (and ``extra``) of the last evaluated
point, instead of evaluating the model once more. Near the optimum Gauss–Newton converges quadratically
on a small-residual problem, so what that leaves is of the order of the step squared.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from scipy.linalg.lapack import dposv

DAMPING_START = 1e-3  # the first damping, a share of each direction's own curvature (common practice)
DAMPING_FACTOR = 10.0  # damping ÷ this after a step that lowered the cost, × it after one that did not
SCALE_FLOOR = 1e-12  # Marquardt's scaling of a direction never below this share of the largest


@dataclass(frozen=True)
class Solution:
    """Where the loop ended: the point, and the residual and Jacobian the caller's ``evaluate`` gave there
    (with ``extra``, whatever else it returned for that point)."""

    p: np.ndarray
    residual: np.ndarray
    jacobian: np.ndarray
    extra: object
    evaluations: int
    converged: bool
    reason: str


Evaluate = Callable[[np.ndarray], tuple[np.ndarray, np.ndarray, object]]


def solve_positive(matrix: np.ndarray, rhs: np.ndarray) -> np.ndarray | None:
    """matrix⁻¹·rhs for a small symmetric positive-definite matrix, by LAPACK's Cholesky solver (dposv);
    None when the matrix is not positive definite (a flat direction). Called straight: on these 2 × 2 to
    4 × 4 systems ``numpy.linalg.solve``'s checks and conversions cost several times the solve, and the
    damped fits of one comparison make some two hundred of them."""
    _, solution, info = dposv(matrix, rhs)
    return solution if info == 0 else None


def _gauss_newton_step(hess: np.ndarray, grad: np.ndarray) -> np.ndarray | None:
    step = solve_positive(hess, grad)
    return None if step is None else -step


def _norm(v: np.ndarray) -> float:
    """The Euclidean norm of a short vector (``np.linalg.norm``'s checks cost more than the sum here)."""
    return math.sqrt(float(v @ v))


def levenberg_marquardt(evaluate: Evaluate, p0: np.ndarray, *, tolerance: float, max_evaluations: int,
                        negligible: Callable[[np.ndarray, np.ndarray, np.ndarray, float], bool] | None = None,
                        damping_start: float = DAMPING_START,
                        refused: tuple[type[Exception], ...] = ()) -> Solution:
    """Minimise |r(p)|² from ``p0``; ``evaluate(p)`` returns (r, ∂r/∂p, extra) at p, or raises.

    ``negligible(p, step, JᵀJ, cost)``, if given, is asked about the Gauss–Newton step at each point before
    the damped one is tried; True ends the loop with that step taken unevaluated. ``damping_start`` is
    the first μ; a caller that starts near its optimum (where the full Gauss–Newton step is right) gives
    less, and the first step refused raises it at once to at least the usual ``DAMPING_START``. The
    result says whether a stopping test was met (``converged``) and which.

    An exception of a ``refused`` type raised at a trial point (a model that cannot be built there, values
    that are not finite) refuses that step like a higher cost, as scipy's trust-region solvers treat a
    non-finite trial: a long Gauss–Newton step on a record far from the model must not end the fit when a
    shorter, damped one would have gone on. At the start point it is raised to the caller.
    """
    p = np.asarray(p0, dtype=float)
    residual, jac, extra = evaluate(p)
    evaluations, cost, damping = 1, float(residual @ residual), None

    def done(converged: bool, reason: str) -> Solution:
        return Solution(p, residual, jac, extra, evaluations, converged, reason)

    while evaluations < max_evaluations:
        grad, hess = jac.T @ residual, jac.T @ jac
        diagonal = hess.diagonal()
        scale = np.maximum(diagonal, SCALE_FLOOR * float(diagonal.max()))  # a flat direction stays solvable
        if cost == 0 or np.max(np.abs(grad) / np.sqrt(scale * cost + 1e-300)) <= tolerance:
            return done(True, "the residual is orthogonal to every direction the parameters move it")
        if negligible is not None:
            full = _gauss_newton_step(hess, grad)
            if full is not None and negligible(p, full, hess, cost):
                p, residual = p + full, residual + jac @ full
                return done(True, "the last Gauss-Newton step was small enough to take on the linearised "
                                  "residual")
        damping = damping_start if damping is None else damping
        damped = hess.copy()
        damped.flat[::len(p) + 1] += damping * scale
        step = _gauss_newton_step(damped, grad)
        if step is None:
            return done(False, "the damped normal equations are singular")
        small_step = _norm(step) <= tolerance * (_norm(p) + tolerance)
        trial = p + step
        evaluations += 1
        try:
            trial_residual, trial_jac, trial_extra = evaluate(trial)
            trial_cost = float(trial_residual @ trial_residual)
        except refused:
            trial_cost = math.inf
        if not trial_cost < cost:  # also refuses a cost that is not a number
            if small_step:
                return done(True, "no smaller step lowers the cost: the optimum, to the tolerance")
            damping = max(damping * DAMPING_FACTOR, DAMPING_START)  # a refused light step: at once the usual damping
            continue
        reduced_little = cost - trial_cost <= tolerance * cost
        p, residual, jac, extra, cost = trial, trial_residual, trial_jac, trial_extra, trial_cost
        damping /= DAMPING_FACTOR
        if small_step:
            return done(True, "the step changed the parameters by less than the tolerance")
        if reduced_little:
            return done(True, "the step lowered the cost by less than the tolerance")
    return done(False, f"no stopping test met in {max_evaluations} evaluations")
