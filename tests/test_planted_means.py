"""Means and limits against outside references, sharp enough to see planted errors.

Each test here was shown to fail on one plausible error that the rest of the suite let
through (issue 25); the error is named beside the test. Sources: the one-point-PDF mean of
tests/reference_tracer.py (PHYSICS.md section 4; Caputo, Liu, Mishra-Sharma & Ruderman
2020, PRL 125, 221303) of an explicitly blended field; the dispersion measure of Deng &
Zhang 2014 (ApJL 783, L35) integrated with scipy.integrate.quad over astropy's Planck18
H(z) and x_e(z) from CAMB run by hand; the FIRAS monopole table of Fixsen et al. 1996
(ApJ 473, 576, Table 4) read here with numpy, astropy's blackbody and a profile chi^2
minimised with scipy.optimize.
"""

from itertools import pairwise

import astropy.constants as const
import astropy.units as u
import numpy as np
import pytest
from astropy.cosmology import Planck18
from astropy.modeling.models import BlackBody
from conftest import camb_background_for_planck18
from reference_tracer import PLASMA_M2_PER_DENSITY, one_point_pdf_mean
from scipy import integrate, ndimage, optimize, stats
from scipy.interpolate import CubicSpline

import raytrace
from raytrace.boxes import Box, BoxSeries
from raytrace.limits.spectral import spectral_limit
from raytrace.physics.background import MeanPlasma
from raytrace.physics.ionisation import IonisationHistory
from raytrace.statistics.onepoint import FrozenBlendWarning

X_E = 1.08  # constant ionisation: hydrogen plus singly ionised helium (PHYSICS.md section 5)


# -- the one-point mean of blended snapshots -------------------------------------------------------
# Planted error this catches: the later snapshot's blend weight scaled by 1.03 in the one-point mean
# (kernels/onepoint.py), which moved the demo series' blended mean by -4.6 to +4.1 %. The suite's only
# blended one-point test used uniform boxes and checked the warning.
def lumpy_field(seed, cells=16, sigma=0.8):
    """exp of smoothed Gaussian noise with ln-standard deviation ``sigma``: a broad, non-uniform PDF."""
    field = ndimage.gaussian_filter(np.random.default_rng(seed).standard_normal((cells,) * 3), 1.0, mode="wrap")
    return np.exp(sigma * field / field.std())


def test_blended_one_point_mean_equals_the_reference_integral_of_the_blended_field():
    plasma = MeanPlasma(None, IonisationHistory.constant(X_E))
    n_com = float(plasma.mean_comoving_electron_density_cm3(0.0))
    low_z, high_z = lumpy_field(1), 1.6 * lumpy_field(2)  # two different fields, the later one denser
    boxes = [Box.from_array(values * n_com, "40 cMpc", z, quantity="n_e_comoving", plasma=plasma)
             for values, z in ((low_z, 0.0), (high_z, 1.0))]
    steps = 8
    mass = np.geomspace(np.sqrt(PLASMA_M2_PER_DENSITY * n_com * np.percentile(low_z, 2)),
                        np.sqrt(PLASMA_M2_PER_DENSITY * n_com * np.percentile(high_z, 98) * 8), 10)
    with pytest.warns(FrozenBlendWarning):
        result = raytrace.pdf_mean(BoxSeries(boxes, blend=True), mass, 1.0, include_background=False, plasma=plasma,
                                   points=1 << 22, blend_steps=steps, n_jobs=2)
    # The reference: in each of the 8 redshift slices [z_a, z_b) the field (1 - w) A + w B, w = the slice's
    # midpoint redshift (linear in z from the snapshot at z = 0 to the one at z = 1), its one-point
    # integral over the resonances falling in that slice; slices summed, errors in quadrature.
    a, b = (box.data.astype(np.float64) * box.comoving_scale for box in boxes)
    expected, variance = np.zeros(mass.size), np.zeros(mass.size)
    edges = np.linspace(0.0, 1.0, steps + 1)
    for j, (z_a, z_b) in enumerate(pairwise(edges)):
        w = 0.5 * (z_a + z_b)
        part, error = one_point_pdf_mean((1 - w) * a + w * b, 1.0, mass, z_b, 1_000_000, seed=100 + j, z_min=z_a)
        expected += part
        variance += error**2
    error = np.hypot(result.error, np.sqrt(variance))
    # Measured pulls at most 1.4 (combined errors 0.2 % mid-range to 4 % at the lowest mass); 4 combined
    # standard errors for 10 masses. With the weight scaled by 1.03 the pulls reach 12.7 (-4.6 % to +9.7 %).
    pull = (result.kernel - expected) / error
    assert np.all(np.abs(pull) < 4), pull
    assert np.all(error[2:-2] < 0.01 * expected[2:-2])  # sharp enough to see a 3 % change where the PDF is steep


