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

Uncertainty: s²·(JᵀJ)⁻¹ assumes white noise, but a scope's bandwidth limit low-pass filters the
noise, and 8-bit quantisation of a slowly changing trace gives an error that neighbouring samples share;
then it is too narrow (on low-passed 8-bit records its 95 % intervals held the truth in about 57 of 100).
So the covariance is (JᵀJ)⁻¹·JᵀΣJ·(JᵀJ)⁻¹·m/(m − p), the least-squares covariance under stationary
correlated noise of covariance matrix Σ (Seber & Wild 1989, Nonlinear Regression, ch. 6), with the
solver's Jacobian J at the solution, m samples and p parameters. Σ is estimated per channel from that
channel's own residuals: their autocovariance at lag l, weighted by the Bartlett kernel 1 − l/(L+1) up to
lag L (Newey & West 1987, Econometrica 55(3):703–708; the weights keep the estimate positive
semi-definite), with L from Newey & West's plug-in rule (1994, Review of Economic Studies 61(4):631–653).
For white noise L is a few samples and the result is s²·(JᵀJ)⁻¹ within its scatter. Newey & West's own
sandwich, which weights each product r_i·r_(i+l) by J_i·J_(i+l)ᵀ, came out biased narrow here (about 85
of 100): the Jacobian of a step response lives in the short transient, so few products inform it, while
the residual autocovariance draws on every sample of the channel. 95 % intervals use Student's t with
m − p degrees of freedom. On a log coordinate the interval is exp(ln p ± t·se), asymmetric about p.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass

import numpy as np
from scipy.fft import irfft, next_fast_len, rfft
from scipy.stats import t as student_t

from ..display import key_unit, label, si
from ..errors import AcqdError
from .levmar import levenberg_marquardt

RANK_RTOL = 1e-6  # singular values below this share of the largest count as zero
PARTICIPATION_MIN = 0.1  # share of a null direction a parameter must carry to be a candidate to hold
NW94_BARTLETT_GAMMA = 1.1447  # Newey & West (1994), Bartlett kernel: L = ⌊1.1447·(ŝ¹/ŝ⁰)^(2/3)·T^(1/3)⌋
DIRECT_LAGS_MAX = 100  # up to this many lags an autocovariance is summed directly (each lag one dot product)
SOLVER_TOLERANCE = 1e-8  # relative change of the cost or the coordinates that ends a fit (MINPACK's default)
SOLVER_EVALUATIONS_PER_UNKNOWN = 100  # the solver's budget, 100 evaluations per unknown (MINPACK's default)
SOLVER_DAMPING_START = 1e-6  # the first Marquardt damping: a fit starts near its optimum (see fit_parameters)
NEGLIGIBLE_STEP_SE = 0.02  # a Gauss–Newton step within this share of every standard error is the fit's last


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
    noise_lags: tuple[int, ...]  # per channel, the Bartlett lag L (samples) of the noise covariance
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
        with np.errstate(over="ignore"):  # a trial far out decodes to inf, which the model then refuses
            return {n: float(np.exp(v) if lg else v * s)
                    for n, v, lg, s in zip(self.names, theta, self.log, self.scale)}

    def subset(self, keep: Sequence[str]) -> _Coordinates:
        idx = [self.names.index(n) for n in keep]
        return _Coordinates(tuple(keep), tuple(self.log[i] for i in idx), tuple(self.scale[i] for i in idx))


def _coordinate_jacobian(jacobian_of: Callable[[dict[str, float]], np.ndarray], c: _Coordinates,
                         theta: np.ndarray) -> np.ndarray:
    """∂r/∂θ from ∂r/∂value by the chain rule: × value on a log coordinate (d p = p · d ln p), × scale on a
    scaled one."""
    values = c.decode(theta)
    factors = np.array([values[n] if lg else s for n, lg, s in zip(c.names, c.log, c.scale)])
    jac = jacobian_of(values) * factors
    if not np.all(np.isfinite(jac)):
        raise FitError(f"fit: the model's sensitivities are not finite at {values}")
    return jac


def _usable(values: Mapping[str, float], c: _Coordinates) -> dict[str, float]:
    """The entries of ``values`` that can start the fit in coordinates ``c``: finite, and positive on a
    log coordinate; anything else (a parameter not fitted last time, a failed fit's value) is left out."""
    return {n: float(values[n]) for n, lg in zip(c.names, c.log)
            if n in values and np.isfinite(values[n]) and (values[n] > 0 or not lg)}


