"""Background cosmology (PHYSICS.md sections 2, 3 and 5) against astropy.cosmology.

The reference is astropy itself (its own quadrature of the Friedmann equation),
called directly in every check, plus the figures PHYSICS.md prints.
"""

import astropy.constants as const
import astropy.units as u
import numpy as np
import pytest
from astropy.cosmology import FlatLambdaCDM, LambdaCDM, Planck18

from raytrace.core.errors import InputError
from raytrace.physics.constants import C_MPC_S, HBAR_EV_S
from raytrace.physics.cosmology import Z_TABLE_MAX, Cosmology

REDSHIFTS = np.array([1e-4, 1e-3, 0.01, 0.1, 0.5, 1.0, 2.0, 3.0, 6.0, 10.0, 30.0, 100.0, 300.0, 1000.0, 1100.0])

ASTROPY_COSMOLOGIES = {
    "Planck18": Planck18,
    # A different flat model with radiation (Tcmb0) and massless neutrinos.
    "flat70": FlatLambdaCDM(H0=70, Om0=0.3, Ob0=0.05, Tcmb0=2.7255),
    # A curved one: chi is still the line-of-sight comoving distance.
    "open": LambdaCDM(H0=72, Om0=0.28, Ode0=0.65, Ob0=0.046, Tcmb0=2.7255),
}


@pytest.fixture(scope="module", params=sorted(ASTROPY_COSMOLOGIES))
def pair(request):
    reference = ASTROPY_COSMOLOGIES[request.param]
    return reference, Cosmology(reference)


def test_comoving_distance_matches_astropy(pair):
    # astropy.cosmology comoving_distance (its own quad integration of 1/E(z)).
    reference, cosmology = pair
    expected = reference.comoving_distance(REDSHIFTS).to_value(u.Mpc)
    np.testing.assert_allclose(cosmology.comoving_distance_Mpc(REDSHIFTS), expected, rtol=1e-7)


def test_hubble_rate_matches_astropy(pair):
    # astropy.cosmology H(z), converted to s^-1 and to eV with astropy's hbar.
    reference, cosmology = pair
    expected = reference.H(REDSHIFTS).to_value(u.s**-1)
    np.testing.assert_allclose(cosmology.hubble_per_s(REDSHIFTS), expected, rtol=1e-9)
    hbar = const.hbar.to_value(u.eV * u.s)
    np.testing.assert_allclose(cosmology.hubble_eV(REDSHIFTS), hbar * expected, rtol=1e-9)


def test_inverse_of_astropy_distance(pair):
    # z(chi) applied to astropy's own chi(z) gives back z (inverse independent of the forward table).
    reference, cosmology = pair
    chi = reference.comoving_distance(REDSHIFTS).to_value(u.Mpc)
    np.testing.assert_allclose(cosmology.redshift_at_distance(chi), REDSHIFTS, rtol=1e-6)


def test_round_trip_z_chi_z(pair):
    # z(chi(z)) = z to 1e-6 relative (issue 2), on a dense grid up to the table end.
    _, cosmology = pair
    z = np.concatenate(([0.0], np.geomspace(1e-5, Z_TABLE_MAX, 2001)))
    back = cosmology.redshift_at_distance(cosmology.comoving_distance_Mpc(z))
    assert back[0] == pytest.approx(0.0, abs=1e-12)
    np.testing.assert_allclose(back[1:], z[1:], rtol=1e-6)


