"""The one-page report (raytrace.report.page, ``raytrace report``), the limits CLI on a result file and the
anisotropy-limit curves of a sky's quick look and of a C_l table, against numbers computed here from
the stored arrays.

Sources: the result files' arrays read with h5py (not through SightlineResult / SkyResult); the
spectral limit of raytrace.limits.spectral (itself checked in tests/test_limits.py against astropy's
blackbody and scipy); PHYSICS.md section 6 for dT/T = -epsilon^2 K / omega_0 (1 - e^-x)/x with
x = h nu / (k T_0), T_0 = 2.72548 K (Fixsen 2009, ApJ 707, 916), k and h from astropy (CODATA 2018);
section 10 for the signal of the two splits (their covariance over pixels, their cross-spectrum
with healpy.anafast); numpy.percentile for the sightline quantiles. The measured-spectrum limit is
tests/test_sky_signal.py's.
"""

import argparse
import csv
import re
import warnings

import astropy.constants as const
import astropy.units as u
import h5py
import healpy
import matplotlib.image
import numpy as np
import pytest
from scipy import ndimage

import raytrace
from raytrace.boxes import Box
from raytrace.cli import limits as limits_cli
from raytrace.cli import report as report_cli
from raytrace.core.errors import InputError, ProbedRangeWarning, RaytraceWarning
from raytrace.limits.anisotropy import rms_limit, table_limit
from raytrace.limits.spectral import UnconstrainedMassWarning, spectral_limit
from raytrace.physics.background import MeanPlasma
from raytrace.report.page import DPI, PAGE_WIDTH_IN, histogram_masses, make_report
from raytrace.sky.maps import SkyResult
from raytrace.sky.pixelwindow import pixel_window

T0_K = 2.72548  # Fixsen 2009
K_EV_PER_K = const.k_B.to_value(u.eV / u.K)
OMEGA0_EV = K_EV_PER_K * T0_K  # the default photon energy, k T_0
SKY_OMEGA0_EV = (const.h * 143 * u.GHz).to_value(u.eV)  # the anisotropy limits' default, 143 GHz


def split_dtt(stored, omega0):
    """dT/T at epsilon = 1 of the two split maps (the boxes' kernel; the background adds a constant)."""
    x = omega0 / (K_EV_PER_K * T0_K)
    return stored["sky_splits"] / omega0 * (1 - np.exp(-x)) / x


def signal_rms(stored, omega0):
    """The sky's signal rms of dT/T: the covariance of its two splits over pixels (PHYSICS.md s.10)."""
    a, b = split_dtt(stored, omega0)[:, 0], split_dtt(stored, omega0)[:, 1]
    covariance = ((a - a.mean(axis=0)) * (b - b.mean(axis=0))).mean(axis=0)
    return np.sqrt(np.clip(covariance, 0, None))


def lognormal_box(plasma, cells=16, seed=4):
    """A smooth log-normal n_e (Coles & Jones 1991) at the mean density of ``plasma``, z = 0."""
    gauss = ndimage.gaussian_filter(np.random.default_rng(seed).standard_normal((cells,) * 3), 1.5, mode="wrap")
    gauss *= 0.8 / gauss.std()
    n_com = float(plasma.mean_comoving_electron_density_cm3(0.0))
    return Box.from_array(np.exp(gauss - 0.32) * n_com, "100 cMpc", 0.0, quantity="n_e_comoving", plasma=plasma)


@pytest.fixture(scope="module")
def run_files(tmp_path_factory):
    """A sightline and a sky result on one mass grid: boxes to z = 0.5, homogeneous background to z = 1."""
    folder = tmp_path_factory.mktemp("report")
    plasma = MeanPlasma()
    box = lognormal_box(plasma)
    mean_mass = float(plasma.mean_plasma_mass_eV(0.0))
    mass = np.geomspace(0.2 * mean_mass, 4.0 * mean_mass, 24)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ProbedRangeWarning)  # the grid reaches past the box on purpose
        result = raytrace.cast_sightlines(box, mass, 40, z_max=1.0, z_boxes=0.5, plasma=plasma, seed=2)
        sky = raytrace.cast_sky(box, mass, 4, z_max=1.0, z_boxes=0.5, plasma=plasma, seed=2)
    result.save(folder / "result.h5")
    sky.save(folder / "sky.h5")
    return folder, folder / "result.h5", folder / "sky.h5"


