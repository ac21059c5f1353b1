"""An independent ray tracer for the tests, written with scipy and astropy only.

It shares nothing with the engine but the ray geometry it is handed (start
points and directions of each straight run, in cells): the field is read with
scipy.ndimage.map_coordinates (order 1, grid-wrap, cell values at cell centres),
sampled every 1/``samples_per_cell`` cells; each sign change of n_e,phys - target
between samples is refined with scipy.optimize.brentq on the interpolant itself;
the rate d ln n_e / d chi comes from a central difference of the interpolant
(1e-6 cells); 1+z and H(z) come from astropy's Planck18. The Landau-Zener kernel
is pi m^2 / ((1+z) |d ln m_gamma^2/dt|) (PHYSICS.md sections 2-3) with
|d/dt| = c (1+z) |d/d chi|. The dispersion measure is the trapezoid integral of
n_e,com (1+z) d chi over the samples (PHYSICS.md section 7).

It also holds the one-point-PDF mean of a box (PHYSICS.md section 4) estimated
from map_coordinates at uniform random points, the reference for any mean over rays,
and :func:`trace_run_with_pairs`, which also finds the near-tangent (Airy) events of a
run itself (PHYSICS.md section 9; from the engine it takes only the window XI_CUT, a
choice of the method).
"""

from itertools import pairwise

import numpy as np
from astropy import constants as const
from astropy import units as u
from astropy.cosmology import Planck18
from scipy import ndimage, optimize, special
from scipy.interpolate import CubicSpline

HBAR_EV_S = const.hbar.to_value(u.eV * u.s)
C_MPC_S = const.c.to_value(u.Mpc / u.s)
PLASMA_M2_PER_DENSITY = (4 * np.pi * const.alpha * (const.hbar * const.c) ** 3 / (const.m_e * const.c**2)).to_value(
    u.eV**2 * u.cm**3)  # 4 pi alpha n_e / m_e (PHYSICS.md section 1), exact CODATA constants


class PlanckRedshift:
    """z(chi) and H(z)/c from astropy's Planck18 (a dense table inverted by a cubic spline)."""

    def __init__(self, z_max):
        z = np.linspace(0.0, z_max * 1.05 + 0.01, 20001)
        chi = Planck18.comoving_distance(z).to_value(u.Mpc)
        self._z_of_chi = CubicSpline(chi, z)

    def z(self, chi):
        return self._z_of_chi(chi)

    def hubble_over_c(self, z):
        return Planck18.H(z).to_value(u.km / u.s / u.Mpc) / const.c.to_value(u.km / u.s)


def _field(values, start, direction, s):
    points = start[None, :] + np.atleast_1d(s)[:, None] * direction[None, :] - 0.5
    return ndimage.map_coordinates(values, points.T, order=1, mode="grid-wrap")


def trace_run(values, start, direction, length_cells, chi0, cell_mpc, mass, redshift, samples_per_cell=512):
    """(kernel per mass, crossings per mass, DM) of one straight run through one copy of ``values``.

    ``values``: float64 comoving n_e (cm^-3) of the cells; ``mass`` in eV.
    """
    found, dm = run_crossings(values, start, direction, length_cells, chi0, cell_mpc, mass, redshift,
                              samples_per_cell)
    kernel = np.zeros(mass.size)
    crossings = np.zeros(mass.size, dtype=int)
    for k, _, value, _ in found:
        kernel[k] += value
        crossings[k] += 1
    return kernel, crossings, dm


def run_crossings(values, start, direction, length_cells, chi0, cell_mpc, mass, redshift, samples_per_cell=512):
    """([(mass index, z, kernel, path length in cells) per crossing, in mass order], DM) of one straight run."""
    n = int(np.ceil(length_cells * samples_per_cell))
    s = np.linspace(0.0, length_cells, n + 1)
    chi = chi0 + s * cell_mpc
    one_plus_z = 1.0 + redshift.z(chi)
    comoving = _field(values, start, direction, s)
    physical = comoving * one_plus_z**3
    dm = np.trapezoid(comoving * one_plus_z, chi) * 1e6

    def physical_at(x):
        return _field(values, start, direction, x)[0] * (1.0 + redshift.z(chi0 + x * cell_mpc)) ** 3

    found = []
    targets = mass**2 / PLASMA_M2_PER_DENSITY
    for k, target in enumerate(targets):
        excess = physical - target
        for i in np.flatnonzero(excess[:-1] * excess[1:] < 0):
            root = optimize.brentq(lambda x: physical_at(x) - target, s[i], s[i + 1], xtol=1e-13, rtol=1e-14)
            h = 1e-6
            slope = (np.log(physical_at(root + h)) - np.log(physical_at(root - h))) / (2 * h * cell_mpc)
            opz = 1.0 + redshift.z(chi0 + root * cell_mpc)
            rate_eV = HBAR_EV_S * C_MPC_S * opz * abs(slope)  # |d ln n / dt| in eV
            found.append((k, float(opz - 1.0), np.pi * mass[k] ** 2 / (opz * rate_eV), float(root)))
    return found, dm


