"""Reliability: full disks, damaged checkpoints, boxes that change under a run, lost workers,
output sets, tables without NaN, API and CLI mistakes, stale temporary files (issue 14, items 1-9).

Reference for every result: the uninterrupted run of the same run file in this process. A
run that was stopped, damaged or starved and then resumed must end bit-identical to it.
Error numbers (ENOSPC 28, EIO 5) are POSIX's (errno.h); "one line, exit 2" is the
project's convention for a mistake or a machine state the user must fix (DEVELOPERS.md).
"""

import errno
import json
import os
import shutil
import subprocess
import threading
import time
import warnings

import h5py
import numpy as np
import pytest
from conftest import two_box_run_file, write_lognormal_box

from raytrace.cli import main
from raytrace.core.errors import InputError
from raytrace.statistics.results import SightlineResult
from raytrace.tracing.backends import HDF5Backend

ARRAYS = ("kernel_boxes", "crossings", "dispersion_measure_boxes", "direction")
N_RAYS, BATCH = 120, 10  # 12 batches


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    """Boxes, run file and the uninterrupted run's result, in one folder."""
    folder = tmp_path_factory.mktemp("reference")
    write_lognormal_box(folder / "box_z0.h5", 0.0, np.random.default_rng(1))
    write_lognormal_box(folder / "box_z1.h5", 1.0, np.random.default_rng(2))
    (folder / "run.toml").write_text(two_box_run_file(N_RAYS, 11, BATCH, mass_count=16))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert main(["sightlines", str(folder / "run.toml"), "--output", str(folder / "reference.h5")]) == 0
    result = SightlineResult.load(folder / "reference.h5")
    assert result.crossings.sum() > 100  # resonances happen: equality below is not between zeros
    return folder, result


@pytest.fixture
def workspace(reference, tmp_path):
    """A copy of the boxes and the run file; returns the run file."""
    for name in ("box_z0.h5", "box_z1.h5", "run.toml"):
        shutil.copy(reference[0] / name, tmp_path / name)
    return tmp_path / "run.toml"


def run(run_file, output, *flags):
    return main(["sightlines", str(run_file), "--output", str(output), *flags])


def error_line(capsys):
    """The one line a failed command printed on stderr (progress bars and warnings aside)."""
    lines = [line for line in capsys.readouterr().err.splitlines() if ": error: " in line]
    assert len(lines) == 1, lines
    return lines[0]


def assert_same_as_reference(path, reference):
    result = SightlineResult.load(path)
    for name in ARRAYS:
        assert np.array_equal(getattr(result, name), getattr(reference[1], name)), name


def stop_after(monkeypatch, batches, action=None):
    """Make HDF5Backend.write_batch call ``action`` (default: raise KeyboardInterrupt) after ``batches`` writes."""
    write, written = HDF5Backend.write_batch, []

    def counted(self, *batch):
        write(self, *batch)
        written.append(1)
        if len(written) == batches:
            (action or interrupted)()

    def interrupted():
        raise KeyboardInterrupt

    monkeypatch.setattr(HDF5Backend, "write_batch", counted)


def checkpoint_of(output):
    return output.with_name(output.name + ".partial")


# -- item 1: a full disk ----------------------------------------------------------------------


@pytest.fixture
def small_file_system(tmp_path):
    """A 600 kB tmpfs (needs root and mount), else skip: the injected failure below always runs."""
    folder = tmp_path / "small"
    folder.mkdir()
    if shutil.which("mount") is None or os.geteuid() != 0:
        pytest.skip("a small file system needs root to mount a tmpfs")
    mounted = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=600k", "tmpfs", str(folder)], capture_output=True)
    if mounted.returncode != 0:
        pytest.skip(f"cannot mount a tmpfs here ({mounted.stderr.decode().strip()})")
    yield folder
    subprocess.run(["umount", str(folder)], check=True)


def fill(folder):
    """Write a filler file until the file system is full; returns it."""
    filler = folder / "filler"
    descriptor = os.open(filler, os.O_WRONLY | os.O_CREAT)
    try:
        while os.write(descriptor, b"\1" * 4096):
            pass
    except OSError as error:
        assert error.errno == errno.ENOSPC
    finally:
        os.close(descriptor)
    return filler