# -- the dispersion measure with the background ------------------------------------------------------
# Planted error this catches: the background's dispersion measure without its (1+z) (tracing/checks.py,
# background_dispersion_measure); the suite's DM test ran without the background.
def deng_zhang_dispersion_measure(z_from, z_to, x_e, helium_fraction):
    """Deng & Zhang 2014, eq. 4 with f_IGM = 1: DM = 3 c H0 Omega_b / (8 pi G m_p) int chi (1+z) / E(z) dz,
    chi = (1 - Y_p) x_e with x_e = n_e / n_H (their Y_H chi_e,H + Y_He chi_e,He / 2), in pc cm^-3."""
    prefactor = (3 * const.c * Planck18.H0 * Planck18.Ob0 / (8 * np.pi * const.G * const.m_p)).to_value(u.pc / u.cm**3)
    steps = [z for z in (3.5, 7.0, 7.5, 8.0, 8.5) if z_from < z < z_to]  # helium's and hydrogen's reionisation
    value, _ = integrate.quad(lambda z: (1 - helium_fraction) * x_e(z) * (1 + z) / Planck18.efunc(z), z_from, z_to,
                              epsabs=0, epsrel=1e-11, limit=400, points=steps or None)
    return value * prefactor


def test_dispersion_measure_with_the_background_follows_deng_and_zhang():
    camb = camb_background_for_planck18()
    z_grid = np.linspace(0.0, 12.0, 48001)
    x_e = CubicSpline(z_grid, np.asarray(camb.get_background_redshift_evolution(z_grid, ["x_e"], format="array"))[:, 0])
    helium = camb.Params.YHe  # CAMB's own Y_p, not read back from raytrace
    # One uniform box at z = 0 serves z < 0.5, at Deng & Zhang's comoving electron density of today,
    # (1 - Y_p) x_e(0) Omega_b 3 H0^2 / (8 pi G m_p); the homogeneous background (CAMB x_e, Planck 2018)
    # the rest to z = 10, through both reionisations.
    n_box = ((1 - helium) * x_e(0.0) * Planck18.Ob0 * 3 * Planck18.H0**2 / (8 * np.pi * const.G * const.m_p)).to_value(
        u.cm**-3)
    box = Box.from_array(np.full((8,) * 3, n_box), "50 cMpc", 0.0, quantity="n_e_comoving")
    mass = np.array([2.5e-14])  # resonates in the box (z ~ 0.3): no warning about the probed range
    result = raytrace.cast_sightlines(box, mass, 3, z_max=10.0, z_boxes=0.5, seed=1)
    boxes_part = deng_zhang_dispersion_measure(0.0, 0.5, lambda z: x_e(0.0), helium)
    background_part = deng_zhang_dispersion_measure(0.5, 10.0, x_e, helium)
    # The background alone: measured 8e-9 (the engine's trapezoid in ln(1+z) over 4001 points and its
    # spline of x_e); 1e-7 leaves a factor 12. Without its (1+z) it is 4 times too small.
    assert result.dispersion_measure_background == pytest.approx(background_part, rel=1e-7)
    # What a user reads, boxes plus background on every ray: measured 2.3e-9 (the boxes' part, 8.6 % of it,
    # is good to 6e-8: the engine's tables in 1+z); 1e-7.
    np.testing.assert_allclose(result.dispersion_measure, boxes_part + background_part, rtol=1e-7)


