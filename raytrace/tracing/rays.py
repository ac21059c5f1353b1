"""Ray geometry: where each sightline goes and which copy of which box it sees.

In: a box series (which box serves which redshift, their sizes and grids), the
redshift range the boxes serve, and (seed, ray index). Out: a :class:`RayPlan`
shared by all rays (spans of comoving distance served by one snapshot or one
blended pair, box-length segments, tables of 1+z and H/c along chi) and, per
ray, its direction and one random cube symmetry plus periodic shift per segment.

The universe along a ray is a stack of box copies. A segment is one box length
of travel through one copy; the next segment enters a new copy with a fresh
random transform (one of the 48 symmetries of the cube, and a uniformly random
shift), so no structure repeats along a ray. Applying a symmetry R and a shift
to the box is the same as starting the segment at a random point and turning
the direction by R, which is what is drawn. A box interval (the redshifts one
snapshot serves) starts a new segment, since box sizes may differ. With
blending, a span ends at each snapshot redshift too, where the bracketing pair
changes (the blended field is continuous there).
"""

from dataclasses import dataclass
from itertools import permutations, product

import numpy as np

from raytrace.core.errors import InputError
from raytrace.physics.constants import C_MPC_S


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


#: Spacing of the 1+z and H/c tables in cells of the finest box: linear interpolation
#: between table points is then good to ~1e-9 in 1+z (the curvature of z(chi) is ~(H/c)^2).
TABLE_CELLS = 0.25


@dataclass(frozen=True)
class RayPlan:
    """Spans, segments and pieces of comoving distance, identical for every ray.

    Attributes
    ----------
    span_chi_a, span_chi_b : (n_spans,) comoving distance (Mpc) each span covers.
    span_box : (n_spans,) the box whose grid and size set the span's geometry.
    span_low, span_high : (n_spans,) the snapshots that serve the span: one box
        (low == high), or the blended pair bracketing it.
    segment_chi0 : (n_segments,) where each box-length segment starts (Mpc).
    segment_box : (n_segments,) index of the box whose size sets the segment.
    piece_segment, piece_span, piece_chi_a, piece_chi_b : (n_pieces,) spans cut
        at segment ends: the straight runs a sightline walks through one copy.
    chi_step : spacing (Mpc) of the tables, which start at chi = 0.
    one_plus_z, hubble_over_c : 1+z and H(z)/c (1/Mpc) at chi = 0, chi_step, ...
    """

    span_chi_a: np.ndarray
    span_chi_b: np.ndarray
    span_box: np.ndarray
    span_low: np.ndarray
    span_high: np.ndarray
    segment_chi0: np.ndarray
    segment_box: np.ndarray
    piece_segment: np.ndarray
    piece_span: np.ndarray
    piece_chi_a: np.ndarray
    piece_chi_b: np.ndarray
    chi_step: float
    one_plus_z: np.ndarray
    hubble_over_c: np.ndarray

    @property
    def n_segments(self):
        return self.segment_chi0.size

    @property
    def n_spans(self):
        return self.span_chi_a.size

    @property
    def chi_end(self):
        return float(self.span_chi_b[-1])

    def pieces_of(self, span):
        """Indices of the pieces of span ``span``."""
        return np.flatnonzero(self.piece_span == span)


def _spans(cosmology, series, z_stop):
    """(chi_a, chi_b, geometry box, low, high) for each stretch served by one snapshot or pair."""
    spans = []
    for p, (z_start, z_end, box) in enumerate(series.intervals(z_stop)):
        cuts = [z_start, z_end]
        if series.blend:
            cuts = sorted({z_start, z_end, *(float(z) for z in series.redshifts if z_start < z < z_end)})
        for z_a, z_b in zip(cuts[:-1], cuts[1:]):
            low, high, _ = series.serving(np.array([0.5 * (z_a + z_b)]))
            chi_a, chi_b = (float(c) for c in cosmology.comoving_distance_Mpc([z_a, z_b]))
            if z_a == 0.0:
                chi_a = 0.0
            spans.append((chi_a, chi_b, box, int(low[0]), int(high[0])))
    return spans