def test_a_disk_that_fills_during_a_run_stops_it_in_one_line_and_resume_is_bit_identical(
        workspace, reference, small_file_system, monkeypatch, capsys):
    output = small_file_system / "s.h5"
    filler = []
    # The disk fills while batches are written: the checkpoint's blocks are reserved, so the
    # batches still land; a sightline run's result is written apart at the end (with its statistics
    # per redshift bin, made after the run), and that write is refused.
    stop_after(monkeypatch, 3, lambda: filler.append(fill(small_file_system)))
    assert run(workspace, output) == 2
    line = error_line(capsys)
    assert str(output) in line and "No space left" in line and "MB free" in line and "--resume" in line
    assert not output.exists() and not [p for p in os.listdir(small_file_system) if p.endswith(".part")]
    monkeypatch.undo()
    filler[0].unlink()
    assert run(workspace, output, "--resume") == 0
    assert_same_as_reference(output, reference)


def test_a_disk_that_fills_during_a_sky_run_does_not_stop_it(workspace, small_file_system, monkeypatch):
    # A sky's result file is its checkpoint: its blocks were reserved when it was made and finishing it
    # only sets a flag in place, so a disk that fills while batches are written does not stop the run.
    # Reference: the same sky run uninterrupted on the ordinary disk.
    sky_file = workspace.parent / "sky.toml"
    sky_file.write_text(two_box_run_file(None, 11, batch_size=16, mass_count=16, extra="[sky]\nnside = 4\n"))
    assert main(["sky", str(sky_file), "--output", str(workspace.parent / "reference_sky.h5")]) == 0
    output = small_file_system / "sky.h5"
    filler = []
    stop_after(monkeypatch, 3, lambda: filler.append(fill(small_file_system)))
    assert main(["sky", str(sky_file), "--output", str(output)]) == 0
    assert filler and not checkpoint_of(output).exists()
    assert not [p for p in os.listdir(small_file_system) if p.endswith(".part")]
    with h5py.File(output, "r") as result, h5py.File(workspace.parent / "reference_sky.h5", "r") as expected:
        for name in ("kernel_boxes", "crossings", "dispersion_measure_boxes"):
            assert np.array_equal(result[name][...], expected[name][...]), name


def test_a_disk_too_small_for_the_result_refuses_it_at_the_start(workspace, small_file_system, capsys):
    workspace.write_text(two_box_run_file(4000, 11, BATCH, mass_count=16))  # a result of a few MB
    output = small_file_system / "s.h5"
    assert run(workspace, output) == 2
    line = error_line(capsys)
    assert f"{output} (--output): the result will take " in line and "MB are free there" in line
    assert os.listdir(small_file_system) == []  # nothing half-made is left


def test_an_io_error_in_a_batch_keeps_the_checkpoint_consistent(workspace, reference, monkeypatch, capsys):
    # Without a small file system: the write of the 5th batch fails as a dying disk's would (EIO).
    output = workspace.parent / "s.h5"
    write, original, calls = HDF5Backend.write_batch, h5py.Dataset.__setitem__, []

    def refuse(dataset, key, value):
        raise OSError(errno.EIO, "Input/output error")

    def failing(self, batch, start, arrays):
        calls.append(batch)
        if len(calls) == 5:
            monkeypatch.setattr(h5py.Dataset, "__setitem__", refuse)
        try:
            return write(self, batch, start, arrays)
        finally:
            monkeypatch.setattr(h5py.Dataset, "__setitem__", original)

    monkeypatch.setattr(HDF5Backend, "write_batch", failing)
    assert run(workspace, output) == 2
    line = error_line(capsys)
    assert str(checkpoint_of(output)) in line and "Input/output error" in line and "--resume" in line
    with h5py.File(checkpoint_of(output), "r") as handle:
        assert handle["batch_done"][...].sum() == 4  # what it says is done is done: the 4 before
    monkeypatch.undo()
    assert run(workspace, output, "--resume") == 0
    assert_same_as_reference(output, reference)


# -- item 2: a damaged checkpoint --------------------------------------------------------------


def raw_offset(checkpoint, dataset, row):
    """Byte offset in the file of ``dataset``'s row ``row`` (contiguous layout)."""
    with h5py.File(checkpoint, "r") as handle:
        node = handle[dataset]
        return node.id.get_offset() + row * int(np.prod(node.shape[1:], dtype=int)) * node.dtype.itemsize


