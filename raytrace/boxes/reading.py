"""Reading one box from an HDF5 file: :func:`load_box`.

In: a file path, optionally the dataset and any of the values that say what it
holds (each overrides the file's metadata, found as metadata.py describes). Out:
a :class:`Box`; warnings when its mean density or ionisation look implausible
(meanings.py). A contiguous, uncompressed float32 dataset is memory-mapped
read-only; anything else is read (and converted) into one float32 array, so a
box never needs a second full copy in memory.
"""

import math
from pathlib import Path

import numpy as np

from raytrace.boxes.box import Box
from raytrace.boxes.codeunits import code_unit
from raytrace.boxes.conflicts import warn_conflicts
from raytrace.boxes.fractions import add_one, apply_fraction, fraction_from
from raytrace.boxes.meanings import _GAS as _GAS_QUANTITIES
from raytrace.boxes.meanings import (
    QUANTITIES,
    _check_fraction_constant,
    _check_helium_electrons,
    _check_quantity,
    _check_reference,
    _comoving_scale,
    warn_box_size,
    warn_plausibility,
)
from raytrace.boxes.metadata import Metadata
from raytrace.boxes.values import (
    _check_dtype,
    _check_grid,
    _check_hubble,
    _check_redshift,
    _comoving_size,
    _Length,
    _length_from_argument,
    _number,
    _parse_length_unit,
    _supply,
    scan_density,
)
from raytrace.core.errors import InputError, require_path
from raytrace.physics.constants import MPC_CM

_FRACTION_DATASET_KEYS = ("ionised_fraction_dataset", "neutral_fraction_dataset")


# -- reading HDF5 ----------------------------------------------------------------------------
def _open(path):
    import h5py

    path = Path(path)
    if not path.exists():
        raise InputError(f"{path}: file not found")
    if path.is_dir():
        raise InputError(f"{path}: is a folder; expected an HDF5 box file")
    if not h5py.is_hdf5(path):
        raise InputError(f"{path}: not an HDF5 file")
    try:
        return h5py.File(path, "r")
    except OSError as error:
        raise InputError(f"{path}: cannot open as HDF5 ({error})") from None


def _datasets(handle):
    """Every dataset in the file, as (name, dataset), sorted by name."""
    import h5py

    found = []
    handle.visititems(lambda name, node: found.append(("/" + name, node)) if isinstance(node, h5py.Dataset) else None)
    return sorted(found, key=lambda item: item[0])


def _listing(datasets):
    return ", ".join(f"{name} {tuple(node.shape)} {node.dtype}" for name, node in datasets) or "none"


def _node(handle, name, where):
    """``handle.get(name)``; a name that is not text HDF5 can store (from argv bytes that
    are not UTF-8, which Python keeps as lone surrogates) is an InputError."""
    try:
        return handle.get(name)
    except UnicodeEncodeError:
        raise InputError(f"{where}: {name!r} is not a valid dataset path (HDF5 names are UTF-8 text)") from None


def _fraction_dataset_names(handle, datasets, fractions):
    """Paths of the ionised- or neutral-fraction datasets named by arguments or attributes."""
    import h5py

    names = set()
    for argument in fractions:
        if isinstance(argument, str):
            names.add(argument if argument.startswith("/") else "/" + argument)
    owners = [handle] + [node for _, node in datasets]
    handle.visititems(lambda _, node: owners.append(node) if isinstance(node, h5py.Group) else None)
    for owner in owners:
        for key in _FRACTION_DATASET_KEYS:
            value = owner.attrs.get(key)
            if value is not None:
                value = value.decode() if isinstance(value, bytes) else str(value)
                names.add(value if value.startswith("/") else "/" + value)
    return names


def _candidates(handle, fractions=()):
    """The 3-D datasets that may hold a density (fraction datasets left out)."""
    everything = _datasets(handle)
    cubes = [(name, node) for name, node in everything if node.ndim == 3]
    excluded = _fraction_dataset_names(handle, cubes, fractions)
    return everything, [(name, node) for name, node in cubes if name not in excluded]