def plan_rays(cosmology, series, z_stop):
    """Build the :class:`RayPlan` for a box series serving 0 <= z <= z_stop.

    The series says which box serves each redshift (``intervals``: the box whose
    size and grid set the segments) and with which partner (``serving``: the
    nearest snapshot, or the two bracketing ones when blending).
    """
    if isinstance(z_stop, bool) or not (isinstance(z_stop, (int, float, np.integer, np.floating)) and z_stop > 0):
        raise InputError(f"z_max: expected a positive redshift, got {z_stop!r}")
    spans = _spans(cosmology, series, float(z_stop))
    seg_chi0, seg_box = [], []
    piece_segment, piece_span, piece_a, piece_b = [], [], [], []
    interval_start = {}
    for index, (chi_a, chi_b, box, _, _) in enumerate(spans):
        size = series.boxes[box].box_size_cMpc
        # Segments restart where a box's interval starts (its first span), every box length after.
        if index == 0 or spans[index - 1][2] != box:
            interval_start = {"chi": chi_a, "first_segment": len(seg_chi0)}
        origin = interval_start["chi"]
        k_first = int(np.floor((chi_a - origin) / size * (1 + 1e-12)))
        k_last = int(np.ceil((chi_b - origin) / size * (1 - 1e-12))) - 1
        for k in range(k_first, max(k_last, k_first) + 1):
            segment = interval_start["first_segment"] + k
            while len(seg_chi0) <= segment:
                seg_chi0.append(origin + (len(seg_chi0) - interval_start["first_segment"]) * size)
                seg_box.append(box)
            a, b = max(chi_a, origin + k * size), min(chi_b, origin + (k + 1) * size)
            if b > a:
                piece_segment.append(segment)
                piece_span.append(index)
                piece_a.append(a)
                piece_b.append(b)
    chi_end = spans[-1][1]
    finest = min(box.cell_size_cMpc for box in series.boxes)
    n_table = int(np.ceil(chi_end / (TABLE_CELLS * finest))) + 2
    chi_step = chi_end / (n_table - 2)
    chi = np.minimum(chi_step * np.arange(n_table), chi_end)
    z = cosmology.redshift_at_distance(chi)
    z[0] = 0.0
    return RayPlan(
        span_chi_a=np.array([s[0] for s in spans]), span_chi_b=np.array([s[1] for s in spans]),
        span_box=np.array([s[2] for s in spans], dtype=np.int64),
        span_low=np.array([s[3] for s in spans], dtype=np.int64),
        span_high=np.array([s[4] for s in spans], dtype=np.int64),
        segment_chi0=np.array(seg_chi0), segment_box=np.array(seg_box, dtype=np.int64),
        piece_segment=np.array(piece_segment, dtype=np.int64), piece_span=np.array(piece_span, dtype=np.int64),
        piece_chi_a=np.array(piece_a), piece_chi_b=np.array(piece_b),
        chi_step=float(chi_step), one_plus_z=1.0 + z,
        hubble_over_c=cosmology.hubble_per_s(z) / C_MPC_S,
    )


def draw_rays(seed, ray_indices, plan, n_cells):
    """Direction and per-segment geometry of the rays ``ray_indices``.

    Returns ``(direction, starts, directions, symmetries)``: unit directions
    (n_rays, 3), each segment's start point in cells of that segment's box
    (n_rays, n_segments, 3), the segment's direction after its cube symmetry
    (n_rays, n_segments, 3), and the symmetry indices (n_rays, n_segments).
    Ray i's numbers come from a stream fixed by (seed, i) alone.
    """
    from raytrace.kernels.geometry import ray_geometry

    indices = np.ascontiguousarray(ray_indices, dtype=np.int64)
    n = indices.size
    direction = np.empty((n, 3))
    starts = np.empty((n, plan.n_segments, 3))
    directions = np.empty((n, plan.n_segments, 3))
    symmetries = np.empty((n, plan.n_segments), dtype=np.int64)
    segment_cells = np.asarray(n_cells, dtype=float)[plan.segment_box]
    ray_geometry(int(seed), indices, segment_cells, CUBE_SYMMETRIES, direction, starts, directions, symmetries)
    return direction, starts, directions, symmetries
