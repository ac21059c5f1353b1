"""Own snapshots as they come (issue 12): series given their redshifts by flags or run files,
metadata where simulations keep it, density contrasts and neutral fractions, the mean-density
reference of an overdensity, and the unit-sanity warnings."""

import argparse
import warnings

import astropy.constants as const
import h5py
import numpy as np
import pytest
from astropy.cosmology import Planck18

import raytrace.boxes.meanings as boxes_meanings
import raytrace.cli as cli
from raytrace.boxes import QUANTITIES, Box, load_box, load_series
from raytrace.cli.box_options import load_run_series
from raytrace.cli.runfile import BOX_OPTIONS, SIGHTLINE_OPTIONS, add_flags, settings
from raytrace.core.errors import InputError
from raytrace.physics.background import MeanPlasma
from raytrace.physics.ionisation import IonisationHistory

# Helium mass fraction of the test histories (stated here; Planck 2018's BBN value is about 0.245).
HELIUM = 0.245
X_E = 1.08


@pytest.fixture(scope="module")
def plasma():
    """Planck18 with a constant x_e = 1.08: nbar_e in closed form below."""
    return MeanPlasma(Planck18, IonisationHistory.constant(X_E, helium_fraction=HELIUM))


def hydrogen_density0():
    # n_H0 = (1 - Y_p) Omega_b rho_crit,0 / m_p, every number from astropy (Planck18, CODATA m_p).
    return (1.0 - HELIUM) * Planck18.Ob0 * Planck18.critical_density0.to_value("g/cm3") / const.m_p.to_value("g")


def field(n=16, seed=0, sigma=0.6):
    rng = np.random.default_rng(seed)
    return rng.lognormal(-0.5 * sigma**2, sigma, size=(n, n, n))


def write(path, data, dataset="density", attrs=None, groups=None, dtype=np.float32):
    """A box file; ``groups`` maps group paths to their attributes."""
    with h5py.File(path, "a") as handle:
        for name, attributes in (groups or {}).items():
            handle.require_group(name).attrs.update(attributes)
        node = handle.create_dataset(dataset, data=np.asarray(data, dtype=dtype))
        node.attrs.update(attrs or {})
    return path


def sightline_settings(argv):
    parser = argparse.ArgumentParser()
    add_flags(parser, SIGHTLINE_OPTIONS)
    return settings(parser.parse_args(argv), SIGHTLINE_OPTIONS)


def three_files(folder, plasma):
    """Three files (names sorted a, b, c) with the cosmic mean n_e but no redshift anywhere."""
    for index, name in enumerate("abc"):
        write(folder / f"snap_{name}.h5", field(8, seed=index) * hydrogen_density0() * X_E,
              attrs={"quantity": "n_e_comoving", "box_size": 20.0, "box_size_unit": "cMpc"})
    return str(folder / "snap_*.h5")


# -- series from flags and run files --------------------------------------------------------------
def test_redshifts_from_the_run_file_or_flags_follow_the_sorted_file_order(tmp_path, plasma):
    pattern = three_files(tmp_path, plasma)
    # The README: a glob's files are sorted by name, so a, b, c get 2.0, 0.5, 1.0 in that order.
    run = tmp_path / "run.toml"
    run.write_text(f'[boxes]\nfiles = ["{pattern}"]\nredshift = [2.0, 0.5, 1.0]\nbox_size = "30 cMpc"\n')
    for argv in ([str(run)], ["--boxes", pattern, "--redshift", "2,0.5,1", "--box-size", "30 cMpc"]):
        series = load_run_series(sightline_settings(argv), SIGHTLINE_OPTIONS, plasma)
        by_name = {box.path.name: box.redshift for box in series}
        assert by_name == {"snap_a.h5": 2.0, "snap_b.h5": 0.5, "snap_c.h5": 1.0}
        assert [box.box_size_cMpc for box in series] == [30.0] * 3
    # Box sizes per file too, in the same order.
    series = load_run_series(sightline_settings(
        ["--boxes", pattern, "--redshift", "2,0.5,1", "--box-size", "10 cMpc,20 cMpc,30 cMpc"]),
        SIGHTLINE_OPTIONS, plasma)
    assert {box.path.name: box.box_size_cMpc for box in series} == {
        "snap_a.h5": 10.0, "snap_b.h5": 20.0, "snap_c.h5": 30.0}


