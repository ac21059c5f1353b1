"""A sky's signal and noise from independent splits (raytrace.tracing.splits, raytrace.sky.spectra) and
the anisotropy limit from the measured CMB spectrum (raytrace.limits.anisotropy).

Sources: healpy (HEALPix geometry: vec2pix, pix2vec; synfast, ud_grade, anafast; Gorski et al. 2005,
ApJ 622, 759); the Gaussian variance of a cross-spectrum, var(C_l^AB) = ((C_l^AB)^2 + C_l^AA C_l^BB) /
(2l + 1) (Knox 1995, PRD 52, 4307; memory, as PHYSICS.md section 10 writes it); white noise of pixel
variance s^2 has C_l = s^2 4 pi / N_pix (common practice, no source); the hypergeometric law
(scipy.stats) for two independent draws of strata; chi-square tests (scipy.stats); the published
Planck 2018 TT files read with numpy; a chi^2 written out here (PHYSICS.md section 10) with
scipy.optimize; the demo boxes; for a uniform box, the homogeneous universe's kernel (test_sky.py).
"""

import csv
import math
import warnings

import astropy.constants as const
import astropy.units as u
import healpy
import numpy as np
import pytest
from scipy import optimize, stats

import raytrace
from raytrace.boxes import Box, BoxSeries
from raytrace.cli import main
from raytrace.core.errors import InputError, ProbedRangeWarning
from raytrace.limits.anisotropy import anisotropy_limits, measured_spectrum_limit
from raytrace.limits.cmbpower import lcdm_power
from raytrace.limits.limitset import limit_table
from raytrace.physics.background import MeanPlasma
from raytrace.physics.ionisation import IonisationHistory
from raytrace.sky.maps import SkyResult
from raytrace.sky.pixelwindow import pixel_window
from raytrace.sky.spectra import noise_excess_line, sky_spectra
from raytrace.statistics.meancheck import MeanCheckWarning
from raytrace.tracing.splits import ray_directions

T0_UK = 2.72548e6  # Fixsen 2009, in muK
OMEGA_143 = (const.h * 143 * u.GHz).to_value(u.eV)
X_143 = (const.h * 143 * u.GHz / (const.k_B * 2.72548 * u.K)).to_value(u.dimensionless_unscaled)
RESPONSE_143 = (1 - math.exp(-X_143)) / X_143 / OMEGA_143  # |dT/T| per eV of K at epsilon = 1 (PHYSICS.md s.6)


def split_sky(a, b, counts=(2, 2), seed=1, ordering="RING"):
    """A SkyResult holding given split maps (RING, npix or (npix, n_masses)), their weighted mean as the map."""
    a, b = (np.asarray(m, dtype=float).reshape(len(m), -1) for m in (a, b))
    npix, n_masses = a.shape
    full = (counts[0] * a + counts[1] * b) / sum(counts)
    run = {"nside": healpy.npix2nside(npix), "ordering": ordering, "z_max": 1.0, "seed": seed,
           "rays_per_pixel": sum(counts), "split_rays": list(counts)}
    return SkyResult(np.geomspace(1e-14, 2e-14, n_masses), full, np.zeros(n_masses), np.zeros((npix, n_masses)),
                     np.zeros(npix), 0.0, run, kernel_splits=np.stack([a, b], axis=1))


# -- where the rays go ----------------------------------------------------------------------------------


@pytest.mark.parametrize("rays", [2, 3, 5, 16])
def test_rays_lie_in_their_pixel_in_two_splits_of_any_size(rays):
    nside = 4
    directions = ray_directions(nside, np.arange(192), rays, seed=9)
    assert directions.shape == (192 * rays, 3)
    np.testing.assert_allclose(np.linalg.norm(directions, axis=1), 1.0, rtol=1e-12)
    np.testing.assert_array_equal(healpy.vec2pix(nside, *directions.T, nest=True), np.repeat(np.arange(192), rays))
    assert len({tuple(np.round(v, 12)) for v in directions}) == directions.shape[0]  # no two rays alike


