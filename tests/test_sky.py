"""Sky maps (raytrace.sky.maps) against independent calculations.

Sources: PHYSICS.md section 3 (homogeneous kernel), section 2 (P = epsilon^2 K / omega_0)
and section 6 (dT/T = -P (1 - e^-x)/x, T_0 = 2.72548 K, Fixsen 2009, ApJ 707, 916);
H(z) and constants from astropy (Planck18, CODATA 2018); the HEALPix geometry,
reordering, degrading and power spectra from healpy (Gorski et al. 2005, ApJ 622, 759);
the independent scipy/astropy tracer and one-point-PDF mean of tests/reference_tracer.py.
"""

import json
import math
import os
import subprocess
import sys
import warnings

import astropy.constants as const
import astropy.units as u
import healpy
import numpy as np
import pytest
from astropy.cosmology import Planck18
from reference_tracer import HBAR_EV_S, PlanckRedshift, one_point_pdf_mean, trace_run
from reference_tracer import PLASMA_M2_PER_DENSITY as M2_PER_DENSITY  # exact CODATA (PHYSICS.md section 1)
from scipy import ndimage, stats

import raytrace
from raytrace.boxes import Box, BoxSeries
from raytrace.core.errors import InputError, ProbedRangeWarning
from raytrace.kernels.geometry import copy_transform
from raytrace.limits.anisotropy import read_cl_limits
from raytrace.physics.background import MeanPlasma
from raytrace.physics.conversion import photon_x
from raytrace.physics.ionisation import IonisationHistory
from raytrace.sky.maps import SkyResult
from raytrace.statistics.meancheck import MeanCheckWarning, mean_check
from raytrace.tracing.lattice import SkyTracer, observer_position
from raytrace.tracing.rays import CUBE_SYMMETRIES

X_E = 1.08  # hydrogen plus singly ionised helium (PHYSICS.md section 5)
T0_K = 2.72548  # Fixsen 2009

# The structured light cone of the statistical tests: 32^3 cells over 500 cMpc, smoothed over
# two cells (31 Mpc), to z = 0.3 (chi ~ 1250 Mpc, 2.5 box lengths). Large structures make
# neighbouring pixels share them over a good part of the path.
STRUCTURED_MASSES = np.geomspace(1.3e-14, 3.0e-14, 6)
STRUCTURED_Z_MAX = 0.3
SKY_SEEDS = range(16)


@pytest.fixture(scope="module")
def plasma():
    return MeanPlasma(None, IonisationHistory.constant(X_E))


@pytest.fixture(scope="module")
def n_com(plasma):
    return float(plasma.mean_comoving_electron_density_cm3(0.0))


def lognormal_values(cells=32, sigma_gauss=0.5, smoothing_cells=2.0, seed=11):
    """A smooth log-normal overdensity (Coles & Jones 1991): exp of a smoothed Gaussian field."""
    rng = np.random.default_rng(seed)
    gauss = ndimage.gaussian_filter(rng.standard_normal((cells,) * 3), smoothing_cells, mode="wrap")
    gauss *= sigma_gauss / gauss.std()
    return np.exp(gauss - sigma_gauss**2 / 2).astype(np.float32)


@pytest.fixture(scope="module")
def structured_box(plasma, n_com):
    return Box.from_array(lognormal_values() * n_com, "500 cMpc", 0.0, quantity="n_e_comoving", plasma=plasma)


def structured_sky(box, plasma, nside, seed=0, **options):
    # The light cone's geometry and statistics are tested on plain maps, one ray at each pixel's centre
    # (the one-ray fallback); the splits of several rays per pixel are test_sky_signal.py's.
    options.setdefault("rays_per_pixel", 1)
    with warnings.catch_warnings():
        # A sky is one observer's correlated light cone: its built-in MC/PDF check may flag a mass by nature
        # (the warning says so); test_sky_mean_agrees_with_the_one_point_pdf_integral compares over seeds.
        warnings.simplefilter("ignore", MeanCheckWarning)
        return raytrace.cast_sky(box, STRUCTURED_MASSES, nside, STRUCTURED_Z_MAX, seed=seed,
                                 include_background=False, plasma=plasma, **options)


@pytest.fixture(scope="module")
def seeded_skies(structured_box, plasma):
    """Independent skies: each seed has its own observer and its own copy transforms."""
    # The built-in check flags a few of these skies at 4-4.4 of its 12-face standard errors; the
    # test of the sky mean below shows that this is that error being too small, not the sky.
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", MeanCheckWarning)
        return [structured_sky(structured_box, plasma, 16, seed, ordering="NESTED", n_jobs=2) for seed in SKY_SEEDS]


