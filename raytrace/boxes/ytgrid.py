"""Any snapshot yt loads -> a box file of comoving n_e: :func:`grid_yt` (the ``raytrace[yt]`` extra).

In: a yt dataset, or a path that ``yt.load`` opens (AMR or uniform grids, particle
or SPH codes), and N. Out: a :class:`raytrace.boxes.gridding.GriddedParticles` of
comoving n_e in cm^-3 on N^3 cells, with the electron totals before and after,
that ``.write()`` turns into a box file the loader reads with no flags.

The electron density, in order of preference:
- ``electron_field``: a yt field of electron number density (e.g. "El_number_density");
- ``ionised_fraction``: electrons per hydrogen nucleus n_e / n_H (a number, or a yt
  field such as Gadget's "ElectronAbundance"), times the hydrogen of the gas density:
  n_e = x X_H rho / m_p, X_H = ``hydrogen_fraction``;
- else the dataset's own ("gas", "El_number_density"), or for particles the gas type's
  "ElectronAbundance" (n_e / n_H by that field's definition); else an InputError.

Deposition is yt's own: on grid datasets a covering grid at a refinement level
whose cells tile the N^3 cells, the finest affordable one (_grid_levels; coarser
cells are copied into the finer ones, so the volume integral is kept exactly),
summed in blocks of whole cells; on particle
datasets yt's cloud-in-cell deposit of each particle's electrons onto an
arbitrary grid spanning the periodic domain. The redshift, comoving box size and h
come from the dataset (``current_redshift``, ``domain_width`` in proper cm times
1 + z, ``hubble_constant``) when it is a cosmological simulation; otherwise the
redshift must be given. yt's lengths and densities in "cm" are proper.
"""

import math
from pathlib import Path

import numpy as np

from raytrace.boxes.gridding import GriddedParticles
from raytrace.core.errors import InputError
from raytrace.physics.constants import MPC_CM, PROTON_MASS_G


def _yt():
    try:
        import yt
    except ImportError:
        raise InputError("--yt: needs the yt package; install the extra: pip install 'raytrace[yt]'") from None
    yt.set_log_level(40)
    return yt


def _dataset(snapshot):
    yt = _yt()
    if hasattr(snapshot, "domain_width") and hasattr(snapshot, "index"):
        return snapshot, getattr(snapshot, "basename", "yt dataset")
    path = Path(snapshot)
    if not path.exists():
        raise InputError(f"--yt {snapshot}: file not found")
    try:
        return yt.load(str(path)), str(path)
    except Exception as error:  # yt raises many types for a file it cannot read
        raise InputError(f"--yt {snapshot}: yt cannot load it ({type(error).__name__}: {error})") from None


def _field(ds, name, ftype, option):
    """A field tuple of the dataset from a name ("ElectronAbundance") or a "type,name" text."""
    field = tuple(name.split(",", 1)) if isinstance(name, str) and "," in name else (ftype, name)
    if field not in ds.derived_field_list:
        found = ", ".join(f"{t},{n}" for t, n in ds.derived_field_list if t == ftype)
        raise InputError(f"{option} {name!r}: the dataset has no field {field}; fields of type {ftype!r}: {found}")
    return field


def _metadata(ds, redshift, hubble_h):
    cosmological = bool(getattr(ds, "cosmological_simulation", 0))
    if redshift is None:
        if not cosmological:
            raise InputError("--redshift (redshift): the yt dataset is not a cosmological simulation, so its "
                             "redshift is unknown; give the snapshot redshift")
        redshift = float(ds.current_redshift)
    redshift = float(redshift)
    if not (math.isfinite(redshift) and redshift >= 0):
        raise InputError(f"--redshift (redshift): expected a redshift >= 0, got {redshift!r}")
    if hubble_h is None and cosmological and getattr(ds, "hubble_constant", 0):
        hubble_h = float(ds.hubble_constant)
    width = ds.domain_width.to("cm").value
    if not np.allclose(width, width[0], rtol=1e-9):
        raise InputError(f"--yt: the domain is not a cube ({ds.domain_width}); a box must be cubic")
    return redshift, hubble_h, float(width[0]) * (1.0 + redshift) / MPC_CM


# The largest covering grid read (cells); about 400 MB of float64 for its few fields.
_MAX_COVERING_CELLS = 1 << 24


