"""Benchmark of the sky-map stage (issues "Sky maps", 10 and 21), measured in one run.

First (issue 21) the sky's tracer against the sightline engine on the same
boxes (the demo series to z = 3, 64 masses): box cells per second per thread,
one thread, by process CPU time (what a loaded machine disturbs least), best of
a few alternating rounds, in calls of a run's progress steps; target sky >=
sightlines. Then the one-thread fixed costs of a sky (set-up, background, the
built-in one-point check: an nside-1 sky, 12 pixels) as a share of an nside-64
sky (one ray per pixel) on one thread; target: a small fraction (<= 5 %).
Then nside = 64 (49 152 pixels), 4 rays per pixel, to z = 3 through the 64^3 demo
series, 64 masses, 2 threads: the wall time after compilation (target < 120 s),
the ray length traced per second in box cells, and 2 threads against 1 on an
nside-16 map (on nside 8 the run's fixed costs, about 0.4 s that one thread does
alone, are a quarter of the 2-thread time: 1.73 there). Then the peak memory of an nside-32 sky of the demo series (z_max
6, 128 masses, default batch_pixels, 2 threads), measured in a child process
that loads the boxes as a user's run would, against 1.3 x the boxes' bytes +
300 MB (issue 10; the half-cell engine of commit 8dc5f14 needed 1.99 GB).

Usage: python benchmarks/sky_speed.py [--nside 64] [--rays-per-pixel 4] [--fixed-nside 64]
"""

import argparse
import json
import subprocess
import sys
import time
import warnings
from pathlib import Path

import numpy as np
from peakmemory import peak_rss_mb  # beside this file: a script's folder is on sys.path

import raytrace
from raytrace.boxes import load_series
from raytrace.core.errors import ProbedRangeWarning
from raytrace.physics.background import MeanPlasma
from raytrace.statistics.meancheck import MeanCheckWarning
from raytrace.tracing.checks import DEFAULT_PHOTON_ENERGY_EV, numba_threads
from raytrace.tracing.lattice import SkyTracer
from raytrace.tracing.progress import step_rows
from raytrace.tracing.sightlines import RayTracer

REPOSITORY = Path(__file__).resolve().parents[1]
DEMO = str(REPOSITORY / "cubes_demo" / "demo_z*.h5")


def cells_per_ray(series, z_max, plasma):
    """Ray length from z = 0 to ``z_max`` in cells of the boxes that serve each span."""
    tracer = SkyTracer(series, np.array([1e-13]), 1, 1, z_max, 0, DEFAULT_PHOTON_ENERGY_EV, plasma.cosmology)
    plan = tracer.plan
    cell = np.array([series.boxes[int(b)].cell_size_cMpc for b in plan.span_box])
    return float(np.sum((plan.span_chi_b - plan.span_chi_a) / cell))


def per_thread_rates(series, mass, z_max, plasma, rows=1536, rounds=3):
    """Best-of-``rounds`` box cells per CPU second on one thread: (sky tracer, sightline engine), same rows."""
    sky = SkyTracer(series, mass, 64, 1, z_max, 0, DEFAULT_PHOTON_ENERGY_EV, plasma.cosmology, True, ordering="RING")
    rays = RayTracer(series, mass, z_max, 0, DEFAULT_PHOTON_ENERGY_EV, plasma.cosmology)
    cells = sky.cells_per_row()
    assert abs(cells / rays.cells_per_row() - 1) < 1e-12  # the same ray length through the same boxes
    step = step_rows(1024, 1, cells)
    best = {"sky": np.inf, "sightlines": np.inf}
    with numba_threads(1):
        for tracer in (sky, rays):
            tracer.trace(np.arange(step))  # loads the kernels
        for _ in range(rounds):
            for name, tracer in (("sky", sky), ("sightlines", rays)):
                start = time.process_time()
                for first in range(0, rows, step):
                    tracer.trace(np.arange(1000 + first, 1000 + min(first + step, rows)))
                best[name] = min(best[name], time.process_time() - start)
    return rows * cells / best["sky"], rows * cells / best["sightlines"], step


def one_thread_costs(series, mass, z_max, plasma, nside):
    """(CPU seconds of an nside-1 sky: the fixed costs, of an nside ``nside`` sky), one thread, 1 ray per pixel."""
    options = dict(z_max=z_max, include_background=False, plasma=plasma, n_jobs=1, rays_per_pixel=1)
    seconds = []
    for size in (1, nside):
        with warnings.catch_warnings():  # 12 pixels are too few for the built-in check: its warning is not the point
            warnings.simplefilter("ignore", MeanCheckWarning)
            start = time.process_time()
            raytrace.cast_sky(series, mass, size, **options)
            seconds.append(time.process_time() - start)
    return seconds


