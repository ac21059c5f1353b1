"""Exact resonances of one straight ray segment through a periodic box copy.

In: one box's float32 cube (two, when two snapshots are blended), the segment's
start point and direction in cells, its length, the comoving distance at its
start, tables of 1+z and H/c along chi, the targets (physical n_e at which each
mass resonates) and the photon energy for near-tangent events. Out: added into
one ray's rows: the kernel K (eV), the crossing count, the near-tangent event
count and kernel per mass; returned: the segment's dispersion measure (pc cm^-3).

The segment is walked cell by cell of the interpolation grid (the lattice of
cell centres), a 3-D grid traversal (Amanatides & Woo 1987, Eurographics 87, 3),
in passes over a table of the segment's cells: :func:`trace_cells` (the
traversal: each cell's extent and corners), :func:`cell_cubics` (the field along
the ray in each cell, asking for the cube's cache lines a few cells ahead, so that
their latency overlaps), :func:`cell_redshifts` (1+z and H/c at each cell's exit),
then each cell is solved in turn.
Inside one cell the periodic trilinear interpolant along the ray is an exact
cubic in the path length s (PHYSICS.md section 8); a blend weight linear in s
makes it a quartic; times (1+z)^3, linear in s over a cell (its curvature
there is ~1e-6 relative), the physical density P(s) is a polynomial of degree
<= 5. Its extrema split the cell into monotone pieces; on each, every target
between the piece's end values is one root: one Chebyshev step from the
inverse's Hermite interpolant over the piece, with bracketed steps where that
step's error estimate is above ROOT_TOLERANCE. The rate at a root is
d ln n/d chi = F'/F + 3 H/(c (1+z)) with F the comoving field and H from the
table, so nothing depends on a step.
The field jumps where a segment ends (another copy or snapshot): a jump spends
no time at the values in between, so it adds no crossing.

Near an interior extremum whose m_gamma^2 lies within |xi| < XI_CUT of a target,
the two Landau-Zener crossings (or the near miss) are one event with the Airy
kernel of PHYSICS.md section 9 (:mod:`.tangent`), when both crossings lie in the cell's two pieces
next to the extremum; a pair split by a cell face keeps its Landau-Zener terms
(the trilinear field has a kink there, so its rates stay finite).
"""

import math

import numba
import numpy as np

from raytrace.kernels.polynomial import (
    ROOT_TOLERANCE,
    bracketed_root,
    chebyshev_step,
    evaluate,
    evaluate_with_slope,
    roots_in,
)
from raytrace.kernels.prefetch import prefetch
from raytrace.kernels.tangent import count_below_near, tangent_events
from raytrace.kernels.zcells import add_to_cell

#: A cell's breakpoints: its two ends and up to four extrema (the slope of a blended density is a quartic).
_MAX_BREAKPOINTS = 6

#: Columns of a segment's cell table: the cell's exit path length and entry point (0-3, from
#: :func:`trace_cells`), the cubic of one snapshot (4-7) and, when blending, of the other (8-11),
#: and 1+z and H/c at the cell's exit (12-13, from :func:`cell_redshifts`).
_CELL_COLUMNS = 14


@numba.njit(cache=True, inline="always")
def _count_below(ln_targets, value, uniform, first, inverse_spacing):
    """Number of targets whose ln is < ln(value) (ln_targets sorted increasing)."""
    n = ln_targets.shape[0]
    if value <= 0.0:
        return 0
    x = math.log(value)
    if uniform:
        k = int(min(max(math.ceil((x - first) * inverse_spacing), 0.0), float(n)))
        # Rounding in the product can be one off either way; settle it exactly.
        while k > 0 and ln_targets[k - 1] >= x:
            k -= 1
        while k < n and ln_targets[k] < x:
            k += 1
        return k
    return np.searchsorted(ln_targets, x, side="left")


@numba.njit(cache=True, inline="always")
def _lookup(table, chi_step_inverse, chi):
    """Linear interpolation in a table sampled at chi = 0, 1/chi_step_inverse, ..."""
    x = chi * chi_step_inverse
    i = min(max(int(x), 0), table.shape[0] - 2)
    f = x - i
    return table[i] + f * (table[i + 1] - table[i])


