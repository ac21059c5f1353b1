"""Mean ionisation history x_e(z) (PHYSICS.md section 5) against CAMB called directly.

CAMB (RECFAST recombination, Seager, Sasselov & Scott 1999; tanh reionisation,
Lewis 2008, PRD 78, 023002) is run here by hand with the Planck 2018 numbers of
PHYSICS.md; the project's history must reproduce it up to interpolation, and
both must reproduce the figures PHYSICS.md prints.
"""

import astropy.units as u
import camb
import numpy as np
import pytest
from astropy.cosmology import FlatLambdaCDM
from conftest import camb_background_for_planck18
from scipy.optimize import brentq

from raytrace.core.errors import InputError
from raytrace.physics.ionisation import IonisationHistory

H = 0.6766
# PHYSICS.md s.5: "Planck 2018 parameters (H0 67.66, ombh2 0.02242, omch2 0.11933, tau 0.0561)".
PLANCK2018 = dict(H0=67.66, ombh2=0.02242, omch2=0.11933, tau=0.0561)
# The same model as an astropy cosmology, so that the project hands CAMB the same numbers
# (CAMB's defaults for the rest: mnu = 0.06 eV in one massive state, nnu = 3.044, TCMB = 2.7255 K).
PLANCK2018_ASTROPY = FlatLambdaCDM(
    H0=67.66,
    Om0=(0.02242 + 0.11933) / H**2,
    Ob0=0.02242 / H**2,
    Tcmb0=2.7255,
    Neff=3.044,
    m_nu=[0.0, 0.0, 0.06] * u.eV,
    name="Planck 2018 (PHYSICS.md)",
)
CHECK_REDSHIFTS = np.array([0.0, 6.0, 8.0, 10.0, 20.0, 1100.0])
# PHYSICS.md s.5 (CAMB 2.0.5 with the parameters above), as printed.
PHYSICS_MD_XE = ["1.164", "1.081", "0.375", "3.2e-4", "2.1e-4", "0.145"]

# Helium-4 to hydrogen atomic mass ratio, 4.002602 / 1.00794 (IUPAC standard atomic
# weights; from memory). CAMB uses 3.9715.
HE_TO_H_MASS = 4.002602 / 1.00794


def _tolerance(printed):
    """Half a unit in the last printed digit."""
    mantissa, _, exponent = printed.lower().partition("e")
    decimals = len(mantissa.split(".")[1]) if "." in mantissa else 0
    return 0.5 * 10.0 ** (-decimals + (int(exponent) if exponent else 0))


def _camb_results(**settings):
    params = camb.CAMBparams()
    params.set_cosmology(**settings)
    return camb.get_background(params)


def _camb_xe(results, z):
    z = np.atleast_1d(np.asarray(z, dtype=float))
    return np.asarray(results.get_background_redshift_evolution(z, ["x_e"], format="array"))[:, 0]


def _helium_ratio(helium_fraction):
    """f_He = n_He / n_H = Y_p / (m_He/m_H (1 - Y_p)) (PHYSICS.md s.5, by definition of Y_p)."""
    return helium_fraction / (HE_TO_H_MASS * (1.0 - helium_fraction))


@pytest.fixture(scope="module")
def camb_planck2018():
    return _camb_results(**PLANCK2018)


@pytest.fixture(scope="module")
def history():
    return IonisationHistory.from_camb(PLANCK2018_ASTROPY)


# -- against CAMB ----------------------------------------------------------------------------


def test_xe_matches_camb_at_check_redshifts(camb_planck2018, history):
    # CAMB 2.0.5 get_background_redshift_evolution(x_e), same parameters: interpolation only.
    np.testing.assert_allclose(history.x_e(CHECK_REDSHIFTS), _camb_xe(camb_planck2018, CHECK_REDSHIFTS), rtol=1e-3)


def test_xe_matches_camb_on_a_dense_grid(camb_planck2018, history):
    # As above, everywhere between z = 0 and 1500 (through reionisation and recombination).
    z = np.linspace(0.0, 1500.0, 30001)
    np.testing.assert_allclose(history.x_e(z), _camb_xe(camb_planck2018, z), rtol=1e-3)


