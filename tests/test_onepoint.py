"""The one-point-PDF mean and the built-in check against independent calculations.

Sources: PHYSICS.md section 3 (the homogeneous kernel pi m^2 / (3 (1+z_r) H(z_r))) and
section 4 (the analytic PDF method of Caputo, Liu, Mishra-Sharma & Ruderman 2020,
PRL 125, 221303, with a log-normal density PDF, written out here); H(z) from astropy's
Planck18; the plasma constant 4 pi alpha (hbar c)^3 / (m_e c^2) from CODATA 2018 values.
"""

import math
import warnings

import numpy as np
import pytest
from astropy.cosmology import Planck18
from scipy import integrate, optimize, special

import raytrace
from raytrace.boxes import Box, BoxSeries
from raytrace.core.errors import InputError
from raytrace.physics.background import MeanPlasma
from raytrace.physics.ionisation import IonisationHistory
from raytrace.statistics.meancheck import MeanCheck, MeanCheckWarning
from raytrace.statistics.onepoint import FrozenBlendWarning, PdfMean, pdf_mean
from raytrace.statistics.results import load_mean_result

# CODATA 2018: alpha, hbar c in eV cm, m_e c^2 in eV, hbar in eV s.
ALPHA, HBAR_C_EV_CM, M_E_EV, HBAR_EV_S = 7.2973525693e-3, 1.973269804e-5, 510998.95, 6.582119569e-16
M2_PER_DENSITY = 4 * math.pi * ALPHA * HBAR_C_EV_CM**3 / M_E_EV  # eV^2 per cm^-3 (PHYSICS.md s.1)
X_E = 1.08  # hydrogen plus singly ionised helium (PHYSICS.md s.5)


@pytest.fixture(scope="module")
def plasma():
    return MeanPlasma(None, IonisationHistory.constant(X_E))


def hubble_eV(z):
    return Planck18.H(z).to_value("1/s") * HBAR_EV_S


def test_uniform_series_gives_the_homogeneous_kernel(plasma):
    # PHYSICS.md s.3: n_e = n_com (1+z)^3 has one resonance, (1+z_r)^3 = m^2 / (M2 n_com), where
    # K = pi m^2 / (3 (1+z_r) H(z_r)); boxes to z = 3, the same homogeneous universe beyond.
    n_com = float(plasma.mean_comoving_electron_density_cm3(0.0))
    boxes = [Box.from_array(np.full((16,) * 3, n_com, np.float32), "100 cMpc", z, quantity="n_e_comoving",
                            plasma=plasma) for z in (0.0, 1.0, 2.0, 3.0)]
    mass = np.geomspace(2.0e-14, 3.0e-13, 24)
    result = pdf_mean(BoxSeries(boxes), mass, 20.0, plasma=plasma, points=1 << 16)
    one_plus_z = (mass**2 / (M2_PER_DENSITY * n_com)) ** (1 / 3)
    expected = np.pi * mass**2 / (3 * one_plus_z * hubble_eV(one_plus_z - 1))
    assert np.all((one_plus_z > 1.05) & (one_plus_z < 21))
    # 1e-4 (the tolerance): float32 storage of n_com (6e-8) and the tabulated F (1e-7) are far below it.
    np.testing.assert_allclose(result.kernel, expected, rtol=1e-4)
    assert np.all(result.kernel_boxes[one_plus_z < 3.9] > 0) and np.all(result.kernel_boxes[one_plus_z > 4.1] == 0)


def tent_lognormal_box(cells, mu, sigma):
    """A box whose volume PDF of ln n is Normal(mu, sigma) by construction: along x, ln n is the
    Gaussian quantile of 2x/L over the first half and its mirror over the second (uniform x mapped
    through the quantile function), constant along y and z. Values at cell centres."""
    x = (np.arange(cells) + 0.5) / cells
    u = np.where(x < 0.5, 2 * x, 2 * (1 - x))
    line = np.exp(mu + sigma * math.sqrt(2) * special.erfinv(2 * u - 1))
    return np.broadcast_to(line[:, None, None], (cells,) * 3).astype(np.float32)


