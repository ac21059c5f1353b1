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
then each cell is solved in turn (:func:`solve_cell`). The traversal's steps and the
solve are compiled for the CPU and a GPU alike (:mod:`.targets`); the GPU walks the
same cells one at a time, without tables (:mod:`.streaming`).
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
from raytrace.kernels.tangent import tangent_events
from raytrace.kernels.targets import both_targets
from raytrace.kernels.zcells import add_to_cell

#: A cell's breakpoints: its two ends and up to four extrema (the slope of a blended density is a quartic).
_MAX_BREAKPOINTS = 6

#: Columns of a segment's cell table: the cell's exit path length and entry point (0-3, from
#: :func:`trace_cells`), the cubic of one snapshot (4-7) and, when blending, of the other (8-11),
#: and 1+z and H/c at the cell's exit (12-13, from :func:`cell_redshifts`).
_CELL_COLUMNS = 14


@both_targets
def _search_left(values, x):
    """The number of ``values`` (sorted increasing) that are < x: a binary search."""
    low, high = 0, values.shape[0]
    while low < high:
        middle = (low + high) // 2
        if values[middle] < x:
            low = middle + 1
        else:
            high = middle
    return low


@both_targets
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
    return _search_left(ln_targets, x)


@both_targets
def _lookup(table, chi_step_inverse, chi):
    """Linear interpolation in a table sampled at chi = 0, 1/chi_step_inverse, ..."""
    x = chi * chi_step_inverse
    i = min(max(int(x), 0), table.shape[0] - 2)
    f = x - i
    return table[i] + f * (table[i + 1] - table[i])


@both_targets
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


@both_targets
def axis_start(u, d, n):
    """(i, w, next, step): one axis of a grid traversal from u (cells) heading d on a periodic axis of n
    cells: the cell index, its wrapped index, the path length to the first face and between faces
    (inf where the ray runs parallel to the axis)."""
    i = int(math.floor(u))
    inf = math.inf
    next_face = ((i + 1 - u) / d if d > 0 else (i - u) / d) if d != 0 else inf
    step = 1.0 / abs(d) if d != 0 else inf
    return i, i % n, next_face, step


@both_targets
def _next_index(w, n):
    return w + 1 if w + 1 < n else 0


@both_targets
def _cross_axis(axis, d, n):
    """One axis's traversal state (i, w, next, step) after crossing its next face."""
    i, w, next_face, step = axis
    if d > 0:
        return i + 1, _next_index(w, n), next_face + step, step
    return i - 1, (w - 1 if w > 0 else n - 1), next_face + step, step


@both_targets
def cross_face(x, y, z, dx, dy, dz, n0, n1, n2):
    """The traversal state (x, y, z) after the nearest face (ties: x before y before z)."""
    if x[2] <= y[2] and x[2] <= z[2]:
        return _cross_axis(x, dx, n0), y, z
    if y[2] <= z[2]:
        return x, _cross_axis(y, dy, n1), z
    return x, y, _cross_axis(z, dz, n2)


@both_targets
def cell_place(axis, u, d, s, n):
    """(t, w0, w1) of one axis in the current cell: the place of the point u + d s inside it (0..1)
    and the wrapped indices of its two corners."""
    i, w, _, _ = axis
    # numpy float64 bounds: the same constants to numba; in numba's CUDA simulator (plain Python) a bound
    # returned as a Python float would turn the float32 corner values it multiplies into float32 products.
    return min(max(u + d * s - i, np.float64(0.0)), np.float64(1.0)), w, _next_index(w, n)


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
    x, y, z = axis_start(ux, dx, n0), axis_start(uy, dy, n1), axis_start(uz, dz, n2)
    n = 0
    s = 0.0
    while s < length:
        s_end = min(x[2], y[2], z[2], length)
        if s_end > s:
            if n == cells.shape[0]:
                raise ValueError("trace_cells: the cell table is too short for this segment")
            cells[n, 0] = s_end
            cells[n, 1], corners[n, 0], corners[n, 1] = cell_place(x, ux, dx, s, n0)
            cells[n, 2], corners[n, 2], corners[n, 3] = cell_place(y, uy, dy, s, n1)
            cells[n, 3], corners[n, 4], corners[n, 5] = cell_place(z, uz, dz, s, n2)
            n += 1
        if s_end >= length:
            break
        s = s_end
        x, y, z = cross_face(x, y, z, dx, dy, dz, n0, n1, n2)
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


