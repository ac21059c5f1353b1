"""Benchmark of the exact engine on a CUDA GPU against the CPU of the same machine, measured in one run.

Needs a GPU and numba-cuda (the 'gpu' extra), but for section 0; never a test. It prints,
and writes to --output:

0. The CPU engine against its own shared source compiled for the CPU with FMA
   contraction, as a GPU compiles it: the rounding a GPU adds, bar its log and pow
   (--rounding-only runs this alone, on any machine).
1. The GPU against the CPU on the test rays of tests/test_gpu_engine.py (sightlines
   through a blended random series with empty cells, copy seams and near-tangent
   events; an nside-2 sky), and on more rays of the same series: the largest
   difference per quantity (kernels as a fraction of the largest CPU kernel of
   their mass, DM relative, counts in events).
2. Speed, as ray length traced per second in box cells, on a 256^3 box (200 cMpc,
   z = 0, rays to z = 1) with 32 and 128 masses, for sightlines and for an
   nside-256 sky: the GPU (the wall time of whole calls: the rays' geometry on the
   CPU, the transfers both ways and the kernels; and again with the run's set-up, the
   boxes' upload and the kernels' compilation, added), one CPU thread and all CPU
   threads. Target of the GPU issue: >= 200 x one CPU thread.
3. A whole nside-1024 sky, 4 rays per pixel, to z = 3 through the demo series
   (cubes_demo/), 32 masses, end to end through raytrace.cast_sky (target: minutes).
   Where the time left (--budget) cannot hold it, a part of the pixels is traced and
   the whole extrapolated, and the output says so.

Usage: python benchmarks/gpu_speed.py [--cells 256] [--output gpu_bench.txt] [--budget 420]
(under numba's CUDA simulator, a quick look at the script itself:
NUMBA_ENABLE_CUDASIM=1 python benchmarks/gpu_speed.py --cells 16 --rays 16 --nside 1 --demo-nside 1
--compare-rays 8)
"""

import argparse
import os
import sys
import time
import warnings
from pathlib import Path
from types import SimpleNamespace

import numpy as np

REPOSITORY = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPOSITORY / "tests"))
import test_gpu_engine as cases  # noqa: E402  (the test rays and their comparison)

import raytrace  # noqa: E402
from raytrace.boxes import Box, BoxSeries, load_series  # noqa: E402
from raytrace.boxes.fields import lognormal_overdensity  # noqa: E402
from raytrace.tracing.checks import DEFAULT_PHOTON_ENERGY_EV, numba_threads  # noqa: E402
from raytrace.tracing.lattice import SkyTracer  # noqa: E402
from raytrace.tracing.sightlines import RayTracer  # noqa: E402

START = time.perf_counter()


class Report:
    """Lines printed as they come and kept for the output file."""

    def __init__(self, path):
        self.path, self.lines = path, []

    def __call__(self, text):
        print(text, flush=True)
        self.lines.append(text)
        if self.path:
            Path(self.path).write_text("\n".join(self.lines) + "\n")


def compare_on_test_rays(report, more_rays):
    """Section 1: the test cases, and ``more_rays`` sightlines of the same series, on the GPU and the CPU."""
    report("1. GPU against CPU on the test rays (largest difference: kernels / the mass's largest kernel, "
           "DM relative, counts in events)")
    runs = (("8 sightlines of the test", lambda device: cases.sightline_run(device)),
            (f"{more_rays} sightlines, same series", lambda device: cases.sightline_run(device, n_rays=more_rays)),
            ("nside-2 sky of the test, 4 rays a pixel", cases.sky_run))
    worst, results = {}, []
    for name, run in runs:
        with numba_threads(-1):
            cpu = run("cpu")
        gpu = run("gpu")
        results.append((cpu, gpu))
        differences = cases.largest_differences(cpu, gpu)
        events = int(np.sum(cpu.tangent_events)), float(np.sum(cpu.crossings))
        report(f"   {name}: " + ", ".join(f"{key} {value:.2e}" for key, value in differences.items())
               + f"  ({events[0]} near-tangent events, {events[1]:.0f} crossings)")
        for key, value in differences.items():
            worst[key] = max(worst.get(key, 0.0), value)
    report("   largest over all: " + ", ".join(f"{key} {value:.2e}" for key, value in worst.items()))
    try:
        for cpu, gpu in results:
            cases.check_same_rows(cpu, gpu)
        report(f"   the test's tolerances hold (kernels {cases.KERNEL_RTOL:g}, DM {cases.DM_RTOL:g}, counts exact)")
    except AssertionError as error:
        report(f"   the test's tolerances do NOT hold: {error}")