def test_each_split_is_stratified_and_uniform_over_its_pixel():
    # 16 rays: each split has 8 rays over the 16 sub-pixels two levels down (Gorski et al. 2005's
    # NESTED children), at most one per sub-pixel; pooled over pixels, every sub-pixel is used
    # equally often and, inside it, every one of its 16 descendants two levels further down
    # (chi-square tests against uniform counts, scipy).
    nside, pixels = 8, np.arange(768)
    directions = ray_directions(nside, pixels, 16, seed=3).reshape(768, 2, 8, 3)
    for split in range(2):
        vectors = directions[:, split].reshape(-1, 3)
        stratum = (healpy.vec2pix(4 * nside, *vectors.T, nest=True) % 16).reshape(768, 8)
        assert all(np.unique(row).size == 8 for row in stratum)
        assert stats.chisquare(np.bincount(stratum.ravel(), minlength=16)).pvalue > 1e-3
        inner = healpy.vec2pix(16 * nside, *vectors.T, nest=True) % 16
        assert stats.chisquare(np.bincount(inner, minlength=16)).pvalue > 1e-3


def test_splits_draw_their_strata_independently():
    # 4 rays: 2 per split among the 4 sub-pixels one level down. Drawn independently, A and B share
    # k sub-pixels with the hypergeometric probabilities 1/6, 4/6, 1/6 (scipy.stats.hypergeom); two
    # halves of one stratified set would share none, and their sampling errors would anticorrelate.
    nside = 16
    npix = healpy.nside2npix(nside)
    directions = ray_directions(nside, np.arange(npix), 4, seed=5)
    stratum = (healpy.vec2pix(2 * nside, *directions.T, nest=True) % 4).reshape(npix, 2, 2)
    shared = np.array([len(set(row[0]) & set(row[1])) for row in stratum])
    expected = stats.hypergeom(4, 2, 2).pmf(np.arange(3)) * npix
    assert stats.chisquare(np.bincount(shared, minlength=3), expected).pvalue > 1e-3
    # Another count of rays draws from unrelated streams: the first rays of A share their sub-pixel
    # with the first rays of a 6-ray run a quarter of the time, by chance.
    other = ray_directions(nside, np.arange(npix), 6, seed=5).reshape(npix, 6, 3)[:, 0]
    first = directions.reshape(npix, 4, 3)[:, 0]
    same = healpy.vec2pix(2 * nside, *first.T, nest=True) == healpy.vec2pix(2 * nside, *other.T, nest=True)
    assert abs(same.mean() - 0.25) < 4 * math.sqrt(0.25 * 0.75 / npix)


@pytest.fixture(scope="module")
def plasma():
    return MeanPlasma(None, IonisationHistory.constant(1.08))


def test_split_maps_are_bit_identical_for_any_jobs_or_batch_and_saved(plasma, tmp_path):
    rng = np.random.default_rng(2)
    n_com = float(plasma.mean_comoving_electron_density_cm3(0.0))
    values = np.exp(rng.normal(0, 0.5, (16,) * 3)).astype(np.float32) * n_com
    box = Box.from_array(values, "100 cMpc", 0.0, quantity="n_e_comoving", plasma=plasma)
    options = dict(nside=4, z_max=0.3, seed=4, rays_per_pixel=3, include_background=False, plasma=plasma)
    mass = np.geomspace(1.5e-14, 2.5e-14, 3)
    runs = [raytrace.cast_sky(box, mass, n_jobs=jobs, batch_pixels=batch, **options)
            for jobs, batch in ((1, 1024), (2, 1024), (2, 7))]
    for other in runs[1:]:
        assert np.array_equal(other.kernel_splits, runs[0].kernel_splits)
        assert np.array_equal(other.kernel_boxes, runs[0].kernel_boxes)
    sky = runs[0]
    assert sky.split_rays == (2, 1) and sky.kernel_splits.shape == (192, 2, 3)
    # The map is the mean of all 3 rays: 2/3 of split A's mean and 1/3 of B's.
    np.testing.assert_allclose(sky.kernel_boxes, (2 * sky.kernel_splits[:, 0] + sky.kernel_splits[:, 1]) / 3,
                               rtol=1e-12, atol=0)
    assert not np.allclose(sky.kernel_splits[:, 0], sky.kernel_splits[:, 1])
    loaded = SkyResult.load(sky.save(tmp_path / "sky.h5"))
    np.testing.assert_array_equal(loaded.kernel_splits, sky.kernel_splits)
    assert loaded.split_rays == (2, 1)


# -- spectra of known maps --------------------------------------------------------------------------------


