"""The GPU path of the exact engine against the CPU engine, on machines without a GPU.

The chain of references: the CPU engine is checked against the independent tracer
written with scipy and astropy (tests/reference_tracer.py, in test_exact_crossings.py:
every crossing, kernel and DM per ray); here the CUDA kernels must reproduce the CPU
engine per ray and mass. They run under numba's CUDA simulator, which executes the
kernels' Python source thread by thread; NUMBA_ENABLE_CUDASIM=1 must be set before
numba.cuda is imported, so the simulated runs happen in one child process (this file
run as a script) and the tests here compare what it wrote. The boxes are tiny (12^3)
and the rays few: the simulator is slow.

The same cases and comparison run on a real GPU in benchmarks/gpu_speed.py, which
prints the largest per-mass difference there.
"""

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy import ndimage

import raytrace
from raytrace.boxes import Box, BoxSeries
from raytrace.core.errors import InputError
from raytrace.physics.background import MeanPlasma
from raytrace.physics.ionisation import IonisationHistory
from raytrace.tracing.redshiftbins import (
    DEFAULT_BIN_COUNT,
    DEFAULT_DENSITY_EDGES,
    run_bins,
)

ROWS = ("kernel_boxes", "crossings", "tangent_events", "kernel_tangent", "dispersion_measure_boxes")
#: Per case, the rows compared besides ROWS: each ray's kernel per redshift cell (the tracers' own float64
#: rows, which a run reduces batch by batch), a sky's maps per shell.
EXTRA_ROWS = {"cells": ("kernel_cells",), "sky": ("kernel_shells_boxes",)}
X_E = 1.08  # constant ionisation: no CAMB needed in the child or on a GPU machine (PHYSICS.md section 5)
#: A GPU's kernels equal the CPU's to this fraction of the largest kernel of their mass (over the rows), and its
#: DM to this relative difference; counts exactly. The simulator computes in the CPU's order with the CPU's IEEE
#: operations: measured 0. A GPU contracts multiply-adds into FMAs and has its own log and pow: the shared source
#: compiled for the CPU with contraction (benchmarks/gpu_speed.py --rounding-only, 2 x 4096 rays of this series)
#: measured 2.0e-11 (kernels), 5.4e-16 (DM), counts equal; 1e-9 leaves a factor 50 for the GPU's log and pow and a
#: root that takes the bracketed path on one side (it moves by < ROOT_TOLERANCE = 1e-8 cells); DM a factor 2000.
KERNEL_RTOL = 1e-9
DM_RTOL = 1e-12


def plasma():
    return MeanPlasma(None, IonisationHistory.constant(X_E))


def random_series(background):
    """Three 12^3 snapshots (z = 0, 0.01, 0.02) of lumpy fields with ~15 % empty cells, blended."""
    n_com = float(background.mean_comoving_electron_density_cm3(0.0))
    boxes = []
    for i, z in enumerate((0.0, 0.01, 0.02)):
        rng = np.random.default_rng(10 + i)
        field = ndimage.gaussian_filter(rng.standard_normal((12,) * 3), 1.0, mode="wrap")
        values = np.exp(field / field.std())
        values /= values.mean()
        values[values < 0.4] = 0.0
        boxes.append(Box.from_array(values * n_com, "12 cMpc", z, quantity="n_e_comoving", plasma=background))
    return BoxSeries(boxes, blend=True)


def case_masses(series, uniform):
    """Masses inside the boxes' range; log-uniform, or not (then the first count takes the binary search)."""
    _, high = series.boxes[0].plasma_mass_range(0.0, 0.03)
    mass = np.geomspace(high * 0.05, high * 0.9, 8)
    return mass if uniform else np.sort(mass * np.linspace(0.93, 1.05, mass.size))


def sightline_run(device, **options):
    """8 sightlines to z = 0.03 (~11 box lengths: copy seams, two blended spans and an unblended one);
    a high photon energy widens the Airy window, so near-tangent events are many."""
    background = plasma()
    series = random_series(background)
    return raytrace.cast_sightlines(series, case_masses(series, True), options.pop("n_rays", 8), z_max=0.03,
                                    include_background=False, plasma=background, seed=3, photon_energy_eV=1e-2,
                                    device=device, **options)


