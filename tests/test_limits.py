"""Tests of raytrace.limits.spectral and the ``raytrace limits`` subcommand."""

import argparse
import csv
import dataclasses
import re
import warnings

import astropy.constants as const
import astropy.units as u
import h5py
import numpy as np
import pytest
from astropy.modeling.models import BlackBody
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from scipy import optimize, stats

from raytrace.cli import limits as limits_cli
from raytrace.core.errors import InputError
from raytrace.limits.limitset import LimitSet, limit_table, plot_limits
from raytrace.limits.spectral import (
    PoorFitWarning,
    UnconstrainedMassWarning,
    delta_chi2,
    sightline_limits,
    spectral_limit,
)
from raytrace.limits.spectrum import read_spectrum
from raytrace.physics.background import background_kernel

H_EV_S = const.h.to_value(u.eV * u.s)
KERNEL_EV = 1.0e6  # a chosen kernel, of the size of the background's near m ~ 1e-13 eV


def astropy_planck(frequency_hz, temperature_K):
    # Reference implementation: astropy.modeling.models.BlackBody.
    model = BlackBody(temperature=temperature_K * u.K, scale=1.0 * u.MJy / u.sr)
    return model(frequency_hz * u.Hz).to_value(u.MJy / u.sr)


def synthetic(s_true, seed, temperature=2.7255):
    """The published frequencies and sigmas, a blackbody with an injected s K / (h nu) and Gaussian noise."""
    published = read_spectrum()
    nu = published.frequency_hz
    clean = astropy_planck(nu, temperature) * (1.0 - s_true * KERNEL_EV / (H_EV_S * nu))
    noise = np.random.default_rng(seed).normal(0.0, published.sigma_MJy_sr)
    return dataclasses.replace(published, intensity_MJy_sr=clean + noise, source=f"synthetic, seed {seed}")


# -- Delta chi^2 ----------------------------------------------------------------------


@pytest.mark.parametrize("confidence", [0.9, 0.95, 0.99])
def test_delta_chi2_is_the_one_sided_gaussian_quantile(confidence):
    # Reference: scipy.stats.norm; a one-sided limit at CL sits Phi^-1(CL) sigma above the estimate.
    assert delta_chi2(confidence) == pytest.approx(stats.norm.ppf(confidence) ** 2, rel=1e-10)


def test_delta_chi2_at_95_percent_is_2_71():
    # Common practice, no source: 2.71 for a one-sided 95 % limit (PHYSICS.md section 6).
    assert delta_chi2(0.95) == pytest.approx(2.71, abs=0.005)


@pytest.mark.parametrize("confidence", [0.5, 1.0, 1.5, -0.1])
def test_bad_confidence(confidence):
    with pytest.raises(InputError, match="confidence"):
        delta_chi2(confidence)


# -- the published spectrum, no injection ------------------------------------------------


@pytest.mark.parametrize("fit_galaxy", [False, True])
def test_published_table_fits_a_2725_K_blackbody(fit_galaxy):
    limit = spectral_limit(1e-13, KERNEL_EV, fit_galaxy=fit_galaxy)
    # Fixsen et al. 1996: the residuals are from a 2.725 K blackbody, so the fit returns 2.725 K within its error.
    assert abs(limit.temperature_K - 2.725) < limit.temperature_sigma_K
    # Fixsen 2009, ApJ 707, 916: T_0 = 2.72548 +- 0.00057 K.
    assert abs(limit.temperature_K - 2.72548) < 0.00057
    # chi^2 of a good fit: dof +- a few sqrt(2 dof) (chi^2 distribution; common practice, no source).
    # The published residuals were fitted with a Galaxy term, so both fits should be acceptable.
    assert limit.dof == 43 - 1 - int(fit_galaxy)
    assert abs(limit.chi2 - limit.dof) < 3 * np.sqrt(2 * limit.dof)
    assert (limit.galaxy_amplitude is None) == (not fit_galaxy)


def test_published_table_shows_no_distortion():
    # Fixsen et al. 1996 find no significant deviation from a blackbody: s_hat is consistent with zero.
    limit = spectral_limit(1e-13, KERNEL_EV)
    assert abs(limit.s_hat[0]) < 2 * limit.s_sigma[0]


# -- injection and recovery --------------------------------------------------------------


