"""Random geometry of rays and box copies from counter-based streams.

In: a seed and integer keys (a ray's index; a snapshot and a lattice copy's
position). Out: a ray's direction and its per-segment copy transforms, or a
lattice copy's transform. Every number is a hash of (seed, key, counter)
(splitmix64, Steele, Lea & Flood 2014), so a ray's or a copy's geometry depends
on those alone: the same on any thread, in any batch, on any machine.
"""

import math

import numba
import numpy as np

from raytrace.kernels.targets import both_targets

_GOLDEN = 0x9E3779B97F4A7C15
_UNIT = 1.0 / 9007199254740992.0  # 2^-53


@both_targets
def _mix(state):
    """splitmix64 finaliser: a well-spread 64-bit hash."""
    state = (state ^ (state >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)
    state = (state ^ (state >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)
    return state ^ (state >> np.uint64(31))


@both_targets
def _uniform(key, counter):
    """Number ``counter`` in [0, 1) of the stream ``key``."""
    return float(_mix(key + np.uint64(counter + 1) * np.uint64(_GOLDEN)) >> np.uint64(11)) * _UNIT


@both_targets(inline=False)
def copy_transform(seed, box_index, c0, c1, c2):
    """(symmetry index 0-47, three shifts in [0, 1)) of lattice copy (c0, c1, c2) of box ``box_index``.

    A pure function of its arguments, so every ray through a copy sees the same copy.
    """
    golden = np.uint64(_GOLDEN)
    state = _mix(np.uint64(seed) + golden)
    state = _mix(state ^ (np.uint64(box_index) + golden))
    state = _mix(state ^ (np.uint64(c0 & 0xFFFFFFFF) + golden))
    state = _mix(state ^ (np.uint64(c1 & 0xFFFFFFFF) + golden))
    state = _mix(state ^ (np.uint64(c2 & 0xFFFFFFFF) + golden))
    symmetry = int(state % np.uint64(48))
    unit = 1.0 / 9007199254740992.0  # 2^-53
    s0 = float(_mix(state + np.uint64(1)) >> np.uint64(11)) * unit
    s1 = float(_mix(state + np.uint64(2)) >> np.uint64(11)) * unit
    s2 = float(_mix(state + np.uint64(3)) >> np.uint64(11)) * unit
    return symmetry, s0, s1, s2




@numba.njit(cache=True, parallel=True)
def ray_geometry(seed, ray_indices, segment_cells, symmetries, direction, starts, directions, symmetry):
    """Direction of each ray and, per segment, its copy's symmetry and the segment's start.

    Ray r's direction is uniform on the sphere (cos theta and phi uniform); segment g
    enters a copy with symmetry ``symmetry[r, g]`` (of the 48) at a uniformly random
    point ``starts[r, g]`` of a box of ``segment_cells[g]`` cells, heading
    ``directions[r, g]`` = that symmetry applied to the ray's direction.
    """
    golden = np.uint64(_GOLDEN)
    for r in numba.prange(ray_indices.shape[0]):
        key = _mix(_mix(np.uint64(seed) + golden) ^ (np.uint64(ray_indices[r]) + golden))
        cos_theta = 2.0 * _uniform(key, 0) - 1.0
        sin_theta = math.sqrt(max(0.0, 1.0 - cos_theta * cos_theta))
        phi = 2.0 * math.pi * _uniform(key, 1)
        d0, d1, d2 = sin_theta * math.cos(phi), sin_theta * math.sin(phi), cos_theta
        direction[r, 0], direction[r, 1], direction[r, 2] = d0, d1, d2
        for g in range(segment_cells.shape[0]):
            s = min(int(_uniform(key, 2 + 4 * g) * 48.0), 47)
            symmetry[r, g] = s
            for axis in range(3):
                starts[r, g, axis] = _uniform(key, 3 + 4 * g + axis) * segment_cells[g]
                directions[r, g, axis] = symmetries[s, axis, 0] * d0 + symmetries[s, axis, 1] * d1 + symmetries[s, axis, 2] * d2
