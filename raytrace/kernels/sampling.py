"""Sampling a box along ray segments.

In: one box's float32 cube, per-segment start points and directions (cells) for a
batch of rays, each sample's distance from its segment's start (cells) and its
blending weight. Out: added into ``out[ray, sample]``: weight * ln(n), with n the
periodic trilinear interpolation of the cube (cell values sit at cell centres,
as in scipy.ndimage.map_coordinates with mode="grid-wrap" at x - 0.5), floored
at ``floor`` so that empty cells give a finite logarithm.
"""

import math

import numba
import numpy as np


@numba.njit(cache=True, inline="always")
def _wrap(index, n):
    index = index % n
    return index + n if index < 0 else index


@numba.njit(cache=True)
def trilinear_periodic(cube, x, y, z):
    """Value of the periodic trilinear interpolant of ``cube`` at (x, y, z) in cells."""
    n0, n1, n2 = cube.shape
    xc, yc, zc = x - 0.5, y - 0.5, z - 0.5
    fx, fy, fz = math.floor(xc), math.floor(yc), math.floor(zc)
    tx, ty, tz = xc - fx, yc - fy, zc - fz
    i0, j0, k0 = _wrap(int(fx), n0), _wrap(int(fy), n1), _wrap(int(fz), n2)
    i1, j1, k1 = (i0 + 1) % n0, (j0 + 1) % n1, (k0 + 1) % n2
    c00 = cube[i0, j0, k0] * (1.0 - tz) + cube[i0, j0, k1] * tz
    c01 = cube[i0, j1, k0] * (1.0 - tz) + cube[i0, j1, k1] * tz
    c10 = cube[i1, j0, k0] * (1.0 - tz) + cube[i1, j0, k1] * tz
    c11 = cube[i1, j1, k0] * (1.0 - tz) + cube[i1, j1, k1] * tz
    c0 = c00 * (1.0 - ty) + c01 * ty
    c1 = c10 * (1.0 - ty) + c11 * ty
    return c0 * (1.0 - tx) + c1 * tx


@numba.njit(cache=True, parallel=True)
def add_log_density(cube, log_scale, floor, segment_first, segment_stop, local_cells, starts, directions, weights, out):
    """out[r, j] += weights[j] * (log_scale + ln(max(interp(start + direction * local_cells[j]), floor))).

    Segment g of ray r covers samples segment_first[g] <= j < segment_stop[g];
    starts and directions are (n_rays, n_segments, 3) in cells of ``cube``.
    """
    n_rays = out.shape[0]
    n_segments = segment_first.shape[0]
    for r in numba.prange(n_rays):
        for g in range(n_segments):
            x0, y0, z0 = starts[r, g, 0], starts[r, g, 1], starts[r, g, 2]
            dx, dy, dz = directions[r, g, 0], directions[r, g, 1], directions[r, g, 2]
            for j in range(segment_first[g], segment_stop[g]):
                s = local_cells[j]
                value = trilinear_periodic(cube, x0 + dx * s, y0 + dy * s, z0 + dz * s)
                out[r, j] += weights[j] * (log_scale + math.log(max(value, floor)))


@numba.njit(cache=True)
def gather_nearest(cube, points):
    """cube values at the cells containing ``points`` (n, 3), in cells; the
    benchmark's proxy for the memory-bound limit of sampling."""
    n0, n1, n2 = cube.shape
    out = np.empty(points.shape[0], dtype=np.float64)
    for p in range(points.shape[0]):
        out[p] = cube[
            _wrap(int(math.floor(points[p, 0])), n0),
            _wrap(int(math.floor(points[p, 1])), n1),
            _wrap(int(math.floor(points[p, 2])), n2),
        ]
    return out
