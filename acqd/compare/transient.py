"""Estimates of a step's post-transition waveform where IEEE 181-2011 leaves the method open.

IEEE 181 defines state levels, overshoot and settling on the waveform as sampled; it has no ringing
frequency or peak time, and its histogram level assumes the record ends in a settled state. On a noisy,
8-bit record the raw maximum is a noise peak, crossings of the final level multiply, and a trace still
approaching its final value has no flat state for a histogram to find. So these estimates read a shape
from many samples instead of reading single samples:

- ``smooth``: a running mean, only to *locate* features (never to measure them);
- ``fit_approach``: y = S + D·e^(−t/τ), the level S a monotone (first-order) approach is heading for;
- ``fit_damped_sinusoid``: y = S + e^(−σt)(a cos ωt + b sin ωt), the ringing of a second-order
  response (the textbook form of every node of an underdamped series RLC after the edge);
- ``lobe_peak``: the maximum of that same shape, fitted with the final level held to the top of the one
  lobe that holds the peak, so an 8-bit flat top gives its middle and noise averages out over the whole
  top of the lobe (``plateau_middle`` is the fallback when it finds no maximum).

Every fit separates the linear coefficients (S, D or S, a, b: solved by linear least squares for given
time constants, "variable projection", common practice) from the one or two nonlinear ones, which keeps
them fast and gives them no starting values for the levels to get wrong, and runs on block means of the
samples (``block_means``), under which both shapes keep their form.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.optimize import minimize_scalar

from .levmar import levenberg_marquardt, solve_positive

MIN_FIT_SAMPLES = 8
APPROACH_TAU_RANGE = (0.02, 50.0)  # τ searched between these multiples of the first guess
FREQUENCY_DRIFT_MAX = 0.3  # a damped fit whose ω moved more than 30 % from its seed did not find the ring
FIT_POINTS = 600  # the damped fit runs on at most about this many block means ...
BLOCKS_PER_PERIOD = 24  # ... each at most 1/24 of a period long
LM_TOLERANCE = 1e-8  # relative change of the cost or the parameters that ends a damped fit (MINPACK's default)
LM_MAX_STEPS = 300  # one evaluation per step: MINPACK's default budget for two unknowns, 100·(n + 1)


def smooth(y: np.ndarray, width: int) -> np.ndarray:
    """Running mean over ``width`` samples, same length as ``y`` (the ends average fewer samples)."""
    if width <= 1:
        return y.astype(float, copy=True)
    sums = np.concatenate(([0.0], np.cumsum(y, dtype=float)))
    half = width // 2
    lo = np.clip(np.arange(len(y)) - half, 0, len(y))
    hi = np.clip(np.arange(len(y)) + width - half, 0, len(y))
    return (sums[hi] - sums[lo]) / (hi - lo)


def _linear_fit(basis: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(coefficients, residuals) of y against the few, well-scaled columns of ``basis``, by the normal
    equations (an SVD costs more than the rest of a fit's step)."""
    gram = basis.T @ basis
    try:
        coef = np.linalg.solve(gram, basis.T @ y)
    except np.linalg.LinAlgError:
        coef = np.linalg.lstsq(basis, y, rcond=None)[0]
    return coef, y - basis @ coef


def block_means(t: np.ndarray, y: np.ndarray, size: int) -> tuple[np.ndarray, np.ndarray]:
    """Means of consecutive blocks of ``size`` samples (a ragged end dropped), at each block's mean time.

    The mean over a block of e^((−σ+iω)t) is a fixed complex multiple of its value at the block's middle,
    so block means of a damped sinusoid (or of an exponential) are the same function with other linear
    coefficients: a fit loses next to nothing by running on them, and runs ``size`` times faster.
    """
    if size <= 1:
        return t, y
    n = len(y) // size * size
    return t[:n].reshape(-1, size).mean(axis=1), y[:n].reshape(-1, size).mean(axis=1)


