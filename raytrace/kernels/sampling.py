"""Point values of a box: the periodic trilinear interpolant, and the nearest cell.

In: one box's cube and points in cells. Out: the interpolant's value (cell values
sit at cell centres, as in scipy.ndimage.map_coordinates with mode="grid-wrap" at
x - 0.5), or the containing cells' values (the benchmark's memory-bound proxy).
"""

import math

import numba
import numpy as np


@numba.njit(cache=True, inline="always")
def _wrap(index, n):
    # Positions are at most a few boxes away from [0, n): subtracting beats an integer division.
    while index < 0:
        index += n
    while index >= n:
        index -= n
    return index


@numba.njit(cache=True)
def trilinear_periodic(cube, x, y, z):
    """Value of the periodic trilinear interpolant of ``cube`` at (x, y, z) in cells."""
    n0, n1, n2 = cube.shape
    xc, yc, zc = x - 0.5, y - 0.5, z - 0.5
    fx, fy, fz = math.floor(xc), math.floor(yc), math.floor(zc)
    tx, ty, tz = xc - fx, yc - fy, zc - fz
    i0, j0, k0 = _wrap(int(fx), n0), _wrap(int(fy), n1), _wrap(int(fz), n2)
    i1 = i0 + 1 if i0 + 1 < n0 else 0
    j1 = j0 + 1 if j0 + 1 < n1 else 0
    k1 = k0 + 1 if k0 + 1 < n2 else 0
    c00 = cube[i0, j0, k0] * (1.0 - tz) + cube[i0, j0, k1] * tz
    c01 = cube[i0, j1, k0] * (1.0 - tz) + cube[i0, j1, k1] * tz
    c10 = cube[i1, j0, k0] * (1.0 - tz) + cube[i1, j0, k1] * tz
    c11 = cube[i1, j1, k0] * (1.0 - tz) + cube[i1, j1, k1] * tz
    c0 = c00 * (1.0 - ty) + c01 * ty
    c1 = c10 * (1.0 - ty) + c11 * ty
    return c0 * (1.0 - tx) + c1 * tx


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