@pytest.fixture(scope="module")
def small_sky(structured_box, plasma):
    return structured_sky(structured_box, plasma, 4, seed=5, rays_per_pixel=4)


def homogeneous_kernel(mass, n_com):
    """pi m^2 / (3 (1+z_r) H(z_r)) at the z_r where 4 pi alpha n_com (1+z)^3 / m_e = m^2 (PHYSICS.md s.3)."""
    one_plus_z = (mass**2 / (M2_PER_DENSITY * n_com)) ** (1 / 3)
    hubble_eV = Planck18.H(one_plus_z - 1).to_value("1/s") * HBAR_EV_S
    return np.pi * mass**2 / (3 * one_plus_z * hubble_eV), one_plus_z - 1


def hand_made_sky(maps, ordering="RING"):
    """A SkyResult holding given kernel maps (npix, n_masses), to test the map methods on known maps."""
    maps = np.asarray(maps, dtype=float).reshape(len(maps), -1)
    npix, n_masses = maps.shape
    run = {"nside": healpy.npix2nside(npix), "ordering": ordering, "z_max": 1.0}
    return SkyResult(np.geomspace(1e-14, 2e-14, n_masses), maps, np.zeros(n_masses), np.zeros((npix, n_masses)),
                     np.zeros(npix), 0.0, run)


# -- physics of the map ---------------------------------------------------------------------------
def test_uniform_series_gives_the_homogeneous_kernel_in_every_pixel(plasma, n_com):
    boxes = [Box.from_array(np.full((16,) * 3, n_com, np.float32), "100 cMpc", z, quantity="n_e_comoving",
                            plasma=plasma) for z in (0.0, 0.25, 0.5)]
    mass = np.geomspace(1.75e-14, 4.6e-14, 20)
    # Masses resonating beyond z_boxes = 0.5 get their resonance from the background: the run says so.
    with pytest.warns(ProbedRangeWarning):
        sky = raytrace.cast_sky(BoxSeries(boxes), mass, 4, 1.0, rays_per_pixel=4, plasma=plasma, seed=2)
    expected, z_r = homogeneous_kernel(mass, n_com)
    inside = (z_r > 0.02) & (z_r < 0.48)
    beyond = (z_r > 0.52) & (z_r < 0.98)
    assert inside.sum() >= 5 and beyond.sum() >= 5
    check_uniform_sky(sky.kernel, expected, inside | beyond)
    assert np.all(sky.crossings[:, inside] == 1)
    assert np.all(sky.kernel_boxes[:, beyond] == 0)
    # The check catches a 0.5 % scale on the kernel, which the old 1 % tolerance let through.
    with pytest.raises(AssertionError):
        check_uniform_sky(1.005 * sky.kernel, expected, inside | beyond)


def check_uniform_sky(kernel, expected, resonating):
    # The criterion: a homogeneous universe has no anisotropy.
    assert np.all(kernel.std(axis=0) < 1e-6 * kernel.mean(axis=0))
    # Measured ~2e-6 in the boxes (the engine's linear 1+z over a cell) and ~1e-6 beyond (the
    # background's quadrature); 1e-4 is the tolerance, a factor 50 above.
    np.testing.assert_allclose(kernel[:, resonating].mean(axis=0), expected[resonating], rtol=1e-4)