def _find_dataset(handle, path, dataset, fractions):
    import h5py

    everything, candidates = _candidates(handle, fractions)
    if dataset is not None:
        if not isinstance(dataset, str):
            raise InputError(f"{path}: dataset: expected the path of a dataset as text, got {dataset!r}")
        node = _node(handle, dataset, path)
        if node is None:
            raise InputError(
                f"{path}: no dataset {dataset!r}; 3-D datasets in the file: "
                f"{_listing([c for c in everything if c[1].ndim == 3])} (choose one with --dataset)"
            )
        if not isinstance(node, h5py.Dataset):
            raise InputError(
                f"{path}: {dataset!r} is a group, not a dataset; 3-D datasets in the file: "
                f"{_listing([c for c in everything if c[1].ndim == 3])}"
            )
        return node
    if not candidates:
        raise InputError(f"{path}: no 3-D dataset in the file; datasets found: {_listing(everything)}")
    if len(candidates) > 1:
        raise InputError(
            f"{path}: several 3-D datasets: {_listing(candidates)}; choose one with --dataset (dataset=...)"
        )
    return candidates[0][1]


def _check_written(node, where):
    """Refuse a dataset whose storage was never all written: a writer stopped (or is still writing).

    HDF5 allocates a dataset's storage as it is written (chunk by chunk, or at the first write of a
    contiguous one, by default); unallocated parts would read as fill values, i.e. made-up cells.
    """
    import h5py

    if node.external is not None:
        return
    status = node.id.get_space_status()
    if status != h5py.h5d.SPACE_STATUS_ALLOCATED:
        written = ("only part of the dataset was ever written (HDF5 holds some of its chunks only)"
                   if status == h5py.h5d.SPACE_STATUS_PART_ALLOCATED else
                   "the dataset was never written (HDF5 holds no storage for it)")
        raise InputError(f"{where}: {written}: a half-written box, whose writer stopped or is still writing; "
                         "expected a complete dataset")


def _read_values(node, path, memory_map):
    """The dataset as float32: memory-mapped read-only if contiguous uncompressed float32, else read."""
    if (
        memory_map
        and node.dtype == np.dtype(np.float32)
        and node.chunks is None
        and node.compression is None
        and node.external is None
    ):
        offset = node.id.get_offset()
        if offset is not None:
            return np.memmap(path, dtype=np.float32, mode="r", offset=offset, shape=node.shape)
    # HDF5 converts the type while reading, chunk by chunk: no second full copy.
    values = np.empty(node.shape, dtype=np.float32)
    node.read_direct(values)
    return values


def _given(key):
    return f"given: {_supply(key)}"


def _length_from_metadata(metadata, where):
    """``(length, source)`` of the box side the file states, or ``(None, what is missing)``: a side
    without a unit takes the code's unit of length where the file states one (codeunits.py)."""
    value, unit, source, unit_source = metadata.find_box_size()
    if value is None:
        return None, (f"the box size: give {_supply('box_size')} such as '100 Mpc/h', or store 'box_size' and "
                      "'box_size_unit' attributes")
    size = _number(value, f"{where}: {source}")
    if unit is None:
        code = code_unit(metadata, "length", where)
        if code is None:
            return None, (f"the box size's unit: {source} = {size:g} has no unit (no 'box_size_unit' attribute, no "
                          f"code unit such as UnitLength_in_cm); give {_supply('box_size')} with the unit this "
                          "number is in")
        text = f"{size:g} x {code.size:g} cm{'/h' if code.per_h else ''}"
        return (_Length(size * code.size / MPC_CM, code.per_h, not code.comoving, text),
                f"{source}, in the code's unit of length {code.describe('length')}")
    text = f"{size:g} {unit}"
    factor, per_h, physical = _parse_length_unit(unit, text, f"{where}: {unit_source}", False)
    return _Length(size * factor, per_h, physical, text), f"{source}, unit from {unit_source}"