def test_split_cross_spectrum_recovers_a_known_signal_under_noise():
    # A Gaussian signal from healpy.synfast at 4 nside, band-limited to the map's l <= 3 nside - 1,
    # pixel-averaged by healpy.ud_grade (what a sky of rays estimates), plus independent white
    # noise in each split. The cross-spectrum over W_l^2 gives the input C_l back within its
    # Gaussian error (Knox 1995); the map's auto-spectrum is biased by the noise, by s^2 4 pi / N_pix.
    nside, lmax = 16, 47
    ell = np.arange(lmax + 1)
    spectrum = 4e-3 / (ell + 3.0) ** 2
    np.random.seed(11)  # synfast draws from numpy's global generator
    signal = healpy.ud_grade(healpy.synfast(spectrum, 4 * nside, lmax=lmax), nside)
    rng = np.random.default_rng(12)
    npix, sigma = signal.size, 0.1  # the map's noise: each split's is sigma sqrt(2)
    a = signal + 1.0 + sigma * math.sqrt(2) * rng.standard_normal(npix)
    b = signal + 1.0 + sigma * math.sqrt(2) * rng.standard_normal(npix)
    found = sky_spectra(split_sky(a, b), n_resamples=400)
    window2 = pixel_window(nside) ** 2
    white = sigma**2 * 4 * np.pi / npix
    for low, high in ((2, 7), (8, 15), (16, 32)):
        band = found.band(low, high)
        truth = spectrum[low:high + 1].mean()
        noise = (white / window2[low:high + 1]).mean()
        assert abs(band["signal"][0] - truth) < 3 * band["signal_error"][0], (low, high)
        assert abs(band["noise"][0] - noise) < 3 * band["noise_error"][0], (low, high)
        # The raw auto-spectrum: signal plus the noise ...
        assert abs(band["full"][0] - truth - noise) < 3 * band["signal_error"][0], (low, high)
        # ... many errors above the signal where the noise dominates (above l ~ 8 here).
        assert low < 8 or band["full"][0] - truth > 5 * band["signal_error"][0], (low, high)
    # Signal variance: the covariance of the splits is the pixel variance of the signal map, within its
    # bootstrap error; the noise variance is sigma^2.
    assert abs(found.variance[0] - signal.var()) < 3 * found.variance_error[0]
    assert abs(found.noise_variance[0] - sigma**2) < 3 * found.noise_variance_error[0]
    assert found.variance_low[0] < found.variance[0] < found.variance_high[0]
    line = noise_excess_line(found)
    assert "30-47" in line and "rays/pixel" in line and "2-9" not in line  # the signal wins at l < 10


def test_split_moments_read_in_small_blocks_equal_numpys_whole_maps(monkeypatch):
    # The split moments are read a block of pixels at a time for every mass, each resample drawn block by
    # block: with blocks of 40 pixels (1e4 values / 250 resamples), the covariance of the splits and the
    # variance of their scaled difference equal numpy's over the whole maps, and the bootstrap errors equal
    # numpy's plain bootstrap (whole-map draws with rng.integers; Efron & Tibshirani 1993) within the
    # scatter of 250 resamples (~5 %; 20 % allowed).
    from raytrace.statistics import spread

    monkeypatch.setattr(spread, "_BLOCK_VALUES", 10_000)
    rng = np.random.default_rng(5)
    npix, n_a, n_b = healpy.nside2npix(8), 2, 3
    signal = rng.lognormal(0.0, 0.5, (npix, 3)) * [1.0, 2.0, 0.5]
    a = signal + 0.3 * rng.standard_normal((npix, 3))
    b = signal + 0.3 * rng.standard_normal((npix, 3))
    found = sky_spectra(split_sky(a, b, counts=(n_a, n_b)), n_resamples=250)
    ac, bc = a - a.mean(axis=0), b - b.mean(axis=0)
    difference = (a - b) * math.sqrt(n_a * n_b) / (n_a + n_b)
    np.testing.assert_allclose(found.variance, (ac * bc).mean(axis=0), rtol=1e-12)
    np.testing.assert_allclose(found.noise_variance, difference.var(axis=0), rtol=1e-12)
    draws = rng.integers(0, npix, (2000, npix))
    plain_variance = [np.mean(ac[d] * bc[d], axis=0) - ac[d].mean(axis=0) * bc[d].mean(axis=0) for d in draws]
    plain_noise = [difference[d].var(axis=0) for d in draws]
    np.testing.assert_allclose(found.variance_error, np.std(plain_variance, axis=0), rtol=0.2)
    np.testing.assert_allclose(found.noise_variance_error, np.std(plain_noise, axis=0), rtol=0.2)


