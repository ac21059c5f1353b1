"""Ray geometry: where each sightline goes and which copy of which box it sees.

In: a box series (which box serves which redshift, their sizes and grids), the
redshift range the boxes serve, the step in cells, and (seed, ray index). Out: a :class:`SamplingPlan` shared by all
rays (sample distances chi and u = ln(1+z), segments, which box serves each
sample with which blending weight) and, per ray, its direction and one random
cube symmetry plus periodic shift per segment.

The universe along a ray is a stack of box copies. A segment is one box length
of travel through one copy; the next segment enters a new copy with a fresh
random transform (one of the 48 symmetries of the cube, and a uniformly random
shift), so no structure repeats along a ray. Applying a symmetry R and a shift
to the box is the same as starting the segment at a random point and turning
the direction by R, which is what is drawn. A box interval (the redshifts one
snapshot serves) starts a new segment, since box sizes may differ.
"""

from dataclasses import dataclass
from itertools import permutations, product

import numpy as np

from .errors import InputError


def _cube_symmetries():
    """The 48 signed permutation matrices: rotations and reflections of the cube."""
    matrices = []
    for perm in permutations(range(3)):
        for signs in product((1, -1), repeat=3):
            matrix = np.zeros((3, 3))
            for row, (column, sign) in enumerate(zip(perm, signs)):
                matrix[row, column] = sign
            matrices.append(matrix)
    return np.array(matrices)


CUBE_SYMMETRIES = _cube_symmetries()


@dataclass(frozen=True)
class SamplingPlan:
    """Sample positions and segments along a ray, identical for every ray.

    Attributes
    ----------
    chi, u : (n_samples,) comoving distance (Mpc) and ln(1+z) of each sample.
    segment_first, segment_stop : (n_segments,) sample index range of each segment.
    segment_box : (n_segments,) index of the box whose size sets the segment.
    local_cells : (n_samples,) distance of each sample from its segment's start,
        in cells of that segment's box.
    weights : (n_boxes, n_samples) blending weight of each box at each sample
        (one box with weight 1 per sample unless blending).
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
    def proper_time_steps(self):
        """Proper time (s) between consecutive samples: dt = a dchi / c, trapezoid in a."""
        from .constants import C_MPC_S

        return np.diff(self.chi) * 0.5 * (np.exp(-self.u[:-1]) + np.exp(-self.u[1:])) / C_MPC_S

    @property
    def n_segments(self):
        return self.segment_first.size

    def segments_of(self, box_index):
        """Indices of the segments in which box ``box_index`` has non-zero weight."""
        used = np.flatnonzero(self.weights[box_index] != 0)
        if used.size == 0:
            return np.zeros(0, dtype=np.int64)
        owner = np.searchsorted(self.segment_stop, used, side="right")
        return np.unique(owner)


def plan_samples(cosmology, series, z_stop, step_cells):
    """Build the :class:`SamplingPlan` for a box series serving 0 <= z <= z_stop.

    The series says which box serves each redshift (``intervals``: the box whose
    size and grid set the segments) and with which weights (``serving``: the
    nearest snapshot, or the two bracketing ones when blending).
    """
    if not (isinstance(step_cells, (int, float)) and step_cells > 0):
        raise InputError(f"step: expected a positive step in cells, got {step_cells!r}")
    if not (isinstance(z_stop, (int, float)) and z_stop > 0):
        raise InputError(f"z_max: expected a positive redshift, got {z_stop!r}")
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
    return SamplingPlan(
        chi=chi,
        u=u,
        segment_first=np.asarray(firsts, dtype=np.int64),
        segment_stop=np.asarray(stops, dtype=np.int64),
        segment_box=np.asarray(seg_boxes, dtype=np.int64),
        local_cells=np.concatenate(locals_),
        weights=weights,
    )


def draw_rays(seed, ray_indices, plan, n_cells):
    """Direction and per-segment geometry of the rays ``ray_indices``.

    Returns ``(direction, starts, directions, symmetries)``: unit directions
    (n_rays, 3), each segment's start point in cells of that segment's box
    (n_rays, n_segments, 3), the segment's direction after its cube symmetry
    (n_rays, n_segments, 3), and the symmetry indices (n_rays, n_segments).
    Ray i's numbers come from a stream fixed by (seed, i) alone.
    """
    from .kernels.geometry import ray_geometry

    indices = np.ascontiguousarray(ray_indices, dtype=np.int64)
    n = indices.size
    direction = np.empty((n, 3))
    starts = np.empty((n, plan.n_segments, 3))
    directions = np.empty((n, plan.n_segments, 3))
    symmetries = np.empty((n, plan.n_segments), dtype=np.int64)
    segment_cells = np.asarray(n_cells, dtype=float)[plan.segment_box]
    ray_geometry(int(seed), indices, segment_cells, CUBE_SYMMETRIES, direction, starts, directions, symmetries)
    return direction, starts, directions, symmetries
