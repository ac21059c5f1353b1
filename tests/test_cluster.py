"""The dask.distributed backend against the serial engine.

Reference for every comparison: the serial run of the same seed in this
process (``raytrace.cast_sightlines`` without an executor). A cluster run can
equal it bit for bit only if each worker rebuilt the same tracer and read the
same box files.
"""

import os
import subprocess
import sys

import h5py
import numpy as np
import pytest

distributed = pytest.importorskip("distributed")

from conftest import write_lognormal_box  # noqa: E402

import raytrace  # noqa: E402
from raytrace.boxes import Box, BoxSeries  # noqa: E402
from raytrace.cli import main  # noqa: E402
from raytrace.core.errors import InputError  # noqa: E402
from raytrace.physics.background import MeanPlasma  # noqa: E402
from raytrace.physics.ionisation import IonisationHistory  # noqa: E402
from raytrace.tracing.cluster import DaskExecutor  # noqa: E402

ARRAYS = ("kernel_boxes", "crossings", "dispersion_measure_boxes", "direction")
MASS = np.geomspace(1e-14, 1e-13, 16)  # inside the boxes' plasma masses
RUN = {"n_rays": 36, "z_max": 1.5, "seed": 5, "batch_size": 4}  # 9 batches
REDSHIFTS = (0.0, 1.0)


def write_boxes(folder, seed=3):
    """Two 16^3 log-normal comoving-density boxes."""
    rng = np.random.default_rng(seed)
    return [write_lognormal_box(folder / f"box_z{z:g}.h5", z, rng) for z in REDSHIFTS]


@pytest.fixture(scope="module")
def plasma():
    return MeanPlasma(None, IonisationHistory.constant(1.08))


@pytest.fixture(scope="module")
def box_files(tmp_path_factory):
    return write_boxes(tmp_path_factory.mktemp("boxes"))


@pytest.fixture(scope="module")
def serial(box_files, plasma):
    result = raytrace.cast_sightlines(raytrace.load_series([str(p) for p in box_files]), MASS, plasma=plasma, **RUN)
    assert result.crossings.sum() > 100  # resonances happen, so equality below is not between zeros
    return result


@pytest.fixture(scope="module")
def cluster():
    with distributed.LocalCluster(n_workers=2, processes=True, threads_per_worker=1,
                                  dashboard_address=None) as local:
        yield local


# A few hundred rays checked bin by bin against the one-point mean: a 4-sigma bin among 81 is expected now and
# then, and bit-identity, not the mean, is the point here.
@pytest.mark.filterwarnings("ignore::raytrace.statistics.meancheck.MeanCheckWarning")
def test_local_cluster_run_equals_serial_run_bit_for_bit(cluster, box_files, plasma, serial):
    series = raytrace.load_series([str(p) for p in box_files])
    held = []

    def watched(tracer, batches):
        # How many futures the client holds each time a result comes back.
        for item in executor(tracer, batches):
            held.append(len(executor.client.futures))
            yield item

    with DaskExecutor(cluster.scheduler_address, max_in_flight=3) as executor:
        result = raytrace.cast_sightlines(series, MASS, plasma=plasma, executor=watched, **RUN)
    for name in ARRAYS:
        assert np.array_equal(getattr(result, name), getattr(serial, name)), name
    assert result.kernel_background.tolist() == serial.kernel_background.tolist()
    # Bounded: at most 3 tasks in flight, plus the shared recipe and the batch just collected.
    assert len(held) == 9
    assert max(held) <= 3 + 2


def test_local_cluster_sky_equals_serial_sky_bit_for_bit(cluster, box_files, plasma):
    # The reference is the same sky traced here on one thread.
    series = raytrace.load_series([str(p) for p in box_files])
    options = dict(nside=4, z_max=1.0, seed=2, batch_pixels=40, include_background=False, plasma=plasma)
    serial_sky = raytrace.cast_sky(series, MASS, **options)
    with DaskExecutor(cluster.scheduler_address) as executor:
        cluster_sky = raytrace.cast_sky(series, MASS, executor=executor, **options)
    for name in ("kernel_boxes", "crossings", "dispersion_measure_boxes"):
        assert np.array_equal(getattr(cluster_sky, name), getattr(serial_sky, name)), name


def test_workers_read_the_box_files_themselves(cluster, tmp_path, plasma):
    # The client loads the boxes, then a file is replaced by different bytes (a new
    # inode: the client's memory map still shows the old ones). Only workers that
    # open the files themselves can see the change, and they must refuse it.
    files = write_boxes(tmp_path)
    series = raytrace.load_series([str(p) for p in files])
    (tmp_path / "other").mkdir()
    replacement = write_boxes(tmp_path / "other", seed=4)
    os.replace(replacement[1], files[1])
    with DaskExecutor(cluster.scheduler_address) as executor:
        with pytest.raises(InputError, match=r"box_z1\.h5: the file a worker reads is not the one the run started with"):
            raytrace.cast_sightlines(series, MASS, plasma=plasma, executor=executor, **RUN)