@pytest.mark.parametrize("fit_galaxy", [False, True])
@pytest.mark.parametrize("significance", [0.0, 10.0])
def test_injected_distortion_is_recovered(significance, fit_galaxy):
    sigma_s = spectral_limit(1e-13, KERNEL_EV).s_sigma[0]
    s_true = significance * sigma_s
    spectrum = synthetic(s_true, seed=20240601)
    limit = spectral_limit(1e-13, KERNEL_EV, spectrum=spectrum, fit_galaxy=fit_galaxy)
    # Recovered within its error (Gaussian noise of the published sigmas; 3 sigma for one fixed seed).
    assert abs(limit.s_hat[0] - s_true) < 3 * limit.s_sigma[0]
    if significance == 0:
        # Without a distortion the injected temperature comes back too.
        assert abs(limit.temperature_K - 2.7255) < 3 * limit.temperature_sigma_K
    # Reference: scipy.optimize.curve_fit on the full non-linear model with astropy's blackbody.
    nu = spectrum.frequency_hz

    # Parameters scaled to order one: T = 2.725 K + a 1e-5 K, s = b sigma_s, Galaxy amplitude g.
    def model(nu, a, b, *galaxy):
        distorted = astropy_planck(nu, 2.725 + a * 1e-5) * (1.0 - b * sigma_s * KERNEL_EV / (H_EV_S * nu))
        return distorted + (galaxy[0] * spectrum.galaxy_MJy_sr if galaxy else 0.0)

    start = [0.0, 0.0] + ([0.0] if fit_galaxy else [])
    best, covariance = optimize.curve_fit(
        model, nu, spectrum.intensity_MJy_sr, p0=start, sigma=spectrum.sigma_MJy_sr, absolute_sigma=True,
    )
    best, covariance = best[1] * sigma_s, covariance[1, 1] * sigma_s**2
    assert limit.s_hat[0] == pytest.approx(best, abs=0.01 * limit.s_sigma[0])
    assert limit.s_sigma[0] == pytest.approx(np.sqrt(covariance), rel=0.01, abs=0)


def test_limit_covers_the_true_value():
    # Definition of a 95 % upper limit (Neyman): for true s = 2 sigma_s (above sqrt(2.71) sigma_s, where
    # the boundary-aware limit is exact) it lies below s_true in 5 % of experiments; binomial 3 sigma.
    published = read_spectrum()
    sigma_s = spectral_limit(1e-13, KERNEL_EV).s_sigma[0]
    s_true = 2.0 * sigma_s
    nu = published.frequency_hz
    clean = astropy_planck(nu, 2.7255) * (1.0 - s_true * KERNEL_EV / (H_EV_S * nu))
    trials = 1000
    noise = np.random.default_rng(12345).normal(0.0, published.sigma_MJy_sr, size=(trials, nu.size))
    below = sum(
        spectral_limit(1e-13, KERNEL_EV, spectrum=dataclasses.replace(published, intensity_MJy_sr=clean + row))
        .epsilon_max[0] ** 2 < s_true
        for row in noise
    )
    spread = 3 * np.sqrt(0.05 * 0.95 / trials)
    assert abs(below / trials - 0.05) < spread


# -- scaling with K and the boundary --------------------------------------------------------


def test_limit_scales_as_one_over_sqrt_kernel():
    # PHYSICS.md section 6: P = epsilon^2 K / omega_0, so doubling K halves s_max: epsilon_max / sqrt(2).
    kernel = np.array([1e3, 1e5, 7e5])
    mass = np.array([1e-12, 1e-13, 3e-13])
    single = spectral_limit(mass, kernel)
    double = spectral_limit(mass, 2 * kernel)
    assert np.allclose(single.epsilon_max / double.epsilon_max, np.sqrt(2.0), rtol=1e-12, atol=0)


def test_boundary_formula_both_signs():
    # Profile chi^2 of a Gaussian estimate: chi^2(s) - chi^2(max(s_hat, 0)) = Delta chi^2 at s_max.
    for significance in (-2.0, 3.0):
        sigma_s = spectral_limit(1e-13, KERNEL_EV).s_sigma[0]
        limit = spectral_limit(1e-13, KERNEL_EV, spectrum=synthetic(significance * sigma_s, seed=7))
        s_hat, sigma, s_max = limit.s_hat[0], limit.s_sigma[0], limit.epsilon_max[0] ** 2
        assert (s_hat < 0) == (significance < 0)  # both branches of the formula are exercised
        chi2 = lambda s: ((s - s_hat) / sigma) ** 2  # noqa: E731
        assert chi2(s_max) - chi2(max(s_hat, 0.0)) == pytest.approx(delta_chi2(0.95), rel=1e-9)


