"""What a box's values mean: quantities, ionised and neutral fractions, the mean-density
reference, and the checks that a box's mean density and ionisation are plausible.

In: the stated meaning of a box (quantity, fraction, reference), its redshift and a
MeanPlasma. Out: the factor from stored values to comoving n_e in cm^-3, fractions
converted to electrons per hydrogen nucleus, and one-line warnings.

The ionised fraction has one meaning everywhere in raytrace: electrons per
hydrogen nucleus, x_e = n_e / n_H (the convention of CAMB's x_e, so 1.08 for
hydrogen and singly ionised helium, 1.16 for fully ionised helium with
Y_p = 0.245). A neutral fraction is hydrogen's, x_HI = n_HI / n_H; it becomes
x_e = (1 - x_HI) (1 + k n_He / n_H), k the electrons each helium atom gives
where hydrogen is ionised (0, 1 or 2) and n_He / n_H = Y_p / (4 (1 - Y_p))
(m_He = 4 m_H: common practice, no source).
"""

import math
import warnings
from functools import lru_cache

import numpy as np

from raytrace.boxes.values import _number
from raytrace.core.errors import InputError, RaytraceWarning
from raytrace.physics.constants import PROTON_MASS_G

class PlausibilityWarning(RaytraceWarning):
    """A box's mean density, ionisation or size is far from what a cosmological box has: a unit slip?"""


#: What a box's values can mean (the ``quantity`` attribute or argument).
QUANTITIES = {
    "n_e_physical": "physical electron density n_e in cm^-3 at the snapshot redshift",
    "n_e_comoving": "comoving electron density n_e / (1+z)^3 in cm^-3",
    "overdensity": "electron overdensity n_e / nbar_e(z), nbar_e of the mean-density reference",
    "gas_density": "physical gas density in g cm^-3 at the snapshot redshift, times the ionised fraction",
    "gas_overdensity": "gas overdensity rho / rhobar, times the ionised fraction",
    "density_contrast": "gas density contrast rho / rhobar - 1 (rhobar the cosmic mean baryon density), "
                        "times the ionised fraction",
}
_GAS = ("gas_density", "gas_overdensity", "density_contrast")

#: What ``overdensity`` is relative to (the ``mean_density`` attribute or argument).
MEAN_DENSITY_REFERENCES = {
    "history": "nbar_e(z) of the run's background ionisation history",
    "box": "the box's own mean electron density, x n_H(z) with the box's ionised (or neutral) fraction",
}

#: Largest ionised fraction accepted: fully ionised hydrogen and helium give
#: n_e / n_H = 1 + Y_p / (2 (1 - Y_p)) = 1.16 for Y_p = 0.245; metals add a few per cent.
MAX_IONISED_FRACTION = 1.25

#: A box's mean electron density further than this factor from the expected mean is warned about.
DENSITY_WARNING_FACTOR = 10.0
#: A box's own ionisation further than this factor from the background history's is warned about.
IONISATION_WARNING_FACTOR = 2.0
# A unit slip is named when it explains the mean to within this factor (a box's own
# mean may differ from the cosmic one by some tens of per cent).
_SLIP_TOLERANCE = 1.5


def _check_quantity(value, what):
    if isinstance(value, bytes):
        value = value.decode()
    if not isinstance(value, str) or value not in QUANTITIES:
        raise InputError(f"{what}: {value!r} is not one of {', '.join(QUANTITIES)}")
    return value


def _check_reference(value, what):
    if isinstance(value, bytes):
        value = value.decode()
    if not isinstance(value, str) or value not in MEAN_DENSITY_REFERENCES:
        raise InputError(f"{what}: {value!r} is not one of {', '.join(MEAN_DENSITY_REFERENCES)}")
    return value


def _check_fraction_constant(value, what, neutral=False):
    x = _number(value, what)
    if neutral:
        if not (math.isfinite(x) and 0.0 <= x < 1.0):
            raise InputError(f"{what}: expected the neutral hydrogen fraction n_HI / n_H in [0, 1), got {value!r}")
    elif not (math.isfinite(x) and 0.0 < x <= MAX_IONISED_FRACTION):
        raise InputError(
            f"{what}: expected electrons per hydrogen nucleus in (0, {MAX_IONISED_FRACTION}], got {value!r}"
        )
    return x


