"""Synthetic fields (raytrace/boxes/fields.py) and the shipped demo boxes (cubes_demo/).

References outside the project: CAMB's linear matter power and sigma_8(z)
(camb.get_results with Planck 2018 parameters), astropy's Planck18 metadata,
the exact growth of Einstein-de Sitter and Heath's (1977) integral for
matter + Lambda + curvature, the log-normal moments of Coles & Jones (1991),
and the Gaussian sampling error of a power spectrum.
"""

import importlib.util
import json

import h5py
import numpy as np
import pytest
from astropy.cosmology import FlatLambdaCDM, LambdaCDM, Planck18
from scipy.integrate import quad
from scipy.stats import skew

from raytrace.boxes.fields import (
    GROWTH_Z_MAX,
    PLANCK18_SIGMA8,
    PLANCK18_SPECTRAL_INDEX,
    eh98_no_wiggle_transfer,
    gaussian_field,
    growth_factor,
    linear_power,
    lognormal_overdensity,
)
from raytrace.core.errors import InputError
from raytrace.physics.background import MeanPlasma

H = Planck18.h
BOX_CMPC = 100.0 / H  # the demo box: 100 cMpc/h
CELLS = 64
CAMB_REDSHIFTS = [0.0, 0.5, 1.0, 2.0, 3.0, 4.0, 6.0, 20.0, 50.0]
DEMO_REDSHIFTS = [0.0, 0.5, 1.0, 2.0, 3.0, 4.0, 6.0]


@pytest.fixture(scope="module")
def camb_linear():
    """CAMB linear matter power and sigma_8(z) for Planck 2018.

    Parameters of Planck 2018 Paper VI, Table 2 (TT,TE,EE+lowE+lensing+BAO),
    from memory: H0 67.66, ombh2 0.02242, omch2 0.11933, one 0.06 eV neutrino,
    tau 0.0561, ln(10^10 A_s) = 3.047 (A_s = 2.105e-9), n_s 0.9665.
    """
    import camb

    params = camb.CAMBparams()
    params.set_cosmology(H0=67.66, ombh2=0.02242, omch2=0.11933, mnu=0.06, tau=0.0561)
    params.InitPower.set_params(As=2.105e-9, ns=0.9665)
    params.set_matter_power(redshifts=CAMB_REDSHIFTS, kmax=5.0)
    params.NonLinear = camb.model.NonLinear_none
    results = camb.get_results(params)
    kh, z, pk = results.get_matter_power_spectrum(minkh=1e-3, maxkh=2.0, npoints=300)
    # get_sigma8 lists the redshifts in order of increasing time (CAMB docs).
    sigma8 = np.asarray(results.get_sigma8())[::-1]
    return {"kh": kh, "z": np.asarray(z), "pk": pk, "sigma8": sigma8}


@pytest.fixture(scope="module")
def demo_plasma():
    return MeanPlasma()


def _full_grid_k(n, box):
    k1 = 2.0 * np.pi * np.fft.fftfreq(n, d=box / n)
    return np.sqrt(k1[:, None, None] ** 2 + k1[None, :, None] ** 2 + k1[None, None, :] ** 2)


def _measured_power(field, box, n_bins=20):
    """Binned |delta_k|^2 V_cell^2 / V over the full FFT grid: (k, P, modes per bin).

    Written here, apart from the generator, so that a normalisation slip in
    one is not cancelled by the same slip in the other.
    """
    n = field.shape[0]
    modes = np.fft.fftn(field - field.mean())
    power = np.abs(modes) ** 2 * (box / n) ** 6 / box**3
    k = _full_grid_k(n, box)
    fundamental = 2.0 * np.pi / box
    edges = fundamental * np.linspace(0.5, n / 2, n_bins + 1)
    which = np.digitize(k.ravel(), edges)
    counts = np.bincount(which, minlength=n_bins + 2)[1 : n_bins + 1]
    k_mean = np.bincount(which, weights=k.ravel(), minlength=n_bins + 2)[1 : n_bins + 1] / counts
    p_mean = np.bincount(which, weights=power.ravel(), minlength=n_bins + 2)[1 : n_bins + 1] / counts
    return k_mean, p_mean, counts


