"""Background cosmology along a sightline (PHYSICS.md section 3).

In: any ``astropy.cosmology`` object (default Planck18). Out: H(z), comoving
distance chi(z) in Mpc and its inverse z(chi), proper time between redshifts,
and the mean hydrogen density.

The tables are computed once, on a fine grid in ln(1+z), by integrating
astropy's own E(z) with a cubic spline; they agree with astropy's comoving
distance to better than 1e-7 relative (tests/test_cosmology.py).
"""

from functools import cached_property

import numpy as np
from scipy.interpolate import CubicSpline

from raytrace.core.errors import InputError
from raytrace.physics.constants import C_KM_S, HBAR_EV_S, MPC_CM, PROTON_MASS_G

#: Highest redshift the distance tables reach: beyond last scattering with margin.
Z_TABLE_MAX = 3000.0
_TABLE_POINTS = 24001


class Cosmology:
    """An immutable background cosmology built on astropy.cosmology.

    Parameters
    ----------
    astropy_cosmology : astropy.cosmology.FLRW, optional
        Any astropy FLRW cosmology; default ``astropy.cosmology.Planck18``.
    """

    __slots__ = ("_astropy", "__dict__")

    def __init__(self, astropy_cosmology=None):
        if astropy_cosmology is None:
            from astropy.cosmology import Planck18

            astropy_cosmology = Planck18
        if isinstance(astropy_cosmology, Cosmology):
            astropy_cosmology = astropy_cosmology.astropy
        if not hasattr(astropy_cosmology, "efunc") or not hasattr(astropy_cosmology, "H0"):
            raise InputError(
                f"cosmology: expected an astropy.cosmology FLRW object, got {type(astropy_cosmology).__name__}"
            )
        object.__setattr__(self, "_astropy", astropy_cosmology)

    def __setattr__(self, name, value):
        raise AttributeError("Cosmology objects are immutable")

    def __delattr__(self, name):
        raise AttributeError("Cosmology objects are immutable")

    def __reduce__(self):
        # Rebuilt from the astropy object (which pickles); the tables are recomputed lazily.
        return (Cosmology, (self._astropy,))

    def __repr__(self):
        return f"Cosmology({self._astropy.name or self._astropy!r})"

    def __eq__(self, other):
        return isinstance(other, Cosmology) and self._astropy == other._astropy

    def __hash__(self):
        return hash(repr(self._astropy))

    @property
    def astropy(self):
        """The wrapped astropy cosmology."""
        return self._astropy

    @property
    def name(self):
        return str(self._astropy.name or "custom")

    @property
    def h(self):
        """Dimensionless Hubble parameter H0 / (100 km/s/Mpc)."""
        return float(self._astropy.h)

    # -- expansion rate -------------------------------------------------------
    def hubble_per_s(self, z):
        """H(z) in s^-1."""
        z = self._check_redshift(z)
        H0 = self._astropy.H0.to_value("km/(s Mpc)") / (MPC_CM / 1e5)
        return H0 * np.asarray(self._astropy.efunc(z), dtype=float)

    def hubble_eV(self, z):
        """H(z) in eV (hbar H)."""
        return HBAR_EV_S * self.hubble_per_s(z)

    # -- tables -----------------------------------------------------------------
    @cached_property
    def _tables(self):
        u = np.linspace(0.0, np.log1p(Z_TABLE_MAX), _TABLE_POINTS)
        z = np.expm1(u)
        H0_km_s_Mpc = self._astropy.H0.to_value("km/(s Mpc)")
        efunc = np.asarray(self._astropy.efunc(z), dtype=float)
        # d chi / du = (c / H) (1 + z), d t / du = 1 / H, with u = ln(1 + z).
        dchi_du = C_KM_S / H0_km_s_Mpc * (1.0 + z) / efunc
        chi = CubicSpline(u, dchi_du).antiderivative()(u)
        H0_per_s = H0_km_s_Mpc / (MPC_CM / 1e5)
        lookback = CubicSpline(u, 1.0 / (H0_per_s * efunc)).antiderivative()(u)
        chi[0] = 0.0
        lookback[0] = 0.0
        return {
            "chi": chi,
            "chi_of_u": CubicSpline(u, chi),
            "u_of_chi": CubicSpline(chi, u),
            "lookback_of_u": CubicSpline(u, lookback),
        }

    def comoving_distance_Mpc(self, z):
        """Line-of-sight comoving distance chi(z) in Mpc."""
        z = self._check_redshift(z)
        return self._tables["chi_of_u"](np.log1p(z))

    def redshift_at_distance(self, chi_Mpc):
        """Inverse of chi(z): the redshift at comoving distance ``chi_Mpc`` (Mpc)."""
        chi = np.asarray(chi_Mpc, dtype=float)
        chi_max = self._tables["chi"][-1]
        if np.any(~np.isfinite(chi)) or np.any(chi < 0) or np.any(chi > chi_max):
            raise InputError(
                f"comoving distance: expected values in [0, {chi_max:.1f}] Mpc (z <= {Z_TABLE_MAX:g})"
            )
        return np.expm1(self._tables["u_of_chi"](chi))

    def lookback_time_s(self, z):
        """Proper (cosmic) time in s between redshift ``z`` and today."""
        z = self._check_redshift(z)
        return self._tables["lookback_of_u"](np.log1p(z))

    def proper_time_s(self, z_from, z_to):
        """Proper time in s elapsed for a photon travelling from ``z_from`` to ``z_to``."""
        return self.lookback_time_s(z_from) - self.lookback_time_s(z_to)

    # -- densities --------------------------------------------------------------
    def hydrogen_density0_cm3(self, helium_fraction):
        """Mean comoving hydrogen number density today in cm^-3, n_H0 = (1 - Y_p) Omega_b rho_crit / m_p."""
        if not 0.0 <= helium_fraction < 1.0:
            raise InputError(f"helium_fraction: expected Y_p in [0, 1), got {helium_fraction!r}")
        Ob0 = self._astropy.Ob0
        if Ob0 is None or Ob0 <= 0:
            raise InputError("cosmology: the astropy cosmology has no baryon density (Ob0); give one with Ob0")
        rho_crit = self._astropy.critical_density0.to_value("g/cm3")
        return (1.0 - helium_fraction) * Ob0 * rho_crit / PROTON_MASS_G

    def _check_redshift(self, z):
        z = np.asarray(z, dtype=float)
        if np.any(~np.isfinite(z)) or np.any(z < 0) or np.any(z > Z_TABLE_MAX):
            raise InputError(f"redshift: expected values in [0, {Z_TABLE_MAX:g}], got {z!r}")
        return z
