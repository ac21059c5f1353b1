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

from .geometry import copy_transform


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


@numba.njit(cache=True, parallel=True)
def add_log_density_lattice(cube, log_scale, floor, first, stop, chi, weights, directions, observer,
                            box_size, seed, box_index, symmetries, randomise, out):
    """Light-cone sampling: ray r's sample j sits at observer + chi[j] * directions[r] (Mpc) in a
    lattice of copies of the box; each copy has the transform ``copy_transform`` gives
    (a symmetry about the copy's centre, then a periodic shift), or none if not ``randomise``.

    out[r, j] += weights[j] * (log_scale + ln(max(interp, floor))) for first <= j < stop.
    """
    n = cube.shape[0]
    inverse_size = 1.0 / box_size
    cells_per_mpc = n / box_size
    half = 0.5 * n
    for r in numba.prange(out.shape[0]):
        last0, last1, last2 = -(2**40), 0, 0
        # The copy's transform as scalars: x' = M (x - half) + half + shift.
        m00 = m11 = m22 = 1.0
        m01 = m02 = m10 = m12 = m20 = m21 = 0.0
        t0 = t1 = t2 = half
        d0, d1, d2 = directions[r, 0], directions[r, 1], directions[r, 2]
        for j in range(first, stop):
            px = observer[0] + chi[j] * d0
            py = observer[1] + chi[j] * d1
            pz = observer[2] + chi[j] * d2
            c0 = int(math.floor(px * inverse_size))
            c1 = int(math.floor(py * inverse_size))
            c2 = int(math.floor(pz * inverse_size))
            if c0 != last0 or c1 != last1 or c2 != last2:
                last0, last1, last2 = c0, c1, c2
                if randomise:
                    s, s0, s1, s2 = copy_transform(seed, box_index, c0, c1, c2)
                    m00, m01, m02 = symmetries[s, 0, 0], symmetries[s, 0, 1], symmetries[s, 0, 2]
                    m10, m11, m12 = symmetries[s, 1, 0], symmetries[s, 1, 1], symmetries[s, 1, 2]
                    m20, m21, m22 = symmetries[s, 2, 0], symmetries[s, 2, 1], symmetries[s, 2, 2]
                    t0, t1, t2 = half + s0 * n, half + s1 * n, half + s2 * n
            lx = (px - c0 * box_size) * cells_per_mpc - half
            ly = (py - c1 * box_size) * cells_per_mpc - half
            lz = (pz - c2 * box_size) * cells_per_mpc - half
            value = trilinear_periodic(cube, m00 * lx + m01 * ly + m02 * lz + t0,
                                       m10 * lx + m11 * ly + m12 * lz + t1,
                                       m20 * lx + m21 * ly + m22 * lz + t2)
            out[r, j] += weights[j] * (log_scale + math.log(max(value, floor)))
