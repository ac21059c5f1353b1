"""The sightline engine against independent calculations.

Sources: PHYSICS.md sections 3, 4 and 7 (homogeneous kernel, one-point-PDF
mean of Caputo, Liu, Mishra-Sharma & Ruderman 2020, PRL 125, 221303, and the
dispersion measure of Deng & Zhang 2014, ApJL 783, L35); distances and H(z)
from astropy; the reference sampling of the box from scipy.ndimage.
"""

import numpy as np
import pytest
from astropy.cosmology import Planck18
from scipy import integrate, ndimage, optimize

import raytrace
from raytrace.background import MeanPlasma
from raytrace.boxes import Box, BoxSeries
from raytrace.errors import InputError, ProbedRangeWarning
from raytrace.ionisation import IonisationHistory

from reference_tracer import PLASMA_M2_PER_DENSITY

# 4 pi alpha / m_e in eV^2 per cm^-3 (PHYSICS.md section 1, whose NRL Plasma Formulary check value
# 8.98 kHz sqrt(n_e / cm^-3) has 3 digits), from the exact CODATA constants in astropy.
M2_PER_DENSITY = PLASMA_M2_PER_DENSITY
HBAR_EV_S = 6.582119569e-16  # CODATA 2018
X_E = 1.08  # constant ionisation: hydrogen plus singly ionised helium (PHYSICS.md section 5)


@pytest.fixture(scope="module")
def constant_plasma():
    return MeanPlasma(None, IonisationHistory.constant(X_E))


def uniform_series(plasma, redshifts=(0.0, 1.0, 2.0, 3.0), cells=16, size="100 cMpc"):
    n_com = float(plasma.mean_comoving_electron_density_cm3(0.0))
    boxes = [Box.from_array(np.full((cells,) * 3, n_com, np.float32), size, z, quantity="n_e_comoving", plasma=plasma)
             for z in redshifts]
    return BoxSeries(boxes)


def homogeneous_kernel(mass, n_com):
    """pi m^2 / (3 (1+z_r) H(z_r)) at the one z_r where 4 pi alpha n_com (1+z)^3 / m_e = m^2 (PHYSICS.md s.3)."""
    one_plus_z = (mass**2 / (M2_PER_DENSITY * n_com)) ** (1 / 3)
    hubble_eV = Planck18.H(one_plus_z - 1).to_value("1/s") * HBAR_EV_S
    return np.pi * mass**2 / (3 * one_plus_z * hubble_eV), one_plus_z - 1


def test_uniform_series_gives_the_homogeneous_kernel_on_every_ray(constant_plasma):
    series = uniform_series(constant_plasma)
    n_com = float(constant_plasma.mean_comoving_electron_density_cm3(0.0))
    mass = np.geomspace(2.0e-14, 3.0e-13, 24)
    # Masses resonating beyond z = 3 are outside what the boxes span: the run says so.
    with pytest.warns(ProbedRangeWarning, match="outside the plasma masses the boxes span"):
        result = raytrace.cast_sightlines(series, mass, 40, z_max=20.0, plasma=constant_plasma, seed=3)
    expected, z_r = homogeneous_kernel(mass, n_com)
    # Measured 2e-6 (the engine's linear 1+z over a cell and its tables); 1e-4 is the tolerance.
    inside = (z_r > 0.05) & (z_r < 2.95)
    assert inside.sum() > 5
    np.testing.assert_allclose(result.kernel_boxes[:, inside], np.broadcast_to(expected[inside], (40, inside.sum())), rtol=1e-4)
    assert np.all(result.crossings[:, inside] == 1)
    # Beyond the boxes (z > 3) the background part carries the resonance, the boxes nothing.
    beyond = z_r > 3.05
    assert beyond.sum() > 3
    assert np.all(result.kernel_boxes[:, beyond] == 0)
    np.testing.assert_allclose(result.kernel_background[beyond], expected[beyond], rtol=0.01)


def test_mean_dispersion_measure_of_uniform_series(constant_plasma):
    # Deng & Zhang 2014: DM(z) = integral c n_e,com (1 + z) dz / H(z) for a fully mixed IGM
    # (f_IGM = 1); n_H0 from astropy's critical density, Omega_b and Y_p = 0.2454; m_p CODATA.
    series = uniform_series(constant_plasma)
    result = raytrace.cast_sightlines(series, np.array([1e-13]), 8, z_max=3.0, plasma=constant_plasma,
                                      include_background=False)
    m_p_g = 1.67262192e-24
    n_H0 = (1 - constant_plasma.ionisation.helium_fraction) * Planck18.Ob0 * Planck18.critical_density0.to_value("g/cm3") / m_p_g
    c_km_s = 299792.458
    integral, _ = integrate.quad(lambda z: (1 + z) / Planck18.H(z).to_value("km/(s Mpc)"), 0, 3.0)
    expected = X_E * n_H0 * c_km_s * integral * 1e6  # Mpc -> pc
    assert result.dispersion_measure.mean() == pytest.approx(expected, rel=0.005)


def smooth_lognormal_box(cells=64, sigma_gauss=0.5, smoothing_cells=2.0, seed=11):
    """A smooth log-normal overdensity (Coles & Jones 1991): exp of a smoothed Gaussian field."""
    rng = np.random.default_rng(seed)
    gauss = ndimage.gaussian_filter(rng.standard_normal((cells,) * 3), smoothing_cells, mode="wrap")
    gauss *= sigma_gauss / gauss.std()
    return np.exp(gauss - sigma_gauss**2 / 2).astype(np.float32)


