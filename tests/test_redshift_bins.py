"""When and where conversion happens: the kernel per redshift bin and per density class (issue 23).

References: PHYSICS.md section 11 (the bins and classes of a crossing; D* = (m / mbar_gamma(z_c))^2);
the homogeneous kernel pi m^2 / (3 (1+z_r) H(z_r)) of section 3 with x_e(z) from CAMB called directly
and H(z) from astropy's Planck18; the one-point-PDF mean of section 4 (Caputo, Liu, Mishra-Sharma &
Ruderman 2020) estimated per bin in the test with scipy.ndimage.map_coordinates and astropy; the crossings
of the independent tracer in tests/reference_tracer.py; numpy.percentile for the percentiles.
"""

import re
import warnings

import astropy.constants as const
import numpy as np
import pytest
from astropy.cosmology import Planck18
from scipy import ndimage, optimize

import raytrace
from raytrace.boxes import Box, BoxSeries
from raytrace.core.errors import InputError, ProbedRangeWarning
from raytrace.physics.background import MeanPlasma
from raytrace.physics.ionisation import IonisationHistory
from raytrace.statistics.meancheck import MeanCheckWarning
from raytrace.tracing.rays import draw_rays, plan_rays
from raytrace.tracing.redshiftbins import bin_setup, density_edges
from raytrace.tracing.sightlines import RayTracer

from conftest import camb_background_for_planck18
from reference_tracer import HBAR_EV_S, PLASMA_M2_PER_DENSITY, PlanckRedshift, run_crossings

Y_P = 0.245  # PHYSICS.md section 5: the helium mass fraction given to constant histories here
X_E = 1.08  # hydrogen plus singly ionised helium (PHYSICS.md section 5)


def hydrogen_density0(helium_fraction):
    """n_H0 = (1 - Y_p) Omega_b rho_crit / m_p in cm^-3 from astropy's Planck18 (PHYSICS.md section 5)."""
    return (1 - helium_fraction) * Planck18.Ob0 * Planck18.critical_density0.to_value("g/cm3") / const.m_p.to_value("g")


def hubble_eV(z):
    return Planck18.H(z).to_value("1/s") * HBAR_EV_S


# -- bins add up; a uniform box's kernel sits in its crossing's bin ------------------------------------------


@pytest.fixture(scope="module")
def camb_run():
    """CAMB by hand for Planck18 with tau = 0.0561: x_e(z) and its helium fraction (the run's default history)."""
    results = camb_background_for_planck18()
    return (lambda z: np.asarray(results.get_background_redshift_evolution(np.atleast_1d(z), ["x_e"],
                                                                          format="array"))[:, 0],
            results.Params.YHe)


SNAPSHOTS = (0.0, 1.0, 2.0, 3.0)
SERVED = ((0.0, 0.5), (0.5, 1.5), (1.5, 2.5), (2.5, 3.0))  # the nearest snapshot serves (DEVELOPERS.md)
EDGES = np.array([0.0, 0.35, 0.65, 1.1, 1.6, 2.0, 2.4, 2.65, 3.0, 5.0, 8.0, 20.0])


@pytest.fixture(scope="module")
def uniform_run(camb_run):
    """Uniform boxes at each snapshot's mean comoving density x_e(z_snap) n_H0 (CAMB, astropy), the default
    CAMB background beyond z = 3, and masses resonating inside each served interval and beyond."""
    x_e, helium = camb_run
    n_h0 = hydrogen_density0(helium)
    density = [np.float32(x_e(z)[0] * n_h0) for z in SNAPSHOTS]
    series = BoxSeries([Box.from_array(np.full((8,) * 3, n, np.float32), "60 cMpc", z) for n, z in zip(density, SNAPSHOTS)])
    inside = [(0.2, 0), (0.8, 1), (1.3, 1), (1.8, 2), (2.2, 2), (2.8, 3)]  # (z_r, serving snapshot)
    mass = [np.sqrt(PLASMA_M2_PER_DENSITY * float(density[i]) * (1 + z) ** 3) for z, i in inside]
    beyond = [np.sqrt(PLASMA_M2_PER_DENSITY * x_e(z)[0] * n_h0 * (1 + z) ** 3) for z in (4.0, 6.5, 15.0)]
    order = np.argsort(mass + beyond)
    mass = np.array(mass + beyond)[order]
    with pytest.warns(ProbedRangeWarning):
        result = raytrace.cast_sightlines(series, mass, 6, z_max=20.0, seed=2, z_boxes=3.0, redshift_bins=EDGES,
                                          keep_ray_bins=True, plasma=MeanPlasma())
    z_r = np.array([z for z, _ in inside] + [None] * 3, dtype=object)[order]
    return result, mass, z_r, (lambda z: x_e(z) * n_h0)


