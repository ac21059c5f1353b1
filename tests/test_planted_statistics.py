"""The tail index and the resolution extrapolation against closed forms, to rounding.

Each test here was shown to fail on one plausible error that the rest of the suite let
through (issue 25): the suite asked of these only the right side of a loose bound. Sources:
the Hill estimator (Hill 1975, Ann. Stat. 3, 1163) evaluated by hand on an exact Pareto
sample; Richardson extrapolation (Richardson 1911, Phil. Trans. R. Soc. A 210, 307) of a
quantity that is exactly K0 + c h^p.
"""

import math

import numpy as np
import pytest

from raytrace.boxes import Box
from raytrace.physics.background import MeanPlasma
from raytrace.physics.ionisation import IonisationHistory
from raytrace.statistics.resolution import resolution_convergence, richardson
from raytrace.statistics.spread import hill_index


# -- Hill's tail index --------------------------------------------------------------------------------
# Planted error this catches: the Hill index off by one order statistic (statistics/spread.py; ~1 % bias at k = 100).
def exact_pareto(n, alpha):
    """x_i = (n / i)^(1/alpha), i = 1..n: the quantiles of a Pareto tail P(X > x) = x^-alpha, in a shuffled order."""
    values = (n / np.arange(1, n + 1)) ** (1 / alpha)
    return np.random.default_rng(0).permutation(values)


def hill_closed_form(alpha, k):
    """Hill's estimate on that sample, worked by hand: with X_(i) = (n/i)^(1/alpha) the k largest give
    (1/k) sum_{i<=k} ln(X_(i) / X_(k+1)) = (1/alpha) (ln(k+1) - ln(k!)/k), so the estimate is alpha over that."""
    return alpha / (math.log(k + 1) - math.lgamma(k + 1) / k)


@pytest.mark.parametrize("n, alpha, k", [(10_000, 1.5, 100), (10_000, 2.0, None), (400, 0.8, 7), (50, 3.0, 2),
                                         (10_000, 1.2, 9_999)])
def test_hill_index_of_an_exact_pareto_sample_equals_its_closed_form(n, alpha, k):
    values = exact_pareto(n, alpha)
    estimate, error, used = hill_index(values, k)
    expected_k = math.isqrt(n) if k is None else k  # the documented default, floor(sqrt(n))
    assert used == expected_k
    expected = hill_closed_form(alpha, expected_k)
    # Sums of k logarithms: measured at most 4.4e-16 relative; 1e-12 leaves room for other platforms' log.
    assert estimate == pytest.approx(expected, rel=1e-12, abs=0)
    assert error == pytest.approx(expected / math.sqrt(expected_k), rel=1e-12, abs=0)  # alpha / sqrt(k)


def test_hill_index_approaches_the_true_tail_as_k_grows():
    # The closed form's denominator, ln(k+1) - ln(k!)/k = 1 - ln(2 pi k)/(2k) + O(1/k) (Stirling), tends to 1:
    # a second, looser view that no fixed offset hides in the estimator.
    values = exact_pareto(100_000, 1.5)
    estimates = [hill_index(values, k)[0] for k in (10, 100, 1000, 10_000)]
    assert np.all(np.diff(np.abs(np.array(estimates) - 1.5)) < 0)
    assert abs(estimates[-1] / 1.5 - 1) < 1e-3


# -- Richardson extrapolation ----------------------------------------------------------------------
# Planted error this catches: the extrapolation dividing by r^p instead of r^p - 1 (statistics/resolution.py).
@pytest.mark.parametrize("ratio, order", [(2.0, 2.0), (3.0, 2.0), (1.5, 1.0), (2.0, 1.5), (4.0, 3.0)])
def test_richardson_recovers_k0_of_an_exact_power_law_to_rounding(ratio, order):
    k0 = np.array([3.2e5, 1.0, -7.5e-3])
    c = np.array([-4.1e4, 2.5, 1e-2])
    h = 0.37
    fine, coarse = k0 + c * h**order, k0 + c * (ratio * h) ** order
    # K0 + c h^p - c h^p (r^p - 1) / (r^p - 1) = K0 up to rounding of the largest term, ~1e-16 of it.
    scale = np.abs(k0) + np.abs(c) * (ratio * h) ** order
    np.testing.assert_array_less(np.abs(richardson(fine, coarse, ratio, order) - k0), 8 * np.finfo(float).eps * scale)


def test_resolution_convergence_extrapolates_its_own_levels_by_richardson():
    # The result a user reads: Convergence.extrapolated from its two finest levels, by Richardson's
    # formula written here, K0 = K_h + (K_h - K_rh) / (r^p - 1), with r = cells ratio and p = 2.
    plasma = MeanPlasma(None, IonisationHistory.constant(1.08))
    x = (np.arange(16) + 0.5) / 16
    X, Y, Z = np.meshgrid(x, x, x, indexing="ij")
    values = np.exp(0.6 * np.sin(2 * np.pi * X) + 0.4 * np.sin(2 * np.pi * Y) * np.cos(2 * np.pi * Z))
    n_com = float(plasma.mean_comoving_electron_density_cm3(0.0))
    box = Box.from_array((values * n_com).astype(np.float32), "100 cMpc", 0.0, quantity="n_e_comoving", plasma=plasma)
    mass = np.geomspace(1.4e-14, 2.6e-14, 4)
    convergence = resolution_convergence(box, mass, 0.3, include_background=False, plasma=plasma, points=1 << 16)
    ratio = convergence.cells[0] / convergence.cells[1]
    fine, coarse = convergence.kernel[0], convergence.kernel[1]
    assert np.all(np.abs(fine - coarse) > 1e-3 * fine)  # the levels differ: the formula's divisor matters
    np.testing.assert_allclose(convergence.extrapolated, fine + (fine - coarse) / (ratio**2 - 1), rtol=1e-14, atol=0)
