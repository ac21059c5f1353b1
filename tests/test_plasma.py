"""Plasma mass from electron density (PHYSICS.md section 1).

Every check is against a figure or formula from outside the project: the NRL
Plasma Formulary, the SI plasma-frequency formula with astropy's CODATA 2018
constants, the figures PHYSICS.md derives from NRL, and Mirizzi, Redondo & Sigl
(2009) for the neutral-hydrogen term.
"""

import math

import astropy.constants as const
import astropy.units as u
import numpy as np
import pytest

from raytrace.core.errors import InputError
from raytrace.physics.plasma import (
    electron_density,
    plasma_mass,
    plasma_mass2,
    plasma_mass2_with_neutral_hydrogen,
)

DENSITIES_CM3 = np.array([1e-10, 2.2e-7, 1e-3, 1.0, 37.0, 1e4, 1e12])

# Planck constant and hbar in eV s, from astropy (CODATA 2018).
H_EV_S = const.h.to_value(u.eV * u.s)
HBAR_EV_S = const.hbar.to_value(u.eV * u.s)


def _half_unit_in_last_place(printed):
    """Relative tolerance that a figure printed as ``printed`` (a str) allows."""
    mantissa = printed.lower().split("e")[0]
    decimals = len(mantissa.split(".")[1]) if "." in mantissa else 0
    return 0.5 * 10.0**-decimals / abs(float(mantissa))


def test_plasma_frequency_nrl_formulary_hz():
    # NRL Plasma Formulary, "Frequencies": f_pe = omega_pe / 2 pi = 8.98e3 n_e^1/2 Hz (n_e in cm^-3).
    frequency_hz = plasma_mass(DENSITIES_CM3) / H_EV_S
    expected = 8.98e3 * np.sqrt(DENSITIES_CM3)
    np.testing.assert_allclose(frequency_hz, expected, rtol=_half_unit_in_last_place("8.98"))


def test_plasma_frequency_nrl_formulary_rad_per_s():
    # NRL Plasma Formulary, "Frequencies": omega_pe = 5.64e4 n_e^1/2 rad/s (n_e in cm^-3).
    omega_rad_s = plasma_mass(DENSITIES_CM3) / HBAR_EV_S
    expected = 5.64e4 * np.sqrt(DENSITIES_CM3)
    np.testing.assert_allclose(omega_rad_s, expected, rtol=_half_unit_in_last_place("5.64"))


def test_plasma_frequency_si_formula_with_codata():
    # omega_p^2 = n_e e^2 / (epsilon_0 m_e) in SI (any plasma-physics text, e.g. the
    # NRL Formulary's definition), with astropy's CODATA 2018 constants: an independent
    # route to the project's 4 pi alpha n_e / m_e in natural units.
    n_e = DENSITIES_CM3 * u.cm**-3
    omega_p = np.sqrt(n_e * const.e.si**2 / (const.eps0 * const.m_e)).to(u.s**-1)
    expected_eV = (const.hbar * omega_p).to_value(u.eV)
    # CODATA's alpha and e^2 / (4 pi eps0 hbar c) agree to ~1e-12 (rounding of the tabulated values).
    np.testing.assert_allclose(plasma_mass(DENSITIES_CM3), expected_eV, rtol=1e-10)


def test_physics_md_numerical_coefficients():
    # PHYSICS.md s.1 (derived there from NRL): m_gamma = 3.71e-11 eV sqrt(n_e / cm^-3),
    # m_gamma^2 = 1.379e-21 eV^2 per cm^-3; checked to their printed precision.
    np.testing.assert_allclose(
        plasma_mass(DENSITIES_CM3), 3.71e-11 * np.sqrt(DENSITIES_CM3), rtol=_half_unit_in_last_place("3.71e-11")
    )
    np.testing.assert_allclose(
        plasma_mass2(DENSITIES_CM3), 1.379e-21 * DENSITIES_CM3, rtol=_half_unit_in_last_place("1.379e-21")
    )


def test_physics_md_example_density_today():
    # PHYSICS.md s.3: n_e0 = 2.2e-7 cm^-3 fully ionised gives m_gamma0 = 1.74e-14 eV.
    assert plasma_mass(2.2e-7) == pytest.approx(1.74e-14, rel=_half_unit_in_last_place("1.74e-14"), abs=0)


def test_mass_squared_is_square_of_mass():
    # Definition m_gamma^2 = (m_gamma)^2 (common practice, no source).
    np.testing.assert_allclose(plasma_mass2(DENSITIES_CM3), plasma_mass(DENSITIES_CM3) ** 2, rtol=1e-14)


def test_zero_density_gives_zero_mass():
    # A vacuum has no plasma frequency (omega_p^2 proportional to n_e, NRL Formulary).
    assert plasma_mass(0.0) == 0.0
    assert electron_density(0.0) == 0.0


@pytest.mark.parametrize("density", [1e-12, 3.3e-7, 1.0, 4.5e5, 1e15])
def test_round_trip_density_mass_density(density):
    # electron_density is the inverse of plasma_mass (m^2 proportional to n_e, NRL Formulary).
    assert electron_density(plasma_mass(density)) == pytest.approx(density, rel=1e-13, abs=0)


def test_round_trip_mass_density_mass_array():
    masses = np.geomspace(1e-16, 1e-8, 17).reshape(17, 1) * np.ones((1, 3))
    back = plasma_mass(electron_density(masses))
    assert back.shape == masses.shape
    np.testing.assert_allclose(back, masses, rtol=1e-13)


