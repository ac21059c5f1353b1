"""The homogeneous universe: mean electron density, mean plasma mass and the
conversion kernel of its resonances (PHYSICS.md sections 3 and 5).

In: masses (eV), a redshift range, a cosmology and an ionisation history.
Out: nbar_e(z), mbar_gamma(z), and K(m) in eV summed over every crossing of
the mean plasma-mass curve (P = epsilon^2 K / omega_0).

The mean curve is not monotonic (it falls after recombination and rises at
reionisation), so a mass can resonate two or three times; every crossing is
bracketed on a fine grid in ln(1+z) and refined by bisection on the spline.
"""

from dataclasses import dataclass

import numpy as np

from raytrace.core.errors import InputError, float_array, require_positive_finite
from raytrace.physics.constants import PLASMA_MASS2_PER_DENSITY
from raytrace.physics.cosmology import Cosmology
from raytrace.physics.ionisation import IonisationHistory

_BRACKET_STEP = 2.0e-4  # in ln(1+z): finer than any feature of x_e (reionisation width ~ 0.05)
_BISECTIONS = 48


class MeanPlasma:
    """The homogeneous universe's electrons: a cosmology plus an ionisation history."""

    __slots__ = ("cosmology", "ionisation", "hydrogen_density0_cm3")

    def __init__(self, cosmology=None, ionisation=None):
        cosmology = cosmology if isinstance(cosmology, Cosmology) else Cosmology(cosmology)
        if ionisation is None:
            ionisation = IonisationHistory.from_camb(cosmology)
        if not isinstance(ionisation, IonisationHistory):
            raise InputError(
                f"ionisation: expected an IonisationHistory, got {type(ionisation).__name__}"
            )
        object.__setattr__(self, "cosmology", cosmology)
        object.__setattr__(self, "ionisation", ionisation)
        object.__setattr__(
            self, "hydrogen_density0_cm3", cosmology.hydrogen_density0_cm3(ionisation.helium_fraction)
        )

    def __setattr__(self, name, value):
        raise AttributeError("MeanPlasma objects are immutable")

    def __delattr__(self, name):
        raise AttributeError("MeanPlasma objects are immutable")

    def __reduce__(self):
        return (MeanPlasma, (self.cosmology, self.ionisation))

    def __repr__(self):
        return f"MeanPlasma({self.cosmology!r}, {self.ionisation!r})"

    def mean_electron_density_cm3(self, z):
        """Mean physical electron density nbar_e(z) = x_e(z) n_H0 (1+z)^3 in cm^-3."""
        z = np.asarray(z, dtype=float)
        return self.ionisation.x_e(z) * self.hydrogen_density0_cm3 * (1.0 + z) ** 3

    def mean_comoving_electron_density_cm3(self, z):
        """nbar_e(z) / (1+z)^3 in cm^-3."""
        return self.ionisation.x_e(z) * self.hydrogen_density0_cm3

    def mean_plasma_mass_eV(self, z):
        """mbar_gamma(z) in eV."""
        return np.sqrt(PLASMA_MASS2_PER_DENSITY * self.mean_electron_density_cm3(z))

    def dln_m2_dt_eV(self, z):
        """d ln mbar_gamma^2 / dt in eV (hbar/s) along the photon's path, signed.

        d ln nbar_e/dt = -(1+z) H d ln nbar_e/dz = -H (3 + d ln x_e / d ln(1+z)).
        """
        z = np.asarray(z, dtype=float)
        return -self.cosmology.hubble_eV(z) * (3.0 + self.ionisation.dln_xe_dln1pz(z))

    def _ln_m2(self, u):
        z = np.expm1(u)
        return np.log(PLASMA_MASS2_PER_DENSITY * self.hydrogen_density0_cm3) + 3.0 * u + np.log(
            self.ionisation.x_e(z)
        )

    def crossings(self, mass_eV, z_min=0.0, z_max=1100.0):
        """Every crossing of mbar_gamma(z) = m between z_min and z_max.

        Returns a :class:`BackgroundCrossings` with one row per crossing.
        """
        mass = require_positive_finite(np.atleast_1d(mass_eV), "mass_eV")
        z_min, z_max = float(z_min), float(z_max)
        if not (np.isfinite(z_min) and np.isfinite(z_max)) or z_min < 0 or z_max <= z_min:
            raise InputError(f"redshift range: expected 0 <= z_min < z_max, got z_min={z_min}, z_max={z_max}")
        if z_max > self.ionisation.z_max:
            raise InputError(
                f"z_max = {z_max:g} is beyond the ionisation history ({self.ionisation.description}), "
                f"which ends at z = {self.ionisation.z_max:g}"
            )
        u_lo, u_hi = np.log1p(z_min), np.log1p(z_max)
        n = max(int(np.ceil((u_hi - u_lo) / _BRACKET_STEP)), 2) + 1
        u = np.linspace(u_lo, u_hi, n)
        f = self._ln_m2(u)
        targets = np.log(mass**2)
        rows, left = _brackets(f, targets)
        a, b = u[left], u[left + 1]
        fa = f[left] - targets[rows]
        for _ in range(_BISECTIONS):
            mid = 0.5 * (a + b)
            fm = self._ln_m2(mid) - targets[rows]
            same = np.sign(fm) == np.sign(fa)
            a = np.where(same, mid, a)
            fa = np.where(same, fm, fa)
            b = np.where(same, b, mid)
        u_c = 0.5 * (a + b)
        z_c = np.expm1(u_c)
        rate = self.dln_m2_dt_eV(z_c)
        kernel = np.pi * mass[rows] ** 2 / ((1.0 + z_c) * np.abs(rate))
        order = np.lexsort((z_c, rows))
        return BackgroundCrossings(rows[order], z_c[order], rate[order], kernel[order])

    def kernel(self, mass_eV, z_min=0.0, z_max=1100.0):
        """K(m) in eV summed over every resonance between z_min and z_max."""
        mass = np.atleast_1d(float_array(mass_eV, "mass_eV"))
        found = self.crossings(mass, z_min, z_max)
        return np.bincount(found.mass_index, weights=found.kernel_eV, minlength=mass.size)