@pytest.mark.parametrize("z, printed", list(zip(CHECK_REDSHIFTS, PHYSICS_MD_XE)))
def test_xe_physics_md_figures(camb_planck2018, history, z, printed):
    # PHYSICS.md s.5 figures, to their printed precision: first CAMB itself, then the project.
    assert _camb_xe(camb_planck2018, z)[0] == pytest.approx(float(printed), abs=_tolerance(printed))
    assert float(history.x_e(z)) == pytest.approx(float(printed), abs=_tolerance(printed))


def test_default_history_is_camb_with_planck18(history):
    # Default: astropy's Planck18 handed to CAMB (H0, Omega_b h^2, Omega_dm h^2, m_nu, Neff, Tcmb0 of
    # astropy's Planck18), tau = 0.0561 (Planck 2018 VI, TT,TE,EE+lowE+lensing+BAO).
    results = camb_background_for_planck18()
    default = IonisationHistory.from_camb()
    z = np.concatenate((CHECK_REDSHIFTS, np.linspace(0.0, 1500.0, 3001)))
    np.testing.assert_allclose(default.x_e(z), _camb_xe(results, z), rtol=1e-3)
    # CAMB's own BBN-consistent helium fraction.
    assert default.helium_fraction == pytest.approx(results.Params.YHe, rel=1e-12)


@pytest.mark.parametrize("z", [0.3, 3.0, 3.5, 4.0, 6.0, 7.0, 7.5, 7.84, 8.0, 8.5, 9.0, 12.0, 30.0, 100.0, 500.0, 800.0, 1000.0, 1100.0])
def test_log_derivative_matches_finite_difference_of_camb(camb_planck2018, history, z):
    # Central difference of ln x_e in ln(1+z) on CAMB's own x_e (step 1e-4 in z).
    step = 1e-4
    x_lo, x_hi = _camb_xe(camb_planck2018, [z - step, z + step])
    finite_difference = (np.log(x_hi) - np.log(x_lo)) / (np.log1p(z + step) - np.log1p(z - step))
    assert float(history.dln_xe_dln1pz(z)) == pytest.approx(finite_difference, rel=1e-4, abs=1e-5)


# -- reionisation and helium settings -------------------------------------------------------


@pytest.mark.parametrize("z_re", [7.0, 9.0, 12.0])
def test_reionisation_redshift_is_the_tanh_midpoint(z_re):
    # CAMB's tanh model (Lewis 2008): x_e = (f - x_rec)(1 + tanh((y_re - y)/dy))/2 + x_rec,
    # y = (1+z)^1.5, f = 1 + f_He: at z_re x_e is half the post-reionisation (H + singly
    # ionised He) value, plus half the tiny residual x_rec ~ 2e-4.
    hist = IonisationHistory.from_camb(reionisation_redshift=z_re)
    plateau = 1.0 + _helium_ratio(hist.helium_fraction)
    assert float(hist.x_e(z_re)) == pytest.approx(0.5 * plateau, rel=1e-3)
    # Well after reionisation (before helium's second reionisation at z ~ 3.5), the plateau.
    assert float(hist.x_e(z_re - 2.0)) == pytest.approx(plateau, rel=3e-3)
    # Well before: only the residual ionisation after recombination.
    assert float(hist.x_e(z_re + 4.0)) < 1e-3
    # The half-way point found by root finding is z_re.
    midpoint = brentq(lambda z: float(hist.x_e(z)) - 0.5 * plateau, z_re - 1.5, z_re + 1.5, xtol=1e-6)
    assert midpoint == pytest.approx(z_re, abs=0.01)


def test_reionisation_redshift_matches_camb_directly():
    # Same model in CAMB with zrei set instead of tau.
    hist = IonisationHistory.from_camb(PLANCK2018_ASTROPY, reionisation_redshift=9.0)
    results = _camb_results(H0=67.66, ombh2=0.02242, omch2=0.11933, zrei=9.0)
    z = np.linspace(0.0, 30.0, 3001)
    np.testing.assert_allclose(hist.x_e(z), _camb_xe(results, z), rtol=1e-3)