def memory_child(nside):
    """In a fresh process: load the demo series, cast an nside sky to z = 6 with defaults, report peak RSS."""
    plasma = MeanPlasma()
    series = load_series(DEMO)
    start_mb = peak_rss_mb()
    mass = np.geomspace(3e-15, 3e-12, 128)
    sky = raytrace.cast_sky(series, mass, nside, z_max=6.0, n_jobs=2, plasma=plasma)
    print(json.dumps({"peak_mb": peak_rss_mb(), "after_imports_mb": start_mb, "npix": int(sky.npix),
                      "boxes_mb": sum(box.data.nbytes for box in series.boxes) / 2**20,
                      "memory_mapped": all(isinstance(box.data, np.memmap) for box in series.boxes)}))


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--nside", type=int, default=64)
    parser.add_argument("--rays-per-pixel", type=int, default=4)
    parser.add_argument("--z-max", type=float, default=3.0)
    parser.add_argument("--memory-nside", type=int, default=32)
    parser.add_argument("--fixed-nside", type=int, default=64, help="the sky whose one-thread fixed costs are shared")
    parser.add_argument("--memory-child", type=int, help=argparse.SUPPRESS)
    args = parser.parse_args()
    warnings.simplefilter("ignore", ProbedRangeWarning)
    if args.memory_child:
        memory_child(args.memory_child)
        return

    series = load_series(DEMO)
    plasma = MeanPlasma()
    mass = np.geomspace(1e-14, 1e-12, 64)
    options = dict(z_max=args.z_max, include_background=False, plasma=plasma)
    with warnings.catch_warnings():  # 48 rays are too few for the built-in mean check; only compiling here
        warnings.simplefilter("ignore", MeanCheckWarning)
        raytrace.cast_sky(series, mass, 2, rays_per_pixel=1, n_jobs=2, **options)  # compile

    sky_rate, line_rate, step = per_thread_rates(series, mass, args.z_max, plasma)
    print(f"per thread, one thread, demo series to z = {args.z_max:g}, {mass.size} masses, calls of {step} rows "
          f"(a run's progress step), CPU time: sky {sky_rate / 1e6:.2f} M cells/s, sightlines "
          f"{line_rate / 1e6:.2f} M cells/s: sky / sightlines {sky_rate / line_rate:.2f} (target >= 1)")
    fixed, whole = one_thread_costs(series, mass, args.z_max, plasma, args.fixed_nside)
    print(f"one-thread fixed costs (an nside-1 sky: set-up, background, built-in check): {fixed:.2f} s CPU of "
          f"{whole:.1f} s for an nside-{args.fixed_nside} sky: {100 * fixed / whole:.1f} % (target <= 5 %)")

    timings = {}
    for jobs in (1, 2):
        start = time.perf_counter()
        raytrace.cast_sky(series, mass, 16, rays_per_pixel=4, n_jobs=jobs, **options)
        timings[jobs] = time.perf_counter() - start
    start = time.perf_counter()
    sky = raytrace.cast_sky(series, mass, args.nside, rays_per_pixel=args.rays_per_pixel, n_jobs=2, **options)
    wall = time.perf_counter() - start
    n_rays = sky.npix * args.rays_per_pixel
    cells = n_rays * cells_per_ray(series, args.z_max, plasma)
    print(f"nside {args.nside}, {args.rays_per_pixel} rays/pixel ({n_rays} rays), z = 0 to {args.z_max:g}, "
          f"{mass.size} masses, demo series (64^3), exact engine, 2 threads")
    print(f"wall time {wall:.1f} s (target < 120 s); {cells / wall / 1e6:.2f} M cells/s on 2 threads")
    print(f"2 threads / 1 thread speed-up on nside 16: {timings[1] / timings[2]:.2f} (target >= 1.8)")

    child = subprocess.run([sys.executable, __file__, "--memory-child", str(args.memory_nside)],
                           capture_output=True, text=True, check=True)
    memory = json.loads(child.stdout.strip().splitlines()[-1])
    target = 1.3 * memory["boxes_mb"] + 300
    print(f"peak memory, nside {args.memory_nside} sky ({memory['npix']} pixels), demo series to z = 6, "
          f"128 masses, default batch_pixels, 2 threads, boxes "
          f"{'memory-mapped' if memory['memory_mapped'] else 'in memory'} ({memory['boxes_mb']:.0f} MB): "
          f"{memory['peak_mb']:.0f} MB in all, {memory['after_imports_mb']:.0f} MB of it before tracing "
          f"(target <= 1.3 x boxes + 300 MB = {target:.0f} MB; the half-cell engine needed 1.99 GB)")


if __name__ == "__main__":
    main()
