"""Parsing of quantities the user types (photon energies, frequencies, lengths).

In: strings such as "160 GHz", "5.45 1/cm", "2.35e-4 eV" or astropy Quantities.
Out: plain floats in the engine's units. Nothing is guessed: a bare number
without a unit is an error that says which units are understood.
"""

import math

import astropy.units as u

from raytrace.core.errors import InputError
from raytrace.physics.constants import HBAR_EV_S, K_BOLTZMANN_EV_K

#: CMB temperature today, T_0 = 2.72548 +- 0.00057 K (Fixsen 2009, ApJ 707, 916).
CMB_TEMPERATURE_K = 2.72548
#: k T_0 in eV: the default observed photon energy.
CMB_PHOTON_ENERGY_EV = K_BOLTZMANN_EV_K * CMB_TEMPERATURE_K


def parse_quantity(value, what):
    """An astropy Quantity from a Quantity or a string with a unit; ``what`` names the option."""
    if isinstance(value, u.Quantity):
        return value
    if isinstance(value, str):
        try:
            quantity = u.Quantity(value.replace("^", "**"))
        except (TypeError, ValueError) as error:
            raise InputError(f"{what}: cannot read {value!r} as a number with a unit ({error})") from None
        if quantity.unit == u.dimensionless_unscaled:
            raise InputError(f"{what}: {value!r} has no unit; write e.g. '160 GHz', '5.45 1/cm' or '2.35e-4 eV'")
        return quantity
    raise InputError(f"{what}: expected a number with a unit as text (e.g. '160 GHz'), got {value!r}")


def photon_energy_eV(value, what="frequency"):
    """Observed photon energy h nu in eV from a frequency, wavenumber, wavelength or energy."""
    quantity = parse_quantity(value, what)
    try:
        energy = quantity.to_value(u.eV, equivalencies=u.spectral())
    except u.UnitConversionError:
        raise InputError(
            f"{what}: {value!r} is not a frequency, wavenumber, wavelength or energy"
        ) from None
    if not energy > 0:
        raise InputError(f"{what}: expected a positive photon energy, got {value!r}")
    return float(energy)


def photon_energy_of_ghz(frequency_ghz):
    """h nu in eV of a frequency in GHz."""
    return float(frequency_ghz) * 1e9 * 2.0 * math.pi * HBAR_EV_S


def frequency_label(omega0_eV):
    """A photon energy in eV as its frequency, for labels: '143 GHz'."""
    return f"{omega0_eV / (2.0 * math.pi * HBAR_EV_S) / 1e9:.3g} GHz"