def test_optical_depth_sets_camb_reionisation_redshift(camb_planck2018, history):
    # With tau given, the midpoint is where CAMB put it when solving for tau.
    z_re = camb_planck2018.Params.Reion.redshift
    plateau = 1.0 + _helium_ratio(history.helium_fraction)
    assert float(history.x_e(z_re)) == pytest.approx(0.5 * plateau, rel=1e-3)
    later = IonisationHistory.from_camb(PLANCK2018_ASTROPY, optical_depth=0.08)
    results = _camb_results(H0=67.66, ombh2=0.02242, omch2=0.11933, tau=0.08)
    assert results.Params.Reion.redshift > z_re + 1
    assert float(later.x_e(results.Params.Reion.redshift)) == pytest.approx(0.5 * plateau, rel=1e-3)


@pytest.mark.parametrize("helium_fraction", [0.24, 0.25])
def test_helium_fraction_sets_the_plateaus(helium_fraction):
    # PHYSICS.md s.5: x_e = 1 + f_He with helium singly ionised (1.08), 1 + 2 f_He doubly (1.16).
    both = IonisationHistory.from_camb(helium_fraction=helium_fraction)
    single = IonisationHistory.from_camb(helium_fraction=helium_fraction, helium_reionisation=False)
    f_He = _helium_ratio(helium_fraction)
    assert both.helium_fraction == helium_fraction
    assert float(both.x_e(0.0)) == pytest.approx(1.0 + 2.0 * f_He, rel=1e-3)
    assert float(single.x_e(0.0)) == pytest.approx(1.0 + f_He, rel=1e-3)
    assert float(both.x_e(5.5)) == pytest.approx(1.0 + f_He, rel=1e-3)


# -- cache and immutability -------------------------------------------------------------------


def test_camb_history_is_cached():
    # A second call with the same parameters returns the very same object (no second CAMB run).
    assert IonisationHistory.from_camb() is IonisationHistory.from_camb()
    assert IonisationHistory.from_camb(PLANCK2018_ASTROPY) is IonisationHistory.from_camb(PLANCK2018_ASTROPY)
    assert IonisationHistory.from_camb(reionisation_redshift=9.0) is IonisationHistory.from_camb(reionisation_redshift=9.0)
    assert IonisationHistory.from_camb(reionisation_redshift=9.0) is not IonisationHistory.from_camb(reionisation_redshift=9.5)
    assert IonisationHistory.from_camb() is not IonisationHistory.from_camb(PLANCK2018_ASTROPY)


def test_history_is_immutable(history):
    before = float(history.x_e(8.0))
    with pytest.raises(AttributeError):
        history.helium_fraction = 0.3
    with pytest.raises(AttributeError):
        history.anything = 1
    with pytest.raises(AttributeError):
        del history.description
    u_table, ln_xe = history.tables()
    u_table[:] = 0.0
    ln_xe[:] = 0.0
    assert float(history.x_e(8.0)) == before


def test_constant_history():
    hist = IonisationHistory.constant(1.08, helium_fraction=0.25)
    z = np.array([0.0, 1.0, 100.0, 2999.0])
    np.testing.assert_allclose(hist.x_e(z), 1.08, rtol=1e-14)
    np.testing.assert_allclose(hist.dln_xe_dln1pz(z), 0.0, atol=1e-14)
    assert hist.helium_fraction == 0.25


# -- user tables ------------------------------------------------------------------------------


def _write_table(path, z, x_e, header="z x_e"):
    np.savetxt(path, np.column_stack((z, x_e)), header=header, fmt="%.17e")
    return path


def test_user_table_round_trip(tmp_path, camb_planck2018):
    # Write CAMB's x_e on a grid, read it back: the nodes come back exactly and the
    # interpolation between them follows CAMB.
    z = np.expm1(np.linspace(0.0, np.log1p(1500.0), 4001))
    x_e = _camb_xe(camb_planck2018, z)
    path = _write_table(tmp_path / "xe_camb.txt", z, x_e)
    hist = IonisationHistory.from_table(path, helium_fraction=0.2454)
    np.testing.assert_allclose(hist.x_e(z), x_e, rtol=1e-12)
    between = 0.5 * (z[1:] + z[:-1])
    np.testing.assert_allclose(hist.x_e(between), _camb_xe(camb_planck2018, between), rtol=1e-3)
    assert hist.helium_fraction == 0.2454
    assert "xe_camb.txt" in hist.description
    assert hist.z_max == pytest.approx(1500.0, rel=1e-12)


