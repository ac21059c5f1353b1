"""Histograms of the interpolated density at random points, for the one-point-PDF mean.

In: one box's stored values (or two boxes' on a shared grid, blended with a
weight), their cm^-3 scales, a seed and stream key, the mean number of points
per cell, the histogram's range in ln n_e. Out: per group of points, the count and the summed ln n_e of the points
falling in each bin. A point's position is a hash of (seed, key, group, point)
(the counter-based streams of :mod:`raytrace.kernels.geometry`), so the
histograms are the same on any number of threads.
"""

import math

import numba
import numpy as np

from raytrace.kernels.geometry import _GOLDEN, _mix, _uniform


@numba.njit(cache=True, inline="always")
def _trilinear(data, i0, j0, k0, i1, j1, k1, tx, ty, tz):
    """The trilinear interpolant of ``data`` between corners (i0, j0, k0) and (i1, j1, k1) at fractions t."""
    c00 = data[i0, j0, k0] * (1.0 - tx) + data[i1, j0, k0] * tx
    c01 = data[i0, j0, k1] * (1.0 - tx) + data[i1, j0, k1] * tx
    c10 = data[i0, j1, k0] * (1.0 - tx) + data[i1, j1, k0] * tx
    c11 = data[i0, j1, k1] * (1.0 - tx) + data[i1, j1, k1] * tx
    return (c00 * (1.0 - ty) + c10 * ty) * (1.0 - tz) + (c01 * (1.0 - ty) + c11 * ty) * tz


@numba.njit(cache=True, inline="always")
def _add_point(data_a, scale_a, data_b, scale_b, weight_b, n, i, j, k, tx, ty, tz, ln_low, inverse_width,
               counts, sums, g):
    """Bin ln of the blended interpolant at fractions (tx, ty, tz) past cell centre (i, j, k)."""
    i1 = i + 1 if i + 1 < n else 0  # the periodic neighbours
    j1 = j + 1 if j + 1 < n else 0
    k1 = k + 1 if k + 1 < n else 0
    value = (1.0 - weight_b) * scale_a * _trilinear(data_a, i, j, k, i1, j1, k1, tx, ty, tz)
    if weight_b != 0.0:
        value += weight_b * scale_b * _trilinear(data_b, i, j, k, i1, j1, k1, tx, ty, tz)
    if value > 0.0:
        ln_value = math.log(value)
        b = int(math.floor((ln_value - ln_low) * inverse_width))
        if 0 <= b < counts.shape[1]:
            counts[g, b] += 1.0
            sums[g, b] += ln_value


@numba.njit(cache=True, parallel=True)
def interpolant_histograms(data_a, scale_a, data_b, scale_b, weight_b, seed, key, points_per_cell,
                           ln_low, inverse_width, counts, sums, drawn):
    """Fill ``counts`` and ``sums`` (groups, bins) with ln of (1 - w) scale_a A + w scale_b B at random points.

    A and B are the trilinear interpolants of ``data_a`` and ``data_b`` (same grid);
    with ``weight_b`` = 0 only A is read. Each group visits the cells between
    neighbouring cell centres in memory order (so the box is read in order) and
    puts floor(lam) or floor(lam) + 1 uniform points in each, lam =
    ``points_per_cell`` (the extra one with probability lam - floor(lam); below one
    point per cell the cells holding one are reached by geometric jumps, the same
    distribution): a stratified uniform sample with lam points per cell on average;
    ``drawn[g]`` gets group g's number of points. Points where the value is zero,
    or whose ln lies outside the bins, are in no bin.
    """
    groups = counts.shape[0]
    n = data_a.shape[0]
    whole = int(math.floor(points_per_cell))
    extra = points_per_cell - whole
    most = whole + 1
    cells = n * n * n
    golden = np.uint64(_GOLDEN)
    for g in numba.prange(groups):
        stream = _mix(_mix(np.uint64(seed) + golden) ^ (np.uint64(key * groups + g) + golden))
        total = 0
        if whole == 0:
            c, draw = -1, 0
            log_miss = math.log1p(-extra) if extra < 1.0 else -math.inf
            while True:
                u = _uniform(stream, 4 * draw)
                c += 1 + int(math.floor(math.log(1.0 - u) / log_miss)) if log_miss > -math.inf else 1
                if c >= cells:
                    break
                i, j, k = c // (n * n), (c // n) % n, c % n
                _add_point(data_a, scale_a, data_b, scale_b, weight_b, n, i, j, k, _uniform(stream, 4 * draw + 1),
                           _uniform(stream, 4 * draw + 2), _uniform(stream, 4 * draw + 3), ln_low, inverse_width,
                           counts, sums, g)
                draw += 1
            drawn[g] = draw
            continue
        for i in range(n):
            for j in range(n):
                for k in range(n):
                    c = (i * n + j) * n + k
                    count = whole
                    if extra > 0.0 and _uniform(stream, 3 * most * cells + c) < extra:
                        count += 1
                    total += count
                    for p in range(count):
                        base = 3 * (c * most + p)
                        _add_point(data_a, scale_a, data_b, scale_b, weight_b, n, i, j, k, _uniform(stream, base),
                                   _uniform(stream, base + 1), _uniform(stream, base + 2), ln_low, inverse_width,
                                   counts, sums, g)
        drawn[g] = total
