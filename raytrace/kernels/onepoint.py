"""Histograms of the interpolated density at random points, for the one-point-PDF mean.

In: one box's stored values (or two boxes' on a shared grid, blended with a
weight), their cm^-3 scales, a seed and stream key, the histogram's range in
ln n_e. Out: per group of points, the count and the summed ln n_e of the points
falling in each bin. A point's position is a hash of (seed, key, group, point)
(the counter-based streams of :mod:`raytrace.kernels.geometry`), so the
histograms are the same on any number of threads.
"""

import math

import numba
import numpy as np

from .geometry import _GOLDEN, _mix, _uniform


@numba.njit(cache=True, inline="always")
def _trilinear(data, x, y, z):
    """The periodic trilinear interpolant of cell-centred ``data`` at (x, y, z) in cells from the first centre."""
    n = data.shape[0]
    i, j, k = int(math.floor(x)), int(math.floor(y)), int(math.floor(z))
    tx, ty, tz = x - i, y - j, z - k
    i0, j0, k0 = i % n, j % n, k % n
    i1, j1, k1 = (i0 + 1) % n, (j0 + 1) % n, (k0 + 1) % n
    c00 = data[i0, j0, k0] * (1.0 - tx) + data[i1, j0, k0] * tx
    c01 = data[i0, j0, k1] * (1.0 - tx) + data[i1, j0, k1] * tx
    c10 = data[i0, j1, k0] * (1.0 - tx) + data[i1, j1, k0] * tx
    c11 = data[i0, j1, k1] * (1.0 - tx) + data[i1, j1, k1] * tx
    return (c00 * (1.0 - ty) + c10 * ty) * (1.0 - tz) + (c01 * (1.0 - ty) + c11 * ty) * tz


@numba.njit(cache=True, parallel=True)
def interpolant_histograms(data_a, scale_a, data_b, scale_b, weight_b, seed, key, points_per_group,
                           ln_low, inverse_width, counts, sums):
    """Fill ``counts`` and ``sums`` (groups, bins) with ln of (1 - w) scale_a A + w scale_b B at uniform points.

    A and B are the trilinear interpolants of ``data_a`` and ``data_b`` (same grid);
    with ``weight_b`` = 0 only A is read. Points where the value is zero, or whose
    ln lies outside the bins, are counted nowhere (the caller knows the total).
    """
    groups, bins = counts.shape
    n = data_a.shape[0]
    for g in numba.prange(groups):
        golden = np.uint64(_GOLDEN)
        stream = _mix(_mix(np.uint64(seed) + golden) ^ (np.uint64(key * groups + g) + golden))
        for p in range(points_per_group):
            x = _uniform(stream, 3 * p) * n
            y = _uniform(stream, 3 * p + 1) * n
            z = _uniform(stream, 3 * p + 2) * n
            value = (1.0 - weight_b) * scale_a * _trilinear(data_a, x, y, z)
            if weight_b != 0.0:
                value += weight_b * scale_b * _trilinear(data_b, x, y, z)
            if value <= 0.0:
                continue
            ln_value = math.log(value)
            b = int(math.floor((ln_value - ln_low) * inverse_width))
            if 0 <= b < bins:
                counts[g, b] += 1.0
                sums[g, b] += ln_value
