"""Degraded boxes, the resolution extrapolation, and how well the spread is determined.

Sources: electron counting (an independent float64 sum of the cells written here);
Richardson extrapolation (Richardson 1911) of a field written here; the log-normal
distribution's std/mean sqrt(exp(sigma^2) - 1) (a handbook fact, e.g. Johnson, Kotz &
Balakrishnan, "Continuous Univariate Distributions", vol. 1, ch. 14); numpy's Pareto
sampler (numpy documentation: pareto(a) + 1 is the classic Pareto with tail index a);
the coverage of bootstrap percentile intervals (Efron & Tibshirani 1993).
"""

import math
import subprocess
import sys

import numpy as np
import pytest

from raytrace.boxes import Box
from raytrace.core.errors import InputError
from raytrace.physics.background import MeanPlasma
from raytrace.physics.ionisation import IonisationHistory
from raytrace.statistics.onepoint import pdf_mean
from raytrace.statistics.resolution import degrade, resolution_convergence, richardson, write_convergence_page
from raytrace.statistics.spread import hill_index, relative_spread_interval, spread, top_share


@pytest.fixture(scope="module")
def plasma():
    return MeanPlasma(None, IonisationHistory.constant(1.08))


def box_of(values, plasma, size="100 cMpc"):
    n_com = float(plasma.mean_comoving_electron_density_cm3(0.0))
    return Box.from_array((values * n_com).astype(np.float32), size, 0.0, quantity="n_e_comoving", plasma=plasma)


def test_degrading_conserves_electrons(plasma):
    rng = np.random.default_rng(4)
    for cells, factor in ((32, 2), (32, 4), (30, 4), (27, 2), (20, 3)):
        box = box_of(rng.lognormal(0, 1.0, (cells,) * 3), plasma)
        coarse = degrade(box, factor)
        assert coarse.n_cells == round(cells / factor)
        # Electrons = mean density x volume; the volume is unchanged. float32 storage: ~1e-7.
        before = box.data.astype(np.float64).mean()
        after = coarse.data.astype(np.float64).mean()
        assert abs(after / before - 1) < 1e-6, (cells, factor)
        assert coarse.box_size_cMpc == box.box_size_cMpc


def test_block_average_where_the_factor_divides():
    # Independent: the mean of each 2x2x2 block, by explicit slicing.
    values = np.random.default_rng(5).random((8, 8, 8)).astype(np.float32) + 0.1
    box = Box.from_array(values, "10 cMpc", 0.0, quantity="n_e_comoving")
    expected = sum(values[i::2, j::2, k::2].astype(np.float64) for i in (0, 1) for j in (0, 1) for k in (0, 1)) / 8
    np.testing.assert_allclose(degrade(box, 2).data, expected, rtol=1e-6)


def test_degrading_a_uniform_box_changes_nothing(plasma):
    box = box_of(np.ones((24,) * 3), plasma)
    for factor in (2, 3, 4, 5):
        assert np.all(degrade(box, factor).data == box.data[0, 0, 0])
    mass = np.geomspace(2e-14, 4e-14, 5)
    convergence = resolution_convergence(box, mass, 1.0, include_background=False, plasma=plasma, points=1 << 16)
    np.testing.assert_allclose(convergence.kernel, convergence.kernel[:1].repeat(3, axis=0), rtol=1e-9)
    np.testing.assert_allclose(convergence.extrapolated, convergence.kernel[0], rtol=1e-9)


def smooth_field(cells):
    """exp(0.6 sin(2 pi x) + 0.4 sin(2 pi y) cos(2 pi z)) sampled at cell centres (x, y, z in box units)."""
    x = (np.arange(cells) + 0.5) / cells
    X, Y, Z = np.meshgrid(x, x, x, indexing="ij")
    return np.exp(0.6 * np.sin(2 * np.pi * X) + 0.4 * np.sin(2 * np.pi * Y) * np.cos(2 * np.pi * Z))


def test_extrapolation_approaches_the_finer_grid(plasma):
    # The issue asks for 64^3, 128^3 and 256^3; the test suite keeps boxes at 64^3 and below, so the same
    # analytic field is sampled at 16^3, 32^3 and 64^3. Richardson (order 2) from the two coarse grids
    # must land closer to the 64^3 value than the 16^3 value is.
    mass = np.geomspace(1.4e-14, 2.6e-14, 5)
    kernels = {c: pdf_mean(box_of(smooth_field(c), plasma), mass, 0.3, include_background=False, plasma=plasma,
                           points=1 << 22, n_jobs=2) for c in (16, 32, 64)}
    extrapolated = richardson(kernels[32].kernel, kernels[16].kernel, 2.0)
    coarse_miss = np.abs(kernels[16].kernel - kernels[64].kernel)
    # The grids differ by more than the estimates' errors (except where the resolution error changes sign).
    assert np.sum(coarse_miss > 5 * kernels[64].error) >= 4
    assert np.all(np.abs(extrapolated - kernels[64].kernel) < coarse_miss)


def test_convergence_page_and_bad_input(plasma, tmp_path):
    box = box_of(smooth_field(16), plasma)
    mass = np.geomspace(1.4e-14, 2.6e-14, 4)
    convergence = resolution_convergence(box, mass, 0.3, include_background=False, plasma=plasma, points=1 << 16)
    assert convergence.cells == (16, 8, 4)
    paths = write_convergence_page(convergence, tmp_path / "page")
    assert all(path.stat().st_size > 0 for path in paths.values())
    assert "assumed order p = 2" in paths["txt"].read_text()
    with pytest.raises(InputError, match="^factor: expected a whole number >= 1"):
        degrade(box, 1.5)
    with pytest.raises(InputError, match="fewer than 2 cells"):
        degrade(box, 16)
    with pytest.raises(InputError, match="^factors: expected at least two"):
        resolution_convergence(box, mass, 0.3, factors=(1,), include_background=False, plasma=plasma)


