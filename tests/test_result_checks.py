"""Damaged result files are refused in one line, never read as results (issue 24, items 5 and 10).

Before the fix a sky with one NaN pixel became "flat map, no anisotropy" in limits, a sky cut
short was accepted, reversed masses and a negative per-ray K were tabulated against the wrong
masses, spread-check and report printed nan / inf, and a format version that is not a number, a
missing dataset or a run record that is not JSON ended in a traceback. Here each damage of
BAD_RESULTS is made with h5py on a copy of a good file and fed to every command that reads that
kind of file: the contract (DEVELOPERS.md) is exit status 2 and one line naming the file and the
dataset or attribute. The reference for what is good: HEALPix's 12 nside^2 pixels (Gorski et al.
2005), the grid's increasing masses, K >= 0 (PHYSICS.md section 2: a kernel is pi m^2 over a
positive rate), JSON (the format the writer stores).
"""

import json
import re
import shutil
import warnings

import h5py
import numpy as np
import pytest

from raytrace.cli import main
from safety_support import box_folder, error_lines


@pytest.fixture(scope="module")
def good(tmp_path_factory):
    """A good sightline result, sky result and one-point-PDF mean of the same small boxes."""
    folder = tmp_path_factory.mktemp("good")
    box_folder(folder, rays=12)
    flags = ["--boxes", str(folder / "box_z0.h5"), str(folder / "box_z1.h5"), "--mass-min", "1e-14",
             "--mass-max", "1.2e-13", "--mass-count", "8", "--z-max", "1.5"]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert main(["sightlines", str(folder / "run.toml"), "--output", str(folder / "rays.h5")]) == 0
        assert main(["sky", *flags, "--nside", "2", "--output", str(folder / "sky.h5")]) == 0
        assert main(["onepoint-mean", *flags, "--points", "4096", "--output", str(folder / "mean.h5")]) == 0
    return folder


def _replace(handle, name, values):
    attributes = dict(handle[name].attrs)
    del handle[name]
    handle[name] = values
    handle[name].attrs.update(attributes)


def _edit(name, change):
    """A damage that replaces dataset ``name`` by ``change(values)``."""
    return lambda handle: _replace(handle, name, change(handle[name][...]))


def _set_attribute(name, value):
    return lambda handle: handle.attrs.__setitem__(name, value)


def _run_record(change):
    def damage(handle):
        record = json.loads(handle.attrs["run"])
        change(record)
        handle.attrs["run"] = json.dumps(record)
    return damage


def _nan_at(index):
    def change(values):
        values = values.astype(float)
        values[index] = np.nan
        return values
    return change


def _negative_at(index):
    def change(values):
        values = values.astype(float)
        values[index] = -abs(values[index]) - 1.0
        return values
    return change


# (kind, which file, the damage, what the one line must name)
BAD_RESULTS = [
    ("one NaN pixel", "sky", _edit("kernel_boxes", _nan_at((5, 3))), "kernel_boxes"),
    ("a sky cut short", "sky", _edit("kernel_boxes", lambda v: v[:, :40]), "kernel_boxes"),  # maps: mass-major
    ("a negative pixel", "sky", _edit("kernel_boxes", _negative_at((7, 2))), "kernel_boxes"),
    ("nside not a power of 2", "sky", _run_record(lambda r: r.update(nside=3)), "nside"),
    ("an unknown ordering", "sky", _run_record(lambda r: r.update(ordering="SIDEWAYS")), "ordering"),
    ("reversed masses", "rays", _edit("mass_eV", lambda v: v[::-1]), "mass_eV"),
    ("a zero mass", "rays", _edit("mass_eV", lambda v: np.concatenate([[0.0], v[1:]])), "mass_eV"),
    ("a negative per-ray K", "rays", _edit("kernel_boxes", _negative_at((3, 4))), "kernel_boxes"),
    ("inf in the background's K", "rays", _edit("kernel_background", lambda v: np.full_like(v, np.inf)),
     "kernel_background"),
    ("crossings of another shape", "rays", _edit("crossings", lambda v: v[:, :-1]), "crossings"),
    ("directions of another shape", "rays", _edit("direction", lambda v: v[:, :2]), "direction"),
    ("a NaN dispersion measure", "rays", _edit("dispersion_measure_boxes", _nan_at(0)), "dispersion_measure_boxes"),
    ("the background DM not a number", "rays", _set_attribute("dispersion_measure_background", np.nan),
     "dispersion_measure_background"),
    ("a missing dataset", "rays", lambda handle: handle.__delitem__("crossings"), "crossings"),
    ("format version not a number", "rays", _set_attribute("format_version", "two"), "format_version"),
    ("format version not whole", "rays", _set_attribute("format_version", 1.5), "format_version"),
    ("a run record that is not JSON", "rays", _set_attribute("run", "{seed: 11,"), "attribute run"),
    ("no run record", "rays", lambda handle: handle.attrs.__delitem__("run"), "attribute run"),
    ("a run record without z_max", "rays", _run_record(lambda r: r.pop("z_max")), "z_max"),
    ("a PDF check of another shape", "rays", _edit("pdf_mean/kernel_boxes", lambda v: v[:-2]), "pdf_mean/kernel_boxes"),
    ("a negative one-point error", "mean", _edit("error", _negative_at(1)), "error"),
    ("reversed one-point masses", "mean", _edit("mass_eV", lambda v: v[::-1]), "mass_eV"),
]

