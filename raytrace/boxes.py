"""Electron-density boxes: HDF5 files (or arrays) in, immutable boxes and series out.

In: an HDF5 file with a 3-D cubic dataset of any float or integer dtype, plus what
its values mean, the box side and the snapshot redshift; or a numpy array with
the same information. Out: a :class:`Box`, whose float32 ``data`` times
``comoving_scale`` is the comoving electron density in cm^-3, and a
:class:`BoxSeries` of boxes at several redshifts that says which box serves a ray
sample at redshift z.

HDF5 attributes we read (our own names), on the density dataset first, then on the
file's root; every one can be given or overridden as an argument of
:func:`load_box` (CLI flag in brackets):

``quantity`` (--quantity): what the values are, one of :data:`QUANTITIES`:
    ``n_e_physical``     electron density in cm^-3, physical, at the snapshot redshift;
    ``n_e_comoving``     comoving electron density n_e / (1+z)^3 in cm^-3;
    ``overdensity``      electron overdensity n_e / nbar_e(z), nbar_e from a MeanPlasma;
    ``gas_density``      gas mass density in g cm^-3, physical, at the snapshot redshift,
                         n_e = x (1 - Y_p) rho / m_p;
    ``gas_overdensity``  gas overdensity rho / rhobar (= n_H / nbar_H),
                         n_e = x delta n_H0 (1+z)^3;
    x being the ionised fraction (electrons per hydrogen nucleus, n_e / n_H).
``box_size`` (--box-size) with ``box_size_unit``: the side length. As an attribute the
    unit is one of "cMpc", "cMpc/h", "ckpc", "ckpc/h" (comoving), "pMpc", "pkpc" or
    "Mpc", "kpc" (physical at the snapshot redshift). As an argument it is a string
    such as "100 Mpc/h" or "67.7 Mpc", or an astropy Quantity, and a bare "Mpc" there
    is comoving unless the text says "physical" or "pMpc".
``redshift`` (--redshift): the snapshot redshift.
``hubble_h`` (--hubble-h): the simulation's h, needed when the unit has "/h".
``ionised_fraction`` (--ionised-fraction): gas quantities only, a constant x; or
``ionised_fraction_dataset``: the path of a second 3-D dataset of x in the same file.
``provenance``: a JSON string the project's own writers store; shown, never used.

Missing information is an InputError naming the flag that supplies it; nothing is
guessed. A contiguous, uncompressed float32 dataset is memory-mapped read-only;
anything else is read (and converted) into one float32 array, so a box never
needs a second full copy in memory.
"""

import glob
import hashlib
import math
import re
from dataclasses import dataclass, field
from functools import lru_cache
from pathlib import Path

import numpy as np

from .constants import PLASMA_MASS2_PER_DENSITY, PROTON_MASS_G
from .cosmology import Z_TABLE_MAX
from .errors import InputError

#: What a box's values can mean (the ``quantity`` attribute or argument).
QUANTITIES = {
    "n_e_physical": "physical electron density n_e in cm^-3 at the snapshot redshift",
    "n_e_comoving": "comoving electron density n_e / (1+z)^3 in cm^-3",
    "overdensity": "electron overdensity n_e / nbar_e(z)",
    "gas_density": "physical gas density in g cm^-3 at the snapshot redshift, times the ionised fraction",
    "gas_overdensity": "gas overdensity rho / rhobar, times the ionised fraction",
}
_GAS = ("gas_density", "gas_overdensity")
_NEED_PLASMA = ("overdensity",) + _GAS

#: Percentiles of n_e / nbar_e that :meth:`Box.statistics` reports.
PERCENTILES = (0.1, 1.0, 16.0, 50.0, 84.0, 99.0, 99.9)

#: Largest ionised fraction accepted: fully ionised hydrogen and helium give
#: n_e / n_H = 1 + Y_p / (2 (1 - Y_p)) = 1.16 for Y_p = 0.245; metals add a few per cent.
MAX_IONISED_FRACTION = 1.25

# Values per slab when scanning or multiplying a box piece by piece (16 MB of float32).
_SLAB_VALUES = 1 << 22
_GLOB_CHARACTERS = "*?["


# -- box side length -------------------------------------------------------------------
_NUMBER = re.compile(r"^\s*(?P<number>[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*(?P<unit>.*?)\s*$")
_LENGTH_UNIT = re.compile(
    r"^(?:(?P<word1>(?i:comoving|physical))\s+)?"
    r"(?P<h_before>h\^?-1\s*)?"
    r"(?P<frame>[cp]?)(?P<base>Gpc|Mpc|kpc|pc)"
    r"(?:\s*(?P<h_after>/\s*h|h\^?-1))?"
    r"(?:\s+(?P<word2>(?i:comoving|physical)))?$"
)
_UNIT_HELP = "cMpc, cMpc/h, ckpc/h, pMpc, or Mpc/kpc with an optional '/h' and the word 'physical'"


@dataclass(frozen=True)
class _Length:
    """A box side as given: value in Mpc (or Mpc/h), whether per h, whether physical."""

    value_Mpc: float
    per_h: bool
    physical: bool
    text: str