def test_cli_refuses_a_factor_the_boxes_cannot_take(tmp_path, demo_dir):
    run = subprocess.run([sys.executable, "-m", "raytrace", "resolution-check", "--boxes", str(demo_dir / "demo_z0.h5"),
                          "--coarsest", "64", "--report", str(tmp_path / "r"), "--z-max", "0.5",
                          "--no-include-background"], capture_output=True, text=True)
    assert run.returncode == 2
    lines = run.stderr.strip().splitlines()
    assert len(lines) == 1 and "fewer than 2 cells" in lines[0]


def test_bootstrap_interval_covers_the_true_relative_spread():
    # 200 log-normal data sets (sigma 0.5, 400 rows); the true std/mean is sqrt(exp(sigma^2) - 1).
    # The 68 % percentile interval must contain it 60 to 76 % of the time (the band: binomial
    # scatter of 200 trials is +-3.3 %, plus the percentile method's small-sample undercoverage).
    sigma = 0.5
    truth = math.sqrt(math.exp(sigma**2) - 1)
    rng = np.random.default_rng(2026)
    covered = 0
    for trial in range(200):
        sample = rng.lognormal(0.0, sigma, 400)
        _, low, high = relative_spread_interval(sample, n_resamples=400, seed=trial)
        covered += bool(low[0] <= truth <= high[0])
    assert 0.60 <= covered / 200 <= 0.76, covered


def test_bootstrap_is_deterministic_from_the_seed():
    sample = np.random.default_rng(1).lognormal(0, 1, (300, 2))
    first = relative_spread_interval(sample, 200, seed=9)
    again = relative_spread_interval(sample, 200, seed=9)
    other = relative_spread_interval(sample, 200, seed=10)
    assert all(np.array_equal(a, b) for a, b in zip(first, again))
    assert not np.array_equal(first[1], other[1])


def test_hill_estimator_recovers_a_pareto_index():
    # numpy: pareto(2) + 1 is Pareto with tail index 2. Over 100 samples the stated 1-sigma error must
    # cover the truth about 68 % of the time (55-80 %: binomial scatter of 100 trials, 2.5 sigma).
    rng = np.random.default_rng(11)
    within = 0
    for _ in range(100):
        alpha, error, k = hill_index(rng.pareto(2.0, 10_000) + 1.0)
        assert k == 100
        within += abs(alpha - 2.0) < error
    assert 55 <= within <= 80, within
    alpha, error, _ = hill_index(rng.pareto(2.0, 10_000) + 1.0)
    assert abs(alpha - 2.0) < 3 * error


def test_top_share_and_robust_spreads():
    # Independent: 99 rows at 1 and one row at 101: the top 1 % (one row) carries
    # 100^2 (99/100)^2 of the variance sum 100^2 (99/100)^2 + 99 (100/100)^2.
    kernel = np.ones((100, 1))
    kernel[0] = 101.0
    expected = (100 * 0.99) ** 2 / ((100 * 0.99) ** 2 + 99 * 1.0**2)
    assert top_share(kernel)[0] == pytest.approx(expected, rel=1e-12)
    found = spread(kernel, np.array([1e-14]), n_resamples=50)
    assert found.warning() is not None and "1e-14 eV" in found.warning()
    assert found.mad[0] == 0.0 and found.half_width[0] == 0.0  # median absolute deviation of a constant bulk
    with pytest.raises(InputError, match="at least 2 rows"):
        spread(np.ones((1, 3)), np.ones(3))


def test_resample_blocks_draw_each_resample_as_one_multinomial(monkeypatch):
    # Blocks of 50 rows (20 blocks): each resample's counts must be one multinomial draw of n = 1000 over
    # 1000 rows, as numpy's rng.multinomial draws it whole: every resample sums to n, and a row's count is
    # Binomial(n, 1/n) (mean 1, variance 1 - 1/n; P(0) = (1 - 1/n)^n) in every block alike (the marginals of
    # the multinomial distribution, Feller 1968 vol. 1 VI.9, from memory). 2000 resamples.
    from raytrace.statistics import spread as spread_module

    n, resamples = 1000, 2000
    monkeypatch.setattr(spread_module, "_BLOCK_VALUES", 50 * resamples)
    weights = np.concatenate([w for _, _, w in spread_module.resample_blocks(n, resamples, seed=3)], axis=1)
    assert weights.shape == (resamples, n)
    np.testing.assert_array_equal(weights.sum(axis=1), n)
    per_block = weights.reshape(resamples, 20, 50).mean(axis=(0, 2))  # mean count of each block's rows
    # Each block's mean over 2000 x 50 counts: standard error sqrt((1 - 1/n) / 1e5) = 0.0032; 4 sigma.
    assert np.all(np.abs(per_block - 1.0) < 4 * np.sqrt((1 - 1 / n) / (resamples * 50)))
    assert weights.var() == pytest.approx(1 - 1 / n, rel=0.02)  # 2e6 counts: relative error ~0.1 %
    whole = np.random.default_rng(7).multinomial(n, np.full(n, 1 / n), size=resamples)
    zeros, expected = np.mean(weights == 0), (1 - 1 / n) ** n
    assert abs(zeros - expected) < 0.003 and abs(np.mean(whole == 0) - expected) < 0.003