def test_electron_density_against_nrl():
    # Inverting the NRL figure: the density whose plasma frequency is 8.98 kHz is 1 cm^-3.
    mass_at_8_98_khz = H_EV_S * 8.98e3
    assert electron_density(mass_at_8_98_khz) == pytest.approx(1.0, rel=2 * _half_unit_in_last_place("8.98"))


# -- neutral hydrogen (Mirizzi, Redondo & Sigl 2009, JCAP 03, 026) ------------------------

# Their fit: m_gamma^2 ~ 1.4e-21 eV^2 (X_e - 7.3e-3 (omega/eV)^2 (1 - X_e)) n_H / cm^-3.
MRS_IONISED = 1.4e-21
MRS_NEUTRAL = 7.3e-3


def test_neutral_hydrogen_fully_ionised_is_plain_plasma_mass():
    # X_e = 1: only free electrons, no frequency dependence (MRS 2009).
    n_H = np.array([1e-7, 1.0, 1e3])
    for omega in (1e-4, 1.0, 10.0):
        np.testing.assert_allclose(plasma_mass2_with_neutral_hydrogen(n_H, 1.0, omega), plasma_mass2(n_H), rtol=1e-14)


def test_neutral_hydrogen_term_sign_and_coefficient():
    # X_e = 0: m_gamma^2 = -1.4e-21 * 7.3e-3 (omega/eV)^2 n_H eV^2, negative (MRS 2009);
    # the 1.4e-21 is their rounding of 1.379e-21 (checked to its printed 2 figures).
    n_H = 2.0
    omega = np.array([0.1, 1.0, 3.0])
    m2 = plasma_mass2_with_neutral_hydrogen(n_H, 0.0, omega)
    assert np.all(m2 < 0)
    np.testing.assert_allclose(
        m2, -MRS_IONISED * MRS_NEUTRAL * omega**2 * n_H, rtol=_half_unit_in_last_place("1.4e-21")
    )
    # Quadratic in omega: the ratio between two frequencies is exactly (omega1/omega2)^2.
    assert m2[2] / m2[1] == pytest.approx(9.0, rel=1e-12)


def test_neutral_hydrogen_zero_crossing():
    # MRS 2009: the bracket vanishes where X_e = 7.3e-3 (omega/eV)^2 (1 - X_e).
    omega = 2.0
    k = MRS_NEUTRAL * omega**2
    x_zero = k / (1.0 + k)
    n_H = 1.0
    assert abs(plasma_mass2_with_neutral_hydrogen(n_H, x_zero, omega)) < 1e-12 * plasma_mass2(n_H)
    assert plasma_mass2_with_neutral_hydrogen(n_H, 0.9 * x_zero, omega) < 0
    assert plasma_mass2_with_neutral_hydrogen(n_H, 1.1 * x_zero, omega) > 0


def test_neutral_hydrogen_microwave_negligible():
    # PHYSICS.md s.1: negligible for microwave photons (omega ~ 2.35e-4 eV) after reionisation.
    n_H = 1.0
    ionised = plasma_mass2(n_H)
    mixed = plasma_mass2_with_neutral_hydrogen(n_H, 0.999, 2.35e-4)
    assert abs(mixed / (0.999 * ionised) - 1) < 1e-9


def test_neutral_hydrogen_order_of_magnitude_from_polarisability():
    # Independent order-of-magnitude check of the MRS coefficient: neutral atoms shift
    # m^2 = omega^2 (1 - n_r^2) = -4 pi alpha_pol n_H omega^2, with the static polarisability
    # of atomic hydrogen alpha_pol = 9/2 a_0^3 (textbook result, from memory). This gives
    # 6.1e-3 instead of MRS's 7.3e-3 (they use a measured refractive index); agree to 25 %.
    a0_cm = const.a0.to_value(u.cm)
    m2_per_omega2 = -4.0 * math.pi * 4.5 * a0_cm**3  # eV^2 per (eV^2 cm^-3)
    m2 = plasma_mass2_with_neutral_hydrogen(1.0, 0.0, 1.0)
    assert m2 < 0
    assert m2 / m2_per_omega2 == pytest.approx(1.0, rel=0.25)


# -- bad input -----------------------------------------------------------------------------


@pytest.mark.parametrize("bad", [-1.0, np.nan, np.inf, -np.inf, [1.0, -1e-3], [np.nan, 1.0]])
@pytest.mark.parametrize("function", [plasma_mass, plasma_mass2])
def test_bad_density_raises_input_error(function, bad):
    # Densities are physical counts: negative or non-finite is not a density (common practice, no source).
    with pytest.raises(InputError, match="density"):
        function(bad)


@pytest.mark.parametrize("bad", [-1e-14, np.nan, np.inf, [1e-14, -1e-14]])
def test_bad_mass_raises_input_error(bad):
    with pytest.raises(InputError, match="mass"):
        electron_density(bad)


def test_input_error_is_a_value_error():
    # Callers who catch ValueError also catch the project's input errors (common practice, no source).
    with pytest.raises(ValueError):
        plasma_mass(-1.0)


@pytest.mark.parametrize(
    "n_H, x, omega, what",
    [
        (-1.0, 0.5, 1.0, "hydrogen density"),
        (np.nan, 0.5, 1.0, "hydrogen density"),
        (1.0, -0.1, 1.0, "ionised_fraction"),
        (1.0, 1.5, 1.0, "ionised_fraction"),
        (1.0, np.nan, 1.0, "ionised_fraction"),
    ],
)
def test_neutral_hydrogen_bad_input(n_H, x, omega, what):
    with pytest.raises(InputError, match=what):
        plasma_mass2_with_neutral_hydrogen(n_H, x, omega)
