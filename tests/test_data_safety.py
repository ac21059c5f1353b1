"""Never lose a user's data (issue 24, items 1 to 4, and 10's over-long names).

Each test reproduces what the trial found on the code before the fix:
1. an output equal to an input (after symlinks, a run file's glob, --overwrite or not) replaced it;
2. a kill between the result's rename and its companions' left them as hidden orphans that
   --resume never wrote ("already complete");
3. resolution-check on a full disk left X.png and X.pdf while saying nothing was written;
4. two runs on one output both wrote it; a run claimed a file another process had replaced;
10. an output name too long for its temporary file failed with a traceback after the work.

References: the inputs' SHA-256 (hashlib) before and after; the uninterrupted run of the same
run file, read back with h5py; healpy.read_map and astropy.io.fits for the FITS maps; flock(2)
semantics (a lock held by one open file description is refused to another, even in one process);
ENOSPC 28 and ENAMETOOLONG 36 as POSIX's errno.h; one line and exit 2 for a user's mistake or a
machine state (DEVELOPERS.md).
"""

import errno
import os
import warnings

import h5py
import numpy as np
import pytest

from raytrace.cli import main
from safety_support import box_folder, error_lines, leftovers, raytrace_process, run_killed, sha256

ARRAYS = ("kernel_boxes", "crossings", "dispersion_measure_boxes")


@pytest.fixture
def folder(tmp_path):
    box_folder(tmp_path)
    return tmp_path


def quiet_main(argv):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return main([str(item) for item in argv])


# -- item 1: no output over an input -------------------------------------------------------------------
def _result(folder):
    assert quiet_main(["sightlines", folder / "run.toml", "--output", folder / "r.h5", "--rays", "4"]) == 0
    return folder / "r.h5"


def _case_box(folder):
    return ["sightlines", "run.toml", "--output", "box_z0.h5", "--overwrite"], "box_z0.h5"


def _case_symlink(folder):
    os.symlink("box_z1.h5", folder / "link.h5")
    return ["sightlines", "run.toml", "--output", "link.h5", "--overwrite"], "box_z1.h5"


def _case_run_file(folder):
    return ["sightlines", "run.toml", "--output", "run.toml", "--overwrite"], "run.toml"


def _case_glob(folder):
    # The run file's glob matches the output: a third snapshot whose name the user reuses for the result.
    from conftest import write_lognormal_box

    write_lognormal_box(folder / "box_z2.h5", 2.0, np.random.default_rng(3))
    text = (folder / "run.toml").read_text().replace('["box_z0.h5", "box_z1.h5"]', '["box_z*.h5"]')
    (folder / "run.toml").write_text(text)
    return ["sightlines", "run.toml", "--output", "box_z2.h5", "--overwrite"], "box_z2.h5"


def _case_sky(folder):
    return ["sky", "sky.toml", "--nside", "1", "--fits", "box_z1.fits", "--output", "box_z1.h5", "--overwrite"], \
        "box_z1.h5"


def _case_onepoint(folder):
    return ["onepoint-mean", "run.toml", "--points", "4096", "--output", "box_z0.h5", "--overwrite"], "box_z0.h5"


def _case_limits(folder):
    result = _result(folder)
    return ["limits", "--result", result, "--output", result, "--overwrite"], "r.h5"


def _case_report_spectrum(folder):
    # The report's STEM.txt is the spectrum table it reads (the FIRAS table the package ships).
    import shutil

    from conftest import REPOSITORY
    from raytrace.limits.spectrum import DEFAULT_SPECTRUM

    result = _result(folder)
    shutil.copy(REPOSITORY / "raytrace" / "data" / DEFAULT_SPECTRUM, folder / "firas.txt")
    return ["report", result, "--spectrum", "firas.txt", "--output", "firas", "--formats", "txt",
            "--overwrite"], "firas.txt"


