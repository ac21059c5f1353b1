"""Checks of what a result file holds, before anything is computed from it.

In: an open result file (h5py), its path, and the names of the datasets a
format holds. Out: the arrays, each checked to be there and readable, of the
shape the mass grid and the row count give (rays; for a sky 12 nside^2 pixels
from its run record), finite, and non-negative where it is a kernel, a count
or a dispersion measure; a positive, strictly increasing mass grid; a format
version that is a whole number this raytrace reads; a run record that is JSON
with the keys the readers use. Anything else is an InputError naming the file
and the dataset or attribute: a damaged file is never read as a result.
"""

import json
import math
import numbers

import numpy as np

from raytrace.core.errors import InputError

#: How each dataset's shape follows from (rows, masses), and whether its values must be >= 0.
SHAPES = {
    "kernel_boxes": ("rows, masses", True),
    "kernel_tangent": ("rows, masses", True),
    "kernel_splits": ("rows, 2, masses", True),
    "crossings": ("rows, masses", True),
    "tangent_events": ("rows, masses", True),
    "dispersion_measure_boxes": ("rows", True),
    "direction": ("rows, 3", False),
    "kernel_background": ("masses", True),
    "error": ("masses", True),
}


def format_version(handle, path, newest):
    """The file's format version (1 where the attribute is absent), a whole number from 1 to ``newest``."""
    value = handle.attrs.get("format_version", 1)
    if isinstance(value, (bytes, str)) or not isinstance(np.asarray(value).item(), numbers.Integral) \
            or np.size(value) != 1:
        raise InputError(f"{path}: attribute format_version is {value!r}; expected a whole number "
                         f"(this raytrace reads 1 to {newest}): the file is damaged")
    version = int(np.asarray(value).item())
    if version < 1:
        raise InputError(f"{path}: attribute format_version is {version}; expected 1 to {newest}: the file is damaged")
    return version


def run_record(owner, path, required=(), where="attribute run"):
    """The JSON run record of a result file (or of its ``pdf_mean`` group), with ``required`` keys present."""
    text = owner.attrs.get("run")
    if text is None:
        raise InputError(f"{path}: {where} is missing; the file is damaged or was not written by raytrace")
    try:
        record = json.loads(text)
    except (TypeError, ValueError):
        raise InputError(f"{path}: {where} is not a JSON run record; the file is damaged") from None
    if not isinstance(record, dict):
        raise InputError(f"{path}: {where} is not a JSON object of run parameters; the file is damaged")
    missing = [key for key in required if key not in record]
    if missing:
        raise InputError(f"{path}: {where} lacks {', '.join(missing)}; the file is damaged")
    for key in required:
        if key in ("z_max", "z_boxes") and not _finite_number(record[key], at_least=0):
            raise InputError(f"{path}: {where}: {key} is {record[key]!r}; expected a redshift >= 0")
    return record


def _finite_number(value, at_least=None):
    good = isinstance(value, numbers.Real) and not isinstance(value, bool) and math.isfinite(value)
    return good and (at_least is None or value >= at_least)


def sky_rows(record, path):
    """The pixel count of a sky's run record (12 nside^2), its nside and ordering checked."""
    nside = record.get("nside")
    if not (isinstance(nside, numbers.Integral) and not isinstance(nside, bool) and nside >= 1
            and not nside & (nside - 1)):
        raise InputError(f"{path}: attribute run: nside is {nside!r}; expected a power of 2: the file is damaged")
    if record.get("ordering") not in ("RING", "NESTED"):
        raise InputError(f"{path}: attribute run: ordering is {record.get('ordering')!r}; expected RING or NESTED")
    return 12 * nside * nside


def _read(owner, path, name, prefix):
    where = f"dataset {prefix}{name}"
    if name not in owner:
        raise InputError(f"{path}: {where} is missing; the file is damaged or not a complete result")
    try:
        values = owner[name][...]
    except (OSError, KeyError, TypeError, ValueError, AttributeError) as error:
        raise InputError(f"{path}: {where} cannot be read ({error}); the file is damaged") from None
    if not isinstance(values, np.ndarray) or values.dtype.kind not in "fiu":
        raise InputError(f"{path}: {where} holds {getattr(values, 'dtype', type(values).__name__)}; expected numbers")
    return values, where


def mass_grid(owner, path, prefix=""):
    """The mass grid (eV): one-dimensional, finite, positive and strictly increasing."""
    mass, where = _read(owner, path, "mass_eV", prefix)
    mass = mass.astype(float)
    if mass.ndim != 1 or mass.size == 0:
        raise InputError(f"{path}: {where} has shape {mass.shape}; expected a non-empty list of masses")
    if not np.all(np.isfinite(mass) & (mass > 0)):
        raise InputError(f"{path}: {where} holds values that are not positive finite masses in eV")
    if np.any(np.diff(mass) <= 0):
        raise InputError(f"{path}: {where} is not strictly increasing; every table and limit is drawn against the "
                         "grid's order: the file is damaged")
    return mass


def read_arrays(owner, path, names, n_masses, n_rows=None, prefix="", optional=(), per_mass=False):
    """The datasets ``names`` of ``owner``, each checked by :data:`SHAPES` against ``n_masses`` and
    ``n_rows`` (None: the rows of the first per-row dataset); with ``per_mass`` each is one value per
    mass (a one-point-PDF mean). ``optional`` ones may be absent (None)."""
    arrays = {}
    for name in names:
        if name in optional and name not in owner:
            arrays[name] = None
            continue
        values, where = _read(owner, path, name, prefix)
        layout, non_negative = SHAPES.get(name, ("masses", True))
        layout = "masses" if per_mass else layout
        if n_rows is None and layout.startswith("rows"):
            n_rows = values.shape[0] if values.ndim else -1
        expected = tuple({"rows": n_rows, "masses": n_masses, "3": 3, "2": 2}[part] for part in layout.split(", "))
        if values.shape != expected:
            raise InputError(f"{path}: {where} has shape {values.shape}; expected {expected} ({layout}: "
                             f"{n_rows} rows, {n_masses} masses): the file is damaged or cut short")
        check_values(values, path, where, non_negative)
        arrays[name] = values
    return arrays


def check_values(values, path, where, non_negative=True):
    """Finite values (and >= 0 where ``non_negative``), or an InputError naming the first offender."""
    bad = ~np.isfinite(values)
    if non_negative:
        bad |= np.isfinite(values) & (values < 0)
    if bad.any():
        index = tuple(int(i) for i in np.argwhere(bad)[0])
        expected = "finite values >= 0" if non_negative else "finite values"
        raise InputError(f"{path}: {where} holds {int(bad.sum())} values that are not {expected} (first at "
                         f"{index}: {values[index]!r}); the file is damaged")


def scalar_attribute(owner, path, name):
    """A finite, non-negative number stored as an attribute."""
    value = owner.attrs.get(name)
    if value is None or np.size(value) != 1 or not _finite_number(np.asarray(value).item(), at_least=0):
        raise InputError(f"{path}: attribute {name} is {value!r}; expected a finite number >= 0")
    return float(np.asarray(value).item())
