"""Where a box file keeps what its values mean: attributes on the dataset, its parent
groups, the file's root, and the header or parameters groups of simulation outputs.

In: an open h5py file and the density dataset. Out: ``(value, source)`` pairs, the
source a phrase such as "attribute 'Redshift' of group /Header" that ``inspect``
prints. Search order for every key: the dataset, then each parent group up to the
root; then, for the redshift, box size and h only, the groups :data:`HEADER_GROUPS`
at the file's root under the names in :data:`ALIASES`. The first one found wins;
a user's argument (flag) always wins over the file.
"""

import numpy as np

#: Names under which simulation outputs store the redshift, box side and h (ours first).
#: Gadget, Arepo and EAGLE use Header/Redshift, BoxSize, HubbleParam; SWIFT Cosmology/Redshift
#: and h; 21cmFAST-style outputs BOX_LEN and hlittle (common practice, no source).
ALIASES = {
    "redshift": ("redshift", "Redshift", "REDSHIFT", "current_redshift", "CurrentRedshift"),
    "box_size": ("box_size", "BoxSize", "boxsize", "box_length", "BoxLength", "BOX_LEN"),
    "hubble_h": ("hubble_h", "HubbleParam", "hubble_param", "HubbleParameter", "hlittle", "h"),
}
#: Names of a box side's unit, looked for beside the side length first.
UNIT_NAMES = ("box_size_unit", "box_size_units", "BoxSizeUnit", "BoxSize_unit", "unit", "units")
#: Root-level groups searched after the dataset's own ancestors.
HEADER_GROUPS = ("Header", "header", "Parameters", "parameters", "Cosmology", "cosmology",
                 "user_params", "cosmo_params", "simulation_parameters", "Units", "InternalCodeUnits")
# Too generic to mean h on a dataset or an arbitrary group; accepted in header groups only.
_HEADER_ONLY = {"h"}


def _plain(value):
    """Attribute values as Python values: bytes to str, one-element arrays to scalars, equal
    triples (a box side stored per axis, as SWIFT does) to one number."""
    if isinstance(value, bytes):
        return value.decode()
    if isinstance(value, np.ndarray):
        if value.dtype.kind in "SO" and value.size == 1:
            item = value.reshape(-1)[0]
            return item.decode() if isinstance(item, bytes) else str(item)
        if value.dtype.kind in "fiu" and value.size == 3 and np.all(value == value.reshape(-1)[0]):
            return value.reshape(-1)[0]
    return value


def _describe(owner):
    import h5py

    if isinstance(owner, h5py.Dataset):
        return f"dataset {owner.name}"
    return "the file's root" if owner.name == "/" else f"group {owner.name}"


class Metadata:
    """Attribute lookup for one dataset of an open file (see the module docstring)."""

    def __init__(self, handle, node):
        owners = [node]
        parent = node.parent
        while True:
            owners.append(parent)
            if parent.name == "/":
                break
            parent = parent.parent
        self._own = owners
        headers = []
        for name in HEADER_GROUPS:
            group = handle.get(name)
            if group is not None and group not in owners and hasattr(group, "attrs"):
                headers.append(group)
        self._headers = headers

    def find(self, key):
        """``(value, source)`` of ``key`` (our name; aliases for ALIASES keys), or ``(None, None)``."""
        found = self.find_all(key)
        return found[0] if found else (None, None)

    def find_all(self, key):
        """Every ``(value, source)`` of ``key`` along the search path, the one :meth:`find` takes first."""
        names = ALIASES.get(key, (key,))
        found = [(_plain(owner.attrs[name]), f"attribute '{name}' of {_describe(owner)}")
                 for owner in self._own for name in names if name in owner.attrs and name not in _HEADER_ONLY]
        if key in ALIASES:
            found += [(_plain(owner.attrs[name]), f"attribute '{name}' of {_describe(owner)}")
                      for owner in self._headers for name in names if name in owner.attrs]
        return found

    def in_header(self, source):
        """Whether a source found here is a header group's (a simulation's Header, Parameters ...), not one
        of the dataset's own groups, whose attributes the nearer ones override by design."""
        return source.split(" of ", 1)[1] in {_describe(owner) for owner in self._headers}

    def find_named(self, names):
        """``(value, source)`` of the first attribute named one of ``names`` on the search path, header
        groups included (simulation codes' parameters such as UnitLength_in_cm), or ``(None, None)``."""
        for owner in self._own + self._headers:
            for name in names:
                if name in owner.attrs:
                    return _plain(owner.attrs[name]), f"attribute '{name}' of {_describe(owner)}"
        return None, None

    def find_box_size(self):
        """``(value, unit, source, unit_source)`` of the box size :meth:`find` takes (Nones without one)."""
        sizes = self.box_sizes()
        return sizes[0] if sizes else (None, None, None, None)

    def box_sizes(self):
        """Every ``(value, unit, source, unit_source)`` of a box side on the search path: the unit looked
        for beside each length first, then along the same search path (None where there is none)."""
        out = []
        for value, source in self.find_all("box_size"):
            owner_name = source.split(" of ", 1)[1]
            ordered = sorted(self._own + self._headers, key=lambda owner: _describe(owner) != owner_name)
            unit = next(((str(_plain(owner.attrs[name])).strip(), f"attribute '{name}' of {_describe(owner)}")
                         for owner in ordered for name in UNIT_NAMES
                         if name in owner.attrs and (name.startswith("box") or _describe(owner) == owner_name)),
                        (None, None))
            out.append((value, unit[0], source, unit[1]))
        return out


def carries_redshift(node):
    """Whether a dataset carries its own redshift attribute (one snapshot per dataset)."""
    return any(name in node.attrs for name in ALIASES["redshift"])
