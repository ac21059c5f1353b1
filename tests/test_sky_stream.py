"""Skies streamed to their result file, read one mass at a time (issue 21).

References: the sky tracer called once on every pixel in memory (no batches, no
backend, no file) for the streamed maps; healpy.read_map for the FITS maps and
healpy.anafast for the spectra (HEALPix, Gorski et al. 2005); numpy's float32
rounding (IEEE 754 binary32: half a unit in the last place is 2^-24 of a value,
common practice, no source) for the single-precision maps; astropy's Planck18
comoving distance for the cells a ray crosses; os.path.getsize for the size on
disk; SIGKILL (POSIX) for a killed run.
"""

import os
import signal
import subprocess
import sys

import h5py
import healpy
import numpy as np
import pytest
from astropy.cosmology import Planck18
from conftest import write_lognormal_box

import raytrace
from raytrace.boxes import load_series
from raytrace.cli import main
from raytrace.core.errors import InputError
from raytrace.limits.anisotropy import table_limit
from raytrace.physics.background import MeanPlasma
from raytrace.physics.ionisation import IonisationHistory
from raytrace.sky import fits as fitsmaps
from raytrace.sky.maps import SkyResult
from raytrace.sky.spectra import sky_spectra
from raytrace.tracing import backends
from raytrace.tracing.backends import HDF5Backend
from raytrace.tracing.lattice import SkyTracer

MASS = np.geomspace(1.2e-14, 6e-14, 7)
OPTIONS = dict(nside=8, z_max=0.6, include_background=False, seed=4, rays_per_pixel=4)
MAPS = ("kernel_boxes", "crossings", "tangent_events", "kernel_tangent")


@pytest.fixture(scope="module")
def plasma():
    return MeanPlasma(None, IonisationHistory.constant(1.08))


@pytest.fixture(scope="module")
def box_files(tmp_path_factory):
    folder = tmp_path_factory.mktemp("boxes")
    rng = np.random.default_rng(21)
    return [str(write_lognormal_box(folder / f"box_z{z:g}.h5", z, rng)) for z in (0.0, 0.5)]


@pytest.fixture(scope="module")
def series(box_files):
    return load_series(box_files)


@pytest.fixture(scope="module", params=["RING", "NESTED"])
def whole(request, series, plasma):
    """(ordering, per-pixel arrays): every pixel traced in one call of the tracer, in memory."""
    ordering = request.param
    tracer = SkyTracer(series, MASS, OPTIONS["nside"], OPTIONS["rays_per_pixel"], OPTIONS["z_max"], OPTIONS["seed"],
                       2.35e-4, plasma.cosmology, True, ordering=ordering)
    arrays = tracer.trace(np.arange(12 * OPTIONS["nside"] ** 2))
    assert arrays["crossings"].sum() > 1000  # resonances happen: equality below is not between zeros
    return ordering, arrays


@pytest.mark.parametrize("jobs, batch", [(1, 7), (2, 7), (1, 1024), (2, 1024)])
def test_streamed_maps_equal_the_whole_sky_traced_in_memory(series, plasma, whole, tmp_path, jobs, batch):
    ordering, arrays = whole
    options = dict(OPTIONS, ordering=ordering, photon_energy_eV=2.35e-4, plasma=plasma, n_jobs=jobs,
                   batch_pixels=batch)
    streamed = raytrace.cast_sky(series, MASS, backend=HDF5Backend(tmp_path / "sky.h5"), **options)
    in_memory = raytrace.cast_sky(series, MASS, **options)
    loaded = SkyResult.load(tmp_path / "sky.h5")
    for sky in (streamed, in_memory, loaded):
        for name in MAPS:
            for k in range(MASS.size):
                assert np.array_equal(sky.map(name, k), arrays[name][:, k]), (name, k)
        for k in range(MASS.size):  # each split's maps, streamed as (masses, splits, pixels)
            assert np.array_equal(sky.split_maps(k), arrays["kernel_splits"][:, k].T), ("kernel_splits", k)
        assert np.array_equal(sky.dispersion_measure_boxes, arrays["dispersion_measure_boxes"])
    with h5py.File(tmp_path / "sky.h5", "r") as handle:
        # One mass's map is one contiguous stretch of the file (HDF5's contiguous layout).
        assert handle["kernel_boxes"].id.get_create_plist().get_layout() == h5py.h5d.CONTIGUOUS
        assert handle["kernel_boxes"].shape == (MASS.size, 12 * OPTIONS["nside"] ** 2)
        assert handle["kernel_splits"].shape == (MASS.size, 2, 12 * OPTIONS["nside"] ** 2)
    loaded.close()