def rounding_sensitivity(report, n_rays):
    """Section 0 (CPU only): the CPU engine against the same shared source compiled for the CPU with FMA
    contraction, as NVVM compiles for a GPU (numba fastmath 'contract'), on the test's series."""
    import numba

    from raytrace.kernels import crossings, streaming
    from raytrace.kernels.targets import device_twins

    twins = device_twins(numba.njit(fastmath={"contract"}), {crossings.walk_segment: streaming.stream_segment})
    contracted_ray = twins[("raytrace.kernels.sightlines", "sightline_ray")]
    background = cases.plasma()
    series = cases.random_series(background)
    rays = np.arange(n_rays)
    report("0. the CPU engine against its source compiled with FMA contraction (the GPU's rounding, less its log "
           "and pow)")
    for uniform, omega in ((True, 1e-2), (False, DEFAULT_PHOTON_ENERGY_EV)):
        tracer = RayTracer(series, cases.case_masses(series, uniform), 0.03, 3, omega, background.cosmology)
        reference = tracer.trace(rays)
        _, starts, directions = tracer._ray_geometry(rays)
        contracted = tracer._outputs(n_rays)
        for span in range(tracer.plan.n_spans):
            arguments = tracer._piece_arguments(span, starts, directions)
            scratch = crossings.scratch(np.max(tracer.plan.piece_chi_b - tracer.plan.piece_chi_a) / arguments[11])
            for r in rays:
                contracted_ray(r, *arguments, *scratch, np.empty(3), *contracted.values())
        differences = cases.largest_differences(SimpleNamespace(**reference), SimpleNamespace(**contracted))
        report(f"   {n_rays} sightlines, photon energy {omega:.3g} eV ({int(reference['tangent_events'].sum())} "
               f"near-tangent events): " + ", ".join(f"{key} {value:.2e}" for key, value in differences.items()))


def timed(function):
    start = time.perf_counter()
    value = function()
    return time.perf_counter() - start, value


def cpu_rates(tracer, rows_one, rows_all, cells_per_row):
    """Cells/s of ``tracer`` on one thread and on all threads (best of 3; compiled before)."""
    rates = []
    for threads, rows in ((1, rows_one), (-1, rows_all)):
        with numba_threads(threads):
            tracer.trace(range(2))
            best = min(timed(lambda: tracer.trace(range(rows)))[0] for _ in range(3))
        rates.append(rows * cells_per_row / best)
    return rates


def gpu_rates(make_tracer, rows, cells_per_row):
    """(cells/s of whole calls, cells/s with the set-up added, set-up seconds) on the GPU."""
    set_up, tracer = timed(make_tracer)
    first, _ = timed(lambda: tracer.trace(range(min(rows, 1024))))  # compiles the kernels
    calls = [timed(lambda: tracer.trace(range(rows)))[0] for _ in range(2)]
    cells = rows * cells_per_row
    return cells / min(calls), cells / (min(calls) + set_up + first), set_up + first