def sky_run(device):
    """An nside-2 sky, 4 rays per pixel (averaged on the device), to z = 0.008 through the blended lattice,
    with maps of 3 redshift shells."""
    background = plasma()
    series = random_series(background)
    return raytrace.cast_sky(series, case_masses(series, False), 2, z_max=0.008, include_background=False,
                             plasma=background, seed=3, rays_per_pixel=4, photon_energy_eV=1e-2, shells_z=3,
                             device=device)


def default_bins(mass, background):
    """The run's redshift cells to z = 0.03 with the default bins and density classes."""
    return run_bins(DEFAULT_BIN_COUNT, DEFAULT_DENSITY_EDGES, mass, background, 0.03, 0.03, False)


def cell_rows(device):
    """The 8 rays of :func:`sightline_run` traced with the default redshift bins and density classes: each
    ray's rows, with its kernel per redshift cell (``kernel_cells``, float64)."""
    from types import SimpleNamespace

    from raytrace.tracing.sightlines import GpuRayTracer, RayTracer

    background = plasma()
    series = random_series(background)
    mass = case_masses(series, True)
    tracer = (RayTracer if device == "cpu" else GpuRayTracer)(series, mass, 0.03, 3, 1e-2, background.cosmology,
                                                               default_bins(mass, background))
    return SimpleNamespace(run={"device": tracer.device}, **tracer.trace(np.arange(8)))


def largest_differences(cpu, gpu):
    """Per quantity, the largest difference GPU - CPU over rows and masses: kernels as a fraction of the
    largest CPU kernel of their mass, DM relative, counts in events."""
    out = {}
    for name in [name for name in ROWS + ("kernel_cells", "kernel_shells_boxes") if hasattr(cpu, name)]:
        a, b = np.asarray(getattr(cpu, name), dtype=float), np.asarray(getattr(gpu, name), dtype=float)
        if name.startswith("kernel"):
            scale = np.max(np.abs(a), axis=0)
            out[name] = float(np.max(np.abs(b - a)[:, scale > 0] / scale[scale > 0], initial=0.0))
        elif name.startswith("dispersion"):
            out[name] = float(np.max(np.abs(b - a) / np.abs(a)))
        else:
            out[name] = float(np.max(np.abs(b - a)))
    return out


def check_same_rows(cpu, gpu):
    """The GPU's rows equal the CPU's: counts exactly, kernels and DM to KERNEL_RTOL and DM_RTOL."""
    differences = largest_differences(cpu, gpu)
    assert differences["crossings"] == 0 and differences["tangent_events"] == 0, differences
    assert differences["kernel_boxes"] <= KERNEL_RTOL and differences["kernel_tangent"] <= KERNEL_RTOL, differences
    assert differences["dispersion_measure_boxes"] <= DM_RTOL, differences
    assert all(differences[name] <= KERNEL_RTOL for name in ("kernel_cells", "kernel_shells_boxes")
               if name in differences), differences
    return differences


# -- the child process: everything that needs the simulator -----------------------------------------------
def simulate(path):
    """Run the cases on the CPU and on the simulated GPU; write their rows and facts to ``path`` (npz)."""
    import warnings

    from raytrace.tracing import gputrace

    warnings.simplefilter("ignore")  # the probed-range notes and numba's launch-size hints
    # The simulator runs a block's threads as Python threads that poll and lock against each other: the nside-2
    # sky took 840 s in blocks of 128 threads, 4 s in blocks of 1 (measured on 2 cores). A thread traces one
    # ray and shares nothing with its block, so the block size changes no result; the call-size cases below
    # use blocks of 3, whose last block is part empty (the guard on the ray index).
    gputrace.THREADS_PER_BLOCK = 1
    runs = {"sightlines": [sightline_run(device) for device in ("cpu", "gpu")],
            "sky": [sky_run(device) for device in ("cpu", "auto")],
            "cells": [cell_rows(device) for device in ("cpu", "gpu")]}
    # Against one call for all 8 rays: batches of 5 split into calls of 3 rays (3 a multiprocessor: the
    # simulator has one), and batches of 2 grouped into calls of 5.
    gputrace.THREADS_PER_BLOCK = 3
    gputrace.RAYS_PER_MULTIPROCESSOR = 3
    runs["split_calls"] = [runs["sightlines"][1], sightline_run("gpu", batch_size=5)]
    gputrace.RAYS_PER_MULTIPROCESSOR = 5
    runs["grouped_calls"] = [runs["sightlines"][1], sightline_run("gpu", batch_size=2)]
    # A series above a third of the device's free memory goes to it span by span on every call: the
    # simulator's free memory set to 2.5 x the boxes' bytes (3 x 12^3 float32), which also cuts the calls to
    # a few rays each. The warning that says so is kept as a fact.
    from raytrace.kernels import gpu

    gputrace.RAYS_PER_MULTIPROCESSOR = 4096
    box_bytes = 3 * 12**3 * 4
    context = type(gpu.cuda.current_context())
    context.get_memory_info = lambda self: (int(2.5 * box_bytes), int(2.5 * box_bytes))
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        runs["spans"] = [runs["sightlines"][0], sightline_run("gpu")]
    arrays = {f"{case}_{which}_{name}": np.asarray(getattr(result, name))
              for case, results in runs.items() for which, result in zip(("a", "b"), results)
              for name in ROWS + EXTRA_ROWS.get(case, ())}
    facts = {f"{case}_{which}_run": result.run for case, results in runs.items()
             for which, result in zip(("a", "b"), results)}
    facts["spans_warnings"] = [str(warning.message) for warning in caught]
    np.savez(path, facts=json.dumps(facts), **arrays)


