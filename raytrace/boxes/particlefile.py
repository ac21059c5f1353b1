"""The inputs of :func:`raytrace.boxes.gridding.grid_particles` from a gas-particle HDF5 file.

In: the file's path, the names of its datasets (or one number for every
particle) and the units written as text. Out: factors to comoving Mpc and
grams (:func:`length_to_cMpc`, :func:`box_size_cMpc`, :func:`mass_to_g`), and
:class:`ParticleInputs`, which reads the per-particle values chunk by chunk,
checked to be finite and in range. Every error names the file, the dataset and
the option (keyword and command-line flag, :func:`option_label`).
"""

import math
import numbers
import re
from pathlib import Path

import astropy.units as u
import numpy as np

from raytrace.core.errors import InputError
from raytrace.physics.units import parse_quantity

_LENGTH_UNIT = re.compile(r"^(?P<frame>[cp])(?P<base>[kMG]?pc)(?P<per_h>/h)?$")
_LENGTH_FORMS = "[c|p](pc|kpc|Mpc|Gpc)[/h], e.g. 'ckpc/h', 'cMpc', 'pkpc' ('c' comoving, 'p' proper)"
_PER_H = re.compile(r"\s*/\s*h$")
_VALUE_AND_UNIT = re.compile(r"^\s*(?P<value>[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*(?P<unit>\S+)\s*$")

# Command-line flags whose names are not the keyword's with "-" for "_".
_FLAGS = {"n_cells": "--cells", "periodic": "--not-periodic", "electron_abundance": "--ionised-fraction"}


def option_label(name):
    """An option as both the keyword and the command-line flag, for messages."""
    return f"{name} ({_FLAGS.get(name, '--' + name.replace('_', '-'))})"


def checked_number(value, option, expected, accept):
    """``value`` as a finite float that ``accept`` approves, or InputError naming ``option``."""
    try:
        number = float(value)
    except (TypeError, ValueError):
        number = math.nan
    if not (math.isfinite(number) and accept(number)):
        raise InputError(f"{option_label(option)}: expected {expected}, got {value!r}")
    return number


def _need_h(hubble_h, what):
    if hubble_h is None:
        raise InputError(f"{what} is per h: give {option_label('hubble_h')}, the H0 / (100 km/s/Mpc) of the simulation")
    return hubble_h


def length_to_cMpc(unit, what, redshift, hubble_h):
    """Factor turning a length in ``unit`` into comoving Mpc (no h)."""
    if unit is None:
        raise InputError(f"{what}: no unit given; write {_LENGTH_FORMS}")
    match = _LENGTH_UNIT.match(str(unit).strip())
    if match is None:
        raise InputError(f"{what}: unit {unit!r} not understood; write {_LENGTH_FORMS}")
    factor = u.Unit(match["base"]).to(u.Mpc)
    if match["per_h"]:
        factor /= _need_h(hubble_h, what)
    if match["frame"] == "p":
        factor *= 1.0 + redshift
    return factor


def box_size_cMpc(box_size, redshift, hubble_h):
    what = option_label("box_size")
    if box_size is None:
        raise InputError(f"{what}: missing; give the box side with a unit, e.g. '25 cMpc/h'")
    match = _VALUE_AND_UNIT.match(str(box_size))
    value = float(match["value"]) if match else math.nan
    if not (math.isfinite(value) and value > 0):
        raise InputError(f"{what}: expected a positive number and a unit, e.g. '25 cMpc/h', got {box_size!r}")
    return value * length_to_cMpc(match["unit"], what, redshift, hubble_h)


def mass_to_g(unit, hubble_h):
    """Factor turning a mass in ``unit`` ("1e10 Msun/h", "Msun", "g") into grams."""
    what = option_label("mass_unit")
    if unit is None:
        raise InputError(f"{what}: no unit given; write e.g. '1e10 Msun/h', 'Msun' or 'g'")
    text = str(unit).strip()
    per_h = _PER_H.search(text) is not None
    text = _PER_H.sub("", text)
    if not text[:1].isdigit():
        text = "1 " + text  # a bare unit: one of it
    try:
        factor = parse_quantity(text, what).to_value(u.g)
    except u.UnitConversionError:
        raise InputError(f"{what}: {unit!r} is not a mass; write e.g. '1e10 Msun/h', 'Msun' or 'g'") from None
    if not (math.isfinite(factor) and factor > 0):
        raise InputError(f"{what}: expected a positive mass unit, got {unit!r}")
    return factor / _need_h(hubble_h, what) if per_h else factor


def _dataset_listing(handle, limit=40):
    import h5py

    found = []

    def visit(name, item):
        if isinstance(item, h5py.Dataset):
            found.append(f"{name} {item.shape}")

    handle.visititems(visit)
    if not found:
        return "none"
    more = f" ... and {len(found) - limit} more" if len(found) > limit else ""
    return ", ".join(found[:limit]) + more


