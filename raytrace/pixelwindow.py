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

Computation: pixels in one iso-latitude ring share their shape (turned about
the pole), and the southern rings mirror the northern ones, so one pixel per
northern ring suffices, weighted by its ring's share of the sky (above
:data:`MAX_RINGS` rings, evenly spaced rings stand for their neighbours). The
double integral is the midpoint rule on the pixel's equal-area NESTED
descendants ``k`` levels down: their pairwise separations go into a histogram
(fine enough that its bins do not matter), P_l is evaluated on it, and two
levels k = 4 and 5 are combined by Richardson extrapolation (the midpoint
rule's error goes as the square of the cell size): measured against k = 6 at
nside 8, the result is good to 1e-5 of W_l^2 up to l = 3 nside - 1.

Cached in memory per (nside, lmax), for the life of the process; nothing is
written to disk.
"""

from functools import lru_cache

import numpy as np

from .errors import require_number

#: Levels below the pixel of the two midpoint rules combined by Richardson extrapolation.
LEVELS = (4, 5)
#: Rings computed at most; above, evenly spaced rings stand for their neighbours.
MAX_RINGS = 128
_BINS = 4096  # separation bins of the pair histogram


def pixel_window(nside, lmax=None):
    """W_l of HEALPix pixels at ``nside``, l = 0..lmax (default 3 nside - 1; at most 4 nside), read-only."""
    nside = require_number(nside, "nside", whole=True, at_least=1, at_most=2**20)
    if nside & (nside - 1):
        require_number(None, "nside", expected="a power of 2")
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


def _rings(nside):
    """(NESTED pixel, weight) of one pixel per northern ring (equator included); weights sum to 1."""
    import healpy

    rings = np.arange(1, 2 * nside + 1)
    size = np.where(rings < nside, 4 * rings, 4 * nside)
    first = np.where(rings < nside, 2 * rings * (rings - 1), 2 * nside * (nside - 1) + (rings - nside) * 4 * nside)
    share = np.where(rings < 2 * nside, 2 * size, size) / (12.0 * nside * nside)  # the southern mirror twice
    if rings.size > MAX_RINGS:
        chosen = np.unique(np.round(np.linspace(0, rings.size - 1, MAX_RINGS)).astype(int))
        nearest = np.abs(np.arange(rings.size)[:, None] - chosen[None, :]).argmin(axis=1)
        share = np.bincount(nearest, weights=share, minlength=chosen.size)
        first = first[chosen]
    return healpy.ring2nest(nside, first), share


def _mean_legendre(nside, lmax, level):
    """The pixel-averaged mean of P_l(cos gamma) over pairs of the pixels' descendants ``level`` levels down."""
    import healpy

    pixels, weights = _rings(nside)
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
