"""CUDA kernels of the exact engine (numba-cuda): one GPU thread per ray.

In and out: those of :func:`~.sightlines.trace_pieces` and
:func:`~.lattice.trace_lattice`, as device arrays. Each thread runs the per-ray
body the CPU runs (:func:`~.sightlines.sightline_ray`, :func:`~.lattice.lattice_ray`),
compiled for the GPU from the same Python source (:mod:`.targets`), its segments
walked cell by cell by :func:`~.streaming.stream_segment` in place of the CPU's
table walk; its scratch lives in the thread's local memory. A thread writes only
its own ray's rows, in the CPU's order: no atomics, so the results depend neither
on the launch's size nor on the order of the threads.

Importing this module imports numba.cuda (:func:`~.targets.cuda_target`).
"""

import numba

from raytrace.kernels import crossings, streaming, tangent
from raytrace.kernels import lattice, sightlines  # noqa: F401  (registers their per-ray bodies for both targets)
from raytrace.kernels.targets import cuda_target, device_twins

cuda = cuda_target()


@cuda.jit(device=True)
def _cube_root(x):
    """x^(1/3) for x >= 0 (numba-cuda compiles no numpy.cbrt)."""
    return x ** (1.0 / 3.0)


_TWINS = device_twins(cuda.jit(device=True), {crossings.walk_segment: streaming.stream_segment,
                                              tangent.cube_root: _cube_root})
_sightline_ray = _TWINS[("raytrace.kernels.sightlines", "sightline_ray")]
_lattice_ray = _TWINS[("raytrace.kernels.lattice", "lattice_ray")]
_BREAKPOINTS = crossings._MAX_BREAKPOINTS
_COLUMNS = crossings._CELL_COLUMNS


@cuda.jit(cache=True)
def trace_pieces(cube_lo, cube_hi, scale_lo, scale_hi, blended, z_lo, z_hi, piece_segment, piece_chi_a,
                 piece_chi_b, segment_chi0, cell_mpc, starts, directions, opz_table, hubble_table,
                 chi_step_inverse, targets, ln_targets, mass2, uniform, rate_unit, m2_per_density, omega0, cell_edges,
                 kernel, count, tangent_count, tangent_kernel, dispersion, cell_kernel):
    r = cuda.grid(1)
    if r >= kernel.shape[0]:
        return
    points = cuda.local.array((4, _BREAKPOINTS), numba.float64)
    marks = cuda.local.array((3, _BREAKPOINTS), numba.int64)
    # The streaming walk keeps no table of cells: one row of each stands in for the CPU walk's.
    cells = cuda.local.array((1, _COLUMNS), numba.float64)
    corners = cuda.local.array((1, 6), numba.int64)
    point = cuda.local.array(3, numba.float64)
    _sightline_ray(r, cube_lo, cube_hi, scale_lo, scale_hi, blended, z_lo, z_hi, piece_segment, piece_chi_a,
                   piece_chi_b, segment_chi0, cell_mpc, starts, directions, opz_table, hubble_table,
                   chi_step_inverse, targets, ln_targets, mass2, uniform, rate_unit, m2_per_density, omega0, cell_edges,
                   cells, corners, points, marks, point, kernel, count, tangent_count, tangent_kernel, dispersion,
                   cell_kernel)


@cuda.jit(cache=True)
def trace_lattice(cube_lo, cube_hi, scale_lo, scale_hi, blended, z_lo, z_hi, chi_a, chi_b, directions, observer,
                  box_size, seed, copy_key, symmetries, randomise, opz_table, hubble_table, chi_step_inverse,
                  targets, ln_targets, mass2, uniform, rate_unit, m2_per_density, omega0, cell_edges,
                  kernel, count, tangent_count, tangent_kernel, dispersion, cell_kernel):
    r = cuda.grid(1)
    if r >= kernel.shape[0]:
        return
    points = cuda.local.array((4, _BREAKPOINTS), numba.float64)
    marks = cuda.local.array((3, _BREAKPOINTS), numba.int64)
    cells = cuda.local.array((1, _COLUMNS), numba.float64)
    corners = cuda.local.array((1, 6), numba.int64)
    copy = cuda.local.array(3, numba.int64)
    next_face = cuda.local.array(3, numba.float64)
    step = cuda.local.array(3, numba.float64)
    point = cuda.local.array(3, numba.float64)
    heading = cuda.local.array(3, numba.float64)
    _lattice_ray(r, cube_lo, cube_hi, scale_lo, scale_hi, blended, z_lo, z_hi, chi_a, chi_b, directions, observer,
                 box_size, seed, copy_key, symmetries, randomise, opz_table, hubble_table, chi_step_inverse, targets,
                 ln_targets, mass2, uniform, rate_unit, m2_per_density, omega0, cell_edges, cells, corners, points,
                 marks, copy, next_face, step, point, heading, kernel, count, tangent_count, tangent_kernel, dispersion,
                 cell_kernel)
