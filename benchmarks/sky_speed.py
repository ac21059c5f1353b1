"""Benchmark of the sky-map stage (issue "Sky maps"), measured in one run.

nside = 64 (49 152 pixels), 4 rays per pixel, to z = 3 through the 64^3 demo
series, 64 masses, 2 threads: the wall time after compilation (target < 120 s),
the sample rate, and 2 threads against 1 on a smaller map.

Usage: python benchmarks/sky_speed.py [--nside 64] [--rays-per-pixel 4]
"""

import argparse
import time
import warnings
from pathlib import Path

import numpy as np

import raytrace
from raytrace.background import MeanPlasma
from raytrace.boxes import load_series
from raytrace.errors import ProbedRangeWarning

REPOSITORY = Path(__file__).resolve().parents[1]


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--nside", type=int, default=64)
    parser.add_argument("--rays-per-pixel", type=int, default=4)
    parser.add_argument("--z-max", type=float, default=3.0)
    args = parser.parse_args()
    warnings.simplefilter("ignore", ProbedRangeWarning)

    series = load_series(str(REPOSITORY / "cubes_demo" / "demo_z*.h5"))
    plasma = MeanPlasma()
    mass = np.geomspace(1e-14, 1e-12, 64)
    options = dict(z_max=args.z_max, include_background=False, plasma=plasma)
    raytrace.cast_sky(series, mass, 2, rays_per_pixel=1, n_jobs=2, **options)  # compile

    timings = {}
    for jobs in (1, 2):
        start = time.perf_counter()
        raytrace.cast_sky(series, mass, 8, rays_per_pixel=4, n_jobs=jobs, **options)
        timings[jobs] = time.perf_counter() - start
    start = time.perf_counter()
    sky = raytrace.cast_sky(series, mass, args.nside, rays_per_pixel=args.rays_per_pixel, n_jobs=2, **options)
    wall = time.perf_counter() - start
    n_rays = sky.npix * args.rays_per_pixel
    samples = n_rays * raytrace.sky.SkyTracer(series, mass, 2, 1, args.z_max, 0, 0.5, plasma.cosmology).plan.n_samples
    print(f"nside {args.nside}, {args.rays_per_pixel} rays/pixel ({n_rays} rays), z = 0 to {args.z_max:g}, "
          f"{mass.size} masses, demo series (64^3), 2 threads")
    print(f"wall time {wall:.1f} s (target < 120 s); {samples / wall / 1e6:.1f} M samples/s")
    print(f"2 threads / 1 thread speed-up on nside 8: {timings[1] / timings[2]:.2f}")


if __name__ == "__main__":
    main()
