"""Homogeneous-universe conversion kernel (PHYSICS.md sections 2, 3 and 5).

References, all computed here without the project's code: astropy for H(z), the
critical density and the physical constants; CAMB called directly for x_e(z);
scipy.optimize.brentq for the resonance redshifts; a finite difference of CAMB's
x_e for the rate d ln m_gamma^2/dt at each resonance.
"""

import astropy.constants as const
import astropy.units as u
import numpy as np
import pytest
from astropy.cosmology import FlatLambdaCDM, Planck18
from conftest import camb_background_for_planck18
from scipy.optimize import brentq

from raytrace.core.errors import InputError
from raytrace.physics.background import MeanPlasma, background_kernel
from raytrace.physics.ionisation import IonisationHistory

HBAR_EV_S = const.hbar.to_value(u.eV * u.s)


def _mass2_per_density_eV2_cm3():
    """(hbar omega_p)^2 per cm^-3 from omega_p^2 = n e^2 / (eps0 m_e) (SI, NRL Formulary's definition)."""
    omega2 = (1.0 * u.cm**-3 * const.e.si**2 / (const.eps0 * const.m_e)).to_value(u.s**-2)
    return HBAR_EV_S**2 * omega2


M2_PER_DENSITY = _mass2_per_density_eV2_cm3()


def _hydrogen_density0(astropy_cosmology, helium_fraction):
    """n_H0 = (1 - Y_p) Omega_b rho_crit / m_p (PHYSICS.md s.5), with astropy's rho_crit and m_p."""
    rho_crit = astropy_cosmology.critical_density0.to_value(u.g / u.cm**3)
    return (1.0 - helium_fraction) * astropy_cosmology.Ob0 * rho_crit / const.m_p.to_value(u.g)


def _hubble_eV(astropy_cosmology, z):
    return HBAR_EV_S * astropy_cosmology.H(z).to_value(u.s**-1)


# -- constant ionisation: one resonance, K = pi m^2 / (3 (1 + z_r) H(z_r)) ---------------------


@pytest.mark.parametrize(
    "astropy_cosmology, x_e, helium_fraction",
    [
        (Planck18, 1.0, 0.245),
        (Planck18, 1.164, 0.2454),
        (FlatLambdaCDM(H0=70, Om0=0.3, Ob0=0.05, Tcmb0=2.7255), 1.08, 0.24),
    ],
)
def test_constant_ionisation_matches_analytic_kernel(astropy_cosmology, x_e, helium_fraction):
    # PHYSICS.md s.3 "homogeneous universe check": n_e = x_e n_H0 (1+z)^3, one resonance z_r,
    # K = pi m^2 / (3 (1 + z_r) H(z_r)); z_r by brentq, H(z_r) from astropy.
    n_e0 = x_e * _hydrogen_density0(astropy_cosmology, helium_fraction)
    masses = np.array([2e-14, 1e-13, 1e-12, 1e-11, 1e-10])
    history = IonisationHistory.constant(x_e, helium_fraction=helium_fraction)
    kernel = background_kernel(masses, cosmology=astropy_cosmology, ionisation=history)
    assert kernel.shape == masses.shape
    for mass, found in zip(masses, kernel):
        target_density = mass**2 / M2_PER_DENSITY
        z_r = brentq(lambda z: np.log(n_e0 * (1 + z) ** 3 / target_density), 0.0, 3000.0, xtol=1e-13, rtol=1e-14)
        expected = np.pi * mass**2 / (3.0 * (1.0 + z_r) * _hubble_eV(astropy_cosmology, z_r))
        assert found == pytest.approx(expected, rel=1e-6)


def test_constant_ionisation_resonance_redshift_and_rate():
    # Same check on the crossing itself: z_r and d ln m^2/dt = -3 H(z_r).
    n_e0 = 1.0 * _hydrogen_density0(Planck18, 0.245)
    plasma = MeanPlasma(Planck18, IonisationHistory.constant(1.0, helium_fraction=0.245))
    mass = 3e-12
    found = plasma.crossings(mass)
    assert found.redshift.size == 1
    z_r = (mass**2 / M2_PER_DENSITY / n_e0) ** (1 / 3) - 1
    assert found.redshift[0] == pytest.approx(z_r, rel=1e-8)
    assert found.dln_m2_dt_eV[0] == pytest.approx(-3.0 * _hubble_eV(Planck18, z_r), rel=1e-8, abs=0)


def test_physics_md_example_today():
    # PHYSICS.md s.3: n_e0 = 2.2e-7 cm^-3 fully ionised, m_gamma0 = 1.74e-14 eV,
    # K(m = m_gamma0) = 2.2e5 eV; P = 9e-6 for epsilon = 1e-7, omega_0 = 2.35e-4 eV.
    # A fully ionised universe with helium doubly ionised: x_e = 1 + 2 f_He ~ 1.164 (s.5).
    plasma = MeanPlasma(Planck18, IonisationHistory.constant(1.164, helium_fraction=0.2454))
    assert float(plasma.mean_electron_density_cm3(0.0)) == pytest.approx(2.2e-7, abs=0.05e-7)
    m0 = float(plasma.mean_plasma_mass_eV(0.0))
    assert m0 == pytest.approx(1.74e-14, rel=0.01, abs=0)  # 1.75e-14 here: n_e0 = 2.21e-7, not 2.2e-7
    kernel = float(background_kernel(m0 * (1 + 1e-9), ionisation=plasma.ionisation)[0])
    assert kernel == pytest.approx(2.2e5, abs=0.05e5)
    assert 1e-14 * kernel / 2.35e-4 == pytest.approx(9e-6, abs=0.5e-6)


