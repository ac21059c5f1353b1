"""The engine raytrace had before the exact crossing solver, kept ONLY as the benchmarks' baseline.

A faithful, minimal copy of commit 8dc5f14 (raytrace/rays.py ``plan_samples``,
raytrace/kernels/sampling.py ``add_log_density``, raytrace/kernels/crossings.py
``add_crossings``, raytrace/engine.py ``RayTracer.trace`` and ``Tracer._crossings``):
every ray samples ln n_e of the periodic trilinear interpolant at a fixed step
(half a cell by default), floored at 1e-8 of the box mean, and takes each
crossing's rate from the finite difference between two samples. The kernels are
the same numba code, compiled here; only what the sightline benchmark runs is kept
(one thread count, no sky lattice, no cluster state). Nothing in raytrace uses
this module; benchmarks/sightline_speed.py measures the new engine against it.

In: a box series, a sorted mass grid (eV), the redshift the boxes serve, a seed,
the step in cells and a cosmology. Out (``HalfCellTracer.trace``): per-ray
kernel_boxes (eV), crossings and dispersion_measure_boxes (pc cm^-3). Ray i gets
the same direction and per-segment copy transforms as in the new engine (both
draw them with :func:`raytrace.tracing.rays.draw_rays` over the same segments), so the
two engines sample the same field along the same lines.
"""

import math
from dataclasses import dataclass

import numba
import numpy as np

from raytrace.physics.constants import C_MPC_S, HBAR_EV_S, PLASMA_MASS2_PER_DENSITY
from raytrace.tracing.rays import draw_rays

#: The old engine's floor on sampled densities, in units of the box mean (8dc5f14 engine.DENSITY_FLOOR).
DENSITY_FLOOR = 1e-8


@dataclass(frozen=True)
class SamplingPlan:
    """Sample positions and segments along a ray, identical for every ray (8dc5f14 rays.SamplingPlan).

    chi, u : (n_samples,) comoving distance (Mpc) and ln(1+z) of each sample.
    segment_first, segment_stop : (n_segments,) sample index range of each segment.
    segment_box : (n_segments,) the box whose size sets the segment.
    local_cells : (n_samples,) distance of each sample from its segment's start (cells).
    weights : (n_boxes, n_samples) blending weight of each box at each sample.
    """

    chi: np.ndarray
    u: np.ndarray
    segment_first: np.ndarray
    segment_stop: np.ndarray
    segment_box: np.ndarray
    local_cells: np.ndarray
    weights: np.ndarray

    @property
    def n_samples(self):
        return self.chi.size

    @property
    def n_segments(self):
        return self.segment_first.size

    @property
    def proper_time_steps(self):
        """Proper time (s) between consecutive samples: dt = a dchi / c, trapezoid in a."""
        return np.diff(self.chi) * 0.5 * (np.exp(-self.u[:-1]) + np.exp(-self.u[1:])) / C_MPC_S

    def segments_of(self, box_index):
        """Indices of the segments in which box ``box_index`` has non-zero weight."""
        used = np.flatnonzero(self.weights[box_index] != 0)
        if used.size == 0:
            return np.zeros(0, dtype=np.int64)
        return np.unique(np.searchsorted(self.segment_stop, used, side="right"))


def plan_samples(cosmology, series, z_stop, step_cells):
    """The :class:`SamplingPlan` of a box series serving 0 <= z <= z_stop at ``step_cells``."""
    pieces = series.intervals(z_stop)
    chis, firsts, stops, seg_boxes, locals_ = [], [], [], [], []
    n = 0
    for p, (z_start, z_end, box) in enumerate(pieces):
        size, cell = series.boxes[box].box_size_cMpc, series.boxes[box].cell_size_cMpc
        chi_a, chi_b = (float(c) for c in cosmology.comoving_distance_Mpc([z_start, z_end]))
        if p == 0:
            chi_a = 0.0
        count = int(np.floor((chi_b - chi_a) / (step_cells * cell) * (1 + 1e-12)))
        chi = chi_a + step_cells * cell * np.arange(count + 1)
        chi = chi[chi < chi_b]
        if p == len(pieces) - 1:
            chi = np.append(chi, chi_b)
        segment = np.floor((chi - chi_a) / size).astype(np.int64)
        for g in np.unique(segment):
            in_segment = np.flatnonzero(segment == g)
            firsts.append(n + in_segment[0])
            stops.append(n + in_segment[-1] + 1)
            seg_boxes.append(box)
        locals_.append((chi - chi_a - segment * size) / cell)
        chis.append(chi)
        n += chi.size
    chi = np.concatenate(chis)
    u = np.log1p(cosmology.redshift_at_distance(np.minimum(chi, chi[-1])))
    u[0] = 0.0
    low, high, weight_high = series.serving(np.expm1(u))
    weights = np.zeros((len(series.boxes), chi.size))
    np.add.at(weights, (low, np.arange(chi.size)), 1.0 - weight_high)
    np.add.at(weights, (high, np.arange(chi.size)), weight_high)
    return SamplingPlan(chi=chi, u=u, segment_first=np.asarray(firsts, dtype=np.int64),
                        segment_stop=np.asarray(stops, dtype=np.int64),
                        segment_box=np.asarray(seg_boxes, dtype=np.int64),
                        local_cells=np.concatenate(locals_), weights=weights)