# The commands that read each kind of file ({} is the damaged file).
READERS = {
    "sky": [["limits", "--sky", "{}"], ["spread-check", "{}"]],
    "rays": [["limits", "--result", "{}"], ["spread-check", "{}"], ["report", "{}", "--output", "{}-page"]],
    "mean": [["limits", "--result", "{}"]],
}
CASES = [pytest.param(kind, which, damage, named, command, id=f"{kind} / {command[0]}")
         for kind, which, damage, named in BAD_RESULTS for command in READERS[which]]


@pytest.mark.parametrize("kind, which, damage, named, command", CASES)
def test_a_damaged_result_is_refused_in_one_line_naming_file_and_dataset(good, tmp_path, capsys, kind, which,
                                                                        damage, named, command):
    path = tmp_path / f"{which}.h5"
    shutil.copy(good / f"{which}.h5", path)
    with h5py.File(path, "r+") as handle:
        damage(handle)
    capsys.readouterr()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        status = main([item.replace("{}", str(path)) for item in command])
    captured = capsys.readouterr()
    assert "Traceback" not in captured.err, captured.err[-3000:]
    assert status == 2, (kind, captured.out[-1500:])  # not read as a result: nothing computed from it
    lines = error_lines(captured.err)
    assert len(lines) == 1 and str(path) in lines[0] and named in lines[0], captured.err
    assert not re.search(r"\b(nan|inf)\b", captured.out), captured.out


@pytest.mark.parametrize("which, command", [(which, command) for which, commands in READERS.items()
                                            for command in commands], ids=lambda value: str(value))
def test_the_good_files_the_damages_start_from_are_read(good, tmp_path, capsys, which, command):
    # The control: each command reads the undamaged file, so a refusal above is the damage's doing.
    path = tmp_path / f"{which}.h5"
    shutil.copy(good / f"{which}.h5", path)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert main([item.replace("{}", str(path)) for item in command]) == 0, capsys.readouterr().err


# -- item 10: API mistakes are one InputError, not a traceback --------------------------------------------
def test_api_mistakes_are_input_errors_naming_what_was_wrong(good):
    import raytrace
    from raytrace.core.errors import InputError

    series = raytrace.load_series([str(good / "box_z0.h5"), str(good / "box_z1.h5")])
    mass = np.geomspace(1e-14, 1e-13, 3)
    with pytest.raises(InputError, match="boxsize.*did you mean 'box_size'"):
        raytrace.load_box(good / "box_z0.h5", boxsize="50 cMpc")
    with pytest.raises(InputError, match="backend: expected"):
        raytrace.cast_sightlines(series, mass, 2, 1.5, backend="hdf5")
    with pytest.raises(InputError, match="executor: expected"):
        raytrace.cast_sightlines(series, mass, 2, 1.5, executor=42)
    result = raytrace.SightlineResult.load(good / "rays.h5")
    for bad in ((150.0,), (-1.0,), (np.nan,)):
        with pytest.raises(InputError, match="percentiles from 0 to 100"):
            result.percentiles(bad)
    # numpy's own percentiles are the reference for the accepted ones.
    np.testing.assert_array_equal(result.percentiles((0.0, 100.0)), np.percentile(result.kernel, (0, 100), axis=0))