# -- CAMB ionisation: up to three resonances --------------------------------------------------


@pytest.fixture(scope="module")
def camb_reference():
    """CAMB by hand for astropy's Planck18 (the project's default) with tau = 0.0561."""
    results = camb_background_for_planck18()
    n_H0 = _hydrogen_density0(Planck18, results.Params.YHe)

    def x_e(z):
        z = np.atleast_1d(np.asarray(z, dtype=float))
        return np.asarray(results.get_background_redshift_evolution(z, ["x_e"], format="array"))[:, 0]

    def ln_m2(z):
        return np.log(M2_PER_DENSITY * n_H0 * x_e(z) * (1 + np.asarray(z)) ** 3)

    return ln_m2


@pytest.fixture(scope="module")
def plasma():
    return MeanPlasma()


def _reference_crossings(ln_m2, mass, z_min=0.0, z_max=1100.0):
    """Resonances of the CAMB curve: sign changes on a fine ln(1+z) grid, then brentq;
    at each, K = pi m^2 / ((1+z) |d ln m^2/dt|) with d ln m^2/dt = -H d ln m^2/d ln(1+z)
    (dt = -dz / ((1+z) H)) from a central difference of CAMB's x_e."""
    target = np.log(mass**2)
    u = np.linspace(np.log1p(z_min), np.log1p(z_max), 40001)
    f = ln_m2(np.expm1(u)) - target
    rows = []
    for i in np.flatnonzero(np.sign(f[:-1]) != np.sign(f[1:])):
        u_c = brentq(lambda x: ln_m2(np.expm1(x))[0] - target, u[i], u[i + 1], xtol=1e-12)
        step = 1e-5
        slope = (ln_m2(np.expm1(u_c + step))[0] - ln_m2(np.expm1(u_c - step))[0]) / (2 * step)
        z_c = np.expm1(u_c)
        rate = -_hubble_eV(Planck18, z_c) * slope
        rows.append((z_c, rate, np.pi * mass**2 / ((1 + z_c) * abs(rate))))
    return rows


@pytest.mark.parametrize("mass", [3e-14, 1e-13, 2e-13, 3e-13])
def test_three_resonances_against_camb(camb_reference, plasma, mass):
    # Around 1e-13 eV the mean plasma mass is crossed three times: falling after
    # recombination (z > 20), rising at reionisation (z ~ 8), falling after it (z < 7).
    expected = _reference_crossings(camb_reference, mass)
    assert len(expected) == 3
    z_ref = np.array([row[0] for row in expected])
    assert z_ref[0] < 7.0 < z_ref[1] < 12.0 < z_ref[2]
    found = plasma.crossings(mass)
    assert found.redshift.size == 3
    order = np.argsort(found.redshift)
    np.testing.assert_allclose(found.redshift[order], z_ref, rtol=1e-5)
    np.testing.assert_allclose(found.dln_m2_dt_eV[order], [row[1] for row in expected], rtol=1e-3)
    np.testing.assert_allclose(found.kernel_eV[order], [row[2] for row in expected], rtol=1e-3)
    # Falling, rising, falling: the sign of d ln m^2/dt along the photon's path.
    assert list(np.sign(found.dln_m2_dt_eV[order])) == [-1.0, 1.0, -1.0]
    total = sum(row[2] for row in expected)
    assert float(background_kernel(mass)[0]) == pytest.approx(total, rel=1e-3)


@pytest.mark.parametrize("mass, count", [(1e-14, 2), (1e-12, 1), (1e-11, 1), (1e-10, 1)])
def test_other_resonance_counts_against_camb(camb_reference, plasma, mass, count):
    # 1e-14 eV: below m_gamma today, above the pre-reionisation minimum: two crossings near z ~ 10-11.
    # Above ~5e-13 eV: only the post-recombination crossing.
    expected = _reference_crossings(camb_reference, mass)
    assert len(expected) == count
    found = plasma.crossings(mass)
    order = np.argsort(found.redshift)
    np.testing.assert_allclose(found.redshift[order], [row[0] for row in expected], rtol=1e-5)
    np.testing.assert_allclose(found.kernel_eV[order], [row[2] for row in expected], rtol=1e-3)


def test_redshift_range_selects_resonances(camb_reference, plasma):
    # Only resonances inside [z_min, z_max] count.
    mass = 1e-13
    for z_min, z_max, count in [(0.0, 20.0, 2), (5.0, 1100.0, 2), (5.0, 20.0, 1), (12.0, 40.0, 0)]:
        expected = _reference_crossings(camb_reference, mass, z_min, z_max)
        assert len(expected) == count
        kernel = float(plasma.kernel(mass, z_min, z_max)[0])
        assert kernel == pytest.approx(sum(row[2] for row in expected), rel=1e-3, abs=0.0)