@pytest.fixture(scope="module")
def stored(run_files):
    """The arrays as the files hold them, read with h5py."""
    _, result_path, sky_path = run_files
    with h5py.File(result_path, "r") as handle:
        arrays = {name: handle[name][...] for name in ("mass_eV", "kernel_boxes", "kernel_background", "crossings",
                                                       "dispersion_measure_boxes")}
        arrays["dm_background"] = float(handle.attrs["dispersion_measure_background"])
    with h5py.File(sky_path, "r") as handle:
        # A sky's maps are stored mass-major: its pixels on axis 1 (the dataset's attribute rows_axis), and
        # each split's maps (masses, splits, pixels): the pixels on axis 2.
        assert handle["kernel_boxes"].attrs["rows_axis"] == 1 and handle["kernel_splits"].attrs["rows_axis"] == 2
        arrays["sky_kernel"] = handle["kernel_boxes"][...].T + handle["kernel_background"][...][None, :]
        arrays["sky_splits"] = handle["kernel_splits"][...].transpose(2, 1, 0)  # (pixels, splits, masses)
    arrays["kernel"] = arrays["kernel_boxes"] + arrays["kernel_background"][None, :]
    return arrays


def heavy_tail():
    """The report's warning where the top 1 % of rays (one of 40) carry more than half the variance."""
    return pytest.warns(RaytraceWarning, match="the top 1 % of rows carry more than 50 % of the variance")


# 40 rays through a heavy-tailed box, made so one ray carries most of the variance: its per-bin means
# stray from the one-point mean by design.
@pytest.mark.filterwarnings("ignore::raytrace.statistics.meancheck.MeanCheckWarning")
def test_the_run_has_masses_where_one_ray_carries_most_of_the_variance(stored):
    # The fixture's 40 rays: at some masses the largest K alone carries over half of sum (K - mean)^2
    # (numpy here), so the report must warn, as heavy_tail() expects of every make_report below.
    kernel = stored["kernel"]
    deviations = (kernel - kernel.mean(axis=0)) ** 2
    share = (np.max(kernel, axis=0) - kernel.mean(axis=0)) ** 2 / np.where(deviations.sum(axis=0) > 0,
                                                                           deviations.sum(axis=0), np.inf)
    assert np.any(share > 0.5)


@pytest.fixture(scope="module")
def report_paths(run_files):
    folder, result_path, sky_path = run_files
    with heavy_tail():
        return make_report(result_path, folder / "page", sky=sky_path)


def quiet_limits(mass, kernel):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UnconstrainedMassWarning)
        return spectral_limit(mass, kernel).epsilon_max


# -- the page ---------------------------------------------------------------------------------


def test_report_writes_png_pdf_and_text(report_paths):
    for kind in ("png", "pdf", "txt"):
        assert report_paths[kind].stat().st_size > 0
    image = matplotlib.image.imread(report_paths["png"])
    # A page PAGE_WIDTH_IN wide at DPI, taller than wide with the sky's row (portrait); the sky's signal
    # and noise lines make it longer than A4's 1.41.
    assert image.shape[1] == round(PAGE_WIDTH_IN * DPI)
    assert image.shape[1] < image.shape[0] < 1.8 * image.shape[1]
    assert image[..., :3].std() > 0.05  # something is drawn, not a blank page
    assert report_paths["pdf"].read_bytes().startswith(b"%PDF")  # the PDF format's own header


def test_page_without_sky_is_shorter(run_files, report_paths):
    folder, result_path, _ = run_files
    with heavy_tail():
        paths = make_report(result_path, folder / "no_sky")
    without = matplotlib.image.imread(paths["png"])
    with_sky = matplotlib.image.imread(report_paths["png"])
    assert without.shape[1] == with_sky.shape[1] and without.shape[0] < with_sky.shape[0]
    assert "sky:" not in paths["txt"].read_text()


def test_report_refuses_to_overwrite(run_files, report_paths):
    folder, result_path, sky_path = run_files
    before = report_paths["png"].read_bytes()
    with pytest.raises(InputError, match=r"page\.png: output exists"):
        make_report(result_path, folder / "page", sky=sky_path)
    assert report_paths["png"].read_bytes() == before
    # One existing output is enough to refuse, before anything is written.
    (folder / "lone.txt").write_text("someone's notes")
    with pytest.raises(InputError, match=r"lone\.txt"):
        make_report(result_path, folder / "lone")
    assert not (folder / "lone.png").exists() and (folder / "lone.txt").read_text() == "someone's notes"
    with heavy_tail():
        replaced = make_report(result_path, folder / "lone", overwrite=True)
    assert replaced["txt"].read_text().startswith("raytrace")