@numba.njit(cache=True, inline="always")
def _ray_cubic(cube, i0, i1, j0, j1, k0, k1, tx, ty, tz, dx, dy, dz):
    """(c0, c1, c2, c3): the trilinear interpolant of the cell's 8 corners along t + d s."""
    # Along x: four edges, each linear in s.
    a00 = cube[i0, j0, k0]; b00 = cube[i1, j0, k0] - a00
    a01 = cube[i0, j0, k1]; b01 = cube[i1, j0, k1] - a01
    a10 = cube[i0, j1, k0]; b10 = cube[i1, j1, k0] - a10
    a11 = cube[i0, j1, k1]; b11 = cube[i1, j1, k1] - a11
    e00, s00 = a00 + b00 * tx, b00 * dx
    e01, s01 = a01 + b01 * tx, b01 * dx
    e10, s10 = a10 + b10 * tx, b10 * dx
    e11, s11 = a11 + b11 * tx, b11 * dx
    # Along y: two faces' lines, each quadratic in s.
    p0 = e00 + (e10 - e00) * ty
    p1 = s00 + (e10 - e00) * dy + (s10 - s00) * ty
    p2 = (s10 - s00) * dy
    q0 = e01 + (e11 - e01) * ty
    q1 = s01 + (e11 - e01) * dy + (s11 - s01) * ty
    q2 = (s11 - s01) * dy
    # Along z: the cubic.
    d0, d1, d2 = q0 - p0, q1 - p1, q2 - p2
    return p0 + d0 * tz, p1 + d1 * tz + d0 * dz, p2 + d2 * tz + d1 * dz, d2 * dz


@numba.njit(cache=True)
def trace_cells(shape, start, direction, length, cells, corners):
    """Walk one segment through a periodic grid of ``shape``; return the number of cells it crosses.

    Per cell of positive length n: cells[n, 0] = its exit path length (cells),
    cells[n, 1:4] = the entry point's place inside the cell (0..1 per axis), and
    corners[n] = the grid indices (i0, i1, j0, j1, k0, k1) of its 8 corners.
    Both tables have >= sqrt(3) length + 4 rows.
    """
    n0, n1, n2 = shape
    # Position on the interpolation grid: cell centres sit at integer + 1/2.
    ux, uy, uz = start[0] - 0.5, start[1] - 0.5, start[2] - 0.5
    dx, dy, dz = direction[0], direction[1], direction[2]
    ix, iy, iz = int(math.floor(ux)), int(math.floor(uy)), int(math.floor(uz))
    wx, wy, wz = ix % n0, iy % n1, iz % n2
    inf = math.inf
    next_x = ((ix + 1 - ux) / dx if dx > 0 else (ix - ux) / dx) if dx != 0 else inf
    next_y = ((iy + 1 - uy) / dy if dy > 0 else (iy - uy) / dy) if dy != 0 else inf
    next_z = ((iz + 1 - uz) / dz if dz > 0 else (iz - uz) / dz) if dz != 0 else inf
    step_x = 1.0 / abs(dx) if dx != 0 else inf
    step_y = 1.0 / abs(dy) if dy != 0 else inf
    step_z = 1.0 / abs(dz) if dz != 0 else inf
    n = 0
    s = 0.0
    while s < length:
        s_end = min(next_x, next_y, next_z, length)
        if s_end > s:
            if n == cells.shape[0]:
                raise ValueError("trace_cells: the cell table is too short for this segment")
            cells[n, 0] = s_end
            cells[n, 1] = min(max(ux + dx * s - ix, 0.0), 1.0)
            cells[n, 2] = min(max(uy + dy * s - iy, 0.0), 1.0)
            cells[n, 3] = min(max(uz + dz * s - iz, 0.0), 1.0)
            corners[n, 0] = wx
            corners[n, 1] = wx + 1 if wx + 1 < n0 else 0
            corners[n, 2] = wy
            corners[n, 3] = wy + 1 if wy + 1 < n1 else 0
            corners[n, 4] = wz
            corners[n, 5] = wz + 1 if wz + 1 < n2 else 0
            n += 1
        if s_end >= length:
            break
        s = s_end
        if next_x <= next_y and next_x <= next_z:
            if dx > 0:
                ix += 1; wx = wx + 1 if wx + 1 < n0 else 0
            else:
                ix -= 1; wx = wx - 1 if wx > 0 else n0 - 1
            next_x += step_x
        elif next_y <= next_z:
            if dy > 0:
                iy += 1; wy = wy + 1 if wy + 1 < n1 else 0
            else:
                iy -= 1; wy = wy - 1 if wy > 0 else n1 - 1
            next_y += step_y
        else:
            if dz > 0:
                iz += 1; wz = wz + 1 if wz + 1 < n2 else 0
            else:
                iz -= 1; wz = wz - 1 if wz > 0 else n2 - 1
            next_z += step_z
    return n


