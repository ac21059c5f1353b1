"""When and where conversion happens: redshift bins, density classes and the cells behind both
(PHYSICS.md section 11).

In: the user's bins (a count, or edges in z), the density-class edges in D*, the
run's masses, redshift range and mean plasma. Out: :class:`BinSetup`, the
checked edges and, per mass, the redshift cells the ray kernel adds each
crossing to (:mod:`raytrace.kernels.zcells`), with each cell's bin and class;
the homogeneous background's crossings binned by their own redshifts.

At a crossing the density is the target itself, so its contrast is
D* = (m / mbar_gamma(z_c))^2, a function of the mass and the crossing's redshift
alone. For each mass the redshifts where D* equals a class edge are where the
mean plasma mass equals m / sqrt(edge) (:meth:`MeanPlasma.crossings`); cutting the
boxes' redshift range at those and at the bin edges gives cells that each lie in
one bin and one class. The kernel then adds each crossing once, into its cell,
and bins, classes and their joint split are sums of cells.

Default bins (:data:`DEFAULT_BIN_COUNT` = 16): equal steps in ln(1+z) over the
redshifts the boxes serve, and the homogeneous background beyond them in a bin
of its own. Equal steps in ln(1+z) are equal e-folds of expansion and equal
factors in the mass that resonates with the mean plasma (m ~ (1+z)^(3/2) at
fixed ionisation); 16 of them put three to four bins between neighbouring
snapshots of a series spaced like the demo's (z = 0, 0.5, 1, 2, 3, 4, 6), and the
overhead of 16 bins on the ray engine is in benchmarks/sightline_speed.py.

Default classes (:data:`DEFAULT_DENSITY_EDGES`, D* = 1 and 100): voids below the
mean density (D* < 1), sheets and filaments between (1 <= D* < 100), and halos at
D* >= 100, where gas has collapsed (virialised haloes sit at a few hundred times the
mean; common practice, no source). The background beyond the boxes is a class of
its own (there D* = 1 by construction).
"""

import math
from dataclasses import dataclass

import numpy as np

from raytrace.core.errors import InputError, float_array

DEFAULT_BIN_COUNT = 16
DEFAULT_DENSITY_EDGES = (1.0, 100.0)
BOX_CLASS_NAMES = ("voids", "sheets and filaments", "halos")
BACKGROUND_CLASS = "homogeneous background"


def bin_edges(bins, z_boxes, z_max, include_background, what="redshift_bins (--redshift-bins)"):
    """Checked bin edges in z (increasing, within 0..z_max), or None for no bins.

    ``bins``: None or 0 (no bins), a count (that many equal steps in ln(1+z) over
    0..z_boxes, plus the background beyond in a bin of its own), or edges in z.
    """
    if bins is None or (isinstance(bins, (int, np.integer)) and not isinstance(bins, bool) and bins == 0):
        return None
    if isinstance(bins, (int, np.integer)) and not isinstance(bins, bool):
        if bins < 0:
            raise InputError(f"{what}: expected a count >= 1, or edges in z, got {bins}")
        edges = np.expm1(np.linspace(0.0, math.log1p(z_boxes), int(bins) + 1))
        edges[0], edges[-1] = 0.0, z_boxes
        if include_background and z_max > z_boxes:
            edges = np.append(edges, z_max)
        return edges
    edges = float_array(bins, what)
    if isinstance(bins, (str, bool)) or edges.ndim != 1 or edges.size < 2:
        raise InputError(f"{what}: expected a count, or at least two edges in z, got {bins!r}")
    if not np.all(np.isfinite(edges)) or np.any(np.diff(edges) <= 0):
        raise InputError(f"{what}: the edges must be finite and strictly increasing, got {edges.tolist()}")
    if edges[0] < 0 or edges[-1] > z_max:
        raise InputError(f"{what}: edges {edges[0]:g} to {edges[-1]:g} lie outside the run's range z = 0 to "
                         f"{z_max:g}")
    return edges


