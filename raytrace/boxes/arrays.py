"""In-memory boxes: :meth:`Box.from_array` (numpy arrays in, a :class:`Box` out)."""

import numpy as np

from raytrace.boxes.fractions import add_one, apply_fraction, fraction_from
from raytrace.boxes.meanings import _GAS, _check_quantity, _check_reference, _comoving_scale, warn_plausibility
from raytrace.boxes.values import (
    _check_dtype,
    _check_grid,
    _check_hubble,
    _check_redshift,
    _comoving_size,
    _length_from_argument,
    scan_density,
)
from raytrace.core.errors import InputError


def box_from_array(cls, array, box_size, redshift, quantity, plasma, hubble_h, ionised_fraction, copy,
                   neutral_fraction, helium_electrons, mean_density, check):
    """The work of :meth:`Box.from_array` (same arguments)."""
    where = "array"
    array = np.asarray(array)
    _check_grid(array.shape, where)
    _check_dtype(array.dtype, where)
    quantity = _check_quantity(quantity, "quantity")
    z = _check_redshift(redshift, "redshift")
    h = None if hubble_h is None else _check_hubble(hubble_h, "hubble_h")
    length = _length_from_argument(box_size, "box_size")
    size = _comoving_size(length, z, h, where)
    reference = _check_reference(mean_density, "mean_density") if quantity == "overdensity" else None
    fractions = []
    for name, value in (("ionised_fraction", ionised_fraction), ("neutral_fraction", neutral_fraction)):
        if value is not None and np.ndim(value) > 0:
            value = np.asarray(value)
            if value.shape != array.shape:
                raise InputError(f"{name}: shape {value.shape}, expected the box's shape {array.shape}")
        fractions.append(value)
    fraction = fraction_from(*fractions, helium_electrons, where)
    converts = quantity == "density_contrast" or (
        fraction is not None and fraction.cells is not None and quantity in _GAS)
    if quantity == "density_contrast":
        data = np.empty(array.shape, dtype=np.float32)
        add_one(array, data, where)
    elif copy or converts:
        data = np.array(array, dtype=np.float32, order="C")
    else:
        data = np.ascontiguousarray(array, np.float32)
    constant, box_ionisation = apply_fraction(data, quantity, reference, fraction, plasma, where)
    stats = scan_density(data, where)
    scale = _comoving_scale(quantity, z, constant, plasma, reference)
    if check:
        warn_plausibility(f"in-memory box at z = {z:g}", z, scale * stats["mean"] * (1.0 + z) ** 3, plasma,
                          box_ionisation, h, stored=(quantity, stats["mean"]))
    info = {
        "stored_dtype": str(array.dtype),
        "box_size_given": length.text,
        "hubble_h": h,
        "ionised_fraction": None if fraction is None else fraction.label,
        "mean_density": reference,
        "box_ionisation": box_ionisation,
        "sources": {},
        **stats,
    }
    return cls(data, scale, z, size, quantity, _info=info)
