"""A newcomer's path without dead ends, and P that stays a probability (issue 24, items 8, 13, 14, 15, 17).

Before the fix: `--epsilon 5` printed and plotted P up to 8e10 as a conversion probability; `sky`
and `onepoint-mean` refused a run file's `[rays] count`, `--mass-values` existed in two subcommands
only and `--mass` was "ambiguous"; FITS column n+1 was grid mass n only below the shown mass;
tables printed nan%, inf and inf-inf where K = 0 and the report "eV:," and "at epsilon = 1 1.3e8";
the limits HDF5 table had no unit, description or format version.

References: PHYSICS.md section 2's saturating form P = (1 - exp(-2 epsilon^2 K / omega_0)) / 2 and
the linear P = epsilon^2 K / omega_0, written out here; the result file read with h5py; the FITS
file read with astropy.io.fits and healpy.read_map (Gorski et al. 2005); the README's promise that
one run file drives every subcommand and --mass-values works wherever a mass grid is taken.
"""

import re
import warnings

import h5py
import numpy as np
import pytest

from raytrace.cli import main
from raytrace.physics.units import CMB_PHOTON_ENERGY_EV
from safety_support import box_folder

# 1e-16, 1e-15, 1e-14 and 1e-13 eV: the lowest two resonate nowhere in the boxes (plasma masses 7e-15 to 1.2e-13 eV).
MASSES = ("--mass-min", "1e-16", "--mass-max", "1e-13", "--mass-count", "4")


@pytest.fixture
def folder(tmp_path):
    box_folder(tmp_path)
    return tmp_path


def run(capsys, *argv):
    with warnings.catch_warnings():
        warnings.simplefilter("default")
        status = main([str(item) for item in argv])
    captured = capsys.readouterr()
    return status, captured.out, captured.err


def table_rows(out):
    """The printed table rows with numbers: lines starting with a mass, split in cells ('no resonance' rows left out)."""
    return [line.split() for line in out.splitlines()
            if re.match(r"^\s+\d\.\d+e[-+]\d+\s", line) and "no resonance" not in line]


# -- item 8: large epsilon --------------------------------------------------------------------------------
def test_a_large_epsilon_gives_p_in_the_saturating_form_with_a_warning(folder, capsys):
    status, out, err = run(capsys, "sightlines", folder / "run.toml", "--epsilon", "5", "--output", folder / "s.h5")
    assert status == 0, err
    assert "saturating form" in err and "PHYSICS.md section 2" in err
    with h5py.File(folder / "s.h5", "r") as handle:
        kernel = handle["kernel_boxes"][...] + handle["kernel_background"][...][None, :]
    linear = 25.0 * kernel / CMB_PHOTON_ENERGY_EV  # epsilon^2 K / omega_0, omega_0 = k T_0 (the default)
    assert linear.max() > 1e3  # the old table printed this as a probability
    expected = (0.5 * (1.0 - np.exp(-2.0 * linear))).mean(axis=0)  # PHYSICS.md section 2, saturating
    printed = np.array([float(row[-1]) for row in table_rows(out)])
    masses = np.array([float(row[0]) for row in table_rows(out)])
    grid = np.geomspace(1e-14, 1.2e-13, 8)
    rows = [int(np.argmin(np.abs(grid - mass))) for mass in masses]
    np.testing.assert_allclose(printed, expected[rows], rtol=5e-4)  # %.3e: half a unit in the last digit
    assert np.all(printed <= 0.5)