#: How many cells ahead :func:`cell_cubics` asks for the cube's lines (~ memory latency / work per cell).
_PREFETCH_CELLS = 8


@numba.njit(cache=True)
def cell_cubics(cube, scale, direction, n_cells, cells, corners, column):
    """cells[n, column:column + 4] = scale * the trilinear interpolant of cell n of
    :func:`trace_cells` along the ray: a cubic in the path length from the cell's entry."""
    dx, dy, dz = direction[0], direction[1], direction[2]
    for n in range(n_cells):
        ahead = n + _PREFETCH_CELLS
        if ahead < n_cells:
            # The four lines along the fastest axis that hold the 8 corners (k0, k1 share one mostly).
            prefetch(cube, corners[ahead, 0], corners[ahead, 2], corners[ahead, 4])
            prefetch(cube, corners[ahead, 1], corners[ahead, 2], corners[ahead, 4])
            prefetch(cube, corners[ahead, 0], corners[ahead, 3], corners[ahead, 4])
            prefetch(cube, corners[ahead, 1], corners[ahead, 3], corners[ahead, 4])
        c0, c1, c2, c3 = _ray_cubic(cube, corners[n, 0], corners[n, 1], corners[n, 2], corners[n, 3], corners[n, 4],
                                    corners[n, 5], cells[n, 1], cells[n, 2], cells[n, 3], dx, dy, dz)
        cells[n, column] = scale * c0
        cells[n, column + 1] = scale * c1
        cells[n, column + 2] = scale * c2
        cells[n, column + 3] = scale * c3


@numba.njit(cache=True)
def cell_redshifts(opz_table, hubble_table, chi_step_inverse, chi0, cell_mpc, n_cells, cells):
    """cells[n, 12:14] = 1+z and H/c at the exit of cell n (the tables' linear interpolation there).

    A loop of its own: its table reads do not wait on the solve, so they overlap.
    """
    for n in range(n_cells):
        chi = chi0 + cells[n, 0] * cell_mpc
        cells[n, 12] = _lookup(opz_table, chi_step_inverse, chi)
        cells[n, 13] = _lookup(hubble_table, chi_step_inverse, chi)


@numba.njit(cache=True, inline="always")
def _comoving_field(f0, f1, f2, f3, u0, u1, u2, u3, blended, w_a, w_slope):
    """(f0..f4, g0..g3): the comoving field F on a cell as a polynomial in the path from its entry:
    the lower snapshot's cubic f, plus w G when blending (G = u - f, u the upper snapshot's cubic,
    weight w = w_a + w_slope s), a quartic then; G is returned for the weight's own rate."""
    if not blended:
        return f0, f1, f2, f3, 0.0, 0.0, 0.0, 0.0, 0.0
    g0, g1, g2, g3 = u0 - f0, u1 - f1, u2 - f2, u3 - f3
    return (f0 + w_a * g0, f1 + w_a * g1 + w_slope * g0, f2 + w_a * g2 + w_slope * g1,
            f3 + w_a * g3 + w_slope * g2, w_slope * g3, g0, g1, g2, g3)


@numba.njit(cache=True, inline="always")
def _dispersion_integral(f0, f1, f2, f3, f4, opz_a, slope_opz, ell):
    """int_0^ell F(s) (1+z(s)) ds with 1+z = opz_a + slope_opz s: the cell's DM over its length in cells."""
    return ell * (f0 * (opz_a + slope_opz * ell / 2.0)
                  + ell * (f1 * (opz_a / 2.0 + slope_opz * ell / 3.0)
                           + ell * (f2 * (opz_a / 3.0 + slope_opz * ell / 4.0)
                                    + ell * (f3 * (opz_a / 4.0 + slope_opz * ell / 5.0)
                                             + ell * f4 * (opz_a / 5.0 + slope_opz * ell / 6.0)))))