def damage(checkpoint, offset, data):
    with open(checkpoint, "r+b") as raw:
        raw.seek(offset)
        raw.write(data)


@pytest.mark.parametrize("how", ["random bytes", "zeros", "nan", "every flag set"])
def test_a_damaged_checkpoint_is_recomputed_never_trusted(workspace, reference, monkeypatch, capsys, how):
    output = workspace.parent / "s.h5"
    stop_after(monkeypatch, 6)
    assert run(workspace, output) == 130  # interrupted (the CLI's status for Ctrl-C)
    monkeypatch.undo()
    checkpoint = checkpoint_of(output)
    row = 2 * BATCH + 3  # inside finished batch 2
    if how == "random bytes":
        damage(checkpoint, raw_offset(checkpoint, "kernel_boxes", row), np.random.default_rng(0).bytes(40))
    elif how == "zeros":
        damage(checkpoint, raw_offset(checkpoint, "direction", row), bytes(24))
    elif how == "nan":
        damage(checkpoint, raw_offset(checkpoint, "kernel_boxes", row), np.full(2, np.nan).tobytes())
    else:
        with h5py.File(checkpoint, "r+") as handle:
            handle["batch_done"][...] = True
    assert run(workspace, output, "--resume") == 0
    warning = [line for line in capsys.readouterr().err.splitlines() if "fail their checksum" in line]
    assert len(warning) == 1 and str(checkpoint) in warning[0] and "recomputed" in warning[0]
    assert ("batches 2)" in warning[0]) if how != "every flag set" else ("6 finished batches" in warning[0])
    assert_same_as_reference(output, reference)


def test_a_damaged_checkpoint_header_is_refused(workspace, monkeypatch, capsys):
    output = workspace.parent / "s.h5"
    stop_after(monkeypatch, 2)
    assert run(workspace, output) == 130  # interrupted (the CLI's status for Ctrl-C)
    monkeypatch.undo()
    with h5py.File(checkpoint_of(output), "r+") as handle:
        run_record = json.loads(handle.attrs["run"])
        handle.attrs["run"] = json.dumps(run_record, sort_keys=True, indent=1)  # same content, other bytes
    assert run(workspace, output, "--resume") == 2
    assert "header fails its checksum" in error_line(capsys)


# -- item 3: a box that changes under a run ----------------------------------------------------


@pytest.mark.parametrize("keep_stamp", [False, True], ids=["new mtime", "size and mtime kept"])
def test_a_box_rewritten_during_a_run_stops_it_naming_the_file(workspace, monkeypatch, capsys, keep_stamp):
    output = workspace.parent / "s.h5"
    box = workspace.parent / "box_z1.h5"

    def rewrite():  # in place, as a simulation code rewriting its snapshot would (the box is memory-mapped)
        stamp = os.stat(box)
        with h5py.File(box, "r+") as handle:
            handle["electron_density"][...] = handle["electron_density"][...] * 2
        if keep_stamp:  # defeats the cheap check: the checksum at the end must catch it
            os.utime(box, ns=(stamp.st_atime_ns, stamp.st_mtime_ns))
        assert os.stat(box).st_size == stamp.st_size

    stop_after(monkeypatch, 3, rewrite)
    assert run(workspace, output) == 2
    line = error_line(capsys)
    assert str(box) in line and "changed while the run read it" in line
    assert ("SHA-256" in line) if keep_stamp else ("modification time" in line)
    assert not output.exists()


# -- item 4: workers lost on a cluster ---------------------------------------------------------


@pytest.fixture(scope="module")
def cluster_inputs(reference):
    import raytrace
    from raytrace.physics.background import MeanPlasma
    from raytrace.physics.ionisation import IonisationHistory

    files = [str(reference[0] / "box_z0.h5"), str(reference[0] / "box_z1.h5")]
    plasma = MeanPlasma(None, IonisationHistory.constant(1.08))
    mass = np.geomspace(1e-14, 1e-13, 8)
    arguments = {"n_rays": 160, "z_max": 1.5, "seed": 5, "batch_size": 2, "plasma": plasma}
    serial = raytrace.cast_sightlines(raytrace.load_series(files), mass, **arguments)
    assert serial.crossings.sum() > 100
    return files, mass, arguments, serial