def _parse_length_unit(unit, text, what, bare_is_comoving):
    import astropy.units as u

    match = _LENGTH_UNIT.match(unit)
    if not match:
        raise InputError(f"{what}: cannot read the unit of {text!r}; expected a length such as {_UNIT_HELP}")
    words = {w.lower() for w in (match["word1"], match["word2"]) if w}
    if match["frame"]:
        words.add("comoving" if match["frame"] == "c" else "physical")
    if len(words) > 1:
        raise InputError(f"{what}: {text!r} says both comoving and physical")
    if match["h_before"] and match["h_after"]:
        raise InputError(f"{what}: {text!r} divides by h twice")
    if not words and not bare_is_comoving:
        raise InputError(
            f"{what}: {text!r} does not say comoving or physical; write e.g. 'cMpc/h' or 'pMpc' "
            "(a box file's unit attribute must say which)"
        )
    physical = words == {"physical"}
    factor = u.Unit(match["base"]).to(u.Mpc)
    return factor, bool(match["h_before"] or match["h_after"]), physical


def _length_from_argument(value, what):
    """A box side from a string such as '100 Mpc/h' or an astropy Quantity (comoving unless physical)."""
    import astropy.units as u

    if isinstance(value, u.Quantity):
        from astropy.cosmology import units as cosmology_units

        if not value.isscalar:
            raise InputError(f"{what}: expected one length, got {value!r}")
        try:
            return _Length(float(value.to_value(u.Mpc)), False, False, f"{value}")
        except u.UnitConversionError:
            pass
        try:
            return _Length(float((value * cosmology_units.littleh).to_value(u.Mpc)), True, False, f"{value}")
        except u.UnitConversionError:
            raise InputError(f"{what}: {value!r} is not a length (e.g. '100 Mpc/h' or '67.7 Mpc')") from None
    if isinstance(value, str):
        match = _NUMBER.match(value)
        if not match:
            raise InputError(f"{what}: cannot read {value!r} as a number with a length unit ({_UNIT_HELP})")
        if not match["unit"]:
            raise InputError(f"{what}: {value!r} has no unit; write e.g. '100 Mpc/h' or '67.7 Mpc'")
        factor, per_h, physical = _parse_length_unit(match["unit"], value, what, bare_is_comoving=True)
        return _Length(float(match["number"]) * factor, per_h, physical, value.strip())
    raise InputError(
        f"{what}: expected a length with its unit, as text ('100 Mpc/h', '67.7 Mpc') or an astropy "
        f"Quantity; got {value!r}"
    )


def _comoving_size(length, redshift, hubble_h, where):
    """Side length in comoving Mpc (no h)."""
    size = length.value_Mpc
    if length.per_h:
        if hubble_h is None:
            raise InputError(
                f"{where}: the box size {length.text!r} is per h but h is unknown; give the simulation's h "
                "with --hubble-h (hubble_h=...) or store a 'hubble_h' attribute"
            )
        size /= hubble_h
    if length.physical:
        size *= 1.0 + redshift
    if not (math.isfinite(size) and size > 0):
        raise InputError(f"{where}: box size {length.text!r}: expected a positive finite length")
    return size


# -- checks of plain values ------------------------------------------------------------------
def _number(value, what):
    try:
        number = float(np.asarray(value).reshape(-1)[0]) if np.size(value) == 1 else None
    except (TypeError, ValueError):
        number = None
    if number is None:
        raise InputError(f"{what}: expected one number, got {value!r}")
    return number


def _check_redshift(value, what):
    z = _number(value, what)
    if not (math.isfinite(z) and 0.0 <= z <= Z_TABLE_MAX):
        raise InputError(f"{what}: expected a snapshot redshift between 0 and {Z_TABLE_MAX:g}, got {value!r}")
    return z


def _check_hubble(value, what):
    h = _number(value, what)
    if not (math.isfinite(h) and 0.0 < h <= 2.0):
        raise InputError(f"{what}: expected the dimensionless Hubble parameter h (e.g. 0.6766), got {value!r}")
    return h


def _check_quantity(value, what):
    if isinstance(value, bytes):
        value = value.decode()
    if not isinstance(value, str) or value not in QUANTITIES:
        raise InputError(f"{what}: {value!r} is not one of {', '.join(QUANTITIES)}")
    return value


def _check_fraction_constant(value, what):
    x = _number(value, what)
    if not (math.isfinite(x) and 0.0 < x <= MAX_IONISED_FRACTION):
        raise InputError(
            f"{what}: expected electrons per hydrogen nucleus in (0, {MAX_IONISED_FRACTION}], got {value!r}"
        )
    return x


def _check_grid(shape, where):
    if len(shape) != 3:
        raise InputError(f"{where}: shape {tuple(shape)} is {len(shape)}-D; expected a 3-D cube (N, N, N)")
    if not shape[0] == shape[1] == shape[2]:
        raise InputError(f"{where}: shape {tuple(shape)} is not cubic; expected (N, N, N)")
    if shape[0] < 2:
        raise InputError(f"{where}: shape {tuple(shape)}; expected at least 2 cells a side")


def _check_dtype(dtype, where):
    if np.dtype(dtype).kind not in "fiu":
        raise InputError(f"{where}: values of type {dtype}; expected float or integer values")


def _supply(key):
    return f"--{key.replace('_', '-')} ({key}=...)"