def density_edges(edges, what="density_classes (--density-classes)"):
    """Checked D* edges of the density classes: positive, finite, strictly increasing."""
    values = float_array(edges, what)
    if values.ndim != 1 or not np.all(np.isfinite(values)) or np.any(values <= 0) or np.any(np.diff(values) <= 0):
        raise InputError(f"{what}: expected positive, strictly increasing edges in D* (e.g. 1, 100), got {edges!r}")
    return values


def class_names(edges):
    """Names of the boxes' density classes for ``edges``, then the background's."""
    if len(edges) == 0:
        return ("all densities", BACKGROUND_CLASS)
    if np.array_equal(edges, DEFAULT_DENSITY_EDGES):
        return BOX_CLASS_NAMES + (BACKGROUND_CLASS,)
    bounds = [None, *(f"{e:g}" for e in edges), None]
    names = [f"D* < {bounds[1]}"] + [f"{a} <= D* < {b}" for a, b in zip(bounds[1:-2], bounds[2:-1])]
    return tuple(names + [f"D* >= {bounds[-2]}", BACKGROUND_CLASS])


@dataclass(frozen=True, eq=False)
class BinSetup:
    """The bins, classes and per-mass cells of one run.

    ``edges_z`` (B+1) bin edges; ``density_edges`` (C-1) class edges in D*;
    ``names`` the C box classes and the background's; per mass k: ``inner_opz[k]``
    the cells' inner edges in 1+z (padded with inf), ``cell_bin[k]`` each cell's bin
    (-1 outside the bins), ``cell_class[k]`` its class, ``cell_top[k]`` its upper z.
    """

    edges_z: np.ndarray
    density_edges: np.ndarray
    names: tuple
    z_boxes: float
    inner_opz: np.ndarray
    cell_bin: np.ndarray
    cell_class: np.ndarray
    cell_top: np.ndarray

    @property
    def n_bins(self):
        return self.edges_z.size - 1

    @property
    def n_classes(self):
        """Classes with the background's."""
        return len(self.names)

    @property
    def n_cells(self):
        return self.cell_bin.shape[1]

    def run_record(self):
        """What a run's record says about its bins."""
        return {"redshift_bin_edges": self.edges_z.tolist(), "density_class_edges": self.density_edges.tolist()}

    def bin_selector(self):
        """(masses, cells, B): 1 where a cell lies in a bin; cells @ it sums the cells into bins."""
        return self.cell_bin[:, :, None] == np.arange(self.n_bins)[None, None, :]

    def class_selector(self):
        """(masses, cells, C): 1 where a cell lies in a class (the background's class has no cell)."""
        return self.cell_class[:, :, None] == np.arange(self.n_classes)[None, None, :]

    def below_selector(self):
        """(masses, cells, B+1): 1 where a cell lies below a bin edge (for K(z_c < edge))."""
        return self.cell_top[:, :, None] <= self.edges_z[None, None, :]

    def pair_selector(self):
        """(masses, cells, B * C): 1 where a cell lies in a (bin, class) pair, bin-major."""
        pairs = np.where(self.cell_bin >= 0, self.cell_bin * self.n_classes + self.cell_class, -1)
        return pairs[:, :, None] == np.arange(self.n_bins * self.n_classes)[None, None, :]

    def cells_to_bins(self, cells):
        """(rows, B, masses) kernel per bin from (rows, cells, masses) kernel per cell."""
        return np.matmul(np.asarray(cells).transpose(2, 0, 1), self.bin_selector()).transpose(1, 2, 0)


def run_bins(bins, classes, mass, plasma, z_boxes, z_max, include_background):
    """The :class:`BinSetup` of a run's ``bins`` and class edges ``classes`` (None: no bins)."""
    edges = bin_edges(bins, z_boxes, z_max, include_background)
    return None if edges is None else bin_setup(edges, density_edges(classes), mass, plasma, z_boxes)


