"""Sky rays: straight lines from one observer through a lattice of transformed box copies.

In: one box's cube (two when blending), the chi range this box (pair) serves, the
rays' unit directions, the observer (Mpc), the box size, and the copy keys of
:func:`~raytrace.kernels.geometry.copy_transform`. Out: added into per-ray rows as
:func:`~raytrace.kernels.sightlines.trace_pieces` does.

Each ray crosses the lattice copy by copy (a grid traversal over copies); inside
a copy the transform x' = M (x - half) + half + shift maps the ray to a straight
segment of the box, which :func:`~raytrace.kernels.crossings.walk_segment` solves.
:func:`lattice_ray` is one ray's work, compiled for both targets (:mod:`.targets`);
:func:`trace_lattice` spreads the rays over CPU threads, and :mod:`.gpu` over GPU threads.
"""

import math

import numba
import numpy as np

from raytrace.kernels.crossings import scratch, walk_segment
from raytrace.kernels.geometry import copy_transform
from raytrace.kernels.targets import both_targets


@both_targets(inline=False)
def lattice_ray(r, cube_lo, cube_hi, scale_lo, scale_hi, blended, z_lo, z_hi, chi_a, chi_b, directions, observer,
                box_size, seed, copy_key, symmetries, randomise, opz_table, hubble_table, chi_step_inverse, targets,
                ln_targets, mass2, uniform, rate_unit, m2_per_density, omega0, cell_edges, cells, corners, points, marks,
                copy, next_face, step, point, heading, kernel, count, tangent_count, tangent_kernel, dispersion,
                cell_kernel):
    """Ray r from chi_a to chi_b, copy by copy (``copy`` (int64), ``next_face``, ``step``, ``point``,
    ``heading``: scratch of 3; the others: of the walk)."""
    n = cube_lo.shape[0]
    cells_per_mpc = n / box_size
    cell_mpc = box_size / n
    half = 0.5 * n
    d = directions[r]
    for axis in range(3):
        position = observer[axis] + chi_a * d[axis]
        copy[axis] = int(math.floor(position / box_size))
        if d[axis] > 0:
            next_face[axis] = ((copy[axis] + 1) * box_size - observer[axis]) / d[axis]
            step[axis] = box_size / d[axis]
        elif d[axis] < 0:
            next_face[axis] = (copy[axis] * box_size - observer[axis]) / d[axis]
            step[axis] = -box_size / d[axis]
        else:
            next_face[axis] = math.inf
            step[axis] = math.inf
    chi = chi_a
    while chi < chi_b:
        axis_next = 0
        if next_face[1] < next_face[axis_next]:
            axis_next = 1
        if next_face[2] < next_face[axis_next]:
            axis_next = 2
        chi_end = min(next_face[axis_next], chi_b)
        if chi_end > chi:
            symmetry = np.int64(0)
            shift0 = shift1 = shift2 = 0.0
            if randomise:
                drawn, s0, s1, s2 = copy_transform(seed, copy_key, copy[0], copy[1], copy[2])
                symmetry = np.int64(drawn)  # a uint64 would unify with int64 to float
                shift0, shift1, shift2 = s0 * n, s1 * n, s2 * n
            local0 = (observer[0] + chi * d[0] - copy[0] * box_size) * cells_per_mpc - half
            local1 = (observer[1] + chi * d[1] - copy[1] * box_size) * cells_per_mpc - half
            local2 = (observer[2] + chi * d[2] - copy[2] * box_size) * cells_per_mpc - half
            m = symmetries[symmetry]
            point[0] = m[0, 0] * local0 + m[0, 1] * local1 + m[0, 2] * local2 + half + shift0
            point[1] = m[1, 0] * local0 + m[1, 1] * local1 + m[1, 2] * local2 + half + shift1
            point[2] = m[2, 0] * local0 + m[2, 1] * local1 + m[2, 2] * local2 + half + shift2
            for a in range(3):
                heading[a] = m[a, 0] * d[0] + m[a, 1] * d[1] + m[a, 2] * d[2]
            dispersion[r] += walk_segment(
                cube_lo, cube_hi, scale_lo, scale_hi, blended, z_lo, z_hi, point, heading,
                (chi_end - chi) * cells_per_mpc, chi, cell_mpc, opz_table, hubble_table, chi_step_inverse,
                targets, ln_targets, mass2, uniform, rate_unit, m2_per_density, omega0, cells, corners, points, marks,
                kernel[r], count[r], tangent_count[r], tangent_kernel[r], cell_edges, cell_kernel[r])
        if next_face[axis_next] >= chi_b:
            break
        chi = chi_end
        copy[axis_next] += 1 if d[axis_next] > 0 else -1
        next_face[axis_next] += step[axis_next]


@numba.njit(cache=True, parallel=True)
def trace_lattice(cube_lo, cube_hi, scale_lo, scale_hi, blended, z_lo, z_hi, chi_a, chi_b, directions, observer,
                  box_size, seed, copy_key, symmetries, randomise, opz_table, hubble_table, chi_step_inverse,
                  targets, ln_targets, mass2, uniform, rate_unit, m2_per_density, omega0, cell_edges,
                  kernel, count, tangent_count, tangent_kernel, dispersion, cell_kernel):
    n = cube_lo.shape[0]
    for r in numba.prange(kernel.shape[0]):
        cells, corners, points, marks = scratch(math.sqrt(3.0) * n)  # a copy's longest chord is its diagonal
        lattice_ray(r, cube_lo, cube_hi, scale_lo, scale_hi, blended, z_lo, z_hi, chi_a, chi_b, directions, observer,
                    box_size, seed, copy_key, symmetries, randomise, opz_table, hubble_table, chi_step_inverse,
                    targets, ln_targets, mass2, uniform, rate_unit, m2_per_density, omega0, cell_edges, cells, corners,
                    points, marks, np.empty(3, dtype=np.int64), np.empty(3), np.empty(3), np.empty(3), np.empty(3),
                    kernel, count, tangent_count, tangent_kernel, dispersion, cell_kernel)