def test_the_bins_add_up_to_each_rays_kernel(uniform_run, demo_series):
    result = uniform_run[0]
    bins = result.redshift_bins
    # sum_b K_b = K per ray (PHYSICS.md section 11). The kept bins come from float32 cells (binstats.py):
    # measured 5.4e-8 relative; 3e-7 is five float32 half-units.
    np.testing.assert_allclose(bins.ray_bins.sum(axis=1), result.kernel, rtol=3e-7, atol=0)
    # The same for the classes and the last cumulative edge, as means over rays.
    np.testing.assert_allclose(bins.class_mean.sum(axis=0), result.mean(), rtol=3e-7, atol=0)
    np.testing.assert_allclose(bins.cumulative_mean[-1], result.mean(), rtol=3e-7, atol=0)
    # In the engine's own float64 cells, on a lumpy field with crossings everywhere (demo boxes):
    mass = np.geomspace(5e-15, 4e-13, 12)
    plasma = MeanPlasma()
    setup = bin_setup(np.expm1(np.linspace(0, np.log(7), 17)), density_edges([1.0, 100.0]), mass, plasma, 6.0)
    tracer = RayTracer(demo_series, mass, 6.0, 7, 2.35e-4, plasma.cosmology, setup)
    out = tracer.trace(range(4))
    # measured 8.9e-16 relative (the order of a float64 sum); 1e-14 is rounding of ~100 terms.
    assert out["kernel_boxes"].sum() > 0
    np.testing.assert_allclose(out["kernel_cells"].sum(axis=1), out["kernel_boxes"], rtol=1e-14, atol=0)


def check_kernel_in_its_bin(ray_bins, edges, mass, z_r):
    """Each ray's kernel of mass k from the boxes (``ray_bins`` less the background's, the same on every ray)
    sits whole in the bin holding z_r, equal to pi m^2 / (3 (1+z_r) H(z_r))."""
    for k, z in enumerate(z_r):
        if z is None:
            continue
        b = np.searchsorted(edges, z, side="right") - 1
        expected = np.pi * mass[k] ** 2 / (3 * (1 + z) * hubble_eV(z))  # PHYSICS.md section 3, astropy H(z)
        # Measured 2.3e-6 (the engine's linear 1+z over a cell, float32 cells); 2e-5 leaves a factor 10.
        np.testing.assert_allclose(ray_bins[:, b, k], expected, rtol=2e-5)
        others = np.delete(ray_bins[:, :, k], b, axis=1)
        assert np.all(others <= 1e-6 * expected), (k, z)


def test_a_uniform_boxs_kernel_lands_in_the_bin_of_its_homogeneous_crossing(uniform_run):
    result, mass, z_r, mean_density = uniform_run
    bins = result.redshift_bins
    check_kernel_in_its_bin(bins.ray_bins - bins.background_bins, EDGES, mass, z_r)
    # Beyond the boxes the background's crossings, from CAMB's x_e (mean density n_H0 x_e (1+z)^3, astropy's
    # n_H0), each land in their own bin: a bin holds background kernel exactly where the test finds a crossing.
    z = np.expm1(np.linspace(np.log(4.0), np.log(21.0), 20001))
    for k in np.flatnonzero([value is None for value in z_r]):
        gap = PLASMA_M2_PER_DENSITY * mean_density(z) * (1 + z) ** 3 - mass[k] ** 2
        roots = [optimize.brentq(lambda y: PLASMA_M2_PER_DENSITY * mean_density(y)[0] * (1 + y) ** 3 - mass[k] ** 2,
                                 z[i], z[i + 1]) for i in np.flatnonzero(np.sign(gap[:-1]) != np.sign(gap[1:]))]
        roots = [r for r in roots if 3.0 < r < 20.0]
        assert roots, k
        expected_bins = {int(np.searchsorted(EDGES, r, side="right") - 1) for r in roots}
        assert set(np.flatnonzero(bins.background_bins[:, k] > 0)) == expected_bins, (k, roots)