def _assert_power_matches(field, box, expected_of_k, k_max):
    # Gaussian sampling error of a binned spectrum: sigma_P / P = sqrt(2 / N_modes),
    # N_modes counting k and -k (common practice, no source; Feldman, Kaiser &
    # Peacock 1994 for the general form, from memory).
    k, measured, counts = _measured_power(field, box)
    keep = k < k_max
    k, measured, counts = k[keep], measured[keep], counts[keep]
    expected = expected_of_k(k)
    error = np.sqrt(2.0 / counts)
    pull = (measured / expected - 1.0) / error
    assert np.all(np.abs(pull) < 4.0), pull
    # All bins together pin the amplitude to ~1-2 %: a wrong V_cell or a
    # missing factor 2 from the Hermitian half cannot hide in the scatter.
    weights = 1.0 / error**2
    combined = np.sum(weights * measured / expected) / weights.sum()
    assert abs(combined - 1.0) < 3.0 / np.sqrt(weights.sum()), combined


# -- the spectrum -----------------------------------------------------------------
def test_planck18_parameters_from_memory_match_astropy_and_camb(camb_linear):
    # astropy stores Planck 2018 Paper VI Table 2 values in Planck18.meta.
    assert PLANCK18_SIGMA8 == Planck18.meta["sigma8"]
    assert PLANCK18_SPECTRAL_INDEX == Planck18.meta["n"]
    # CAMB's sigma_8 for A_s = 2.105e-9 (memory) agrees with 0.8102 to 0.5 %.
    assert camb_linear["sigma8"][0] == pytest.approx(PLANCK18_SIGMA8, rel=5e-3)


def test_sigma8_normalisation_by_independent_quadrature():
    # Definition of sigma_8: rms of the linear field in a top hat of 8 Mpc/h at
    # z = 0 (Peebles 1980, memory), integrated here with scipy.quad.
    radius = 8.0 / H

    def integrand(ln_k, sigma8):
        k = np.exp(ln_k)
        x = k * radius
        top_hat = 3.0 * (np.sin(x) - x * np.cos(x)) / x**3
        return k**3 * linear_power(k, 0.0, sigma8=sigma8) * top_hat**2 / (2.0 * np.pi**2)

    for sigma8 in (PLANCK18_SIGMA8, 0.7):
        variance, _ = quad(integrand, np.log(1e-5), np.log(50.0), args=(sigma8,), limit=400)
        assert np.sqrt(variance) == pytest.approx(sigma8, rel=1e-4)


def test_transfer_function_tends_to_one_on_large_scales():
    # EH98 eq. 29: T = L0 / (L0 + C0 q^2) -> 1 as q -> 0; it falls on small scales.
    transfer = eh98_no_wiggle_transfer(np.array([1e-6, 1e-2, 1.0]))
    assert transfer[0] == pytest.approx(1.0, abs=1e-5)
    assert 1.0 > transfer[1] > transfer[2] > 0.0


@pytest.mark.parametrize("z_index", [0, 6])
def test_no_wiggle_spectrum_against_camb(camb_linear, z_index):
    # CAMB linear P(k) (delta_tot) in (Mpc/h)^3 at k in h/Mpc. The no-wiggle fit
    # leaves out the BAO (~5 % wiggles) and neutrino free streaming, and is a
    # few-% fit of the broadband shape (EH98, sect. 4.2): pointwise within 10 %
    # over 0.01-0.5 h/Mpc, and within 3 % on average over the band.
    kh, pk = camb_linear["kh"], camb_linear["pk"][z_index]
    z = camb_linear["z"][z_index]
    band = (kh > 0.01) & (kh < 0.5)
    ratio = linear_power(kh[band] * H, z) / (pk[band] / H**3)
    assert np.all(np.abs(ratio - 1.0) < 0.10), (ratio.min(), ratio.max())
    assert abs(np.mean(np.log(ratio))) < 0.03