def test_a_list_of_the_wrong_length_is_refused(tmp_path, plasma):
    pattern = three_files(tmp_path, plasma)
    with pytest.raises(InputError, match=r"--redshift \(redshift=...\): 2 values for 3 boxes"):
        load_run_series(sightline_settings(["--boxes", pattern, "--redshift", "2,0.5"]), SIGHTLINE_OPTIONS, plasma)
    # One redshift for three files: the series refuses it and says how to give one per file.
    with pytest.raises(InputError, match=r"same redshift.*--redshift Z1,Z2"):
        load_run_series(sightline_settings(["--boxes", pattern, "--redshift", "1"]), SIGHTLINE_OPTIONS, plasma)


def test_the_schema_lists_every_quantity():
    # One vocabulary: the run-file choices are the loader's meanings.
    option = {o.key: o for o in BOX_OPTIONS}["boxes.quantity"]
    assert set(option.choices) == set(QUANTITIES)


# -- metadata where simulations keep it ----------------------------------------------------------
def header_file(path, unit="cMpc/h", box_size=25.0):
    header = {"BoxSize": box_size, "HubbleParam": 0.7}
    if unit is not None:
        header["BoxSizeUnit"] = unit
    return write(path, field(8, seed=3) * hydrogen_density0() * X_E, dataset="snapshot_010/electrons",
                 attrs={"quantity": "n_e_comoving"},
                 groups={"snapshot_010": {"redshift": 3.0}, "Header": header})


def test_redshift_on_the_parent_group_and_size_and_h_in_the_header(tmp_path, plasma, capsys):
    path = header_file(tmp_path / "sim.h5")
    box = load_box(path, plasma=plasma)
    assert box.redshift == 3.0
    assert box.box_size_cMpc == pytest.approx(25.0 / 0.7, rel=1e-12)  # cMpc/h divided by h
    sources = box.describe()["sources"]
    assert sources["redshift"] == "attribute 'redshift' of group /snapshot_010"
    assert sources["box_size"].startswith("attribute 'BoxSize' of group /Header")
    assert sources["hubble_h"] == "attribute 'HubbleParam' of group /Header"
    status = cli.main(["inspect", str(path)])
    out = capsys.readouterr().out
    assert status == 0
    assert "[attribute 'redshift' of group /snapshot_010]" in out
    assert "[attribute 'BoxSize' of group /Header, unit from attribute 'BoxSizeUnit' of group /Header]" in out
    assert "[attribute 'HubbleParam' of group /Header]" in out
    # Each flag overrides the file, and inspect says so.
    status = cli.main(["inspect", str(path), "--redshift", "2", "--box-size", "10 Mpc/h", "--hubble-h", "0.5"])
    out = capsys.readouterr().out
    assert status == 0
    assert "redshift       2  [given: --redshift" in out
    assert "20 cMpc, as '10 Mpc/h'  [given: --box-size" in out  # 10 / 0.5
    assert "hubble h       0.5  [given: --hubble-h" in out


def test_a_header_box_size_without_a_unit_is_an_error_naming_the_flag(tmp_path, plasma):
    path = header_file(tmp_path / "gadget_like.h5", unit=None, box_size=25000.0)
    with pytest.raises(InputError, match=r"attribute 'BoxSize' of group /Header = 25000 has no unit.*--box-size"):
        load_box(path, plasma=plasma)
    assert load_box(path, plasma=plasma, box_size="25000 ckpc/h").box_size_cMpc == pytest.approx(25.0 / 0.7)


def test_a_box_size_stored_per_axis_is_read(tmp_path, plasma):
    # SWIFT stores BoxSize as three equal numbers (common practice, no source).
    path = write(tmp_path / "swift_like.h5", field(8) * hydrogen_density0() * X_E,
                 attrs={"quantity": "n_e_comoving", "redshift": 0.0},
                 groups={"Header": {"BoxSize": np.array([50.0] * 3), "BoxSizeUnit": "cMpc"}})
    assert load_box(path, plasma=plasma).box_size_cMpc == 50.0