def test_workers_killed_early_and_mid_run_do_not_change_the_result(cluster_inputs):
    distributed = pytest.importorskip("distributed")
    import signal

    import raytrace
    from raytrace.tracing.backends import MemoryBackend
    from raytrace.tracing.cluster import DaskExecutor

    files, mass, arguments, serial = cluster_inputs

    class KillingBackend(MemoryBackend):
        """Kills a worker process as the run starts (the moment the executor has its workers,
        before it sends them anything) and another mid-run."""

        def __init__(self, client):
            self.client, self.written, self.killed = client, 0, []
            wait = client.wait_for_workers

            def wait_then_kill(*arguments, **keywords):
                wait(*arguments, **keywords)
                if not self.killed:
                    self.kill()

            client.wait_for_workers = wait_then_kill

        def kill(self):
            address, pid = sorted(self.client.run(os.getpid).items())[len(self.killed) % 2]
            os.kill(pid, signal.SIGKILL)
            self.killed.append(address)

        def write_batch(self, *batch):
            super().write_batch(*batch)
            self.written += 1
            if self.written == 40:
                self.kill()

    with distributed.LocalCluster(n_workers=2, processes=True, threads_per_worker=1, dashboard_address=None) as local, \
            distributed.Client(local) as client:
        backend = KillingBackend(client)
        result = raytrace.cast_sightlines(raytrace.load_series(files), mass, backend=backend,
                                          executor=DaskExecutor(client), **arguments)
    assert len(backend.killed) == 2
    for name in ARRAYS:
        assert np.array_equal(getattr(result, name), getattr(serial, name)), name


def test_a_run_without_workers_waits_saying_so_and_goes_on_when_one_joins(cluster_inputs, monkeypatch):
    distributed = pytest.importorskip("distributed")
    import raytrace
    from raytrace.tracing import cluster as cluster_module

    files, mass, arguments, serial = cluster_inputs
    monkeypatch.setattr(cluster_module, "_WAIT_S", 0.5)
    said = []
    monkeypatch.setattr(cluster_module.DaskExecutor, "_say_waiting", lambda self, since: said.append(since))
    with distributed.LocalCluster(n_workers=0, processes=True, threads_per_worker=1, dashboard_address=None) as local, \
            distributed.Client(local) as client:
        outcome = {}

        def cast():
            outcome["result"] = raytrace.cast_sightlines(raytrace.load_series(files), mass,
                                                         executor=cluster_module.DaskExecutor(client), **arguments)

        worker = threading.Thread(target=cast)
        worker.start()
        deadline = time.monotonic() + 60
        while not said and time.monotonic() < deadline:
            time.sleep(0.1)
        assert said, "no message while no worker was there"
        local.scale(1)
        worker.join(timeout=120)
        assert not worker.is_alive()
    for name in ARRAYS:
        assert np.array_equal(getattr(outcome["result"], name), getattr(serial, name)), name


# -- item 5: the outputs of one run, all or nothing --------------------------------------------


def test_an_impossible_late_output_is_refused_before_any_work(workspace, capsys):
    folder = workspace.parent
    (folder / "afile").write_text("a regular file")
    output = folder / "s.h5"
    assert run(workspace, output, "--plot", str(folder / "afile" / "k.png")) == 2
    line = error_line(capsys)
    assert "--plot" in line and "afile is a file, not a folder" in line
    assert not output.exists() and not checkpoint_of(output).exists()


def test_a_late_output_that_fails_leaves_none_and_the_rerun_resumes(workspace, reference, monkeypatch, capsys):
    folder = workspace.parent
    output, plot = folder / "s.h5", folder / "k.png"

    def broken(*arguments, **keywords):
        raise OSError(errno.EIO, "Input/output error")

    monkeypatch.setattr("matplotlib.figure.Figure.savefig", broken)
    assert run(workspace, output, "--plot", str(plot)) == 2
    assert str(plot) in error_line(capsys)
    assert not output.exists() and not plot.exists()
    assert checkpoint_of(output).exists()  # the work is kept
    assert not [p for p in os.listdir(folder) if p.endswith(".part")]
    monkeypatch.undo()
    assert run(workspace, output, "--plot", str(plot), "--resume") == 0
    assert plot.exists() and not checkpoint_of(output).exists()
    assert_same_as_reference(output, reference)