def test_the_bin_check_fails_on_a_kernel_moved_to_the_next_bin(uniform_run):
    result, mass, z_r, _ = uniform_run
    boxes = result.redshift_bins.ray_bins - result.redshift_bins.background_bins
    with pytest.raises(AssertionError):
        check_kernel_in_its_bin(np.roll(boxes, 1, axis=1), EDGES, mass, z_r)
    with pytest.raises(AssertionError):  # a kernel 0.01 % off
        check_kernel_in_its_bin(boxes * 1.0001, EDGES, mass, z_r)


def test_the_percentiles_over_rays_match_numpy_within_one_histogram_slot(demo_series):
    mass = np.geomspace(8e-15, 3e-13, 6)
    result = raytrace.cast_sightlines(demo_series, mass, 200, z_max=6.0, seed=4, keep_ray_bins=True, n_jobs=2)
    bins = result.redshift_bins
    reference = np.percentile(bins.ray_bins, (2.5, 16, 50, 84, 97.5), axis=0)  # numpy's "linear" definition
    positive = reference > 0
    assert positive.sum() > 100
    ratio = bins.bin_percentiles[positive] / reference[positive]
    # binstats.py reads each order statistic at its slot's middle: within one slot, 10^(1/64) = 1.037
    # (measured 0.977 to 1.017 over 172 positive percentiles).
    assert np.all((ratio > 10 ** (-1 / 64)) & (ratio < 10 ** (1 / 64)))
    assert np.all(bins.bin_percentiles[~positive] == 0)
    # Means and variances are exact over the same rays (measured: equal to the last bit).
    np.testing.assert_allclose(bins.bin_mean, bins.ray_bins.mean(axis=0), rtol=1e-12, atol=0)
    np.testing.assert_allclose(bins.variance(), bins.ray_bins.var(axis=0, ddof=1), rtol=1e-12, atol=0)


@pytest.mark.filterwarnings("ignore::raytrace.statistics.meancheck.MeanCheckWarning")  # 40 rays: the mean is not the point
def test_batches_and_threads_give_the_same_bin_statistics(demo_series):
    mass = np.geomspace(1e-14, 2e-13, 4)
    runs = [raytrace.cast_sightlines(demo_series, mass, 40, z_max=2.0, z_boxes=2.0, seed=9, batch_size=size,
                                     n_jobs=jobs) for size, jobs in ((40, 1), (7, 2))]
    a, b = (run.redshift_bins for run in runs)
    np.testing.assert_array_equal(a.bin_percentiles, b.bin_percentiles)  # integer histograms: the same bits
    np.testing.assert_allclose(a.bin_mean, b.bin_mean, rtol=1e-13, atol=0)  # merged in batch order: to rounding
    np.testing.assert_allclose(a.bin_m2, b.bin_m2, rtol=1e-11, atol=0)


# -- per-bin means against the one-point PDF (demo series) ----------------------------------------------------


def reference_bin_means(series, mass, edges, points=200_000, seed=1):
    """<K> per bin and mass, and its standard error, from the one-point PDF of each demo box's interpolant
    (PHYSICS.md section 4 cut at the bin edges): map_coordinates at uniform random points; the nearest
    snapshot serves each redshift (midpoints between snapshots)."""
    rng = np.random.default_rng(seed)
    z_snap = np.array([box.redshift for box in series.boxes])
    cuts = np.concatenate([[0.0], 0.5 * (z_snap[1:] + z_snap[:-1]), [z_snap[-1]]])
    mean = np.zeros((edges.size - 1, mass.size))
    variance = np.zeros_like(mean)
    for box, z_a, z_b in zip(series.boxes, cuts[:-1], cuts[1:]):
        cells = box.n_cells
        values = ndimage.map_coordinates(box.data.astype(np.float64), rng.random((3, points)) * cells - 0.5, order=1,
                                         mode="grid-wrap") * box.comoving_scale
        for k, m in enumerate(mass):
            one_plus_z = (m**2 / (PLASMA_M2_PER_DENSITY * values)) ** (1 / 3)
            for b in range(edges.size - 1):
                low, high = max(z_a, edges[b]), min(z_b, edges[b + 1])
                inside = (one_plus_z >= 1 + low) & (one_plus_z < 1 + high)
                term = np.zeros(points)
                term[inside] = np.pi * m**2 / 3 / (one_plus_z[inside] * hubble_eV(one_plus_z[inside] - 1))
                mean[b, k] += term.mean()
                variance[b, k] += term.var() / points
    return mean, np.sqrt(variance)