def test_flat_map_and_one_ray_sky():
    npix = healpy.nside2npix(4)
    flat = split_sky(np.full(npix, 2.0e5), np.full(npix, 2.0e5) * (1 + 1e-9))  # 1e-9: rounding, no anisotropy
    found = sky_spectra(flat, n_resamples=50)
    assert found.flat[0] and np.all(found.cross == 0) and found.variance[0] == 0
    one_ray = SkyResult(np.array([1e-14]), np.ones((npix, 1)), np.zeros(1), np.zeros((npix, 1)), np.zeros(npix),
                        0.0, {"nside": 4, "ordering": "RING", "z_max": 1.0, "rays_per_pixel": 1})
    with pytest.raises(InputError, match="1 ray per pixel.*noise is unknown.*rays_per_pixel >= 2"):
        sky_spectra(one_ray)
    with pytest.raises(InputError, match="rays_per_pixel"):
        anisotropy_limits(one_ray)


# -- the limit from the measured spectrum -----------------------------------------------------------------


def hand_measured_limit(a, b, nside, shared_data, threshold=2.705543454095404):
    """epsilon_max from the splits (RING dT/T maps per eV of K: times RESPONSE_143) and the published files:
    C_l^AB over W_l^2, binned with w_l = l (l + 1) on the Planck bins inside l <= 2 nside, chi^2 written out."""
    unbinned = np.loadtxt(shared_data / "planck2018_tt_unbinned.txt")
    binned = np.loadtxt(shared_data / "planck2018_tt_binned.txt")
    lmax = 3 * nside - 1
    cross = healpy.anafast(a - a.mean(), b - b.mean(), lmax=lmax) / pixel_window(nside) ** 2
    rows = []  # (conversion D at epsilon = 1 in muK^2, data - model, upper error)
    model_low = lcdm_power(29)
    for ell in range(2, min(29, 2 * nside) + 1):
        conversion = (T0_UK * RESPONSE_143) ** 2 * ell * (ell + 1) * cross[ell] / (2 * np.pi)
        rows.append((conversion, unbinned[ell - 2, 1] - model_low[ell], unbinned[ell - 2, 3]))
    for k, low in enumerate(range(30, 2 * nside - 28, 30)):
        ell = np.arange(low, low + 30)
        w = ell * (ell + 1.0)
        l_b = np.sum(w * ell) / np.sum(w)
        conversion = (T0_UK * RESPONSE_143) ** 2 * l_b * (l_b + 1) * np.sum(w * cross[ell]) / np.sum(w) / (2 * np.pi)
        rows.append((conversion, binned[k, 1] - binned[k, 4], binned[k, 3]))
    c, r, s = (np.array(column) for column in zip(*rows))
    c = np.clip(c, 0, None)

    def chi2(q):  # PHYSICS.md section 10, q = epsilon^4
        return np.sum(((r - c * q) ** 2 - r**2) / s**2)

    best = max(0.0, optimize.minimize_scalar(chi2, bounds=(0, 1e30), method="bounded",
                                             options={"xatol": 1e-30}).x)
    scale = 1 / math.sqrt(np.sum(c**2 / s**2))
    top = best + 100 * scale
    return optimize.brentq(lambda q: chi2(q) - chi2(best) - threshold, best, top, xtol=scale * 1e-12) ** 0.25


def test_measured_spectrum_limit_equals_a_hand_written_chi2(shared_data):
    # nside 32 resolves l <= 64: the low-l rows 2-29 and the first bin 30-59.
    nside, lmax = 32, 95
    ell = np.arange(lmax + 1)
    np.random.seed(5)
    signal = healpy.synfast(3e5**2 * 1e-4 / (ell + 2.0) ** 2, nside, lmax=lmax)
    rng = np.random.default_rng(6)
    noise = 3e5 * 0.2
    a = 3e5 + signal + noise * rng.standard_normal(signal.size)
    b = 3e5 + signal + noise * rng.standard_normal(signal.size)
    sky = split_sky(np.column_stack([a, 2 * a]), np.column_stack([b, 2 * b]))
    found = sky_spectra(sky, n_resamples=50)
    limit, low, high = measured_spectrum_limit(sky, OMEGA_143, 0.95, found)
    expected = hand_measured_limit(a, b, nside, shared_data)
    assert limit.epsilon_max[0] == pytest.approx(expected, rel=1e-6)
    # Twice the K map: four times the power, epsilon^4 C fixed, so epsilon_max / sqrt(2).
    assert limit.epsilon_max[1] == pytest.approx(expected / math.sqrt(2), rel=1e-9)
    assert low.epsilon_max[0] < limit.epsilon_max[0] < high.epsilon_max[0]
    assert limit.details["multipoles"] == "2-59" and "143 GHz" in limit.label
    assert "component separation" in limit.details["caveat"]