def test_summary_states_the_run(report_paths, stored):
    text = report_paths["txt"].read_text()
    assert re.search(r"\b40 rays\b", text) and "z = 0 to 1," in text and "boxes serve z = 0 to 0.5" in text
    # Boxes' share of the mean kernel, from the stored arrays: mean over rays of the boxes' part
    # over the mean of the whole, summed over the grid and per mass.
    boxes_mean = stored["kernel_boxes"].mean(axis=0)
    mean = boxes_mean + stored["kernel_background"]
    assert f"{100 * boxes_mean.sum() / mean.sum():.1f} % of <K>" in text
    per_mass = boxes_mean[mean > 0] / mean[mean > 0]
    assert f"{100 * per_mass.min():.1f} % to {100 * per_mass.max():.1f} %" in text
    assert per_mass.min() < 0.99  # the background part is really there
    # The probed range: masses with a crossing on some ray.
    probed = stored["mass_eV"][stored["crossings"].sum(axis=0) > 0]
    assert f"{probed.size} masses, {probed[0]:.3g} to {probed[-1]:.3g} eV" in text
    dm = stored["dispersion_measure_boxes"] + stored["dm_background"]
    assert f"mean {dm.mean():.4g} pc cm^-3" in text and f"the background {stored['dm_background']:.4g}" in text


def test_summary_table_holds_the_limits(report_paths, stored):
    text = report_paths["txt"].read_text()
    mass = stored["mass_eV"]
    mean_limit = quiet_limits(mass, stored["kernel"].mean(axis=0))
    low_limit = quiet_limits(mass, np.percentile(stored["kernel"], 16, axis=0))  # numpy's quantile
    with np.errstate(invalid="ignore"):  # 0 / 0 at masses nothing resonates with, never listed
        boxes_share = stored["kernel_boxes"].mean(axis=0) / stored["kernel"].mean(axis=0)
    # columns: m, <K>, boxes %, rays hit %, eps mean, eps homogeneous, eps K16, eps K84, eps sky
    rows = [line.replace(" %", "%").split() for line in text.splitlines()
            if re.match(r"^\s+\d\.\d+e-\d+\s+\d", line)]
    assert len(rows) >= 3 and all(len(row) == 9 for row in rows)
    for row in rows:
        k = int(np.argmin(np.abs(mass / float(row[0]) - 1)))
        assert float(row[0]) == pytest.approx(mass[k], rel=1e-3, abs=0)
        assert float(row[1]) == pytest.approx(stored["kernel"][:, k].mean(), rel=1e-3)
        assert float(row[2].rstrip("%")) == pytest.approx(100 * boxes_share[k], abs=0.05)
        assert float(row[3].rstrip("%")) == pytest.approx(100 * np.mean(stored["crossings"][:, k] > 0), abs=0.05)
        # Printed to 3 digits: equal within half a unit of the third.
        assert float(row[4]) == pytest.approx(mean_limit[k], rel=5e-3)
        assert row[6] == "none" or float(row[6]) == pytest.approx(low_limit[k], rel=5e-3)


def test_histogram_masses_are_well_sampled(run_files, stored):
    result = raytrace.SightlineResult.load(run_files[1])
    picked = histogram_masses(result)
    assert picked.size == 3 and np.all(np.diff(picked) > 0)
    hit = (stored["crossings"] > 0).mean(axis=0)
    assert np.all(hit[picked] >= 0.5)  # half the rays or more resonate there
    usable = np.flatnonzero(hit >= 0.5)
    assert usable[0] < picked[0] and picked[-1] < usable[-1]  # inside the range, not at its ends


# -- the limits CLI on a result --------------------------------------------------------------------


def parse(module, argv):
    parser = argparse.ArgumentParser()
    module.add_arguments(parser)
    return parser.parse_args(argv)


def read_csv(path):
    with open(path) as handle:
        rows = list(csv.DictReader(line for line in handle if not line.startswith("#")))
    # An empty field is an unconstrained mass (read as NaN); the reason columns stay text.
    return {key: [row[key] for row in rows] if key.endswith("_unconstrained")
            else np.array([float(row[key]) if row[key] else np.nan for row in rows]) for key in rows[0]}


def as_table(epsilon_max):
    """epsilon_max as a table holds it: unconstrained (inf) masses are empty fields (NaN when read)."""
    return np.where(np.isinf(epsilon_max), np.nan, epsilon_max)