def fit_approach(t: np.ndarray, y: np.ndarray, tau_guess_s: float) -> tuple[float, float] | None:
    """(S, τ) of y ≈ S + D·e^(−(t − t[0])/τ) by least squares; None when the samples are too few.

    τ is searched on a log scale over ``APPROACH_TAU_RANGE`` × the guess; for each τ the level and the
    remaining distance D are the linear least-squares solution. It runs on at most ``FIT_POINTS`` block
    means, which an exponential keeps its form under, as a damped sinusoid does (``block_means``).
    """
    t, y = block_means(t, y, len(t) // FIT_POINTS)
    if len(t) < MIN_FIT_SAMPLES or not tau_guess_s > 0:
        return None
    x = t - t[0]

    def basis(log_tau: float) -> np.ndarray:
        return np.column_stack((np.ones_like(x), np.exp(-x / math.exp(log_tau))))

    lo, hi = (math.log(tau_guess_s * k) for k in APPROACH_TAU_RANGE)
    best = minimize_scalar(lambda u: float(np.sum(_linear_fit(basis(u), y)[1] ** 2)), bounds=(lo, hi),
                           method="bounded").x
    return float(_linear_fit(basis(best), y)[0][0]), math.exp(best)


@dataclass(frozen=True)
class DampedFit:
    """y ≈ level + e^(−σ(t − t0))(a cos ω(t − t0) + b sin ω(t − t0)), fitted by least squares."""

    level: float
    sigma_per_s: float
    omega_rad_s: float

    @property
    def frequency_hz(self) -> float:
        return self.omega_rad_s / (2 * math.pi)


def _projection(x: np.ndarray, y: np.ndarray, p: np.ndarray, with_level: bool
                ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(linear coefficients c, residual r, ∂r/∂p) of the variable-projection problem r(p) = y − Φ(p)·c(p),
    Φ(p) the columns [1,] e^(−σx)·cos ωx, e^(−σx)·sin ωx of level (when ``with_level``) +
    e^(−σx)(a cos ωx + b sin ωx) for p = (σ, ω), c(p) their linear least-squares solution.

    The derivative is Golub & Pereyra's (1973, SIAM J. Numer. Anal. 10(2):413–432), exact:
    ∂r/∂p_k = −(P⊥·∂Φ_k·c + Φ⁺ᵀ·∂Φ_kᵀ·r), P⊥ = I − ΦΦ⁺, Φ⁺ = (ΦᵀΦ)⁻¹Φᵀ, so the solver needs no finite
    differences: they cost two more evaluations per step, most of a damped fit's time. The columns'
    derivatives are in closed form, and only their products with c and r are formed:
    ∂Φ_σ·c = −x·(a·cos + b·sin), ∂Φ_ω·c = x·(b·cos − a·sin) (cos, sin with the envelope), and
    ∂Φ_σᵀ·r = −(x·cos·r, x·sin·r), ∂Φ_ωᵀ·r = (−x·sin·r, x·cos·r), the level's entry 0 in both.
    """
    envelope = np.exp(-p[0] * x)
    cos, sin = envelope * np.cos(p[1] * x), envelope * np.sin(p[1] * x)
    first = 1 if with_level else 0
    basis = np.empty((len(x), first + 2))
    if with_level:
        basis[:, 0] = 1.0
    basis[:, first], basis[:, first + 1] = cos, sin
    gram = basis.T @ basis
    coef = solve_positive(gram, basis.T @ y)
    inverse = np.linalg.pinv(gram) if coef is None else None  # collinear columns: the least-norm solution
    if inverse is not None:
        coef = inverse @ (basis.T @ y)
    residual = y - basis @ coef
    a, b = coef[-2:]
    moved = np.empty((len(x), 2))  # ∂Φ_k·c, k = σ, ω
    moved[:, 0], moved[:, 1] = -x * (a * cos + b * sin), x * (b * cos - a * sin)
    x_cos_r, x_sin_r = float((x * cos) @ residual), float((x * sin) @ residual)
    lead = [0.0] if with_level else []
    transposed_r = np.array([[*lead, -x_cos_r, -x_sin_r], [*lead, -x_sin_r, x_cos_r]]).T  # ∂Φ_kᵀ·r as columns
    right = basis.T @ moved - transposed_r
    jac = basis @ (solve_positive(gram, right) if inverse is None else inverse @ right) - moved
    return coef, residual, jac


def _solve_projection(x: np.ndarray, y: np.ndarray, p0: np.ndarray, with_level: bool
                      ) -> tuple[np.ndarray, np.ndarray] | None:
    """(σ, ω) and the linear coefficients at the least-squares optimum of the projected residual, by
    Levenberg–Marquardt (``levmar``) on the exact Jacobian of ``_projection``; None when it does not
    converge in ``LM_MAX_STEPS`` steps.

    Not ``scipy.optimize.least_squares``: these problems are tiny (two unknowns, at most ``FIT_POINTS``
    residuals), and the general solver's set-up and checks cost three times the arithmetic, in the twelve
    of these fits a demo comparison runs. It stops where MINPACK's defaults would; a full step that the
    relative-step test would end on is taken without evaluating its end (one evaluation of the four or
    five a fit takes; the coefficients are then those of the point before it, a relative 1e-8 away)
    (``tests/test_compare_transient.py`` checks the optimum against ``least_squares`` with finite
    differences, the way these fits ran before).
    """
    def evaluate(p: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        coef, residual, jac = _projection(x, y, p, with_level)
        return residual, jac, coef

    def within_tolerance(p: np.ndarray, step: np.ndarray, _hess: np.ndarray, _cost: float) -> bool:
        """A full step the relative-step test would end on once evaluated: taken without the evaluation."""
        return float(step @ step) <= (LM_TOLERANCE * (math.sqrt(float(p @ p)) + LM_TOLERANCE)) ** 2

    solution = levenberg_marquardt(evaluate, p0, tolerance=LM_TOLERANCE, max_evaluations=LM_MAX_STEPS + 1,
                                   negligible=within_tolerance)
    return (solution.p, solution.extra) if solution.converged else None


def fit_damped_sinusoid(t: np.ndarray, y: np.ndarray, omega_guess: float, sigma_guess: float) -> DampedFit | None:
    """The damped sinusoid through the samples, from seeds; None when it does not converge near them
    (ω more than 30 % from the seed, or a growing envelope).

    Run on block means (``block_means``) of at most 1/``BLOCKS_PER_PERIOD`` of a period, at most
    ``FIT_POINTS`` of them; σ and ω are fitted as multiples of the seed ω, so both are of order one.
    """
    if not omega_guess > 0:
        return None
    period_samples = 2 * math.pi / omega_guess / float(t[1] - t[0])
    size = max(1, min(len(t) // FIT_POINTS, int(period_samples / BLOCKS_PER_PERIOD)))
    tb, yb = block_means(t, y, size)
    if len(tb) < MIN_FIT_SAMPLES:
        return None
    x = (tb - tb[0]) * omega_guess  # time in radians of the seed

    solution = _solve_projection(x, yb, np.array([sigma_guess / omega_guess, 1.0]), True)
    if solution is None:
        return None
    (s, w), coef = solution
    if s < 0 or abs(w - 1) > FREQUENCY_DRIFT_MAX:
        return None
    return DampedFit(float(coef[0]), float(s * omega_guess), float(w * omega_guess))


def lobe_peak(t: np.ndarray, y: np.ndarray, level: float) -> tuple[float, float] | None:
    """(time, value) of the maximum of y ≈ level + e^(−σt)(a cos ωt + b sin ωt) fitted by least squares
    to the samples of one lobe above ``level`` (held fixed: it is the final state level); None when the
    fit finds no maximum inside the lobe.

    The shape of a decaying oscillation's lobe, rather than a polynomial: a step response's overshoot is
    lopsided (it rises faster than it falls), which a parabola's vertex misplaces by up to 5 % of the
    peak time over a window wide enough to average 1 % noise; this shape is right for the whole top of
    the lobe, so every sample there counts. It runs on at most ``FIT_POINTS`` block means.
    """
    t, y = block_means(t, y, len(t) // FIT_POINTS)
    if len(t) < MIN_FIT_SAMPLES:
        return None
    t0, omega = float(t[np.argmax(y)]), math.pi / float(t[-1] - t[0])  # a lobe is about half a period
    x, z = (t - t0) * omega, y - level

    solution = _solve_projection(x, z, np.array([0.1, 1.0]), False)
    if solution is None:
        return None
    (s, w), c = solution
    if not w > 0:
        return None
    # r·e^(−s x)·cos(w x − φ) has its maxima where tan(w x − φ) = −s / w; take the one nearest x = 0
    phi = math.atan2(c[1], c[0])
    x_peak = (phi - math.atan2(s, w)) / w
    x_peak -= round(x_peak * w / (2 * math.pi)) * 2 * math.pi / w
    if not x[0] <= x_peak <= x[-1]:
        return None
    value = level + math.hypot(c[0], c[1]) * math.exp(-s * x_peak) * math.cos(w * x_peak - phi)
    return t0 + x_peak / omega, float(value)


def plateau_middle(t: np.ndarray, y: np.ndarray) -> tuple[float, float]:
    """(middle instant, value) of the longest run of samples at the maximum: an 8-bit flat top's middle,
    never its first sample (the fallback when no lobe shape fits)."""
    top = y == y.max()
    edges = np.flatnonzero(np.diff(np.r_[0, top.astype(np.int8), 0]))
    starts, ends = edges[::2], edges[1::2]
    longest = int(np.argmax(ends - starts))
    return float(0.5 * (t[starts[longest]] + t[ends[longest] - 1])), float(y.max())


def run_around(inside: np.ndarray, k: int) -> tuple[int, int]:
    """[a, b): the run of True values of ``inside`` that holds index k."""
    before, after = np.flatnonzero(~inside[:k]), np.flatnonzero(~inside[k:])
    return (int(before[-1]) + 1 if len(before) else 0), (k + int(after[0]) if len(after) else len(inside))
