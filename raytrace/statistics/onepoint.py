"""The mean kernel from the one-point PDF of the boxes, without rays (PHYSICS.md section 4).

In: a box series, a mass grid (eV), z_max, and how the boxes serve redshifts
(the same choices as :func:`raytrace.cast_sightlines`). Out: :class:`PdfMean`,
<K>(m) in eV with its own error estimate and provenance, which ``limits`` and
``report`` take like a sightline result.

Averaged over random rays, the sum over crossings is an integral over the path
(the coarea identity), so

    <K>(m) = pi m^2 integral dz p_z(ln n_e,com = L_m - 3 ln(1+z)) / ((1+z)^2 H(z)),

L_m = ln(m^2 / (4 pi alpha / m_e)) and p_z the volume PDF of ln n_e,comoving of the
field the rays sample at z (the analytic PDF method of Caputo, Liu, Mishra-Sharma
& Ruderman 2020, PRL 125, 221303, here on the boxes themselves). Where one
snapshot serves a redshift interval [z_a, z_b) its comoving field is fixed, and
the integral over z of a point's delta function has one root: a point of density
n contributes pi m^2 / (3 (1+z_r) H(z_r)), 1+z_r = (m^2 / (4 pi alpha n / m_e))^(1/3),
when z_a <= z_r < z_b; that is the homogeneous kernel of section 3 at that
point's density. So <K> is the volume average of that, over uniform random points
of the periodic trilinear interpolant (no density floor: empty regions never
resonate). Blended snapshots mix linearly in n_e with a weight linear in z; each
bracketing pair is cut into ``blend_steps`` redshift pieces, each with the blend
frozen at its midpoint (the midpoint rule in z). That is accurate where the PDF is
broad next to the change of the blend across a piece (on a smooth log-normal pair
z = 0 and 1, 4, 16 and 64 pieces agree to 1 %), but a nearly uniform blended pair
loses the blend's own rate d ln n_e,com/dz at each root (a uniform pair whose
density rises by half between z = 0 and 1 comes out up to 20 % off per mass), and
that error is not in the estimate below: :class:`FrozenBlendWarning` says so in one
line, with the size of that rate next to the expansion's.

Method and error: the points are a stratified uniform sample (on average
points / N^3 per cell, each group visiting the cells in memory order, which keeps
a large box's reads in cache); their ln n_e are binned (2^16 bins spanning the
densities the masses can resonate at; each bin holds its points' count and mean
ln n_e, so a bin's points sit at their own mean). The points come in ``groups``
independent groups; the error is the standard error of the group estimates plus
a bound on the binning (the content of the bins cut by an interval's edge),
plus 1e-6 of <K> for the arithmetic.
"""

import math
from dataclasses import dataclass, field

import numpy as np

from raytrace import __version__
from raytrace.boxes import as_series
from raytrace.core.errors import InputError, RaytraceWarning
from raytrace.physics.background import MeanPlasma
from raytrace.physics.constants import PLASMA_MASS2_PER_DENSITY

FORMAT = "raytrace-onepoint-1"
BINS = 1 << 16
#: Default number of random points per box (or per blended pair), over all groups.
POINTS = 1 << 24
#: Relative error bound of the arithmetic (tabulated F, float32 box values): always added.
NUMERICAL = 1e-6
_MASS_CHUNK = 8  # masses per pass over the bins: 8 x 2^16 doubles, 4 MB
#: name -> (unit, description) of the datasets of a one-point-PDF mean (its own file, or a run's group).
PDF_MEAN_DATASETS = {
    "kernel_boxes": ("eV", "one-point-PDF mean of the boxes' kernel per mass, over the run's redshifts"),
    "kernel_background": ("eV", "the homogeneous background's kernel per mass in the one-point-PDF mean"),
    "error": ("eV", "error estimate of the one-point-PDF mean of the boxes' kernel per mass"),
    "bin_edges_z": ("1", "edges in z of the redshift bins of the one-point-PDF mean"),
    "bins_boxes": ("eV", "one-point-PDF mean of the boxes' kernel per redshift bin and mass"),
    "bins_background": ("eV", "the homogeneous background's kernel per redshift bin and mass"),
    "bins_error": ("eV", "error estimate of bins_boxes per redshift bin and mass"),
}
#: The datasets that are one value per mass (the rest are per redshift bin and mass, or bin edges).
PER_MASS = ("kernel_boxes", "kernel_background", "error")
_TABLE = 4097  # nodes of the tabulated F(s) per interval: relative error ~1e-7