# -- scanning ---------------------------------------------------------------------------
def _slabs(n):
    """Start and stop planes of slabs of about _SLAB_VALUES values of an (n, n, n) cube."""
    planes = max(1, _SLAB_VALUES // (n * n))
    return [(start, min(start + planes, n)) for start in range(0, n, planes)]


def _scan(data, where):
    """Counts of bad values, then mean, maximum, smallest positive value and zero count.

    Works slab by slab so that no full-size temporary is made.
    """
    not_finite = negative = zeros = 0
    total, top, smallest_positive, lowest = 0.0, -np.inf, np.inf, np.inf
    for start, stop in _slabs(data.shape[0]):
        slab = np.asarray(data[start:stop])
        finite = np.isfinite(slab)
        not_finite += slab.size - int(np.count_nonzero(finite))
        below = slab < 0
        negative += int(np.count_nonzero(below))
        if negative or not_finite:
            if below.any():
                lowest = min(lowest, float(slab[below].min()))
            continue
        zeros += slab.size - int(np.count_nonzero(slab))
        total += float(np.sum(slab, dtype=np.float64))
        top = max(top, float(slab.max()))
        positive = slab[slab > 0]
        if positive.size:
            smallest_positive = min(smallest_positive, float(positive.min()))
    size = data.size
    if not_finite:
        raise InputError(
            f"{where}: {not_finite} of {size} values are NaN or inf (as float32); expected finite densities"
        )
    if negative:
        raise InputError(
            f"{where}: {negative} of {size} values are negative (lowest {lowest:g}); expected densities >= 0"
        )
    if zeros == size:
        raise InputError(f"{where}: every value is zero; expected a density with non-zero cells")
    return {
        "mean": total / size,
        "maximum": top,
        "minimum_positive": smallest_positive,
        "zero_cells": zeros,
    }


def sample_cells(data, max_cells=1 << 24, seed=0):
    """``(values, count)``: all cells, or a uniform random sample (with replacement) of ``max_cells`` of them."""
    flat = np.asarray(data).reshape(-1)
    if flat.size <= max_cells:
        return flat, flat.size
    rng = np.random.default_rng(seed)
    index = np.sort(rng.integers(0, flat.size, max_cells))
    return flat[index], max_cells


@lru_cache(maxsize=1)
def _default_plasma():
    from .background import MeanPlasma

    return MeanPlasma()


def _plasma_or_default(plasma):
    from .background import MeanPlasma

    if plasma is None:
        return _default_plasma()
    if not isinstance(plasma, MeanPlasma):
        raise InputError(f"plasma: expected a raytrace.MeanPlasma, got {type(plasma).__name__}")
    return plasma


def _comoving_scale(quantity, redshift, fraction, plasma):
    """Factor from stored values (times any ionised-fraction dataset) to comoving n_e in cm^-3.

    ``fraction`` is the constant ionised fraction, or 1 when a dataset supplies it.
    """
    expansion = (1.0 + redshift) ** 3
    if quantity == "n_e_physical":
        return 1.0 / expansion
    if quantity == "n_e_comoving":
        return 1.0
    plasma = _plasma_or_default(plasma)
    if quantity == "overdensity":
        return float(plasma.mean_comoving_electron_density_cm3(redshift))
    if quantity == "gas_density":
        # n_H = (1 - Y_p) rho / m_p; the same m_p as n_H0 in cosmology.py, so that
        # rho = Omega_b rho_crit (1+z)^3 gives the mean hydrogen density exactly.
        hydrogen_mass_fraction = 1.0 - plasma.ionisation.helium_fraction
        return fraction * hydrogen_mass_fraction / PROTON_MASS_G / expansion
    return fraction * plasma.hydrogen_density0_cm3


# -- the box ------------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class Box:
    """One snapshot's electron density on a periodic cubic grid (immutable).

    Comoving n_e in cm^-3 is ``comoving_scale * data``; the physical density where
    this box serves redshift z is that times (1+z)^3 (PHYSICS.md section 3). Build
    with :func:`load_box` or :meth:`Box.from_array`.

    Attributes
    ----------
    data : (N, N, N) float32, C-contiguous, read-only (a np.memmap when mapped).
    comoving_scale : float, cm^-3 per stored unit.
    redshift : snapshot redshift.
    box_size_cMpc : side length in comoving Mpc (no h).
    quantity : what the stored values are (a key of :data:`QUANTITIES`).
    path, dataset : where it was read from (None for an in-memory box).
    checksum : "sha256:..." of the file, or of the array bytes for an in-memory box.
    """

    data: np.ndarray = field(repr=False)
    comoving_scale: float
    redshift: float
    box_size_cMpc: float
    quantity: str
    path: Path | None = None
    dataset: str | None = None
    checksum: str = ""
    _load: dict | None = field(default=None, repr=False)
    _info: dict = field(default_factory=dict, repr=False)

    def __post_init__(self):
        data = self.data
        if not isinstance(data, np.ndarray) or data.dtype != np.float32 or not data.flags.c_contiguous:
            raise InputError("Box.data: expected a C-contiguous float32 numpy array (use Box.from_array)")
        _check_grid(data.shape, "Box.data")
        for name in ("comoving_scale", "box_size_cMpc"):
            value = getattr(self, name)
            if not (math.isfinite(value) and value > 0):
                raise InputError(f"Box.{name}: expected a positive finite number, got {value!r}")
        _check_redshift(self.redshift, "Box.redshift")
        _check_quantity(self.quantity, "Box.quantity")
        view = data.view()
        view.flags.writeable = False
        object.__setattr__(self, "data", view)
        if not self.checksum:
            object.__setattr__(self, "checksum", "sha256:" + hashlib.sha256(view).hexdigest())

    def __repr__(self):
        where = f", {self.path}:{self.dataset}" if self.path is not None else ""
        return (
            f"Box({self.n_cells}^3, z={self.redshift:g}, {self.box_size_cMpc:.6g} cMpc, "
            f"{self.quantity}{where})"
        )

    @property
    def n_cells(self):
        """Cells along each side, N."""
        return int(self.data.shape[0])

    @property
    def cell_size_cMpc(self):
        """Cell side in comoving Mpc."""
        return self.box_size_cMpc / self.n_cells

    @property
    def load_arguments(self):
        """Keyword arguments with which :func:`load_box` reopens this very box in another
        process (plain values only; no MeanPlasma needed). None for an in-memory box."""
        return None if self._load is None else dict(self._load)

    def physical_electron_density(self, z):
        """n_e in cm^-3 (float64 array, N^3) where this box serves redshift ``z``: comoving times (1+z)^3."""
        z = _check_redshift(z, "z")
        return self.data.astype(np.float64) * (self.comoving_scale * (1.0 + z) ** 3)

    def plasma_mass_range(self, z_start=None, z_end=None):
        """(lowest, highest) plasma mass in eV of the cells while this box serves z_start..z_end.

        The lowest non-zero cell at z_start and the highest cell at z_end, the
        comoving field scaled by (1+z)^3 (PHYSICS.md section 3); default: both at the
        snapshot redshift. A dark-photon mass can resonate in this box only between them.
        """
        z_start = self.redshift if z_start is None else _check_redshift(z_start, "z_start")
        z_end = self.redshift if z_end is None else _check_redshift(z_end, "z_end")
        if z_end < z_start:
            raise InputError(f"redshift range: expected z_start <= z_end, got {z_start:g} > {z_end:g}")
        info = self._info

        def mass(stored, z):
            return float(np.sqrt(PLASMA_MASS2_PER_DENSITY * stored * self.comoving_scale * (1.0 + z) ** 3))

        return mass(info["minimum_positive"], z_start), mass(info["maximum"], z_end)

    def describe(self):
        """Plain values (JSON-ready) saying what this box is, for provenance and ``inspect``."""
        info = self._info
        return {
            "path": None if self.path is None else str(self.path),
            "dataset": self.dataset,
            "quantity": self.quantity,
            "meaning": QUANTITIES[self.quantity],
            "n_cells": self.n_cells,
            "stored_dtype": info.get("stored_dtype", "float32"),
            "memory_mapped": isinstance(self.data, np.memmap),
            "box_size_cMpc": self.box_size_cMpc,
            "cell_size_cMpc": self.cell_size_cMpc,
            "box_size_given": info.get("box_size_given"),
            "hubble_h": info.get("hubble_h"),
            "redshift": self.redshift,
            "ionised_fraction": info.get("ionised_fraction"),
            "comoving_scale": self.comoving_scale,
            "mean_comoving_density_cm3": self.comoving_scale * info["mean"],
            "zero_cells": info["zero_cells"],
            "checksum": self.checksum,
            "provenance": info.get("provenance"),
        }

    def statistics(self, plasma=None, percentiles=PERCENTILES, max_cells=1 << 24, seed=0):
        """n_e / nbar_e and plasma masses at the snapshot redshift.

        The mean, extremes and zero count cover every cell; percentiles use every
        cell up to ``max_cells`` cells, beyond that a uniform random sample of
        ``max_cells`` (with ``seed``). ``plasma`` (a MeanPlasma, default Planck18
        with CAMB) gives nbar_e(z). Masses in eV: m_gamma = sqrt(4 pi alpha n_e / m_e).
        """
        plasma = _plasma_or_default(plasma)
        z = self.redshift
        mean_comoving = float(plasma.mean_comoving_electron_density_cm3(z))
        to_overdensity = self.comoving_scale / mean_comoving
        values, used = sample_cells(self.data, max_cells, seed)
        levels = np.percentile(values, percentiles)
        info = self._info
        lowest, highest = self.plasma_mass_range()

        def mass(stored):
            return float(np.sqrt(PLASMA_MASS2_PER_DENSITY * stored * self.comoving_scale * (1.0 + z) ** 3))

        return {
            "redshift": z,
            "mean_electron_density_cm3": mean_comoving * (1.0 + z) ** 3,
            "mean_overdensity": info["mean"] * to_overdensity,
            "max_overdensity": info["maximum"] * to_overdensity,
            "min_positive_overdensity": info["minimum_positive"] * to_overdensity,
            "zero_cells": info["zero_cells"],
            "percentiles": {float(p): float(v) * to_overdensity for p, v in zip(percentiles, levels)},
            "percentile_cells": int(used),
            "plasma_mass_eV": {
                "mean_density": float(np.sqrt(PLASMA_MASS2_PER_DENSITY * mean_comoving * (1.0 + z) ** 3)),
                "lowest_cell": lowest,
                "highest_cell": highest,
                "percentile_low": mass(float(levels[0])),
                "percentile_high": mass(float(levels[-1])),
                "percentile_range": (float(percentiles[0]), float(percentiles[-1])),
            },
        }

    @classmethod
    def from_array(
        cls,
        array,
        box_size,
        redshift,
        quantity="n_e_comoving",
        plasma=None,
        hubble_h=None,
        ionised_fraction=None,
        copy=True,
    ):
        """An in-memory box from a cubic 3-D array.

        ``box_size`` is an astropy Quantity or a string such as "100 Mpc/h"
        (comoving unless it says physical); ``ionised_fraction`` (gas quantities
        only) is a constant or an array of the box's shape. With ``copy=False`` an
        array that is already C-contiguous float32 is shared, not copied: do not
        change it afterwards.
        """
        where = "array"
        array = np.asarray(array)
        _check_grid(array.shape, where)
        _check_dtype(array.dtype, where)
        quantity = _check_quantity(quantity, "quantity")
        z = _check_redshift(redshift, "redshift")
        h = None if hubble_h is None else _check_hubble(hubble_h, "hubble_h")
        length = _length_from_argument(box_size, "box_size")
        size = _comoving_size(length, z, h, where)
        data = np.array(array, dtype=np.float32, order="C") if copy else np.ascontiguousarray(array, np.float32)
        constant, fraction_label = 1.0, None
        if quantity in _GAS:
            if ionised_fraction is None:
                raise InputError(
                    f"{where}: quantity {quantity!r} needs the ionised fraction (electrons per hydrogen "
                    "nucleus): give ionised_fraction= as a constant or an array of the box's shape"
                )
            if np.ndim(ionised_fraction) == 0:
                constant = _check_fraction_constant(ionised_fraction, "ionised_fraction")
                fraction_label = constant
            else:
                fraction = np.asarray(ionised_fraction)
                if fraction.shape != data.shape:
                    raise InputError(
                        f"ionised_fraction: shape {fraction.shape}, expected the box's shape {data.shape}"
                    )
                _check_fraction_values(fraction, "ionised_fraction array")
                data = data * fraction.astype(np.float32)
                fraction_label = "array"
        elif ionised_fraction is not None:
            raise InputError(f"ionised_fraction: applies to gas quantities ({', '.join(_GAS)}) only")
        stats = _scan(data, where)
        scale = _comoving_scale(quantity, z, constant, plasma)
        info = {
            "stored_dtype": str(array.dtype),
            "box_size_given": length.text,
            "hubble_h": h,
            "ionised_fraction": fraction_label,
            **stats,
        }
        return cls(data, scale, z, size, quantity, _info=info)


def _check_fraction_values(values, where):
    values = np.asarray(values)
    bad = ~np.isfinite(values) | (values < 0) | (values > MAX_IONISED_FRACTION)
    if bad.any():
        raise InputError(
            f"{where}: {int(bad.sum())} of {values.size} values are not electrons per hydrogen nucleus "
            f"in [0, {MAX_IONISED_FRACTION}] (first: {float(values[bad].flat[0])!r})"
        )


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


def _attribute(node, handle, key):
    """An attribute from the dataset, else the file's root; bytes become str."""
    for owner in (node, handle):
        if key in owner.attrs:
            value = owner.attrs[key]
            if isinstance(value, bytes):
                return value.decode()
            if isinstance(value, np.ndarray) and value.dtype.kind in "SO" and value.size == 1:
                value = value.reshape(-1)[0]
                return value.decode() if isinstance(value, bytes) else str(value)
            return value
    return None


def _node(handle, name, where):
    """``handle.get(name)``; a name that is not text HDF5 can store (from argv bytes that
    are not UTF-8, which Python keeps as lone surrogates) is an InputError."""
    try:
        return handle.get(name)
    except UnicodeEncodeError:
        raise InputError(f"{where}: {name!r} is not a valid dataset path (HDF5 names are UTF-8 text)") from None


def _fraction_dataset_names(handle, datasets, argument):
    names = set()
    if isinstance(argument, str):
        names.add(argument if argument.startswith("/") else "/" + argument)
    for owner in [handle] + [node for _, node in datasets]:
        value = owner.attrs.get("ionised_fraction_dataset")
        if value is not None:
            value = value.decode() if isinstance(value, bytes) else str(value)
            names.add(value if value.startswith("/") else "/" + value)
    return names


def _candidates(handle, ionised_fraction=None):
    """The 3-D datasets that may hold a density (ionised-fraction datasets left out)."""
    everything = _datasets(handle)
    cubes = [(name, node) for name, node in everything if node.ndim == 3]
    excluded = _fraction_dataset_names(handle, cubes, ionised_fraction)
    return everything, [(name, node) for name, node in cubes if name not in excluded]


def _find_dataset(handle, path, dataset, ionised_fraction):
    import h5py

    everything, candidates = _candidates(handle, ionised_fraction)
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


def _multiply_by_fraction(values, fraction_node, where):
    """values *= ionised fraction, read slab by slab from its dataset."""
    if fraction_node.shape != values.shape:
        raise InputError(
            f"{where}: shape {fraction_node.shape}, expected the density's shape {values.shape}"
        )
    _check_dtype(fraction_node.dtype, where)
    buffer = np.empty((0,), dtype=np.float32)
    for start, stop in _slabs(values.shape[0]):
        if buffer.shape[:1] != (stop - start,):
            buffer = np.empty((stop - start,) + values.shape[1:], dtype=np.float32)
        fraction_node.read_direct(buffer, source_sel=np.s_[start:stop], dest_sel=np.s_[0 : stop - start])
        _check_fraction_values(buffer, where)
        values[start:stop] *= buffer


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
    comoving_scale=None,
    memory_map=True,
):
    """Read one electron-density box from an HDF5 file.

    Arguments override the file's attributes (module docstring). ``dataset`` is a
    path in the file (default: the only 3-D dataset). ``box_size`` is a string such
    as "100 Mpc/h" or "67.7 Mpc", or an astropy Quantity (comoving unless stated
    physical). ``ionised_fraction`` (gas quantities) is a constant or the path of a
    3-D dataset in the same file. ``plasma`` is a MeanPlasma giving nbar_e(z) and
    n_H0 for overdensities and gas (default: Planck18 with CAMB's ionisation).
    ``comoving_scale``, when given, replaces the factor that quantity, constant
    ionised fraction and plasma would give (``Box.load_arguments`` uses it to reopen
    the same box elsewhere). ``memory_map=False`` reads even a mappable dataset.
    """
    from .provenance import file_checksum

    path = Path(path)
    with _open(path) as handle:
        node = _find_dataset(handle, path, dataset, ionised_fraction)
        where = f"{path}, dataset {node.name}"
        _check_grid(node.shape, where)
        _check_dtype(node.dtype, where)

        def attribute(key):
            return _attribute(node, handle, key)

        if quantity is None:
            quantity = attribute("quantity")
            if quantity is None:
                raise InputError(
                    f"{where}: what the values mean is not stated; give {_supply('quantity')} with one of "
                    f"{', '.join(QUANTITIES)}, or store a 'quantity' attribute"
                )
            quantity = _check_quantity(quantity, f"{where}: attribute 'quantity'")
        else:
            quantity = _check_quantity(quantity, "--quantity (quantity)")

        if redshift is None:
            redshift = attribute("redshift")
            if redshift is None:
                raise InputError(
                    f"{where}: the snapshot redshift is unknown; give {_supply('redshift')} or store a "
                    "'redshift' attribute"
                )
            z = _check_redshift(redshift, f"{where}: attribute 'redshift'")
        else:
            z = _check_redshift(redshift, "--redshift (redshift)")

        if hubble_h is None:
            stored_h = attribute("hubble_h")
            h = None if stored_h is None else _check_hubble(stored_h, f"{where}: attribute 'hubble_h'")
        else:
            h = _check_hubble(hubble_h, "--hubble-h (hubble_h)")

        if box_size is None:
            length = _length_from_attributes(attribute("box_size"), attribute("box_size_unit"), where)
        else:
            length = _length_from_argument(box_size, "--box-size (box_size)")
        size = _comoving_size(length, z, h, where)

        fraction_constant, fraction_node, fraction_label = _resolve_fraction(
            quantity, ionised_fraction, attribute, handle, where
        )
        if comoving_scale is not None:
            scale = _number(comoving_scale, "comoving_scale")
            if not (math.isfinite(scale) and scale > 0):
                raise InputError(f"comoving_scale: expected a positive finite number, got {comoving_scale!r}")
        else:
            scale = _comoving_scale(quantity, z, fraction_constant, plasma)

        values = _read_values(node, path, memory_map and fraction_node is None)
        if fraction_node is not None:
            _multiply_by_fraction(values, fraction_node, f"{path}, ionised-fraction dataset {fraction_node.name}")
        dataset_name = node.name
        stored_dtype = str(node.dtype)
        provenance = attribute("provenance")
    stats = _scan(values, where)
    info = {
        "stored_dtype": stored_dtype,
        "box_size_given": length.text,
        "hubble_h": h,
        "ionised_fraction": fraction_label,
        "provenance": None if provenance is None else str(provenance),
        **stats,
    }
    reopen = {
        "path": str(path.resolve()),
        "dataset": dataset_name,
        "quantity": quantity,
        "box_size": f"{size!r} cMpc",
        "redshift": z,
        "ionised_fraction": fraction_label,
        "comoving_scale": scale,
        "memory_map": memory_map,
    }
    return Box(
        values, scale, z, size, quantity, path.resolve(), dataset_name, file_checksum(path), _load=reopen, _info=info
    )