@both_targets
def _comoving_field(f0, f1, f2, f3, u0, u1, u2, u3, blended, w_a, w_slope):
    """(f0..f4, g0..g3): the comoving field F on a cell as a polynomial in the path from its entry:
    the lower snapshot's cubic f, plus w G when blending (G = u - f, u the upper snapshot's cubic,
    weight w = w_a + w_slope s), a quartic then; G is returned for the weight's own rate."""
    if not blended:
        return f0, f1, f2, f3, 0.0, 0.0, 0.0, 0.0, 0.0
    g0, g1, g2, g3 = u0 - f0, u1 - f1, u2 - f2, u3 - f3
    return (f0 + w_a * g0, f1 + w_a * g1 + w_slope * g0, f2 + w_a * g2 + w_slope * g1,
            f3 + w_a * g3 + w_slope * g2, w_slope * g3, g0, g1, g2, g3)


@both_targets
def _dispersion_integral(f0, f1, f2, f3, f4, opz_a, slope_opz, ell):
    """int_0^ell F(s) (1+z(s)) ds with 1+z = opz_a + slope_opz s: the cell's DM over its length in cells."""
    return ell * (f0 * (opz_a + slope_opz * ell / 2.0)
                  + ell * (f1 * (opz_a / 2.0 + slope_opz * ell / 3.0)
                           + ell * (f2 * (opz_a / 3.0 + slope_opz * ell / 4.0)
                                    + ell * (f3 * (opz_a / 4.0 + slope_opz * ell / 5.0)
                                             + ell * f4 * (opz_a / 5.0 + slope_opz * ell / 6.0)))))


@both_targets
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


@both_targets
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


@both_targets
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


@both_targets
def segment_constants(opz_table, hubble_table, chi_step_inverse, chi0, targets, ln_targets, cell_mpc, rate_unit,
                      blended, z_lo, z_hi):
    """(1+z and H/c at the segment's start, the targets' inverse spacing in ln, the kernel's unit per cell,
    1/(z_hi - z_lo) of a blend): what every cell of a segment shares."""
    n_targets = targets.shape[0]
    inverse_spacing = (n_targets - 1) / (ln_targets[-1] - ln_targets[0]) if n_targets > 1 else 1.0
    inverse_z_interval = 1.0 / (z_hi - z_lo) if blended else 0.0
    return (_lookup(opz_table, chi_step_inverse, chi0), _lookup(hubble_table, chi_step_inverse, chi0),
            inverse_spacing, math.pi * cell_mpc / rate_unit, inverse_z_interval)