def test_sky_mean_agrees_with_the_one_point_pdf_integral(structured_box, plasma, n_com, seeded_skies):
    expected, expected_error = one_point_pdf_mean(lognormal_values().astype(np.float64), n_com, STRUCTURED_MASSES,
                                                  STRUCTURED_Z_MAX, 2_000_000, seed=3)
    # A sky's pixels see shared structures, so std/sqrt(npix) underestimates the error of its
    # mean. Each seed draws a new observer and new copy transforms, so the skies of different
    # seeds are independent: the error of their average is the spread of the per-sky means over
    # sqrt(number of skies).
    sky_means = np.array([sky.kernel.mean(axis=0) for sky in seeded_skies])
    sky_error = sky_means.std(axis=0, ddof=1) / np.sqrt(len(sky_means))
    error = np.hypot(sky_error, expected_error)
    # Masses with few crossings per ray have a heavy-tailed sky-to-sky spread; leave them out.
    resonating = seeded_skies[0].crossings.mean(axis=0) >= 3
    assert resonating.sum() >= 4
    # The comparison is sharp enough to catch a 25 % error ...
    assert np.all(error[resonating] < 0.06 * expected[resonating])
    # ... and the two agree within 4 combined standard errors (the skies' error itself comes
    # from 16 samples, hence 4 rather than 3).
    assert np.all(np.abs(sky_means.mean(axis=0) - expected)[resonating] < 4 * error[resonating])
    # The built-in check (raytrace.statistics.meancheck) flags some of these skies at 4-4.4 of its standard
    # errors, the batch means of the 12 base pixels. Measured over 64 skies (seeds 0-63, nside 16), that error is
    # too small, not the sky: the sky-to-sky scatter of the mean is 1.3 to 2.4 times the rms 12-face
    # error at these masses (the faces of one light cone share structures: the copy around the observer
    # fills all of them out to half a box, 250 Mpc here, and the ratio grows with nside, 1.1-1.7 at nside
    # 4), so the check's pulls spread with a standard deviation of 1.4-2.5 instead of t(11)'s 1.1 and pass
    # its 3.85 in 2-16 % of skies per mass; the average of the 64 skies agrees with the reference's
    # one-point mean within 2.1 of its standard errors (0.7-2.3 %), and measured in the real scatter no
    # sky deviates by more than 3.1.
    scatter = sky_means.std(axis=0, ddof=1)
    deviation = (sky_means - expected) / np.hypot(scatter, expected_error)
    assert np.all(np.abs(deviation[:, resonating]) < 3.5), deviation  # measured at most 2.8 (seeds 0-15)
    face_error = np.sqrt(np.mean([mean_check(sky).mc_error ** 2 for sky in seeded_skies], axis=0))
    assert np.mean(scatter[resonating] / face_error[resonating]) > 1.2  # measured 1.6 (seeds 0-15)


def test_neighbouring_pixels_are_more_correlated_than_pixels_90_degrees_apart(seeded_skies):
    nside = 16
    npix = healpy.nside2npix(nside)
    neighbours = healpy.get_all_neighbours(nside, np.arange(npix), nest=True)  # (8, npix), -1 where none
    near = np.array([(p, q) for p in range(npix) for q in neighbours[:, p] if q > p])
    vectors = np.array(healpy.pix2vec(nside, np.arange(npix), nest=True)).T
    # Pairs 90 +- 3 degrees apart; every 8th of them is plenty and keeps the ranking fast.
    far = np.argwhere(np.triu(np.abs(vectors @ vectors.T) < math.sin(math.radians(3)), 1))[::8]
    # Statistic: Spearman's rank correlation of the kernel over the pixel pairs (robust to the
    # heavy 1/rate tail of near-tangent crossings), per sky; the difference near - far is
    # averaged over the independent skies (seeds) and its error is their spread / sqrt(n).
    # Within one sky the pairs are not independent, so the skies give the honest error. The
    # difference, not r_far alone, is tested: a correlation taken about one finite sky's own
    # mean is biased by that mean's fluctuation.
    masses = [k for k in range(STRUCTURED_MASSES.size) if seeded_skies[0].crossings[:, k].mean() >= 2]
    assert len(masses) >= 4
    for k in masses:
        difference = []
        for sky in seeded_skies:
            kernel = sky.kernel[:, k]
            r_near = stats.spearmanr(kernel[near[:, 0]], kernel[near[:, 1]])[0]
            r_far = stats.spearmanr(kernel[far[:, 0]], kernel[far[:, 1]])[0]
            difference.append(r_near - r_far)
        difference = np.array(difference)
        assert difference.mean() > 5 * difference.std(ddof=1) / np.sqrt(difference.size), k


def mirror_pixels(nside, flip):
    """RING pixel whose centre is the mirror image (components multiplied by ``flip``) of each pixel's centre."""
    vectors = np.array(healpy.pix2vec(nside, np.arange(healpy.nside2npix(nside)))).T
    mirrored = vectors * flip
    partner = healpy.vec2pix(nside, *mirrored.T)
    # HEALPix pixel centres are symmetric about the equator and under phi -> -phi (Gorski et al. 2005).
    np.testing.assert_allclose(np.array(healpy.pix2vec(nside, partner)).T, mirrored, atol=1e-12)
    return partner


def layered_box(plasma, n_com, axis):
    """A smooth log-normal field that varies along one axis only (0: x, 2: z), over 100 cMpc."""
    rng = np.random.default_rng(4)
    profile = ndimage.gaussian_filter1d(rng.standard_normal(32), 2.0, mode="wrap")
    profile = np.exp(0.5 * profile / profile.std())
    shape = [1, 1, 1]
    shape[axis] = 32
    cube = np.broadcast_to(profile.reshape(shape), (32,) * 3) * n_com
    return Box.from_array(cube.astype(np.float32), "100 cMpc", 0.0, quantity="n_e_comoving", plasma=plasma)