def _length_from_attributes(value, unit, where):
    if value is None:
        raise InputError(
            f"{where}: the box size is unknown; give {_supply('box_size')} such as '100 Mpc/h', or store "
            "'box_size' and 'box_size_unit' attributes"
        )
    size = _number(value, f"{where}: attribute 'box_size'")
    if unit is None:
        raise InputError(
            f"{where}: attribute 'box_size' = {size:g} has no 'box_size_unit' attribute; give "
            f"{_supply('box_size')} with its unit, e.g. '{size:g} cMpc/h'"
        )
    unit = str(unit).strip()
    text = f"{size:g} {unit}"
    factor, per_h, physical = _parse_length_unit(unit, text, f"{where}: attribute 'box_size_unit'", False)
    return _Length(size * factor, per_h, physical, text)


def _resolve_fraction(quantity, argument, attribute, handle, where):
    """(constant, dataset node or None, label) of the ionised fraction for gas quantities."""
    import h5py

    if quantity not in _GAS:
        if argument is not None:
            raise InputError(
                f"--ionised-fraction (ionised_fraction): applies to gas quantities ({', '.join(_GAS)}) only; "
                f"{where} holds {quantity!r}"
            )
        return 1.0, None, None
    if argument is None:
        constant = attribute("ionised_fraction")
        name = attribute("ionised_fraction_dataset")
        if constant is not None:
            argument = _check_fraction_constant(constant, f"{where}: attribute 'ionised_fraction'")
        elif name is not None:
            argument = str(name)
        else:
            raise InputError(
                f"{where}: quantity {quantity!r} needs the ionised fraction (electrons per hydrogen nucleus); "
                f"give {_supply('ionised_fraction')} as a constant or a dataset path, or store an "
                "'ionised_fraction' or 'ionised_fraction_dataset' attribute"
            )
    if isinstance(argument, str):
        node = _node(handle, argument, handle.filename)
        if not isinstance(node, h5py.Dataset):
            raise InputError(
                f"{handle.filename}: no ionised-fraction dataset {argument!r}; 3-D datasets in the file: "
                f"{_listing([c for c in _datasets(handle) if c[1].ndim == 3])}"
            )
        return 1.0, node, node.name
    constant = _check_fraction_constant(argument, "--ionised-fraction (ionised_fraction)")
    return constant, None, constant