def _grid_levels(ds, n_cells):
    """The refinement level whose covering grid tiles N^3 in whole blocks, and the block size: the
    finest such level up to the dataset's finest that stays under _MAX_COVERING_CELLS (then every
    leaf cell's own value is read), else the coarsest that tiles N^3 (then coarse cells stand for
    their children, whose volume average AMR codes keep there: common practice, no source)."""
    dims = np.asarray(ds.domain_dimensions)
    refine = int(getattr(ds, "refine_by", 2))
    tiling = []
    for level in range(0, 16):
        fine = dims * refine**level
        if np.all(fine % n_cells == 0) and np.all(fine >= n_cells) and len(set(fine)) == 1:
            tiling.append((level, int(fine[0] // n_cells)))
        if fine[0] > 16 * max(n_cells, dims[0] * refine ** int(ds.max_level)):
            break
    if not tiling:
        raise InputError(f"--cells {n_cells}: must divide the dataset's grid of {tuple(dims)} cells refined by "
                         f"{refine}^level (e.g. {dims[0]} or {dims[0] * refine})")
    affordable = [(level, block) for level, block in tiling
                  if level <= int(ds.max_level) and (n_cells * block) ** 3 <= _MAX_COVERING_CELLS]
    return affordable[-1] if affordable else tiling[0]


def _grid_electrons(ds, n_cells, electron_field, fraction, hydrogen_fraction):
    """(electrons per cell, electrons in the source, cells read) for grid datasets."""
    level, block = _grid_levels(ds, n_cells)
    fine = n_cells * block
    covering = ds.covering_grid(level, ds.domain_left_edge, [fine] * 3)
    volume = covering["index", "cell_volume"].to("cm**3").value
    if electron_field is not None:
        electrons = covering[electron_field].to("cm**-3").value * volume
    else:
        x = fraction if not isinstance(fraction, tuple) else covering[fraction].value
        electrons = covering["gas", "density"].to("g/cm**3").value * volume * x * hydrogen_fraction / PROTON_MASS_G
    source = ds.all_data()
    if electron_field is not None:
        total = float((source[electron_field].to("cm**-3") * source["index", "cell_volume"].to("cm**3")).sum())
    else:
        x = fraction if not isinstance(fraction, tuple) else source[fraction].value
        mass = (source["gas", "density"].to("g/cm**3") * source["index", "cell_volume"].to("cm**3")).value
        total = float(np.sum(mass * x) * hydrogen_fraction / PROTON_MASS_G)
    cells = electrons.reshape(n_cells, block, n_cells, block, n_cells, block).sum(axis=(1, 3, 5))
    return cells, total, int(source["index", "ones"].size), f"yt covering grid, level {level}, {block}^3 blocks"


def _particle_electrons(ds, n_cells, fraction, hydrogen_fraction, particle_type):
    """(electrons per cell, electrons carried, particles) for particle datasets, by yt's CIC deposit."""
    ptype = particle_type
    if ptype is None:
        sph = list(getattr(ds, "_sph_ptypes", ()) or ())
        raw = list(ds.particle_types_raw)
        if sph:
            ptype = sph[0]
        elif len(raw) == 1:
            ptype = raw[0]
        else:
            raise InputError(f"--yt-particle-type: the dataset has several particle types ({', '.join(raw)}); "
                             "name the gas one")
    if (ptype, "particle_mass") not in ds.derived_field_list:
        raise InputError(f"--yt-particle-type {ptype!r}: no ({ptype!r}, 'particle_mass') field in the dataset")
    if fraction is None:
        if (ptype, "ElectronAbundance") not in ds.derived_field_list:
            raise InputError("--ionised-fraction (ionised_fraction): the particles have no 'ElectronAbundance' "
                             "field; give electrons per hydrogen nucleus as a number or a particle field")
        fraction = (ptype, "ElectronAbundance")
    elif isinstance(fraction, tuple):
        fraction = (ptype, fraction[1])
    scale = hydrogen_fraction / PROTON_MASS_G

    def electrons(field, data):
        x = data[fraction].d if isinstance(fraction, tuple) else fraction
        return data[ptype, "particle_mass"].to("g") * x * scale

    name = (ptype, "raytrace_electrons")
    if name not in ds.derived_field_list:
        ds.add_field(name, function=electrons, sampling_type="particle", units="g", force_override=True)
    deposited = ds.add_deposited_particle_field(name, "cic")
    grid = ds.arbitrary_grid(ds.domain_left_edge, ds.domain_right_edge, [n_cells] * 3)
    cells = grid[deposited].to("g").value  # a sum per cell, in the field's unit (electrons times 1 g)
    data = ds.all_data()
    total = float(data[name].to("g").sum())
    return cells, total, int(data[ptype, "particle_mass"].size), f"yt cloud in cell of particle type {ptype!r}"


def grid_yt(snapshot, n_cells, *, electron_field=None, ionised_fraction=None, hydrogen_fraction=0.76,
            particle_type=None, redshift=None, hubble_h=None):
    """Deposit the gas electrons of a yt dataset (or a file yt loads) onto an ``n_cells``^3 grid.

    See the module docstring for where n_e and the metadata come from. Returns a
    GriddedParticles (``n_particles`` is the particles or source cells read).
    """
    if isinstance(n_cells, bool) or not isinstance(n_cells, (int, np.integer)) or n_cells < 2:
        raise InputError(f"--cells (n_cells): expected a whole number of cells >= 2, got {n_cells!r}")
    if electron_field is not None and ionised_fraction is not None:
        raise InputError("--yt-field and --ionised-fraction: give one (an electron density field, or electrons "
                         "per hydrogen nucleus times the gas density)")
    if not (isinstance(hydrogen_fraction, (int, float)) and 0 < hydrogen_fraction <= 1):
        raise InputError(f"--hydrogen-fraction (hydrogen_fraction): expected X_H in (0, 1], got {hydrogen_fraction!r}")
    ds, label = _dataset(snapshot)
    z, h, box_cMpc = _metadata(ds, redshift, hubble_h)
    from yt.geometry.grid_geometry_handler import GridIndex

    fraction = ionised_fraction
    if isinstance(fraction, str):
        fraction = ("gas", fraction) if "," not in fraction else tuple(fraction.split(",", 1))
    elif fraction is not None:
        fraction = float(fraction)
        if not (math.isfinite(fraction) and 0 < fraction <= 1.25):
            raise InputError(f"--ionised-fraction (ionised_fraction): expected electrons per hydrogen nucleus in "
                             f"(0, 1.25], got {ionised_fraction!r}")
    if isinstance(ds.index, GridIndex):
        field = None
        if electron_field is not None:
            field = _field(ds, electron_field, "gas", "--yt-field")
        elif fraction is None:
            if ("gas", "El_number_density") not in ds.derived_field_list:
                raise InputError("--ionised-fraction (ionised_fraction) or --yt-field: the dataset has no "
                                 "('gas', 'El_number_density'); say how many electrons the gas has")
            field = ("gas", "El_number_density")
        elif isinstance(fraction, tuple):
            fraction = _field(ds, fraction[1], fraction[0], "--ionised-fraction")
        cells, total, count, method = _grid_electrons(ds, n_cells, field, fraction, hydrogen_fraction)
    else:
        if electron_field is not None:
            raise InputError("--yt-field: applies to grid datasets; for particles give --ionised-fraction")
        cells, total, count, method = _particle_electrons(ds, n_cells, fraction, hydrogen_fraction, particle_type)
    if not total > 0:
        raise InputError(f"--yt {label}: the gas carries no electrons")
    cell_cm3 = (box_cMpc / n_cells * MPC_CM) ** 3
    density = cells / cell_cm3  # comoving n_e: electrons per comoving cell volume
    density.flags.writeable = False
    provenance = {
        "created_by": "raytrace.boxes.ytgrid.grid_yt", "source": label, "yt_dataset": str(type(ds).__name__),
        "method": method, "electron_field": None if electron_field is None else str(electron_field),
        "ionised_fraction": None if ionised_fraction is None else str(ionised_fraction),
        "hydrogen_fraction": hydrogen_fraction, "n_cells": n_cells, "electrons_read": total,
    }
    return GriddedParticles(
        density=density, box_size_cMpc=box_cMpc, redshift=z, hubble_h=h, method=method, n_particles=count,
        electrons_read=total, electrons_gridded=float(cells.sum()), kernel_fallbacks=0, provenance=provenance,
    )