LAYERED_MASSES = np.geomspace(1.4e-14, 2.6e-14, 5)


def layered_sky(box, plasma, randomise, ordering="RING"):
    with warnings.catch_warnings():
        # A field varying along one axis, seen from one point: far from a fair sample of the volume, so the
        # built-in MC/PDF check may warn; the lattice's symmetry is the subject.
        warnings.simplefilter("ignore", MeanCheckWarning)
        return raytrace.cast_sky(box, LAYERED_MASSES, 8, 0.2, seed=3, include_background=False, plasma=plasma,
                                 randomise_copies=randomise, ordering=ordering, rays_per_pixel=1)


# The built-in check flags the untransformed lattice's sky: its copies repeat exactly, so the 12 faces
# share even more than a random sky's (test_sky_mean_agrees_with_the_one_point_pdf_integral says why).
@pytest.mark.filterwarnings("ignore::raytrace.statistics.meancheck.MeanCheckWarning")
@pytest.mark.parametrize("flip", [(1, -1, 1), (1, 1, -1)], ids=["y->-y", "z->-z"])
def test_untransformed_copies_print_the_lattice_symmetry_and_random_copies_break_it(plasma, n_com, flip):
    # A field that varies along x only: through an untransformed periodic lattice the point
    # observer + chi d has the same x for d and its mirror image in y (or z), so the two rays
    # see the same density sequence and the same kernel, whatever the observer's position.
    # Random cube symmetries turn x into y or z and random shifts move the structures, per copy,
    # so rays that leave through different copies see different skies.
    box = layered_box(plasma, n_com, axis=0)
    partner = mirror_pixels(8, np.array(flip))
    moved = partner != np.arange(partner.size)
    lattice = layered_sky(box, plasma, False).kernel
    assert np.count_nonzero(lattice[moved]) > 0.9 * lattice[moved].size
    # The mirrored ray meets the lattice planes in y (or z) at other distances, so it is cut into other
    # pieces, over each of which the engine takes (1+z)^3 linear: measured 4e-6 apart.
    np.testing.assert_allclose(lattice[partner[moved]], lattice[moved], rtol=2e-5)
    randomised = layered_sky(box, plasma, True).kernel
    differs = ~np.isclose(randomised[partner[moved]], randomised[moved], rtol=1e-3, atol=0)
    assert differs.mean() > 0.9


@pytest.mark.parametrize("ordering", ["RING", "NESTED"])
def test_rays_follow_the_pixel_centres(plasma, n_com, ordering):
    # With a field along z and untransformed copies a ray's kernel depends on its direction's z
    # alone. HEALPix centres share z within an iso-latitude ring (Gorski et al. 2005), so the map
    # (in RING order, healpy) is constant along each ring and differs between rings.
    sky = layered_sky(layered_box(plasma, n_com, axis=2), plasma, False, ordering)
    kernel = sky.kernel if ordering == "RING" else np.array([healpy.reorder(k, n2r=True) for k in sky.kernel.T]).T
    theta, _ = healpy.pix2ang(8, np.arange(healpy.nside2npix(8)))
    rings = np.unique(theta, return_inverse=True)[1]
    assert rings.max() + 1 == 4 * 8 - 1
    first_of_ring = np.array([np.flatnonzero(rings == r)[0] for r in range(rings.max() + 1)])
    # Rays of one ring meet the lattice planes in x and y at other distances, so they are cut into
    # other pieces, over each of which (1+z)^3 is linear: measured 7e-7 apart.
    np.testing.assert_allclose(kernel, kernel[first_of_ring[rings]], rtol=1e-5)
    assert np.unique(kernel[first_of_ring, 1]).size > 20


