"""Gas particles in an HDF5 file -> comoving electron density on a periodic N^3 grid.

In: an HDF5 file of gas particles and the names of its datasets, with every unit
stated (nothing is guessed; a missing unit is an InputError naming the option).
Out: `grid_particles` returns a `GriddedParticles` holding the comoving electron
number density n_e in cm^-3 per cell and the electron totals before and after
deposition; `write_gridded_box` writes it as a box file that
`raytrace.load_box` reads with no extra options.

What the file and the options must supply
-----------------------------------------
- ``positions``: a dataset of shape (N, 3), in ``position_unit``.
- ``box_size``: the side of the periodic box, text with a unit, e.g. "25 cMpc/h".
- ``redshift`` of the snapshot.
- The gas mass of each particle, in ``mass_unit``, either
  ``masses`` (a dataset of N values, or one number that every particle has), or
  ``densities`` and ``volumes`` (two datasets; mass = density * volume, with the
  density in mass_unit per position_unit^3 and the volume in position_unit^3,
  as simulation codes write them).
- The electrons per hydrogen atom, either
  ``electron_abundance`` = n_e / n_H (a dataset or one number), or
  ``hydrogen_ionised_fraction`` = n_HII / n_H (a dataset or one number, in [0, 1]) with
  ``helium_electrons`` (0, 1 or 2): the electrons each helium atom gives where
  hydrogen is ionised, so that n_e / n_H = hydrogen_ionised_fraction * (1 + helium_electrons
  * n_He / n_H), n_He / n_H = (1 - X_H) / (4 X_H) (metals neglected and
  m_He = 4 m_H: common practice, no source).
- Optionally ``smoothing_lengths`` (a dataset of N values in position_unit): then
  the deposit is the SPH cubic spline (raytrace.kernels.deposit), and
  ``kernel_support`` says where the kernel ends in units of the stored length:
  2 if the file stores Monaghan's (1992) h (the kernel vanishes at 2h), 1 if it
  stores the support radius itself (as Gadget-2 does). Without smoothing
  lengths, or with method="cic", the deposit is cloud in cell.

Electrons per particle = mass * X_H / m_p * (n_e / n_H), X_H = ``hydrogen_fraction``
(default 0.76, the primordial value simulation codes commonly assume: common
practice, no source).

Units: lengths are written [c|p](pc|kpc|Mpc|Gpc)[/h]: the leading "c" is comoving,
"p" proper (physical, converted with the snapshot's 1 + z); a bare "Mpc" is
refused, because conventions differ on what it means. "/h" divides by
``hubble_h``, which must then be given. Masses are an astropy mass unit with an
optional factor and "/h": "1e10 Msun/h", "Msun", "g".

Positions outside [0, L) are wrapped when the box is periodic; with
periodic=False they are an error, and the deposit keeps every electron inside
the grid (see raytrace.kernels.deposit).
"""

import math
import numbers
import re
from dataclasses import dataclass
from pathlib import Path

import astropy.units as u
import numpy as np

from .constants import MPC_CM, PROTON_MASS_G
from .errors import InputError
from .kernels.deposit import deposit_cic, deposit_sph
from .provenance import atomic_output, file_checksum, provenance_json
from .units import parse_quantity

#: Particles read and deposited at a time: bounds the memory besides the grid.
CHUNK_PARTICLES = 1 << 21

_LENGTH_UNIT = re.compile(r"^(?P<frame>[cp])(?P<base>[kMG]?pc)(?P<per_h>/h)?$")
_LENGTH_FORMS = "[c|p](pc|kpc|Mpc|Gpc)[/h], e.g. 'ckpc/h', 'cMpc', 'pkpc' ('c' comoving, 'p' proper)"
_PER_H = re.compile(r"\s*/\s*h$")
_VALUE_AND_UNIT = re.compile(r"^\s*(?P<value>[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*(?P<unit>\S+)\s*$")
_METHODS = ("auto", "cic", "sph")
# Command-line flags whose names are not the keyword's with "-" for "_".
_FLAGS = {"n_cells": "--cells", "periodic": "--not-periodic", "electron_abundance": "--ionised-fraction"}


