"""The segment walk cell by cell, with no tables: the GPU's form of the exact engine's walk.

In and out: those of :func:`~raytrace.kernels.crossings.walk_segment` (whose
``cells`` and ``corners`` tables it leaves unused). Each cell is traversed,
interpolated and solved before the next: the same helpers in the same order as
the CPU's table walk (the traversal's :func:`~.crossings.axis_start`,
:func:`~.crossings.cross_face` and :func:`~.crossings.cell_place`, the cubic of
``_ray_cubic``, the redshift tables' ``_lookup``, :func:`~.crossings.solve_cell`),
so on the CPU both give the same bits. On a GPU, where each thread walks its own
ray, nothing is gained by tabulating a segment's cells first and local memory
costs more than registers; :mod:`.gpu` compiles this function in place of
``walk_segment`` (:mod:`.targets`).
"""

from raytrace.kernels.crossings import (
    _lookup,
    _ray_cubic,
    axis_start,
    cell_place,
    cross_face,
    segment_constants,
    solve_cell,
)
from raytrace.kernels.targets import both_targets


@both_targets(inline=False)
def stream_segment(cube_lo, cube_hi, scale_lo, scale_hi, blended, z_lo, z_hi, start, direction, length, chi0,
                   cell_mpc, opz_table, hubble_table, chi_step_inverse, targets, ln_targets, mass2, uniform,
                   rate_unit, m2_per_density, omega0, cells, corners, points, marks, kernel, count, tangent_count,
                   tangent_kernel, cell_edges, cell_kernel):
    """Walk one segment; add its resonances into one ray's rows; return its DM in pc cm^-3."""
    n0, n1, n2 = cube_lo.shape
    # Position on the interpolation grid: cell centres sit at integer + 1/2.
    ux, uy, uz = start[0] - 0.5, start[1] - 0.5, start[2] - 0.5
    dx, dy, dz = direction[0], direction[1], direction[2]
    x, y, z = axis_start(ux, dx, n0), axis_start(uy, dy, n1), axis_start(uz, dz, n2)
    opz_a, h_a, inverse_spacing, kernel_unit, inverse_z_interval = segment_constants(
        opz_table, hubble_table, chi_step_inverse, chi0, targets, ln_targets, cell_mpc, rate_unit, blended, z_lo, z_hi)
    end_value = -1.0  # P where the previous cell ended
    k = -1  # the number of targets below it
    dm = 0.0
    s = 0.0
    while s < length:
        s_end = min(x[2], y[2], z[2], length)
        if s_end > s:
            tx, i0, i1 = cell_place(x, ux, dx, s, n0)
            ty, j0, j1 = cell_place(y, uy, dy, s, n1)
            tz, k0, k1 = cell_place(z, uz, dz, s, n2)
            c0, c1, c2, c3 = _ray_cubic(cube_lo, i0, i1, j0, j1, k0, k1, tx, ty, tz, dx, dy, dz)
            u0 = u1 = u2 = u3 = 0.0
            if blended:
                u0, u1, u2, u3 = _ray_cubic(cube_hi, i0, i1, j0, j1, k0, k1, tx, ty, tz, dx, dy, dz)
            chi = chi0 + s_end * cell_mpc
            opz_b = _lookup(opz_table, chi_step_inverse, chi)
            h_b = _lookup(hubble_table, chi_step_inverse, chi)
            end_value, k, dm_cell = solve_cell(
                (scale_lo * c0, scale_lo * c1, scale_lo * c2, scale_lo * c3),
                (scale_hi * u0, scale_hi * u1, scale_hi * u2, scale_hi * u3), s_end - s, opz_a, opz_b, h_a, h_b,
                end_value, k, blended, z_lo, inverse_z_interval, cell_mpc, kernel_unit, targets, ln_targets, mass2,
                uniform, inverse_spacing, rate_unit, m2_per_density, omega0, points, marks, kernel, count,
                tangent_count, tangent_kernel, cell_edges, cell_kernel)
            dm += dm_cell
            opz_a, h_a = opz_b, h_b
        if s_end >= length:
            break
        s = s_end
        x, y, z = cross_face(x, y, z, dx, dy, dz, n0, n1, n2)
    return dm * 1.0e6  # Mpc cm^-3 -> pc cm^-3