@numba.njit(cache=True, inline="always")
def _hermite_start(a, b, v_a, v_b, slope_a, slope_b, curvature_a, curvature_b):
    """(usable, 1/rise, h1..h5): the inverse s(v) of a monotone piece as a quintic in
    t = (v - v_a) / rise, s = a + h1 t + ... + h5 t^5, its Hermite interpolant from the ends'
    values, slopes and curvatures. Not usable where an end is an extremum (P' = 0: there the
    inverse has a square root)."""
    rise = v_b - v_a
    if not (slope_a * rise > 0.0 and slope_b * rise > 0.0):
        return False, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0
    # ds/dt = rise / P' and d2s/dt2 = -rise^2 P'' / P'^3 at the ends; 1/rise and both slopes
    # from one division.
    inverse = 1.0 / (rise * slope_a * slope_b)
    inverse_rise = slope_a * slope_b * inverse
    d_a = rise * rise * slope_b * inverse
    d_b = rise * rise * slope_a * inverse
    c_a = -curvature_a * d_a * d_a * d_a * inverse_rise
    c_b = -curvature_b * d_b * d_b * d_b * inverse_rise
    span = b - a
    return (True, inverse_rise, d_a, 0.5 * c_a, 10.0 * span - 6.0 * d_a - 4.0 * d_b - 1.5 * c_a + 0.5 * c_b,
            -15.0 * span + 8.0 * d_a + 7.0 * d_b + 1.5 * c_a - c_b,
            6.0 * span - 3.0 * d_a - 3.0 * d_b - 0.5 * c_a + 0.5 * c_b)


@numba.njit(cache=True, inline="always")
def _crossing(p0, p1, p2, p3, p4, p5, target, a, b, v_a, v_b, start):
    """(root, slope of P there) of P = target on the monotone piece [a, b] (values v_a, v_b);
    ``start``: :func:`_hermite_start`'s (usable, 1/rise, h1..h5) for the piece."""
    usable, inverse_rise, h1, h2, h3, h4, h5 = start
    if usable:
        t = (target - v_a) * inverse_rise
        t2 = t * t
        guess = (a + h1 * t) + t2 * ((h2 + h3 * t) + t2 * (h4 + h5 * t))
        # From there one Chebyshev step is nearly always the root: a branch that stays predictable.
        root, slope, error, _ = chebyshev_step(p0 - target, p1, p2, p3, p4, p5, guess)
        if error <= ROOT_TOLERANCE and a <= root <= b:
            return root, slope
    else:
        guess = -1.0
    return bracketed_root(p0 - target, p1, p2, p3, p4, p5, a, b, v_a - target, v_b - target, guess)


@numba.njit(cache=True, inline="always")
def _crossing_kernel(root, slope, target, mass2, cell_mpc, kernel_unit, opz_a, slope_opz, h_a, slope_h, d_a, d_1,
                     blended, weight_term):
    """K (eV) of the crossing at ``root`` (P' = ``slope`` there), or 0 where its rate vanishes.

    ``weight_term``: (w_a, w_slope, g0..g3, 1/(z_hi - z_lo)) of a blend.
    """
    opz = opz_a + slope_opz * root
    hubble = h_a + slope_h * root
    # At the root P = target, so F = target / (1+z)^3 and d ln F / ds = P'/target - ((1+z)^3)'/(1+z)^3;
    # the rate is that per cell plus 3 H/(c (1+z)). All of it times target (1+z)^3 (1+z) and
    # cell, so that one division is left.
    cubed = d_a + d_1 * root
    scaled_rate = slope * cubed * opz - d_1 * target * opz + 3.0 * hubble * cell_mpc * target * cubed
    if blended:
        # The weight's own slope from H, not from its chord over the cell (first order).
        w_a, w_slope, g0, g1, g2, g3, inverse_z_interval = weight_term
        w_root = w_a + w_slope * root
        exact = hubble * cell_mpc * inverse_z_interval if 0.0 < w_root < 1.0 else 0.0
        scaled_rate += evaluate(g0, g1, g2, g3, 0.0, 0.0, root) * (exact - w_slope) * cubed * cubed * opz
    if scaled_rate == 0.0:
        return 0.0
    # K = pi m^2 / ((1+z)^2 hbar c |d ln n / d chi|)
    return kernel_unit * mass2 * target * cubed / (opz * abs(scaled_rate))


