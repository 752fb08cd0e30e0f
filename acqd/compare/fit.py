"""Parameter identification: weighted least squares of measured against simulated channels.

Coordinates: a parameter that must be positive (R, L, C, ω_n, ζ) is fitted as its logarithm, so a step
is a relative change, the fit can never propose a negative component, and all coordinates are
dimensionless; a quantity of either sign is fitted as value / scale (a gain over |nominal|, an instant
over the sample interval).

What the data cannot determine is found before fitting, from the singular values of the Jacobian at the
nominal point: a singular value below 1e-6 of the largest marks a direction along which the residuals do
not change (with only v_C of a series RLC, L·C and R·C are all the data fix). One parameter in that
direction is then held at its nominal value — the caller's choice, else the model's documented default —
and the reason is recorded; nothing unidentifiable is fitted silently.

Uncertainty: covariance = s²·(JᵀJ)⁻¹ with the solver's Jacobian at the solution and s² the weighted
residual variance (sum of squares / (samples − parameters)); 95 % intervals use Student's t. On a log
coordinate the interval is exp(ln p ± t·se), so it is asymmetric about p. They assume white noise: a
scope's bandwidth limit correlates neighbouring samples, which makes them too narrow.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass

import numpy as np
from scipy.optimize import least_squares
from scipy.stats import t as student_t

from ..errors import AcqdError

RANK_RTOL = 1e-6  # singular values below this share of the largest count as zero
DIFF_STEP = 1e-4  # central-difference step on the (dimensionless) fit coordinates, for the rank test
PARTICIPATION_MIN = 0.1  # share of a null direction a parameter must carry to be a candidate to hold


class FitError(AcqdError):
    """The fit could not be set up (no free parameter left, a residual that is not finite)."""


@dataclass(frozen=True)
class Free:
    """One quantity to fit: its starting value and coordinate (ln for a positive one, else value / scale)."""

    start: float
    log: bool
    scale: float = 1.0
    unit: str = ""


@dataclass(frozen=True)
class FitResult:
    """Fitted values with their uncertainty, and what was held fixed instead of fitted (and why).

    ``nuisance`` names fitted quantities that are not model parameters (the edge instant), so tolerances
    on parameters leave them alone.
    """

    fitted: tuple[str, ...]
    held_fixed: dict[str, str]
    nominal: dict[str, float]  # the starting values
    units: dict[str, str]
    nuisance: tuple[str, ...]
    values: dict[str, float]
    standard_errors: dict[str, float]
    ci95: dict[str, tuple[float, float]]
    correlations: dict[str, dict[str, float]]
    relative_singular_values: list[float]  # at the nominal point, over every requested free parameter
    condition_number: float
    rank: int
    weighting: str
    residual_scale: float  # √(weighted SSR / (m − p)); near 1 when noise weighting and model are right
    evaluations: int
    success: bool
    message: str


@dataclass(frozen=True)
class _Coordinates:
    names: tuple[str, ...]
    log: tuple[bool, ...]
    scale: tuple[float, ...]

    def encode(self, values: Mapping[str, float]) -> np.ndarray:
        return np.array([np.log(values[n]) if lg else values[n] / s
                         for n, lg, s in zip(self.names, self.log, self.scale)])

    def decode(self, theta: np.ndarray) -> dict[str, float]:
        return {n: float(np.exp(v) if lg else v * s) for n, v, lg, s in zip(self.names, theta, self.log, self.scale)}

    def subset(self, keep: Sequence[str]) -> _Coordinates:
        idx = [self.names.index(n) for n in keep]
        return _Coordinates(tuple(keep), tuple(self.log[i] for i in idx), tuple(self.scale[i] for i in idx))


def jacobian(fun: Callable[[np.ndarray], np.ndarray], theta: np.ndarray, step: float = DIFF_STEP) -> np.ndarray:
    """Central differences: truncation error O(step²), accurate enough to tell 1e-6 from zero."""
    cols = []
    for j in range(len(theta)):
        dp, dm = theta.copy(), theta.copy()
        dp[j] += step
        dm[j] -= step
        cols.append((fun(dp) - fun(dm)) / (2 * step))
    return np.column_stack(cols)


def _direction(names: Sequence[str], vector: np.ndarray, log: Sequence[bool]) -> str:
    terms = [f"{v:+.2f}·{'Δln ' if lg else 'Δ'}{n}" for n, v, lg in zip(names, vector, log) if abs(v) >= 0.01]
    return " ".join(terms)


def _hold_unidentifiable(jac: np.ndarray, coords: _Coordinates, hold_order: Sequence[str],
                         nominal: Mapping[str, float]) -> tuple[list[str], dict[str, str]]:
    """Drop parameters until the Jacobian has full column rank; say for each one why it was held."""
    keep, held = list(coords.names), {}
    while keep:
        cols = [coords.names.index(n) for n in keep]
        _, s, vt = np.linalg.svd(jac[:, cols], full_matrices=False)
        null = s <= RANK_RTOL * s[0] if s[0] > 0 else np.ones_like(s, dtype=bool)
        if not null.any():
            break
        vectors = vt[null]
        share = np.sqrt(np.sum(vectors**2, axis=0))
        preferred = [n for n in hold_order if n in keep and share[keep.index(n)] > PARTICIPATION_MIN]
        by_share = [keep[i] for i in np.argsort(-share)]
        pick = (preferred or by_share)[0]
        sub = coords.subset(keep)
        held[pick] = (f"not identifiable from the mapped channels: the residuals do not change along "
                      f"{_direction(keep, vectors[0], sub.log)}; held at {nominal[pick]:g}")
        keep.remove(pick)
    return keep, held


def _uncertainty(jac: np.ndarray, residuals: np.ndarray, theta: np.ndarray, coords: _Coordinates
                 ) -> tuple[dict[str, float], dict[str, tuple[float, float]], dict[str, dict[str, float]], float]:
    m, p = jac.shape
    dof = max(m - p, 1)
    s2 = float(residuals @ residuals) / dof
    cov = s2 * np.linalg.pinv(jac.T @ jac)
    se = np.sqrt(np.clip(np.diag(cov), 0.0, None))
    tq = float(student_t.ppf(0.975, dof))
    values = coords.decode(theta)
    errors, intervals = {}, {}
    for i, (name, lg, scale) in enumerate(zip(coords.names, coords.log, coords.scale)):
        if lg:
            errors[name] = values[name] * se[i]  # delta method: d p = p · d ln p
            intervals[name] = (float(np.exp(theta[i] - tq * se[i])), float(np.exp(theta[i] + tq * se[i])))
        else:
            errors[name] = scale * se[i]
            intervals[name] = (values[name] - tq * errors[name], values[name] + tq * errors[name])
    with np.errstate(invalid="ignore", divide="ignore"):
        corr = cov / np.outer(se, se)
    correlations = {a: {b: float(corr[i, j]) for j, b in enumerate(coords.names)} for i, a in enumerate(coords.names)}
    return errors, intervals, correlations, float(np.sqrt(s2))


def fit_parameters(residuals_of: Callable[[dict[str, float]], np.ndarray], free: Mapping[str, Free],
                   hold_order: Sequence[str], weighting: str, nuisance: Sequence[str] = ()) -> FitResult:
    """Least squares over ``free``, starting from each one's ``start``.

    ``residuals_of(values)`` returns the weighted residual vector for the free quantities' ``values``.
    """
    names = tuple(free)
    coords = _Coordinates(names, tuple(free[n].log for n in names), tuple(free[n].scale for n in names))
    start = {n: free[n].start for n in names}

    def fun_for(c: _Coordinates) -> Callable[[np.ndarray], np.ndarray]:
        def fun(theta: np.ndarray) -> np.ndarray:
            r = residuals_of(c.decode(theta))
            if not np.all(np.isfinite(r)):
                raise FitError(f"fit: the model gave values that are not finite at {c.decode(theta)}")
            return r
        return fun

    jac0 = jacobian(fun_for(coords), coords.encode(start))
    s = np.linalg.svd(jac0, compute_uv=False)
    rel = (s / s[0]).tolist() if s[0] > 0 else [0.0] * len(s)
    keep, held = _hold_unidentifiable(jac0, coords, hold_order, start)
    if not keep:
        raise FitError(f"fit: no free parameter is identifiable from the mapped channels: {held}")
    sub = coords.subset(keep)
    fun = fun_for(sub)
    solution = least_squares(fun, sub.encode(start), method="trf", x_scale=1.0)
    errors, intervals, correlations, scale = _uncertainty(solution.jac, solution.fun, solution.x, sub)
    return FitResult(tuple(keep), held, start, {n: free[n].unit for n in names},
                     tuple(n for n in nuisance if n in keep), sub.decode(solution.x), errors, intervals,
                     correlations, rel, float(1 / rel[-1]) if rel[-1] > 0 else float("inf"),
                     int(sum(v > RANK_RTOL for v in rel)), weighting, scale, int(solution.nfev),
                     bool(solution.success), str(solution.message))