@pytest.fixture(scope="module")
def demo_bins_run(demo_series):
    mass = np.geomspace(6e-15, 3e-13, 8)
    return raytrace.cast_sightlines(demo_series, mass, 800, z_max=6.0, seed=23, n_jobs=2)


def check_bins_against_pdf(mc_mean, mc_error, hits, pdf_mean, pdf_error, k=3.0):
    """Per bin and mass with >= 20 rays hitting: |MC - PDF| <= k combined standard errors."""
    compared = hits >= 20
    assert compared.sum() >= 30
    pull = (mc_mean - pdf_mean)[compared] / np.hypot(mc_error, pdf_error)[compared]
    assert np.all(np.abs(pull) <= k), np.abs(pull).max()
    return pull


def test_per_bin_means_agree_with_the_one_point_pdf_per_bin(demo_bins_run, demo_series):
    result = demo_bins_run
    bins = result.redshift_bins
    reference, reference_error = reference_bin_means(demo_series, result.mass_eV, bins.edges_z)
    # 3 combined standard errors (the bar) over 57 compared (bin, mass) pairs; measured max |pull| 2.47
    # (2.53 against the built-in one); the kernel of the moved-bin test below reaches 20.
    check_bins_against_pdf(bins.bin_mean, bins.standard_error(), bins.bin_hits, reference, reference_error)
    # The run's built-in check per bin (raytrace.meancheck) compares against its own PDF mean the same way.
    pdf = result.pdf_check
    check_bins_against_pdf(bins.bin_mean, bins.standard_error(), bins.bin_hits, pdf.bins, pdf.bins_error)
    # The built-in per-bin PDF means sum to its per-mass mean (the bins cover 0..z_max): measured 2.4e-9, each
    # bin with its own table of F(s); 1e-7 is that table's stated interpolation error (onepoint.py).
    np.testing.assert_allclose(pdf.bins.sum(axis=0), pdf.kernel, rtol=1e-7, atol=0)


def test_the_pdf_bin_check_fails_on_kernel_moved_between_neighbouring_bins(demo_bins_run, demo_series):
    bins = demo_bins_run.redshift_bins
    reference, reference_error = reference_bin_means(demo_series, demo_bins_run.mass_eV, bins.edges_z)
    # A tenth of each bin's kernel moved to the next bin up: what a crossing binned by the wrong 1+z would do.
    moved = bins.bin_mean * 0.9 + 0.1 * np.roll(bins.bin_mean, 1, axis=0)
    with pytest.raises(AssertionError):
        check_bins_against_pdf(moved, bins.standard_error(), bins.bin_hits, reference, reference_error)


# -- the density classes against the independent tracer -------------------------------------------------------


CELLS, SIZE, Z_MAX = 16, 20.0, 0.3
D_SHEET, D_VOID, D_HALO = 3.0, 0.2, 400.0
VOID, HALO = (slice(2, 7),) * 3, (slice(10, 13),) * 3  # the void and halo blocks of cells