def one_point_pdf_mean(values, n_com_unit, mass, z_max, points, seed, z_min=0.0):
    """<K>(m) from the one-point PDF of the interpolated field (PHYSICS.md section 4), written as an
    expectation: with y = ln n_com at a uniformly random point, z(y) the redshift where the target
    sits, (1+z)^3 = m^2 / (4 pi alpha / m_e e^y), and dz = (1+z)/3 |dy|,
    <K> = pi m^2 / 3 * E[1{z_min <= z(y) <= z_max} / ((1+z) H(z))]: the part of the field's
    resonances between z_min and z_max. Returns the mean and its standard error."""
    rng = np.random.default_rng(seed)
    cells = values.shape[0]
    sample = ndimage.map_coordinates(values, rng.random((3, points)) * cells - 0.5, order=1, mode="grid-wrap")
    sample = sample[sample > 0] * n_com_unit
    fraction_positive = sample.size / points
    means, errors = [], []
    for m in mass:
        one_plus_z = (m**2 / (PLASMA_M2_PER_DENSITY * sample)) ** (1 / 3)
        inside = (one_plus_z >= 1.0 + z_min) & (one_plus_z <= 1.0 + z_max)
        term = np.zeros(sample.size)
        zz = one_plus_z[inside] - 1
        term[inside] = 1.0 / (one_plus_z[inside] * Planck18.H(zz).to_value("1/s") * HBAR_EV_S)
        scale = np.pi * m**2 / 3 * fraction_positive
        means.append(scale * term.mean())
        errors.append(scale * term.std() / np.sqrt(term.size))
    return np.array(means), np.array(errors)


# -- every crossing of a run, near-tangent pairs included (PHYSICS.md sections 8-9) ----------------
#: The largest value of Ai, 0.5357 at x = -1.0188, the first zero of Ai' (DLMF 9.9; scipy.special.ai_zeros).
AIRY_PEAK = float(special.ai_zeros(1)[2][0])


def _cell_faces(start, direction, length_cells):
    """Path lengths where the run crosses a plane of cell centres (where the interpolant has its kinks)."""
    faces = [0.0, float(length_cells)]
    for q0, d in zip(start - 0.5, direction):
        if d != 0.0:
            ends = sorted((q0, q0 + d * length_cells))
            planes = np.arange(np.ceil(ends[0]), np.floor(ends[1]) + 1)
            faces.extend((planes - q0) / d)
    faces = np.unique(np.clip(faces, 0.0, length_cells))
    return faces


def _extrema(slope, low, high, samples_per_cell):
    """Zeros of ``slope`` (vectorised) in (low, high): its sign changes on a fine grid, refined with brentq."""
    h = 1e-6
    grid = np.linspace(low + h, high - h, max(8, int(np.ceil((high - low) * samples_per_cell)) + 1))
    if grid[-1] <= grid[0]:
        return []
    values = slope(grid)
    return [optimize.brentq(lambda x: slope(x)[0], grid[i], grid[i + 1], xtol=1e-14, rtol=1e-15)
            for i in np.flatnonzero(values[:-1] * values[1:] < 0)]