@both_targets
def solve_cell(lower, upper, piece, opz_a, opz_b, h_a, h_b, end_value, k, blended, z_lo,
               inverse_z_interval, cell_mpc, kernel_unit, targets, ln_targets, mass2, uniform, inverse_spacing,
               rate_unit, m2_per_density, omega0, points, marks, kernel, count, tangent_count, tangent_kernel, cell_edges,
               cell_kernel):
    """Add one cell's resonances into one ray's rows; return (P at its exit, the number of targets below
    that, its DM in Mpc cm^-3).

    ``lower`` (``upper``): the lower (upper) snapshot's cubic along the ray from the cell's entry,
    (c0, c1, c2, c3) scaled to comoving n_e (tuples: a call of more than 30 arguments cannot be inlined);
    ``piece``: the cell's length (cells); 1+z and H/c at its ends;
    ``end_value``, ``k``: what the previous cell of the segment returned (-1, -1 for its first);
    ``cell_edges``/``cell_kernel``: each kernel also goes to its redshift cell (:mod:`.zcells`).
    """
    n_targets = targets.shape[0]
    c0, c1, c2, c3 = lower
    u0, u1, u2, u3 = upper
    inverse_piece = 1.0 / piece
    # The blend's weight, linear in the cell's redshift: 0 at z_lo, 1 at z_hi.
    w_a = min(max((opz_a - 1.0 - z_lo) * inverse_z_interval, 0.0), 1.0)
    w_slope = (min(max((opz_b - 1.0 - z_lo) * inverse_z_interval, 0.0), 1.0) - w_a) * inverse_piece
    f0, f1, f2, f3, f4, g0, g1, g2, g3 = _comoving_field(c0, c1, c2, c3, u0, u1, u2, u3, blended, w_a, w_slope)
    slope_opz = (opz_b - opz_a) * inverse_piece
    slope_h = (h_b - h_a) * inverse_piece
    dm = cell_mpc * _dispersion_integral(f0, f1, f2, f3, f4, opz_a, slope_opz, piece)
    # Physical density P = F (1+z)^3, with (1+z)^3 linear over the cell.
    d_a = opz_a * opz_a * opz_a
    d_1 = (opz_b * opz_b * opz_b - d_a) * inverse_piece
    p0, p1, p2, p3, p4, p5 = (f0 * d_a, f1 * d_a + f0 * d_1, f2 * d_a + f1 * d_1, f3 * d_a + f2 * d_1,
                              f4 * d_a + f3 * d_1, f4 * d_1)
    # Breakpoints: the cell's ends and the extrema of P between, with P's value (continuous with
    # the previous cell's end), slope and curvature there.
    # (Rows of ``points`` are indexed, never sliced, per cell: a slice is an array, with its reference count.)
    n_ext, extrema = roots_in(p1, 2.0 * p2, 3.0 * p3, 4.0 * p4, 5.0 * p5, piece)
    n_bp = n_ext + 2
    points[0, 0], points[1, 0], points[2, 0], points[3, 0] = 0.0, end_value if end_value >= 0.0 else p0, p1, 2.0 * p2
    for j in range(1, n_ext + 1):
        points[0, j], points[2, j], points[3, j] = extrema[j - 1], 0.0, 0.0
        points[1, j] = evaluate(p0, p1, p2, p3, p4, p5, extrema[j - 1])
    points[0, n_bp - 1] = piece
    points[1, n_bp - 1], points[2, n_bp - 1] = evaluate_with_slope(p0, p1, p2, p3, p4, p5, piece)
    points[3, n_bp - 1] = evaluate(2.0 * p2, 6.0 * p3, 12.0 * p4, 20.0 * p5, 0.0, 0.0, piece)
    # Targets are counted by stepping from the last cell's count (the field moves by little per
    # cell): comparisons in n_e, no logarithm. A cell with extrema first counts at each of its
    # breakpoints, for its near-tangent events and the crossings they claim.
    if k < 0:
        k = _count_below(ln_targets, points[1, 0], uniform and n_targets > 1, ln_targets[0], inverse_spacing)
    if n_ext > 0:
        tangent_events(points[0], points[1], k, n_bp, 2.0 * p2, 6.0 * p3, 12.0 * p4, 20.0 * p5, opz_a, opz_b, piece,
                       rate_unit / cell_mpc, omega0, targets, mass2, m2_per_density, marks, kernel, count,
                       tangent_count, tangent_kernel, cell_edges, cell_kernel)
    weight_term = (w_a, w_slope, g0, g1, g2, g3, inverse_z_interval)
    k = _cross_pieces(p0, p1, p2, p3, p4, p5, n_bp, n_ext > 0, k, points, marks, targets, mass2, cell_mpc,
                      kernel_unit, opz_a, slope_opz, h_a, slope_h, d_a, d_1, blended, weight_term, kernel, count,
                      cell_edges, cell_kernel)
    return points[1, n_bp - 1], k, dm


