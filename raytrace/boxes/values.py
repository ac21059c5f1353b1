"""Plain values of a box description: side lengths with their units, redshift, h, numbers.

In: text, numbers or astropy Quantities as a user or a file gives them. Out:
checked floats, or an :class:`InputError` naming the option (``what``).
"""

import math
import re
from dataclasses import dataclass

import numpy as np

from raytrace.core.errors import InputError
from raytrace.physics.cosmology import Z_TABLE_MAX

# Values per slab when scanning or multiplying a box piece by piece (16 MB of float32).
_SLAB_VALUES = 1 << 22


def _slabs(n):
    """Start and stop planes of slabs of about _SLAB_VALUES values of an (n, n, n) cube."""
    planes = max(1, _SLAB_VALUES // (n * n))
    return [(start, min(start + planes, n)) for start in range(0, n, planes)]


# -- box side length -------------------------------------------------------------------
_NUMBER = re.compile(r"^\s*(?P<number>[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*(?P<unit>.*?)\s*$")
_LENGTH_UNIT = re.compile(
    r"^(?:(?P<word1>(?i:comoving|physical))\s+)?"
    r"(?P<h_before>h\^?-1\s*)?"
    r"(?P<frame>[cp]?)(?P<base>Gpc|Mpc|kpc|pc)"
    r"(?:\s*(?P<h_after>/\s*h|h\^?-1))?"
    r"(?:\s+(?P<word2>(?i:comoving|physical)))?$"
)
_UNIT_HELP = "cMpc, cMpc/h, ckpc/h, pMpc, or Mpc/kpc with an optional '/h' and the word 'physical'"


@dataclass(frozen=True)
class _Length:
    """A box side as given: value in Mpc (or Mpc/h), whether per h, whether physical."""

    value_Mpc: float
    per_h: bool
    physical: bool
    text: str


def _parse_length_unit(unit, text, what, bare_is_comoving):
    import astropy.units as u

    match = _LENGTH_UNIT.match(unit)
    if not match:
        raise InputError(f"{what}: cannot read the unit of {text!r}; expected a length such as {_UNIT_HELP}")
    words = {w.lower() for w in (match["word1"], match["word2"]) if w}
    if match["frame"]:
        words.add("comoving" if match["frame"] == "c" else "physical")
    if len(words) > 1:
        raise InputError(f"{what}: {text!r} says both comoving and physical")
    if match["h_before"] and match["h_after"]:
        raise InputError(f"{what}: {text!r} divides by h twice")
    if not words and not bare_is_comoving:
        raise InputError(
            f"{what}: {text!r} does not say comoving or physical; write e.g. 'cMpc/h' or 'pMpc' "
            "(a box file's unit attribute must say which)"
        )
    physical = words == {"physical"}
    factor = u.Unit(match["base"]).to(u.Mpc)
    return factor, bool(match["h_before"] or match["h_after"]), physical


def _length_from_argument(value, what):
    """A box side from a string such as '100 Mpc/h' or an astropy Quantity (comoving unless physical)."""
    length = _parse_length_argument(value, what)
    if not (math.isfinite(length.value_Mpc) and length.value_Mpc > 0):  # the option's mistake, not the file's
        raise InputError(f"{what}: expected a positive finite length, got {value!r}")
    return length


def _parse_length_argument(value, what):
    import astropy.units as u

    if isinstance(value, u.Quantity):
        from astropy.cosmology import units as cosmology_units

        if not value.isscalar:
            raise InputError(f"{what}: expected one length, got {value!r}")
        try:
            return _Length(float(value.to_value(u.Mpc)), False, False, f"{value}")
        except u.UnitConversionError:
            pass
        try:
            return _Length(float((value * cosmology_units.littleh).to_value(u.Mpc)), True, False, f"{value}")
        except u.UnitConversionError:
            raise InputError(f"{what}: {value!r} is not a length (e.g. '100 Mpc/h' or '67.7 Mpc')") from None
    if isinstance(value, str):
        match = _NUMBER.match(value)
        if not match:
            raise InputError(f"{what}: cannot read {value!r} as a number with a length unit ({_UNIT_HELP})")
        if not match["unit"]:
            raise InputError(f"{what}: {value!r} has no unit; write e.g. '100 Mpc/h' or '67.7 Mpc'")
        factor, per_h, physical = _parse_length_unit(match["unit"], value, what, bare_is_comoving=True)
        return _Length(float(match["number"]) * factor, per_h, physical, value.strip())
    raise InputError(
        f"{what}: expected a length with its unit, as text ('100 Mpc/h', '67.7 Mpc') or an astropy "
        f"Quantity; got {value!r}"
    )


def _comoving_size(length, redshift, hubble_h, where):
    """Side length in comoving Mpc (no h)."""
    size = length.value_Mpc
    if length.per_h:
        if hubble_h is None:
            raise InputError(
                f"{where}: the box size {length.text!r} is per h but h is unknown; give the simulation's h "
                "with --hubble-h (hubble_h=...) or store a 'hubble_h' attribute"
            )
        size /= hubble_h
    if length.physical:
        size *= 1.0 + redshift
    if not (math.isfinite(size) and size > 0):
        raise InputError(f"{where}: box size {length.text!r}: expected a positive finite length")
    return size


# -- checks of plain values ------------------------------------------------------------------
def _number(value, what):
    try:
        number = float(np.asarray(value).reshape(-1)[0]) if np.size(value) == 1 else None
    except (TypeError, ValueError):
        number = None
    if number is None:
        raise InputError(f"{what}: expected one number, got {value!r}")
    return number


def _check_redshift(value, what):
    z = _number(value, what)
    if not (math.isfinite(z) and 0.0 <= z <= Z_TABLE_MAX):
        raise InputError(f"{what}: expected a snapshot redshift between 0 and {Z_TABLE_MAX:g}, got {value!r}")
    return z


def _check_hubble(value, what):
    h = _number(value, what)
    if not (math.isfinite(h) and 0.0 < h <= 2.0):
        raise InputError(f"{what}: expected the dimensionless Hubble parameter h (e.g. 0.6766), got {value!r}")
    return h


def _check_grid(shape, where):
    if len(shape) != 3:
        raise InputError(f"{where}: shape {tuple(shape)} is {len(shape)}-D; expected a 3-D cube (N, N, N)")
    if not shape[0] == shape[1] == shape[2]:
        raise InputError(f"{where}: shape {tuple(shape)} is not cubic; expected (N, N, N)")
    if shape[0] < 2:
        raise InputError(f"{where}: shape {tuple(shape)}; expected at least 2 cells a side")


def _check_dtype(dtype, where):
    if np.dtype(dtype).kind not in "fiu":
        raise InputError(f"{where}: values of type {dtype}; expected float or integer values")


def _supply(key):
    return f"--{key.replace('_', '-')} ({key}=...)"


def scan_density(data, where):
    """Counts of bad values, then mean, maximum, smallest positive value and zero count.

    Works slab by slab so that no full-size temporary is made.
    """
    not_finite = negative = zeros = 0
    total, top, smallest_positive, lowest = 0.0, -np.inf, np.inf, np.inf
    for start, stop in _slabs(data.shape[0]):
        slab = np.asarray(data[start:stop])
        finite = np.isfinite(slab)
        not_finite += slab.size - int(np.count_nonzero(finite))
        below = slab < 0
        negative += int(np.count_nonzero(below))
        if negative or not_finite:
            if below.any():
                lowest = min(lowest, float(slab[below].min()))
            continue
        zeros += slab.size - int(np.count_nonzero(slab))
        total += float(np.sum(slab, dtype=np.float64))
        top = max(top, float(slab.max()))
        positive = slab[slab > 0]
        if positive.size:
            smallest_positive = min(smallest_positive, float(positive.min()))
    size = data.size
    if not_finite:
        raise InputError(
            f"{where}: {not_finite} of {size} values are NaN or inf (as float32); expected finite densities"
        )
    if negative:
        raise InputError(
            f"{where}: {negative} of {size} values are negative (lowest {lowest:g}); expected densities >= 0"
        )
    if zeros == size:
        raise InputError(f"{where}: every value is zero; expected a density with non-zero cells")
    return {
        "mean": total / size,
        "maximum": top,
        "minimum_positive": smallest_positive,
        "zero_cells": zeros,
    }
