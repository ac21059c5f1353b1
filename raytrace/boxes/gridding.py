"""Gas particles in an HDF5 file -> comoving electron density on a periodic N^3 grid.

In: an HDF5 file of gas particles and the names of its datasets, with every unit
stated by an option or by the file's header and code units (:mod:`raytrace.boxes.particleheader`;
nothing is guessed: what neither states is named, all of it in one InputError).
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

Reading the datasets and the units of the file is :mod:`raytrace.boxes.particlefile`'s.
"""

import math
import numbers
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from raytrace.boxes.particlefile import ParticleInputs, checked_number, open_particle_file, option_label
from raytrace.boxes.particleheader import particle_units
from raytrace.core.errors import InputError
from raytrace.core.provenance import atomic_output, file_checksum, provenance_json
from raytrace.kernels.deposit import deposit_cic, deposit_sph
from raytrace.physics.constants import MPC_CM, PROTON_MASS_G

#: Particles read and deposited at a time: bounds the memory besides the grid.
CHUNK_PARTICLES = 1 << 21

_METHODS = ("auto", "cic", "sph")


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


def _exactly_one(first, second, what):
    given = [name for name, value in (first, second) if value is not None]
    if len(given) != 1:
        names = " or ".join(option_label(name) for name, _ in (first, second))
        found = "both were" if given else "neither was"
        raise InputError(f"{what}: give exactly one of {names}; {found} given")


