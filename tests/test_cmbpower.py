"""The measured CMB TT spectrum (raytrace.limits.cmbpower) and the Delta chi^2 limit over its band powers.

Sources: the published Planck 2018 TT files in ../shared/data (Planck Collaboration 2020, A&A 641,
A5; read here with numpy.loadtxt, not through raytrace), whose binned file states its rule: C_b =
sum w_l C_l / sum w_l, w_l = l (l + 1), l_b = sum w_l l / sum w_l, D_b = l_b (l_b + 1) C_b / (2 pi),
bins of Delta l = 30 from l = 30 and a last bin 2490-2508 (its header); CAMB for the LCDM model,
checked against the binned file's best-fit column; a chi^2 written out here and its root found
with scipy.optimize.brentq; scipy.stats.chi2 for the threshold; astropy for h.
"""

import astropy.constants as const
import astropy.units as u
import numpy as np
import pytest
from scipy import optimize, stats

from raytrace.core.errors import InputError
from raytrace.limits import cmbpower
from raytrace.limits.anisotropy import delta_chi2_limit

EDGES = list(range(30, 2491, 30)) + [2509]  # the binned file's header: [30, 60), ..., [2490, 2509)


@pytest.fixture(scope="module")
def published(shared_data):
    return (np.loadtxt(shared_data / "planck2018_tt_unbinned.txt"),
            np.loadtxt(shared_data / "planck2018_tt_binned.txt"))


def test_binning_the_unbinned_file_gives_the_binned_file(published):
    unbinned, binned = published
    ell, power = unbinned[:, 0], unbinned[:, 1]
    assert len(EDGES) - 1 == binned.shape[0] == 83
    effective, band_power = [], []
    for low, high in zip(EDGES[:-1], EDGES[1:]):
        inside = (ell >= low) & (ell < high)
        w = ell[inside] * (ell[inside] + 1)
        cl = power[inside] * 2 * np.pi / w
        l_b = np.sum(w * ell[inside]) / np.sum(w)
        effective.append(l_b)
        band_power.append(l_b * (l_b + 1) / (2 * np.pi) * np.sum(w * cl) / np.sum(w))
    # Printed to 9 significant digits: half a unit of the last is 5e-9 (measured 4.1e-9 and 4.2e-9).
    np.testing.assert_allclose(effective, binned[:, 0], rtol=5e-9, atol=0)
    np.testing.assert_allclose(band_power, binned[:, 1], rtol=5e-9, atol=0)
    # The module's own binning of the same C_l, through the shipped copies.
    bands = cmbpower.planck_tt()
    high = bands.ell_low >= 30
    cl = np.zeros(2509)
    cl[ell.astype(int)] = power * 2 * np.pi / (ell * (ell + 1))
    binned_cl, _ = bands.bin(cl)
    np.testing.assert_allclose(bands.to_power(binned_cl)[high], binned[:, 1], rtol=5e-9, atol=0)
    np.testing.assert_allclose(bands.ell_effective[high], binned[:, 0], rtol=5e-9, atol=0)


def test_band_powers_are_the_published_rows_with_the_upper_error_below_l_30(published):
    unbinned, binned = published
    bands = cmbpower.planck_tt()
    low = bands.ell_low < 30
    assert low.sum() == 28 and len(bands) == 28 + 83
    np.testing.assert_array_equal(bands.ell_low[low], np.arange(2, 30))
    np.testing.assert_array_equal(bands.power[low], unbinned[:28, 1])
    np.testing.assert_array_equal(bands.error_high[low], unbinned[:28, 3])  # col 4: the upper error
    np.testing.assert_array_equal(bands.power[~low], binned[:, 1])
    np.testing.assert_array_equal(bands.model[~low], binned[:, 4])
    np.testing.assert_array_equal(bands.ell_high[~low], np.array(EDGES[1:]) - 1)
    assert bands.within(64).ell_high.max() == 59 and len(bands.within(16)) == 15


def test_lcdm_model_from_camb_matches_the_files_best_fit(published):
    # The Planck 2018 parameters are written from memory: CAMB with them, binned as the file bins,
    # must give the file's best-fit LCDM column. Measured 0.25 % at most (l = 30-2508); the
    # tolerance 0.5 % still refuses a 1 % change of A_s.
    _, binned = published
    power = cmbpower.lcdm_power(2508)
    ell = np.arange(2509)
    model = []
    for low, high in zip(EDGES[:-1], EDGES[1:]):
        inside = np.arange(low, high)
        w = inside * (inside + 1.0)
        l_b = np.sum(w * inside) / np.sum(w)
        model.append(l_b * (l_b + 1) * np.sum(power[inside] * 2 * np.pi / w * w) / np.sum(w) / (2 * np.pi))
    np.testing.assert_allclose(model, binned[:, 4], rtol=5e-3)
    assert ell.size == power.size