def _check_fraction_values(values, where, neutral=False):
    values = np.asarray(values)
    high = 1.0 if neutral else MAX_IONISED_FRACTION
    bad = ~np.isfinite(values) | (values < 0) | (values > high)
    if bad.any():
        meaning = "neutral hydrogen fractions n_HI / n_H" if neutral else "electrons per hydrogen nucleus"
        raise InputError(
            f"{where}: {int(bad.sum())} of {values.size} values are not {meaning} "
            f"in [0, {high:g}] (first: {float(values[bad].flat[0])!r})"
        )


def _check_helium_electrons(value, what):
    if isinstance(value, (bool, np.bool_)) or value not in (0, 1, 2):
        raise InputError(f"{what}: expected the electrons per helium atom where hydrogen is ionised: 0, 1 or 2; "
                         f"got {value!r}")
    return int(value)


def electrons_per_ionised_hydrogen(helium_electrons, helium_fraction):
    """n_e / n_HII = 1 + k n_He / n_H, n_He / n_H = Y_p / (4 (1 - Y_p)) (m_He = 4 m_H)."""
    return 1.0 + helium_electrons * helium_fraction / (4.0 * (1.0 - helium_fraction))


@lru_cache(maxsize=1)
def _default_plasma():
    from raytrace.physics.background import MeanPlasma

    return MeanPlasma()


def _plasma_or_default(plasma):
    from raytrace.physics.background import MeanPlasma

    if plasma is None:
        return _default_plasma()
    if not isinstance(plasma, MeanPlasma):
        raise InputError(f"plasma: expected a raytrace.MeanPlasma, got {type(plasma).__name__}")
    return plasma


def _comoving_scale(quantity, redshift, fraction, plasma, reference="history"):
    """Factor from stored values (times any per-cell ionised fraction) to comoving n_e in cm^-3.

    ``fraction``: for gas quantities the constant ionised fraction, or 1 when a
    dataset supplies it per cell; for an overdensity relative to the box's own
    mean, that box's mean ionised fraction.
    """
    expansion = (1.0 + redshift) ** 3
    if quantity == "n_e_physical":
        return 1.0 / expansion
    if quantity == "n_e_comoving":
        return 1.0
    plasma = _plasma_or_default(plasma)
    if quantity == "overdensity":
        if reference == "box":
            return fraction * plasma.hydrogen_density0_cm3
        return float(plasma.mean_comoving_electron_density_cm3(redshift))
    if quantity == "gas_density":
        # n_H = (1 - Y_p) rho / m_p; the same m_p as n_H0 in cosmology.py, so that
        # rho = Omega_b rho_crit (1+z)^3 gives the mean hydrogen density exactly.
        hydrogen_mass_fraction = 1.0 - plasma.ionisation.helium_fraction
        return fraction * hydrogen_mass_fraction / PROTON_MASS_G / expansion
    # gas_overdensity, and density_contrast once 1 is added to it
    return fraction * plasma.hydrogen_density0_cm3


# -- plausibility -----------------------------------------------------------------------------------
def _slip(ratio, redshift, hubble_h):
    """The unit slip that best explains a mean ``ratio`` times the expected one, or None."""
    candidates = [((1.0 + redshift) ** 3, f"physical data declared comoving (a factor (1+z)^3 = {(1 + redshift) ** 3:.4g})"),
                  ((1.0 + redshift) ** -3, f"comoving data declared physical (a factor (1+z)^-3 = "
                                           f"{(1 + redshift) ** -3:.4g})")]
    if hubble_h is not None:
        candidates += [(hubble_h**k, f"a per-h factor (h^{k} = {hubble_h**k:.4g})") for k in (-3, -2, -1, 1, 2, 3)]
    k = round(math.log10(ratio))
    if k != 0:
        candidates.append((10.0**k, f"a factor 10^{k} in the unit"))
    best = min(candidates, key=lambda item: abs(math.log(ratio / item[0])))
    if abs(math.log(ratio / best[0])) > math.log(_SLIP_TOLERANCE):
        return None
    return best[1]


#: A box's stored values average to 1 within this when they are an overdensity (a box normalised to its
#: own mean gives exactly 1; a cosmic-mean normalisation a few per cent off).
_OVERDENSITY_MEAN = 0.1