class _Source:
    """One per-particle input: a dataset of the file, or one number for all particles."""

    def __init__(self, handle, path, option, spec, n_particles, columns=None, allow_constant=True):
        import h5py

        self.option, self.path, self.spec = option, path, spec
        self.constant = None
        if allow_constant and isinstance(spec, numbers.Real) and not isinstance(spec, bool):
            self.constant, self.dataset = float(spec), None
            return
        if not isinstance(spec, str):
            kind = "a dataset name or a number" if allow_constant else "a dataset name"
            raise InputError(f"{option_label(option)}: expected {kind}, got {spec!r}")
        item = handle.get(spec)
        if not isinstance(item, h5py.Dataset):
            raise InputError(
                f"{path}: no dataset {spec!r} (named by {option_label(option)}); datasets present: "
                f"{_dataset_listing(handle)}"
            )
        # n_particles None: any number of rows (the positions set it for the others).
        expected = (n_particles,) if columns is None else (n_particles, columns)
        if len(item.shape) != len(expected) or any(e not in (None, s) for e, s in zip(expected, item.shape)):
            wanted = tuple("N" if e is None else e for e in expected)
            raise InputError(
                f"{path}: dataset {spec!r} ({option_label(option)}) has shape {item.shape}; expected "
                f"({', '.join(map(str, wanted))}{',' if len(wanted) == 1 else ''})"
            )
        if not (np.issubdtype(item.dtype, np.floating) or np.issubdtype(item.dtype, np.integer)):
            raise InputError(f"{path}: dataset {spec!r} ({option_label(option)}) holds {item.dtype}, not numbers")
        self.dataset = item

    def describe(self):
        return self.spec if self.dataset is not None else f"constant {self.constant!r}"

    def read(self, start, stop, low=-math.inf, high=math.inf, open_low=False):
        """float64 values of particles [start, stop), checked to lie in [low, high] ((low, high] if open_low)."""
        if self.dataset is None:
            values = np.full(stop - start, self.constant)
        else:
            values = np.asarray(self.dataset[start:stop], dtype=np.float64)
        below = values <= low if open_low else values < low
        bad = ~np.isfinite(values) | below | (values > high)
        if bad.any():
            where = f"dataset {self.spec!r}" if self.dataset is not None else "the value"
            bracket = "(" if open_low else "["
            raise InputError(
                f"{self.path}: {where} ({option_label(self.option)}): {int(bad.sum())} values are not finite and in "
                f"{bracket}{low:g}, {high:g}] (first: {float(values[bad].flat[0])!r})"
            )
        return values


def open_particle_file(path):
    import h5py

    path = Path(path)
    if not path.is_file():
        raise InputError(f"{path}: particle file not found")
    try:
        return h5py.File(path, "r")
    except OSError as error:
        raise InputError(f"{path}: not a readable HDF5 file ({error})") from None


class ParticleInputs:
    """The per-particle inputs of an open file: positions, the mass (or density and volume), the
    electrons per hydrogen and, for SPH, the smoothing lengths (``smoothing_lengths`` None: CIC)."""

    def __init__(self, handle, path, positions, masses, densities, volumes, electron_abundance,
                 hydrogen_ionised_fraction, smoothing_lengths):
        self.path = path
        self.positions = _Source(handle, path, "positions", positions, None, columns=3, allow_constant=False)
        self.count = self.positions.dataset.shape[0]
        if self.count == 0:
            raise InputError(f"{path}: dataset {positions!r} ({option_label('positions')}) holds no particles")
        if masses is not None:
            self.masses = [_Source(handle, path, "masses", masses, self.count)]
        else:
            self.masses = [_Source(handle, path, "densities", densities, self.count),
                           _Source(handle, path, "volumes", volumes, self.count)]
        if electron_abundance is not None:
            self.abundance = _Source(handle, path, "electron_abundance", electron_abundance, self.count)
            self.abundance_high = math.inf
        else:
            self.abundance = _Source(handle, path, "hydrogen_ionised_fraction", hydrogen_ionised_fraction, self.count)
            self.abundance_high = 1.0
        self.smoothing = None if smoothing_lengths is None else _Source(
            handle, path, "smoothing_lengths", smoothing_lengths, self.count)

    def datasets(self):
        """Where each input came from, for the provenance."""
        datasets = {"positions": self.positions.describe(), "electrons_per_hydrogen": self.abundance.describe()}
        datasets.update({source.option: source.describe() for source in self.masses})
        if self.smoothing is not None:
            datasets["smoothing_lengths"] = self.smoothing.describe()
        return datasets