# -- the spectral limit from the published FIRAS table ------------------------------------------------
# Planted error this catches: a 1 % unit slip in the FIRAS errors (limits/spectrum.py, the monopole reader's
# kJy/sr -> MJy/sr for sigma), which only the reader test saw. Here the result, epsilon_max, is
# compared with a fit written here from the shared copy of the table.
def firas_profile_limit(kernel_eV, data_folder, confidence=0.95):
    """(epsilon_max, s_hat, chi^2 without distortion) from the shared FIRAS table: I = B_nu(T) (1 - s K / (h nu))
    with B from astropy and T free; the profile chi^2(s) = min over T, minimised with scipy.optimize; the
    one-sided limit where chi^2 rises by Phi^-1(CL)^2 over its minimum on s >= 0 (PHYSICS.md section 6)."""
    table = np.loadtxt(data_folder / "cmb_monopole_fixsen1996.txt", comments="#")
    nu = (table[:, 0] / u.cm).to_value(u.Hz, equivalencies=u.spectral())
    check = BlackBody(2.725 * u.K, scale=1.0 * u.MJy / u.sr)(nu * u.Hz).to_value(u.MJy / u.sr)
    # Planck's law with astropy's CODATA 2018 constants (fast enough for the minimiser), checked once
    # against astropy's BlackBody.
    prefactor = (2 * const.h * (nu * u.Hz) ** 3 / const.c**2).to_value(u.MJy)
    x_per_kelvin = (const.h * nu * u.Hz / const.k_B).to_value(u.K)

    def blackbody(temperature):
        return prefactor / np.expm1(x_per_kelvin / temperature)

    np.testing.assert_allclose(blackbody(2.725), check, rtol=1e-13)
    intensity = check + (table[:, 2] * u.kJy / u.sr).to_value(u.MJy / u.sr)  # 2.725 K blackbody + residual
    sigma = (table[:, 3] * u.kJy / u.sr).to_value(u.MJy / u.sr)
    shape = kernel_eV / (const.h.to_value(u.eV * u.s) * nu)

    def chi2(s):
        # T = 2.725 K + 1e-5 x K: the minimiser's tolerance is relative to x, so T is found to ~1e-13 K.
        def at(x):
            return np.sum(((intensity - blackbody(2.725 + 1e-5 * x) * (1 - s * shape)) / sigma) ** 2)
        return optimize.minimize_scalar(at, bounds=(-100.0, 100.0), method="bounded", options={"xatol": 1e-9}).fun

    scale = 1e-14  # s in units where the minimiser's steps are of order one
    s_hat = optimize.minimize_scalar(lambda x: chi2(x * scale), bracket=(-1.0, 1.0), tol=1e-10).x * scale
    floor = chi2(max(s_hat, 0.0)) + stats.norm.ppf(confidence) ** 2
    start = max(s_hat, 0.0)
    s_max = optimize.brentq(lambda s: chi2(s) - floor, start, start + 1e3 * scale, xtol=1e-30, rtol=1e-12)
    return np.sqrt(s_max), s_hat, chi2(0.0)


def test_spectral_limit_from_the_published_table_equals_a_profile_fit_written_here(shared_data):
    kernel = 1.0e6  # eV, of the size of the background's near m ~ 1e-13 eV
    limit = spectral_limit(1e-13, kernel)  # the shipped copy of the table (test_spectrum.py: equal to the shared one)
    epsilon_max, s_hat, chi2 = firas_profile_limit(kernel, shared_data)
    # epsilon_max: measured 4.8e-6, the code's model linearised around the undistorted best fit (B(T) to
    # first order, the distortion on B(T0)); this profile with that linear model instead agrees to 1e-12.
    # 5e-5 leaves a factor 10; a 1 % slip in sigma moves epsilon_max by 0.5 % and the chi^2 by 2 %.
    assert limit.epsilon_max[0] == pytest.approx(epsilon_max, rel=5e-5)
    # chi^2 of the undistorted fit: measured 7e-12 (the minimiser); 1e-9.
    assert limit.chi2 == pytest.approx(chi2, rel=1e-9)
    # s_hat (-4.5e-15 here, below the boundary): measured 1.7e-6 of epsilon_max^2; 1e-5 of it.
    assert limit.s_hat[0] == pytest.approx(s_hat, abs=1e-5 * epsilon_max**2)