def test_limits_outputs_all_or_nothing(tmp_path, capsys):
    (tmp_path / "afile").write_text("a regular file")
    argv = ["limits", "--mass-range", "1e-15", "1e-12", "6", "--output", str(tmp_path / "l.csv"),
            str(tmp_path / "afile" / "l.h5")]
    assert main(argv) == 2
    assert "afile is a file, not a folder" in error_line(capsys)
    assert sorted(os.listdir(tmp_path)) == ["afile"]


def test_sky_fits_in_a_file_is_refused_before_any_work(workspace, capsys):
    folder = workspace.parent
    (folder / "afile").write_text("a regular file")
    argv = ["sky", "--boxes", str(folder / "box_z0.h5"), str(folder / "box_z1.h5"), "--nside", "1", "--z-max", "1.5",
            "--output", str(folder / "m.h5"), "--fits", str(folder / "afile" / "m.fits")]
    assert main(argv) == 2
    assert "--fits" in error_line(capsys)
    assert not (folder / "m.h5").exists() and not (folder / "m.h5.partial").exists()


# -- item 6: limit tables without NaN or inf ---------------------------------------------------


def test_limit_tables_mark_unconstrained_masses_instead_of_nan(tmp_path):
    import csv

    csv_path, h5_path = tmp_path / "l.csv", tmp_path / "l.h5"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        # Masses down to 1e-16 eV: below the plasma mass of today's mean universe (about 1e-14 eV from
        # n_e ~ 2e-7 cm^-3; PHYSICS.md section 1), so the lowest resonate nowhere and are unconstrained.
        assert main(["limits", "--mass-range", "1e-16", "1e-12", "12", "--output", str(csv_path), str(h5_path)]) == 0
    with open(csv_path, newline="") as handle:
        rows = list(csv.DictReader(line for line in handle if not line.startswith("#")))
    reasons = [row["background_unconstrained"] for row in rows]
    assert any(reasons) and not all(reasons)
    for row, reason in zip(rows, reasons):
        for key in ("background_epsilon_max", "background_s_hat", "background_s_sigma"):
            assert (row[key] == "") == bool(reason)
            assert row[key] == "" or np.isfinite(float(row[key]))
    with h5py.File(h5_path, "r") as handle:
        for key in ("epsilon_max", "s_hat", "s_sigma", "kernel_eV"):
            assert np.isfinite(handle["background"][key][...]).all()
        assert [bool(r) for r in handle["background"]["unconstrained"].asstr()[...]] == [bool(r) for r in reasons]


# -- item 7: every API entry point says InputError; numpy scalars are numbers -------------------


def test_api_mistakes_are_input_errors(reference):
    import raytrace

    series = raytrace.load_series([str(reference[0] / "box_z0.h5"), str(reference[0] / "box_z1.h5")])
    mass = np.geomspace(1e-14, 1e-13, 4)
    with pytest.raises(InputError, match="path"):
        raytrace.load_box(None)
    with pytest.raises(InputError, match="mass_eV"):
        raytrace.cast_sightlines(series, ["a", "b"], 4, 1.5)
    with pytest.raises(InputError, match="n_jobs"):
        raytrace.cast_sightlines(series, mass, 4, 1.5, n_jobs="x")
    with pytest.raises(InputError, match="nofile.txt"):
        raytrace.spectral_limit(mass, np.full(4, 1e-5), spectrum="nofile.txt")
    with pytest.raises(InputError, match="plasma"):
        raytrace.cast_sightlines(series, mass, 4, 1.5, plasma="CAMB")
    with pytest.raises(InputError, match="result path"):
        raytrace.SightlineResult.load(None)