# -- several boxes -----------------------------------------------------------------------------
def _label(box):
    if box.path is None:
        return f"in-memory box at z = {box.redshift:g}"
    return f"{box.path}:{box.dataset} (z = {box.redshift:g})"


class BoxSeries:
    """Boxes at several snapshot redshifts, sorted by redshift (immutable).

    Without blending the box nearest in redshift serves a sample (boundaries
    half-way between snapshot redshifts). With ``blend=True`` a sample between two
    snapshots is served by both, n_e blended linearly with a weight linear in z; that
    needs every neighbouring pair to share a grid (same N and box size). Boxes of
    different sizes and resolutions are fine without blending.
    """

    __slots__ = ("boxes", "redshifts", "blend")

    def __init__(self, boxes, blend=False):
        if isinstance(boxes, Box):
            boxes = [boxes]
        try:
            boxes = tuple(boxes)
        except TypeError:
            raise InputError(f"boxes: expected a list of Box objects, got {type(boxes).__name__}") from None
        if not boxes:
            raise InputError("boxes: expected at least one box, got none")
        for box in boxes:
            if not isinstance(box, Box):
                raise InputError(f"boxes: expected Box objects, got a {type(box).__name__}")
        boxes = tuple(sorted(boxes, key=lambda box: box.redshift))
        for lower, upper in zip(boxes[:-1], boxes[1:]):
            if lower.redshift == upper.redshift:
                raise InputError(
                    f"boxes: two boxes at the same redshift: {_label(lower)} and {_label(upper)}; "
                    "a series needs one box per snapshot redshift"
                )
            if blend and not (
                lower.n_cells == upper.n_cells
                and math.isclose(lower.box_size_cMpc, upper.box_size_cMpc, rel_tol=1e-9)
            ):
                raise InputError(
                    f"--blend (blend=True): {_label(lower)} ({lower.n_cells}^3, {lower.box_size_cMpc:.6g} cMpc) "
                    f"and {_label(upper)} ({upper.n_cells}^3, {upper.box_size_cMpc:.6g} cMpc) do not share "
                    "a grid; blending needs the same N and box size"
                )
        redshifts = np.array([box.redshift for box in boxes])
        redshifts.flags.writeable = False
        object.__setattr__(self, "boxes", boxes)
        object.__setattr__(self, "redshifts", redshifts)
        object.__setattr__(self, "blend", bool(blend))

    def __setattr__(self, name, value):
        raise AttributeError("BoxSeries objects are immutable")

    def __reduce__(self):
        return (BoxSeries, (self.boxes, self.blend))

    def __repr__(self):
        zs = ", ".join(f"{z:g}" for z in self.redshifts)
        return f"BoxSeries({len(self.boxes)} boxes at z = {zs}{', blended' if self.blend else ''})"

    def __len__(self):
        return len(self.boxes)

    def __iter__(self):
        return iter(self.boxes)

    def __getitem__(self, index):
        return self.boxes[index]

    @property
    def z_min(self):
        """Lowest snapshot redshift."""
        return float(self.redshifts[0])

    @property
    def z_max(self):
        """Highest snapshot redshift."""
        return float(self.redshifts[-1])

    @property
    def checksums(self):
        """Checksums of the boxes, in redshift order."""
        return tuple(box.checksum for box in self.boxes)

    def serving(self, z):
        """Which boxes serve samples at redshifts ``z``: ``(index_low, index_high, weight_high)``.

        Without blending: the nearest snapshot (index_low == index_high, weight 0; at
        a midpoint the higher one). With blending: the bracketing pair, weight
        (z - z_low) / (z_high - z_low); below the first and above the last
        snapshot the end box alone.
        """
        z = np.asarray(z, dtype=float)
        if np.any(~np.isfinite(z)) or np.any(z < 0):
            raise InputError("z: expected finite redshifts >= 0")
        zs = self.redshifts
        if not self.blend or zs.size == 1:
            index = np.searchsorted(0.5 * (zs[1:] + zs[:-1]), z, side="right").astype(np.int64)
            return index, index.copy(), np.zeros(z.shape)
        high = np.clip(np.searchsorted(zs, z, side="right"), 1, zs.size - 1).astype(np.int64)
        low = high - 1
        weight = np.clip((z - zs[low]) / (zs[high] - zs[low]), 0.0, 1.0)
        return low, high, weight

    def intervals(self, z_stop):
        """``[(z_start, z_end, index), ...]`` covering [0, z_stop], one box per piece.

        Nearest snapshot in redshift, boundaries half-way between snapshot redshifts
        (also when blending: the pieces then say whose grid the ray uses).
        """
        z_stop = _number(z_stop, "z_stop")
        if not (math.isfinite(z_stop) and z_stop > 0):
            raise InputError(f"z_max: expected a positive redshift, got {z_stop!r}")
        middles = 0.5 * (self.redshifts[1:] + self.redshifts[:-1])
        lower = np.concatenate(([0.0], middles))
        upper = np.concatenate((middles, [np.inf]))
        pieces = []
        for index, (start, end) in enumerate(zip(lower, upper)):
            start, end = max(float(start), 0.0), min(float(end), z_stop)
            if end > start:
                pieces.append((start, end, index))
        return pieces

    def describe(self, z_stop=None):
        """Plain values: the boxes, their redshifts and which box serves where up to ``z_stop``
        (default: the highest snapshot redshift, or 1 for a single box at z = 0)."""
        if z_stop is None:
            z_stop = self.z_max if self.z_max > 0 else 1.0
        return {
            "n_boxes": len(self.boxes),
            "redshifts": [float(z) for z in self.redshifts],
            "blend": self.blend,
            "serving": [
                {"z_start": a, "z_end": b, "box": i} for a, b, i in self.intervals(z_stop)
            ],
            "boxes": [box.describe() for box in self.boxes],
        }


