"""Effective photon mass in an ionised gas (PHYSICS.md section 1).

In: electron density (physical, cm^-3). Out: plasma mass m_gamma in eV, and back.
m_gamma^2 = omega_p^2 = 4 pi alpha n_e / m_e.
"""

import numpy as np

from raytrace.core.errors import InputError, float_array
from raytrace.physics.constants import PLASMA_MASS2_PER_DENSITY

#: Coefficient of the neutral-hydrogen term, in units of the ionised one per (omega/eV)^2
#: (Mirizzi, Redondo & Sigl 2009, JCAP 03, 026).
NEUTRAL_HYDROGEN_COEFFICIENT = 7.3e-3


def _densities(n_e, name="electron density"):
    array = float_array(n_e, name)
    if np.any(~np.isfinite(array)) or np.any(array < 0):
        raise InputError(f"{name}: expected finite values >= 0 in cm^-3")
    return array


def plasma_mass2(n_e_cm3):
    """m_gamma^2 in eV^2 for a physical electron density in cm^-3."""
    return PLASMA_MASS2_PER_DENSITY * _densities(n_e_cm3)


def plasma_mass(n_e_cm3):
    """m_gamma in eV for a physical electron density in cm^-3."""
    return np.sqrt(plasma_mass2(n_e_cm3))


def electron_density(mass_eV):
    """Physical electron density (cm^-3) at which the plasma mass is ``mass_eV``."""
    mass = float_array(mass_eV, "mass_eV")
    if np.any(~np.isfinite(mass)) or np.any(mass < 0):
        raise InputError("mass_eV: expected finite values >= 0 in eV")
    return mass**2 / PLASMA_MASS2_PER_DENSITY


def plasma_mass2_with_neutral_hydrogen(n_H_cm3, ionised_fraction, omega_eV):
    """m_gamma^2 (eV^2) including the neutral-hydrogen term, for a pure-hydrogen gas.

    m_gamma^2 ~ 1.4e-21 eV^2 (X_e - 7.3e-3 (omega/eV)^2 (1 - X_e)) n_H / cm^-3
    (Mirizzi, Redondo & Sigl 2009). Negative values are physical: neutral gas
    lowers the photon's effective mass at high frequency.
    """
    n_H = _densities(n_H_cm3, "hydrogen density")
    x = float_array(ionised_fraction, "ionised_fraction")
    if np.any((x < 0) | (x > 1) | ~np.isfinite(x)):
        raise InputError("ionised_fraction: expected values in [0, 1]")
    omega = float_array(omega_eV, "omega_eV")
    return PLASMA_MASS2_PER_DENSITY * n_H * (
        x - NEUTRAL_HYDROGEN_COEFFICIENT * omega**2 * (1.0 - x)
    )