# -- the growth factor --------------------------------------------------------------
def test_growth_factor_against_camb_sigma8(camb_linear):
    # CAMB sigma_8(z) / sigma_8(0) is D(z) / D(0) on 8 Mpc/h scales. Agreement
    # to 0.5 % up to z = 50 (found: 3e-4 at z <= 6, 9e-4 at z = 50).
    expected = camb_linear["sigma8"] / camb_linear["sigma8"][0]
    np.testing.assert_allclose(growth_factor(camb_linear["z"]), expected, rtol=5e-3)


def test_growth_factor_einstein_de_sitter_and_heath_integral():
    # Einstein-de Sitter: D = a exactly (Peebles 1980, memory).
    z = np.array([0.0, 0.5, 1.0, 3.0, 6.0, 20.0, 99.0])
    eds = FlatLambdaCDM(H0=70, Om0=1.0, Tcmb0=0.0)
    np.testing.assert_allclose(growth_factor(z, eds), 1.0 / (1.0 + z), rtol=1e-6)
    # Matter + Lambda + curvature, no radiation: Heath (1977, MNRAS 179, 351),
    # D(a) proportional to E(a) int_0^a da' / (a' E(a'))^3 (memory).
    curved = LambdaCDM(H0=70, Om0=0.25, Ode0=0.65, Tcmb0=0.0)

    def heath(redshift):
        a = 1.0 / (1.0 + redshift)
        integral, _ = quad(lambda b: (b * curved.efunc(1.0 / b - 1.0)) ** -3, 1e-8, a, epsabs=0, epsrel=1e-10)
        return curved.efunc(redshift) * integral

    expected = np.array([heath(value) for value in z]) / heath(0.0)
    np.testing.assert_allclose(growth_factor(z, curved), expected, rtol=1e-5)


# -- random fields ------------------------------------------------------------------
def test_gaussian_field_has_the_input_spectrum():
    field = gaussian_field(CELLS, BOX_CMPC, lambda k: linear_power(k, 0.0), seed=3)
    assert field.dtype == np.float64 and field.shape == (CELLS,) * 3
    assert abs(field.mean()) < 1e-12
    nyquist = np.pi * CELLS / BOX_CMPC
    _assert_power_matches(field, BOX_CMPC, lambda k: linear_power(k, 0.0), k_max=nyquist)


def test_lognormal_field_spectrum_is_the_smoothed_linear_one_at_z6():
    # At z = 6 the log-normal field is mildly non-Gaussian, so the Gaussian error
    # applies on large scales (k < 0.5/Mpc, wavelengths > 12 cMpc).
    radius = BOX_CMPC / CELLS
    field = lognormal_overdensity(CELLS, BOX_CMPC, 6.0, seed=11).astype(np.float64)

    def expected(k):
        return linear_power(k, 6.0) * np.exp(-((k * radius) ** 2))

    _assert_power_matches(field, BOX_CMPC, expected, k_max=0.5)


# Box-to-box scatter of one 64^3 box's statistics, measured over seeds 1..24 (std between boxes):
# log-variance / sigma_g^2 - 1: 6.9 % at z = 0, 4.8 % at z = 6; skewness of ln(1 + delta): 0.058 and
# 0.043; skewness of 1 + delta / its log-normal value - 1: 18 % and 7.6 %. One box cannot pin these to
# better than ~15 %, so the test averages STATISTICS_SEEDS boxes (the scatter of the average is the
# scatter / 4) and allows 3 times that, rounded up.
STATISTICS_SEEDS = range(1, 17)
ONE_POINT_TOLERANCES = {0.0: {"log_variance": 0.06, "log_skewness": 0.05},
                        6.0: {"log_variance": 0.04, "log_skewness": 0.04, "skewness": 0.06}}


