"""Checkpoints, resume, atomic writes and no-overwrite of ``raytrace sightlines``.

Reference: an uninterrupted run of the same run file (CLI in this process);
an interrupted-and-resumed run must end with the same datasets and run record.
The kills are real SIGKILLs of a ``python -m raytrace sightlines`` subprocess,
sent while it is writing batches to its checkpoint.
"""

import hashlib
import json
import os
import shutil
import signal
import subprocess
import sys
import time

import h5py
import numpy as np
import pytest
from conftest import two_box_run_file, write_lognormal_box

from raytrace.cli import main
from raytrace.core.provenance import file_checksum
from raytrace.statistics.binstats import BINNED_DATASETS
from raytrace.statistics.onepoint import PdfMean
from raytrace.statistics.results import SightlineResult
from raytrace.tracing.sightlines import SIGHTLINE_LAYOUT

N_RAYS = 1500  # one ray per batch: many batches, so kills land mid-run


def write_box(path, redshift, seed):
    write_lognormal_box(path, redshift, np.random.default_rng(seed))


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    """Boxes and run file in a folder, and the uninterrupted run's output."""
    folder = tmp_path_factory.mktemp("reference")
    write_box(folder / "box_z0.h5", 0.0, seed=1)
    write_box(folder / "box_z1.h5", 1.0, seed=2)
    (folder / "run.toml").write_text(two_box_run_file(N_RAYS, 7, batch_size=1, mass_count=16))
    output = folder / "uninterrupted.h5"
    assert main(arguments(folder / "run.toml", output)) == 0
    return folder, output


@pytest.fixture
def workspace(reference, tmp_path):
    """A copy of the boxes and run file, so a test may change them; returns (run file, output path)."""
    folder, _ = reference
    for name in ("box_z0.h5", "box_z1.h5", "run.toml"):
        shutil.copy(folder / name, tmp_path / name)
    return tmp_path / "run.toml", tmp_path / "out.h5"


def datasets(path):
    """All datasets, and the attributes that describe the run (box paths cut to their names,
    since each test works on its own copy of the boxes)."""
    with h5py.File(path, "r") as handle:
        run = json.loads(handle.attrs["run"])
        for box in run["boxes"]:
            box["path"] = os.path.basename(box["path"])
        arrays = {name: handle[name][...] for name in handle if isinstance(handle[name], h5py.Dataset)}
        # The built-in check's one-point-PDF mean (raytrace.statistics.meancheck) is a group of its own.
        arrays.update({f"pdf_mean/{name}": values[...] for name, values in handle["pdf_mean"].items()})
        # So are the statistics per redshift bin, reduced batch by batch (raytrace.binstats): a resume
        # reduces the finished batches again from the checkpoint, to the same bits.
        arrays.update({f"redshift_bins/{name}": values[...] for name, values in handle["redshift_bins"].items()})
        return (arrays,
                {"run": run, **{key: handle.attrs[key] for key in ("dispersion_measure_background", "complete")}})


def assert_same_result(path, reference_path):
    arrays, attributes = datasets(path)
    expected_arrays, expected_attributes = datasets(reference_path)
    binned = [f"redshift_bins/{name}" for name in BINNED_DATASETS if name != "ray_bins"]
    # The result file keeps each batch's rows and checksum (it is the run's checkpoint, finished).
    assert sorted(arrays) == sorted(expected_arrays) == sorted(
        [*SIGHTLINE_LAYOUT, "kernel_background", "mass_eV", *[f"pdf_mean/{name}" for name in PdfMean.ARRAYS],
         *binned, "batch_rows", "batch_sha256", "batch_done"])
    for name, values in expected_arrays.items():
        assert np.array_equal(arrays[name], values), name
    assert attributes == expected_attributes


def batches_done(checkpoint):
    """Number of batch_done flags set, read beside the writer (no lock); 0 before the file exists."""
    try:
        with h5py.File(checkpoint, "r", locking=False) as handle:
            return int(handle["batch_done"][...].sum())
    except (OSError, KeyError):
        return 0


def arguments(run_file, output, *flags):
    """The command line of a run, for ``raytrace.cli.main``."""
    return ["sightlines", str(run_file), "--output", str(output), *flags]


def sightlines(run_file, output, *flags):
    """The same as a subprocess command."""
    return [sys.executable, "-m", "raytrace", *arguments(run_file, output, *flags)]


def kill_after(process, checkpoint, flags_wanted, timeout=60):
    """SIGKILL ``process`` once ``flags_wanted`` batches are flagged done; False if it finished first."""
    deadline = time.monotonic() + timeout
    while process.poll() is None:
        if batches_done(checkpoint) >= flags_wanted:
            process.send_signal(signal.SIGKILL)
            process.wait()
            return True
        if time.monotonic() > deadline:
            process.kill()
            pytest.fail("the run wrote no batches in time")
        time.sleep(0.005)
    return False


def sha256(path):
    return hashlib.sha256(path.read_bytes()).hexdigest()


def test_sigkill_twice_then_resume_equals_the_uninterrupted_run(workspace, reference):
    run_file, output = workspace
    checkpoint = output.with_name(output.name + ".partial")
    for round_ in range(2):
        before = batches_done(checkpoint)
        flags = ["--resume"] if checkpoint.exists() else []
        process = subprocess.Popen(sightlines(run_file, output, *flags), stdout=subprocess.DEVNULL,
                                   stderr=subprocess.DEVNULL)
        assert kill_after(process, checkpoint, before + 20), "the run finished before it could be killed"
        assert process.returncode == -signal.SIGKILL
        assert not output.exists()
        done = batches_done(checkpoint)
        assert before + 20 <= done < N_RAYS, f"round {round_}: {done} batches done"
    finished = subprocess.run(sightlines(run_file, output, "--resume"), capture_output=True, text=True, timeout=120)
    assert finished.returncode == 0, finished.stderr
    assert not checkpoint.exists()
    assert_same_result(output, reference[1])