def _fraction_node(handle, name, where, option):
    import h5py

    node = _node(handle, name, handle.filename)
    if not isinstance(node, h5py.Dataset):
        raise InputError(
            f"{handle.filename}: no {option} dataset {name!r}; 3-D datasets in the file: "
            f"{_listing([c for c in _datasets(handle) if c[1].ndim == 3])}"
        )
    return node


def _stated_fraction(handle, metadata, arguments, sources, where):
    """The ionised or neutral fraction from the arguments, else from the file's attributes."""
    ionised, neutral, helium = arguments
    if ionised is None and neutral is None:
        for key, is_neutral in (("ionised_fraction", False), ("neutral_fraction", True)):
            for suffix in ("", "_dataset"):
                value, source = metadata.find(key + suffix)
                if value is not None:
                    if suffix:
                        value = str(value)
                    else:
                        value = _check_fraction_constant(value, f"{where}: {source}", neutral=is_neutral)
                    sources[key] = source
                    ionised, neutral = (None, value) if is_neutral else (value, None)
                    break
            if ionised is not None or neutral is not None:
                break
    else:
        sources["ionised_fraction" if ionised is not None else "neutral_fraction"] = _given(
            "ionised_fraction" if ionised is not None else "neutral_fraction")
    if helium is None and neutral is not None:
        helium, source = metadata.find("helium_electrons")
        if helium is not None:
            helium = _check_helium_electrons(_number(helium, f"{where}: {source}"), f"{where}: {source}")
            sources["helium_electrons"] = source
    elif helium is not None:
        helium = _check_helium_electrons(helium, "--helium-electrons (helium_electrons)")
        sources["helium_electrons"] = _given("helium_electrons")
    if isinstance(ionised, str):
        ionised = _fraction_node(handle, ionised, where, "ionised-fraction")
    if isinstance(neutral, str):
        neutral = _fraction_node(handle, neutral, where, "neutral-fraction")
    return fraction_from(ionised, neutral, helium, where)


def _meaning(handle, metadata, where, sources, quantity, redshift, hubble_h, box_size, mean_density, fractions):
    """What the dataset holds, from the arguments, else the file's metadata; ``sources`` gets
    where each value came from. Everything missing is named in one InputError. Returns
    (quantity, z, h, length, comoving size, reference, fraction)."""
    missing = []

    def stated(key, given, check_value, required=None):
        if given is not None:
            sources[key] = _given(key)
            return check_value(given, f"--{key.replace('_', '-')} ({key})")
        value, source = metadata.find(key)
        if value is None:
            if required:
                missing.append(f"{required}: give {_supply(key)} or store a '{key}' attribute")
            return None
        sources[key] = source
        return check_value(value, f"{where}: {source}")

    quantity = stated("quantity", quantity, _check_quantity,
                      f"what the values mean (one of {', '.join(QUANTITIES)})")
    z = stated("redshift", redshift, _check_redshift, "the snapshot redshift")
    h = stated("hubble_h", hubble_h, _check_hubble)
    if box_size is None:
        length, found = _length_from_metadata(metadata, where)
        if length is None:
            missing.append(found)
        else:
            sources["box_size"] = found
    else:
        length, sources["box_size"] = _length_from_argument(box_size, "--box-size (box_size)"), _given("box_size")
    if length is not None and length.per_h and h is None:
        missing.append(f"h, as the box size {length.text!r} is per h: give {_supply('hubble_h')} or store a "
                       "'hubble_h' attribute")
    if mean_density is not None and quantity is not None and quantity != "overdensity":
        raise InputError(f"--mean-density (mean_density): applies to quantity 'overdensity' only; {where} "
                         f"holds {quantity!r}")
    reference = stated("mean_density", mean_density, _check_reference) if quantity == "overdensity" else None
    if quantity == "overdensity" and reference is None:
        reference, sources["mean_density"] = "history", "default"
    # Fraction attributes are read only where the quantity takes one (and checked where it does not).
    needs_fraction = quantity in _GAS_QUANTITIES or reference == "box"
    if not needs_fraction:
        _check_unused_fractions(metadata, where)
    fraction = _stated_fraction(handle, metadata if needs_fraction else _NO_METADATA, fractions, sources, where)
    if needs_fraction and fraction is None:
        missing.append(f"the ionised fraction that quantity {quantity!r} needs: give --ionised-fraction or "
                       "--neutral-fraction (a number or a dataset path), or store an 'ionised_fraction' attribute")
    if missing:
        listed = missing[0] if len(missing) == 1 else "; ".join(f"({i}) {m}" for i, m in enumerate(missing, 1))
        raise InputError(f"{where}: {len(missing)} piece{'s' if len(missing) > 1 else ''} of metadata missing: "
                         f"{listed}")
    size = _comoving_size(length, z, h, where)
    warn_conflicts(metadata, where, sources, z, h, size)
    warn_box_size(size, where, length.text, sources["box_size"])
    return quantity, z, h, length, size, reference, fraction