def lognormal_kernel(mass, mu, sigma, z_max):
    """Caputo et al. 2020 with a log-normal PDF: <K> = pi m^2 int_0^zmax dz p(ln n = L - 3 ln(1+z)) / ((1+z)^2 H),
    p the Normal(mu, sigma) density of ln n_com, L = ln(m^2 / M2) (PHYSICS.md s.4), by scipy.quad."""
    def integrand(z, m):
        y = math.log(m**2 / M2_PER_DENSITY) - 3 * math.log1p(z)
        density = math.exp(-0.5 * ((y - mu) / sigma) ** 2) / (sigma * math.sqrt(2 * math.pi))
        return density / ((1 + z) ** 2 * hubble_eV(z))

    return np.array([np.pi * m**2 * integrate.quad(integrand, 0.0, z_max, args=(m,), epsabs=0, epsrel=1e-10)[0]
                     for m in mass])


def test_a_blended_series_says_its_mean_is_approximate(plasma):
    # Two uniform snapshots at z = 0 and 1, the second 1.5 times as dense: the blend's rate
    # ln(1.5) / 1 against the expansion's 3 / (1 + 1) at z = 1 is 27 % (computed here), and the
    # warning must name that size.
    n_a = float(plasma.mean_comoving_electron_density_cm3(0.0))
    boxes = [Box.from_array(np.full((8,) * 3, n, np.float64), "50 cMpc", z, quantity="n_e_comoving", plasma=plasma)
             for z, n in ((0.0, n_a), (1.0, 1.5 * n_a))]
    mass = np.array([math.sqrt(M2_PER_DENSITY * n_a * 2.0)])
    with pytest.warns(FrozenBlendWarning, match=f"up to {100 * math.log(1.5) * 2 / 3:.2g} %"):
        pdf_mean(BoxSeries(boxes, blend=True), mass, 1.0, include_background=False, plasma=plasma, points=1 << 12)


def test_lognormal_box_gives_the_closed_form_integral(plasma):
    sigma, z_max = 0.5, 0.2
    mu = math.log(float(plasma.mean_comoving_electron_density_cm3(0.0)))
    box = Box.from_array(tent_lognormal_box(128, mu, sigma), "100 cMpc", 0.0, quantity="n_e_comoving", plasma=plasma)
    # Masses whose resonant ln n (a window 3 ln 1.2 = 0.55 wide) stays within 1.6 sigma of mu: the box's
    # cell centres reach 2.4 sigma, and the tail beyond them is where the interpolant cannot follow.
    centre = np.array([-0.8, -0.4, 0.0, 0.4, 0.8]) * sigma + mu
    mass = np.sqrt(M2_PER_DENSITY * np.exp(centre + 0.5 * 3 * math.log(1.2)))
    result = pdf_mean(box, mass, z_max, include_background=False, plasma=plasma, points=1 << 23, n_jobs=2)
    expected = lognormal_kernel(mass, mu, sigma, z_max)
    # Within 3 of the estimate's own errors (points, groups, binning); the linear interpolation
    # between the box's 64 cells per half adds ~1e-4 of <K>, below those errors (about 3e-4 of <K>).
    assert np.all(result.error < 1e-3 * result.kernel)
    assert np.all(np.abs(result.kernel - expected) < 3 * result.error + 2e-4 * expected)


def test_demo_series_pdf_mean_matches_the_sightline_mean(demo_dir):
    # PHYSICS.md s.4: over random rays the mean kernel is the one-point-PDF integral of the field the
    # rays sample; the built-in check (every run carries it) must pass at every probed mass.
    series = raytrace.load_series(str(demo_dir / "demo_z*.h5"))
    mass = np.geomspace(5e-15, 3.5e-13, 12)
    # 1000 rays: the top 1 % of rays carry 25-60 % of the variance here, so with a few hundred rays the
    # standard error itself is poorly known (300 rays gave one 3.8-sigma mass; 1000 and 2000 rays none over 1.6).
    result = raytrace.cast_sightlines(series, mass, 1000, z_max=6.0, seed=7, n_jobs=2)
    check = result.mean_check()
    assert check is not None and result.pdf_check.run["z_max"] == 6.0
    probed = result.crossings.sum(axis=0) >= 100
    assert probed.sum() >= 10
    assert np.all(np.abs(check.pull()[probed]) < 3), check.pull()