def test_masses_outside_the_curve_give_zero(camb_reference, plasma):
    # Above the curve's maximum on [0, z_max] or below its minimum, nothing resonates; just inside,
    # something does. The maximum sits at z_max = 1100; to z_max = 100 it sits where reionisation ends
    # (x_e = 1.08 at z = 6, 3.2e-4 at z = 10 in PHYSICS.md section 5: the residual x_e (1+z)^3 at z = 100
    # stays below the reionised one at z ~ 7).
    for z_max in (1100.0, 100.0):
        z = np.expm1(np.linspace(0.0, np.log1p(z_max), 40001))
        m = np.exp(0.5 * camb_reference(z))
        top, bottom = m.max(), m.min()
        if z_max == 1100.0:
            assert m.argmax() == m.size - 1
        else:
            assert 6.0 < z[m.argmax()] < 10.0
        masses = np.array([0.5 * bottom, 0.95 * bottom, 1.05 * bottom, 0.99 * top, 1.01 * top, 2.0 * top])
        kernel = plasma.kernel(masses, 0.0, z_max)
        assert kernel[0] == 0.0 and kernel[1] == 0.0
        assert kernel[4] == 0.0 and kernel[5] == 0.0
        assert kernel[2] > 0 and kernel[3] > 0
        found = plasma.crossings(masses, 0.0, z_max)
        assert set(found.mass_index.tolist()) == {2, 3}
        assert np.sum(found.mass_index == 2) == 2  # both sides of the pre-reionisation minimum


def test_mean_density_against_camb(camb_reference, plasma):
    # nbar_e(z) = x_e n_H0 (1+z)^3 and mbar_gamma(z), against CAMB's x_e and astropy's n_H0.
    z = np.array([0.0, 3.0, 6.0, 8.0, 20.0, 300.0, 1100.0])
    np.testing.assert_allclose(2 * np.log(plasma.mean_plasma_mass_eV(z)), camb_reference(z), atol=1e-3)
    np.testing.assert_allclose(
        plasma.mean_electron_density_cm3(z), np.exp(camb_reference(z)) / M2_PER_DENSITY, rtol=1e-3
    )
    np.testing.assert_allclose(
        plasma.mean_comoving_electron_density_cm3(z), np.exp(camb_reference(z)) / M2_PER_DENSITY / (1 + z) ** 3, rtol=1e-3
    )


def test_vectorised_masses_match_one_by_one(plasma):
    # Many masses at once give the same sums as one at a time (common practice, no source).
    masses = np.geomspace(5e-15, 5e-10, 25)
    together = plasma.kernel(masses)
    alone = np.array([plasma.kernel(m)[0] for m in masses])
    np.testing.assert_allclose(together, alone, rtol=1e-12)


# -- bad input -----------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def constant_plasma():
    return MeanPlasma(Planck18, IonisationHistory.constant(1.0))


@pytest.mark.parametrize("bad", [-1e-13, 0.0, np.nan, np.inf, [1e-13, np.nan], [1e-13, -1e-12], []])
def test_bad_masses(constant_plasma, bad):
    with pytest.raises(InputError, match="mass_eV"):
        constant_plasma.kernel(bad)
    with pytest.raises(InputError, match="mass_eV"):
        background_kernel(bad, ionisation=constant_plasma.ionisation)


@pytest.mark.parametrize(
    "z_min, z_max", [(10.0, 5.0), (5.0, 5.0), (-1.0, 10.0), (np.nan, 10.0), (0.0, np.nan), (0.0, np.inf)]
)
def test_bad_redshift_range(constant_plasma, z_min, z_max):
    with pytest.raises(InputError, match="z_m"):
        constant_plasma.kernel(1e-13, z_min, z_max)


def test_z_max_beyond_history(tmp_path):
    plasma = MeanPlasma(Planck18, IonisationHistory.constant(1.0))
    with pytest.raises(InputError, match="z_max"):
        plasma.kernel(1e-13, 0.0, 4000.0)
    # A user table that stops at z = 1000 cannot serve the default z_max = 1100.
    path = tmp_path / "short.txt"
    z = np.linspace(0.0, 1000.0, 11)
    np.savetxt(path, np.column_stack((z, np.ones_like(z))))
    with pytest.raises(InputError, match="z_max") as error:
        background_kernel(1e-13, ionisation=IonisationHistory.from_table(path))
    assert "short.txt" in str(error.value)
    # ... but one inside its range works.
    assert background_kernel(1e-13, z_max=900.0, ionisation=IonisationHistory.from_table(path))[0] > 0


def test_bad_ionisation_argument():
    with pytest.raises(InputError, match="ionisation"):
        MeanPlasma(Planck18, ionisation=1.08)


def test_mean_plasma_is_immutable(constant_plasma):
    with pytest.raises(AttributeError):
        constant_plasma.ionisation = IonisationHistory.constant(2.0)
    with pytest.raises(AttributeError):
        del constant_plasma.cosmology
