"""The HEALPix pixel window W_l, computed here: no download, no table.

In: nside (and the largest multipole wanted). Out: W_l for l = 0..lmax, the
factor by which averaging a sky over the pixels of that nside multiplies its
harmonic amplitudes, so that the spectrum of a pixel-averaged map is
W_l^2 C_l (Gorski et al. 2005, ApJ 622, 759, section 4; healpy.pixwin reads the
same quantity from tables it downloads).

Definition (W_l^2 averaged over the pixels, as in Gorski et al. 2005): for a
pixel p of solid angle Omega, w_lm(p) = (1/Omega) int_p Y_lm*, and by the
addition theorem (4 pi / (2l+1)) sum_m |w_lm(p)|^2 = (1/Omega^2) int_p int_p
P_l(n . n') dn dn', the mean of P_l(cos gamma) over pairs of points of the pixel.
W_l^2 is that mean averaged over all pixels.

Computation: HEALPix's symmetries (a quarter turn about the pole, the
north-south mirror, congruent pixels along an equatorial-belt ring) leave one
pixel per belt ring and a quarter of each polar-cap ring to compute, weighted
by the sky they stand for (:func:`_representatives`; above :data:`MAX_PIXELS`,
evenly spaced ones stand for their neighbours). The double integral is the
midpoint rule on the pixel's equal-area NESTED descendants ``k`` levels down:
their pairwise separations go into a histogram (fine enough that its bins do
not matter), P_l is evaluated on it, and two levels k = 3 and 4 are combined by
Richardson extrapolation (the midpoint rule's error goes as the square of the
cell size): against levels 4 and 5 at nside 8 the result moves by less than
1e-5 of W_l^2 up to l = 3 nside - 1; tests/test_sky_signal.py compares it with
healpy's transforms of every pixel.

Cached in memory per (nside, lmax), for the life of the process; nothing is
written to disk.
"""

from functools import lru_cache

import numpy as np

from raytrace.core.errors import InputError, require_number

#: Levels below the pixel of the two midpoint rules combined by Richardson extrapolation.
LEVELS = (3, 4)
#: Pixels computed at most; above, evenly spaced ones stand for their neighbours.
MAX_PIXELS = 1024
_BINS = 4096  # separation bins of the pair histogram


def pixel_window(nside, lmax=None):
    """W_l of HEALPix pixels at ``nside``, l = 0..lmax (default 3 nside - 1; at most 4 nside), read-only."""
    nside = require_number(nside, "nside", whole=True, at_least=1, at_most=2**20, expected="a power of 2")
    if nside & (nside - 1):
        raise InputError(f"nside: expected a power of 2, got {nside}")
    lmax = 3 * nside - 1 if lmax is None else require_number(lmax, "lmax", whole=True, at_least=0,
                                                             at_most=4 * nside)
    return _window(nside, lmax)


@lru_cache(maxsize=16)
def _window(nside, lmax):
    coarse, fine = (_mean_legendre(nside, lmax, level) for level in LEVELS)
    squared = (4.0 * fine - coarse) / 3.0
    window = np.sqrt(np.clip(squared, 0.0, None))
    window.setflags(write=False)
    return window


def _representatives(nside):
    """(NESTED pixels, weights summing to 1) whose average of the pixel window is the whole sky's.

    HEALPix is symmetric under a quarter turn about the pole and under the north-south mirror
    (Gorski et al. 2005). The pixels of an equatorial-belt ring below the border ring z = 2/3 are
    congruent (turned about the pole), so one stands for its ring; those of a polar-cap ring and of
    the border ring are not (measured), so one quarter of the ring (r pixels of ring r) stands for it. Above :data:`MAX_PIXELS` of these, evenly spaced ones stand for their
    neighbours.
    """
    import healpy

    first, share = [], []
    npix = 12.0 * nside * nside
    for ring in range(1, 2 * nside + 1):
        mirrored = 2.0 if ring < 2 * nside else 1.0  # the southern ring counts the same
        if ring <= nside:  # polar cap and its border ring: 4 ring pixels, one quarter of them
            start = 2 * ring * (ring - 1)
            first += range(start, start + ring)
            share += [mirrored * 4 / npix] * ring
        else:
            first.append(2 * nside * (nside - 1) + (ring - nside) * 4 * nside)
            share.append(mirrored * 4 * nside / npix)
    first, share = np.array(first), np.array(share)
    if first.size > MAX_PIXELS:
        chosen = np.unique(np.round(np.linspace(0, first.size - 1, MAX_PIXELS)).astype(int))
        # The nearest chosen one of each (the lower on a tie), by the midpoints between them: a table of
        # every pair would take 8 GB per million representatives (nside 1448 and up).
        nearest = np.searchsorted((chosen[1:] + chosen[:-1]) / 2.0, np.arange(first.size), side="left")
        share, first = np.bincount(nearest, weights=share, minlength=chosen.size), first[chosen]
    return healpy.ring2nest(nside, first), share


def _mean_legendre(nside, lmax, level):
    """The pixel-averaged mean of P_l(cos gamma) over pairs of the pixels' descendants ``level`` levels down."""
    import healpy

    pixels, weights = _representatives(nside)
    count = 4**level
    widest = 2.0 * healpy.max_pixrad(nside) * (1.0 + 1e-9)  # no two points of a pixel lie farther apart
    histogram = np.zeros(_BINS)
    for pixel, weight in zip(pixels, weights):
        vectors = np.array(healpy.pix2vec(nside * 2**level, pixel * count + np.arange(count), nest=True)).T
        chord = np.linalg.norm(vectors[:, None, :] - vectors[None, :, :], axis=-1)
        separation = 2.0 * np.arcsin(np.clip(0.5 * chord, 0.0, 1.0)).ravel()
        index = np.minimum((separation / widest * _BINS).astype(np.int64), _BINS - 1)
        histogram += weight * np.bincount(index, minlength=_BINS) / separation.size
    cosine = np.cos((np.arange(_BINS) + 0.5) * widest / _BINS)
    return _legendre_sums(cosine, histogram, lmax)


def _legendre_sums(x, weights, lmax):
    """sum_b weights_b P_l(x_b) for l = 0..lmax (Bonnet's recursion)."""
    out = np.empty(lmax + 1)
    previous, current = np.ones_like(x), x.copy()
    out[0] = weights.sum()
    if lmax >= 1:
        out[1] = weights @ current
    for ell in range(2, lmax + 1):
        previous, current = current, ((2 * ell - 1) * x * current - (ell - 1) * previous) / ell
        out[ell] = weights @ current
    return out