@pytest.fixture(scope="module")
def simulated(tmp_path_factory):
    path = tmp_path_factory.mktemp("simulated") / "rows.npz"
    environment = dict(os.environ, NUMBA_ENABLE_CUDASIM="1")
    environment["PYTHONPATH"] = os.pathsep.join([str(Path(raytrace.__file__).parents[1]),
                                                 environment.get("PYTHONPATH", "")])
    subprocess.run([sys.executable, __file__, "--simulate", str(path)], env=environment, check=True, timeout=600)
    with np.load(path) as stored:
        arrays = {name: stored[name] for name in stored.files if name != "facts"}
        facts = json.loads(str(stored["facts"]))
    return arrays, facts


class Rows:
    """One run's rows as read back from the child's file."""

    def __init__(self, arrays, case, which):
        for name in ROWS + EXTRA_ROWS.get(case, ()):
            setattr(self, name, arrays[f"{case}_{which}_{name}"])


def test_simulated_gpu_sightlines_reproduce_the_cpu_engine_per_ray_and_mass(simulated):
    arrays, facts = simulated
    cpu, gpu = Rows(arrays, "sightlines", "a"), Rows(arrays, "sightlines", "b")
    assert facts["sightlines_b_run"]["device"] == "gpu" and facts["sightlines_a_run"]["device"] == "cpu"
    # The case has what it is meant to test: empty cells, near-tangent events, crossings on most rays and masses.
    assert cpu.tangent_events.sum() >= 10 and np.mean(cpu.crossings > 0) > 0.5
    differences = check_same_rows(cpu, gpu)
    assert max(differences.values()) == 0.0  # the simulator follows the CPU's arithmetic: measured 0


def test_simulated_gpu_sky_reproduces_the_cpu_sky_at_nside_2(simulated):
    arrays, facts = simulated
    cpu, gpu = Rows(arrays, "sky", "a"), Rows(arrays, "sky", "b")
    assert cpu.kernel_boxes.shape[0] == 48 and cpu.tangent_events.sum() >= 1
    assert facts["sky_b_run"]["device"] == "gpu"  # auto took the simulated GPU
    shells = cpu.kernel_shells_boxes
    assert shells.shape == (48, 3, 8) and np.count_nonzero(shells.any(axis=(0, 2))) >= 2  # crossings in 2+ shells
    differences = check_same_rows(cpu, gpu)
    assert "kernel_shells_boxes" in differences and max(differences.values()) == 0.0


