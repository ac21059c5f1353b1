"""Resonant photon -> dark-photon conversion at level crossings (PHYSICS.md section 2).

In: the dark-photon mass m, the mixing epsilon, the photon energy and the rate
d ln m_gamma^2 / dt at each crossing. Out: the Landau-Zener exponent, the
conversion probability of one crossing and of many incoherent crossings.

A crossing's probability factorises as p = epsilon^2 K / omega_0 with the
kernel K = pi m^2 / ((1 + z_c) |d ln m_gamma^2/dt|) (eV), so one ray trace
serves every epsilon and every observed photon energy omega_0.
"""

import warnings

import numpy as np

from raytrace.core.errors import InputError, RaytraceWarning, float_array
from raytrace.physics.units import CMB_PHOTON_ENERGY_EV

#: The CMB is isotropic to about 1e-5 in dT/T (a fact of the trade, no source): the default
#: level of the quick-look isotropy test.
ISOTROPY_LEVEL = 1e-5
#: The observed frequency of a sky's dT/T and anisotropy limits unless one is given: 143 GHz, the central
#: channel of the Planck TT spectrum (common practice, no source).
ANISOTROPY_FREQUENCY_GHZ = 143.0

#: Above this linear P = epsilon^2 K / omega_0 the sum over crossings is no longer small (PHYSICS.md
#: section 2: P = sum p_i holds while P << 1); the saturating form is then shown. At 0.1 the two
#: differ by 9 %: (1 - exp(-0.2)) / 2 = 0.0906.
SATURATION_LEVEL = 0.1


class SaturationWarning(RaytraceWarning):
    """epsilon^2 K / omega_0 is not small somewhere: P is shown in the saturating form."""


def crossing_kernel(mass_eV, z_crossing, dln_m2_dt_eV):
    """K = pi m^2 / ((1 + z_c) |d ln m_gamma^2/dt|) in eV (rate in eV, i.e. hbar/s)."""
    mass = float_array(mass_eV, "mass_eV")
    rate = np.abs(float_array(dln_m2_dt_eV, "dln_m2_dt_eV"))
    return np.pi * mass**2 / ((1.0 + float_array(z_crossing, "z_crossing")) * rate)


def landau_zener_exponent(epsilon, mass_eV, omega_eV, dln_m2_dt_eV):
    """gamma = pi epsilon^2 m^2 / (omega |d ln m_gamma^2/dt|) (Landau 1932; Zener 1932)."""
    rate = np.abs(float_array(dln_m2_dt_eV, "dln_m2_dt_eV"))
    return np.pi * np.asarray(epsilon, float) ** 2 * np.asarray(mass_eV, float) ** 2 / (
        np.asarray(omega_eV, float) * rate
    )


def crossing_probability(gamma, saturate=False):
    """Conversion probability of one crossing: gamma (linear) or 1 - exp(-gamma)."""
    gamma = float_array(gamma, "gamma")
    if np.any(gamma < 0) or np.any(~np.isfinite(gamma)):
        raise InputError("gamma: expected finite values >= 0")
    return -np.expm1(-gamma) if saturate else gamma


def combine_crossings(probabilities, saturate=False, axis=-1):
    """Total conversion probability of incoherent crossings along ``axis``.

    Linear: P = sum p_i (valid while P << 1). Saturating: P = (1 - prod(1 - 2 p_i)) / 2,
    the incoherent composition of two-level steps with random phases.
    """
    p = float_array(probabilities, "probabilities")
    if saturate:
        return 0.5 * (1.0 - np.prod(1.0 - 2.0 * p, axis=axis))
    return np.sum(p, axis=axis)


def probability_from_kernel(kernel_eV, epsilon, omega0_eV, saturate=False):
    """P = epsilon^2 K / omega_0 from a summed kernel K (eV) and the observed energy omega_0 (eV).

    With ``saturate=True`` the many-small-crossings limit of the incoherent
    composition is used, P = (1 - exp(-2 epsilon^2 K / omega_0)) / 2; it is exact
    where each crossing is small, which is what a summed kernel can support.
    """
    epsilon = float_array(epsilon, "epsilon")
    omega0 = float_array(omega0_eV, "omega0_eV")
    if np.any(epsilon < 0) or np.any(~np.isfinite(epsilon)):
        raise InputError("epsilon: expected finite values >= 0")
    if np.any(omega0 <= 0) or np.any(~np.isfinite(omega0)):
        raise InputError("omega0_eV: expected positive photon energies in eV")
    linear = epsilon**2 * float_array(kernel_eV, "kernel_eV") / omega0
    if saturate:
        return -0.5 * np.expm1(-2.0 * linear)
    return linear


def needs_saturation(kernel_eV, epsilon, omega0_eV):
    """Whether the linear P = epsilon^2 K / omega_0 exceeds :data:`SATURATION_LEVEL` for some kernel;
    if so, a :class:`SaturationWarning` says that P is shown in the saturating form instead."""
    linear = probability_from_kernel(kernel_eV, epsilon, omega0_eV)
    top = float(np.max(linear)) if np.size(linear) else 0.0
    if not top > SATURATION_LEVEL:
        return False
    warnings.warn(SaturationWarning(
        f"epsilon = {float(epsilon):g}: epsilon^2 K / omega_0 reaches {top:.3g}, above {SATURATION_LEVEL:g}, where "
        "the sum over crossings is no longer a small probability; P is given in the saturating form of "
        "incoherent crossings, (1 - exp(-2 epsilon^2 K / omega_0)) / 2 (PHYSICS.md section 2), at most 1/2"),
        stacklevel=3)
    return True


def photon_x(omega0_eV):
    """x = h nu / (k T_0) for an observed photon energy h nu in eV (T_0 = 2.72548 K, Fixsen 2009)."""
    return omega0_eV / CMB_PHOTON_ENERGY_EV


def anisotropy_per_probability(omega0_eV):
    """|dT/T| per unit P at observed energy omega_0: (1 - e^-x)/x, x = h nu/(k T_0) (PHYSICS.md section 6)."""
    x = photon_x(omega0_eV)
    return -np.expm1(-x) / x