@dataclass(frozen=True, eq=False)
class PdfMean:
    """<K>(m) from the one-point PDF of the boxes plus the homogeneous background.

    Attributes
    ----------
    mass_eV : (n_masses,) masses.
    kernel_boxes, kernel_background : <K> in eV from the boxes (z = 0 to z_boxes)
        and from the homogeneous universe beyond them (z_boxes to z_max).
    error : (n_masses,) error estimate of ``kernel`` in eV (the boxes' part; the
        background is exact to its own tables).
    run : dict of what was computed from what (z range, points, groups, seed, boxes).
    bin_edges_z, bins_boxes, bins_background, bins_error : with redshift bins, their
        edges (B+1) and per bin and mass (B, n_masses) the same three (else None).
    """

    mass_eV: np.ndarray
    kernel_boxes: np.ndarray
    kernel_background: np.ndarray
    error: np.ndarray
    run: dict = field(default_factory=dict)
    bin_edges_z: np.ndarray = None
    bins_boxes: np.ndarray = None
    bins_background: np.ndarray = None
    bins_error: np.ndarray = None

    #: The arrays a PdfMean holds (and its file stores), the per-bin ones where there are bins.
    ARRAYS = tuple(PDF_MEAN_DATASETS)

    def __post_init__(self):
        for name in ("mass_eV",) + self.ARRAYS:
            if getattr(self, name) is None:
                continue
            array = np.array(getattr(self, name), dtype=float)
            array.flags.writeable = False
            object.__setattr__(self, name, array)
        object.__setattr__(self, "run", dict(self.run))

    @property
    def bins(self):
        """<K> per redshift bin and mass (B, n_masses), boxes plus background; None without bins."""
        return None if self.bins_boxes is None else self.bins_boxes + self.bins_background

    def __repr__(self):
        return (f"PdfMean({self.mass_eV.size} masses {self.mass_eV[0]:.3g}-{self.mass_eV[-1]:.3g} eV, "
                f"z_max = {self.run.get('z_max')})")

    @property
    def kernel(self):
        """<K> in eV per mass, boxes plus background."""
        return self.kernel_boxes + self.kernel_background

    def mean(self):
        """<K> in eV per mass (the name a sightline result uses)."""
        return self.kernel

    def standard_error(self):
        """The error estimate of <K> in eV per mass."""
        return self.error

    def save(self, path, overwrite=False):
        """Write to HDF5 atomically, with provenance."""
        import h5py

        from raytrace.core.provenance import atomic_output
        from raytrace.core.resultfiles import _check_finite, _write_header, describe

        with atomic_output(path, overwrite=overwrite) as temporary:
            with h5py.File(temporary, "w") as handle:
                _write_header(handle, FORMAT, self.mass_eV, self.run)
                for name, (unit, description) in PDF_MEAN_DATASETS.items():
                    if getattr(self, name) is not None:  # the per-bin ones where there are bins
                        handle[name] = getattr(self, name)
                        describe(handle[name], unit, description)
                handle.attrs["complete"] = True
                _check_finite(handle, path)
        return path

    @classmethod
    def load(cls, path):
        from raytrace.core.resultchecks import check_values, mass_grid, read_arrays, run_record
        from raytrace.core.resultfiles import open_result

        with open_result(path, FORMAT, "one-point-PDF mean") as handle:
            run = run_record(handle, path, ("z_max",))
            mass = mass_grid(handle, path)
            arrays = read_arrays(handle, path, PER_MASS, mass.size, per_mass=True)
            bins = {name: handle[name][...] for name in cls.ARRAYS if name not in PER_MASS and name in handle}
            for name, values in bins.items():
                check_values(values, path, f"dataset {name}", non_negative=True)
            return cls(mass, run=run, **arrays, **bins)