def pdf_mean_kernel(box_values, n_com_unit, mass, z_max, samples=2_000_000, seed=5):
    """<K>(m) = pi m^2 integral dz p_lnD(ln D*) / ((1+z)^2 H(z)), D* = m^2 / (4 pi alpha n_unit(1+z)^3 / m_e)
    (PHYSICS.md section 4; Caputo et al. 2020), with p_lnD the one-point PDF of the field the rays
    sample: the trilinear interpolant, here sampled with scipy.ndimage.map_coordinates (order 1,
    grid-wrap) at uniform random points, cell values at cell centres. The box holds
    n_e,comoving = box_values * n_com_unit, so D is measured in units of n_com_unit."""
    cells = box_values.shape[0]
    rng = np.random.default_rng(seed)
    points = rng.random((3, samples)) * cells - 0.5
    values = ndimage.map_coordinates(box_values.astype(np.float64), points, order=1, mode="grid-wrap")
    ln_d = np.log(values)
    density, edges = np.histogram(ln_d, bins=400, density=True)
    centres = 0.5 * (edges[1:] + edges[:-1])
    z = np.linspace(0.0, z_max, 4001)
    hubble_eV = Planck18.H(z).to_value("1/s") * HBAR_EV_S
    out = []
    for m in mass:
        ln_d_star = np.log(m**2 / (M2_PER_DENSITY * n_com_unit * (1 + z) ** 3))
        p = np.interp(ln_d_star, centres, density, left=0.0, right=0.0)
        out.append(np.pi * m**2 * integrate.trapezoid(p / ((1 + z) ** 2 * hubble_eV), z))
    return np.array(out)


@pytest.fixture(scope="module")
def lognormal_run(constant_plasma):
    values = smooth_lognormal_box()
    n_com = float(constant_plasma.mean_comoving_electron_density_cm3(0.0))
    box = Box.from_array(values * n_com, "100 cMpc", 0.0, quantity="n_e_comoving", plasma=constant_plasma)
    mass = np.geomspace(1.2e-14, 4.5e-14, 12)
    result = raytrace.cast_sightlines(box, mass, 3000, z_max=1.0, include_background=False,
                                      plasma=constant_plasma, seed=1, n_jobs=2)
    return values, n_com, box, mass, result


def test_monte_carlo_mean_matches_one_point_pdf_integral(lognormal_run):
    values, n_com, box, mass, result = lognormal_run
    expected = pdf_mean_kernel(values, n_com, mass, 1.0)
    well_sampled = result.crossings.sum(axis=0) >= 300
    assert well_sampled.sum() >= 8
    np.testing.assert_allclose(result.mean()[well_sampled], expected[well_sampled], rtol=0.03)
    # The spread between rays is real and smaller than the mean (many crossings per ray).
    assert np.all(result.standard_error()[well_sampled] < 0.05 * result.mean()[well_sampled])


def test_same_seed_same_result_for_any_jobs_or_batch(lognormal_run, constant_plasma):
    values, n_com, box, mass, _ = lognormal_run
    runs = [raytrace.cast_sightlines(box, mass, 37, z_max=0.5, include_background=False, plasma=constant_plasma,
                                     seed=9, n_jobs=jobs, batch_size=batch)
            for jobs, batch in ((1, 256), (2, 256), (1, 5), (2, 16))]
    for other in runs[1:]:
        assert np.array_equal(other.kernel_boxes, runs[0].kernel_boxes)
        assert np.array_equal(other.crossings, runs[0].crossings)
        assert np.array_equal(other.dispersion_measure_boxes, runs[0].dispersion_measure_boxes)
        assert np.array_equal(other.direction, runs[0].direction)
    different = raytrace.cast_sightlines(box, mass, 37, z_max=0.5, include_background=False,
                                         plasma=constant_plasma, seed=10)
    assert not np.array_equal(different.kernel_boxes, runs[0].kernel_boxes)


def test_directions_are_isotropic(lognormal_run):
    # For unit vectors uniform on the sphere: mean 0 with variance 1/(3N) per component, and
    # second moment I/3 (common practice, no source); 5 sigma bounds.
    values, n_com, box, mass, result = lognormal_run
    d = result.direction
    n = d.shape[0]
    np.testing.assert_allclose(np.linalg.norm(d, axis=1), 1.0, rtol=1e-12)
    assert np.all(np.abs(d.mean(axis=0)) < 5 / np.sqrt(3 * n))
    second = d.T @ d / n
    # Var(x^2) = 1/5 - 1/9 = 4/45 for a uniform direction; off-diagonal Var(xy) = 1/15.
    assert np.all(np.abs(np.diag(second) - 1 / 3) < 5 * np.sqrt(4 / 45 / n))
    off = second[~np.eye(3, dtype=bool)]
    assert np.all(np.abs(off) < 5 * np.sqrt(1 / 15 / n))


def test_bad_input_is_refused(constant_plasma):
    series = uniform_series(constant_plasma, redshifts=(0.0,))
    good = np.geomspace(1e-14, 1e-13, 4)
    with pytest.raises(InputError, match="z_max"):
        raytrace.cast_sightlines(series, good, 2, z_max=5000.0, plasma=constant_plasma)
    with pytest.raises(InputError, match="mass_eV"):
        raytrace.cast_sightlines(series, np.array([1e-14, -1e-13]), 2, z_max=1.0, plasma=constant_plasma)
    with pytest.raises(InputError, match="increasing"):
        raytrace.cast_sightlines(series, good[::-1], 2, z_max=1.0, plasma=constant_plasma)
    with pytest.raises(InputError, match="n_rays"):
        raytrace.cast_sightlines(series, good, 0, z_max=1.0, plasma=constant_plasma)