def one_point_statistics(z):
    """(mean over boxes of log-variance / sigma_g^2, of skew(ln(1+delta)), of skew(1+delta) / log-normal value)."""
    radius = BOX_CMPC / CELLS
    k = _full_grid_k(CELLS, BOX_CMPC)
    power = linear_power(k, z) * np.exp(-((k * radius) ** 2))
    power[0, 0, 0] = 0.0
    sigma_g2 = np.log1p(power.sum() / BOX_CMPC**3)
    expected_skew = (np.exp(sigma_g2) + 2.0) * np.sqrt(np.expm1(sigma_g2))
    rows = []
    for seed in STATISTICS_SEEDS:
        field = lognormal_overdensity(CELLS, BOX_CMPC, z, seed=seed)
        assert field.dtype == np.float32 and field.min() > 0.0
        assert field.mean(dtype=np.float64) == pytest.approx(1.0, abs=1e-5)
        log_field = np.log(field.astype(np.float64))
        rows.append((log_field.var() / sigma_g2, skew(log_field.ravel()), skew(field.ravel()) / expected_skew))
    return np.mean(rows, axis=0)


def check_one_point_statistics(z, log_variance_ratio, log_skewness, skewness_ratio):
    tolerance = ONE_POINT_TOLERANCES[z]
    assert log_variance_ratio == pytest.approx(1.0, abs=tolerance["log_variance"])
    assert abs(log_skewness) < tolerance["log_skewness"]
    if "skewness" in tolerance:  # at z = 0 the skewness of 1 + delta scatters by 18 % a box: left out
        assert skewness_ratio == pytest.approx(1.0, abs=tolerance["skewness"])


_ONE_POINT = {}


def _one_point_cache(z):
    """one_point_statistics(z), computed once per session (the check and its perturbations share it)."""
    if z not in _ONE_POINT:
        _ONE_POINT[z] = one_point_statistics(z)
    return _ONE_POINT[z]


@pytest.mark.parametrize("z", [0.0, 6.0])
def test_lognormal_one_point_statistics(z):
    # Coles & Jones (1991): ln(1 + delta) is Gaussian with variance sigma_g^2 = ln(1 + sigma^2), sigma^2
    # the variance of the target field (summed here over the grid's own modes), and 1 + delta has
    # skewness (e^{s} + 2) sqrt(e^{s} - 1), s = sigma_g^2 (the log-normal distribution's moments).
    check_one_point_statistics(z, *_one_point_cache(z))


# Perturbations the old one-box tolerances (15 %; 0.15 on the log's skewness) let through on these boxes.
ONE_POINT_PERTURBATIONS = {
    "log-variance x 1.075": lambda v, ls, sk: (v * 1.075, ls, sk),
    "log-skewness + 0.1": lambda v, ls, sk: (v, ls + 0.1, sk),
    "skewness x 1.10": lambda v, ls, sk: (v, ls, sk * 1.10),  # measured 2 % low, so 8 % off: old 15 % passed it
}


@pytest.mark.parametrize("z, perturbation", [(0.0, "log-variance x 1.075"), (0.0, "log-skewness + 0.1"),
                                             (6.0, "log-variance x 1.075"), (6.0, "log-skewness + 0.1"),
                                             (6.0, "skewness x 1.10")])
def test_one_point_checks_fail_on_what_the_old_15_percent_let_through(z, perturbation):
    perturbed = ONE_POINT_PERTURBATIONS[perturbation](*_one_point_cache(z))
    with pytest.raises(AssertionError):
        check_one_point_statistics(z, *perturbed)