def pdf_mean(series, mass_eV, z_max, include_background=True, z_boxes=None, plasma=None, points=POINTS,
             groups=16, blend_steps=16, seed=0, n_jobs=1, redshift_bins=None):
    """<K>(m) of ``series`` from its one-point PDF (module docstring), as a :class:`PdfMean`.

    ``series``, ``mass_eV``, ``z_max``, ``include_background``, ``z_boxes``,
    ``plasma`` and ``redshift_bins`` (a count or edges; default none here) as in
    :func:`raytrace.cast_sightlines`. ``points``: random points per box (per blended
    pair), split into ``groups`` >= 2 groups for the error; ``seed`` fixes them;
    ``n_jobs`` numba threads. With bins, <K> of each bin comes from the same points:
    the integral over z is cut at the bin edges (PHYSICS.md section 11).
    """
    from raytrace.tracing.checks import background_part, boxes_redshift_range, check_masses, check_seed, numba_threads
    from raytrace.tracing.redshiftbins import background_by_bin, bin_edges

    series = as_series(series)
    mass = check_masses(mass_eV)
    seed = check_seed(seed)
    for name, value, least in (("points", points, 2), ("groups", groups, 2), ("blend_steps", blend_steps, 1)):
        if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < least:
            raise InputError(f"{name}: expected a whole number >= {least}, got {value!r}")
    if not (isinstance(z_max, (int, float)) and math.isfinite(z_max) and z_max > 0):
        raise InputError(f"z_max: expected a positive redshift, got {z_max!r}")
    plasma = plasma if plasma is not None else MeanPlasma()
    z_boxes = boxes_redshift_range(series, plasma, z_max, z_boxes, include_background)
    edges = bin_edges(redshift_bins, z_boxes, z_max, include_background)
    pieces = serving_pieces(series, z_boxes, blend_steps)
    warn_frozen_blend(series, z_boxes, blend_steps)
    per_group = int(points) / int(groups)
    n_bins = 0 if edges is None else edges.size - 1
    # Row 0: the whole range; rows 1..B: the bins.
    estimates = np.zeros((1 + n_bins, groups, mass.size))
    binning = np.zeros((1 + n_bins, mass.size))
    target = np.log(mass**2 / PLASMA_MASS2_PER_DENSITY)
    with numba_threads(n_jobs):
        for key, (z_a, z_b, low, high, weight, share) in enumerate(pieces):
            parts = _piece_kernel(series, plasma.cosmology, target, z_a, z_b, low, high, weight, seed, key,
                                  groups, per_group * share, edges)
            for row, (piece, bound) in parts.items():
                estimates[row] += piece
                binning[row] += bound
    estimates *= np.pi * mass**2
    kernel = estimates.mean(axis=1)
    error = (estimates.std(axis=1, ddof=1) / math.sqrt(groups) + np.pi * mass**2 * binning + NUMERICAL * kernel)
    kernel_boxes = kernel[0]
    kernel_background, _ = background_part(plasma, mass, z_boxes, z_max, include_background)
    error[0] += NUMERICAL * kernel_background  # the background's quadrature, as it would differ from the rays' own
    binned = {}
    if edges is not None:
        by_bin, _ = background_by_bin(plasma, mass, z_boxes, z_max if include_background else z_boxes, edges)
        binned = {"bin_edges_z": edges, "bins_boxes": kernel[1:], "bins_background": by_bin,
                  "bins_error": error[1:] + NUMERICAL * by_bin}
    run = {
        "raytrace": __version__, "method": "one-point PDF of the trilinear interpolant at stratified uniform random points",
        "z_max": float(z_max), "z_boxes": float(z_boxes), "include_background": bool(include_background),
        "seed": int(seed), "points": int(points), "groups": int(groups), "bins": BINS,
        "blend": series.blend, "blend_steps": int(blend_steps), "mass_eV": mass.tolist(),
        "boxes": [box.describe() for box in series.boxes], "ionisation": plasma.ionisation.description,
        "cosmology": plasma.cosmology.name,
    }
    return PdfMean(mass, kernel_boxes, kernel_background, error[0], run, **binned)


class FrozenBlendWarning(RaytraceWarning):
    """The one-point-PDF mean of blended snapshots omits the blend's own rate (module docstring)."""


def blend_rate(low, high):
    """Mean over cells of |d ln n_e,com / dz| of the linear blend of two snapshots,
    |ln(n_hi / n_lo)| / (z_hi - z_lo), over the cells where both are positive."""
    a = np.asarray(low.data, dtype=np.float64) * low.comoving_scale
    b = np.asarray(high.data, dtype=np.float64) * high.comoving_scale
    both = (a > 0) & (b > 0)
    if not both.any():
        return 0.0
    return float(np.mean(np.abs(np.log(b[both] / a[both])))) / (high.redshift - low.redshift)


def warn_frozen_blend(series, z_boxes, blend_steps):
    """One line when blended pairs serve: how large the omitted blend rate is next to the expansion's."""
    import warnings

    if not series.blend or len(series) == 1:
        return
    pairs = [(low, low + 1) for low in range(len(series) - 1) if series.redshifts[low] < z_boxes]
    if not pairs:
        return
    ratio = max(blend_rate(series.boxes[a], series.boxes[b]) * (1.0 + series.redshifts[b]) / 3.0 for a, b in pairs)
    if ratio < 1e-3:  # a blend of (nearly) one field: nothing the frozen blend leaves out could show
        return
    warnings.warn(FrozenBlendWarning(
        f"one-point-PDF mean of blended snapshots: the blend is frozen over 1/{blend_steps} of each pair, which "
        f"leaves out its own rate d ln n_e/dz, up to {100 * ratio:.2g} % of the expansion's here; where the field "
        "is nearly uniform <K> can be off by that much (broad density PDFs: ~1 %), and its stated error does not "
        "include it; the sightline engine solves the blend exactly"), stacklevel=3)


