"""Benchmark of a sky at scale (issue 21): memory that does not grow with nside, and a run sized beforehand.

Every figure comes from a child process running the command line as a user
would (``raytrace sky``, ``raytrace limits``), its peak resident memory read
from /proc/self/status (VmHWM) as it ends:

(a) skies of nside 64, 128 and 256 (49 152 to 786 432 pixels), 32 masses, two
    rays per pixel (two independent splits of one ray each: the split maps are
    stored and read too) to z = 0.5 through one 128^3 series (snapshots z = 0 and 0.5
    of 200 cMpc, contiguous float32, so memory-mapped: 16 MB), 2 threads, the
    maps streamed to the result file: the growth of the peak from nside 64 to 256
    against 10 % of the boxes' bytes + 50 MB (target; maps held in memory grow
    by 48 bytes x pixels x masses, 1.2 GB at nside 256);
(b) ``raytrace limits --sky`` on each result (its signal and noise spectra,
    the Planck TT test): the nside-256 peak against 1.3 x one map (6.3 MB) +
    300 MB (target), and its growth from nside 64, which is what a map's size
    can change (the imported libraries take about 200 MB whatever the sky);
(c) ``raytrace sky --estimate`` of the nside-128 run against that run's wall
    time (target: within a factor 1.5).

The default sizes are modest: this machine has 2 cores shared with others (a
neighbour's load stretches the measured wall times alike, not the memory).

Usage: python benchmarks/sky_scale.py [--nsides 64 128 256] [--cells 128] [--masses 32] [--z-max 0.5]
                                      [--rays-per-pixel 2]
"""

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
import warnings
from pathlib import Path

from peakmemory import peak_rss_mb  # beside this file: a script's folder is on sys.path

REPOSITORY = Path(__file__).resolve().parents[1]
UNITS = {"s": 1.0, "min": 60.0, "h": 3600.0, "days": 86400.0}


def child(argv):
    """In a fresh process: run the command line, then print its peak memory and wall time as JSON."""
    from raytrace.cli import main

    start = time.perf_counter()
    status = main(argv)
    print(json.dumps({"status": status, "peak_mb": peak_rss_mb(), "wall_s": time.perf_counter() - start}))


def run_child(argv):
    """Run ``raytrace argv`` in a child process; (its JSON figures, its stdout)."""
    environment = {**os.environ, "PYTHONPATH": str(REPOSITORY)}
    done = subprocess.run([sys.executable, __file__, "--child", json.dumps(argv)], capture_output=True, text=True,
                          env=environment)
    lines = done.stdout.strip().splitlines()
    if done.returncode != 0 or not lines:
        raise RuntimeError(f"raytrace {' '.join(argv)} failed:\n{done.stderr[-3000:]}")
    figures = json.loads(lines[-1])
    if figures["status"] != 0:
        raise RuntimeError(f"raytrace {' '.join(argv)} exited {figures['status']}:\n{done.stderr[-3000:]}")
    return figures, "\n".join(lines[:-1])


def write_series(folder, cells, box_size):
    """One log-normal series (z = 0 and 0.5), contiguous float32 files that the loader memory-maps."""
    from raytrace.boxes.fields import lognormal_overdensity
    from raytrace.boxes.gridding import write_gridded_box
    from raytrace.physics.background import MeanPlasma

    plasma = MeanPlasma()
    paths = []
    for redshift in (0.0, 0.5):
        overdensity = lognormal_overdensity(cells, box_size, redshift, seed=2121, smoothing_cells=1.0)
        density = overdensity * float(plasma.mean_comoving_electron_density_cm3(redshift))
        paths.append(write_gridded_box(folder / f"box_z{redshift:g}.h5", density, box_size, redshift))
    return [str(path) for path in paths]