def test_in_memory_boxes_are_refused(plasma):
    rng = np.random.default_rng(0)
    boxes = [Box.from_array(2.5e-7 * np.exp(rng.normal(-0.125, 0.5, (16,) * 3)), "50 cMpc", z)
             for z in REDSHIFTS]
    # Refused before any connection: nothing listens at this address.
    executor = DaskExecutor("tcp://127.0.0.1:1")
    with pytest.raises(InputError, match=r"cluster runs need boxes read from files.*box 0 \(z = 0\) is an in-memory"):
        raytrace.cast_sightlines(BoxSeries(boxes), MASS, plasma=plasma, executor=executor, **RUN)


def test_unreachable_scheduler_is_an_input_error_naming_the_address():
    with pytest.raises(InputError, match=r"--scheduler.*cannot reach a dask scheduler at 'tcp://127\.0\.0\.1:1'"):
        with DaskExecutor("tcp://127.0.0.1:1", connect_timeout=1):
            pass


def test_cli_local_cluster_matches_serial_run(box_files, serial, tmp_path, capsys):
    output = tmp_path / "cluster.h5"
    masses = ["--mass-min", "1e-14", "--mass-max", "1e-13", "--mass-count", "16"]
    rays = ["--rays", "36", "--z-max", "1.5", "--seed", "5", "--batch-size", "4"]
    status = main(["sightlines", "--boxes", *map(str, box_files), *masses, *rays, "--output", str(output),
                   "--scheduler", "local", "--workers", "2"])
    assert status == 0, capsys.readouterr().err
    with h5py.File(output, "r") as handle:
        for name in ARRAYS:
            assert np.array_equal(handle[name][...], getattr(serial, name)), name


def test_cli_workers_without_scheduler_is_refused(box_files, capsys):
    status = main(["sightlines", "--boxes", str(box_files[0]), "--rays", "4", "--workers", "2"])
    assert status == 2
    assert "--workers (TOML rays.workers)" in capsys.readouterr().err


def test_without_distributed_raytrace_imports_and_the_cli_says_what_to_install(box_files):
    # A fresh interpreter in which dask and distributed cannot be imported.
    code = ("import sys; sys.modules['dask'] = None; sys.modules['distributed'] = None\n"
            "from raytrace.cli import main\n"
            f"sys.exit(main(['sightlines', '--boxes', {str(box_files[0])!r}, '--rays', '4', '--scheduler', 'local']))")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert done.returncode == 2, done.stderr
    last = done.stderr.strip().splitlines()[-1]
    assert "--scheduler" in last and "pip install 'raytrace[dist]'" in last


def test_the_recipe_a_worker_gets_does_not_grow_with_the_boxes(tmp_path, plasma):
    # Boxes travel as file names and checksums (each worker opens and memory-maps them), never as
    # arrays: the pickled recipe grows with the cells along a ray (its redshift tables: x4 from 16^3 to
    # 64^3 boxes), not with a box's cells (x64), and stays far below the boxes' bytes.
    import pickle

    from raytrace.tracing.cluster import tracer_recipe
    from raytrace.tracing.lattice import SkyTracer

    sizes = {}
    for cells in (16, 64):
        rng = np.random.default_rng(cells)
        files = [write_lognormal_box(tmp_path / f"box{cells}_z{z:g}.h5", z, rng, cells=cells) for z in REDSHIFTS]
        series = raytrace.load_series([str(p) for p in files])
        tracer = SkyTracer(series, MASS, 64, 4, 1.0, 2, 2.35e-4, plasma.cosmology, True, ordering="RING")
        sizes[cells] = len(pickle.dumps(tracer_recipe(tracer)))
        assert all(isinstance(box.data, np.memmap) for box in series.boxes)
    assert sizes[64] < 5 * sizes[16] and sizes[64] < 0.2 * 2 * 64**3 * 4, sizes


def test_a_cluster_sky_whose_client_was_stopped_resumes_to_the_serial_sky(cluster, box_files, plasma, tmp_path,
                                                                           monkeypatch):
    # The client writes each batch to the result file as it arrives; stopped after 3 (as a killed client
    # would be), the run resumes on the cluster from the file's finished batches. Reference: the serial sky.
    from raytrace.tracing.backends import HDF5Backend

    series = raytrace.load_series([str(p) for p in box_files])
    options = dict(nside=4, z_max=1.0, seed=2, batch_pixels=16, include_background=False, plasma=plasma)
    serial_sky = raytrace.cast_sky(series, MASS, **options)
    write, written = HDF5Backend.write_batch, []

    def stop_after_three(self, *batch):
        write(self, *batch)
        written.append(1)
        if len(written) == 3:
            raise KeyboardInterrupt

    monkeypatch.setattr(HDF5Backend, "write_batch", stop_after_three)
    output = tmp_path / "sky.h5"
    with DaskExecutor(cluster.scheduler_address) as executor, pytest.raises(KeyboardInterrupt):
        raytrace.cast_sky(series, MASS, executor=executor, backend=HDF5Backend(output), **options)
    monkeypatch.undo()
    with h5py.File(output.with_name("sky.h5.partial"), "r") as handle:
        assert handle["batch_done"][...].sum() == 3
    with DaskExecutor(cluster.scheduler_address) as executor:
        resumed = raytrace.cast_sky(series, MASS, executor=executor, backend=HDF5Backend(output, resume=True),
                                    **options)
    for name in ("kernel_boxes", "crossings", "tangent_events", "kernel_tangent"):
        for k in range(MASS.size):
            assert np.array_equal(resumed.map(name, k), serial_sky.map(name, k)), (name, k)