def _check_unused_fractions(metadata, where):
    """A fraction attribute the quantity does not use must still be one: a bad value is a damaged file."""
    for key, neutral in (("ionised_fraction", False), ("neutral_fraction", True)):
        value, source = metadata.find(key)
        if value is not None:
            _check_fraction_constant(value, f"{where}: {source} (unused by this quantity, but not a fraction)",
                                     neutral=neutral)


def load_box(
    path,
    dataset=None,
    quantity=None,
    box_size=None,
    redshift=None,
    hubble_h=None,
    ionised_fraction=None,
    plasma=None,
    *,
    neutral_fraction=None,
    helium_electrons=None,
    mean_density=None,
    comoving_scale=None,
    memory_map=True,
    check=True,
    **unknown,
):
    """Read one electron-density box from an HDF5 file.

    Arguments override the file's metadata (package docstring). ``dataset`` is a
    path in the file (default: the only 3-D dataset). ``box_size`` is a string such
    as "100 Mpc/h" or "67.7 Mpc", or an astropy Quantity (comoving unless stated
    physical). ``ionised_fraction`` (electrons per hydrogen nucleus) or
    ``neutral_fraction`` (n_HI / n_H, with ``helium_electrons``) is a number or
    the path of a 3-D dataset in the same file. ``mean_density`` ("history" or
    "box") says what an overdensity is relative to. ``plasma`` is a MeanPlasma
    giving nbar_e(z) and n_H0 (default: Planck18 with CAMB's ionisation).
    ``comoving_scale``, when given, replaces the factor that quantity, constant
    fraction and plasma would give (``Box.load_arguments`` uses it to reopen the
    same box elsewhere, with no checks). ``memory_map=False`` reads even a
    mappable dataset. ``check`` warns when the box's mean density is more than a
    factor 10 from the expected mean, or its ionisation a factor 2 from the
    history's (meanings.plausibility_warnings).
    """
    from raytrace.core.provenance import file_checksum

    _refuse_unknown(unknown)
    path = require_path(path, "path (--boxes)")
    sources = {}
    with _open(path) as handle:
        node = _find_dataset(handle, path, dataset, (ionised_fraction, neutral_fraction))
        where = f"{path}, dataset {node.name}"
        _check_grid(node.shape, where)
        _check_dtype(node.dtype, where)
        _check_written(node, where)
        metadata = Metadata(handle, node)
        quantity, z, h, length, size, reference, fraction = _meaning(
            handle, metadata, where, sources, quantity, redshift, hubble_h, box_size, mean_density,
            (ionised_fraction, neutral_fraction, helium_electrons))
        values = _box_values(node, path, where, quantity, fraction, memory_map)
        constant, box_ionisation = apply_fraction(values, quantity, reference, fraction, plasma, where,
                                                  scale_known=comoving_scale is not None)
        scale = _given_or_derived_scale(comoving_scale, quantity, z, constant, plasma, reference)
        dataset_name, stored_dtype = node.name, str(node.dtype)
        provenance, _ = metadata.find("provenance")
        fraction_argument = _reopen_fraction(fraction)
    stats = scan_density(values, where)
    if check and comoving_scale is None:
        warn_plausibility(f"{path}:{dataset_name}", z, scale * stats["mean"] * (1.0 + z) ** 3, plasma,
                          box_ionisation, h, stored=(quantity, stats["mean"]))
    info = {
        "stored_dtype": stored_dtype,
        "box_size_given": length.text,
        "hubble_h": h,
        "ionised_fraction": None if fraction is None else fraction.label,
        "mean_density": reference,
        "box_ionisation": box_ionisation,
        "sources": sources,
        "provenance": None if provenance is None else str(provenance),
        **stats,
    }
    reopen = _reopen_arguments(path, dataset_name, quantity, size, z, reference, fraction_argument, scale, memory_map)
    return Box(
        values, scale, z, size, quantity, path.resolve(), dataset_name, file_checksum(path), _load=reopen, _info=info
    )