def seconds(text):
    """'67.2 s', '12.5 min' ... as seconds."""
    number, unit = text.split()[:2]
    return float(number) * UNITS[unit.rstrip(",;")]


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--nsides", type=int, nargs="+", default=[64, 128, 256])
    parser.add_argument("--cells", type=int, default=128)
    parser.add_argument("--box-size", type=float, default=200.0, help="comoving Mpc")
    parser.add_argument("--masses", type=int, default=32)
    parser.add_argument("--z-max", type=float, default=0.5)
    parser.add_argument("--jobs", type=int, default=2)
    parser.add_argument("--rays-per-pixel", type=int, default=2)
    parser.add_argument("--child", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child:
        warnings.simplefilter("ignore")
        child(json.loads(args.child))
        return

    with tempfile.TemporaryDirectory(prefix="sky_scale_") as folder:
        folder = Path(folder)
        boxes = write_series(folder, args.cells, args.box_size)
        boxes_mb = sum(os.path.getsize(path) for path in boxes) / 2**20
        common = ["--boxes", *boxes, "--mass-min", "5e-15", "--mass-max", "5e-14", "--mass-count", str(args.masses),
                  "--z-max", str(args.z_max), "--no-include-background", "--jobs", str(args.jobs), "--seed", "3",
                  "--rays-per-pixel", str(args.rays_per_pixel)]
        print(f"series: 2 snapshots of {args.cells}^3 cells, {args.box_size:g} cMpc ({boxes_mb:.0f} MB, "
              f"memory-mapped); {args.masses} masses, {args.rays_per_pixel} rays per pixel, z = 0 to {args.z_max:g}, "
              f"{args.jobs} threads; "
              f"load average {os.getloadavg()[0]:.1f}")
        run_child(["sky", *common, "--nside", "1"])  # compiles the kernels once (numba caches them): not measured
        peaks, walls = {}, {}
        sized = args.nsides[len(args.nsides) // 2]
        for nside in args.nsides:
            output = folder / f"sky{nside}.h5"
            if nside == sized:
                _, printed = run_child(["sky", *common, "--nside", str(nside), "--output", str(output),
                                        "--estimate"])
                estimate = printed
            figures, _ = run_child(["sky", *common, "--nside", str(nside), "--output", str(output)])
            peaks[nside], walls[nside] = figures["peak_mb"], figures["wall_s"]
            print(f"(a) nside {nside:5d} ({12 * nside**2:7d} pixels): peak {peaks[nside]:6.0f} MB, wall "
                  f"{walls[nside]:6.1f} s, result {os.path.getsize(output) / 2**20:6.1f} MB")
        low, high = min(args.nsides), max(args.nsides)
        growth = peaks[high] - peaks[low]
        target = 0.1 * boxes_mb + 50
        in_memory = 48 * 12 * high**2 * args.masses / 2**20
        print(f"    growth nside {low} -> {high}: {growth:.0f} MB against 10 % of the boxes + 50 MB = {target:.0f} MB "
              f"(ratio {growth / target:.2f}, target <= 1); maps held in memory would add {in_memory:.0f} MB")

        one_map_mb = 12 * high**2 * 8 / 2**20
        limits = {nside: run_child(["limits", "--sky", str(folder / f"sky{nside}.h5")])[0]["peak_mb"]
                  for nside in (low, high)}
        target = 1.3 * one_map_mb + 300
        print(f"(b) limits --sky: peak {limits[low]:.0f} MB at nside {low}, {limits[high]:.0f} MB at nside {high}: "
              f"against 1.3 x one map ({one_map_mb:.1f} MB) + 300 MB = {target:.0f} MB ratio "
              f"{limits[high] / target:.2f} (target <= 1); growth {limits[high] - limits[low]:.0f} MB against one "
              f"map of nside {high}, {one_map_mb:.1f} MB, and a bootstrap block (8 MB of counts, 8 MB of weights)")

        expected = seconds(estimate.split("expected wall time here: ")[1])
        print(f"(c) --estimate of the nside-{sized} run: {expected:.1f} s expected, {walls[sized]:.1f} s measured "
              f"(ratio {walls[sized] / expected:.2f}, target 0.67 to 1.5); the estimate said:")
        for line in estimate.splitlines():
            print(f"    {line}")


if __name__ == "__main__":
    main()