def test_same_seed_same_field_and_structures_grow():
    first = lognormal_overdensity(32, 50.0, 2.0, seed=8)
    np.testing.assert_array_equal(first, lognormal_overdensity(32, 50.0, 2.0, seed=8))
    other = lognormal_overdensity(32, 50.0, 2.0, seed=9)
    assert not np.allclose(first, other)
    # Independent fields: uncorrelated up to the scatter of a few large-scale modes.
    assert abs(np.corrcoef(np.log(first).ravel(), np.log(other).ravel())[0, 1]) < 0.3
    # Same seed, another redshift: the same structures, with larger contrast later.
    early = lognormal_overdensity(32, 50.0, 6.0, seed=8)
    assert np.corrcoef(np.log(first).ravel(), np.log(early).ravel())[0, 1] > 0.95
    assert np.log(first).std() > np.log(early).std()


def test_bad_input_names_the_option():
    with pytest.raises(InputError, match="n_cells"):
        lognormal_overdensity(1, 50.0, 0.0, seed=1)
    with pytest.raises(InputError, match="box_size_cMpc"):
        lognormal_overdensity(8, -5.0, 0.0, seed=1)
    with pytest.raises(InputError, match="seed"):
        lognormal_overdensity(8, 50.0, 0.0, seed=-1)
    with pytest.raises(InputError, match="seed"):
        lognormal_overdensity(8, 50.0, 0.0, seed=1.5)
    with pytest.raises(InputError, match="smoothing_cells"):
        lognormal_overdensity(8, 50.0, 0.0, seed=1, smoothing_cells=-1.0)
    with pytest.raises(InputError, match="redshift"):
        lognormal_overdensity(8, 50.0, GROWTH_Z_MAX + 1.0, seed=1)
    with pytest.raises(InputError, match="redshift"):
        lognormal_overdensity(8, 50.0, [0.0, 1.0], seed=1)
    with pytest.raises(InputError, match="k_per_Mpc"):
        linear_power(np.array([-0.1, 0.1]))
    with pytest.raises(InputError, match="sigma8"):
        linear_power(0.1, sigma8=0.0)
    with pytest.raises(InputError, match="n_s"):
        linear_power(0.1, n_s=3.0)
    with pytest.raises(InputError, match="Tcmb0"):
        linear_power(0.1, cosmology=FlatLambdaCDM(H0=70, Om0=0.3, Ob0=0.05))
    with pytest.raises(InputError, match="power_Mpc3"):
        gaussian_field(8, 50.0, lambda k: -np.ones_like(k), seed=1)


def test_too_nonlinear_grids_are_refused_or_flagged():
    # Unsmoothed z = 0 power in cells of 0.16-0.3 cMpc: ln(1 + xi) needs
    # xi > -1 (Coles & Jones 1991), and its spectrum may turn negative.
    with pytest.raises(InputError, match="smoothing_cells"):
        lognormal_overdensity(32, 5.0, 0.0, seed=1, smoothing_cells=0.0)
    with pytest.warns(UserWarning, match="negative power"):
        lognormal_overdensity(32, 10.0, 0.0, seed=1, smoothing_cells=0.0)


# -- the demo files -------------------------------------------------------------------
def _demo_path(demo_dir, z):
    return demo_dir / f"demo_z{z:g}.h5"


def test_shipped_demo_boxes_follow_the_schema(demo_dir, demo_plasma):
    total = 0
    for z in DEMO_REDSHIFTS:
        path = _demo_path(demo_dir, z)
        total += path.stat().st_size
        with h5py.File(path, "r") as handle:
            dataset = handle["electron_density"]
            assert dataset.shape == (CELLS,) * 3 and dataset.dtype == np.float32
            assert dataset.compression == "gzip" and dataset.shuffle
            for attrs in (dataset.attrs, handle.attrs):
                assert attrs["quantity"] == "n_e_physical"
                assert attrs["box_size"] == 100.0 and attrs["box_size_unit"] == "cMpc/h"
                assert attrs["redshift"] == z and attrs["hubble_h"] == pytest.approx(H)
                provenance = json.loads(attrs["provenance"])
                assert provenance["cells"] == CELLS and "versions" in provenance
            density = dataset[...]
        assert density.min() > 0.0
        # Issue 3: the mean of a demo box is nbar_e(z) of the background (to 1 %).
        expected = demo_plasma.mean_electron_density_cm3(z)
        assert density.mean(dtype=np.float64) == pytest.approx(expected, rel=0.01)
    assert total < 8e6  # "a few MB in all"


