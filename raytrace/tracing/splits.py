"""A sky pixel's rays as two independent splits, so that the map's signal and its noise can be told apart.

In: nside, NESTED pixel indices, rays per pixel and the run's seed. Out: the
rays' unit vectors (per pixel: split A's rays, then split B's) and, after the
trace, the per-pixel means of all rays and of each split.

Why splits: a pixel traced with N rays estimates the mean of K over the pixel
with a sampling noise of variance sigma_sub^2 / N (PHYSICS.md section 10). Two
sets of rays whose noise is independent, A and B, give a cross-spectrum
C_l^AB and a covariance over pixels free of that noise (common practice in CMB
analysis, e.g. the half-mission cross-spectra of Planck 2018, A&A 641, A5).

Choices: two splits; N >= 2 rays per pixel, split A takes ceil(N/2) and B
floor(N/2) (any N works, not only powers of 4). Each split samples the whole
pixel on its own, stratified and jittered (:mod:`raytrace.kernels.subpixels`),
from its own counter-based stream: A's positions do not depend on B's, so the
two errors are independent (were the splits two halves of one stratified set,
the strata A took would be the strata B lacks, and their errors anticorrelated).
N = 1 is a stated fallback: one ray at the pixel's centre, as a plain map;
its noise is unknown and nothing that needs the signal can be computed from it.
"""

import math

import numpy as np

from raytrace.core.errors import InputError, require_number
from raytrace.kernels.subpixels import split_descendants

#: Independent splits of each pixel's rays.
SPLITS = 2
#: Levels below the pixel that the jitter reaches at most: 4^20 equal-area positions per pixel.
JITTER_LEVELS = 20
_NSIDE_LEVELS = 29  # HEALPix's largest nside is 2^29 (Gorski et al. 2005; healpy)


def check_rays_per_pixel(rays_per_pixel):
    """A whole number >= 1 (1: one ray at the pixel centre, no splits; >= 2: two splits)."""
    return require_number(rays_per_pixel, "rays_per_pixel (--rays-per-pixel)", whole=True, at_least=1,
                          expected="a whole number >= 2 (two independent splits; 1: a plain map whose noise "
                                   "is unknown)")


def split_counts(rays_per_pixel):
    """Rays of each split: (ceil(N/2), floor(N/2)); () for one ray per pixel (no splits)."""
    if rays_per_pixel < 2:
        return ()
    return ((rays_per_pixel + 1) // 2, rays_per_pixel // 2)


def _levels(nside, count):
    """(strata level, jitter depth) of a split of ``count`` rays at ``nside``."""
    level = math.ceil(math.log(count, 4) - 1e-12)
    depth = min(JITTER_LEVELS, _NSIDE_LEVELS - int(math.log2(nside)))
    if level > depth:
        raise InputError(f"rays_per_pixel (--rays-per-pixel): {2 * count} rays per pixel need sub-pixels {level} "
                         f"levels below nside {nside}, beyond HEALPix's largest nside 2^29; ask for fewer")
    return level, depth


def check_split_geometry(nside, rays_per_pixel):
    """Refuse, before any work, a ray count the HEALPix hierarchy below ``nside`` cannot hold."""
    for count in split_counts(rays_per_pixel):
        _levels(nside, count)


def ray_directions(nside, pixels, rays_per_pixel, seed):
    """Unit vectors (n_pixels * N, 3) of the rays of NESTED ``pixels``: per pixel split A's, then split B's."""
    import healpy

    pixels = np.asarray(pixels, dtype=np.int64)
    counts = split_counts(rays_per_pixel)
    if not counts:
        return np.ascontiguousarray(np.array(healpy.pix2vec(nside, pixels, nest=True)).T)
    parts = []
    for split, count in enumerate(counts):
        level, depth = _levels(nside, count)
        fine = np.empty((pixels.size, count), dtype=np.int64)
        split_descendants(int(seed), pixels, split, count, level, depth, fine)
        parts.append(np.array(healpy.pix2vec(nside * 2**depth, fine.ravel(), nest=True)).T.reshape(pixels.size,
                                                                                                    count, 3))
    return np.ascontiguousarray(np.concatenate(parts, axis=1).reshape(-1, 3))


def pixel_means(values, n_pixels, rays_per_pixel):
    """(mean over all of a pixel's rays, per-split means or None) of per-ray rows ordered as :func:`ray_directions`.

    ``values``: (n_pixels * N, ...). The split means are (n_pixels, SPLITS, ...).
    """
    rows = values.reshape((n_pixels, rays_per_pixel) + values.shape[1:])
    counts = split_counts(rays_per_pixel)
    if not counts:
        return rows.mean(axis=1), None
    split_rows = np.stack([rows[:, :counts[0]].mean(axis=1), rows[:, counts[0]:].mean(axis=1)], axis=1)
    return rows.mean(axis=1), split_rows