def test_a_small_epsilon_keeps_the_linear_p(folder, capsys):
    status, out, err = run(capsys, "sightlines", folder / "run.toml", "--epsilon", "1e-8", "--output",
                           folder / "s.h5")
    assert status == 0 and "saturating" not in err
    with h5py.File(folder / "s.h5", "r") as handle:
        kernel = handle["kernel_boxes"][...] + handle["kernel_background"][...][None, :]
    expected = (1e-16 * kernel / CMB_PHOTON_ENERGY_EV).mean(axis=0)  # the linear form, PHYSICS.md section 2
    printed = np.array([float(row[-1]) for row in table_rows(out)])
    masses = np.array([float(row[0]) for row in table_rows(out)])
    rows = [int(np.argmin(np.abs(np.geomspace(1e-14, 1.2e-13, 8) - mass))) for mass in masses]
    np.testing.assert_allclose(printed, expected[rows], rtol=5e-4)


def test_background_p_saturates_too(capsys):
    status, out, err = run(capsys, "background", "--mass-values", "1e-13", "--epsilon", "5", "--z-max", "10")
    assert status == 0 and "saturating form" in err
    kernel, probability = (float(cell) for cell in table_rows(out)[0][1:3])
    expected = 0.5 * (1.0 - np.exp(-2.0 * 25.0 * kernel / CMB_PHOTON_ENERGY_EV))
    assert probability == pytest.approx(expected, rel=5e-4) and probability <= 0.5


# -- item 13: one run file, every subcommand; --mass-values everywhere -------------------------------------------
@pytest.mark.parametrize("command", [["sky", "--nside", "1"], ["onepoint-mean", "--points", "4096"],
                                     ["resolution-check", "--points", "4096", "--groups", "2", "--report", "R"]],
                         ids=lambda command: command[0])
def test_a_sightline_run_file_drives_the_other_subcommands_with_a_note(folder, capsys, monkeypatch, command):
    monkeypatch.chdir(folder)
    status, out, err = run(capsys, command[0], "run.toml", *command[1:])
    assert status == 0, err
    notes = [line for line in err.splitlines() if "rays.count" in line]
    assert len(notes) == 1 and "not used by this subcommand" in notes[0] and "note" in notes[0]


@pytest.mark.parametrize("command", [["sightlines", "--rays", "4"], ["sky", "--nside", "1"],
                                     ["onepoint-mean", "--points", "4096"]], ids=lambda command: command[0])
def test_mass_values_work_in_every_subcommand_with_a_mass_grid(folder, capsys, command):
    status, out, err = run(capsys, command[0], "--boxes", folder / "box_z0.h5", folder / "box_z1.h5", "--z-max", "1.5",
                           *command[1:], "--mass-values", "2e-14,3e-14", "5e-14", "--output", folder / "m.h5")
    assert status == 0, err
    with h5py.File(folder / "m.h5", "r") as handle:
        np.testing.assert_array_equal(handle["mass_eV"][...], [2e-14, 3e-14, 5e-14])


def test_masses_values_in_a_run_file_and_the_old_mass_flag(folder, capsys):
    text = (folder / "run.toml").read_text().replace("min_eV = 1e-14\nmax_eV = 1.2e-13\ncount = 8",
                                                     "values_eV = [2e-14, 4e-14]")
    (folder / "list.toml").write_text(text)
    status, out, err = run(capsys, "sightlines", folder / "list.toml", "--rays", "4", "--output", folder / "a.h5")
    assert status == 0, err
    with h5py.File(folder / "a.h5", "r") as handle:
        np.testing.assert_array_equal(handle["mass_eV"][...], [2e-14, 4e-14])
    status, out, err = run(capsys, "sightlines", folder / "run.toml", "--rays", "4", "--mass", "2e-14", "4e-14",
                           "--output", folder / "b.h5")
    assert status == 0, err
    assert "--mass is deprecated" in err and "--mass-values" in err  # the promised one-line notice
    with h5py.File(folder / "b.h5", "r") as handle:
        np.testing.assert_array_equal(handle["mass_eV"][...], [2e-14, 4e-14])