def test_user_table_with_comments_and_offset_start(tmp_path):
    # '#' starts a comment (numpy.loadtxt convention); the table may start above z = 0.
    path = tmp_path / "xe.txt"
    path.write_text("# my table\n# z x_e\n2 1.0\n4 0.5  # a comment\n6 0.25\n8 0.125\n")
    hist = IonisationHistory.from_table(path)
    np.testing.assert_allclose(hist.x_e([2.0, 4.0, 6.0, 8.0]), [1.0, 0.5, 0.25, 0.125], rtol=1e-12)
    with pytest.raises(InputError, match="xe.txt"):
        hist.x_e(1.0)
    with pytest.raises(InputError, match="xe.txt"):
        hist.x_e(9.0)


BAD_TABLES = {
    "three_columns.txt": "0 1.1 5\n1 1.1 5\n2 1.1 5\n3 1.1 5\n",
    "one_column.txt": "0\n1\n2\n3\n",
    "ragged.txt": "0 1.1\n1 1.1 3\n2 1.1\n3 1.1\n",
    "decreasing_z.txt": "0 1.1\n2 1.1\n1 1.1\n3 1.1\n",
    "repeated_z.txt": "0 1.1\n1 1.1\n1 1.0\n3 1.1\n",
    "negative_z.txt": "-1 1.1\n1 1.1\n2 1.1\n3 1.1\n",
    "negative_xe.txt": "0 1.1\n1 -0.1\n2 1.1\n3 1.1\n",
    "zero_xe.txt": "0 1.1\n1 0\n2 1.1\n3 1.1\n",
    "nan.txt": "0 1.1\n1 nan\n2 1.1\n3 1.1\n",
    "inf.txt": "0 1.1\n1 1.1\ninf 1.1\n3 1.1\n",
    "text.txt": "z x_e\nzero one\n",
    "too_short.txt": "0 1.1\n1 1.1\n",
    "empty.txt": "",
}


@pytest.mark.parametrize("name", sorted(BAD_TABLES))
@pytest.mark.filterwarnings("ignore:loadtxt. input contained no data")
def test_bad_table_raises_input_error_naming_the_file(tmp_path, name):
    path = tmp_path / name
    path.write_text(BAD_TABLES[name])
    with pytest.raises(InputError) as error:
        IonisationHistory.from_table(path)
    assert str(path) in str(error.value)


def test_missing_table_names_the_file(tmp_path):
    path = tmp_path / "no_such_table.txt"
    with pytest.raises(InputError, match="not found") as error:
        IonisationHistory.from_table(path)
    assert str(path) in str(error.value)


def test_directory_instead_of_table(tmp_path):
    with pytest.raises(InputError) as error:
        IonisationHistory.from_table(tmp_path)
    assert str(tmp_path) in str(error.value)


# -- bad parameters and redshifts ------------------------------------------------------------


@pytest.mark.parametrize(
    "kwargs, what",
    [
        (dict(optical_depth=0.05, reionisation_redshift=8.0), "not both"),
        (dict(optical_depth=-0.01), "optical_depth"),
        (dict(optical_depth=0.7), "optical_depth"),
        (dict(reionisation_redshift=-1.0), "reionisation_redshift"),
        (dict(reionisation_redshift=80.0), "reionisation_redshift"),
        (dict(helium_fraction=1.2), "helium_fraction"),
        (dict(helium_fraction=-0.1), "helium_fraction"),
    ],
)
def test_bad_camb_parameters(kwargs, what):
    with pytest.raises(InputError, match=what):
        IonisationHistory.from_camb(**kwargs)


@pytest.mark.parametrize("bad", [0.0, -1.0, np.nan, np.inf])
def test_bad_constant(bad):
    with pytest.raises(InputError, match="x_e"):
        IonisationHistory.constant(bad)


@pytest.mark.parametrize("bad", [-0.5, np.nan, 1e5, [1.0, np.inf]])
def test_redshift_outside_history(history, bad):
    with pytest.raises(InputError, match="redshift"):
        history.x_e(bad)
    with pytest.raises(InputError, match="redshift"):
        history.dln_xe_dln1pz(bad)