# -- the homogeneous background --------------------------------------------------------------


def test_homogeneous_background_limit():
    mass = np.array([1e-15, 1e-13, 1e-12])
    with pytest.warns(UnconstrainedMassWarning, match="1e-15"):
        limit = spectral_limit(mass, background_kernel(mass))
    # Mirizzi, Redondo & Sigl 2009, JCAP 03, 026 (value from memory): epsilon of order 1e-7 near 1e-13 eV.
    assert 3e-8 < limit.epsilon_max[1] < 3e-7
    # Weaker outside the resonant range: no resonance below the lowest mean plasma mass (~1e-14 eV, just
    # before reionisation; CAMB x_e of PHYSICS.md section 5), and a much smaller K for 1e-12 eV, whose
    # resonance is in the dark ages (z ~ 220) where H is large (K = pi m^2 / (3 (1+z) H), section 3).
    assert np.isinf(limit.epsilon_max[0])
    assert limit.epsilon_max[2] > 10 * limit.epsilon_max[1]


# -- bad input ----------------------------------------------------------------------------------


def test_zero_kernel_warns_and_gives_inf():
    mass = np.array([1e-16, 2e-16, 1e-13, 5e-10])
    with pytest.warns(UnconstrainedMassWarning, match=r"\[1e-16, 2e-16\], 5e-10 eV"):
        limit = spectral_limit(mass, [0.0, 0.0, 1e5, 0.0])
    assert np.isinf(limit.epsilon_max[[0, 1, 3]]).all()
    assert np.isfinite(limit.epsilon_max[2])


@pytest.mark.parametrize(
    "kernel, expected", [([1.0, -1.0], "finite values >= 0"), ([1.0, np.nan], "finite"), ([1.0], "one per mass")]
)
def test_bad_kernel(kernel, expected):
    with pytest.raises(InputError, match=expected):
        spectral_limit([1e-13, 2e-13], kernel)


def test_bad_mass():
    with pytest.raises(InputError, match="mass_eV"):
        spectral_limit([1e-13, -1.0], [1.0, 1.0])


def test_galaxy_fit_needs_a_template(tmp_path):
    path = tmp_path / "plain.txt"
    spectrum = read_spectrum()
    rows = "\n".join(f"{a:.12g} {b:.12g} {c:.12g}" for a, b, c in zip(
        spectrum.frequency_hz, spectrum.intensity_MJy_sr, spectrum.sigma_MJy_sr))
    path.write_text("# columns: frequency Hz, intensity MJy/sr, sigma MJy/sr\n" + rows + "\n")
    plain = read_spectrum(path)
    with pytest.raises(InputError, match="Galaxy template"):
        spectral_limit(1e-13, KERNEL_EV, spectrum=plain, fit_galaxy=True)
    # The same figures in the plain layout give the same limit.
    assert spectral_limit(1e-13, KERNEL_EV, spectrum=plain).epsilon_max[0] == pytest.approx(
        spectral_limit(1e-13, KERNEL_EV).epsilon_max[0], rel=1e-8)


def test_spectrum_in_wrong_units_warns():
    # Intensities 1000 times too large (kJy/sr read as MJy/sr) are no 2.7 K blackbody.
    published = read_spectrum()
    wrong = dataclasses.replace(published, intensity_MJy_sr=published.intensity_MJy_sr * 1000)
    with pytest.warns(PoorFitWarning, match="poor"):
        spectral_limit(1e-13, KERNEL_EV, spectrum=wrong)
    with pytest.raises(InputError, match="does not converge"):
        spectral_limit(1e-13, KERNEL_EV, spectrum=dataclasses.replace(published, intensity_MJy_sr=np.zeros(43)))


# -- sets, tables, plots ---------------------------------------------------------------------


MASS = np.geomspace(1e-15, 1e-12, 7)
MEAN = np.full(MASS.size, 4e5)
SPREAD = (np.array([0, 0, 1e5, 1e5, 1e5, 1e5, 1e5]), np.full(MASS.size, 9e5))
BACKGROUND = np.array([0, 0, 2e5, 4e5, 6e5, 1e3, 2e3])


def example_set():
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UnconstrainedMassWarning)
        return sightline_limits(MASS, MEAN, SPREAD, background_kernel_eV=BACKGROUND)