def test_float32_maps_are_the_float64_maps_rounded(series, plasma, tmp_path):
    double = raytrace.cast_sky(series, MASS, plasma=plasma, **OPTIONS)
    single = raytrace.cast_sky(series, MASS, plasma=plasma, map_precision="float32",
                               backend=HDF5Backend(tmp_path / "single.h5"), **OPTIONS)
    with h5py.File(tmp_path / "single.h5", "r") as handle:
        assert handle["kernel_boxes"].dtype == np.float32
        assert handle["dispersion_measure_boxes"].dtype == np.float64
    for name in MAPS:
        for k in range(MASS.size):
            exact = double.map(name, k)
            assert np.array_equal(single.map(name, k), exact.astype(np.float32)), (name, k)
            # The rounding the run's help states: at most half a unit in the 24th bit of each value.
            assert np.all(np.abs(single.map(name, k) - exact) <= 2.0**-24 * np.abs(exact)), (name, k)


def run_file(folder, box_files, batch=16):
    path = folder / "sky.toml"
    files = ", ".join(f'"{name}"' for name in box_files)
    path.write_text(f"[boxes]\nfiles = [{files}]\n[masses]\nmin_eV = {float(MASS[0])!r}\nmax_eV = {float(MASS[-1])!r}\n"
                    f"count = {MASS.size}\n[rays]\nz_max = 0.6\nseed = 4\ninclude_background = false\n"
                    f"batch_size = {batch}\n[sky]\nnside = 8\nordering = \"RING\"\n")
    return path


def test_a_killed_sky_run_resumes_to_the_same_maps(series, plasma, box_files, tmp_path):
    reference = raytrace.cast_sky(series, MASS, plasma=plasma, ordering="RING", batch_pixels=16, **OPTIONS)
    settings = run_file(tmp_path, box_files)
    output = tmp_path / "sky.h5"
    code = ("import os, signal, sys\n"
            "from raytrace.tracing import backends\n"
            "write, written = backends.HDF5Backend.write_batch, []\n"
            "def write_then_die(self, *batch):\n"
            "    write(self, *batch)\n"
            "    written.append(1)\n"
            "    if len(written) == 9:\n"
            "        os.kill(os.getpid(), signal.SIGKILL)\n"
            "backends.HDF5Backend.write_batch = write_then_die\n"
            "from raytrace.cli import main\n"
            "sys.exit(main(sys.argv[1:]))\n")
    killed = subprocess.run([sys.executable, "-c", code, "sky", str(settings), "--output", str(output)],
                            capture_output=True, text=True, timeout=300)
    assert killed.returncode == -signal.SIGKILL, killed.stderr
    checkpoint = output.with_name(output.name + ".partial")
    with h5py.File(checkpoint, "r") as handle:
        assert handle["batch_done"][...].sum() == 9 and not handle.attrs["complete"]
    assert not output.exists()
    assert main(["sky", str(settings), "--output", str(output), "--resume"]) == 0
    assert not checkpoint.exists()
    with SkyResult.load(output) as resumed:
        for name in MAPS:
            for k in range(MASS.size):
                assert np.array_equal(resumed.map(name, k), reference.map(name, k)), (name, k)


@pytest.mark.parametrize("nside, block", [(8, 3000), (16, 250_000)], ids=["one pixel a row", "1024 pixels a row"])
def test_streamed_fits_maps_read_back_with_healpy_at_every_mass(series, plasma, tmp_path, monkeypatch, nside, block):
    # Blocks of 26 rows of one pixel (nside 8), or of 2 rows of 1024 pixels (nside 16; its 3 rows end
    # in a short block): the stream is exercised, its last block short.
    monkeypatch.setattr(fitsmaps, "BLOCK_BYTES", block)
    sky = raytrace.cast_sky(series, MASS, plasma=plasma, **dict(OPTIONS, nside=nside))
    order = [3] + [k for k in range(MASS.size) if k != 3]  # the shown mass first, as the command writes them
    path = sky.write_fits(tmp_path / "sky.fits", MASS[order], epsilon=1e-7, omega0_eV=2.35e-4, owner="run.h5")
    maps, header = healpy.read_map(str(path), field=None, h=True, nest=None)
    header = dict(header)
    assert header["NSIDE"] == nside and header["ORDERING"] == "RING" and header["RTRESULT"] == "run.h5"
    assert "COORDSYS" not in header and header["SKYFRAME"] == "box axes"
    assert len(maps) == 2 * MASS.size
    for i, k in enumerate(order):
        np.testing.assert_array_equal(maps[2 * i], sky.map("kernel", k))
        # P = epsilon^2 K / omega_0 (PHYSICS.md section 2)
        np.testing.assert_allclose(maps[2 * i + 1], 1e-14 * sky.map("kernel", k) / 2.35e-4, rtol=1e-12)
        assert header[f"MASS{i + 1}"] == pytest.approx(MASS[k], rel=1e-12, abs=0)
        assert header[f"TUNIT{2 * i + 1}"] == "eV" and f"TUNIT{2 * i + 2}" not in header
    np.testing.assert_array_equal(healpy.read_map(str(path)), sky.map("kernel", 3))  # the default map