def _option(name):
    """An option as both the keyword and the command-line flag, for messages."""
    return f"{name} ({_FLAGS.get(name, '--' + name.replace('_', '-'))})"


@dataclass(frozen=True)
class GriddedParticles:
    """Comoving electron density gridded from particles, and what went into it.

    ``density``: read-only float64 (n, n, n), n_e comoving in cm^-3;
    ``electrons_read``: electrons carried by the particles; ``electrons_gridded``:
    sum over cells of n_e times the comoving cell volume; ``kernel_fallbacks``:
    SPH particles deposited by CIC because their kernel was under a cell.
    """

    density: np.ndarray
    box_size_cMpc: float
    redshift: float
    hubble_h: float | None
    method: str
    n_particles: int
    electrons_read: float
    electrons_gridded: float
    kernel_fallbacks: int
    provenance: dict

    @property
    def relative_difference(self):
        """(electrons_gridded - electrons_read) / electrons_read."""
        return (self.electrons_gridded - self.electrons_read) / self.electrons_read

    def write(self, out_path, overwrite=False, compression=None):
        """Write as a box file; see `write_gridded_box`."""
        return write_gridded_box(
            out_path, self.density, self.box_size_cMpc, self.redshift, self.hubble_h,
            self.provenance, overwrite=overwrite, compression=compression,
        )


# -- units ------------------------------------------------------------------------
def _need_h(hubble_h, what):
    if hubble_h is None:
        raise InputError(f"{what} is per h: give {_option('hubble_h')}, the H0 / (100 km/s/Mpc) of the simulation")
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


def _box_size_cMpc(box_size, redshift, hubble_h):
    what = _option("box_size")
    if box_size is None:
        raise InputError(f"{what}: missing; give the box side with a unit, e.g. '25 cMpc/h'")
    match = _VALUE_AND_UNIT.match(str(box_size))
    value = float(match["value"]) if match else math.nan
    if not (math.isfinite(value) and value > 0):
        raise InputError(f"{what}: expected a positive number and a unit, e.g. '25 cMpc/h', got {box_size!r}")
    return value * length_to_cMpc(match["unit"], what, redshift, hubble_h)


def mass_to_g(unit, hubble_h):
    """Factor turning a mass in ``unit`` ("1e10 Msun/h", "Msun", "g") into grams."""
    what = _option("mass_unit")
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


# -- reading ------------------------------------------------------------------------
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
            raise InputError(f"{_option(option)}: expected {kind}, got {spec!r}")
        item = handle.get(spec)
        if not isinstance(item, h5py.Dataset):
            raise InputError(
                f"{path}: no dataset {spec!r} (named by {_option(option)}); datasets present: "
                f"{_dataset_listing(handle)}"
            )
        # n_particles None: any number of rows (the positions set it for the others).
        expected = (n_particles,) if columns is None else (n_particles, columns)
        if len(item.shape) != len(expected) or any(e not in (None, s) for e, s in zip(expected, item.shape)):
            wanted = tuple("N" if e is None else e for e in expected)
            raise InputError(
                f"{path}: dataset {spec!r} ({_option(option)}) has shape {item.shape}; expected "
                f"({', '.join(map(str, wanted))}{',' if len(wanted) == 1 else ''})"
            )
        if not (np.issubdtype(item.dtype, np.floating) or np.issubdtype(item.dtype, np.integer)):
            raise InputError(f"{path}: dataset {spec!r} ({_option(option)}) holds {item.dtype}, not numbers")
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
                f"{self.path}: {where} ({_option(self.option)}): {int(bad.sum())} values are not finite and in "
                f"{bracket}{low:g}, {high:g}] (first: {float(values[bad].flat[0])!r})"
            )
        return values


def _open(path):
    import h5py

    path = Path(path)
    if not path.is_file():
        raise InputError(f"{path}: particle file not found")
    try:
        return h5py.File(path, "r")
    except OSError as error:
        raise InputError(f"{path}: not a readable HDF5 file ({error})") from None