def interrupt(run_file, output, after_batches=3):
    """Run the CLI in a subprocess that SIGKILLs itself right after its N-th checkpointed batch."""
    code = (
        "import os, signal, sys\n"
        "from raytrace.tracing import backends\n"
        "write, written = backends.HDF5Backend.write_batch, []\n"
        "def write_then_die(self, *batch):\n"
        "    write(self, *batch)\n"
        "    written.append(1)\n"
        f"    if len(written) == {after_batches}:\n"
        "        os.kill(os.getpid(), signal.SIGKILL)\n"
        "backends.HDF5Backend.write_batch = write_then_die\n"
        "from raytrace.cli import main\n"
        "sys.exit(main(sys.argv[1:]))\n"
    )
    done = subprocess.run([sys.executable, "-c", code, *arguments(run_file, output)],
                          capture_output=True, text=True, timeout=120)
    assert done.returncode == -signal.SIGKILL, done.stderr
    checkpoint = output.with_name(output.name + ".partial")
    assert batches_done(checkpoint) == after_batches
    return checkpoint


def test_resume_with_other_parameters_or_inputs_is_refused(workspace, capsys):
    run_file, output = workspace
    checkpoint = interrupt(run_file, output)
    untouched = sha256(checkpoint)

    assert main(arguments(run_file, output)) == 2  # neither --resume nor --overwrite
    assert f"{checkpoint}: an unfinished run's checkpoint is here; continue it with --resume" in capsys.readouterr().err

    assert main(arguments(run_file, output, "--resume", "--seed", "8")) == 2
    message = capsys.readouterr().err.strip().splitlines()[-1]
    assert f"{checkpoint}: cannot resume, the run differs: seed: checkpoint 7, now 8" in message

    box = run_file.parent / "box_z1.h5"
    old = file_checksum(box)
    write_box(box, 1.0, seed=99)  # same name, grid and attributes; other values
    assert main(arguments(run_file, output, "--resume")) == 2
    message = capsys.readouterr().err.strip().splitlines()[-1]
    assert f"boxes[1].checksum: checkpoint '{old}', now '{file_checksum(box)}'" in message
    assert "seed" not in message and "boxes[0]" not in message  # only what differs is named

    assert sha256(checkpoint) == untouched and not output.exists()


@pytest.mark.parametrize("existing", [False, True], ids=["new output", "overwriting an output"])
def test_a_failed_final_write_leaves_no_output_and_no_temporary_file(workspace, reference, monkeypatch, existing):
    run_file, output = workspace
    folder = run_file.parent
    if existing:
        output.write_bytes(b"an earlier result")
    before = set(os.listdir(folder))

    def disk_full(handle, path):  # the last step inside the result's temporary file, after every dataset is in
        raise OSError(28, "No space left on device")

    # A sightline run's result is written apart at the end (with its statistics per redshift bin).
    monkeypatch.setattr("raytrace.tracing.backends._check_finite", disk_full)
    # A full disk is the machine's state, not a bug: one line naming the file, exit 2 (issue 14).
    assert main(arguments(run_file, output, "--overwrite")) == 2
    checkpoint = output.with_name(output.name + ".partial")
    assert set(os.listdir(folder)) == before | {checkpoint.name}  # no temporary file left
    if existing:
        assert output.read_bytes() == b"an earlier result"
    else:
        assert not output.exists()
    assert batches_done(checkpoint) == N_RAYS  # the work survives in the checkpoint

    monkeypatch.undo()
    assert main(arguments(run_file, output, "--resume", "--overwrite")) == 0
    assert set(os.listdir(folder)) == before | {output.name}
    assert_same_result(output, reference[1])


def test_a_result_with_nan_is_never_written(reference, tmp_path):
    result = SightlineResult.load(reference[1])
    kernel = np.array(result.kernel_boxes)
    kernel[5, 3] = np.nan
    broken = SightlineResult(result.mass_eV, kernel, result.kernel_background, result.crossings,
                             result.dispersion_measure_boxes, result.dispersion_measure_background,
                             result.direction, result.run)
    with pytest.raises(Exception, match="kernel_boxes would hold NaN or inf; nothing was written"):
        broken.save(tmp_path / "nan.h5")
    assert os.listdir(tmp_path) == []


def test_an_existing_output_is_replaced_only_with_overwrite(workspace, reference, capsys):
    run_file, output = workspace
    output.write_bytes(b"an earlier result")
    assert main(arguments(run_file, output)) == 2
    message = capsys.readouterr().err.strip().splitlines()[-1]
    assert message == (f"raytrace sightlines: error: --output (TOML output.path): {output}: output exists; "
                       "pass --overwrite (overwrite=True) to replace it")
    assert output.read_bytes() == b"an earlier result"
    assert not output.with_name(output.name + ".partial").exists()

    assert main(arguments(run_file, output, "--overwrite")) == 0
    assert_same_result(output, reference[1])
    assert datasets(output)[1]["run"]["n_rays"] == N_RAYS
