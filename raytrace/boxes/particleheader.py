"""What a particle file's header says, for ``grid``: the same metadata the box loader reads.

In: the particle file, the positions' dataset, and the options a user gave (redshift,
h, box size, position and mass units; each overrides the file), plus what the caller
already found missing. Out: :class:`ParticleUnits`, the redshift, h, box side in cMpc
and the factors from positions to cMpc and from masses to grams, with where each came
from; or one InputError listing everything that is missing, not one item per try.

The file's header is searched as :mod:`raytrace.boxes.metadata` does (``Header/Redshift``,
``Header/BoxSize``, ``Header/HubbleParam`` ...), and code units as
:mod:`raytrace.boxes.codeunits` reads them (Gadget's ``UnitLength_in_cm`` and
``UnitMass_in_g``, per h and comoving; SWIFT's ``Units`` group).
"""

from dataclasses import dataclass, field

from raytrace.boxes.codeunits import code_unit
from raytrace.boxes.metadata import Metadata
from raytrace.boxes.particlefile import (box_size_cMpc, checked_number, length_to_cMpc, mass_to_g, open_particle_file,
                                         option_label)
from raytrace.core.errors import InputError
from raytrace.physics.constants import MPC_CM


@dataclass(frozen=True)
class ParticleUnits:
    """The snapshot's numbers and unit factors; ``sources`` says which came from the file, and where."""

    redshift: float
    hubble_h: float | None
    box_cMpc: float
    to_cMpc: float
    to_g: float
    sources: dict = field(default_factory=dict)


def _metadata(handle, positions):
    import h5py

    node = handle.get(positions) if isinstance(positions, str) else None
    return Metadata(handle, node if isinstance(node, h5py.Dataset) else handle["/"])


def _from_file(metadata, key, given, sources, missing, what):
    """The option's value, else the file's (noting where), else None with ``what`` added to ``missing``."""
    if given is not None:
        return given
    value, source = metadata.find(key)
    if value is None:
        if what:
            missing.append(what)
        return None
    sources[key] = source
    return value


def particle_units(path, positions, redshift, hubble_h, box_size, position_unit, mass_unit, missing=()):
    """:class:`ParticleUnits` from the options, the file's header and its code units (module docstring)."""
    missing, sources = list(missing), {}
    _check_unit_texts(box_size, position_unit, mass_unit)
    with open_particle_file(path) as handle:
        metadata = _metadata(handle, positions)
        redshift = _from_file(metadata, "redshift", redshift, sources, missing,
                              f"the snapshot redshift: give {option_label('redshift')} (the file's header has none)")
        hubble_h = _from_file(metadata, "hubble_h", hubble_h, sources, [], None)
        length = code_unit(metadata, "length", path)
        mass = code_unit(metadata, "mass", path)
        size, size_unit, size_source, _ = metadata.find_box_size() if box_size is None else (None,) * 4
    if positions is None:
        missing.insert(0, f"the positions: give {option_label('positions')}, the dataset of shape (N, 3)")
    if position_unit is None and length is None:
        missing.append(f"the positions' unit: give {option_label('position_unit')} (the file states no code unit "
                       "such as UnitLength_in_cm)")
    if mass_unit is None and mass is None:
        missing.append(f"the masses' unit: give {option_label('mass_unit')} (the file states no code unit such as "
                       "UnitMass_in_g)")
    if box_size is None and (size is None or (size_unit is None and length is None)):
        where = f" ({size_source} = {size:g} has no unit)" if size is not None else ""
        missing.append(f"the box size: give {option_label('box_size')} with its unit{where}")
    per_h = any(code is not None and code.per_h for code in (length, mass)) or any(
        text is not None and "/h" in str(text).replace(" ", "") for text in (box_size, position_unit, mass_unit))
    if per_h and hubble_h is None:
        missing.append(f"h, as a unit is per h: give {option_label('hubble_h')} (the file's header has none)")
    if missing:
        listed = missing[0] if len(missing) == 1 else "; ".join(f"({i}) {m}" for i, m in enumerate(missing, 1))
        raise InputError(f"{path}: {len(missing)} piece{'s' if len(missing) > 1 else ''} of what grid needs "
                         f"missing: {listed}")
    return _units(path, redshift, hubble_h, box_size, position_unit, mass_unit, length, mass, size, size_unit,
                  size_source, sources)


def _check_unit_texts(box_size, position_unit, mass_unit):
    """Refuse a unit written wrong before anything is looked for (h = 1 here: only the form is checked)."""
    if position_unit is not None:
        length_to_cMpc(position_unit, option_label("position_unit"), 0.0, 1.0)
    if box_size is not None:
        box_size_cMpc(box_size, 0.0, 1.0)
    if mass_unit is not None:
        mass_to_g(mass_unit, 1.0)


def _units(path, redshift, hubble_h, box_size, position_unit, mass_unit, length, mass, size, size_unit, size_source,
           sources):
    """The factors, every needed value now present (particle_units checked)."""
    redshift = checked_number(redshift, "redshift", "the snapshot redshift, a number >= 0", lambda z: z >= 0)
    if hubble_h is not None:
        hubble_h = checked_number(hubble_h, "hubble_h", "H0 / (100 km/s/Mpc), a positive number", lambda h: h > 0)
    h_factor = (lambda code: hubble_h if code.per_h else 1.0)
    if position_unit is not None:
        to_cMpc = length_to_cMpc(position_unit, option_label("position_unit"), redshift, hubble_h)
    else:
        to_cMpc = length.size / MPC_CM / h_factor(length)
        sources["position_unit"] = length.describe("length")
    if box_size is not None:
        box_cMpc = box_size_cMpc(box_size, redshift, hubble_h)
    elif size_unit is not None:
        box_cMpc = box_size_cMpc(f"{float(size)!r} {size_unit}", redshift, hubble_h)
        sources["box_size"] = size_source
    else:
        box_cMpc = float(size) * length.size / MPC_CM / h_factor(length)
        sources["box_size"] = f"{size_source}, in the code's unit of length"
    if mass_unit is not None:
        to_g = mass_to_g(mass_unit, hubble_h)
    else:
        to_g = mass.size / h_factor(mass)
        sources["mass_unit"] = mass.describe("mass")
    if not box_cMpc > 0:
        raise InputError(f"{path}: box size {box_cMpc!r} cMpc; expected a positive length")
    return ParticleUnits(redshift, hubble_h, box_cMpc, to_cMpc, to_g, sources)
