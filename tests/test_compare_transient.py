"""The damped fits of ``acqd.compare.transient`` (the ringing frequency and the lobe's peak): their exact
Jacobian against central differences, their optimum against the way they were solved before, and the
comparator's results on a fixed-seed bench against the same comparison solved the old way.

References:
- the central difference (f(p + h) − f(p − h)) / 2h, error O(h²) (Nocedal & Wright 2006, Numerical
  Optimization, §8.1);
- the old path, kept here: ``scipy.optimize.least_squares(method="lm")`` (MINPACK) with its own
  forward-difference Jacobian on the projected residual, whose linear coefficients come from
  ``numpy.linalg.lstsq`` — what these fits ran on before their solver was written out;
- the damped sinusoid y = S + e^(−σt)(a cos ωt + b sin ωt) (the textbook form of an underdamped
  second-order step after its edge, Nise, Control Systems Engineering, §4.6), whose noise-free samples
  any least-squares fit must return exactly;
- the maximum of e^(−σt)·sin ωt at ωt = π/2 − atan(σ/ω) (calculus, our own derivation: its derivative
  e^(−σt)(ω cos ωt − σ sin ωt) is zero where tan ωt = ω/σ).
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
from scipy.optimize import least_squares

import acqd.compare.transient as transient
from acqd.cli import main
from acqd.compare import compare_spec, parse_dut_table
from acqd.compare.transient import _projection, fit_damped_sinusoid, lobe_peak
from acqd.profile import load_profile
from acqd.store import open_records
from test_run import profile_file

# Our own test signals: damped sinusoids of ζ from 0.05 to 0.5, in radians of their own period.
DAMPINGS = (0.05, 0.2, 0.5)


def _ringing(zeta: float, noise: float, seed: int, n: int = 600, a: float = 0.4, b: float = 0.1
             ) -> tuple[np.ndarray, np.ndarray, float, float]:
    """(t, y, σ, ω) of level 1 + e^(−σt)(a cos ωt + b sin ωt) over five periods of ω = 2π·8 kHz."""
    omega = 2 * math.pi * 8e3
    sigma = zeta * omega / math.sqrt(1 - zeta**2)
    t = np.linspace(0.0, 5 * 2 * math.pi / omega, n)
    y = 1.0 + np.exp(-sigma * t) * (a * np.cos(omega * t) + b * np.sin(omega * t))
    return t, y + np.random.default_rng(seed).normal(0.0, noise, n), sigma, omega


def _old_basis(x: np.ndarray, p: np.ndarray, with_level: bool) -> np.ndarray:
    envelope = np.exp(-p[0] * x)
    columns = [envelope * np.cos(p[1] * x), envelope * np.sin(p[1] * x)]
    return np.column_stack(([np.ones_like(x)] if with_level else []) + columns)


def old_solve(x: np.ndarray, y: np.ndarray, p0: np.ndarray, with_level: bool) -> tuple[np.ndarray, np.ndarray] | None:
    """The old path (see the module's references), with ``_solve_projection``'s signature."""
    def residual(p: np.ndarray) -> np.ndarray:
        basis = _old_basis(x, p, with_level)
        return y - basis @ np.linalg.lstsq(basis, y, rcond=None)[0]

    solution = least_squares(residual, p0, method="lm")
    if not solution.success:
        return None
    return solution.x, np.linalg.lstsq(_old_basis(x, solution.x, with_level), y, rcond=None)[0]


@pytest.mark.parametrize("with_level", (True, False))
@pytest.mark.parametrize("zeta", DAMPINGS)
def test_projected_jacobian_matches_central_differences(zeta, with_level):
    t, y, sigma, omega = _ringing(zeta, 0.01, seed=3)
    x = t * omega
    p = np.array([sigma / omega * 1.1, 0.97])  # off the optimum, where the residual's second term matters
    _, _, exact = _projection(x, y, p, with_level)
    h = 1e-6
    for k in range(2):
        step = np.zeros(2)
        step[k] = h
        difference = (_projection(x, y, p + step, with_level)[1] - _projection(x, y, p - step, with_level)[1]) / (2 * h)
        assert np.linalg.norm(exact[:, k] - difference) <= 1e-7 * np.linalg.norm(difference)


@pytest.mark.parametrize("zeta", DAMPINGS)
def test_noise_free_ringing_gives_its_own_frequency_and_level(zeta):
    t, y, sigma, omega = _ringing(zeta, 0.0, seed=0)
    fit = fit_damped_sinusoid(t, y, omega * 1.05, sigma * 0.8)  # seeds off, as the crossings give them
    assert fit is not None
    assert fit.omega_rad_s == pytest.approx(omega, rel=1e-9)
    assert fit.sigma_per_s == pytest.approx(sigma, rel=1e-7)
    assert fit.level == pytest.approx(1.0, abs=1e-9)


@pytest.mark.parametrize("seed", range(4))
@pytest.mark.parametrize("zeta", DAMPINGS)
def test_damped_fit_reaches_the_optimum_of_the_old_solver(monkeypatch, zeta, seed):
    t, y, sigma, omega = _ringing(zeta, 0.02, seed)
    new = fit_damped_sinusoid(t, y, omega * 1.05, sigma * 0.8)
    monkeypatch.setattr(transient, "_solve_projection", old_solve)
    old = fit_damped_sinusoid(t, y, omega * 1.05, sigma * 0.8)
    assert old is not None and new is not None
    # MINPACK stops at a relative change of 1e-8; both stop within that of one optimum
    assert new.omega_rad_s == pytest.approx(old.omega_rad_s, rel=1e-7)
    assert new.sigma_per_s == pytest.approx(old.sigma_per_s, rel=1e-6, abs=1e-7 * omega)
    assert new.level == pytest.approx(old.level, abs=1e-7)


@pytest.mark.parametrize("seed", range(4))
@pytest.mark.parametrize("zeta", DAMPINGS)
def test_lobe_peak_matches_the_old_solver_and_the_closed_form(monkeypatch, zeta, seed):
    t, y, sigma, omega = _ringing(zeta, 0.0, seed, a=0.0, b=0.4)
    lobe = slice(1, int(np.flatnonzero(y[1:] < 1.0)[0]))  # the first lobe above the level: 0 < ωt < π
    quiet = lobe_peak(t[lobe], y[lobe], 1.0)
    # closed form: 0.4·e^(−σt)·sin ωt = 0.4·e^(−σt)·cos(ωt − φ) with φ = π/2, so the maximum is at
    # ωt = π/2 − atan(σ/ω), and its value follows
    t_peak = (math.pi / 2 - math.atan2(sigma, omega)) / omega
    assert quiet is not None and quiet[0] == pytest.approx(t_peak, rel=1e-7)
    assert quiet[1] == pytest.approx(1.0 + 0.4 * math.exp(-sigma * t_peak) * math.sin(omega * t_peak), rel=1e-9)
    noisy = y + np.random.default_rng(seed).normal(0.0, 0.02, len(y))
    new = lobe_peak(t[lobe], noisy[lobe], 1.0)
    monkeypatch.setattr(transient, "_solve_projection", old_solve)
    old = lobe_peak(t[lobe], noisy[lobe], 1.0)
    assert (old is None) == (new is None)
    if new is not None:
        assert new[0] == pytest.approx(old[0], rel=1e-6)
        assert new[1] == pytest.approx(old[1], rel=1e-7)


def _floats(value, path=()):
    """(path, number) of every float in a JSON-able result."""
    if isinstance(value, dict):
        for key, item in value.items():
            yield from _floats(item, (*path, key))
    elif isinstance(value, list):
        for i, item in enumerate(value):
            yield from _floats(item, (*path, i))
    elif isinstance(value, float):
        yield path, value


def test_acqd_run_gives_the_verdicts_and_values_of_the_old_solver(tmp_path: Path, monkeypatch):
    # A fixed-seed bench (the demo profile's seed 9): the analyses acqd run stored, against the same records
    # compared with the damped fits solved the old way (fitted from the nominal values, as before warm starts).
    path = profile_file(tmp_path)
    assert main(["run", str(path), "-n", "3"]) == 0
    profile = load_profile(path)
    spec = parse_dut_table(profile.dut, profile.source, profile.text)
    with open_records(tmp_path / "records.h5") as reader:
        stored = [reader.read(i) for i in range(len(reader))]
    monkeypatch.setattr(transient, "_solve_projection", old_solve)
    for record in stored:
        new, old = record.analysis, compare_spec(record, spec).to_dict()
        assert new["verdict"] == old["verdict"] and new["reasons"] == old["reasons"]
        assert [c["passed"] for c in new["checks"]] == [c["passed"] for c in old["checks"]]
        for name, (lo, hi) in old["fit"]["ci95"].items():
            assert abs(new["fit"]["values"][name] - old["fit"]["values"][name]) <= (hi - lo) / 100
        for channel_new, channel_old in zip(new["channels"], old["channels"]):
            for side in ("measured", "simulated"):
                expected = dict(_floats(channel_old[side]))
                for key, value in _floats(channel_new[side]):
                    # the step parameters of a solver that stops within 1e-8 of the optimum
                    assert value == pytest.approx(expected[key], rel=1e-6, abs=1e-12), (side, key)


def test_the_ringing_seeds_line_slope_is_numpys_weighted_polyfit():
    # numpy.polyfit (degree 1, weights w applied to the residuals, so Σ w²·r² is minimised) as the reference
    # for the weighted least-squares slope that seeds the ringing fit, which weights the squared residuals.
    from acqd.compare.ieee181 import _slope
    rng = np.random.default_rng(5)
    x, y, weights = np.arange(7.0), 3.0 * np.arange(7.0) + rng.normal(size=7), rng.uniform(0.1, 2.0, 7)
    assert _slope(x, y, weights) == pytest.approx(np.polyfit(x, y, 1, w=np.sqrt(weights))[0], rel=1e-12)
    assert _slope(x, y, np.ones(7)) == pytest.approx(np.polyfit(x, y, 1)[0], rel=1e-12)