def lattice_runs(observer, direction, chi_end, size, seed, randomise):
    """The straight runs of a sky ray through the lattice of copies, worked out here in numpy:
    copy c = floor(p / L) holds the ray between the chi where it crosses the lattice planes;
    inside, the point (in cells, about the copy's centre) is turned by the copy's cube symmetry
    and shifted (copy_transform, the documented light cone; tested below)."""
    planes = []
    for axis in range(3):
        if direction[axis] != 0:
            ends = observer[axis] + chi_end * direction[axis]
            low, high = sorted((observer[axis], ends))
            k = np.arange(np.ceil(low / size), np.floor(high / size) + 1)
            planes.extend((k * size - observer[axis]) / direction[axis])
    cuts = np.unique(np.clip([0.0, chi_end, *planes], 0.0, chi_end))
    for chi_a, chi_b in zip(cuts[:-1], cuts[1:]):
        middle = observer + 0.5 * (chi_a + chi_b) * direction
        copy = np.floor(middle / size).astype(np.int64)
        symmetry, shift = 0, np.zeros(3)
        if randomise:
            symmetry, *shift = copy_transform(seed, 0, *(int(c) for c in copy))
        matrix = CUBE_SYMMETRIES[int(symmetry)]
        yield chi_a, chi_b, matrix, np.asarray(shift, dtype=float), copy


@pytest.mark.parametrize("randomise", [False, True], ids=["identity", "random"])
def test_sky_rays_match_an_independent_tracer_through_the_lattice(plasma, n_com, randomise):
    values = lognormal_values(cells=12, smoothing_cells=1.0, seed=4).astype(np.float64)
    box = Box.from_array(values * n_com, "20 cMpc", 0.0, quantity="n_e_comoving", plasma=plasma)
    cells, size, cell, seed, z_max = 12, 20.0, 20.0 / 12, 7, 0.02
    mass = np.geomspace(*box.plasma_mass_range(0.0, z_max), 8)[1:-1]
    tracer = SkyTracer(BoxSeries([box]), mass, 2, 1, z_max, seed, 2.35e-4, plasma.cosmology, randomise)
    pixels = np.array([0, 13, 30, 47])
    result = tracer.trace(pixels)
    chi_end = Planck18.comoving_distance(z_max).to_value("Mpc")
    redshift = PlanckRedshift(z_max)
    observer = observer_position(seed, size)
    for row, direction in enumerate(tracer.ray_directions(pixels)):
        kernel, crossings = np.zeros(mass.size), np.zeros(mass.size, dtype=int)
        for chi_a, chi_b, matrix, shift, copy in lattice_runs(observer, direction, chi_end, size, seed, randomise):
            local = (observer + chi_a * direction - copy * size) / cell - cells / 2
            start = matrix @ local + cells / 2 + shift * cells
            k, c, _ = trace_run(box.data.astype(np.float64) * box.comoving_scale, start, matrix @ direction, (chi_b - chi_a) / cell,
                                chi_a, cell, mass, redshift)
            kernel, crossings = kernel + k, crossings + c
        plain = result["tangent_events"][row] == 0
        np.testing.assert_array_equal(result["crossings"][row, plain], crossings[plain])
        # Measured ~5e-6 on the sightlines' like test (test_exact_crossings.py; linear (1+z)^3 over a
        # cell); 5e-5 leaves a factor 10.
        np.testing.assert_allclose(result["kernel_boxes"][row, plain], kernel[plain], rtol=5e-5)
        assert crossings.sum() > 10


def test_copy_transforms_are_uniform_and_fixed_by_seed_box_and_copy():
    grid = np.arange(-10, 10)
    copies = [(a, b, c) for a in grid for b in grid for c in grid]
    drawn = np.array([copy_transform(3, 0, *c) for c in copies])
    # Fixed by (seed, snapshot, copy) alone: the same in another process with another hash seed and in
    # another order, so no process state (Python's string hashing, a generator's position) enters.
    script = ("import json, sys; from raytrace.kernels.geometry import copy_transform; "
              "copies = json.load(sys.stdin)[::-1]; "
              "print(json.dumps([[float(v) for v in copy_transform(3, 0, *c)] for c in copies]))")
    environment = {**os.environ, "PYTHONHASHSEED": "12345"}
    other = subprocess.run([sys.executable, "-c", script], input=json.dumps([[int(v) for v in c] for c in copies]), capture_output=True,
                           text=True, check=True, env=environment)
    np.testing.assert_array_equal(np.array(json.loads(other.stdout))[::-1], drawn)
    symmetry, shifts = drawn[:, 0].astype(int), drawn[:, 1:]
    # Uniform over the 48 symmetries and in [0, 1)^3 (chi-square and Kolmogorov-Smirnov tests, scipy).
    assert stats.chisquare(np.bincount(symmetry, minlength=48)).pvalue > 1e-4
    for axis in range(3):
        assert stats.kstest(shifts[:, axis], "uniform").pvalue > 1e-4
    # Another seed or another snapshot gives unrelated transforms (the same symmetry 1 time in 48).
    for seed, box_index in ((4, 0), (3, 1)):
        other = np.array([copy_transform(seed, box_index, *c)[0] for c in copies])
        assert abs(np.mean(other == symmetry) - 1 / 48) < 5 * math.sqrt(1 / 48 / len(copies))