def _case_grid(folder):
    with h5py.File(folder / "gas.h5", "w") as handle:
        handle["pos"] = np.random.default_rng(0).uniform(0.0, 10.0, (200, 3))
        handle["mass"] = np.ones(200)
    return ["grid", "gas.h5", "--cells", "4", "--output", "gas.h5", "--overwrite", "--positions", "pos",
            "--position-unit", "cMpc", "--box-size", "10 cMpc", "--redshift", "0", "--masses", "mass",
            "--mass-unit", "Msun", "--ionised-fraction", "1"], "gas.h5"


@pytest.mark.parametrize("case", [_case_box, _case_symlink, _case_run_file, _case_glob, _case_sky, _case_onepoint,
                                  _case_limits, _case_report_spectrum, _case_grid],
                         ids=lambda case: case.__name__[6:])
def test_an_output_that_is_an_input_is_refused_even_with_overwrite(folder, monkeypatch, capsys, case):
    monkeypatch.chdir(folder)
    argv, victim = case(folder)
    capsys.readouterr()
    before = sha256(folder / victim)
    status = quiet_main(argv)
    err = capsys.readouterr().err
    assert sha256(folder / victim) == before  # the input's bytes are untouched (hashlib, before and after)
    assert status == 2, err
    lines = error_lines(err)
    assert len(lines) == 1 and "is an input file of the run" in lines[0] and victim in lines[0], err
    assert "Traceback" not in err


# -- item 2: a kill during the final write ------------------------------------------------------------
SKY = ["sky", "sky.toml", "--nside", "2", "--output", "m.h5", "--fits", "m.fits", "--plot", "m.png"]


@pytest.fixture(scope="module")
def sky_reference(tmp_path_factory):
    """The uninterrupted sky run's arrays (the reference every resumed run must equal bit for bit)."""
    folder = tmp_path_factory.mktemp("sky_reference")
    box_folder(folder)
    names = {"sky.toml", "m.h5", "m.fits", "m.png"}
    assert quiet_main([folder / item if item in names else item for item in SKY]) == 0
    with h5py.File(folder / "m.h5", "r") as handle:
        return {name: handle[name][...] for name in ARRAYS}


# The final write renames the result (a sky's result is its checkpoint, finished), the maps and the figure
# in that order, then removes its journal: a kill just before each of these four steps.
KILL_POINTS = [("m.h5", "replace"), ("m.fits", "replace"), ("m.png", "replace"), (".m.h5.commit", "unlink")]


@pytest.mark.parametrize("target, kind", KILL_POINTS, ids=[f"{kind} {target}" for target, kind in KILL_POINTS])
def test_a_kill_at_each_step_of_the_final_write_is_completed_by_resume(folder, sky_reference, monkeypatch, capsys,
                                                                      target, kind):
    import healpy

    killed = run_killed(folder, target, kind, SKY)
    assert killed.returncode == -9, killed.stderr[-2000:]  # SIGKILL landed where it was aimed
    monkeypatch.chdir(folder)
    capsys.readouterr()
    assert quiet_main([*SKY, "--resume"]) == 0, capsys.readouterr().err
    for name in ("m.h5", "m.fits", "m.png"):
        assert (folder / name).is_file(), name
    assert leftovers(folder) == []  # no orphan temporary, journal, checkpoint or lock
    with h5py.File(folder / "m.h5", "r") as handle:
        for name in ARRAYS:
            assert np.array_equal(handle[name][...], sky_reference[name]), name
    assert healpy.read_map(str(folder / "m.fits")).size == 48  # nside 2: 12 * 2^2 pixels (Gorski et al. 2005)


# -- item 3: a full disk during resolution-check leaves nothing ----------------------------------------
def test_a_full_disk_during_resolution_check_leaves_none_of_its_files(folder, monkeypatch, capsys):
    import pathlib

    def full(path, *arguments, **keywords):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(pathlib.Path, "write_text", full)  # the table, written after the two figures
    status = quiet_main(["resolution-check", folder / "run.toml", "--points", "4096", "--groups", "2",
                         "--report", folder / "X"])
    err = capsys.readouterr().err
    assert status == 2
    lines = error_lines(err)
    assert len(lines) == 1 and "X.txt" in lines[0] and "No space left" in lines[0]
    assert "none of the run's outputs was written" in lines[0]
    assert not any((folder / f"X.{kind}").exists() for kind in ("png", "pdf", "txt"))
    assert leftovers(folder) == []