# Two rays: the built-in MC/PDF check rightly finds them too few; the numbers' types are the subject here.
@pytest.mark.filterwarnings("ignore::raytrace.statistics.meancheck.MeanCheckWarning")
def test_numpy_scalars_are_accepted_as_numbers(reference):
    import raytrace
    from raytrace.physics.background import MeanPlasma
    from raytrace.physics.ionisation import IonisationHistory

    series = raytrace.load_series([str(reference[0] / "box_z0.h5"), str(reference[0] / "box_z1.h5")])
    mass = np.geomspace(1e-14, 1e-13, 4)
    plasma = MeanPlasma(None, IonisationHistory.constant(1.08))
    plain = raytrace.cast_sightlines(series, mass, 2, 1.5, seed=3, batch_size=2, plasma=plasma)
    numpy = raytrace.cast_sightlines(series, mass, np.int64(2), np.float64(1.5), seed=np.uint8(3), n_jobs=np.int32(1),
                                     batch_size=np.int16(2), plasma=plasma)
    assert np.array_equal(plain.kernel_boxes, numpy.kernel_boxes)
    single = raytrace.cast_sightlines(series, mass, 2, np.float32(1.5), seed=3, batch_size=2, plasma=plasma)
    assert single.run["z_max"] == 1.5  # exactly representable in float32
    assert raytrace.spectral_limit(mass, np.full(4, 1e-5), confidence=np.float32(0.95)).confidence == \
        pytest.approx(0.95, rel=1e-7)  # float32 rounding of 0.95


# -- item 8: one line naming the right option ---------------------------------------------------


@pytest.mark.parametrize("flags, named", [
    (["--mass-min", "-1e-13"], "--mass-min"),
    (["--box-size", "-100 Mpc/h"], "--box-size"),
    (["--mass-count", "100000000000"], "--mass-count"),
    (["--rays", "100000000000000"], "--rays"),
    (["--output", "DIR/"], "is a folder"),
])
def test_sightline_mistakes_name_their_option_on_one_line(workspace, capsys, flags, named):
    flags = [flag.replace("DIR", str(workspace.parent)) for flag in flags]
    assert main(["sightlines", str(workspace), *flags]) == 2
    assert named in error_line(capsys)


def test_sky_mistakes_name_their_option_on_one_line(workspace, capsys):
    boxes = ["--boxes", str(workspace.parent / "box_z0.h5"), str(workspace.parent / "box_z1.h5")]
    assert main(["sky", *boxes, "--nside", "1048576"]) == 2
    assert "--nside" in error_line(capsys)
    assert main(["sky", *boxes, "--nside", "1", "--fits", str(workspace.parent / "m.txt")]) == 2
    assert "--fits" in error_line(capsys)


def test_output_and_checkpoint_folders_are_one_line(workspace, capsys):
    folder = workspace.parent
    (folder / "taken").mkdir()
    assert run(workspace, folder / "taken") == 2
    line = error_line(capsys)
    assert "is a folder" in line and "--overwrite" not in line
    (folder / "s.h5.partial").mkdir()
    assert run(workspace, folder / "s.h5") == 2
    assert "s.h5.partial: is a folder" in error_line(capsys)


@pytest.mark.parametrize("section, key, value, named", [
    ("rays", "seed", "7.0", "rays.seed"),
    ("masses", "min_eV", '"1e-14"', "masses.min_eV"),
])
def test_run_file_numbers_must_be_numbers_of_the_kind(workspace, capsys, section, key, value, named):
    text = workspace.read_text()
    text = "\n".join(line for line in text.splitlines() if not line.startswith(f"{key} ="))
    workspace.write_text(text.replace(f"[{section}]", f"[{section}]\n{key} = {value}"))
    assert main(["sightlines", str(workspace)]) == 2
    assert named in error_line(capsys)


def test_z_boxes_beyond_z_max_is_a_warning_saying_what_it_means(workspace, capsys):
    assert main(["sightlines", str(workspace), "--z-boxes", "3", "--rays", "4"]) == 0
    warned = [line for line in capsys.readouterr().err.splitlines() if "z_boxes" in line and "warning" in line]
    assert len(warned) == 1 and "beyond z_max = 1.5" in warned[0]


# -- item 9: stale temporary files --------------------------------------------------------------


def test_stale_temporary_files_of_an_output_go_on_the_next_successful_run(workspace, reference):
    folder = workspace.parent
    output = folder / "s.h5"
    stale = [folder / ".s.h5.k1ll3d0x.part", folder / ".s.h5.partial.a2b4c6d8.part"]
    for path in stale:
        path.write_bytes(b"left by a run killed while saving")
    unrelated = folder / ".other.h5.k1ll3d0x.part"
    unrelated.write_bytes(b"not this output's")
    assert run(workspace, output) == 0
    assert not any(path.exists() for path in stale) and unrelated.exists()
    assert_same_as_reference(output, reference)