@dataclass(frozen=True)
class BackgroundCrossings:
    """Crossings of the mean plasma mass: which mass, where, how fast, and its kernel."""

    mass_index: np.ndarray
    redshift: np.ndarray
    dln_m2_dt_eV: np.ndarray
    kernel_eV: np.ndarray


def _brackets(f, targets):
    """(target index, grid index i) for every i with the target between f[i] and f[i+1]."""
    rows, lefts = [], []
    slope = np.sign(np.diff(f))
    # Split the curve into monotonic runs so each run needs one searchsorted.
    edges = np.flatnonzero(np.diff(slope) != 0) + 1
    starts = np.concatenate(([0], edges))
    stops = np.concatenate((edges, [f.size - 1]))
    for start, stop in zip(starts, stops):
        run = f[start : stop + 1]
        if run[-1] == run[0]:
            continue
        increasing = run[-1] > run[0]
        ordered = run if increasing else run[::-1]
        position = np.searchsorted(ordered, targets, side="right")
        inside = (position > 0) & (position < ordered.size)
        hit = np.flatnonzero(inside)
        idx = position[hit] - 1
        left = start + (idx if increasing else run.size - 2 - idx)
        rows.append(hit)
        lefts.append(left)
    if not rows:
        return np.zeros(0, int), np.zeros(0, int)
    return np.concatenate(rows), np.concatenate(lefts)


def background_kernel(mass_eV, z_min=0.0, z_max=1100.0, cosmology=None, ionisation=None):
    """K(m) in eV of the homogeneous universe, P = epsilon^2 K / omega_0.

    Sums every resonance of the mean plasma mass between ``z_min`` and ``z_max``;
    ``cosmology`` is any astropy cosmology (default Planck18), ``ionisation`` an
    :class:`~raytrace.physics.ionisation.IonisationHistory` (default CAMB with Planck 2018).
    """
    return MeanPlasma(cosmology, ionisation).kernel(mass_eV, z_min, z_max)
