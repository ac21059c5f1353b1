"""The HEALPix pixel window computed offline (raytrace.sky.pixelwindow) against healpy and a closed form.

Sources: healpy's spherical-harmonic transform (map2alm, alm2cl) and geometry (pix2vec,
boundaries) (Gorski et al. 2005, ApJ 622, 759); the definition W_l^2 = mean over pixels of
(4 pi / (2l+1)) sum_m |(1/Omega) int_pixel Y_lm*|^2 (Gorski et al. 2005, section 4); the
Legendre expansion P_l(cos g) = 1 - l(l+1) g^2 / 4 + O(l^4 g^4) (common practice, no source),
which makes 1 - W_l^2 -> l(l+1) <g^2> / 4 for small pixels, <g^2> the mean squared separation of two
points of a pixel, 2 J / A for a polygon of area A and polar moment J about its centroid
(the shoelace formulas, common practice, no source).
"""

import healpy
import numpy as np
import pytest

from raytrace.core.errors import InputError
from raytrace.sky import pixelwindow


def healpy_window_squared(nside, level, lmax):
    """W_l^2 by the definition, each pixel's indicator at nside * 2^level transformed by healpy.map2alm
    (iter=0: the midpoint rule over the descendants), every pixel on its own, no symmetry used."""
    fine = nside * 2**level
    children = 4**level
    omega = 4 * np.pi / healpy.nside2npix(nside)
    total = np.zeros(lmax + 1)
    ring_order = healpy.nest2ring(fine, np.arange(healpy.nside2npix(fine)))
    for pixel in range(healpy.nside2npix(nside)):
        indicator = np.zeros(healpy.nside2npix(fine))
        indicator[ring_order[pixel * children:(pixel + 1) * children]] = 1.0
        alm = healpy.map2alm(indicator, lmax=lmax, iter=0)
        total += 4 * np.pi * healpy.alm2cl(alm) / omega**2
    return total / healpy.nside2npix(nside)


def test_pixel_window_equals_healpy_transforms_of_every_pixel():
    # nside 4: its polar-cap rings hold pixels of several shapes, which a per-ring shortcut misses
    # (measured: up to 3e-3 at l = 11). The two midpoint levels of the reference are combined as the
    # module combines its own (Richardson); measured agreement 1.2e-5, tolerance 1e-4 (the reference's
    # midpoint error at the finer level alone is 8e-5).
    nside, lmax = 4, 11
    coarse, fine = (healpy_window_squared(nside, level, lmax) for level in (4, 5))
    reference = (4 * fine - coarse) / 3
    window = pixelwindow.pixel_window(nside)
    assert window.shape == (3 * nside,)
    np.testing.assert_allclose(window**2, reference, rtol=0, atol=1e-4)
    assert reference[-1] < 0.5  # the window is far from 1 there: the comparison has something to compare


def polygon_mean_squared_separation(nside):
    """<g^2> over pairs of points of each pixel (flat, on the tangent plane at its centre), averaged over pixels."""
    pixels = np.arange(healpy.nside2npix(nside))
    corners = np.transpose(healpy.boundaries(nside, pixels, step=16), (0, 2, 1))
    centre = np.array(healpy.pix2vec(nside, pixels)).T
    east = np.cross([0.0, 0.0, 1.0], centre)
    east /= np.linalg.norm(east, axis=1)[:, None]
    north = np.cross(centre, east)
    depth = np.einsum("pvi,pi->pv", corners, centre)
    x = np.einsum("pvi,pi->pv", corners, east) / depth  # gnomonic projection
    y = np.einsum("pvi,pi->pv", corners, north) / depth
    x1, y1 = np.roll(x, -1, axis=1), np.roll(y, -1, axis=1)
    cross = x * y1 - x1 * y
    area = cross.sum(axis=1) / 2
    cx, cy = ((x + x1) * cross).sum(axis=1) / (6 * area), ((y + y1) * cross).sum(axis=1) / (6 * area)
    polar = ((x**2 + x * x1 + x1**2 + y**2 + y * y1 + y1**2) * cross).sum(axis=1) / 12 - area * (cx**2 + cy**2)
    np.testing.assert_allclose(area.mean(), 4 * np.pi / pixels.size, rtol=2e-4)  # the projection keeps the area
    return (2 * polar / area).mean()


def test_pixel_window_approaches_the_small_pixel_limit():
    # nside 64 (MAX_PIXELS pixels stand for the sky there): 1 - W_l^2 = l(l+1) <g^2> / 4 to first order;
    # measured 1.5e-4 apart at l = 2-4, where the next order (l^2 <g^2> / 16 ~ 1e-4) and the flat
    # projection (7e-5) are of that size; tolerance 5e-4. A square pixel of the same area (<g^2> =
    # Omega / 3) would be 7 % off: HEALPix pixels are rhombi.
    nside = 64
    separation = polygon_mean_squared_separation(nside)
    ell = np.arange(2, 5)
    window = pixelwindow.pixel_window(nside)
    np.testing.assert_allclose((1 - window[ell] ** 2) / (ell * (ell + 1) * separation / 4), 1.0, atol=5e-4)
    assert abs(separation / (4 * np.pi / healpy.nside2npix(nside) / 3) - 1) > 0.05


def test_pixel_window_is_cached_read_only_and_refuses_bad_nside():
    first = pixelwindow.pixel_window(8)
    assert pixelwindow.pixel_window(8) is first and not first.flags.writeable
    assert pixelwindow.pixel_window(8, 10).shape == (11,)
    for nside in (3, 0, 2.0):
        with pytest.raises(InputError, match="nside"):
            pixelwindow.pixel_window(nside)
    with pytest.raises(InputError, match="lmax"):
        pixelwindow.pixel_window(8, 33)