def test_spectra_one_mass_at_a_time_from_the_file_equal_anafast_of_the_whole_map(series, plasma, tmp_path):
    in_memory = raytrace.cast_sky(series, MASS, plasma=plasma, **dict(OPTIONS, ordering="NESTED"))
    raytrace.cast_sky(series, MASS, plasma=plasma, backend=HDF5Backend(tmp_path / "sky.h5"),
                      **dict(OPTIONS, ordering="NESTED"))
    table = np.column_stack([np.arange(2, 17), np.full(15, 1e-12)])
    with SkyResult.load(tmp_path / "sky.h5") as on_disk:
        # The splits as streamed: (masses, splits, pixels), a mass's pair one contiguous read.
        assert on_disk.splits.shape == (MASS.size, 2, on_disk.npix)
        spectra = sky_spectra(on_disk, n_resamples=20)
        limit = table_limit(on_disk, 2.35e-4, table, spectra)
        for k in range(MASS.size):
            ring = healpy.reorder(in_memory.kernel[:, k], n2r=True)
            expected = healpy.anafast(ring - ring.mean())
            np.testing.assert_array_equal(on_disk.angular_power(on_disk.map("kernel", k)), expected)
            np.testing.assert_array_equal(on_disk.split_maps(k), in_memory.kernel_splits[:, :, k].T)
    # The signal spectrum read one mass at a time from the file: healpy's cross-spectrum of the in-memory
    # split maps (map2alm, alm2cl; the outside reference), over the pixel window squared.
    # The map's spectrum and the noise spectrum (of the difference map (A - B) sqrt(n_a n_b) / N), which the
    # sky's spectra derive from the splits' three, are healpy's of those maps made here.
    n_a, n_b = spectra.split_rays
    cross, full, noise = (np.zeros_like(spectra.cross) for _ in range(3))
    for k in np.flatnonzero(~spectra.flat):
        a, b = (healpy.reorder(m - m.mean(), n2r=True) for m in in_memory.kernel_splits[:, :, k].T)
        alm_a, alm_b = (healpy.map2alm(m, lmax=spectra.lmax, iter=3) for m in (a, b))
        cross[:, k] = healpy.alm2cl(alm_a, alm_b, lmax=spectra.lmax) / spectra.window**2
        for spectrum, m in ((full, (n_a * a + n_b * b) / (n_a + n_b)),
                            (noise, (a - b) * np.sqrt(n_a * n_b) / (n_a + n_b))):
            spectrum[:, k] = healpy.anafast(m, lmax=spectra.lmax, iter=3) / spectra.window**2
    assert np.any(~spectra.flat)
    np.testing.assert_allclose(spectra.cross, cross, rtol=1e-9, atol=0)
    for found, expected in ((spectra.full, full), (spectra.noise, noise)):
        np.testing.assert_allclose(found, expected, rtol=1e-9, atol=0)
    # The C_l limit from that signal spectrum of dT/T = -K (1 - e^-x)/x / omega_0 at epsilon = 1 (PHYSICS.md
    # s.6), the table's l = 2..16 (the resolved 2 nside), worked out here.
    x = 2.35e-4 / (8.617333262e-5 * 2.72548)  # h nu / k T_0 at omega_0 = 2.35e-4 eV (CODATA 2018 k_B)
    factor = (1 - np.exp(-x)) / x / 2.35e-4
    for k in range(MASS.size):
        signal = cross[2:17, k] * factor**2
        expected = np.min(1e-12 / signal[signal > 0]) ** 0.25 if np.any(signal > 0) else np.inf
        np.testing.assert_allclose(limit.epsilon_max[k], expected, rtol=1e-6)


# -- bad input, refused before any tracing ---------------------------------------------------------


@pytest.fixture
def no_tracing(monkeypatch):
    def refuse(self, pixels):
        raise AssertionError("traced before the input was checked")

    monkeypatch.setattr(SkyTracer, "trace", refuse)


@pytest.mark.parametrize("nside, message", [(12, "a power of 2 from 1 to 2048"), (4096, "a power of 2 from 1 to 2048"),
                                            (0, "a power of 2")])
def test_nside_not_a_power_of_two_or_too_large_is_refused_first(series, plasma, no_tracing, nside, message):
    with pytest.raises(InputError, match=f"nside \\(--nside\\): expected {message}"):
        raytrace.cast_sky(series, MASS, plasma=plasma, **dict(OPTIONS, nside=nside))