# -- item 14: FITS columns keep the grid's order ------------------------------------------------------------
def test_fits_keeps_the_grid_order_and_names_the_shown_mass(folder, capsys):
    import healpy
    from astropy.io import fits

    status, out, err = run(capsys, "sky", folder / "sky.toml", "--nside", "2", "--output", folder / "m.h5",
                           "--fits", folder / "m.fits", "--mass", "6e-14")
    assert status == 0, err
    with h5py.File(folder / "m.h5", "r") as handle:
        mass = handle["mass_eV"][...]
        # A sky's maps are stored mass-major: its pixels on axis 1 (the dataset's attribute rows_axis).
        kernel = handle["kernel_boxes"][...].T + handle["kernel_background"][...][None, :]
    shown = int(np.argmin(np.abs(np.log(mass / 6e-14))))
    assert shown not in (0, mass.size - 1)  # a shown mass inside the grid: the old order broke there
    grid = fits.getheader(folder / "m.fits", 2)
    for k in range(mass.size):
        assert grid[f"MASS{k + 1}"] == pytest.approx(mass[k], rel=1e-12)
        # RING order on file and in the result (nest=False), so the columns compare pixel by pixel.
        np.testing.assert_array_equal(healpy.read_map(str(folder / "m.fits"), field=k, hdu=2), kernel[:, k])
    assert grid["SHOWMASS"] == pytest.approx(mass[shown], rel=1e-12)
    np.testing.assert_array_equal(healpy.read_map(str(folder / "m.fits")), kernel[:, shown])  # HDU 1, field 0


# -- item 15: no nan or inf in the tables -----------------------------------------------------------------------
NOT_A_NUMBER = re.compile(r"\b(nan|inf)\b|nan%|inf-inf")


def test_tables_say_no_resonance_instead_of_nan_or_inf(folder, capsys):
    masses = list(MASSES)
    status, out, err = run(capsys, "sightlines", folder / "run.toml", *masses, "--no-include-background",
                           "--output", folder / "s.h5")
    assert status == 0 and not NOT_A_NUMBER.search(out), out
    assert out.count("no resonance") == 2
    status, out, err = run(capsys, "sky", folder / "sky.toml", "--nside", "2", *masses, "--no-include-background",
                           "--output", folder / "k.h5")
    assert status == 0 and not NOT_A_NUMBER.search(out), out
    assert "no resonance" in out
    for path in ("s.h5", "k.h5"):
        status, out, err = run(capsys, "spread-check", folder / path)
        assert status == 0 and not NOT_A_NUMBER.search(out), out
        assert "no resonance" in out and "All-NaN" not in err
    status, out, err = run(capsys, "onepoint-mean", folder / "sky.toml", *masses, "--points", "4096",
                           "--no-include-background")
    assert status == 0 and not NOT_A_NUMBER.search(out) and "no resonance" in out, out
    status, out, err = run(capsys, "report", folder / "s.h5", "--sky", folder / "k.h5", "--output", folder / "page")
    assert status == 0, err
    text = (folder / "page.txt").read_text()
    assert "eV:," not in text and not re.search(r"at epsilon = 1 \d", text), text


# -- item 17: the limits HDF5 table says what it holds ---------------------------------------------------------
def test_the_limits_hdf5_table_has_a_format_version_and_a_unit_and_description_on_every_dataset(tmp_path, capsys):
    path = tmp_path / "limits.h5"
    status, out, err = run(capsys, "limits", "--mass-values", "1e-14", "3e-14", "1e-13", "--output", path)
    assert status == 0, err
    with h5py.File(path, "r") as handle:
        assert handle.attrs["format"] == "raytrace-limits-1" and handle.attrs["format_version"] == 1
        datasets = []
        handle.visititems(lambda name, item: datasets.append((name, item)) if isinstance(item, h5py.Dataset) else None)
        assert len(datasets) >= 6
        for name, dataset in datasets:
            assert "unit" in dataset.attrs and dataset.attrs["description"], name
        assert handle["background/epsilon_max"].attrs["unit"] == "1" and handle["mass_eV"].attrs["unit"] == "eV"