def test_the_shipped_low_ell_model_is_cambs(shared_data):
    # Below l = 30 the band powers' model is CAMB's D_l, shipped as a table so that limits and reports
    # need not run CAMB. Against CAMB run here: written with CAMB 2.0.5 to 11 digits; rtol 1e-4 allows
    # another CAMB version's numerical changes and still refuses the table of a 0.1 % change of A_s.
    from importlib import resources

    with resources.as_file(resources.files("raytrace") / "data" / cmbpower.LCDM_LOW_ELL) as path:
        table = np.loadtxt(path)
    np.testing.assert_array_equal(table[:, 0], np.arange(2, 30))
    np.testing.assert_allclose(table[:, 1], cmbpower.lcdm_power(29)[2:30], rtol=1e-4)
    np.testing.assert_array_equal(cmbpower.planck_tt().model[:28], table[:, 1])


def hand_limit(conversion, residual, sigma, threshold):
    """epsilon_max from chi^2(q) = sum ((r - c q)^2 - r^2) / s^2 written out: its minimum over q >= 0, and
    the q above it where chi^2 rises by the threshold (brentq); q = epsilon^4."""
    c = np.clip(conversion, 0, None)

    def chi2(q):
        return np.sum(((residual - c * q) ** 2 - residual**2) / sigma**2)

    best = max(0.0, optimize.minimize_scalar(chi2, bounds=(0, 1e6), method="bounded", options={"xatol": 1e-12}).x)
    top = best + 1.0
    while chi2(top) - chi2(best) < threshold:
        top *= 2
    return optimize.brentq(lambda q: chi2(q) - chi2(best) - threshold, best, top, xtol=1e-14, rtol=1e-13) ** 0.25


@pytest.mark.parametrize("shift", [-2.0, 0.0, 1.5], ids=["data below model", "on model", "data above model"])
def test_delta_chi2_limit_equals_a_hand_written_chi2(shift):
    rng = np.random.default_rng(7)
    sigma = rng.uniform(20, 200, 12)
    residual = sigma * (shift + rng.standard_normal(12) * 0.3)
    conversion = np.abs(rng.normal(30, 20, (12, 3))) * [1.0, 0.1, 3.0]
    conversion[3, 1] = -5.0  # a negative estimate: no conversion spectrum has one, it counts as 0
    threshold = stats.chi2.ppf(0.9, 1)  # 95 % one-sided: 2.71
    epsilon, q_hat, q_sigma, share = delta_chi2_limit(conversion, residual, sigma, threshold)
    for k in range(3):
        assert epsilon[k] == pytest.approx(hand_limit(conversion[:, k], residual, sigma, threshold), rel=1e-9)
    np.testing.assert_allclose(share.sum(axis=0), 1.0, rtol=1e-12)
    assert share[3, 1] == 0
    # No positive conversion band: not constrained.
    assert np.isinf(delta_chi2_limit(-np.ones((12, 1)), residual, sigma, threshold)[0][0])


def test_frequency_outside_the_channels_is_refused():
    energy = (const.h * u.GHz).to_value(u.eV)
    assert cmbpower.check_frequency(143 * energy) == pytest.approx(143, rel=1e-9)
    for ghz in (30, 90, 353):
        with pytest.raises(InputError, match=r"--frequency.*outside the 100-217 GHz"):
            cmbpower.check_frequency(ghz * energy)


@pytest.mark.parametrize("reader, text, message", [
    ("unbinned", "2 100 10\n3 100 10\n", "expected 4 columns"),
    ("unbinned", "2 100 10 10 5\n", "expected 4 columns"),
    ("unbinned", "2 100 ten 10\n", "cannot read as 4 columns"),
    ("unbinned", "3 100 10 10\n4 100 10 10\n", "consecutive multipoles l = 2"),
    ("unbinned", "2 100 10 10\n3 100 10 10\n", "up to at least l = 29"),
    ("unbinned", "2 100 -10 10\n", "positive errors"),
    ("binned", "47.7 1479 50 50\n", "expected 5 columns"),
    ("binned", "47.7 1479 50 50 1461\n", "expected 83 bins"),
    ("binned", "", "expected 5 columns.*no rows"),
])
def test_bad_spectrum_files_are_refused_in_one_line(tmp_path, reader, text, message):
    path = tmp_path / "spectrum.txt"
    path.write_text("# a CMB spectrum\n" + text)
    read = cmbpower.read_unbinned if reader == "unbinned" else cmbpower.read_binned
    with pytest.raises(InputError, match=message) as raised:
        read(path)
    assert "spectrum.txt" in str(raised.value) and "\n" not in str(raised.value)
    with pytest.raises(InputError, match="not found"):
        read(tmp_path / "missing.txt")


def test_binned_file_in_another_binning_is_refused(tmp_path, published):
    _, binned = published
    shifted = binned.copy()
    shifted[:, 0] += 1.0
    path = tmp_path / "other_bins.txt"
    np.savetxt(path, shifted)
    with pytest.raises(InputError, match="not the effective multipole"):
        cmbpower.read_binned(path)