def test_sightline_set_curves_and_band():
    limits = example_set()
    assert [c.name for c in limits.curves] == ["mean", "background"]
    (band,) = limits.bands
    assert "sightline spread" in band.label
    # The band's edges are the limits with the 84 % (lower edge) and 16 % (upper) kernels: 1/sqrt(K).
    mean = limits.curves[0].epsilon_max
    assert np.allclose(band.lower.epsilon_max, mean * np.sqrt(MEAN / SPREAD[1]), rtol=1e-12)
    assert np.allclose(band.upper.epsilon_max[2:], mean[2:] * np.sqrt(MEAN[2:] / SPREAD[0][2:]), rtol=1e-12)
    assert np.isinf(band.upper.epsilon_max[:2]).all()


def read_csv(path):
    # Python's csv module, '#' lines being the header comments.
    with open(path, newline="") as handle:
        rows = list(csv.reader(line for line in handle if not line.startswith("#")))
    # Reason columns stay text; an empty number field (an unconstrained mass) reads as NaN here.
    return {name: [row[i] for row in rows[1:]] if name.endswith("_unconstrained")
            else np.array([float(row[i]) if row[i] else np.nan for row in rows[1:]])
            for i, name in enumerate(rows[0])}


def test_csv_table(tmp_path):
    limits = example_set()
    path = limit_table(tmp_path / "limits.csv", limits)
    table = read_csv(path)
    assert np.allclose(table["mass_eV"], MASS, rtol=1e-9)
    for curve in limits.all_curves():
        free = curve.kernel_eV == 0  # K = 0: epsilon unconstrained, fields empty and the reason given
        assert np.allclose(table[f"{curve.name}_epsilon_max"][~free], curve.epsilon_max[~free], rtol=1e-9)
        assert np.isnan(table[f"{curve.name}_epsilon_max"][free]).all()
        assert np.allclose(table[f"{curve.name}_kernel_eV"][~free], curve.kernel_eV[~free], rtol=1e-9)
        assert [bool(r) for r in table[f"{curve.name}_unconstrained"]] == free.tolist()
    assert "temperature_K" in path.read_text()
    # Every number field is finite: float() would read 'inf' or 'nan' text as such (issue 14, item 6).
    for curve in limits.all_curves():
        free = curve.kernel_eV == 0
        for key in curve.columns():
            assert np.isfinite(table[f"{curve.name}_{key}"][~free]).all(), (curve.name, key)
    with pytest.raises(InputError, match="exists"):
        limit_table(path, limits)
    limit_table(path, limits, overwrite=True)


def test_hdf5_table(tmp_path):
    limits = example_set()
    path = limit_table(tmp_path / "limits.h5", limits)
    with h5py.File(path, "r") as handle:
        assert np.array_equal(handle["mass_eV"][...], MASS)
        for curve in limits.all_curves():
            free = curve.kernel_eV == 0
            stored = handle[curve.name]["epsilon_max"]
            assert np.array_equal(stored[...][~free], curve.epsilon_max[~free])
            assert np.all(stored[...][free] == stored.attrs["_FillValue"])  # no inf or NaN stored
            reasons = handle[curve.name]["unconstrained"].asstr()[...]
            assert [bool(r) for r in reasons] == free.tolist()
            assert handle[curve.name].attrs["confidence"] == 0.95
        assert "sightline spread" in handle.attrs["provenance"]
    assert [p.name for p in tmp_path.iterdir()] == ["limits.h5"]  # no temporary left behind


def test_table_bad_input(tmp_path):
    limits = example_set()
    with pytest.raises(InputError, match="ending in"):
        limit_table(tmp_path / "limits.txt", limits)
    other = spectral_limit(MASS[:3], 1e5)
    with pytest.raises(InputError, match="different mass grids"):
        limit_table(tmp_path / "limits.csv", LimitSet((limits.curves[0], other)))


def test_plot_on_axes_and_to_file(tmp_path):
    limits = example_set()
    figure = Figure()
    FigureCanvasAgg(figure)
    ax = plot_limits(figure.add_subplot(), limits)
    labels = ax.get_legend_handles_labels()[1]
    assert "inhomogeneous universe, mean K over sightlines" in labels
    assert "homogeneous universe (mean plasma only)" in labels
    assert any("sightline spread" in label for label in labels)
    assert ax.get_xscale() == "log" and ax.get_yscale() == "log"
    path = plot_limits(tmp_path / "limits.png", limits)
    assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG specification)
    with pytest.raises(InputError, match="exists"):
        plot_limits(path, limits)


# -- the command line ---------------------------------------------------------------------------