def test_the_one_dataset_that_carries_a_redshift_is_chosen(tmp_path, plasma):
    path = write(tmp_path / "two.h5", field(8) * hydrogen_density0() * X_E, dataset="ne",
                 attrs={"quantity": "n_e_comoving", "redshift": 1.0, "box_size": 10.0, "box_size_unit": "cMpc"})
    write(path, np.ones((8, 8, 8)), dataset="temperature")
    boxes = load_series(str(path), plasma=plasma)
    assert len(boxes) == 1 and boxes[0].dataset == "/ne"


# -- more meanings: density contrast, neutral fraction, overdensity relative to the box ----------
def test_density_contrast_and_neutral_fraction_give_the_n_e_of_the_equivalent_comoving_box(tmp_path, plasma):
    z, n = 6.0, 16
    delta = field(n, seed=4) - 1.0                      # rho / rhobar - 1, >= -1
    neutral = np.random.default_rng(5).uniform(0.0, 0.99, (n, n, n))  # x_HI per cell
    helium_electrons = 1
    # Independent conversion: n_e = (1 - x_HI) (1 + k n_He/n_H) (1 + delta) n_H0 (comoving),
    # n_He / n_H = Y_p / (4 (1 - Y_p)) with Y_p = 0.245 (m_He = 4 m_H: common practice, no source).
    per_ionised_hydrogen = 1.0 + helium_electrons * HELIUM / (4.0 * (1.0 - HELIUM))
    expected = (1.0 - neutral) * per_ionised_hydrogen * (1.0 + delta) * hydrogen_density0()
    common = {"box_size": 10.0, "box_size_unit": "cMpc", "redshift": z}
    reference = load_box(write(tmp_path / "ne.h5", expected, attrs=dict(common, quantity="n_e_comoving")),
                         plasma=plasma, check=False)
    # delta and x_HI in float64: in float32 storage 1 + delta and 1 - x_HI near 0 carry the
    # file's own rounding (6e-8 absolute), which no reader can undo.
    path = write(tmp_path / "sim.h5", delta, dataset="delta", attrs=dict(common, quantity="density_contrast"),
                 dtype=np.float64)
    write(path, neutral, dataset="xHI", dtype=np.float64)
    contrast = load_box(path, "delta", neutral_fraction="xHI", helium_electrons=1, plasma=plasma, check=False)
    # float32 of the result and of the reference n_e: each 6e-8 relative; 1e-6 leaves a margin.
    np.testing.assert_allclose(contrast.physical_electron_density(z), reference.physical_electron_density(z),
                               rtol=1e-6)
    # A neutral fraction as one number, and an ionised fraction as one number.
    uniform = (1.0 - 0.3) * per_ionised_hydrogen * (1.0 + delta) * hydrogen_density0()
    for arguments in ({"neutral_fraction": 0.3, "helium_electrons": 1},
                      {"ionised_fraction": 0.7 * per_ionised_hydrogen}):
        box = load_box(path, "delta", plasma=plasma, check=False, **arguments)
        np.testing.assert_allclose(box.physical_electron_density(z), uniform * (1 + z) ** 3, rtol=1e-6)
    # The same from an array, and an electron overdensity relative to the box's own mean.
    in_memory = Box.from_array(delta, "10 cMpc", z, "density_contrast", plasma=plasma, neutral_fraction=neutral,
                               helium_electrons=1)
    np.testing.assert_allclose(in_memory.physical_electron_density(z), reference.physical_electron_density(z),
                               rtol=1e-6)
    over = Box.from_array(1.0 + delta, "10 cMpc", z, "overdensity", plasma=plasma, mean_density="box",
                          ionised_fraction=0.14)
    np.testing.assert_allclose(over.physical_electron_density(z),
                               (1.0 + delta) * 0.14 * hydrogen_density0() * (1 + z) ** 3, rtol=1e-6)


def test_the_reopened_box_needs_no_plasma_and_matches(tmp_path, plasma, monkeypatch):
    path = write(tmp_path / "sim.h5", field(8, seed=8) - 1.0, dataset="delta",
                 attrs={"quantity": "density_contrast", "box_size": 10.0, "box_size_unit": "cMpc", "redshift": 6.0,
                        "neutral_fraction_dataset": "/xHI", "helium_electrons": 1})
    write(path, np.full((8, 8, 8), 0.5), dataset="xHI")
    box = load_box(path, plasma=plasma, check=False)

    def no_default_plasma():
        raise AssertionError("the reopened box must not need a MeanPlasma")

    monkeypatch.setattr(boxes_meanings, "_default_plasma", no_default_plasma)
    again = load_box(**box.load_arguments)
    np.testing.assert_array_equal(again.data, box.data)
    assert again.comoving_scale == box.comoving_scale