def test_simulated_gpu_kernel_per_redshift_cell_equals_the_cpus_per_ray_and_cell(simulated):
    # The GPU carries each ray's kernel per redshift cell (default bins and density classes) as the CPU does.
    arrays, facts = simulated
    cpu, gpu = Rows(arrays, "cells", "a"), Rows(arrays, "cells", "b")
    assert facts["cells_a_run"]["device"] == "cpu" and facts["cells_b_run"]["device"] == "gpu"
    # The case has what it is meant to test: crossings spread over several cells of most rays, and the
    # cells of a ray add up to its kernel (PHYSICS.md section 11; measured 2e-16, the order of a float64 sum).
    assert cpu.kernel_cells.shape[0] == 8 and cpu.kernel_cells.shape[1] > 3
    assert np.mean(np.count_nonzero(cpu.kernel_cells.any(axis=2), axis=1) >= 2) > 0.5
    np.testing.assert_allclose(cpu.kernel_cells.sum(axis=1), cpu.kernel_boxes, rtol=1e-14, atol=0)
    differences = check_same_rows(cpu, gpu)
    assert "kernel_cells" in differences and max(differences.values()) == 0.0  # simulator: the CPU's arithmetic
    np.testing.assert_array_equal(gpu.kernel_cells, cpu.kernel_cells)


def test_gpu_rows_do_not_depend_on_the_size_of_calls_or_batches(simulated):
    arrays, _ = simulated
    for case in ("split_calls", "grouped_calls"):
        one_call, other_calls = Rows(arrays, case, "a"), Rows(arrays, case, "b")
        for name in ROWS:
            np.testing.assert_array_equal(getattr(other_calls, name), getattr(one_call, name))


def test_boxes_sent_span_by_span_give_the_cpus_rows(simulated):
    # Boxes above a third of the free memory go to the device span by span on every call, said in one line.
    arrays, facts = simulated
    cpu, gpu = Rows(arrays, "spans", "a"), Rows(arrays, "spans", "b")
    assert facts["spans_a_run"]["device"] == "cpu" and facts["spans_b_run"]["device"] == "gpu"
    assert any("span by span" in message and "device (--device)" in message for message in facts["spans_warnings"])
    assert max(check_same_rows(cpu, gpu).values()) == 0.0


def test_the_comparison_fails_on_a_small_slip(simulated):
    # The tolerances bite: a kernel (also a cell's) 1e-8 of its mass's largest off, a DM 1e-11 off, one crossing more.
    arrays, _ = simulated
    cpu = Rows(arrays, "cells", "a")
    for name, change in (("kernel_boxes", lambda a: a + 1e-8 * a.max(axis=0)),
                         ("kernel_tangent", lambda a: a + 1e-8 * a.max(axis=0)),
                         ("dispersion_measure_boxes", lambda a: a * (1 + 1e-11)),
                         ("crossings", lambda a: a + (np.arange(a.size).reshape(a.shape) == 7)),
                         ("kernel_cells", lambda a: a + 1e-8 * a.max(axis=0))):
        slipped = Rows(arrays, "cells", "a")
        setattr(slipped, name, change(getattr(cpu, name)))
        with pytest.raises(AssertionError):
            check_same_rows(cpu, slipped)


def test_the_streaming_walk_gives_the_table_walks_bits_on_the_cpu():
    # The GPU walks a segment cell by cell (kernels/streaming.py), the CPU from tables: compiled for the
    # CPU, the two must agree bit for bit on random segments through a box with empty cells, blended, each
    # crossing's kernel also in its redshift cell (default bins and classes).
    from raytrace.kernels.crossings import scratch, walk_segment
    from raytrace.kernels.streaming import stream_segment
    from raytrace.physics.constants import C_MPC_S, HBAR_EV_S, PLASMA_MASS2_PER_DENSITY
    from raytrace.tracing.rays import plan_rays

    background = plasma()
    series = random_series(background)
    mass = case_masses(series, False)
    targets = mass**2 / PLASMA_MASS2_PER_DENSITY
    plan = plan_rays(background.cosmology, series, 0.03)
    bins = default_bins(mass, background)
    rng = np.random.default_rng(5)
    lo, hi = series.boxes[0], series.boxes[1]
    cells_hit = set()
    for segment in range(20):
        start = rng.random(3) * 12
        direction = rng.standard_normal(3)
        direction /= np.linalg.norm(direction)
        if segment % 5 == 0:
            direction[segment % 3] = 0.0  # a ray parallel to a face: the traversal's infinite steps
            direction /= np.linalg.norm(direction)
        rows = []
        for walk in (walk_segment, stream_segment):
            kernel, count = np.zeros(mass.size), np.zeros(mass.size, np.int32)
            tangent_count, tangent_kernel = np.zeros(mass.size, np.int32), np.zeros(mass.size)
            cells, corners, points, marks = scratch(40.0)
            cell_kernel = np.zeros((bins.n_cells, mass.size))
            dm = walk(lo.data, hi.data, lo.comoving_scale, hi.comoving_scale, segment % 2 == 0, 0.0, 0.01, start,
                      direction, 30.0, 20.0, 1.0, plan.one_plus_z, plan.hubble_over_c, 1.0 / plan.chi_step, targets,
                      np.log(targets), mass**2, False, HBAR_EV_S * C_MPC_S, PLASMA_MASS2_PER_DENSITY, 1e-2, cells,
                      corners, points, marks, kernel, count, tangent_count, tangent_kernel, bins.inner_opz,
                      cell_kernel)
            rows.append((dm, kernel, count, tangent_count, tangent_kernel, cell_kernel))
        cells_hit |= set(np.flatnonzero(cell_kernel.any(axis=1)))
        for table, streamed in zip(*rows):
            np.testing.assert_array_equal(streamed, table)
    assert len(cells_hit) >= 2  # the segments' kernels land in several redshift cells


