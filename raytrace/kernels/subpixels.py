"""Where a sky pixel's rays go: independent, stratified, jittered sub-pixel positions.

In: a seed, NESTED pixel indices at nside, the rays of one split, the split's
index and its strata level. Out: for every ray the index of a NESTED
descendant of its pixel ``depth`` levels down (nside * 2^depth), whose centre is
the ray's direction.

A split of n rays divides its pixel into 4^level equal-area strata (the NESTED
children ``level`` levels down, 4^level >= n), draws n distinct strata at random
(a partial Fisher-Yates shuffle) and in each a uniformly random descendant
``depth - level`` levels further down (equal areas, so uniform over the stratum
to the size of those descendants). Each ray is thus uniform over the pixel: the
split's mean is an unbiased estimate of the pixel's mean K. Every number is a
hash of (seed, pixel, split, rays in the split, counter) (splitmix64, as the copy
transforms of :mod:`raytrace.kernels.geometry`): two splits, or two runs with
another count of rays, draw from unrelated streams, so their sampling errors are
independent; and a pixel's rays are the same on any thread and in any batch.
"""

import numba
import numpy as np

from raytrace.kernels.geometry import _GOLDEN, _mix, _uniform


@numba.njit(cache=True)
def _split_key(seed, pixel, split, count):
    golden = np.uint64(_GOLDEN)
    state = _mix(np.uint64(seed) + golden)
    state = _mix(state ^ (np.uint64(pixel) + golden))
    state = _mix(state ^ (np.uint64(split) + golden))
    # Salted so that these streams never coincide with the copy transforms' (same seed, small keys).
    return _mix(state ^ (np.uint64(count) * np.uint64(0x5851F42D4C957F2D) + np.uint64(0x5B11)))


@numba.njit(cache=True, parallel=True)
def split_descendants(seed, pixels, split, count, level, depth, out):
    """out[p, j]: the NESTED index at nside * 2^depth of ray j (of ``count``) of split ``split`` in ``pixels[p]``."""
    strata = 4**level
    below = np.int64(4 ** (depth - level))
    for p in numba.prange(pixels.shape[0]):
        key = _split_key(seed, pixels[p], split, count)
        order = np.arange(strata)
        base = pixels[p] * np.int64(4**depth)
        for j in range(count):
            pick = j + min(int(_uniform(key, 2 * j) * (strata - j)), strata - j - 1)
            order[j], order[pick] = order[pick], order[j]
            jitter = min(np.int64(_uniform(key, 2 * j + 1) * below), below - 1)
            out[p, j] = base + np.int64(order[j]) * below + jitter
