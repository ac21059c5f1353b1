"""Deposit particles onto a cubic N^3 grid: cloud-in-cell and SPH cubic spline.

In: particle positions in cell units (each coordinate in [0, n); cell i spans
[i, i + 1) and has its centre at i + 1/2), the amount each particle carries
(here its number of electrons), for SPH its smoothing length h in cells, and
whether the grid is periodic. Out: the amounts summed per cell, added into the
float64 grid of shape (n, n, n) that the caller passes in, so that chunks of
particles accumulate into one grid without a second copy.

Both schemes hand each particle's whole amount to the grid (up to rounding):

- Cloud in cell (Hockney & Eastwood 1988, "Computer Simulation Using Particles",
  section 5-3): a cube one cell wide; along each axis the two nearest cell
  centres x_i get 1 - |x - x_i|, and the 3-D weight is the product.
- SPH: the M4 cubic spline of Monaghan (1992, ARA&A 30, 543) in its convention,
  W(r, h) = w(r/h) / h^3 with support r < 2h, evaluated at the centres of the
  cells within 2h and divided by the sum of those values, so that the weights
  of each particle add up to exactly 1 however coarsely the grid samples the
  kernel. A particle whose support 2h is under MIN_SUPPORT_CELLS cells, where
  the cell centres sample the kernel too sparsely to mean anything, is
  deposited by cloud in cell instead (its size is then taken as one cell).

Periodic grids wrap indices, so a kernel wider than the box adds all its
images. On a non-periodic grid, weight that would fall outside the grid goes
to the nearest edge cell (CIC) or is shared among the cells inside (SPH, by
the renormalisation), so nothing leaves the grid; positions must then lie in
[0, n).
"""

import math

import numba
import numpy as np

#: Support radius 2h (in cells) below which a particle is deposited by CIC.
MIN_SUPPORT_CELLS = 1.0


@numba.njit(cache=True)
def cubic_spline(q):
    """Monaghan (1992) M4 kernel in 3-D: h^3 W(r, h) at q = r/h; zero for q >= 2, integral 1."""
    if q < 1.0:
        return (1.0 - 1.5 * q * q + 0.75 * q * q * q) / math.pi
    if q < 2.0:
        t = 2.0 - q
        return 0.25 * t * t * t / math.pi
    return 0.0


@numba.njit(cache=True, inline="always")
def _cell(index, n, periodic):
    if periodic:
        return index % n  # numba keeps Python's sign rule: -1 % n == n - 1
    return min(max(index, 0), n - 1)


@numba.njit(cache=True)
def _cic_one(grid, x, y, z, amount, periodic):
    n = grid.shape[0]
    # Offsets from the cell centres below: the lower neighbour gets 1 - f, the upper f.
    sx, sy, sz = x - 0.5, y - 0.5, z - 0.5
    ix, iy, iz = int(np.floor(sx)), int(np.floor(sy)), int(np.floor(sz))
    fx, fy, fz = sx - ix, sy - iy, sz - iz
    for a in range(2):
        wx = fx if a == 1 else 1.0 - fx
        i = _cell(ix + a, n, periodic)
        for b in range(2):
            wy = fy if b == 1 else 1.0 - fy
            j = _cell(iy + b, n, periodic)
            for c in range(2):
                wz = fz if c == 1 else 1.0 - fz
                k = _cell(iz + c, n, periodic)
                grid[i, j, k] += amount * wx * wy * wz


@numba.njit(cache=True)
def deposit_cic(cells, amounts, periodic, grid):
    """Add each particle's amount to ``grid`` with cloud-in-cell weights.

    ``cells``: float64 (N, 3) positions in cell units; ``amounts``: float64 (N,);
    ``grid``: float64 (n, n, n), added into and returned.
    """
    for p in range(cells.shape[0]):
        _cic_one(grid, cells[p, 0], cells[p, 1], cells[p, 2], amounts[p], periodic)
    return grid


@numba.njit(cache=True)
def _spline_sum(grid, x, y, z, h, periodic, scale):
    """Sum of w(r/h) over the cell centres within 2h; when scale > 0 also add scale * w to them."""
    n = grid.shape[0]
    support = 2.0 * h
    total = 0.0
    for i in range(int(np.floor(x - support)), int(np.floor(x + support)) + 1):
        if not periodic and (i < 0 or i >= n):
            continue
        dx = i + 0.5 - x
        for j in range(int(np.floor(y - support)), int(np.floor(y + support)) + 1):
            if not periodic and (j < 0 or j >= n):
                continue
            dy = j + 0.5 - y
            if dx * dx + dy * dy >= support * support:
                continue  # this column of cells lies wholly outside the support sphere
            for k in range(int(np.floor(z - support)), int(np.floor(z + support)) + 1):
                if not periodic and (k < 0 or k >= n):
                    continue
                dz = k + 0.5 - z
                w = cubic_spline(math.sqrt(dx * dx + dy * dy + dz * dz) / h)
                if w > 0.0:
                    total += w
                    if scale > 0.0:
                        grid[i % n, j % n, k % n] += scale * w
    return total


@numba.njit(cache=True)
def deposit_sph(cells, amounts, h_cells, periodic, grid):
    """Add each particle's amount to ``grid`` with renormalised cubic-spline weights.

    ``cells``: float64 (N, 3) positions in cell units; ``amounts`` and ``h_cells``
    (Monaghan's h, in cells, support 2h): float64 (N,); ``grid``: float64
    (n, n, n), added into. Returns how many particles went by CIC instead
    (support under MIN_SUPPORT_CELLS).
    """
    fallbacks = 0
    for p in range(cells.shape[0]):
        x, y, z, h = cells[p, 0], cells[p, 1], cells[p, 2], h_cells[p]
        if 2.0 * h < MIN_SUPPORT_CELLS:
            _cic_one(grid, x, y, z, amounts[p], periodic)
            fallbacks += 1
            continue
        # With 2h >= 1 the nearest centre (at most sqrt(3)/2 away) has q < 2, so total > 0.
        total = _spline_sum(grid, x, y, z, h, periodic, 0.0)
        if amounts[p] > 0.0:
            _spline_sum(grid, x, y, z, h, periodic, amounts[p] / total)
    return fallbacks
