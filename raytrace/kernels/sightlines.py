"""Sightline batches: each ray walks its segments through randomly transformed box copies.

In: one box's cube (two when blending), the pieces of the ray plan that this box
(pair) serves (segment index and chi range of each), every ray's per-segment start
point and direction (cells), and the tables and targets of
:func:`~raytrace.kernels.crossings.walk_segment`. Out: added into per-ray rows of
kernel, crossing counts, near-tangent counts and kernel, and dispersion measure; and per ray, the
kernel of each redshift cell (``cell_edges``: each mass's inner edges in 1+z, :mod:`.zcells`).

:func:`sightline_ray` is one ray's work, compiled for both targets
(:mod:`.targets`); :func:`trace_pieces` spreads the rays over CPU threads, and
:mod:`.gpu` over GPU threads.
"""

import numba
import numpy as np

from raytrace.kernels.crossings import scratch, walk_segment
from raytrace.kernels.targets import both_targets


@both_targets(inline=False)
def sightline_ray(r, cube_lo, cube_hi, scale_lo, scale_hi, blended, z_lo, z_hi, piece_segment, piece_chi_a,
                  piece_chi_b, segment_chi0, cell_mpc, starts, directions, opz_table, hubble_table,
                  chi_step_inverse, targets, ln_targets, mass2, uniform, rate_unit, m2_per_density, omega0, cell_edges,
                  cells, corners, points, marks, point, kernel, count, tangent_count, tangent_kernel, dispersion,
                  cell_kernel):
    """Ray r's pieces, each walked from its start (``point``: scratch of 3; the others: of the walk)."""
    for p in range(piece_segment.shape[0]):
        g = piece_segment[p]
        offset = (piece_chi_a[p] - segment_chi0[g]) / cell_mpc
        for axis in range(3):
            point[axis] = starts[r, g, axis] + directions[r, g, axis] * offset
        dispersion[r] += walk_segment(
            cube_lo, cube_hi, scale_lo, scale_hi, blended, z_lo, z_hi, point, directions[r, g],
            (piece_chi_b[p] - piece_chi_a[p]) / cell_mpc, piece_chi_a[p], cell_mpc, opz_table, hubble_table,
            chi_step_inverse, targets, ln_targets, mass2, uniform, rate_unit, m2_per_density, omega0, cells,
            corners, points, marks, kernel[r], count[r], tangent_count[r], tangent_kernel[r], cell_edges,
            cell_kernel[r])


@numba.njit(cache=True, parallel=True)
def trace_pieces(cube_lo, cube_hi, scale_lo, scale_hi, blended, z_lo, z_hi, piece_segment, piece_chi_a,
                 piece_chi_b, segment_chi0, cell_mpc, starts, directions, opz_table, hubble_table,
                 chi_step_inverse, targets, ln_targets, mass2, uniform, rate_unit, m2_per_density, omega0, cell_edges,
                 kernel, count, tangent_count, tangent_kernel, dispersion, cell_kernel):
    """Piece p of ray r starts at starts[r, g] + directions[r, g] * (chi_a - segment_chi0[g]) / cell, g = piece_segment[p]."""
    n_pieces = piece_segment.shape[0]
    longest = 0.0
    for p in range(n_pieces):
        longest = max(longest, (piece_chi_b[p] - piece_chi_a[p]) / cell_mpc)
    for r in numba.prange(kernel.shape[0]):
        cells, corners, points, marks = scratch(longest)
        sightline_ray(r, cube_lo, cube_hi, scale_lo, scale_hi, blended, z_lo, z_hi, piece_segment, piece_chi_a,
                      piece_chi_b, segment_chi0, cell_mpc, starts, directions, opz_table, hubble_table,
                      chi_step_inverse, targets, ln_targets, mass2, uniform, rate_unit, m2_per_density, omega0,
                      cell_edges, cells, corners, points, marks, np.empty(3), kernel, count, tangent_count,
                      tangent_kernel, dispersion, cell_kernel)