# -- the demo series: 4 against 16 rays per pixel ---------------------------------------------------------


@pytest.fixture(scope="module")
def demo_skies(demo_dir):
    series = raytrace.load_series([demo_dir / f"demo_z{z}.h5" for z in ("0", "0.5", "1")])
    mass = np.geomspace(2e-14, 8e-14, 4)
    with warnings.catch_warnings():
        # One observer's correlated light cone: the built-in MC/PDF check's 12-face error is too small for it
        # (test_sky.py, test_sky_mean_agrees_with_the_one_point_pdf_integral, measures by how much).
        warnings.simplefilter("ignore", MeanCheckWarning)
        skies = {rays: raytrace.cast_sky(series, mass, 8, 1.0, seed=3, rays_per_pixel=rays, n_jobs=2,
                                         include_background=False) for rays in (4, 16)}
    spectra = {rays: sky_spectra(sky, n_resamples=400) for rays, sky in skies.items()}
    limits = {rays: anisotropy_limits(skies[rays], spectra=spectra[rays]) for rays in skies}
    return skies, spectra, limits


def raw_noise_error(spectra, low, high):
    """The error the rays' noise gives the band average of a map's auto-spectrum (equal weights)."""
    ell = np.arange(low, high + 1)
    signal, noise = spectra.cross[ell], spectra.noise[ell]
    variance = (4 * np.clip(signal, 0, None) * noise + 2 * noise**2) / (2 * ell + 1.0)[:, None]
    return np.sqrt(variance.sum(axis=0)) / ell.size


def test_demo_signal_agrees_between_4_and_16_rays_while_the_noise_falls_fourfold(demo_skies):
    skies, spectra, _ = demo_skies
    four, sixteen = spectra[4], spectra[16]
    assert np.all((skies[4].crossings > 0).mean(axis=0) > 0.9)  # every mass resonates in the boxes
    for low, high in four.bands():
        a, b = four.band(low, high), sixteen.band(low, high)
        # The same sky: the two differ by the rays' noise alone (Knox 1995, the noise part; measured
        # pulls below 1.2).
        noise_error = np.hypot(a["signal_noise_error"], b["signal_noise_error"])
        assert np.all(np.abs(a["signal"] - b["signal"]) < 3 * noise_error), (low, high)
        # The raw auto-spectra differ by the noise, N_4 - N_16, by more than 3 of the errors the rays'
        # noise gives them (the sky's own sample variance is common to both): var(C_l^FF) given the
        # signal S_l = (4 S_l N_l + 2 N_l^2) / (2l + 1) (Gaussian, as Knox 1995).
        difference_error = np.hypot(raw_noise_error(four, low, high), raw_noise_error(sixteen, low, high))
        assert np.all(a["full"] - b["full"] > 3 * difference_error), (low, high)
        assert np.all(np.abs((a["full"] - b["full"]) - (a["noise"] - b["noise"])) < 3 * noise_error)
    # ... and the noise falls as 1/N, by about 4 (a stratified split can do a little better): its
    # pixel variance, with bootstrap errors (heavy tails: measured ratios 2.6-4.7).
    ratio = four.noise_variance / sixteen.noise_variance
    error = ratio * np.hypot(four.noise_variance_error / four.noise_variance,
                             sixteen.noise_variance_error / sixteen.noise_variance)
    assert np.all(np.abs(ratio - 4) < 3 * error) and np.all((ratio > 2) & (ratio < 8))
    np.testing.assert_array_less(np.abs(four.variance - sixteen.variance),
                                 3 * np.hypot(four.variance_error, sixteen.variance_error))