# -- outputs --------------------------------------------------------------------------------------
@pytest.mark.parametrize("ordering", ["RING", "NESTED"])
def test_fits_maps_read_back_with_healpy(structured_box, plasma, tmp_path, ordering):
    sky = structured_sky(structured_box, plasma, 4, seed=5, ordering=ordering)
    omega0 = (const.h * 160 * u.GHz).to_value(u.eV)
    chosen = STRUCTURED_MASSES[[1, 3]] * 1.01  # nearest grid masses are picked
    path = sky.write_fits(tmp_path / "sky.fits", chosen, epsilon=1e-7, omega0_eV=omega0)
    maps, header = healpy.read_map(str(path), field=None, h=True, nest=None)  # nest=None: as stored
    header = dict(header)
    assert header["NSIDE"] == 4 and header["ORDERING"] == ordering
    for i, k in enumerate((1, 3)):
        np.testing.assert_array_equal(maps[2 * i], sky.kernel[:, k])
        # P = epsilon^2 K / omega_0 (PHYSICS.md section 2)
        np.testing.assert_allclose(maps[2 * i + 1], 1e-14 * sky.kernel[:, k] / omega0, rtol=1e-12)
        assert header[f"MASS{i + 1}"] == pytest.approx(STRUCTURED_MASSES[k], rel=1e-12, abs=0)
        assert header[f"TUNIT{2 * i + 1}"] == "eV"
    assert header["BOXSUM1"] == structured_box.checksum.removeprefix("sha256:")
    assert header["SEED"] == 5 and header["ZMAX"] == pytest.approx(STRUCTURED_Z_MAX)
    assert header["EPSILON"] == pytest.approx(1e-7, abs=0) and header["OMEGA0"] == pytest.approx(omega0, rel=1e-12)
    # The frame is the boxes' axes: no celestial COORDSYS (HEALPix FITS convention), SKYFRAME says so.
    assert "COORDSYS" not in header and header["SKYFRAME"] == "box axes"
    # healpy's default read gives RING order whatever the file holds.
    ring = healpy.read_map(str(path), field=0)
    expected = sky.kernel[:, 1] if ordering == "RING" else healpy.reorder(sky.kernel[:, 1], n2r=True)
    np.testing.assert_array_equal(ring, expected)
    with pytest.raises(InputError, match="exists"):
        sky.write_fits(path, chosen)
    with pytest.raises(InputError, match="omega0_eV"):
        sky.write_fits(tmp_path / "other.fits", chosen, epsilon=1e-7)


def test_mollweide_plots_are_written_as_png(small_sky, tmp_path):
    png = b"\x89PNG\r\n\x1a\n"  # the PNG signature (PNG specification, section 5.2; memory)
    small_sky.plot_mollweide(2e-14, tmp_path / "kernel.png")
    small_sky.plot_mollweide(2e-14, tmp_path / "dtt.png", epsilon=1e-7, omega0_eV=6e-4)
    for name in ("kernel.png", "dtt.png"):
        assert (tmp_path / name).read_bytes()[:8] == png


def test_angular_power_is_anafast_of_the_ring_map_without_monopole(seeded_skies):
    sky = seeded_skies[0]  # NESTED
    kernel = sky.kernel[:, 2]
    cl = sky.angular_power(kernel)
    assert cl.shape == (3 * sky.nside,)  # lmax = 3 nside - 1 by default
    ring = healpy.reorder(kernel, n2r=True)
    np.testing.assert_allclose(cl, healpy.anafast(ring - ring.mean()), rtol=1e-10, atol=0)
    assert sky.angular_power(kernel, lmax=10).shape == (11,)


def test_angular_power_recovers_the_spectrum_of_a_synfast_map():
    # How we call healpy: a Gaussian map drawn with healpy.synfast from a known C_l, stored
    # NESTED with an offset, must give that C_l back. Each estimate scatters by the cosmic
    # variance, Var(C_l^)/C_l^2 = 2/(2l+1) (Knox 1995, memory); averaged over l it is tight.
    nside, lmax = 32, 64
    ell = np.arange(lmax + 1)
    spectrum = 1e-2 / (ell + 2.0) ** 2
    np.random.seed(21)  # synfast draws from numpy's global generator
    ring = healpy.synfast(spectrum, nside, lmax=lmax)
    sky = hand_made_sky(healpy.reorder(ring, r2n=True) + 3.0, ordering="NESTED")
    measured = sky.angular_power(sky.kernel[:, 0], lmax=lmax)
    used = ell >= 2
    ratio = measured[used] / spectrum[used]
    error = np.sqrt(np.mean(2 / (2 * ell[used] + 1)) / used.sum())
    assert abs(ratio.mean() - 1) < 5 * error
    assert measured[0] < 1e-6 * spectrum[0]  # the offset (monopole) is removed