#: load_box's keywords, for the message naming one that is not.
_KEYWORDS = ("dataset", "quantity", "box_size", "redshift", "hubble_h", "ionised_fraction", "plasma", "neutral_fraction",
             "helium_electrons", "mean_density", "comoving_scale", "memory_map", "check")


def _refuse_unknown(unknown):
    """An InputError naming keywords load_box does not take, with the nearest it does."""
    import difflib

    if unknown:
        named = []
        for name in sorted(unknown):
            close = difflib.get_close_matches(name, _KEYWORDS, n=1)
            named.append(f"{name!r}" + (f" (did you mean {close[0]!r}?)" if close else ""))
        raise InputError(f"load_box: unknown option {', '.join(named)}; it takes {', '.join(_KEYWORDS)}")


def _box_values(node, path, where, quantity, fraction, memory_map):
    """The box's float32 values: 1 + delta for a density contrast, else the stored values, memory-mapped
    (when ``memory_map`` allows) only where no per-cell fraction will change them in place."""
    if quantity == "density_contrast":
        values = np.empty(node.shape, dtype=np.float32)
        add_one(node, values, where)
        return values
    per_cell = fraction is not None and fraction.cells is not None and quantity in _GAS_QUANTITIES
    return _read_values(node, path, memory_map and not per_cell)


def _given_or_derived_scale(comoving_scale, quantity, z, constant, plasma, reference):
    """The comoving_scale given (checked), or the one that quantity, constant fraction and plasma give."""
    if comoving_scale is None:
        return _comoving_scale(quantity, z, constant, plasma, reference)
    scale = _number(comoving_scale, "comoving_scale")
    if not (math.isfinite(scale) and scale > 0):
        raise InputError(f"comoving_scale: expected a positive finite number, got {comoving_scale!r}")
    return scale


def _reopen_arguments(path, dataset_name, quantity, size, z, reference, fraction_argument, scale, memory_map):
    """load_box arguments that reopen this box elsewhere as it is (``Box.load_arguments``)."""
    return {
        "path": str(path.resolve()),
        "dataset": dataset_name,
        "quantity": quantity,
        "box_size": f"{size!r} cMpc",
        "redshift": z,
        "mean_density": reference,
        **fraction_argument,
        "comoving_scale": scale,
        "memory_map": memory_map,
    }


class _NoMetadata:
    """Stands in for the file's metadata where a quantity takes no fraction (attributes not read)."""

    @staticmethod
    def find(key):
        return None, None


_NO_METADATA = _NoMetadata()


def _reopen_fraction(fraction):
    """load_box arguments that restate a fraction for a reopening with the same comoving_scale."""
    if fraction is None:
        return {}
    value = fraction.constant if fraction.cells is None else fraction.cells.name
    if fraction.neutral:
        return {"neutral_fraction": value, "helium_electrons": fraction.helium_electrons}
    return {"ionised_fraction": value}
