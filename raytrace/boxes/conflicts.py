"""A box file whose simulation header says another redshift, h or box size than its dataset.

In: the file's metadata, the values the loader took (from the attribute nearest
the dataset, metadata.py's search order) and where each came from. Out: one
warning line naming every disagreement with a header group (Header, Parameters,
Cosmology ...) and what was used, and the header's values added to ``sources``
so that ``inspect`` shows both. The dataset's own parent groups are not
compared: their attributes are defaults its nearer ones override by design.
Values given as flags are the user's choice and are not compared either.
"""

import math
import warnings

import numpy as np

from raytrace.boxes.values import _parse_length_unit
from raytrace.core.errors import InputError, RaytraceWarning

# Two statements of one value agree to this relative difference (float32 storage, printed digits).
_AGREE = 1e-6


class MetadataConflictWarning(RaytraceWarning):
    """A file states its redshift, h or box size in two places with different values."""


def _number(value):
    try:
        return float(np.asarray(value, dtype=float).reshape(-1)[0])
    except (TypeError, ValueError, IndexError):
        return None


def _differ(a, b):
    return a is not None and b is not None and not math.isclose(a, b, rel_tol=_AGREE, abs_tol=_AGREE)


def _other_size(value, unit, redshift, hubble_h):
    """A box side in comoving Mpc from another place of the file, or None where its unit cannot say."""
    number = _number(value)
    if number is None or unit is None:
        return None
    try:
        factor, per_h, physical = _parse_length_unit(unit, f"{number:g} {unit}", "box size", False)
    except InputError:
        return None
    if per_h and hubble_h is None:
        return None
    return number * factor / (hubble_h if per_h else 1.0) * ((1.0 + redshift) if physical else 1.0)


def _box_size_conflicts(metadata, redshift, hubble_h, size_cMpc):
    sizes = metadata.box_sizes()
    first = _number(sizes[0][0]) if sizes else None
    found = []
    for value, unit, source, _ in [size for size in sizes[1:] if metadata.in_header(size[2])]:
        other = _other_size(value, unit, redshift, hubble_h)
        if other is not None and _differ(other, size_cMpc):
            found.append(f"{source} says {_number(value):g} {unit} = {other:.6g} cMpc")
        elif other is None and unit is None and _differ(_number(value), first):
            found.append(f"{source} says {_number(value):g} (no unit: maybe the same length in another unit)")
    return found


def warn_conflicts(metadata, where, sources, redshift, hubble_h, size_cMpc):
    """Warn in one line where the file states the redshift, h or box size differently in two places;
    add the other statements to ``sources``."""
    conflicts = {}
    for key, chosen in (("redshift", redshift), ("hubble_h", hubble_h)):
        if chosen is not None and sources.get(key, "").startswith("attribute"):
            others = [f"{source} says {_number(value):g}" for value, source in metadata.find_all(key)[1:]
                      if metadata.in_header(source) and _differ(_number(value), chosen)]
            if others:
                conflicts[key] = (f"{chosen:g}", others)
    if sources.get("box_size", "").startswith("attribute"):
        others = _box_size_conflicts(metadata, redshift, hubble_h, size_cMpc)
        if others:
            conflicts["box_size"] = (f"{size_cMpc:.6g} cMpc", others)
    if not conflicts:
        return
    for key, (_, others) in conflicts.items():
        sources[key] += "; but " + "; ".join(others)
    told = "; ".join(f"{key} {used} from {sources[key].split('; but ')[0]}, but {', '.join(others)}"
                     for key, (used, others) in conflicts.items())
    warnings.warn(MetadataConflictWarning(
        f"{where}: the file contradicts itself: {told}; using the attribute nearest the dataset (the flags "
        "--redshift, --hubble-h, --box-size override it)"), stacklevel=4)