def register_caps(report, arguments, rays, per_ray, rate):
    """The sightline kernel compiled with fewer registers a thread (more threads resident, some spilled)."""
    from numba import config

    from raytrace.kernels import gpu
    from raytrace.tracing.sightlines import GpuRayTracer

    if config.ENABLE_CUDASIM:
        return  # the simulator has no registers

    tracer = GpuRayTracer(*arguments)
    rates = []
    for cap in (128, 96):
        tracer._gpu = SimpleNamespace(cuda=gpu.cuda, trace_pieces=gpu.cuda.jit(max_registers=cap)(
            gpu.trace_pieces.py_func))
        tracer.trace(range(1024))
        rates.append(f"{cap} registers {rays * per_ray / timed(lambda: tracer.trace(range(rays)))[0] / 1e9:.3f}")
    report("      the same kernel with at most " + ", ".join(rates) + f" G cells/s (as compiled: {rate / 1e9:.3f})")


def speed_on_a_large_box(report, cells, rays, nside):
    """Section 2: ``rays`` sightlines and an nside sky through one cells^3 box, 32 and 128 masses."""
    from raytrace.tracing.lattice import GpuSkyTracer
    from raytrace.tracing.sightlines import GpuRayTracer

    plasma = cases.plasma()
    overdensity = lognormal_overdensity(cells, 200.0, 0.0, seed=2024, smoothing_cells=1.0)
    series = BoxSeries([Box.from_array(overdensity, "200 cMpc", 0.0, quantity="overdensity", plasma=plasma)])
    del overdensity
    cell = series.boxes[0].cell_size_cMpc
    report(f"2. speed, {cells}^3 box, 200 cMpc, rays to z = 1; cells/s (ray length in box cells per second); "
           f"{os.cpu_count()} CPU threads")
    gpu_sky_rate = None
    for n_masses in (32, 128):
        mass = np.geomspace(1e-15, 1e-12, n_masses)
        sightline = (series, mass, 1.0, 7, DEFAULT_PHOTON_ENERGY_EV, plasma.cosmology)
        sky = (series, mass, nside, 1, 1.0, 7, DEFAULT_PHOTON_ENERGY_EV, plasma.cosmology)
        cpu_tracer = RayTracer(*sightline)
        per_ray = cpu_tracer.plan.chi_end / cell
        one, every = cpu_rates(cpu_tracer, 128, 128 * os.cpu_count(), per_ray)
        gpu, with_set_up, set_up = gpu_rates(lambda: GpuRayTracer(*sightline), rays, per_ray)
        report(f"   sightlines, {n_masses} masses: GPU {gpu / 1e9:.3f} G cells/s ({with_set_up / 1e9:.3f} with "
               f"{set_up:.1f} s of set-up), CPU 1 thread {one / 1e6:.2f} M, all threads {every / 1e6:.1f} M; "
               f"GPU / 1 thread = {gpu / one:.0f} x, GPU / all threads = {gpu / every:.1f} x")
        if n_masses == 32:
            register_caps(report, sightline, rays, per_ray, gpu)
        cpu_sky, pixels = SkyTracer(*sky), 12 * nside**2
        one, every = cpu_rates(cpu_sky, min(128, pixels), min(128 * os.cpu_count(), pixels), per_ray)
        gpu, with_set_up, set_up = gpu_rates(lambda: GpuSkyTracer(*sky), pixels, per_ray)
        report(f"   nside-{nside} sky, {n_masses} masses: GPU {gpu / 1e9:.3f} G cells/s ({with_set_up / 1e9:.3f} with "
               f"{set_up:.1f} s of set-up), CPU 1 thread {one / 1e6:.2f} M, all threads {every / 1e6:.1f} M; "
               f"GPU / 1 thread = {gpu / one:.0f} x, GPU / all threads = {gpu / every:.1f} x")
        gpu_sky_rate = gpu_sky_rate or gpu
    return gpu_sky_rate