@both_targets
def _cross_pieces(p0, p1, p2, p3, p4, p5, n_bp, has_extrema, k, points, marks, targets, mass2, cell_mpc,
                  kernel_unit, opz_a, slope_opz, h_a, slope_h, d_a, d_1, blended, weight_term, kernel, count,
                  cell_edges, cell_kernel):
    """Add the Landau-Zener crossings of a cell's monotone pieces (between breakpoints ``points``),
    leaving out those its near-tangent events claimed (``marks``); return the targets below its exit."""
    n_targets = targets.shape[0]
    for j in range(n_bp - 1):
        # Each target between the piece's end values is one crossing, met in the order of its
        # values: upwards from the count below the start where the piece rises, else downwards.
        a, b, v_a, v_b = points[0, j], points[0, j + 1], points[1, j], points[1, j + 1]
        rising = v_b > v_a
        if (rising and (k >= n_targets or targets[k] >= v_b)) or (not rising and (k <= 0 or targets[k - 1] < v_b)):
            continue
        start = _hermite_start(a, b, v_a, v_b, points[2, j], points[2, j + 1], points[3, j], points[3, j + 1])
        claims = (marks[1, j], marks[2, j], marks[1, j + 1], marks[2, j + 1]) if has_extrema else (0, 0, 0, 0)
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
    return k


# No reference counting here (numba's private ``_nrt`` flag): the walk allocates nothing and every array it
# touches belongs to its caller, yet with it each inlined solve_cell would count references to its nine
# array arguments, some twenty atomic operations per cell that cost the walk a tenth of its speed.
@numba.njit(cache=True, _nrt=False)
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
    The CPU's walk: the segment's cells are tabulated first (their cube reads overlap),
    then solved in turn (:func:`solve_cell`); :func:`~.streaming.stream_segment` is the
    same walk cell by cell, without tables.

    Polynomials travel as scalars (registers) through inlined helpers: small arrays
    passed between kernels cost more than the arithmetic.
    """
    n_cells = trace_cells(cube_lo.shape, start, direction, length, cells, corners)
    cell_cubics(cube_lo, scale_lo, direction, n_cells, cells, corners, 4)
    if blended:
        cell_cubics(cube_hi, scale_hi, direction, n_cells, cells, corners, 8)
    cell_redshifts(opz_table, hubble_table, chi_step_inverse, chi0, cell_mpc, n_cells, cells)
    opz_a, h_a, inverse_spacing, kernel_unit, inverse_z_interval = segment_constants(
        opz_table, hubble_table, chi_step_inverse, chi0, targets, ln_targets, cell_mpc, rate_unit, blended, z_lo, z_hi)
    end_value = -1.0  # P where the previous cell ended
    k = -1  # the number of targets below it
    dm = 0.0
    s_a = 0.0
    for c in range(n_cells):
        opz_b, h_b = cells[c, 12], cells[c, 13]
        # The upper snapshot's columns are read only in a blend: read always, they cost the walk 5 % (measured).
        end_value, k, dm_cell = solve_cell(
            (cells[c, 4], cells[c, 5], cells[c, 6], cells[c, 7]),
            (cells[c, 8], cells[c, 9], cells[c, 10], cells[c, 11]) if blended else (0.0, 0.0, 0.0, 0.0),
            cells[c, 0] - s_a, opz_a, opz_b, h_a, h_b,
            end_value, k, blended, z_lo, inverse_z_interval, cell_mpc, kernel_unit, targets, ln_targets, mass2,
            uniform, inverse_spacing, rate_unit, m2_per_density, omega0, points, marks, kernel, count, tangent_count,
            tangent_kernel, cell_edges, cell_kernel)
        dm += dm_cell
        s_a = cells[c, 0]
        opz_a, h_a = opz_b, h_b
    return dm * 1.0e6  # Mpc cm^-3 -> pc cm^-3


@numba.njit(cache=True)
def scratch(longest_cells):
    """(cells, corners, points, marks) scratch of one ray's :func:`walk_segment` calls, for segments of at most
    ``longest_cells`` cells of path (a segment crosses at most sqrt(3) cells per cell of path, plus 4)."""
    rows = int(math.sqrt(3.0) * longest_cells) + 8
    return (np.zeros((rows, _CELL_COLUMNS)), np.zeros((rows, 6), dtype=np.int64), np.zeros((4, _MAX_BREAKPOINTS)),
            np.zeros((3, _MAX_BREAKPOINTS), dtype=np.int64))