def test_temperature_anisotropy_follows_the_blackbody_response(small_sky):
    frequency = 160 * u.GHz
    omega0 = (const.h * frequency).to_value(u.eV)
    x = (const.h * frequency / (const.k_B * T0_K * u.K)).to_value(u.dimensionless_unscaled)
    assert photon_x(omega0) == pytest.approx(x, rel=1e-12)
    mass, epsilon = STRUCTURED_MASSES[2], 3e-8
    probability = epsilon**2 * small_sky.kernel[:, 2] / omega0  # PHYSICS.md section 2
    expected = -probability * (1 - np.exp(-x)) / x  # PHYSICS.md section 6
    np.testing.assert_allclose(small_sky.temperature_anisotropy(mass, epsilon, omega0), expected, rtol=1e-12)


def test_sky_result_saves_and_loads(small_sky, tmp_path):
    path = small_sky.save(tmp_path / "sky.h5")
    loaded = SkyResult.load(path)
    for name in ("mass_eV", "kernel_boxes", "kernel_background", "crossings", "dispersion_measure_boxes"):
        np.testing.assert_array_equal(getattr(loaded, name), getattr(small_sky, name))
    assert loaded.nside == small_sky.nside and loaded.ordering == small_sky.ordering
    assert loaded.run["seed"] == small_sky.run["seed"]


# -- C_l tables ----------------------------------------------------------------------------------
def test_cl_limit_tables_are_read_and_bad_ones_refused(tmp_path):
    good = tmp_path / "good.txt"
    good.write_text("# l  C_l limit\n2 1e-10\n3 2e-10\n")
    np.testing.assert_array_equal(read_cl_limits(good), [[2, 1e-10], [3, 2e-10]])
    bad = {
        "three_columns.txt": "2 1e-10 5\n3 2e-10 5\n",
        "one_column.txt": "2\n3\n",
        "negative.txt": "2 -1e-10\n",
        "zero.txt": "2 0\n",
        "monopole.txt": "0 1e-10\n",
        "text.txt": "two 1e-10\n",
        "nan.txt": "2 nan\n",
        "ragged.txt": "2 1e-10\n3\n",
    }
    for name, text in bad.items():
        (tmp_path / name).write_text(text)
        with pytest.raises(InputError, match=name):
            read_cl_limits(tmp_path / name)
    with pytest.raises(InputError, match="not found"):
        read_cl_limits(tmp_path / "missing.txt")


# -- determinism and sub-pixel rays ---------------------------------------------------------------
@pytest.mark.filterwarnings("ignore::raytrace.statistics.meancheck.MeanCheckWarning")  # its 12-face error (see above)
def test_maps_are_bit_identical_for_any_jobs_or_batch(structured_box, plasma):
    runs = [structured_sky(structured_box, plasma, 4, seed=9, n_jobs=jobs, batch_pixels=batch)
            for jobs, batch in ((1, 1024), (2, 1024), (1, 7), (2, 50))]
    for other in runs[1:]:
        for name in ("kernel_boxes", "crossings", "dispersion_measure_boxes"):
            assert np.array_equal(getattr(other, name), getattr(runs[0], name)), name
    assert not np.array_equal(structured_sky(structured_box, plasma, 4, seed=10).kernel_boxes, runs[0].kernel_boxes)


def test_ring_and_nested_are_the_same_map_reordered(structured_box, plasma):
    ring = structured_sky(structured_box, plasma, 4, seed=9, ordering="RING")
    nested = structured_sky(structured_box, plasma, 4, seed=9, ordering="NESTED")
    for k in range(STRUCTURED_MASSES.size):
        np.testing.assert_array_equal(healpy.reorder(nested.kernel[:, k], n2r=True), ring.kernel[:, k])
    np.testing.assert_array_equal(healpy.reorder(nested.dispersion_measure, n2r=True), ring.dispersion_measure)