def _number(value, option, expected, accept):
    """``value`` as a finite float that ``accept`` approves, or InputError naming ``option``."""
    try:
        number = float(value)
    except (TypeError, ValueError):
        number = math.nan
    if not (math.isfinite(number) and accept(number)):
        raise InputError(f"{_option(option)}: expected {expected}, got {value!r}")
    return number


def _exactly_one(first, second, what):
    given = [name for name, value in (first, second) if value is not None]
    if len(given) != 1:
        names = " or ".join(_option(name) for name, _ in (first, second))
        found = "both were" if given else "neither was"
        raise InputError(f"{what}: give exactly one of {names}; {found} given")


# -- gridding ------------------------------------------------------------------------
def grid_particles(
    path,
    n_cells,
    *,
    positions,
    position_unit=None,
    box_size=None,
    redshift=None,
    masses=None,
    densities=None,
    volumes=None,
    mass_unit=None,
    smoothing_lengths=None,
    kernel_support=None,
    electron_abundance=None,
    hydrogen_ionised_fraction=None,
    helium_electrons=None,
    hubble_h=None,
    hydrogen_fraction=0.76,
    periodic=True,
    method="auto",
):
    """Deposit the gas particles of ``path`` onto an ``n_cells``^3 grid of comoving n_e (cm^-3).

    Dataset options name datasets of the file (e.g. "PartType0/Coordinates");
    ``masses``, ``electron_abundance`` and ``hydrogen_ionised_fraction`` may instead be one
    number for every particle. See the module docstring for what each option
    means and which are needed. Returns a `GriddedParticles`.
    """
    if isinstance(n_cells, bool) or not isinstance(n_cells, numbers.Integral) or n_cells < 1:
        raise InputError(f"{_option('n_cells')}: expected a whole number of cells >= 1, got {n_cells!r}")
    n_cells = int(n_cells)
    redshift = _number(redshift, "redshift", "the snapshot redshift, a number >= 0", lambda z: z >= 0)
    if hubble_h is not None:
        hubble_h = _number(hubble_h, "hubble_h", "H0 / (100 km/s/Mpc), a positive number", lambda h: h > 0)
    hydrogen_fraction = _number(hydrogen_fraction, "hydrogen_fraction", "X_H in (0, 1]", lambda x: 0 < x <= 1)
    if method not in _METHODS:
        raise InputError(f"{_option('method')}: expected one of {', '.join(_METHODS)}, got {method!r}")
    if method == "sph" and smoothing_lengths is None:
        raise InputError(f"{_option('method')}: 'sph' needs {_option('smoothing_lengths')}")
    use_sph = method == "sph" or (method == "auto" and smoothing_lengths is not None)
    if use_sph:
        kernel_support = _number(
            kernel_support, "kernel_support",
            "with smoothing lengths, where the kernel ends in units of the stored length: 2 for Monaghan's h "
            "(support 2h), 1 if the file stores the support radius", lambda k: k > 0,
        )
    if masses is not None and (densities is not None or volumes is not None):
        raise InputError(
            f"mass: give {_option('masses')}, or {_option('densities')} with {_option('volumes')}, not both"
        )
    if masses is None and (densities is None or volumes is None):
        raise InputError(
            f"mass: give {_option('masses')}, or both {_option('densities')} and {_option('volumes')} "
            "(mass = density * volume)"
        )
    _exactly_one(("electron_abundance", electron_abundance),
                 ("hydrogen_ionised_fraction", hydrogen_ionised_fraction), "electrons")
    electrons_per_hydrogen_factor = 1.0
    if hydrogen_ionised_fraction is not None:
        if helium_electrons not in (0, 1, 2) or isinstance(helium_electrons, bool):
            raise InputError(
                f"{_option('helium_electrons')}: with a hydrogen ionised fraction, say how many electrons each helium "
                f"atom gives where hydrogen is ionised: 0, 1 or 2; got {helium_electrons!r}"
            )
        electrons_per_hydrogen_factor += helium_electrons * (1.0 - hydrogen_fraction) / (4.0 * hydrogen_fraction)

    to_cMpc = length_to_cMpc(position_unit, _option("position_unit"), redshift, hubble_h)
    box_cMpc = _box_size_cMpc(box_size, redshift, hubble_h)
    to_g = mass_to_g(mass_unit, hubble_h)
    cell_cMpc = box_cMpc / n_cells
    to_cells = to_cMpc / cell_cMpc

    path = Path(path)
    grid = np.zeros((n_cells, n_cells, n_cells), dtype=np.float64)
    electrons_read = 0.0
    fallbacks = 0
    with _open(path) as handle:
        where = _Source(handle, path, "positions", positions, None, columns=3, allow_constant=False)
        n_particles = where.dataset.shape[0]
        if n_particles == 0:
            raise InputError(f"{path}: dataset {positions!r} ({_option('positions')}) holds no particles")
        if masses is not None:
            mass_sources = [_Source(handle, path, "masses", masses, n_particles)]
        else:
            mass_sources = [
                _Source(handle, path, "densities", densities, n_particles),
                _Source(handle, path, "volumes", volumes, n_particles),
            ]
        if electron_abundance is not None:
            abundance = _Source(handle, path, "electron_abundance", electron_abundance, n_particles)
            abundance_high = math.inf
        else:
            abundance = _Source(handle, path, "hydrogen_ionised_fraction", hydrogen_ionised_fraction, n_particles)
            abundance_high = 1.0
        smoothing = _Source(handle, path, "smoothing_lengths", smoothing_lengths, n_particles) if use_sph else None

        for start in range(0, n_particles, CHUNK_PARTICLES):
            stop = min(start + CHUNK_PARTICLES, n_particles)
            cells = _cell_positions(where, start, stop, to_cells, n_cells, periodic, box_cMpc)
            mass_g = np.prod([source.read(start, stop, low=0.0) for source in mass_sources], axis=0) * to_g
            per_hydrogen = abundance.read(start, stop, low=0.0, high=abundance_high) * electrons_per_hydrogen_factor
            electrons = mass_g * (hydrogen_fraction / PROTON_MASS_G) * per_hydrogen
            electrons_read += float(electrons.sum())
            if use_sph:
                # Monaghan's h in cells: the stored length times kernel_support is the support 2h.
                h_cells = smoothing.read(start, stop, low=0.0, open_low=True) * (to_cells * kernel_support / 2.0)
                too_wide = 2.0 * h_cells > n_cells
                if too_wide.any():
                    raise InputError(
                        f"{path}: dataset {smoothing_lengths!r} ({_option('smoothing_lengths')}): "
                        f"{int(too_wide.sum())} particles have a kernel wider than the box ({box_cMpc:g} cMpc); "
                        f"check {_option('position_unit')} and {_option('kernel_support')}"
                    )
                fallbacks += int(deposit_sph(cells, electrons, h_cells, bool(periodic), grid))
            else:
                deposit_cic(cells, electrons, bool(periodic), grid)
        datasets = {"positions": where.describe(), "electrons_per_hydrogen": abundance.describe()}
        datasets.update({source.option: source.describe() for source in mass_sources})
        if use_sph:
            datasets["smoothing_lengths"] = smoothing.describe()

    if not electrons_read > 0:
        raise InputError(f"{path}: the particles carry no electrons (all masses or abundances are zero)")
    cell_volume_cm3 = (cell_cMpc * MPC_CM) ** 3
    grid /= cell_volume_cm3
    grid.flags.writeable = False
    electrons_gridded = float(grid.sum()) * cell_volume_cm3
    method_used = "sph" if use_sph else "cic"
    provenance = {
        "created_by": "raytrace.gridding.grid_particles",
        "source": str(path.resolve()),
        "source_checksum": file_checksum(path),
        "datasets": datasets,
        "electron_option": "electron_abundance" if electron_abundance is not None else "hydrogen_ionised_fraction",
        "helium_electrons": helium_electrons,
        "units": {"position_unit": position_unit, "box_size": str(box_size), "mass_unit": mass_unit},
        "hubble_h": hubble_h,
        "hydrogen_fraction": hydrogen_fraction,
        "method": method_used,
        "kernel": (
            f"Monaghan 1992 M4 cubic spline, support = {kernel_support:g} x stored smoothing length, "
            "renormalised per particle; CIC under one cell"
        ) if use_sph else "cloud in cell (Hockney & Eastwood 1988)",
        "kernel_fallbacks": fallbacks,
        "n_cells": n_cells,
        "periodic": bool(periodic),
        "n_particles": n_particles,
        "electrons_read": electrons_read,
        "electrons_gridded": electrons_gridded,
    }
    return GriddedParticles(
        density=grid, box_size_cMpc=box_cMpc, redshift=redshift, hubble_h=hubble_h, method=method_used,
        n_particles=n_particles, electrons_read=electrons_read, electrons_gridded=electrons_gridded,
        kernel_fallbacks=fallbacks, provenance=provenance,
    )


