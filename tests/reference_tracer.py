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
from map_coordinates at uniform random points, the reference for any mean over rays.
"""

import numpy as np
from astropy import constants as const
from astropy import units as u
from astropy.cosmology import Planck18
from scipy import ndimage, optimize
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


def one_point_pdf_mean(values, n_com_unit, mass, z_max, points, seed):
    """<K>(m) from the one-point PDF of the interpolated field (PHYSICS.md section 4), written as an
    expectation: with y = ln n_com at a uniformly random point, z(y) the redshift where the target
    sits, (1+z)^3 = m^2 / (4 pi alpha / m_e e^y), and dz = (1+z)/3 |dy|,
    <K> = pi m^2 / 3 * E[1{0 <= z(y) <= z_max} / ((1+z) H(z))]. Returns the mean and its standard error."""
    rng = np.random.default_rng(seed)
    cells = values.shape[0]
    sample = ndimage.map_coordinates(values, rng.random((3, points)) * cells - 0.5, order=1, mode="grid-wrap")
    sample = sample[sample > 0] * n_com_unit
    fraction_positive = sample.size / points
    means, errors = [], []
    for m in mass:
        one_plus_z = (m**2 / (PLASMA_M2_PER_DENSITY * sample)) ** (1 / 3)
        inside = (one_plus_z >= 1.0) & (one_plus_z <= 1.0 + z_max)
        term = np.zeros(sample.size)
        zz = one_plus_z[inside] - 1
        term[inside] = 1.0 / (one_plus_z[inside] * Planck18.H(zz).to_value("1/s") * HBAR_EV_S)
        scale = np.pi * m**2 / 3 * fraction_positive
        means.append(scale * term.mean())
        errors.append(scale * term.std() / np.sqrt(term.size))
    return np.array(means), np.array(errors)