# -- plausibility warnings ------------------------------------------------------------------------
def messages(call):
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        call()
    return [str(w.message) for w in caught]


def test_warnings_for_a_box_1e8_too_dense_and_for_physical_data_declared_comoving(tmp_path, plasma):
    z = 3.0
    # nbar_e(z) = x_e n_H0 (1+z)^3 with n_H0 from astropy (above).
    mean_physical = X_E * hydrogen_density0() * (1 + z) ** 3
    attrs = {"box_size": 10.0, "box_size_unit": "cMpc", "redshift": z}
    dense = write(tmp_path / "dense.h5", 1e8 * mean_physical * field(8), attrs=dict(attrs, quantity="n_e_physical"))
    found = messages(lambda: load_box(dense, plasma=plasma))
    assert len(found) == 1 and "dense.h5:/density" in found[0] and "a factor 10^8 in the unit" in found[0]
    slipped = write(tmp_path / "phys.h5", mean_physical * field(8), attrs=dict(attrs, quantity="n_e_comoving"))
    found = messages(lambda: load_box(slipped, plasma=plasma))
    assert len(found) == 1 and "phys.h5:/density" in found[0] and "physical data declared comoving" in found[0]
    assert "(1+z)^3 = 64" in found[0]
    fine = write(tmp_path / "fine.h5", mean_physical * field(8), attrs=dict(attrs, quantity="n_e_physical"))
    assert messages(lambda: load_box(fine, plasma=plasma)) == []
    # On the command line: one line naming the box, and the run goes on (status 0).
    status = cli.main(["inspect", str(dense)])
    assert status == 0


def test_no_warning_for_the_demo_boxes(demo_dir):
    # The demo boxes have the mean of raytrace.physics.background.MeanPlasma() (cubes_demo/README.md).
    for path in sorted(demo_dir.glob("demo_z*.h5")):
        assert messages(lambda: load_box(path)) == [], path


def test_a_box_ionisation_far_from_the_history_is_warned_about_naming_both(tmp_path):
    z = 10.0
    history = MeanPlasma(Planck18, IonisationHistory.constant(3e-4, helium_fraction=HELIUM))
    path = write(tmp_path / "reion.h5", field(8), attrs={
        "quantity": "gas_overdensity", "ionised_fraction": 0.14, "box_size": 10.0, "box_size_unit": "cMpc",
        "redshift": z})
    found = messages(lambda: load_box(path, plasma=history))
    assert len(found) == 1
    assert "x_e = 0.14" in found[0] and "x_e(z = 10) = 0.0003" in found[0] and "reion.h5" in found[0]
    # Within a factor 2 of the history (4e-4 against 3e-4): no warning.
    assert messages(lambda: load_box(path, plasma=history, ionised_fraction=4e-4)) == []


def test_the_command_line_prints_each_warning_on_one_line(tmp_path, capsys):
    z = 1.0
    path = write(tmp_path / "dense.h5", field(8) * 1e3, attrs={
        "quantity": "n_e_physical", "box_size": 10.0, "box_size_unit": "cMpc", "redshift": z})
    with warnings.catch_warnings():
        warnings.simplefilter("always")
        assert cli.main(["inspect", str(path)]) == 0
    lines = [line for line in capsys.readouterr().err.splitlines() if "warning" in line]
    assert len(lines) == 1 and lines[0].startswith("raytrace inspect: warning: ") and "dense.h5" in lines[0]