def as_series(boxes):
    """A BoxSeries from a BoxSeries, a Box, or a list or tuple of boxes."""
    if isinstance(boxes, BoxSeries):
        return boxes
    if isinstance(boxes, (Box, list, tuple)):
        return BoxSeries(boxes)
    raise InputError(f"boxes: expected a BoxSeries, a Box or a list of boxes, got {type(boxes).__name__}")


def _expand_paths(paths):
    """Files from one path, a glob, or a list of either (globs sorted by name)."""
    if isinstance(paths, (str, Path)):
        paths = [paths]
    files = []
    for item in paths:
        text = str(item)
        if any(c in text for c in _GLOB_CHARACTERS) and not Path(text).exists():
            matched = sorted(glob.glob(text))
            if not matched:
                raise InputError(f"{text}: the pattern matches no file")
            files.extend(Path(m) for m in matched)
        else:
            files.append(Path(text))
    if not files:
        raise InputError("paths: expected at least one box file, got none")
    return files


def _snapshot_datasets(path, ionised_fraction):
    """The 3-D datasets of a file that each carry their own 'redshift' attribute (several
    snapshots in one file), else [None] so that load_box chooses or explains."""
    with _open(path) as handle:
        _, candidates = _candidates(handle, ionised_fraction)
        if len(candidates) > 1 and all("redshift" in node.attrs for _, node in candidates):
            return [name for name, _ in candidates]
    return [None]