@numba.njit(cache=True, inline="always")
def _wrap(index, n):
    while index < 0:
        index += n
    while index >= n:
        index -= n
    return index


@numba.njit(cache=True)
def trilinear_periodic(cube, x, y, z):
    """Value of the periodic trilinear interpolant of ``cube`` at (x, y, z) in cells (centres at +1/2)."""
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
    """out[r, j] += weights[j] * (log_scale + ln(max(interp(start + direction * local_cells[j]), floor)))."""
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


@numba.njit(cache=True, inline="always")
def _count_below(targets, value, uniform, first_target, inverse_spacing):
    """Number of targets < value (targets sorted increasing)."""
    n = targets.shape[0]
    if uniform:
        k = int(min(max(math.ceil((value - first_target) * inverse_spacing), 0.0), float(n)))
        while k > 0 and targets[k - 1] >= value:
            k -= 1
        while k < n and targets[k] < value:
            k += 1
        return k
    return np.searchsorted(targets, value, side="left")


@numba.njit(cache=True, parallel=True)
def add_crossings(chi, u, dt, ln_density, targets, mass2, uniform, hbar_eV_s, kernel, count, dispersion):
    """Crossings between consecutive samples of physical ln n_e; finite-difference rates."""
    n_rays, n_samples = ln_density.shape
    n_targets = targets.shape[0]
    uniform_grid = uniform and n_targets > 1
    first_target = targets[0]
    inverse_spacing = (n_targets - 1) / (targets[-1] - targets[0]) if n_targets > 1 else 1.0
    scale = np.exp(-u)
    pi_mass2 = math.pi * mass2
    for r in numba.prange(n_rays):
        dm = 0.0
        y0 = ln_density[r, 0]
        g0 = math.exp(y0 - 2.0 * u[0])
        below0 = _count_below(targets, y0, uniform_grid, first_target, inverse_spacing)
        for j in range(n_samples - 1):
            y1 = ln_density[r, j + 1]
            g1 = math.exp(y1 - 2.0 * u[j + 1])
            dm += 0.5 * (g0 + g1) * (chi[j + 1] - chi[j])
            below1 = _count_below(targets, y1, uniform_grid, first_target, inverse_spacing)
            if below1 != below0:
                inverse_dy = 1.0 / (y1 - y0)
                per_scale = dt[j] / (abs(y1 - y0) * hbar_eV_s)
                a0, da = scale[j], scale[j + 1] - scale[j]
                for k in range(min(below0, below1), max(below0, below1)):
                    a_crossing = a0 + (targets[k] - y0) * inverse_dy * da
                    kernel[r, k] += pi_mass2[k] * a_crossing * per_scale
                    count[r, k] += 1
            y0, g0, below0 = y1, g1, below1
        dispersion[r] += dm * 1.0e6


class HalfCellTracer:
    """The old engine's RayTracer: sample every ``step`` cells, then integrate the crossings."""

    def __init__(self, series, mass_eV, z_boxes, seed, step, cosmology, density_floor=DENSITY_FLOOR):
        self.boxes = series.boxes
        self.seed = int(seed)
        self.plan = plan_samples(cosmology, series, z_boxes, step)
        self.dt = self.plan.proper_time_steps
        self.targets = np.log(mass_eV**2 / PLASMA_MASS2_PER_DENSITY)
        self.mass2 = mass_eV**2
        spacing = np.diff(self.targets)
        self.uniform = bool(spacing.size > 0 and np.allclose(spacing, spacing.mean(), rtol=1e-9, atol=0))
        self.floors = [density_floor * box.describe()["mean_comoving_density_cm3"] / box.comoving_scale
                       for box in self.boxes]
        self.n_cells = np.array([box.n_cells for box in self.boxes])
        self.segments = [self.plan.segments_of(b) for b in range(len(self.boxes))]

    def trace(self, ray_indices):
        """Per-ray kernel_boxes, crossings, dispersion_measure_boxes and direction."""
        plan = self.plan
        n = len(ray_indices)
        ray_direction, starts, directions, _ = draw_rays(self.seed, np.asarray(ray_indices), plan, self.n_cells)
        ln_density = np.zeros((n, plan.n_samples))
        for b, box in enumerate(self.boxes):
            used = self.segments[b]
            if used.size == 0:
                continue
            add_log_density(box.data, math.log(box.comoving_scale), self.floors[b], plan.segment_first[used],
                            plan.segment_stop[used], plan.local_cells, np.ascontiguousarray(starts[:, used]),
                            np.ascontiguousarray(directions[:, used]), plan.weights[b], ln_density)
        ln_density += 3.0 * plan.u[None, :]  # comoving -> physical at each sample's redshift
        kernel = np.zeros((n, self.mass2.size))
        count = np.zeros((n, self.mass2.size), dtype=np.int32)
        dispersion = np.zeros(n)
        add_crossings(plan.chi, plan.u, self.dt, ln_density, self.targets, self.mass2, self.uniform, HBAR_EV_S,
                      kernel, count, dispersion)
        return {"kernel_boxes": kernel, "crossings": count, "dispersion_measure_boxes": dispersion,
                "direction": ray_direction}