def test_limits_cli_from_a_result_file(run_files, stored, capsys):
    folder, result_path, sky_path = run_files
    table = folder / "limits.csv"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UnconstrainedMassWarning)
        assert limits_cli.run(parse(limits_cli, ["--result", str(result_path), "--sky", str(sky_path),
                                                 "--output", str(table)])) == 0
    printed = capsys.readouterr().out
    assert "sky quick look: signal rms < 1e-5 in dT/T at 143 GHz" in printed
    assert "measured TT spectrum (l 2-8) at 143 GHz" in printed and "component separation" in printed
    columns = read_csv(table)
    mass = stored["mass_eV"]
    np.testing.assert_allclose(columns["mass_eV"], mass, rtol=1e-9)  # the CSV keeps 10 digits
    # The mean curve is spectral_limit on the mean over the stored rays; the band on numpy's quantiles.
    np.testing.assert_allclose(columns["mean_epsilon_max"],
                               as_table(quiet_limits(mass, stored["kernel"].mean(axis=0))), rtol=1e-9)
    for percent in (16, 84):
        np.testing.assert_allclose(columns[f"sightline_p{percent}_epsilon_max"],
                                   as_table(quiet_limits(mass, np.percentile(stored["kernel"], percent, axis=0))),
                                   rtol=1e-9)
    # The quick-look column: sqrt(threshold / signal rms of dT/T at epsilon = 1), PHYSICS.md sections 6, 10.
    rms = signal_rms(stored, SKY_OMEGA0_EV)
    varies = rms > 0
    assert varies.sum() > 10
    np.testing.assert_allclose(columns["anisotropy_rms_epsilon_max"][varies], np.sqrt(1e-5 / rms[varies]), rtol=1e-9)
    assert np.all(np.isnan(columns["anisotropy_rms_epsilon_max"][~varies]))  # empty fields
    assert [bool(reason) for reason in columns["anisotropy_rms_unconstrained"]] == (~varies).tolist()
    # The measured-spectrum limit and its band sit beside it, the band around it.
    finite = np.isfinite(columns["anisotropy_epsilon_max"]) & np.isfinite(columns["anisotropy_high_epsilon_max"])
    assert finite.sum() > 10
    assert np.all(columns["anisotropy_low_epsilon_max"][finite] <= columns["anisotropy_epsilon_max"][finite])
    assert np.all(columns["anisotropy_epsilon_max"][finite] <= columns["anisotropy_high_epsilon_max"][finite])


def test_limits_cli_sky_options_need_matching_masses(run_files):
    _, _, sky_path = run_files
    with pytest.raises(InputError, match=r"--sky .*sky\.h5.* not those of --mass"):
        limits_cli.run(parse(limits_cli, ["--mass-values", "1e-13", "--sky", str(sky_path)]))
    with pytest.raises(InputError, match="--isotropy-threshold: only meaningful with --sky"):
        limits_cli.run(parse(limits_cli, ["--mass-values", "1e-13", "--isotropy-threshold", "1e-6"]))
    with pytest.raises(InputError, match="--isotropy-threshold: expected a positive"):
        limits_cli.run(parse(limits_cli, ["--sky", str(sky_path), "--isotropy-threshold", "-1"]))


def test_limits_cli_without_masses_takes_the_documented_grid(capsys):
    # The grid --help documents (1e-15 to 1e-12 eV, 64 masses), log-spaced as numpy.geomspace spaces it.
    with pytest.warns(UnconstrainedMassWarning):
        assert limits_cli.run(parse(limits_cli, ["--all"])) == 0
    rows = [line.split() for line in capsys.readouterr().out.splitlines() if not line.startswith("#")]
    np.testing.assert_allclose([float(row[0]) for row in rows], np.geomspace(1e-15, 1e-12, 64), rtol=1e-4)


# -- the anisotropy curve ---------------------------------------------------------------------------