def bin_setup(edges_z, d_edges, mass, plasma, z_boxes):
    """The :class:`BinSetup` of bin edges ``edges_z`` and class edges ``d_edges`` for the masses (eV)."""
    per_mass = [_cell_bounds(edges_z, z, z_boxes) for z in _class_redshifts(d_edges, mass, plasma, z_boxes)]
    width = max(bounds.size - 2 for bounds in per_mass)
    inner = np.full((mass.size, width), np.inf)
    cell_bin = np.full((mass.size, width + 1), -1, dtype=np.int64)
    cell_class = np.zeros((mass.size, width + 1), dtype=np.int64)
    cell_top = np.full((mass.size, width + 1), z_boxes)
    for k, bounds in enumerate(per_mass):
        n = bounds.size - 1
        inner[k, :n - 1] = 1.0 + bounds[1:-1]
        middle = np.expm1(0.5 * (np.log1p(bounds[:-1]) + np.log1p(bounds[1:])))
        inside = (middle >= edges_z[0]) & (middle < edges_z[-1])
        cell_bin[k, :n] = np.where(inside, np.searchsorted(edges_z, middle, side="right") - 1, -1)
        contrast = (mass[k] / plasma.mean_plasma_mass_eV(middle)) ** 2
        cell_class[k, :n] = np.searchsorted(d_edges, contrast, side="right")
        cell_top[k, :n] = bounds[1:]
    return BinSetup(edges_z, d_edges, class_names(d_edges), float(z_boxes), inner, cell_bin, cell_class, cell_top)


def _class_redshifts(d_edges, mass, plasma, z_boxes):
    """Per mass, the redshifts inside (0, z_boxes) where D* equals a class edge: where the mean plasma mass is
    m / sqrt(edge) (one search for every mass and edge)."""
    if d_edges.size == 0:
        return [np.zeros(0)] * mass.size
    found = plasma.crossings((mass[:, None] / np.sqrt(d_edges)[None, :]).ravel(), 0.0, z_boxes)
    owner = found.mass_index // d_edges.size
    return [found.redshift[owner == k] for k in range(mass.size)]


def _cell_bounds(edges_z, class_z, z_boxes):
    """0, the bin edges and the class boundaries ``class_z`` inside (0, z_boxes), and z_boxes, sorted."""
    cuts = np.concatenate([edges_z, class_z])
    cuts = np.unique(cuts[(cuts > 0.0) & (cuts < z_boxes)])
    return np.concatenate([[0.0], cuts, [z_boxes]])


def background_by_bin(plasma, mass, z_boxes, z_max, edges_z):
    """The homogeneous background's kernel (z_boxes < z_c < z_max) per bin and mass, (B, n_masses),
    and per cumulative edge, K(z_c < edge) (B+1, n_masses): each crossing in the bin of its own redshift."""
    n_bins = edges_z.size - 1
    by_bin = np.zeros((n_bins, mass.size))
    below = np.zeros((n_bins + 1, mass.size))
    if z_max > z_boxes:
        found = plasma.crossings(mass, z_boxes, z_max)
        b = np.searchsorted(edges_z, found.redshift, side="right") - 1
        inside = (b >= 0) & (b < n_bins)
        np.add.at(by_bin, (b[inside], found.mass_index[inside]), found.kernel_eV[inside])
        for j, edge in enumerate(edges_z):
            under = found.redshift < edge
            below[j] = np.bincount(found.mass_index[under], weights=found.kernel_eV[under], minlength=mass.size)
    return by_bin, below


def run_layout(layout, bins):
    """A run's per-row layout: ``layout`` plus, with bins, each row's cells, streamed in float32
    (:class:`raytrace.core.resultfiles.RowArray` ``streamed``: reduced batch by batch, kept only in a checkpoint)."""
    if bins is None:
        return layout
    from raytrace.core.resultfiles import RowArray

    cells = bins.n_cells
    return dict(layout, kernel_cells=RowArray(lambda r, m: (r, cells, m), np.float32, streamed=True))
