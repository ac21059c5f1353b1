"""The ionisation a box states: an ionised or a neutral fraction, a number or a field.

In: what the user or file gives (``ionised_fraction`` or ``neutral_fraction``, each
a number or a per-cell source: an HDF5 dataset or an array of the box's shape;
``helium_electrons`` with a neutral fraction), the quantity and its mean-density
reference. Out: the constant that enters the box's scale, the stored values
multiplied per cell where needed, and the box's own mean ionisation (electrons
per hydrogen nucleus, for the plausibility check). Meanings: see meanings.py.
"""

from dataclasses import dataclass

import numpy as np

from raytrace.boxes.meanings import (
    _GAS,
    _check_fraction_constant,
    _check_fraction_values,
    _plasma_or_default,
    electrons_per_ionised_hydrogen,
)
from raytrace.boxes.values import _slabs
from raytrace.core.errors import InputError


@dataclass(frozen=True)
class Fraction:
    """A stated ionisation: ``constant`` (x_HI or x_e as given) or per-cell ``cells``, of kind ``neutral``."""

    constant: float | None
    cells: object            # h5py.Dataset or ndarray of the box's shape, or None
    neutral: bool
    helium_electrons: int | None
    label: str               # shown by inspect: the value or the dataset, and its meaning
    option: str              # the flag (keyword) that states it, for messages

    def cell_values(self, values):
        """Per-cell factor before :meth:`factor`: x_e itself, or 1 - x_HI (a float array, in place)."""
        if self.neutral:
            np.subtract(1.0, values, out=values)
        return values

    def factor(self, plasma):
        """Electrons per hydrogen nucleus per unit of :meth:`cell_values`: 1, or n_e / n_HII for a neutral fraction."""
        if not self.neutral:
            return 1.0
        return electrons_per_ionised_hydrogen(self.helium_electrons,
                                              _plasma_or_default(plasma).ionisation.helium_fraction)


def fraction_from(ionised, neutral, helium_electrons, where, option_style="--"):
    """A :class:`Fraction` from the two alternatives, or None when neither is given.

    ``ionised`` and ``neutral`` are each None, a number, or a per-cell source
    (h5py dataset or array); ``where`` names the box for messages.
    """
    if ionised is not None and neutral is not None:
        raise InputError(f"{where}: both an ionised and a neutral fraction are given; give one of "
                         "--ionised-fraction (ionised_fraction) and --neutral-fraction (neutral_fraction)")
    if ionised is None and neutral is None:
        if helium_electrons is not None:
            raise InputError(f"--helium-electrons (helium_electrons): applies to a neutral fraction only; {where} "
                             "has none (give --neutral-fraction)")
        return None
    is_neutral = neutral is not None
    given = neutral if is_neutral else ionised
    option = "--neutral-fraction (neutral_fraction)" if is_neutral else "--ionised-fraction (ionised_fraction)"
    if is_neutral and helium_electrons is None:
        raise InputError(
            f"{where}: a neutral fraction needs --helium-electrons (helium_electrons=...): the electrons each "
            "helium atom gives where hydrogen is ionised, 0, 1 or 2"
        )
    if not is_neutral and helium_electrons is not None:
        raise InputError(f"--helium-electrons (helium_electrons): applies to a neutral fraction only; an ionised "
                         f"fraction already counts helium's electrons ({where})")
    meaning = "n_HI / n_H" if is_neutral else "n_e / n_H"
    helium = f", {helium_electrons} electrons per helium atom" if is_neutral else ""
    if getattr(given, "ndim", 0) == 0:
        value = _check_fraction_constant(given, option, neutral=is_neutral)
        return Fraction(value, None, is_neutral, helium_electrons, f"{value:g} ({meaning}{helium})", option)
    name = getattr(given, "name", None)
    source = f"dataset {name}" if name else "array"
    return Fraction(None, given, is_neutral, helium_electrons, f"{source} ({meaning} per cell{helium})", option)