def test_quick_look_scales_as_the_square_root_of_the_threshold(run_files, stored):
    sky = SkyResult.load(run_files[2])
    omega0 = (const.h * 160 * u.GHz).to_value(u.eV)
    base, four = rms_limit(sky, omega0, threshold=1e-5), rms_limit(sky, omega0, threshold=4e-5)
    finite = np.isfinite(base.epsilon_max)
    assert finite.sum() > 10
    # dT/T goes as epsilon^2: four times the threshold allows twice the epsilon.
    np.testing.assert_allclose(four.epsilon_max[finite] / base.epsilon_max[finite], 2.0, rtol=1e-12)
    # From the splits' covariance, never the raw map (whose rms the rays' noise inflates).
    rms = signal_rms(stored, omega0)
    np.testing.assert_allclose(base.epsilon_max[finite], np.sqrt(1e-5 / rms[finite]), rtol=1e-9)
    x = omega0 / (K_EV_PER_K * T0_K)
    raw = (stored["sky_kernel"] / omega0 * (1 - np.exp(-x)) / x).std(axis=0)
    assert np.all(raw[finite] > rms[finite])
    assert base.label.startswith("sky quick look: signal rms < 1e-5 in dT/T at 160 GHz")
    assert base.metadata()["kind"] == "CMB anisotropy" and set(base.columns()) == {"epsilon_max", "signal_rms_dT_T"}


def test_limit_from_a_cl_table(run_files, stored, tmp_path):
    sky = SkyResult.load(run_files[2])
    ells = np.arange(1, 3 * sky.nside)
    table = tmp_path / "cl_limits.txt"
    np.savetxt(table, np.column_stack([ells, np.full(ells.size, 1e-12)]), header="l, C_l limit in (dT/T)^2")
    curve = table_limit(sky, SKY_OMEGA0_EV, table)
    assert curve.label.startswith("sky: C_l limits from cl_limits.txt")
    # Reference: the signal spectrum, healpy.anafast of the two split dT/T maps at epsilon = 1 (RING
    # maps, monopoles removed) over the pixel window squared, C_l going as epsilon^4, so epsilon_max =
    # min over the resolved l <= 2 nside where C_l > 0 of (limit / C_l)^(1/4).
    splits = split_dtt(stored, SKY_OMEGA0_EV)
    resolved = ells[ells <= 2 * sky.nside]
    checked = 0
    for k in range(sky.mass_eV.size):
        a, b = (splits[:, i, k] - splits[:, i, k].mean() for i in (0, 1))
        cl = healpy.anafast(a, b, lmax=ells[-1]) / pixel_window(sky.nside, ells[-1]) ** 2
        positive = cl[resolved] > 0
        if positive.any() and np.ptp(stored["sky_kernel"][:, k]) > 0:
            expected = np.min(1e-12 / cl[resolved][positive]) ** 0.25
            assert curve.epsilon_max[k] == pytest.approx(expected, rel=1e-9)
            checked += 1
    assert checked > 10
    # Limits sixteen times looser allow twice the epsilon.
    looser = table_limit(sky, SKY_OMEGA0_EV, np.column_stack([ells, np.full(ells.size, 16e-12)]))
    finite = np.isfinite(curve.epsilon_max)
    np.testing.assert_allclose(looser.epsilon_max[finite] / curve.epsilon_max[finite], 2.0, rtol=1e-12)
    with pytest.raises(InputError, match="cl_limits"):
        table_limit(sky, SKY_OMEGA0_EV, np.column_stack([ells, -np.ones(ells.size)]))


# -- the report CLI ---------------------------------------------------------------------------------


def test_report_cli(run_files, capsys):
    folder, result_path, sky_path = run_files
    stem = folder / "cli_page"
    argv = [str(result_path), "--sky", str(sky_path), "--output", str(stem), "--epsilon", "1e-6",
            "--frequency", "160 GHz"]
    with heavy_tail():
        assert report_cli.run(parse(report_cli, argv)) == 0
    printed = capsys.readouterr().out
    for kind in ("png", "pdf", "txt"):
        assert f"{kind}: {stem}.{kind}" in printed and (folder / f"cli_page.{kind}").stat().st_size > 0
    text = (folder / "cli_page.txt").read_text()
    assert "at 160 GHz" in text and "epsilon = 1e-06" in text
    with pytest.raises(InputError, match=r"cli_page\.png: output exists"):
        report_cli.run(parse(report_cli, argv))
    with pytest.raises(InputError, match="--epsilon: expected positive"):
        report_cli.run(parse(report_cli, [str(result_path), "--output", str(folder / "bad"), "--epsilon", "-1"]))
    with pytest.raises(InputError, match="--cl-limits: only meaningful with --sky"):
        report_cli.run(parse(report_cli, [str(result_path), "--output", str(folder / "bad"), "--cl-limits", "x"]))
    with pytest.raises(InputError, match="sky.h5: not a raytrace sightline result"):
        report_cli.run(parse(report_cli, [str(sky_path), "--output", str(folder / "bad")]))