def _direction(names: Sequence[str], vector: np.ndarray, log: Sequence[bool]) -> str:
    terms = [f"{v:+.2f}·{'Δln ' if lg else 'Δ'}{label(n)}" for n, v, lg in zip(names, vector, log) if abs(v) >= 0.01]
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
                      f"{_direction(keep, vectors[0], sub.log)}; held at {si(nominal[pick], key_unit(pick), 6, trim=True)}")
        keep.remove(pick)
    return keep, held


def autocovariance(residuals: np.ndarray, lags: int | None = None) -> np.ndarray:
    """γ̂(l) = (1/n)·Σ_i r_i·r_(i+l), indexed by the lag l = 0 … n − 1; with ``lags``, only up to that lag
    (the rest NaN: not computed, and so never silently taken as zero).

    Up to ``DIRECT_LAGS_MAX`` lags each is one dot product (O(n) apiece: a channel's pre-lag and Bartlett
    lag are a few to tens of samples); beyond, all of them by FFT, O(n log n) at any lag. Divided by n, not
    n − l, the sequence is positive semi-definite. So are the Bartlett weights (their transform, the Fejér
    kernel, is never negative) and so is the product of two such sequences (Schur product theorem): the
    noise covariance built from them is never indefinite, which is why Newey & West (1987) use that kernel.
    """
    n = len(residuals)
    last = n - 1 if lags is None else min(lags, n - 1)
    if last > DIRECT_LAGS_MAX:
        size = next_fast_len(2 * n - 1, real=True)
        spectrum = rfft(residuals, size)
        gamma = irfft(spectrum * spectrum.conj(), size)[:n] / n
    else:
        gamma = np.full(n, np.nan)
        gamma[:last + 1] = [residuals[:n - lag] @ residuals[lag:] / n for lag in range(last + 1)]
    gamma[last + 1:] = np.nan
    return gamma


def pre_lag(samples: int) -> int:
    """Newey & West's (1994) pre-lag for the Bartlett kernel, n = ⌊4·(T/100)^(2/9)⌋, at most T − 1."""
    return min(int(4 * (samples / 100) ** (2 / 9)), samples - 1)


def bartlett_lag(gamma: np.ndarray) -> int:
    """Newey & West (1994) plug-in lag for the Bartlett kernel, from one channel's residual autocovariance
    (T = ``len(gamma)`` samples; only its first ``pre_lag(T) + 1`` lags are read).

    Their rule for T samples: pre-lag n = ⌊4·(T/100)^(2/9)⌋, ŝ⁰ = γ₀ + 2·Σ_{j≤n} γ_j,
    ŝ¹ = 2·Σ_{j≤n} j·γ_j, L = ⌊1.1447·(ŝ¹/ŝ⁰)^(2/3)·T^(1/3)⌋. White noise gives a few samples, a scope's
    bandwidth limit tens. Taken from the residuals, every sample of the channel informs it.
    """
    n = len(gamma)
    j = np.arange(1, pre_lag(n) + 1)
    s0 = gamma[0] + 2 * gamma[j].sum()
    s1 = 2 * (j * gamma[j]).sum()
    if s0 == 0:
        return 0  # residuals all zero: no noise to correlate
    return int(min(NW94_BARTLETT_GAMMA * np.cbrt((s1 / s0) ** 2 * n), n - 1))


