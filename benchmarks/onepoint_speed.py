"""Benchmark of the one-point-PDF mean (raytrace.pdf_mean), measured in one run and printed as ratios.

(a) pdf_mean of a series of 7 snapshots (z = 0, 0.5, 1, 2, 3, 4, 6) of 256^3 cells with
    128 masses to z = 6 plus the background to last scattering, after compilation,
    with the default 2^24 points per box, on 2 threads;
(b) one plain pass over the same boxes' bytes (numpy sum of every cell): the floor of
    anything that reads the boxes;
(c) 1000 sightlines through the same series and masses on 2 threads, the Monte Carlo
    way to the same mean.
Targets (issue "Trust in a result"): (a) seconds, not minutes (<= 30 s); a/c is reported
(the mean from the PDF, with a relative error ~1e-3, against 1000 rays whose error is ~1e-2).

The snapshots share one log-normal field (the cost does not depend on the values);
each is its own Box, so every one is read.

Usage: python benchmarks/onepoint_speed.py [--cells 256] [--rays 1000]
"""

import argparse
import time
import warnings

import numpy as np

import raytrace
from raytrace.boxes import Box, BoxSeries
from raytrace.boxes.fields import lognormal_overdensity
from raytrace.physics.background import MeanPlasma
from raytrace.statistics.onepoint import pdf_mean

REDSHIFTS = (0.0, 0.5, 1.0, 2.0, 3.0, 4.0, 6.0)


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--cells", type=int, default=256)
    parser.add_argument("--rays", type=int, default=1000)
    args = parser.parse_args()
    plasma = MeanPlasma()
    overdensity = lognormal_overdensity(args.cells, 100.0 / 0.6766, 0.0, seed=2024, smoothing_cells=1.0)
    boxes = [Box.from_array(overdensity * float(plasma.mean_comoving_electron_density_cm3(z)), "100 Mpc/h", z,
                            quantity="n_e_comoving", hubble_h=0.6766, copy=True) for z in REDSHIFTS]
    series = BoxSeries(boxes)
    mass = np.geomspace(3e-15, 3e-12, 128)
    pdf_mean(BoxSeries(boxes[:1]), mass[:4], 0.1, include_background=False, plasma=plasma, points=1024)  # compile

    start = time.perf_counter()
    result = pdf_mean(series, mass, 1100.0, plasma=plasma, n_jobs=2)
    seconds_pdf = time.perf_counter() - start
    start = time.perf_counter()
    total = sum(float(np.sum(box.data, dtype=np.float64)) for box in boxes)
    seconds_pass = time.perf_counter() - start
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        start = time.perf_counter()
        rays = raytrace.cast_sightlines(series, mass, args.rays, 1100.0, plasma=plasma, n_jobs=2, seed=1)
        seconds_rays = time.perf_counter() - start
    inside = result.kernel_boxes > 0
    print(f"series: {len(boxes)} boxes of {args.cells}^3, {mass.size} masses; checksum of the pass {total:.6g}")
    print(f"(a) pdf_mean: {seconds_pdf:.2f} s ({result.run['points']} points per box); target <= 30 s")
    print(f"(b) one pass over the boxes: {seconds_pass:.3f} s; a/b = {seconds_pdf / seconds_pass:.1f}")
    print(f"(c) {args.rays} sightlines (including their own built-in check): {seconds_rays:.2f} s; "
          f"a/c = {seconds_pdf / seconds_rays:.3f}")
    print(f"median relative error: PDF mean {np.median(result.error[inside] / result.kernel[inside]):.1e}, "
          f"{args.rays} rays {np.median(rays.standard_error()[inside] / rays.mean()[inside]):.1e}")


if __name__ == "__main__":
    main()
