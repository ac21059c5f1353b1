"""The immutable :class:`Box`: one snapshot's electron density on a periodic cubic grid.

In: a float32 array with the factor to comoving n_e, the redshift and side length
(from :func:`raytrace.boxes.load_box` or :meth:`Box.from_array`). Out: densities,
plasma-mass ranges, plain descriptions and statistics of n_e / nbar_e.
"""

import hashlib
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from raytrace.boxes.arrays import box_from_array
from raytrace.boxes.meanings import QUANTITIES, _check_quantity, _plasma_or_default
from raytrace.boxes.values import _check_grid, _check_redshift
from raytrace.core.errors import InputError
from raytrace.physics.constants import PLASMA_MASS2_PER_DENSITY

#: Percentiles of n_e / nbar_e that :meth:`Box.statistics` reports.
PERCENTILES = (0.1, 1.0, 16.0, 50.0, 84.0, 99.0, 99.9)

def sample_cells(data, max_cells=1 << 24, seed=0):
    """``(values, count)``: all cells, or a uniform random sample (with replacement) of ``max_cells`` of them."""
    flat = np.asarray(data).reshape(-1)
    if flat.size <= max_cells:
        return flat, flat.size
    rng = np.random.default_rng(seed)
    index = np.sort(rng.integers(0, flat.size, max_cells))
    return flat[index], max_cells


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
            "mean_density": info.get("mean_density"),
            "box_ionisation": info.get("box_ionisation"),
            "sources": dict(info.get("sources", {})),
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
        *,
        neutral_fraction=None,
        helium_electrons=None,
        mean_density="history",
        check=False,
    ):
        """An in-memory box from a cubic 3-D array.

        ``box_size`` is an astropy Quantity or a string such as "100 Mpc/h"
        (comoving unless it says physical); ``ionised_fraction`` (electrons per
        hydrogen nucleus) or ``neutral_fraction`` (n_HI / n_H, with
        ``helium_electrons``) is a number or an array of the box's shape, for gas
        quantities and for an overdensity with ``mean_density="box"``. With
        ``copy=False`` an array that is already C-contiguous float32 is shared, not
        copied, when nothing needs converting: do not change it afterwards.
        ``check=True`` warns as :func:`raytrace.boxes.load_box` does.
        """
        return box_from_array(cls, array, box_size, redshift, quantity, plasma, hubble_h, ionised_fraction, copy,
                              neutral_fraction, helium_electrons, mean_density, check)