def load_boxes(paths, dataset=None, **load_box_arguments):
    """The boxes of several files or datasets, in the order given (see :func:`load_series`)."""
    files = _expand_paths(paths)
    sources = []
    for path in files:
        if dataset is None:
            names = _snapshot_datasets(path, load_box_arguments.get("ionised_fraction"))
        elif isinstance(dataset, str):
            names = [dataset]
        else:
            names = list(dataset)
        sources.extend((path, name) for name in names)
    per_box = []
    for index in range(len(sources)):
        arguments = {}
        for key, value in load_box_arguments.items():
            if isinstance(value, (list, tuple)):
                if len(value) not in (1, len(sources)):
                    raise InputError(
                        f"{_supply(key)}: {len(value)} values for {len(sources)} boxes; give one for all "
                        "or one per box"
                    )
                value = value[0] if len(value) == 1 else value[index]
            arguments[key] = value
        per_box.append(arguments)
    return [load_box(path, name, **arguments) for (path, name), arguments in zip(sources, per_box)]


def load_series(paths, dataset=None, blend=False, **load_box_arguments):
    """A :class:`BoxSeries` from a list of files, a glob string, or one file with several datasets.

    One file with several 3-D datasets that each carry a 'redshift' attribute gives
    one box per dataset; ``dataset`` may name one dataset or a list of them (looked
    up in every file). Any other :func:`load_box` argument given as a list or tuple
    is distributed one per box, in the order of the files (globs sorted by name)
    and datasets.
    """
    return BoxSeries(load_boxes(paths, dataset, **load_box_arguments), blend=blend)