@pytest.fixture(scope="module")
def class_run():
    """A box at z = 0 of density contrast 3 (sheets), a 5^3-cell void (0.2) and a 3^3-cell halo (400), constant
    x_e: its masses cross class edges along the ray, as D* = D*_0 / (1+z)^3 falls with z."""
    plasma = MeanPlasma(None, IonisationHistory.constant(X_E, helium_fraction=Y_P))
    n_mean = X_E * hydrogen_density0(Y_P)  # mean comoving n_e, astropy's n_H0 (PHYSICS.md section 5)
    contrast = np.full((CELLS,) * 3, D_SHEET)
    contrast[VOID], contrast[HALO] = D_VOID, D_HALO
    box = Box.from_array(contrast * n_mean, f"{SIZE} cMpc", 0.0, plasma=plasma)
    series = BoxSeries([box])
    d_star0 = np.array([0.3, 0.8, 1.5, 2.5, 50.0, 150.0, 300.0])  # D* at z = 0
    mass = np.sqrt(PLASMA_M2_PER_DENSITY * d_star0 * n_mean)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", MeanCheckWarning)  # three rays: the mean is not the point here
        result = raytrace.cast_sightlines(series, mass, 3, z_max=Z_MAX, include_background=False, plasma=plasma,
                                          seed=5, photon_energy_eV=1e-12)
    assert result.tangent_events.sum() == 0  # no Airy event: Landau-Zener terms on both sides
    return result, box, series, mass, n_mean, plasma


def reference_classes(box, series, mass, n_mean, plasma, rays=3, seed=5):
    """Per class (void, sheet, halo) and mass, the kernel summed over the rays by the independent tracer, each
    crossing classed by its own D* = n_e / nbar_e(z_c) (nbar_e from astropy's n_H0 and the constant x_e),
    with where (in cells) each crossing lies."""
    plan = plan_rays(plasma.cosmology, series, Z_MAX)
    _, starts, directions, _ = draw_rays(seed, list(range(rays)), plan, [CELLS])
    cell = box.cell_size_cMpc
    chi_end = Planck18.comoving_distance(Z_MAX).to_value("Mpc")
    redshift = PlanckRedshift(Z_MAX)
    values = box.data.astype(np.float64) * box.comoving_scale
    totals = np.zeros((3, mass.size))
    places = {0: [], 1: [], 2: []}
    targets = mass**2 / PLASMA_M2_PER_DENSITY
    for r in range(rays):
        for g in range(plan.n_segments):
            chi_a, chi_b = g * SIZE, min((g + 1) * SIZE, chi_end)
            found, _ = run_crossings(values, starts[r, g], directions[r, g], (chi_b - chi_a) / cell, chi_a, cell,
                                     mass, redshift, samples_per_cell=128)
            for k, z, kernel, s in found:
                d_star = targets[k] / (n_mean * (1 + z) ** 3)
                c = int(np.searchsorted([1.0, 100.0], d_star, side="right"))
                totals[c, k] += kernel
                places[c].append((starts[r, g] + directions[r, g] * s) % CELLS)
    return totals, places


def inside_block(points, block, margin=1.0):
    """Whether cell-unit points lie within ``margin`` cells of a block of cells (cell i spans [i, i+1))."""
    low = np.array([b.start for b in block]) - margin
    high = np.array([b.stop for b in block]) + margin
    return np.all((points >= low) & (points <= high), axis=1)


def check_classes(class_mean, reference_totals, rays):
    # Measured 1.9e-7 relative (float32 cells; the engine's crossings against the reference's brentq); 2e-6
    # leaves a factor 10. A class the reference finds empty is empty here too (atol 0).
    np.testing.assert_allclose(class_mean * rays, reference_totals, rtol=2e-6, atol=0)


def test_density_classes_match_the_crossings_the_reference_tracer_finds_there(class_run):
    result, box, series, mass, n_mean, plasma = class_run
    totals, places = reference_classes(box, series, mass, n_mean, plasma)
    # Every class has crossings, and the masses at D*_0 = 1.5 and 150 have them on both sides of a class edge.
    assert np.all(totals.sum(axis=1) > 0)
    assert (totals[:, 2] > 0).sum() == 2 and (totals[:, 5] > 0).sum() == 2
    check_classes(result.redshift_bins.class_mean[:3], totals, 3)
    # The void-class crossings lie at the void's cells, the halo-class ones at the halo's (the box's known regions).
    assert np.all(inside_block(np.array(places[0]), VOID))
    assert np.all(inside_block(np.array(places[2]), HALO))
    assert not np.any(inside_block(np.array(places[1]), HALO, margin=-0.5))