def apply_fraction(values, quantity, reference, fraction, plasma, where, scale_known=False):
    """``(constant, box_ionisation)`` for the scale; per-cell gas fractions multiply ``values`` in place.

    ``constant``: the factor that enters :func:`meanings._comoving_scale`: the
    ionised fraction, or for per-cell fractions what is left after the cells
    (1, or n_e / n_HII for a neutral fraction). ``scale_known``: the caller has the
    box's scale already (a reopened box), so no MeanPlasma is needed for the factor. ``box_ionisation``: the box's mean electrons per
    hydrogen nucleus (mass-weighted for gas), None when the box does not state it.
    """
    needs = quantity in _GAS or (quantity == "overdensity" and reference == "box")
    if fraction is None:
        if needs:
            what = ("the mean of its ionisation, relative to which --mean-density box takes the overdensity"
                    if quantity == "overdensity" else "the ionised fraction (electrons per hydrogen nucleus)")
            raise InputError(
                f"{where}: quantity {quantity!r} needs {what}; give --ionised-fraction (ionised_fraction=...) or "
                "--neutral-fraction (neutral_fraction=...) as a number or a dataset path, or store an "
                "'ionised_fraction' / 'neutral_fraction' attribute (or their '_dataset' forms)"
            )
        return 1.0, None
    if not needs:
        hint = ("; with --mean-density history the overdensity is relative to the history's nbar_e, give "
                "--mean-density box to use the box's own ionisation") if quantity == "overdensity" else ""
        raise InputError(f"{fraction.option}: applies to gas quantities ({', '.join(_GAS)}) and to an overdensity "
                         f"with --mean-density box; {where} holds {quantity!r}{hint}")
    factor = 1.0 if scale_known else fraction.factor(plasma)
    if fraction.cells is None:
        x = factor * ((1.0 - fraction.constant) if fraction.neutral else fraction.constant)
        if not x > 0:
            raise InputError(f"{fraction.option}: a fully neutral box has no electrons ({where})")
        return x, x
    cells = fraction.cells
    if tuple(cells.shape) != values.shape:
        raise InputError(f"{where}, ionised or neutral fraction {fraction.label}: shape {tuple(cells.shape)}, "
                         f"expected the density's shape {values.shape}")
    if np.dtype(cells.dtype).kind not in "fiu":
        raise InputError(f"{where}, fraction {fraction.label}: values of type {cells.dtype}; expected numbers")
    density_sum = electron_sum = fraction_sum = 0.0
    for start, stop in _slabs(values.shape[0]):
        # float64 until after 1 - x_HI, which loses digits near x_HI = 1 in float32
        slab = np.array(cells[start:stop], dtype=np.float64)
        _check_fraction_values(slab, f"{where}, fraction {fraction.label}", neutral=fraction.neutral)
        slab = fraction.cell_values(slab).astype(np.float32)
        fraction_sum += float(np.sum(slab, dtype=np.float64))
        if quantity in _GAS:
            density_sum += float(np.sum(values[start:stop], dtype=np.float64))
            values[start:stop] *= slab
            electron_sum += float(np.sum(values[start:stop], dtype=np.float64))
    # the constant factor stays out of the cells, so that a box reopened with its
    # comoving_scale (Box.load_arguments) needs no MeanPlasma
    if quantity in _GAS:
        return factor, (factor * electron_sum / density_sum if density_sum > 0 else None)
    mean = factor * fraction_sum / values.size
    if not mean > 0:
        raise InputError(f"{where}, fraction {fraction.label}: the box is fully neutral; it has no electrons")
    return mean, mean


def add_one(source, values, where):
    """values = 1 + delta (float32) from a density contrast ``source`` (h5py dataset or array, same
    shape), slab by slab in float64: 1 + delta loses digits near delta = -1 when done in float32.
    delta below -1 is an InputError."""
    for start, stop in _slabs(values.shape[0]):
        slab = np.asarray(source[start:stop], dtype=np.float64) + 1.0
        low = float(slab.min()) if slab.size else 0.0
        # rounding of a stored delta = -1 can leave -1e-7; anything below that is not a density contrast
        if low < -1e-6:
            raise InputError(f"{where}: density contrast {low - 1:g} below -1; expected rho / rhobar - 1 >= -1")
        np.maximum(slab, 0.0, out=slab)
        values[start:stop] = slab