# -- item 4: one run per output at a time ----------------------------------------------------------------
def test_a_run_on_an_output_another_run_holds_stops_in_one_line(folder, capsys):
    import fcntl

    # The other run's lock: flock(2) on '.s.h5.lock' beside the output, held by an open file description.
    with open(folder / ".s.h5.lock", "w") as held:
        fcntl.flock(held, fcntl.LOCK_EX)
        held.write("4242\n")
        held.flush()
        status = quiet_main(["sightlines", folder / "run.toml", "--output", folder / "s.h5", "--overwrite"])
    err = capsys.readouterr().err
    assert status == 2
    lines = error_lines(err)
    assert len(lines) == 1 and "another raytrace run (process 4242)" in lines[0] and "s.h5" in lines[0]
    assert not (folder / "s.h5").exists() and not (folder / "s.h5.partial").exists()


def test_two_runs_started_together_on_one_output_one_writes_the_other_stops(tmp_path):
    box_folder(tmp_path, rays=3000)
    argv = ["sightlines", "run.toml", "--output", "s.h5", "--overwrite", "--seed"]
    runs = {seed: raytrace_process(tmp_path, [*argv, str(seed)]) for seed in (101, 202)}
    outcome = {seed: (run.wait(timeout=600), *run.communicate()) for seed, run in runs.items()}
    statuses = sorted(status for status, _, _ in outcome.values())
    assert statuses == [0, 2], {seed: err[-1500:] for seed, (_, _, err) in outcome.items()}
    winner = next(seed for seed, (status, _, _) in outcome.items() if status == 0)
    loser = next(seed for seed in outcome if seed != winner)
    assert "result: s.h5" in outcome[winner][1] and "result:" not in outcome[loser][1]
    lines = error_lines(outcome[loser][2])
    assert len(lines) == 1 and "another raytrace run" in lines[0]
    import json

    with h5py.File(tmp_path / "s.h5", "r") as handle:
        assert json.loads(handle.attrs["run"])["seed"] == winner  # the file holds the run that says it wrote it
    assert leftovers(tmp_path) == []


def test_a_run_never_claims_a_file_another_process_replaced(folder, monkeypatch, capsys):
    from raytrace.core import provenance

    real = os.replace

    def then_replaced(source, target):
        real(source, target)
        if str(target).endswith("s.h5"):  # another program writes the same name at once
            other = f"{target}.other"
            with open(other, "wb") as handle:
                handle.write(b"another program's file")
            real(other, target)

    monkeypatch.setattr(provenance.os, "replace", then_replaced)
    status = quiet_main(["sightlines", folder / "run.toml", "--output", folder / "s.h5"])
    monkeypatch.undo()
    captured = capsys.readouterr()
    assert status == 2 and "result:" not in captured.out
    lines = error_lines(captured.err)
    assert len(lines) == 1 and "s.h5" in lines[0] and "not this run's result" in lines[0]


# -- item 10: a name too long for the temporary files -------------------------------------------------------
def test_an_output_name_too_long_for_its_temporary_file_is_refused_before_the_work(folder, capsys):
    name = "r" * 240 + ".h5"  # 243 bytes: the name fits NAME_MAX 255, '.<name>.XXXXXXXX.part' does not
    status = quiet_main(["sightlines", folder / "run.toml", "--output", folder / name])
    err = capsys.readouterr().err
    assert status == 2 and "Traceback" not in err
    lines = error_lines(err)
    assert len(lines) == 1 and "too long" in lines[0]
    assert sorted(os.listdir(folder)) == ["box_z0.h5", "box_z1.h5", "run.toml", "sky.toml"]  # no checkpoint
