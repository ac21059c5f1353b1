"""Lengths and masses in a simulation code's own units, as its snapshots state them.

In: the metadata of a file (:class:`~raytrace.boxes.metadata.Metadata`). Out: the
code's unit of length or mass (:class:`CodeUnit`: its size in cm or g, whether
values are per h and comoving, and where that was read), or None where the file
states none. Conventions (from memory of the codes' documentation; common
practice, no source):

- Gadget-2/3, GIZMO, Arepo: ``UnitLength_in_cm`` and ``UnitMass_in_g`` in the
  ``Parameters`` (or ``Header``) group; a cosmological run (``ComovingIntegrationOn``
  1, or absent) stores comoving lengths in units of UnitLength_in_cm / h and masses
  in UnitMass_in_g / h, h being ``HubbleParam``. A run with ComovingIntegrationOn 0
  is not a cosmological box: its units are refused rather than guessed.
- SWIFT: ``Unit length in cgs (U_L)`` and ``Unit mass in cgs (U_M)`` in the ``Units``
  group, comoving and without h.
"""

import math
from dataclasses import dataclass

from raytrace.core.errors import InputError

_GADGET = {"length": "UnitLength_in_cm", "mass": "UnitMass_in_g"}
_SWIFT = {"length": "Unit length in cgs (U_L)", "mass": "Unit mass in cgs (U_M)"}


@dataclass(frozen=True)
class CodeUnit:
    """A code's unit: ``size`` in cm (length) or g (mass), per h or not, comoving or not, and where from."""

    size: float
    per_h: bool
    comoving: bool
    source: str

    def describe(self, kind):
        cgs = "cm" if kind == "length" else "g"
        return (f"{self.size:g} {cgs}{'/h' if self.per_h else ''}{', comoving' if self.comoving else ''} "
                f"(from {self.source})")


def code_unit(metadata, kind, where):
    """The code's unit of ``kind`` ('length' or 'mass') that the file states, or None."""
    for convention, names in (("Gadget", _GADGET), ("SWIFT", _SWIFT)):
        value, source = metadata.find_named((names[kind],))
        if value is None:
            continue
        try:
            size = float(value)
        except (TypeError, ValueError):
            size = math.nan
        if not (math.isfinite(size) and size > 0):
            raise InputError(f"{where}: {source} is {value!r}; expected the code's unit of {kind} in cgs, > 0")
        if convention == "SWIFT":
            return CodeUnit(size, False, True, f"{source}, SWIFT's convention: comoving, no h")
        comoving, comoving_source = metadata.find_named(("ComovingIntegrationOn",))
        if comoving is not None and not _true(comoving):
            raise InputError(f"{where}: {comoving_source} is {comoving!r}: not a cosmological run, so the code's "
                             f"units ({source}) do not say comoving or physical; give --box-size with its unit")
        return CodeUnit(size, True, True, f"{source}, Gadget's convention: comoving, per h")
    return None


def _true(value):
    try:
        return float(value) != 0
    except (TypeError, ValueError):
        return bool(value)