def parse(argv):
    parser = argparse.ArgumentParser()
    limits_cli.add_arguments(parser)
    return parser.parse_args(argv)


def firas_rows(shared_data):
    """Data rows of the published FIRAS monopole table (Fixsen et al. 1996, Table 4), counted with numpy."""
    return np.loadtxt(shared_data / "cmb_monopole_fixsen1996.txt", comments="#").shape[0]


def check_printed_fit(printed, rows):
    """The printed fit without distortion: T within its own error of the table's 2.725 K and within
    Fixsen 2009's 2.72548 +- 0.00057 K; one parameter (T, no Galaxy template here) fitted to ``rows`` points."""
    fitted = re.search(r"T = (\S+) \+- (\S+) K, chi\^2 = \S+ for (\d+) dof", printed)
    assert fitted, printed
    temperature, sigma, dof = float(fitted[1]), float(fitted[2]), int(fitted[3])
    # Fixsen et al. 1996: intensity = 2.725 K blackbody + residual, so the fit returns 2.725 K within its error.
    assert abs(temperature - 2.725) < sigma
    assert abs(temperature - 2.72548) < 0.00057  # Fixsen 2009, ApJ 707, 916
    assert dof == rows - 1


def test_cli_homogeneous_limits(tmp_path, capsys, shared_data):
    csv_path, h5, png = tmp_path / "l.csv", tmp_path / "l.h5", tmp_path / "l.png"
    args = parse(["--mass-min", "1e-15", "--mass-max", "1e-12", "--mass-count", "7", "--output", str(csv_path), str(h5), "--plot", str(png)])
    with pytest.warns(UnconstrainedMassWarning):
        assert limits_cli.run(args) == 0
    printed = capsys.readouterr().out
    check_printed_fit(printed, firas_rows(shared_data))
    # The check is not a copied string: the Fixsen 2009 temperature, 63 of this fit's sigma away from
    # the 2.725 K the table was made from, fails it; so does a dof count off by one.
    fitted = re.search(r"T = (\S+) \+- (\S+) K", printed)
    with pytest.raises(AssertionError):
        check_printed_fit(printed.replace(fitted[1], "2.725480"), firas_rows(shared_data))
    with pytest.raises(AssertionError):
        check_printed_fit(printed, firas_rows(shared_data) + 1)
    table = read_csv(csv_path)
    mass = np.geomspace(1e-15, 1e-12, 7)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UnconstrainedMassWarning)
        expected = spectral_limit(mass, background_kernel(mass)).epsilon_max
    # Unconstrained masses (inf in memory) are empty fields in the table.
    assert np.allclose(table["background_epsilon_max"], np.where(np.isinf(expected), np.nan, expected), rtol=1e-9,
                       equal_nan=True)
    assert h5.exists() and png.exists()
    # Existing outputs are refused before any work, and replaced with --overwrite.
    with pytest.raises(InputError, match="exists"):
        limits_cli.run(args)
    assert limits_cli.run(parse(["--mass-values", "1e-13", "--output", str(csv_path), "--overwrite"])) == 0
    assert read_csv(csv_path)["mass_eV"].tolist() == [1e-13]


def test_cli_hook_with_sightline_kernels(tmp_path):
    h5 = tmp_path / "hook.h5"
    args = parse(["--mass-values", "1e-13", "--output", str(h5), "--confidence", "0.99"])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UnconstrainedMassWarning)
        limits = limits_cli.report(args, MASS, MEAN, SPREAD, BACKGROUND)
    with h5py.File(h5, "r") as handle:
        assert set(handle) == {"mass_eV", "mean", "background", "sightline_p16", "sightline_p84"}
        assert handle["mean"].attrs["delta_chi2"] == pytest.approx(stats.norm.ppf(0.99) ** 2)
    assert limits.curves[0].confidence == 0.99


@pytest.mark.parametrize("confidence", ["0.3", "1.2"])
def test_cli_bad_confidence(confidence):
    with pytest.raises(InputError, match="--confidence"):
        limits_cli.run(parse(["--mass-values", "1e-13", "--confidence", confidence]))


def test_cli_bad_spectrum(tmp_path):
    path = tmp_path / "nounits.txt"
    path.write_text("1 2 3\n4 5 6\n7 8 9\n1 2 3\n")
    with pytest.raises(InputError, match="nounits.txt"):
        limits_cli.run(parse(["--mass-values", "1e-13", "--spectrum", str(path)]))