# -- gridding ------------------------------------------------------------------------
def grid_particles(
    path,
    n_cells,
    *,
    positions=None,
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
    n_cells, hydrogen_fraction = _grid_numbers(n_cells, hydrogen_fraction)
    use_sph, kernel_support = _deposit_method(method, smoothing_lengths, kernel_support)
    missing = _check_mass_and_electron_options(masses, densities, volumes, electron_abundance,
                                               hydrogen_ionised_fraction)
    # Everything missing in one message; what the options leave out, the file's header may say.
    units = particle_units(path, positions, redshift, hubble_h, box_size, position_unit, mass_unit, missing)
    redshift, hubble_h, box_cMpc, to_cMpc, to_g = (units.redshift, units.hubble_h, units.box_cMpc, units.to_cMpc,
                                                   units.to_g)
    electrons_per_hydrogen_factor = _helium_factor(hydrogen_ionised_fraction, helium_electrons, hydrogen_fraction)
    cell_cMpc = box_cMpc / n_cells

    path = Path(path)
    grid = np.zeros((n_cells, n_cells, n_cells), dtype=np.float64)
    with open_particle_file(path) as handle:
        particles = ParticleInputs(handle, path, positions, masses, densities, volumes, electron_abundance,
                                   hydrogen_ionised_fraction, smoothing_lengths if use_sph else None)
        electrons_read, fallbacks = _deposit(particles, grid, to_cMpc / cell_cMpc, to_g, electrons_per_hydrogen_factor,
                                             hydrogen_fraction, periodic, box_cMpc, kernel_support)
        datasets = particles.datasets()
    cell_volume_cm3 = (cell_cMpc * MPC_CM) ** 3
    grid /= cell_volume_cm3
    grid.flags.writeable = False
    electrons_gridded = float(grid.sum()) * cell_volume_cm3
    method_used = "sph" if use_sph else "cic"
    provenance = {
        "created_by": "raytrace.boxes.gridding.grid_particles",
        "source": str(path.resolve()),
        "source_checksum": file_checksum(path),
        "datasets": datasets,
        "electron_option": "electron_abundance" if electron_abundance is not None else "hydrogen_ionised_fraction",
        "helium_electrons": helium_electrons,
        "units": {"position_unit": position_unit, "box_size": str(box_size), "mass_unit": mass_unit,
                  "from_the_file": units.sources},
        "hubble_h": hubble_h,
        "hydrogen_fraction": hydrogen_fraction,
        "method": method_used,
        "kernel": _kernel_description(use_sph, kernel_support),
        "kernel_fallbacks": fallbacks,
        "n_cells": n_cells,
        "periodic": bool(periodic),
        "n_particles": particles.count,
        "electrons_read": electrons_read,
        "electrons_gridded": electrons_gridded,
    }
    return GriddedParticles(
        density=grid, box_size_cMpc=box_cMpc, redshift=redshift, hubble_h=hubble_h, method=method_used,
        n_particles=particles.count, electrons_read=electrons_read, electrons_gridded=electrons_gridded,
        kernel_fallbacks=fallbacks, provenance=provenance,
    )


def _grid_numbers(n_cells, hydrogen_fraction):
    """The grid's size and X_H, checked (the redshift and h: particleheader.py)."""
    # Every box loader needs 2 cells a side: a grid of one would be written and then refused.
    if isinstance(n_cells, bool) or not isinstance(n_cells, numbers.Integral) or n_cells < 2:
        raise InputError(f"{option_label('n_cells')}: expected a whole number of cells >= 2, got {n_cells!r}")
    hydrogen_fraction = checked_number(hydrogen_fraction, "hydrogen_fraction", "X_H in (0, 1]", lambda x: 0 < x <= 1)
    return int(n_cells), hydrogen_fraction


def _deposit_method(method, smoothing_lengths, kernel_support):
    """Whether the deposit is SPH (else CIC), and the kernel support it then needs, checked."""
    if method not in _METHODS:
        raise InputError(f"{option_label('method')}: expected one of {', '.join(_METHODS)}, got {method!r}")
    if method == "sph" and smoothing_lengths is None:
        raise InputError(f"{option_label('method')}: 'sph' needs {option_label('smoothing_lengths')}")
    use_sph = method == "sph" or (method == "auto" and smoothing_lengths is not None)
    if use_sph:
        kernel_support = checked_number(
            kernel_support, "kernel_support",
            "with smoothing lengths, where the kernel ends in units of the stored length: 2 for Monaghan's h "
            "(support 2h), 1 if the file stores the support radius", lambda k: k > 0,
        )
    return use_sph, kernel_support


def _check_mass_and_electron_options(masses, densities, volumes, electron_abundance, hydrogen_ionised_fraction):
    """One way to the gas mass and one to the electrons per hydrogen, as the module docstring lists: two
    ways is an InputError; none, a line of what is missing (returned, to join the rest in one message)."""
    missing = []
    if masses is not None and (densities is not None or volumes is not None):
        raise InputError(
            f"mass: give {option_label('masses')}, or {option_label('densities')} with {option_label('volumes')}, "
            "not both"
        )
    if masses is None and (densities is None or volumes is None):
        missing.append(f"the gas mass: give {option_label('masses')}, or both {option_label('densities')} and "
                       f"{option_label('volumes')} (mass = density * volume)")
    if electron_abundance is None and hydrogen_ionised_fraction is None:
        missing.append(f"the electrons: give {option_label('electron_abundance')} or "
                       f"{option_label('hydrogen_ionised_fraction')}")
    else:
        _exactly_one(("electron_abundance", electron_abundance),
                     ("hydrogen_ionised_fraction", hydrogen_ionised_fraction), "electrons")
    return missing


def _helium_factor(hydrogen_ionised_fraction, helium_electrons, hydrogen_fraction):
    """n_e / n_HII: 1 + helium_electrons n_He / n_H with a hydrogen ionised fraction, 1 with an electron abundance."""
    if hydrogen_ionised_fraction is None:
        return 1.0
    if helium_electrons not in (0, 1, 2) or isinstance(helium_electrons, bool):
        raise InputError(
            f"{option_label('helium_electrons')}: with a hydrogen ionised fraction, say how many electrons each helium "
            f"atom gives where hydrogen is ionised: 0, 1 or 2; got {helium_electrons!r}"
        )
    return 1.0 + helium_electrons * (1.0 - hydrogen_fraction) / (4.0 * hydrogen_fraction)


def _kernel_description(use_sph, kernel_support):
    """The deposit kernel, in words, for the provenance."""
    if not use_sph:
        return "cloud in cell (Hockney & Eastwood 1988)"
    return (f"Monaghan 1992 M4 cubic spline, support = {kernel_support:g} x stored smoothing length, "
            "renormalised per particle; CIC under one cell")


def _deposit(particles, grid, to_cells, to_g, electrons_per_hydrogen_factor, hydrogen_fraction, periodic, box_cMpc,
             kernel_support):
    """Add the particles' electrons to ``grid`` chunk by chunk; returns (electrons read, SPH kernel fallbacks).

    Particles that carry no electrons at all are an error: nothing to grid."""
    n_cells = grid.shape[0]
    electrons_read, fallbacks = 0.0, 0
    for start in range(0, particles.count, CHUNK_PARTICLES):
        stop = min(start + CHUNK_PARTICLES, particles.count)
        cells = _cell_positions(particles.positions, start, stop, to_cells, n_cells, periodic, box_cMpc)
        mass_g = np.prod([source.read(start, stop, low=0.0) for source in particles.masses], axis=0) * to_g
        per_hydrogen = particles.abundance.read(start, stop, low=0.0, high=particles.abundance_high)
        electrons = mass_g * (hydrogen_fraction / PROTON_MASS_G) * (per_hydrogen * electrons_per_hydrogen_factor)
        electrons_read += float(electrons.sum())
        if particles.smoothing is None:
            deposit_cic(cells, electrons, bool(periodic), grid)
            continue
        # Monaghan's h in cells: the stored length times kernel_support is the support 2h.
        smoothing = particles.smoothing
        h_cells = smoothing.read(start, stop, low=0.0, open_low=True) * (to_cells * kernel_support / 2.0)
        too_wide = 2.0 * h_cells > n_cells
        if too_wide.any():
            raise InputError(
                f"{smoothing.path}: dataset {smoothing.spec!r} ({option_label('smoothing_lengths')}): "
                f"{int(too_wide.sum())} particles have a kernel wider than the box ({box_cMpc:g} cMpc); "
                f"check {option_label('position_unit')} and {option_label('kernel_support')}"
            )
        fallbacks += int(deposit_sph(cells, electrons, h_cells, bool(periodic), grid))
    if not electrons_read > 0:
        raise InputError(f"{particles.path}: the particles carry no electrons (all masses or abundances are zero)")
    return electrons_read, fallbacks


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
                f"{where.path}: dataset {where.spec!r} ({option_label('positions')}): {rows.size} particles lie "
                f"outside the box [0, {box_cMpc:g} cMpc) (first: particle {start + rows[0]}), and the box is "
                f"not periodic ({option_label('periodic')}); check {option_label('box_size')} and "
                f"{option_label('position_unit')}"
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