# -- bad input: every new flag and key -------------------------------------------------------------
@pytest.mark.parametrize("line, named", [
    ('redshift = "soon"', "boxes.redshift"),
    ('redshift = [1.0, "x"]', "boxes.redshift"),
    ("redshift = [-1.0, 2.0]", "boxes.redshift"),
    ("box_size = 10", "boxes.box_size"),
    ("ionised_fraction = true", "boxes.ionised_fraction"),
    ("neutral_fraction = [true]", "boxes.neutral_fraction"),
    ("helium_electrons = 3", "boxes.helium_electrons"),
    ('helium_electrons = "one"', "boxes.helium_electrons"),
    ('mean_density = "median"', "boxes.mean_density"),
    ('quantity = "delta"', "boxes.quantity"),
])
def test_bad_run_file_keys_are_one_line_errors_naming_the_key(tmp_path, line, named):
    run = tmp_path / "run.toml"
    run.write_text(f'[boxes]\nfiles = ["x.h5"]\n{line}\n')
    with pytest.raises(InputError, match=named) as error:
        sightline_settings([str(run)])
    assert "\n" not in str(error.value)


@pytest.mark.parametrize("flags, named", [
    (["--redshift", "1,x"], "--redshift"),
    (["--redshift", "1,2"], "--redshift"),
    (["--box-size", "10 cMpc,12 leagues"], "--box-size"),
    (["--mean-density", "median"], "--mean-density"),
    (["--mean-density", "box"], "--mean-density"),
    (["--helium-electrons", "5"], "--helium-electrons"),
    (["--helium-electrons", "1"], "--helium-electrons"),
    (["--ionised-fraction", "0.5"], "--ionised-fraction"),
    (["--quantity", "gas_overdensity", "--ionised-fraction", "2"], "--ionised-fraction"),
    (["--quantity", "gas_overdensity", "--ionised-fraction", "/nothing"], "ionised-fraction dataset"),
    (["--quantity", "gas_overdensity", "--neutral-fraction", "0.5"], "--helium-electrons"),
    (["--quantity", "gas_overdensity", "--neutral-fraction", "1.5", "--helium-electrons", "1"],
     "--neutral-fraction"),
    (["--quantity", "gas_overdensity", "--neutral-fraction", "0.5", "--ionised-fraction", "0.5"],
     "--neutral-fraction"),
    (["--quantity", "overdensity", "--mean-density", "box"], "--ionised-fraction"),
    (["--quantity", "density_contrast", "--ionised-fraction", "1", "--dataset", "/density"], "below -1"),
])
def test_bad_flags_are_one_line_errors_naming_them(tmp_path, capsys, flags, named):
    values = field(8) - 1.5 if "density_contrast" in flags else field(8)
    path = write(tmp_path / "box.h5", values * (1 if "density_contrast" in flags else 1e-7),
                 attrs={"quantity": "n_e_physical", "box_size": 10.0, "box_size_unit": "cMpc", "redshift": 1.0})
    status = cli.main(["inspect", str(path), *flags])
    err = capsys.readouterr().err
    lines = [line for line in err.strip().splitlines() if "warning" not in line]
    assert status == 2 and len(lines) == 1, err
    assert lines[0].startswith("raytrace inspect: error: ") and named in lines[0], lines[0]


@pytest.mark.parametrize("argv, named", [
    (["grid", "--cells", "8", "--output", "{out}"], "PARTICLES.h5 or --yt"),
    (["grid", "{particles}", "--yt", "{particles}", "--cells", "8", "--output", "{out}"], "PARTICLES.h5 or --yt"),
    (["grid", "--yt", "{particles}", "--positions", "pos", "--cells", "8", "--output", "{out}"], "--positions"),
    (["grid", "--yt", "{particles}", "--hydrogen-ionised-fraction", "1", "--cells", "8", "--output", "{out}"],
     "--hydrogen-ionised-fraction"),
    (["grid", "{particles}", "--yt-field", "El", "--cells", "8", "--output", "{out}"], "--yt-field"),
    (["grid", "{particles}", "--yt-particle-type", "io", "--cells", "8", "--output", "{out}"], "--yt-particle-type"),
    (["grid", "{particles}", "--cells", "8", "--output", "{out}"], "--positions"),
])
def test_bad_grid_flags_are_one_line_errors_naming_them(tmp_path, capsys, argv, named):
    particles = tmp_path / "particles.h5"
    with h5py.File(particles, "w") as handle:
        handle["pos"] = np.zeros((4, 3))
    argv = [item.format(particles=particles, out=tmp_path / "out.h5") for item in argv]
    status = cli.main(argv)
    lines = capsys.readouterr().err.strip().splitlines()
    assert status == 2 and len(lines) == 1 and named in lines[0], lines