def serving_pieces(series, z_boxes, blend_steps):
    """``[(z_a, z_b, low, high, weight_high, share), ...]``: redshift pieces with a fixed field.

    Without blending: the snapshot nearest in redshift (``BoxSeries.intervals``),
    share 1. With blending: below the first and above the last snapshot the end box
    alone; between two snapshots ``blend_steps`` pieces, each served by the blend at
    its midpoint redshift (``BoxSeries.serving``), with a 1/blend_steps share of the points.
    """
    if not series.blend or len(series) == 1:
        return [(a, b, i, i, 0.0, 1.0) for a, b, i in series.intervals(z_boxes)]
    zs = series.redshifts
    edges = [0.0, float(zs[0])]
    shares = [1.0]
    for lower, upper in zip(zs[:-1], zs[1:]):
        edges += list(np.linspace(lower, upper, blend_steps + 1)[1:])
        shares += [1.0 / blend_steps] * blend_steps
    edges.append(math.inf)
    shares.append(1.0)
    pieces = []
    for a, b, share in zip(edges[:-1], edges[1:], shares):
        a, b = max(a, 0.0), min(b, z_boxes)
        if b > a:
            low, high, weight = series.serving(np.array([0.5 * (a + b)]))
            pieces.append((a, b, int(low[0]), int(high[0]), float(weight[0]), share))
    return pieces


def _piece_kernel(series, cosmology, target, z_a, z_b, low, high, weight, seed, key, groups, points, edges=None):
    """{row: (per group of about ``points`` points, the mean over them of F(L_m - ln n), the binning
    bound)} (both / pi m^2) on one piece (row 0) and on its part in each bin b of ``edges`` (row b + 1).

    F(s) = 1 / (3 (1+z) H(z)) with 3 ln(1+z) = s, for s in [3 ln(1+z_a), 3 ln(1+z_b)).
    """
    from raytrace.kernels.onepoint import interpolant_histograms

    s_a, s_b = 3.0 * math.log1p(z_a), 3.0 * math.log1p(z_b)
    ln_low, ln_high = float(target.min()) - s_b, float(target.max()) - s_a
    width = (ln_high - ln_low) / BINS if ln_high > ln_low else 1.0
    counts = np.zeros((groups, BINS))
    sums = np.zeros((groups, BINS))
    box_a, box_b = series.boxes[low], series.boxes[high]
    drawn = np.zeros(groups)
    interpolant_histograms(box_a.data, box_a.comoving_scale, box_b.data, box_b.comoving_scale, float(weight),
                           int(seed), int(key), float(points / box_a.n_cells**3), ln_low, 1.0 / width, counts, sums,
                           drawn)
    parts = {0: _interval_kernel(cosmology, target, counts, sums, drawn, ln_low, width, s_a, s_b)}
    for b in range(0 if edges is None else edges.size - 1):
        z_low, z_high = max(z_a, edges[b]), min(z_b, edges[b + 1])
        if z_high > z_low:
            parts[b + 1] = _interval_kernel(cosmology, target, counts, sums, drawn, ln_low, width,
                                            3.0 * math.log1p(z_low), 3.0 * math.log1p(z_high))
    return parts


def _interval_kernel(cosmology, target, counts, sums, drawn, ln_low, width, s_a, s_b):
    """(per group, the mean of F(L_m - ln n) over its points; the binning bound) for s in [s_a, s_b)."""
    n_points = drawn[:, None]
    s_table = np.linspace(s_a, s_b, _TABLE)
    one_plus_z = np.exp(s_table / 3.0)
    f_table = 1.0 / (3.0 * one_plus_z * cosmology.hubble_eV(one_plus_z - 1.0))
    # The points of a bin sit at the bin's mean ln n_e (pooled over the groups).
    pooled = counts.sum(axis=0)
    filled = np.flatnonzero(pooled)
    ln_n = sums[:, filled].sum(axis=0) / pooled[filled]
    # Masses in chunks: a (masses x bins) array at once would be 64 MB per copy for 128 masses.
    out = np.empty((counts.shape[0], target.size))
    filled_counts = counts[:, filled]
    for first in range(0, target.size, _MASS_CHUNK):
        s = target[first:first + _MASS_CHUNK, None] - ln_n[None, :]
        inside = (s >= s_a) & (s < s_b)
        values = np.zeros(s.shape)
        values[inside] = np.interp(s[inside], s_table, f_table)  # only there: a bin's range is narrow
        out[:, first:first + _MASS_CHUNK] = filled_counts @ values.T / n_points
    # A bin cut by an edge of the piece may hold points on either side: bound their share.
    total = pooled / drawn.sum()
    bound = np.zeros(target.size)
    for s_edge, f_edge in ((s_a, f_table[0]), (s_b, f_table[-1])):
        index = np.floor((target - s_edge - ln_low) / width).astype(int)
        ok = (index >= 0) & (index < BINS)
        bound[ok] += f_edge * total[index[ok]]
    return out, bound