def demo_sky(report, budget, gpu_rate, nside):
    """Section 3: the nside sky of the demo series, whole, or a part of it extrapolated."""
    from raytrace.tracing.lattice import GpuSkyTracer

    plasma = cases.plasma()
    series = load_series(sorted(str(p) for p in (REPOSITORY / "cubes_demo").glob("demo_z*.h5")))
    mass = np.geomspace(3e-15, 3e-12, 32)
    rays_per_pixel, z_max = 4, 3.0
    tracer = SkyTracer(series, mass, 1, 1, z_max, 2026, DEFAULT_PHOTON_ENERGY_EV, plasma.cosmology)
    plan = tracer.plan
    per_ray = float(np.sum((plan.span_chi_b - plan.span_chi_a)
                           / np.array([series.boxes[int(b)].cell_size_cMpc for b in plan.span_box])))
    cells = 12 * nside**2 * rays_per_pixel * per_ray
    left = budget - (time.perf_counter() - START)
    estimate = 1.5 * cells / gpu_rate + 60.0  # the 256^3 sky's rate, host work and the built-in check on top
    report(f"3. nside-{nside} sky, {rays_per_pixel} rays a pixel, z = {z_max:g}, demo series, {mass.size} masses: "
           f"{cells:.3g} cells; estimated {estimate:.0f} s, {left:.0f} s left")
    if estimate < left:
        seconds, sky = timed(lambda: raytrace.cast_sky(series, mass, nside, z_max, seed=2026, rays_per_pixel=4,
                                                       include_background=False, plasma=plasma, device="gpu",
                                                       n_jobs=-1))
        report(f"   whole sky end to end (cast_sky: tracing, RING order, built-in check): {seconds:.1f} s "
               f"= {seconds / 60:.2f} min ({cells / seconds / 1e9:.2f} G cells/s); device {sky.run['device']}")
        return
    fraction = max(0.01, min(0.5, (left - 30.0) / estimate))
    pixels = np.arange(max(1, int(fraction * 12 * nside**2)))
    gpu_tracer = GpuSkyTracer(series, mass, nside, rays_per_pixel, z_max, 2026, DEFAULT_PHOTON_ENERGY_EV,
                                       plasma.cosmology)
    seconds, _ = timed(lambda: gpu_tracer.trace(pixels))
    whole = seconds * 12 * nside**2 / pixels.size
    report(f"   traced {pixels.size} of {12 * nside**2} pixels in {seconds:.1f} s: the whole sky's tracing "
           f"extrapolated to {whole:.0f} s = {whole / 60:.1f} min (not run whole: too little time left)")


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--cells", type=int, default=256)
    parser.add_argument("--rays", type=int, default=540_672, help="GPU sightlines per call (132 x 4096: one call "
                        "on an H200)")
    parser.add_argument("--nside", type=int, default=256, help="the speed section's sky")
    parser.add_argument("--compare-rays", type=int, default=4096, help="sightlines of the comparison beyond the test's")
    parser.add_argument("--demo-nside", type=int, default=1024)
    parser.add_argument("--output", default=None, help="also write the lines to this file")
    parser.add_argument("--budget", type=float, default=420.0, help="seconds the whole run may take")
    parser.add_argument("--rounding-only", action="store_true", help="section 0 alone: needs no GPU")
    args = parser.parse_args()
    warnings.simplefilter("ignore")  # probed-range notes, too few rays for the built-in check, launch-size hints
    report = Report(args.output)
    rounding_sensitivity(report, args.compare_rays)
    if args.rounding_only:
        return
    from numba import config

    from raytrace.kernels import gpu
    from raytrace.tracing import gputrace

    if config.ENABLE_CUDASIM:
        # The simulator runs a block's threads as Python threads that contend for a lock: blocks of 1 thread
        # (as in tests/test_gpu_engine.py; a thread shares nothing with its block, so no row changes).
        gputrace.THREADS_PER_BLOCK = 1
    device = gpu.cuda.get_current_device()
    name = getattr(device, "name", "the CUDA simulator")
    report(f"device: {name.decode() if isinstance(name, bytes) else name}, "
           f"{getattr(device, 'MULTIPROCESSOR_COUNT', '?')} multiprocessors; numpy {np.__version__}; "
           f"CPU threads {os.cpu_count()}")
    compare_on_test_rays(report, args.compare_rays)
    rate = speed_on_a_large_box(report, args.cells, args.rays, args.nside)
    demo_sky(report, args.budget, rate, args.demo_nside)
    report(f"total {time.perf_counter() - START:.0f} s")


if __name__ == "__main__":
    main()