def _cell_positions(where, start, stop, to_cells, n_cells, periodic, box_cMpc):
    """Positions of particles [start, stop) in cell units, wrapped into [0, n) or checked to lie there."""
    cells = where.read(start, stop) * to_cells
    if periodic:
        # np.mod may round a tiny negative coordinate to n itself: harmless, the periodic
        # kernels wrap indices, and the faces at 0 and n are the same plane.
        cells = np.mod(cells, n_cells)
    else:
        outside = (cells < 0) | (cells >= n_cells)
        if outside.any():
            rows = np.flatnonzero(outside.any(axis=1))
            raise InputError(
                f"{where.path}: dataset {where.spec!r} ({_option('positions')}): {rows.size} particles lie "
                f"outside the box [0, {box_cMpc:g} cMpc) (first: particle {start + rows[0]}), and the box is "
                f"not periodic ({_option('periodic')}); check {_option('box_size')} and {_option('position_unit')}"
            )
    return np.ascontiguousarray(cells)


# -- writing ------------------------------------------------------------------------
def write_gridded_box(
    out_path, density, box_size_cMpc, redshift, hubble_h=None, provenance=None,
    overwrite=False, compression=None,
):
    """Write comoving n_e (cm^-3) as a box file, atomically; returns the path written.

    The dataset "electron_density" (float32) and the file root carry the
    attributes quantity = "n_e_comoving", box_size, box_size_unit = "cMpc",
    redshift, hubble_h (when known) and provenance (JSON, with package
    versions). ``provenance`` is a dict of what made the box. ``compression``
    is passed to h5py ("gzip" for a smaller file; None keeps the dataset
    contiguous so that it can be memory-mapped).
    """
    import h5py

    density = np.asarray(density)
    if density.ndim != 3 or len(set(density.shape)) != 1:
        raise InputError(f"density: expected a cubic 3-D grid, got shape {density.shape}")
    if not np.all(np.isfinite(density)) or np.any(density < 0):
        raise InputError("density: expected finite values >= 0 (n_e in cm^-3)")
    if not (math.isfinite(box_size_cMpc) and box_size_cMpc > 0):
        raise InputError(f"box_size_cMpc: expected a positive length in cMpc, got {box_size_cMpc!r}")
    if not (math.isfinite(redshift) and redshift >= 0):
        raise InputError(f"redshift: expected a number >= 0, got {redshift!r}")
    attributes = {
        "quantity": "n_e_comoving",
        "box_size": float(box_size_cMpc),
        "box_size_unit": "cMpc",
        "redshift": float(redshift),
        "provenance": provenance_json(**(provenance or {})),
    }
    if hubble_h is not None:
        attributes["hubble_h"] = float(hubble_h)
    out_path = Path(out_path)
    with atomic_output(out_path, overwrite=overwrite) as temporary:
        with h5py.File(temporary, "w") as handle:
            dataset = handle.create_dataset(
                "electron_density", data=density.astype(np.float32), compression=compression
            )
            for target in (dataset, handle):
                target.attrs.update(attributes)
    return out_path