def _quantity_slip(quantity, stored_mean, redshift, plasma):
    """The slip between a density and an overdensity that the stored values' mean shows, or None.

    An overdensity averages 1; a density in cm^-3 averages about nbar_e (comoving or physical): either
    declared as the other is off by a factor 1 / nbar_e ~ 1e6 to 1e7, which no unit explains.
    """
    if quantity in ("n_e_physical", "n_e_comoving", "gas_density") and abs(stored_mean - 1.0) < _OVERDENSITY_MEAN:
        return (f"an overdensity declared as a density: the stored values average {stored_mean:.4g}, as an "
                f"overdensity's do; give --quantity overdensity (or gas_overdensity), not {quantity!r}")
    if quantity in ("overdensity", "gas_overdensity"):
        comoving = float(plasma.mean_comoving_electron_density_cm3(redshift))
        for frame, mean in (("comoving", comoving), ("physical", comoving * (1.0 + redshift) ** 3)):
            if abs(math.log(stored_mean / mean)) < math.log(_SLIP_TOLERANCE):
                return (f"a density declared as an overdensity: the stored values average {stored_mean:.4g}, "
                        f"near the {frame} nbar_e = {mean:.4g} cm^-3; give --quantity n_e_{frame}, not {quantity!r}")
    return None


def plausibility_warnings(label, redshift, mean_physical_cm3, plasma, box_ionisation=None, hubble_h=None,
                          stored=None):
    """One-line warnings about a box's mean density and ionisation (empty when both are plausible).

    ``mean_physical_cm3``: the box's mean n_e at its redshift. The expected mean is
    nbar_e(z) of the plasma's history, or, when the box states its own ionisation
    (``box_ionisation``, mean electrons per hydrogen nucleus), that times the cosmic
    mean hydrogen density n_H(z). A factor over :data:`DENSITY_WARNING_FACTOR` is
    warned about with the unit slip it resembles; a box ionisation over
    :data:`IONISATION_WARNING_FACTOR` from the history's x_e(z) is warned about too. ``stored``
    (quantity, mean of the stored values) names the slip between a density and an overdensity.
    """
    plasma = _plasma_or_default(plasma)
    messages = []
    history = float(plasma.ionisation.x_e(redshift))
    hydrogen = plasma.hydrogen_density0_cm3 * (1.0 + redshift) ** 3
    if box_ionisation is not None:
        expected, what = box_ionisation * hydrogen, f"x n_H(z) with the box's own ionisation x = {box_ionisation:.4g}"
        ratio = box_ionisation / history
        if not (1.0 / IONISATION_WARNING_FACTOR <= ratio <= IONISATION_WARNING_FACTOR):
            messages.append(
                f"{label}: the box's own ionisation x_e = {box_ionisation:.4g} differs from the background "
                f"history's x_e(z = {redshift:g}) = {history:.4g} ({plasma.ionisation.description}) by a factor "
                f"{max(ratio, 1 / ratio):.3g}; the rays use the history beyond the boxes and for nbar_e"
            )
    else:
        expected, what = history * hydrogen, f"the cosmic mean nbar_e(z) of {plasma.ionisation.description}"
    ratio = mean_physical_cm3 / expected
    if not (1.0 / DENSITY_WARNING_FACTOR <= ratio <= DENSITY_WARNING_FACTOR):
        slip = ((_quantity_slip(stored[0], stored[1], redshift, plasma) if stored and stored[1] > 0 else None)
                or _slip(ratio, redshift, hubble_h))
        looks = f"it looks like {slip}" if slip else "no simple unit slip explains it; check the quantity and its unit"
        messages.append(
            f"{label}: mean n_e = {mean_physical_cm3:.4g} cm^-3 at z = {redshift:g} is {ratio:.4g} times "
            f"{what} ({expected:.4g} cm^-3); {looks}"
        )
    return messages


#: A box side beyond this (comoving Mpc) is larger than the distance to last scattering (about 14 Gpc
#: comoving, Planck 2018): no simulation box is that large, so its unit is wrong.
LARGEST_BOX_CMPC = 20000.0


def warn_box_size(size_cMpc, where, given, source):
    """Warn when a box side is beyond :data:`LARGEST_BOX_CMPC`, naming what was given and where from."""
    if size_cMpc > LARGEST_BOX_CMPC:
        warnings.warn(PlausibilityWarning(
            f"{where}: a box of {size_cMpc:.4g} cMpc (from '{given}', {source}) is larger than the distance to last "
            "scattering (about 14000 cMpc); its unit is probably wrong"), stacklevel=4)


def warn_plausibility(*arguments, **keywords):
    """Issue :func:`plausibility_warnings` as Python warnings (the CLI prints each on one line)."""
    for message in plausibility_warnings(*arguments, **keywords):
        warnings.warn(PlausibilityWarning(message), stacklevel=3)