def test_a_disk_too_small_for_the_result_is_refused_first_in_one_line(box_files, tmp_path, monkeypatch, capsys,
                                                                        no_tracing):
    class Usage:  # what shutil.disk_usage says of a disk with 0.2 MB free
        free = 200_000  # bytes: an nside-8 result of 7 masses takes 6 x 7 x 768 x 8 + 768 x 8 bytes + 128 kB

    monkeypatch.setattr(backends.shutil, "disk_usage", lambda folder: Usage())
    settings = run_file(tmp_path, box_files)
    assert main(["sky", str(settings), "--output", str(tmp_path / "sky.h5")]) == 2
    lines = [line for line in capsys.readouterr().err.splitlines() if "error" in line]
    assert len(lines) == 1
    # 4 maps and the 2 split maps per mass (the default 4 rays per pixel), 48 batches of 16 pixels
    expected = (4 + 2) * MASS.size * 768 * 8 + 768 * 8 + 48 * 49 + (1 << 17)
    assert f"{tmp_path / 'sky.h5'} (--output): the result will take {expected / 1e6:.3g} MB on disk" in lines[0]
    assert "0.2 MB are free there" in lines[0] and "--map-precision float32" in lines[0]
    assert os.listdir(tmp_path) == ["sky.toml"]  # no checkpoint was made


# -- a run sized beforehand -----------------------------------------------------------------------


def test_estimate_prints_the_runs_size_and_time_without_writing(box_files, tmp_path, capsys):
    settings = run_file(tmp_path, box_files)
    assert main(["sky", str(settings), "--output", str(tmp_path / "sky.h5"), "--estimate", "--jobs", "2"]) == 0
    out = capsys.readouterr().out
    assert os.listdir(tmp_path) == ["sky.toml"]  # nothing traced into a file, nothing written
    # Cells: 768 pixels x 4 rays (the default) x chi(z = 0.6) / cell (astropy Planck18; 50 cMpc boxes of 16 cells).
    per_ray = Planck18.comoving_distance(0.6).to_value("Mpc") / (50 / 16)
    assert "(768 pixels x 4 rays x " in out
    assert float(out.split("x 4 rays x ")[1].split()[0]) == pytest.approx(per_ray, abs=1)  # printed to the cell
    assert "result on disk: " in out and "memory per worker: " in out and "M cells/s on 2 threads" in out
    assert "expected wall time here: " in out

    # The stated size is the file the run then writes: its datasets plus at most the stated 128 kB.
    assert main(["sky", str(settings), "--output", str(tmp_path / "sky.h5")]) == 0
    on_disk = os.path.getsize(tmp_path / "sky.h5")
    rows = (4 + 2) * MASS.size * 768 * 8 + 768 * 8 + 48 * 49  # 4 maps and 2 split maps per mass
    assert rows < on_disk <= rows + (1 << 17)
    assert f"result on disk: {(rows + (1 << 17)) / 1e6:.3g} MB" in out


def test_the_progress_bar_counts_cells_per_second_and_the_time_left(series, plasma, capsys):
    raytrace.cast_sky(series, MASS, plasma=plasma, progress=True, **OPTIONS)
    err = capsys.readouterr().err
    assert "cell/s" in err and "<" in err  # tqdm's rate, and its elapsed<remaining bracket


def test_a_refused_completion_keeps_the_sky_for_resume(series, plasma, box_files, tmp_path, monkeypatch, capsys):
    # The last write of a sky run is its completion flag, in place (errno 28 is ENOSPC, POSIX errno.h).
    # Reference: the same sky traced in memory.
    reference = raytrace.cast_sky(series, MASS, plasma=plasma, ordering="RING", batch_pixels=16, **OPTIONS)
    settings = run_file(tmp_path, box_files)
    output = tmp_path / "sky.h5"

    def disk_full(handle):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(backends, "mark_complete", disk_full)
    assert main(["sky", str(settings), "--output", str(output)]) == 2
    lines = [line for line in capsys.readouterr().err.splitlines() if ": error: " in line]
    assert len(lines) == 1 and f"{output}.partial" in lines[0] and "--resume" in lines[0]
    assert not output.exists() and sorted(os.listdir(tmp_path)) == ["sky.h5.partial", "sky.toml"]
    monkeypatch.undo()
    assert main(["sky", str(settings), "--output", str(output), "--resume"]) == 0
    with SkyResult.load(output) as resumed:
        for k in range(MASS.size):
            assert np.array_equal(resumed.map("kernel_boxes", k), reference.map("kernel_boxes", k)), k