def test_shipped_demo_box_is_remade_from_its_provenance(demo_dir, demo_plasma):
    path = _demo_path(demo_dir, 6.0)
    with h5py.File(path, "r") as handle:
        stored = handle["electron_density"][...]
        provenance = json.loads(handle.attrs["provenance"])
    remade = lognormal_overdensity(
        provenance["cells"],
        provenance["box_size"] / H,
        provenance["redshift"],
        provenance["seed"],
        smoothing_cells=provenance["smoothing_cells"],
    ) * np.float32(demo_plasma.mean_electron_density_cm3(6.0))
    np.testing.assert_allclose(remade, stored, rtol=1e-5)
    # The same structures at every redshift: one seed, one realisation.
    with h5py.File(_demo_path(demo_dir, 0.0), "r") as handle:
        today = handle["electron_density"][...]
    assert np.corrcoef(np.log(today).ravel(), np.log(stored).ravel())[0, 1] > 0.95


def test_shipped_demo_boxes_load_with_no_flags(demo_dir, demo_plasma):
    # The loader written beside this module reads the schema's attributes alone.
    boxes = pytest.importorskip("raytrace.boxes")
    for z in DEMO_REDSHIFTS:
        box = boxes.load_box(_demo_path(demo_dir, z))
        assert box.quantity == "n_e_physical" and box.redshift == z
        assert box.box_size_cMpc == pytest.approx(100.0 / H, rel=1e-12)
        mean = box.physical_electron_density(z).mean()
        assert mean == pytest.approx(demo_plasma.mean_electron_density_cm3(z), rel=0.01)


@pytest.fixture(scope="module")
def demo_script(demo_dir):
    spec = importlib.util.spec_from_file_location("make_demo_boxes", demo_dir.parent / "scripts" / "make_demo_boxes.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def test_demo_script_writes_refuses_and_overwrites(demo_script, tmp_path, capsys):
    options = ["--cells", "8", "--redshifts", "0", "3", "--output-dir", str(tmp_path / "boxes")]
    assert demo_script.main(options) == 0
    written = tmp_path / "boxes" / "demo_z3.h5"
    with h5py.File(written, "r") as handle:
        assert handle["electron_density"].shape == (8, 8, 8)
        assert handle.attrs["redshift"] == 3.0
        first = handle["electron_density"][...]
    modified = written.stat().st_mtime_ns
    assert demo_script.main(options) == 2
    assert "--overwrite" in capsys.readouterr().err
    assert written.stat().st_mtime_ns == modified
    assert demo_script.main(options + ["--overwrite", "--seed", "2"]) == 0
    with h5py.File(written, "r") as handle:
        assert not np.array_equal(handle["electron_density"][...], first)
    assert sorted(p.name for p in (tmp_path / "boxes").iterdir()) == ["demo_z0.h5", "demo_z3.h5"]


@pytest.mark.parametrize(
    "options, flag",
    [
        (["--cells", "1"], "--cells"),
        (["--box-size", "-1"], "--box-size"),
        (["--seed", "-3"], "--seed"),
        (["--redshifts", "0", "500"], "--redshifts"),
        (["--redshifts", "1", "1.0"], "--redshifts"),
        (["--smoothing-cells", "-1"], "--smoothing-cells"),
    ],
)
def test_demo_script_bad_options(demo_script, tmp_path, capsys, options, flag):
    assert demo_script.main(options + ["--output-dir", str(tmp_path)]) == 2
    assert flag in capsys.readouterr().err
    assert not any(tmp_path.iterdir())