# -- bad input ------------------------------------------------------------------------------------
@pytest.mark.parametrize("option, value, message", [
    ("nside", 3, "nside"), ("nside", 6, "nside"), ("nside", 0, "nside"), ("nside", -4, "nside"),
    ("nside", 4.0, "nside"), ("nside", True, "nside"),
    ("rays_per_pixel", 0, "rays_per_pixel"), ("rays_per_pixel", -4, "rays_per_pixel"),
    ("rays_per_pixel", 4.0, "rays_per_pixel"), ("rays_per_pixel", True, "rays_per_pixel"),
    ("ordering", "GALACTIC", "ordering"), ("ordering", "", "ordering"),
    ("z_max", 0.0, "z_max"), ("z_max", -0.5, "z_max"), ("z_max", float("nan"), "z_max"),
    ("z_max", float("inf"), "z_max"), ("z_max", "1", "z_max"),
    ("z_max", 5000.0, "z_max.*ionisation history"),
    ("mass_eV", [2e-14, 1e-14], "mass_eV"), ("mass_eV", [1e-14, 1e-14], "mass_eV"),
    ("mass_eV", [-1e-14, 1e-14], "mass_eV"), ("mass_eV", [0.0, 1e-14], "mass_eV"),
    ("batch_pixels", 0, "batch_pixels"), ("photon_energy_eV", 0.0, "photon_energy_eV"), ("n_jobs", 0, "n_jobs"),
])
def test_bad_input_is_refused_naming_the_option(structured_box, plasma, option, value, message):
    # The box is at z = 0, so it serves the whole ray only without the background beyond it.
    arguments = {"mass_eV": [1e-14, 2e-14], "nside": 4, "z_max": 0.1, "plasma": plasma, "include_background": False}
    arguments[option] = value
    if message.endswith("ionisation history"):
        arguments["include_background"] = True
    with pytest.raises(InputError, match=message):
        raytrace.cast_sky(structured_box, **arguments)


def test_z_max_beyond_the_distance_tables_is_refused(structured_box, plasma):
    with pytest.raises(InputError, match="z_max.*distance tables"):
        raytrace.cast_sky(structured_box, [1e-14], 4, 5000.0, include_background=False, plasma=plasma)


def test_blended_snapshots_share_each_copy_transform():
    # Two snapshots holding the same field, blended: the log-linear blend of a field with itself
    # is that field, so the blended sky must reproduce, pixel by pixel, the sky of one snapshot
    # alone -- which holds only if both snapshots see the same transform in each copy (common
    # practice, no source). Not exactly: the blended series restarts its sample grid at the
    # half-way redshift, so the masses resonating mostly below it (the lighter ones) are compared
    # by their pixel correlation, against a control sky of another observer.
    rng = np.random.default_rng(8)
    values = np.exp(rng.normal(0.0, 0.4, (16,) * 3)).astype(np.float32) * 2.5e-7
    plasma = MeanPlasma(None, IonisationHistory.constant(1.08))
    boxes = [Box.from_array(values, "80 cMpc", z, quantity="n_e_comoving", plasma=plasma) for z in (0.0, 0.4)]
    mass = np.geomspace(1.3e-14, 2.3e-14, 3)
    options = dict(nside=4, z_max=0.4, include_background=False, plasma=plasma)
    blended = raytrace.cast_sky(BoxSeries(boxes, blend=True), mass, seed=6, **options)
    single = raytrace.cast_sky(BoxSeries(boxes[:1]), mass, seed=6, **options)
    other_observer = raytrace.cast_sky(BoxSeries(boxes[:1]), mass, seed=7, **options)
    for k in range(mass.size):
        assert np.corrcoef(blended.kernel_boxes[:, k], single.kernel_boxes[:, k])[0, 1] > 0.9
        assert abs(np.corrcoef(other_observer.kernel_boxes[:, k], single.kernel_boxes[:, k])[0, 1]) < 0.5


@pytest.mark.parametrize("seed", [-1, 2**63, 1.5])
def test_seed_outside_the_streams_range_is_refused(seed):
    plasma = MeanPlasma(None, IonisationHistory.constant(1.08))
    box = Box.from_array(np.ones((8,) * 3, np.float32) * 2.5e-7, "80 cMpc", 0.0, quantity="n_e_comoving",
                         plasma=plasma)
    with pytest.raises(InputError, match="seed"):
        raytrace.cast_sky(box, np.array([2e-14]), 2, 0.2, seed=seed, include_background=False, plasma=plasma)
    with pytest.raises(InputError, match="seed"):
        raytrace.cast_sightlines(box, np.array([2e-14]), 2, 0.2, seed=seed, include_background=False, plasma=plasma)