# -- choosing the device ---------------------------------------------------------------------------------------
def small_box():
    background = plasma()
    return random_series(background).boxes[0], background


# Two rays are too few for the built-in one-point check; only the device is looked at here.
@pytest.mark.filterwarnings("ignore::raytrace.statistics.meancheck.MeanCheckWarning")
def test_gpu_without_numba_cuda_is_one_line_naming_the_option_and_auto_takes_the_cpu(monkeypatch):
    box, background = small_box()
    mass = case_masses(BoxSeries([box]), True)
    monkeypatch.setitem(sys.modules, "numba.cuda", None)  # as if numba-cuda were not installed
    refused = r"^device \(--device\): 'gpu' asked for, but numba-cuda is not installed"
    with pytest.raises(InputError, match=refused) as caught:
        raytrace.cast_sightlines(box, mass, 2, z_max=0.01, include_background=False, plasma=background, device="gpu")
    assert "\n" not in str(caught.value)
    result = raytrace.cast_sightlines(box, mass, 2, z_max=0.01, include_background=False, plasma=background,
                                      device="auto")
    assert result.run["device"] == "cpu" and "numba-cuda is not installed" in result.run["device_note"]
    with pytest.raises(InputError, match=r"^device \(--device\): expected one of cpu, gpu, auto"):
        raytrace.cast_sightlines(box, mass, 2, z_max=0.01, include_background=False, plasma=background,
                                 device="cuda")


_NO_DEVICE_CHILD = """
import json, sys
import numpy as np
import raytrace
from raytrace.core.errors import InputError
sys.path.insert(0, sys.argv[1])
from test_gpu_engine import case_masses, small_box
from raytrace.boxes import BoxSeries
box, background = small_box()
mass = case_masses(BoxSeries([box]), True)
out = {}
try:
    raytrace.cast_sky(box, mass, 1, z_max=0.01, include_background=False, plasma=background, device="gpu")
except InputError as error:
    out["error"] = str(error)
result = raytrace.cast_sky(box, mass, 1, z_max=0.01, include_background=False, plasma=background, device="auto")
out["run"] = result.run
print(json.dumps(out))
"""


def test_gpu_without_a_device_is_one_line_and_auto_takes_the_cpu():
    # numba-cuda installed, but no GPU: CUDA_VISIBLE_DEVICES="" hides any the machine has.
    pytest.importorskip("numba_cuda")
    environment = {name: value for name, value in os.environ.items() if name != "NUMBA_ENABLE_CUDASIM"}
    environment.update(CUDA_VISIBLE_DEVICES="", PYTHONPATH=os.pathsep.join(
        [str(Path(raytrace.__file__).parents[1]), environment.get("PYTHONPATH", "")]))
    child = subprocess.run([sys.executable, "-c", _NO_DEVICE_CHILD, str(Path(__file__).parent)], env=environment,
                           capture_output=True, text=True, timeout=300, check=True)
    out = json.loads(child.stdout.strip().splitlines()[-1])
    assert out["error"].startswith("device (--device): 'gpu' asked for, but numba-cuda")
    assert "\n" not in out["error"]
    assert out["run"]["device"] == "cpu" and out["run"]["device_note"].startswith("auto: no GPU (numba-cuda")


if __name__ == "__main__" and sys.argv[1:2] == ["--simulate"]:
    simulate(sys.argv[2])