def test_lookback_and_proper_time_match_astropy(pair):
    # astropy lookback_time(z) and age(z) (quad integration of 1/((1+z) H)).
    reference, cosmology = pair
    np.testing.assert_allclose(
        cosmology.lookback_time_s(REDSHIFTS), reference.lookback_time(REDSHIFTS).to_value(u.s), rtol=1e-7
    )
    for z_from, z_to in [(1100.0, 0.0), (1100.0, 6.0), (20.0, 6.0), (6.0, 5.5), (0.5, 0.1)]:
        expected = (reference.age(z_to) - reference.age(z_from)).to_value(u.s)
        assert cosmology.proper_time_s(z_from, z_to) == pytest.approx(expected, rel=1e-6)
        expected_lookback = (reference.lookback_time(z_from) - reference.lookback_time(z_to)).to_value(u.s)
        assert cosmology.proper_time_s(z_from, z_to) == pytest.approx(expected_lookback, rel=1e-6)


def test_proper_time_is_signed_and_zero_for_equal_redshifts():
    # Time runs forward as redshift falls (dt = -dz / ((1+z) H), Friedmann; common practice).
    cosmology = Cosmology()
    assert cosmology.proper_time_s(3.0, 1.0) > 0
    assert cosmology.proper_time_s(1.0, 3.0) == pytest.approx(-cosmology.proper_time_s(3.0, 1.0), rel=1e-12)
    assert cosmology.proper_time_s(2.0, 2.0) == 0.0
    assert cosmology.lookback_time_s(0.0) == 0.0


def test_physics_md_planck18_distances():
    # PHYSICS.md s.5: Planck18 comoving distance 3395.6 Mpc to z = 1, 8425.1 Mpc to z = 6
    # (astropy 8.0.2), to the printed 0.1 Mpc.
    cosmology = Cosmology()
    assert cosmology.comoving_distance_Mpc(1.0) == pytest.approx(3395.6, abs=0.05)
    assert cosmology.comoving_distance_Mpc(6.0) == pytest.approx(8425.1, abs=0.05)


def test_physics_md_hubble_constant():
    # PHYSICS.md s.2: H0 = 67.66 km/s/Mpc = 2.193e-18 s^-1 = 1.443e-33 eV (Planck18).
    cosmology = Cosmology()
    assert Planck18.H0.to_value(u.km / u.s / u.Mpc) == 67.66
    assert cosmology.h == pytest.approx(0.6766, rel=1e-12)
    assert cosmology.hubble_per_s(0.0) == pytest.approx(2.193e-18, abs=0.0005e-18)
    assert cosmology.hubble_eV(0.0) == pytest.approx(1.443e-33, abs=0.0005e-33)


def test_physics_md_unit_factors():
    # PHYSICS.md s.2: hbar = 6.582119569e-16 eV s (CODATA 2018, exact in the SI since 2019);
    # c/Mpc = 9.7156e-15 s^-1.
    assert HBAR_EV_S == pytest.approx(6.582119569e-16, rel=1e-10)
    assert C_MPC_S == pytest.approx(9.7156e-15, abs=0.00005e-15)


def test_hydrogen_density_physics_md():
    # PHYSICS.md s.5: n_H0 = (1 - Y_p) Omega_b rho_crit / m_p ~ 1.9e-7 cm^-3 for
    # Omega_b h^2 = 0.0224, Y_p = 0.245 (printed to 2 figures).
    h = 0.6766
    cosmology = Cosmology(FlatLambdaCDM(H0=100 * h, Om0=0.31, Ob0=0.0224 / h**2, Tcmb0=2.7255))
    n_H0 = cosmology.hydrogen_density0_cm3(0.245)
    assert n_H0 == pytest.approx(1.9e-7, abs=0.05e-7)
    # Independent figures: rho_crit = 1.87834e-29 h^2 g cm^-3 (PDG, Astrophysical constants;
    # from memory) and m_p = 1.67262192e-24 g (CODATA 2018, from memory).
    expected = (1 - 0.245) * 0.0224 * 1.87834e-29 / 1.67262192e-24
    assert n_H0 == pytest.approx(expected, rel=1e-4)