def test_the_class_check_fails_when_a_class_edge_moves(class_run):
    result, box, series, mass, n_mean, plasma = class_run
    totals, _ = reference_classes(box, series, mass, n_mean, plasma)
    # The classes of the engine with the void edge at D* = 1.2 instead of 1: what a wrong mbar_gamma would give.
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", MeanCheckWarning)
        moved = raytrace.cast_sightlines(series, mass, 3, z_max=Z_MAX, include_background=False, plasma=plasma,
                                         seed=5, photon_energy_eV=1e-12, density_classes=[1.2, 100.0])
    with pytest.raises(AssertionError):
        check_classes(moved.redshift_bins.class_mean[:3], totals, 3)


# -- bad input ---------------------------------------------------------------------------------------------------


@pytest.mark.parametrize("bins, message", [([0.0, 2.0, 1.0], "strictly increasing"), ([0.0, 1.0, 9.0], "outside the run"),
                                           ([1.0], "at least two edges"), (-3, "count >= 1")])
def test_bad_bins_are_one_line_errors(demo_series, bins, message):
    with pytest.raises(InputError, match=message) as caught:
        raytrace.cast_sightlines(demo_series, [1e-14], 2, z_max=6.0, redshift_bins=bins)
    assert "\n" not in str(caught.value) and "redshift_bins" in str(caught.value)


def test_shells_outside_the_run_are_one_line_errors(demo_series):
    with pytest.raises(InputError, match="outside the run's range") as caught:
        raytrace.cast_sky(demo_series, [1e-14], 1, z_max=3.0, shells_z=[0.0, 1.0, 4.0])
    assert "\n" not in str(caught.value) and "shells_z" in str(caught.value)
    with pytest.raises(InputError, match="D\\*"):
        raytrace.cast_sightlines(demo_series, [1e-14], 2, z_max=6.0, density_classes=[100.0, 1.0])


# -- sky shells; the report's page -----------------------------------------------------------------------------


def test_a_skys_shell_maps_add_up_to_its_maps_and_are_stored(demo_series, tmp_path):
    mass = np.geomspace(1e-14, 3e-13, 4)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", MeanCheckWarning)  # 48 pixels: the mean is not the point here
        sky = raytrace.cast_sky(demo_series, mass, 2, z_max=20.0, seed=4, rays_per_pixel=4, shells_z=[0, 1, 3, 6, 20])
    # sum over shells = the pixel's kernel (PHYSICS.md section 11): measured 4e-16 relative; 1e-13 is rounding.
    np.testing.assert_allclose(sky.kernel_shells.sum(axis=1), sky.kernel, rtol=1e-13, atol=0)
    assert np.all(sky.kernel_shells[:, :3].sum(axis=1) > 0)  # the boxes' shells hold something
    sky.save(tmp_path / "sky.h5")
    loaded = raytrace.SkyResult.load(tmp_path / "sky.h5")
    np.testing.assert_array_equal(loaded.kernel_shells, sky.kernel_shells)
    np.testing.assert_array_equal(loaded.shell_map(mass[1], 2), sky.kernel_shells[:, 2, 1])
    assert loaded.pdf_check.bins.shape == (4, 4)


def test_the_reports_where_page_lists_the_class_shares(demo_bins_run, tmp_path):
    from raytrace.report.page import make_report

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        paths = make_report(demo_bins_run, tmp_path / "report")
    assert {"where_png", "where_pdf", "where_txt"} <= set(paths) and paths["where_png"].stat().st_size > 0
    lines = [line for line in paths["where_txt"].read_text().splitlines() if " %" in line and "e-1" in line]
    share = demo_bins_run.redshift_bins.class_share()
    assert len(lines) == 5
    for line in lines:
        k = int(np.argmin(np.abs(demo_bins_run.mass_eV / float(line.split()[0]) - 1)))
        shown = [float(value) for value in re.findall(r"([\d.]+) %", line)]
        # Printed to one decimal of a percent; the shares themselves are tested against the reference tracer above.
        np.testing.assert_allclose(shown, 100 * np.nan_to_num(share[:, k]), atol=0.051)