def trace_run_with_pairs(values, start, direction, length_cells, chi0, cell_mpc, mass, redshift, photon_energy_eV,
                         samples_per_cell=512):
    """Like :func:`trace_run`, with near-tangent pairs in their uniform (Airy) form, found here.

    The run is cut at the planes of cell centres (the interpolant is smooth between them)
    and at the extrema of n_e,phys inside each cell, found as zeros of its central
    difference (sign changes on a 1/``samples_per_cell`` grid, then brentq); on each
    monotone piece every target between the end values is one root (brentq). At an
    extremum, with a = d^2 m_gamma^2/dt^2 from a second difference (1e-3 cells) and
    dt = cell / (c (1+z)) per cell, Delta = m_gamma^2 - m^2 and omega = omega_0 (1+z),
    xi = sign(a) Delta 2^(-1/3) omega^(-2/3) |a|^(-1/3) (PHYSICS.md section 9); where
    |xi| < XI_CUT a near miss adds K_pair = pi^2 m^4 / ((1+z) omega) (4 omega / |a|)^(2/3)
    Ai(xi)^2 (Ai from scipy.special.airy), and a pair whose two crossings both lie next to
    the extremum inside the cell takes K_pair in place of its two Landau-Zener terms (both
    crossings still counted). Returns a dict of kernel, crossings, tangent_events,
    kernel_tangent, pair_peak (per mass: the sum over its events of the largest K_pair
    their a allows, at Ai's maximum), events (mass index, z, xi, K_pair) and dm.
    """
    # The method's window |xi| < XI_CUT, a choice of the method (test_exact_crossings checks its defining integral).
    from raytrace.kernels.tangent import XI_CUT

    def physical(x):
        x = np.atleast_1d(x)
        return _field(values, start, direction, x) * (1.0 + redshift.z(chi0 + x * cell_mpc)) ** 3

    def physical_at(x):
        return float(physical(x)[0])

    def slope_of(x, h=1e-7):
        return (physical(x + h) - physical(x - h)) / (2 * h)

    targets = mass**2 / PLASMA_M2_PER_DENSITY
    out = {"kernel": np.zeros(mass.size), "crossings": np.zeros(mass.size, dtype=int),
           "tangent_events": np.zeros(mass.size, dtype=int), "kernel_tangent": np.zeros(mass.size),
           "pair_peak": np.zeros(mass.size), "events": []}
    faces = _cell_faces(start, direction, length_cells)
    for low, high in pairwise(faces):
        if high - low < 1e-9:
            continue
        inner = _extrema(slope_of, low, high, samples_per_cell)
        points = np.array([low, *inner, high])
        level = np.array([physical_at(x) for x in points])
        # Landau-Zener roots on each monotone piece, keyed by (piece, mass).
        roots = {}
        for j in range(points.size - 1):
            for k in np.flatnonzero((targets - level[j]) * (targets - level[j + 1]) < 0):
                root = optimize.brentq(lambda x, target=targets[k]: physical_at(x) - target, points[j], points[j + 1],
                                       xtol=1e-14, rtol=1e-15)
                h = min(1e-6, 0.5 * (root - low), 0.5 * (high - root))
                slope = (np.log(physical_at(root + h)) - np.log(physical_at(root - h))) / (2 * h * cell_mpc)
                opz = 1.0 + redshift.z(chi0 + root * cell_mpc)
                rate_eV = HBAR_EV_S * C_MPC_S * opz * abs(slope)
                roots[j, k] = np.pi * mass[k] ** 2 / (opz * rate_eV)
                out["crossings"][k] += 1
        for i, e in enumerate(inner, start=1):
            h = min(1e-3, 0.5 * (e - low), 0.5 * (high - e))
            second = (physical_at(e + h) - 2 * level[i] + physical_at(e - h)) / h**2
            opz = 1.0 + redshift.z(chi0 + e * cell_mpc)
            omega = photon_energy_eV * opz
            a = PLASMA_M2_PER_DENSITY * second * (HBAR_EV_S * C_MPC_S * opz / cell_mpc) ** 2
            delta = PLASMA_M2_PER_DENSITY * (level[i] - targets)
            xi = np.sign(a) * delta * 2 ** (-1 / 3) * omega ** (-2 / 3) * abs(a) ** (-1 / 3)
            for k in np.flatnonzero(np.abs(xi) < XI_CUT):
                scale = np.pi**2 * mass[k] ** 4 / (opz * omega) * (4 * omega / abs(a)) ** (2 / 3)
                pair = scale * special.airy(xi[k])[0] ** 2
                if xi[k] < 0:  # the crossing side: an event only if both neighbours reach the target
                    if not ((i - 1, k) in roots and (i, k) in roots):
                        continue
                    roots[i - 1, k] = roots[i, k] = 0.0
                out["kernel_tangent"][k] += pair
                out["tangent_events"][k] += 1
                out["pair_peak"][k] += scale * AIRY_PEAK**2
                out["events"].append((k, opz - 1.0, xi[k], pair))
        for (_, k), value in roots.items():
            out["kernel"][k] += value
    out["kernel"] += out["kernel_tangent"]
    s = np.linspace(0.0, length_cells, int(np.ceil(length_cells * samples_per_cell)) + 1)
    chi = chi0 + s * cell_mpc
    out["dm"] = np.trapezoid(_field(values, start, direction, s) * (1.0 + redshift.z(chi)), chi) * 1e6
    return out