def test_hydrogen_density_scales_with_helium_and_baryons():
    # n_H0 proportional to (1 - Y_p) Omega_b h^2 (PHYSICS.md s.5).
    c1 = Cosmology(FlatLambdaCDM(H0=70, Om0=0.3, Ob0=0.05, Tcmb0=2.7255))
    c2 = Cosmology(FlatLambdaCDM(H0=70, Om0=0.3, Ob0=0.04, Tcmb0=2.7255))
    assert c1.hydrogen_density0_cm3(0.0) / c1.hydrogen_density0_cm3(0.25) == pytest.approx(1 / 0.75, rel=1e-12)
    assert c1.hydrogen_density0_cm3(0.24) / c2.hydrogen_density0_cm3(0.24) == pytest.approx(1.25, rel=1e-12)


def test_default_is_planck18_and_wrapping():
    assert Cosmology().astropy is Planck18
    assert Cosmology(Cosmology(Planck18)).astropy is Planck18
    assert Cosmology() == Cosmology(Planck18)
    assert hash(Cosmology()) == hash(Cosmology(Planck18))
    assert Cosmology() != Cosmology(ASTROPY_COSMOLOGIES["flat70"])


# -- bad input -----------------------------------------------------------------------------


@pytest.mark.parametrize("bad", [-0.1, np.nan, np.inf, Z_TABLE_MAX * 1.01, [1.0, -1.0], [0.5, np.nan]])
def test_bad_redshift_raises_input_error(bad):
    cosmology = Cosmology()
    for method in (cosmology.comoving_distance_Mpc, cosmology.hubble_per_s, cosmology.hubble_eV, cosmology.lookback_time_s):
        with pytest.raises(InputError, match="redshift"):
            method(bad)
    with pytest.raises(InputError, match="redshift"):
        cosmology.proper_time_s(bad, 0.0)


@pytest.mark.parametrize("bad", [-1.0, np.nan, 1e9, [10.0, -5.0]])
def test_bad_distance_raises_input_error(bad):
    with pytest.raises(InputError, match="comoving distance"):
        Cosmology().redshift_at_distance(bad)


@pytest.mark.parametrize("bad", ["Planck18", 67.66, object()])
def test_not_an_astropy_cosmology(bad):
    with pytest.raises(InputError, match="astropy"):
        Cosmology(bad)


@pytest.mark.parametrize("bad", [-0.1, 1.0, 2.0, np.nan])
def test_bad_helium_fraction(bad):
    with pytest.raises(InputError, match="helium_fraction"):
        Cosmology().hydrogen_density0_cm3(bad)


def test_cosmology_without_baryons():
    with pytest.raises(InputError, match="Ob0"):
        Cosmology(FlatLambdaCDM(H0=70, Om0=0.3)).hydrogen_density0_cm3(0.245)


# -- immutability ------------------------------------------------------------------------


def test_immutable():
    cosmology = Cosmology()
    chi_before = float(cosmology.comoving_distance_Mpc(1.0))
    with pytest.raises(AttributeError):
        cosmology.anything = 1
    with pytest.raises(AttributeError):
        cosmology._astropy = ASTROPY_COSMOLOGIES["flat70"]
    with pytest.raises(AttributeError):
        del cosmology._astropy
    with pytest.raises(AttributeError):
        cosmology.astropy = ASTROPY_COSMOLOGIES["flat70"]
    assert cosmology.astropy is Planck18
    assert float(cosmology.comoving_distance_Mpc(1.0)) == chi_before


def test_returned_arrays_do_not_alias_internal_state():
    # Editing an array handed out must not change later results (common practice, no source).
    cosmology = Cosmology()
    chi1 = float(cosmology.comoving_distance_Mpc(1.0))
    distances = cosmology.comoving_distance_Mpc(np.array([1.0, 2.0]))
    distances[:] = -1.0
    assert float(cosmology.comoving_distance_Mpc(1.0)) == chi1
    assert float(cosmology.lookback_time_s(1.0)) == pytest.approx(Planck18.lookback_time(1.0).to_value(u.s), rel=1e-7)