@numba.njit(cache=True)
def walk_segment(cube_lo, cube_hi, scale_lo, scale_hi, blended, z_lo, z_hi, start, direction, length, chi0,
                 cell_mpc, opz_table, hubble_table, chi_step_inverse, targets, ln_targets, mass2, uniform,
                 rate_unit, m2_per_density, omega0, cells, corners, points, marks, kernel, count, tangent_count,
                 tangent_kernel, cell_edges, cell_kernel):
    """Walk one segment; add its resonances into one ray's rows; return its DM in pc cm^-3.

    ``start``/``direction``: cells of the cube (direction a unit vector); ``length``:
    cells; ``chi0``: Mpc at the start; ``rate_unit``: hbar c in eV Mpc; ``omega0``:
    the observed photon energy of near-tangent events (eV; 0 turns them off);
    ``cells``/``corners``/``points``/``marks``: scratch from :func:`scratch`;
    ``cell_edges``/``cell_kernel``: each kernel also goes to its redshift cell (:mod:`.zcells`).

    Polynomials travel as scalars (registers) through inlined helpers: small arrays
    passed between kernels cost more than the arithmetic.
    """
    n_cells = trace_cells(cube_lo.shape, start, direction, length, cells, corners)
    cell_cubics(cube_lo, scale_lo, direction, n_cells, cells, corners, 4)
    if blended:
        cell_cubics(cube_hi, scale_hi, direction, n_cells, cells, corners, 8)
    cell_redshifts(opz_table, hubble_table, chi_step_inverse, chi0, cell_mpc, n_cells, cells)
    n_targets = targets.shape[0]
    inverse_spacing = (n_targets - 1) / (ln_targets[-1] - ln_targets[0]) if n_targets > 1 else 1.0
    bp, bv, bs, bc = points[0], points[1], points[2], points[3]
    claim_low, claim_high = marks[1], marks[2]
    opz_a = _lookup(opz_table, chi_step_inverse, chi0)
    h_a = _lookup(hubble_table, chi_step_inverse, chi0)
    kernel_unit = math.pi * cell_mpc / rate_unit
    inverse_z_interval = 1.0 / (z_hi - z_lo) if blended else 0.0
    end_value = -1.0  # P where the previous cell ended
    k = -1  # the number of targets below it
    dm = 0.0
    s_a = 0.0
    for c in range(n_cells):
        piece = cells[c, 0] - s_a
        s_a = cells[c, 0]
        opz_b, h_b = cells[c, 12], cells[c, 13]
        inverse_piece = 1.0 / piece
        # The blend's weight, linear in the cell's redshift: 0 at z_lo, 1 at z_hi.
        w_a = min(max((opz_a - 1.0 - z_lo) * inverse_z_interval, 0.0), 1.0)
        w_slope = (min(max((opz_b - 1.0 - z_lo) * inverse_z_interval, 0.0), 1.0) - w_a) * inverse_piece
        f0, f1, f2, f3, f4, g0, g1, g2, g3 = _comoving_field(
            cells[c, 4], cells[c, 5], cells[c, 6], cells[c, 7], cells[c, 8], cells[c, 9], cells[c, 10], cells[c, 11],
            blended, w_a, w_slope)
        slope_opz = (opz_b - opz_a) * inverse_piece
        slope_h = (h_b - h_a) * inverse_piece
        dm += cell_mpc * _dispersion_integral(f0, f1, f2, f3, f4, opz_a, slope_opz, piece)
        # Physical density P = F (1+z)^3, with (1+z)^3 linear over the cell.
        d_a = opz_a * opz_a * opz_a
        d_1 = (opz_b * opz_b * opz_b - d_a) * inverse_piece
        p0, p1, p2, p3, p4, p5 = (f0 * d_a, f1 * d_a + f0 * d_1, f2 * d_a + f1 * d_1, f3 * d_a + f2 * d_1,
                                  f4 * d_a + f3 * d_1, f4 * d_1)
        # Breakpoints: the cell's ends and the extrema of P between, with P's value (continuous with
        # the previous cell's end), slope and curvature there.
        n_ext, extrema = roots_in(p1, 2.0 * p2, 3.0 * p3, 4.0 * p4, 5.0 * p5, piece)
        n_bp = n_ext + 2
        bp[0], bv[0], bs[0], bc[0] = 0.0, end_value if end_value >= 0.0 else p0, p1, 2.0 * p2
        for j in range(n_ext):
            bp[j + 1], bv[j + 1], bs[j + 1], bc[j + 1] = extrema[j], evaluate(p0, p1, p2, p3, p4, p5, extrema[j]), 0.0, 0.0
        bp[n_bp - 1] = piece
        bv[n_bp - 1], bs[n_bp - 1] = evaluate_with_slope(p0, p1, p2, p3, p4, p5, piece)
        bc[n_bp - 1] = evaluate(2.0 * p2, 6.0 * p3, 12.0 * p4, 20.0 * p5, 0.0, 0.0, piece)
        end_value = bv[n_bp - 1]
        # Targets are counted by stepping from the last cell's count (the field moves by little per
        # cell): comparisons in n_e, no logarithm. A cell with extrema first counts at each of its
        # breakpoints, for its near-tangent events and the crossings they claim.
        if k < 0:
            k = _count_below(ln_targets, bv[0], uniform and n_targets > 1, ln_targets[0], inverse_spacing)
        if n_ext > 0:
            tangent_events(bp, bv, k, n_bp, 2.0 * p2, 6.0 * p3, 12.0 * p4, 20.0 * p5, opz_a, opz_b, piece,
                            rate_unit / cell_mpc, omega0, targets, mass2, m2_per_density, marks, kernel, count,
                            tangent_count, tangent_kernel, cell_edges, cell_kernel)
        weight_term = (w_a, w_slope, g0, g1, g2, g3, inverse_z_interval)
        for j in range(n_bp - 1):
            # Each target between the piece's end values is one crossing, met in the order of its
            # values: upwards from the count below the start where the piece rises, else downwards.
            a, b, v_a, v_b = bp[j], bp[j + 1], bv[j], bv[j + 1]
            rising = v_b > v_a
            if (rising and (k >= n_targets or targets[k] >= v_b)) or (not rising and (k <= 0 or targets[k - 1] < v_b)):
                continue
            start = _hermite_start(a, b, v_a, v_b, bs[j], bs[j + 1], bc[j], bc[j + 1])
            claims = (claim_low[j], claim_high[j], claim_low[j + 1], claim_high[j + 1]) if n_ext > 0 else (0, 0, 0, 0)
            while True:
                if rising:
                    if k >= n_targets or targets[k] >= v_b:
                        break
                    crossed = k
                    k += 1
                else:
                    if k <= 0 or targets[k - 1] < v_b:
                        break
                    k -= 1
                    crossed = k
                if (claims[0] <= crossed < claims[1]) or (claims[2] <= crossed < claims[3]):
                    continue
                target = targets[crossed]
                root, slope = _crossing(p0, p1, p2, p3, p4, p5, target, a, b, v_a, v_b, start)
                value = _crossing_kernel(root, slope, target, mass2[crossed], cell_mpc, kernel_unit, opz_a, slope_opz,
                                         h_a, slope_h, d_a, d_1, blended, weight_term)
                kernel[crossed] += value
                add_to_cell(cell_kernel, cell_edges, crossed, opz_a + slope_opz * root, value)
                count[crossed] += 1
        opz_a, h_a = opz_b, h_b
    return dm * 1.0e6  # Mpc cm^-3 -> pc cm^-3


@numba.njit(cache=True)
def scratch(longest_cells):
    """(cells, corners, points, marks) scratch of one ray's :func:`walk_segment` calls, for segments of at most
    ``longest_cells`` cells of path (a segment crosses at most sqrt(3) cells per cell of path, plus 4)."""
    rows = int(math.sqrt(3.0) * longest_cells) + 8
    return (np.zeros((rows, _CELL_COLUMNS)), np.zeros((rows, 6), dtype=np.int64), np.zeros((4, _MAX_BREAKPOINTS)),
            np.zeros((3, _MAX_BREAKPOINTS), dtype=np.int64))