def test_demo_limit_agrees_between_4_and_16_rays_within_its_band(demo_skies):
    _, _, limits = demo_skies
    edges = {}
    for rays, found in limits.items():
        by_name = {curve.name: curve.epsilon_max for curve in found.all_curves()}
        edges[rays] = by_name["anisotropy_low"], by_name["anisotropy"], by_name["anisotropy_high"]
        assert np.all(np.isfinite(by_name["anisotropy"]))
        assert np.all((edges[rays][0] <= edges[rays][1]) & (edges[rays][1] <= edges[rays][2]))
    # The limit of 16 rays per pixel lies inside the band of 4, and the two bands overlap.
    low, _, high = edges[4]
    assert np.all((edges[16][1] >= low) & (edges[16][1] <= high))
    assert np.all((edges[16][0] <= edges[4][2]) & (edges[4][0] <= edges[16][2]))
    # A sky of 8 nside resolves l <= 16, where noise still exceeds signal: every mass says so.
    assert np.all(limits[4].curves[0].noisy)


# -- a uniform universe -----------------------------------------------------------------------------------


def test_uniform_box_gives_a_flat_map_no_signal_and_no_limit(plasma, tmp_path):
    n_com = float(plasma.mean_comoving_electron_density_cm3(0.0))
    boxes = [Box.from_array(np.full((16,) * 3, n_com, np.float32), "100 cMpc", z, quantity="n_e_comoving",
                            plasma=plasma) for z in (0.0, 0.25, 0.5)]
    mass = np.geomspace(1.75e-14, 4.6e-14, 6)
    with pytest.warns(ProbedRangeWarning):
        sky = raytrace.cast_sky(BoxSeries(boxes), mass, 4, 1.0, rays_per_pixel=4, plasma=plasma, seed=2)
    assert np.all(sky.kernel.std(axis=0) < 1e-6 * sky.kernel.mean(axis=0))  # test_sky's criterion
    found = sky_spectra(sky, n_resamples=50)
    assert np.all(found.flat) and np.all(found.cross == 0) and np.all(found.variance == 0)
    limits = anisotropy_limits(sky, spectra=found)
    for curve in limits.all_curves():
        assert np.all(np.isinf(curve.epsilon_max)), curve.name
        assert all(reason.startswith("no anisotropy at this mass") for reason in curve.unconstrained())
    table = limit_table(tmp_path / "limits.csv", limits)
    rows = list(csv.DictReader(line for line in open(table) if not line.startswith("#")))
    assert all(row["anisotropy_epsilon_max"] == "" and "flat map" in row["anisotropy_unconstrained"] for row in rows)


# -- the command line -------------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def cli_skies(demo_dir, tmp_path_factory):
    folder = tmp_path_factory.mktemp("cli_skies")
    common = ["--boxes", str(demo_dir / "demo_z0.h5"), "--mass-min", "2e-14", "--mass-max", "6e-14",
              "--mass-count", "3", "--z-max", "0.3", "--no-include-background", "--nside", "2", "--jobs", "1"]
    paths = {}
    for rays in (1, 4):
        paths[rays] = folder / f"sky{rays}.h5"
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            assert main(["sky", *common, "--rays-per-pixel", str(rays), "--output", str(paths[rays]),
                         "--plot", str(folder / f"sky{rays}.png")]) == 0
    return paths


def test_sky_cli_states_signal_noise_and_limits(cli_skies, capsys, demo_dir, tmp_path):
    assert main(["spread-check", str(cli_skies[4]), "--resamples", "50"]) == 0
    out = capsys.readouterr().out
    assert "signal rms" in out and "noise rms" in out and ("noise exceeds signal" in out or "above noise" in out)
    assert main(["spread-check", str(cli_skies[1])]) == 0
    assert "cannot be told apart" in capsys.readouterr().out
    assert main(["limits", "--sky", str(cli_skies[4])]) == 0
    out = capsys.readouterr().out
    assert "eps_sky" in out and "eps_skylo" in out and "measured TT spectrum" in out and "143 GHz" in out


@pytest.mark.parametrize("arguments, flag", [
    (["--frequency", "30 GHz"], "--frequency"),
    (["--frequency", "300 GHz"], "--frequency"),
])
def test_limits_cli_refuses_a_frequency_outside_the_spectrum(cli_skies, capsys, arguments, flag):
    assert main(["limits", "--sky", str(cli_skies[4]), *arguments]) == 2
    error = capsys.readouterr().err.strip().splitlines()
    assert len(error) == 1 and flag in error[0] and "100-217 GHz" in error[0]


def test_limits_cli_refuses_a_sky_of_one_ray_per_pixel(cli_skies, capsys):
    assert main(["limits", "--sky", str(cli_skies[1])]) == 2
    error = capsys.readouterr().err.strip().splitlines()
    assert len(error) == 1 and "--sky" in error[0] and "1 ray per pixel" in error[0] and "--rays-per-pixel" in error[0]