def test_check_names_the_discrepant_masses():
    # A mean 10 standard errors off at the second mass: the message names it and only it.
    mass = np.array([1e-14, 2e-14, 3e-14])
    check = MeanCheck(mass, np.array([1.0, 2.0, 3.0]), np.array([0.1, 0.1, 0.1]), np.array([1.05, 1.0, 3.1]),
                      np.zeros(3), "std / sqrt(rays)")
    assert list(check.discrepant()) == [1]
    assert "2e-14 eV" in check.message() and "1e-14 eV" not in check.message()
    np.testing.assert_allclose(check.ratio(), [1 / 1.05, 2.0, 3 / 3.1])


def test_pdf_mean_round_trips_and_feeds_limits(plasma, tmp_path, demo_dir):
    series = raytrace.load_series(str(demo_dir / "demo_z0.h5"))
    mass = np.geomspace(1e-14, 1e-13, 8)
    result = pdf_mean(series, mass, 1.0, include_background=False, plasma=plasma, points=1 << 18)
    path = result.save(tmp_path / "mean.h5")
    again = load_mean_result(path)
    assert isinstance(again, PdfMean)
    np.testing.assert_array_equal(again.kernel, result.kernel)
    with pytest.raises(ValueError, match="read-only"):
        result.kernel_boxes[0] = 1.0  # immutable arrays (read-only)
    from raytrace.limits.spectral import UnconstrainedMassWarning, result_kernels, sightline_limits

    kernels = result_kernels(again, plasma)
    assert kernels["spread_kernels_eV"] is None
    # The homogeneous universe to z = 1 resonates only between its plasma masses at z = 0 and 1 (about
    # 1.4e-14 to 5e-14 eV, PHYSICS.md section 3): the grid's ends are unconstrained there, and said so.
    with pytest.warns(UnconstrainedMassWarning, match=r"homogeneous universe.*K = 0 \(no resonance\)"):
        limits = sightline_limits(**kernels)
    assert np.all(np.isfinite(limits.all_curves()[0].epsilon_max))


def test_sightline_file_keeps_its_check(tmp_path, plasma):
    n_com = float(plasma.mean_comoving_electron_density_cm3(0.0))
    rng = np.random.default_rng(3)
    box = Box.from_array((n_com * rng.lognormal(0, 0.3, (16,) * 3)).astype(np.float32), "50 cMpc", 0.0,
                         quantity="n_e_comoving", plasma=plasma)
    mass = np.geomspace(1.5e-14, 2.5e-14, 4)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", MeanCheckWarning)  # 20 rays: the check may well find them too few
        result = raytrace.cast_sightlines(box, mass, 20, z_max=0.5, include_background=False, plasma=plasma)
    result.save(tmp_path / "rays.h5")
    loaded = raytrace.SightlineResult.load(tmp_path / "rays.h5")
    np.testing.assert_array_equal(loaded.pdf_check.kernel, result.pdf_check.kernel)


def test_bad_input_is_refused(plasma, demo_dir):
    series = raytrace.load_series(str(demo_dir / "demo_z0.h5"))
    with pytest.raises(InputError, match="^groups: expected a whole number >= 2"):
        pdf_mean(series, [1e-14], 1.0, include_background=False, plasma=plasma, groups=1)
    with pytest.raises(InputError, match="^mass_eV"):
        pdf_mean(series, [2e-14, 1e-14], 1.0, include_background=False, plasma=plasma)


def test_a_sky_check_uses_the_student_t_limit_of_its_12_faces():
    # The normal tail beyond 3 sigma (0.00135 a side, erfc(3/sqrt 2)/2) is the Student-t tail beyond t_11,
    # found here from the t density written out (Student 1908) by quadrature and a root (about 3.85).
    nu = 11
    norm_c = math.gamma((nu + 1) / 2) / (math.sqrt(nu * math.pi) * math.gamma(nu / 2))
    tail = 0.5 * math.erfc(3 / math.sqrt(2))
    t_limit = optimize.brentq(lambda t: integrate.quad(lambda x: norm_c * (1 + x * x / nu) ** (-(nu + 1) / 2),
                                                       t, np.inf)[0] - tail, 2.0, 8.0)
    mass = np.array([1e-14, 2e-14])
    sky = MeanCheck(mass, np.array([1.0, 1.0]), np.array([0.1, 0.1]), np.array([1.35, 1.45]), np.zeros(2),
                    "batch means over the 12 base HEALPix pixels", dof=11)
    assert sky.limit() == pytest.approx(t_limit, rel=1e-6)
    assert list(sky.discrepant()) == [1]  # pulls -3.5 (within 3.85) and -4.5
    assert "light cone" in sky.message()