def bartlett_noise_term(jac: np.ndarray, gamma: np.ndarray, lag: int) -> np.ndarray:
    """JᵀΣJ for one channel, Σ_ik = w_l·γ(l) at l = |i − k|, Bartlett weights w_l = 1 − l/(L+1), 0 past L.

    Σ·J is each Jacobian column convolved with the 2L+1 weighted autocovariances; by Parseval's theorem
    Jᵀ(k ∗ J) = (1/N)·Σ_f Ĵ(f)ᴴ·k̂(f)·Ĵ(f) over the discrete Fourier transforms of length N ≥ n + L (the
    zero padding makes the circular convolution the linear one on the n samples), so the cost is one
    transform per column and one of the kernel, n log n whatever the lag, with no inverse transforms. The
    kernel is symmetric, so k̂ is real; with real transforms each bin between 0 and N/2 stands for itself
    and its conjugate twin.
    """
    n = len(jac)
    size = next_fast_len(n + lag, real=True)
    weighted = (1 - np.arange(lag + 1) / (lag + 1)) * gamma[:lag + 1]
    circular = np.zeros(size)
    circular[:lag + 1] = weighted
    if lag:
        circular[size - lag:] = weighted[:0:-1]
    spectrum = rfft(circular).real
    spectrum[1:(size + 1) // 2] *= 2
    columns = rfft(jac.T, size, axis=1)
    term = ((columns.conj() * spectrum) @ columns.T).real / size
    return (term + term.T) / 2


def noise_covariance(jac: np.ndarray, residuals: np.ndarray, channels: int) -> tuple[np.ndarray, tuple[int, ...]]:
    """Covariance of the fitted coordinates under noise that is correlated in time, and each channel's lag.

    (JᵀJ)⁻¹·(Σ over channels of JᵀΣJ)·(JᵀJ)⁻¹·m/(m − p): least squares under stationary correlated noise
    (Seber & Wild 1989, Nonlinear Regression, ch. 6), each channel's Σ from its own residuals. The lag sums
    stay within a channel: the last sample of one and the first of the next are not neighbours in time.
    m/(m − p) makes it exactly s²·(JᵀJ)⁻¹ for one channel at lag 0.
    """
    m, p = jac.shape
    if m % channels:
        raise FitError(f"fit: {m} residuals do not split into {channels} channels of equal length")
    meat, lags = np.zeros((p, p)), []
    for block_jac, block_r in zip(np.split(jac, channels), np.split(residuals, channels)):
        gamma = autocovariance(block_r, pre_lag(len(block_r)))  # what the lag rule reads
        lags.append(bartlett_lag(gamma))
        if lags[-1] > pre_lag(len(block_r)):
            gamma = autocovariance(block_r, lags[-1])  # what the Bartlett sum reads
        meat += bartlett_noise_term(block_jac, gamma, lags[-1])
    bread = np.linalg.pinv(jac.T @ jac)
    return m / max(m - p, 1) * bread @ meat @ bread, tuple(lags)


def _uncertainty(jac: np.ndarray, residuals: np.ndarray, theta: np.ndarray, coords: _Coordinates, channels: int
                 ) -> tuple[dict[str, float], dict[str, tuple[float, float]], dict[str, dict[str, float]], float,
                            tuple[int, ...]]:
    m, p = jac.shape
    dof = max(m - p, 1)
    cov, lags = noise_covariance(jac, residuals, channels)
    se = np.sqrt(np.clip(np.diag(cov), 0.0, None))
    tq = float(student_t.ppf(0.975, dof))
    values = coords.decode(theta)
    errors, intervals = {}, {}
    for i, (name, lg, scale) in enumerate(zip(coords.names, coords.log, coords.scale)):
        if lg:
            errors[name] = values[name] * se[i]  # delta method: d p = p · d ln p
            with np.errstate(over="ignore"):  # past binary64's range the interval is unbounded: inf, stored as null
                intervals[name] = (float(np.exp(theta[i] - tq * se[i])), float(np.exp(theta[i] + tq * se[i])))
        else:
            errors[name] = scale * se[i]
            intervals[name] = (values[name] - tq * errors[name], values[name] + tq * errors[name])
    with np.errstate(invalid="ignore", divide="ignore"):
        corr = cov / np.outer(se, se)
    correlations = {a: {b: float(corr[i, j]) for j, b in enumerate(coords.names)} for i, a in enumerate(coords.names)}
    return errors, intervals, correlations, float(np.sqrt(float(residuals @ residuals) / dof)), lags


def _negligible_for(dof: int) -> Callable[[np.ndarray, np.ndarray, np.ndarray, float], bool]:
    """The solver's ``negligible`` test for a fit with ``dof`` degrees of freedom: a Gauss–Newton step that
    moves no coordinate by more than ``NEGLIGIBLE_STEP_SE`` of its white-noise standard error
    √(s²·(JᵀJ)⁻¹_ii), s² = cost / dof, is taken without evaluating the model at its end.

    Why that is safe: near the optimum of a small-residual problem Gauss–Newton converges quadratically
    (on a demo record from the nominal values the steps shrank from 30 to 0.3 to 0.0005 standard errors,
    from the last record's values from 2.7 to 0.003), so after a step of
    0.02 standard errors what is left is of the order of 10⁻⁵ of one; even at a merely linear rate of ½ it
    would be a hundredth of a standard error, a four-hundredth of a 95 % interval. The evaluation it saves
    is one model propagation with its sensitivities, a quarter of a demo fit from the nominal values. The
    covariance then uses the Jacobian of the last evaluated point, a step of a fiftieth of a standard
    error away, and the residual r + J·δ."""
    def negligible(_p: np.ndarray, step: np.ndarray, hess: np.ndarray, cost: float) -> bool:
        try:
            variances = np.diag(np.linalg.inv(hess)) * (cost / dof)
        except np.linalg.LinAlgError:
            return False
        return bool(np.all(np.abs(step) <= NEGLIGIBLE_STEP_SE * np.sqrt(np.clip(variances, 0.0, None))))
    return negligible


def fit_parameters(residuals_of: Callable[[dict[str, float]], np.ndarray],
                   jacobian_of: Callable[[dict[str, float]], np.ndarray], free: Mapping[str, Free],
                   hold_order: Sequence[str], weighting: str, nuisance: Sequence[str] = (),
                   channels: int = 1, warm_start: Mapping[str, float] | None = None) -> FitResult:
    """Least squares over ``free``, starting from each one's ``start``, or from ``warm_start``'s value.

    ``residuals_of(values)`` returns the weighted residual vector for the free quantities' ``values``: the
    residuals of ``channels`` channels of equal length, one channel after the other (what ``ravel`` of a
    (channel, sample) array gives), so the covariance pairs neighbours in time only within a channel.
    ``jacobian_of(values)`` returns its derivatives, one column per entry of ``values`` in their order
    (the comparator's are exact, from the model's sensitivities): the solver, the rank test and the
    covariance all use it, so no residual is spent on finite differences.

    ``warm_start`` (say the previous record's fitted values in a run) moves only where the solver begins:
    the rank test, what is held and the nominal values reported stay those of ``start``, so the result is
    the same least-squares optimum either way, reached in fewer steps when the DUT has not changed much.

    The solver (``levmar``) starts with little damping (``SOLVER_DAMPING_START``): a start is a nominal
    value within the parts' tolerances or the last record's fit, where the full Gauss–Newton step is right.
    At the 10⁻³ usual for a cold start, Marquardt's damping shortened the steps along the strongly
    correlated directions of R, L and C, and a demo fit took one evaluation more from the nominal values
    and from a warm start alike. A step that does not lower the cost multiplies the damping by 10, so a
    far start (50 % off) still gets there.
    """
    names = tuple(free)
    coords = _Coordinates(names, tuple(free[n].log for n in names), tuple(free[n].scale for n in names))
    start = {n: free[n].start for n in names}

    jac0 = _coordinate_jacobian(jacobian_of, coords, coords.encode(start))
    # J = QR with Q's columns orthonormal: R has J's singular values and right singular vectors, and so has
    # every choice of its columns, so the rank test decomposes p × p matrices instead of m × p ones.
    factor = np.linalg.qr(jac0, mode="r")
    s = np.linalg.svd(factor, compute_uv=False)
    rel = (s / s[0]).tolist() if s[0] > 0 else [0.0] * len(s)
    keep, held = _hold_unidentifiable(factor, coords, hold_order, start)
    if not keep:
        raise FitError(f"fit: no free parameter is identifiable from the mapped channels: {held}")
    sub = coords.subset(keep)
    begin = {**start, **_usable(warm_start or {}, sub)}
    theta0 = sub.encode(begin)
    first = jac0 if sub == coords and begin == start else None  # the solver's first Jacobian is the rank test's

    def evaluate(theta: np.ndarray) -> tuple[np.ndarray, np.ndarray, None]:
        nonlocal first
        values = sub.decode(theta)
        r = residuals_of(values)
        if not np.all(np.isfinite(r)):
            raise FitError(f"fit: the model gave values that are not finite at {values}")
        if first is not None and np.array_equal(theta, theta0):
            jac, first = first, None
        else:
            jac = _coordinate_jacobian(jacobian_of, sub, theta)
        return r, jac, None

    solution = levenberg_marquardt(evaluate, theta0, tolerance=SOLVER_TOLERANCE,
                                   max_evaluations=SOLVER_EVALUATIONS_PER_UNKNOWN * len(keep),
                                   negligible=_negligible_for(max(jac0.shape[0] - len(keep), 1)),
                                   damping_start=SOLVER_DAMPING_START, refused=(AcqdError,))
    errors, intervals, correlations, scale, lags = _uncertainty(solution.jacobian, solution.residual, solution.p,
                                                               sub, channels)
    return FitResult(tuple(keep), held, start, {n: free[n].unit for n in names},
                     tuple(n for n in nuisance if n in keep), sub.decode(solution.p), errors, intervals,
                     correlations, rel, float(1 / rel[-1]) if rel[-1] > 0 else float("inf"),
                     int(sum(v > RANK_RTOL for v in rel)), weighting, scale, lags, solution.evaluations,
                     solution.converged, solution.reason)
