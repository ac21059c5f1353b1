"""Statistics of the redshift-resolved kernel over rays, accumulated batch by batch.

In: per batch of rays, the kernel of each redshift cell per ray and mass (from
the ray kernel, :mod:`raytrace.kernels.zcells`), the cells' bins and classes
(:class:`raytrace.redshiftbins.BinSetup`) and the homogeneous background's part
per bin. Out: :class:`BinnedKernels`: per redshift bin, per density class and per
cumulative edge K(z < edge), the mean, variance and percentiles over rays per
mass; the mean of each (bin, class) pair; optionally every ray's bins.

The run never holds rays x cells x masses: each batch is reduced when it comes
(:class:`BinAccumulator`). Means and variances are exact: each batch's mean and
sum of squared deviations, merged in batch order (Chan, Golub & LeVeque 1983,
Am. Stat. 37, 242), so the statistics do not depend on the order batches finish
in (threads, a cluster, a resume). Percentiles come from a histogram of
log10(K / K_scale) per quantity and mass with 64 bins per decade over 16 decades
(K_scale = pi m^2 / H_100, 1.5e5 eV at m = 1e-14 eV) plus a bin for K = 0, read
at the percentile's rank with log-uniform interpolation inside a bin: good to one
bin, a factor 10^(1/64) = 1.037 (below the range: its lower edge; above: its upper).
The cells are taken in float32 (the checkpoint's precision, so that a resumed run
gives the same bits; 6e-8 relative, far below any Monte Carlo error).
"""

from dataclasses import dataclass

import numpy as np

from raytrace.physics.constants import HBAR_EV_S, MPC_CM

PERCENTILES = (2.5, 16.0, 50.0, 84.0, 97.5)
_PER_DECADE = 64
_LOWEST, _HIGHEST = -12, 4  # log10(K / K_scale) at the histogram's ends
_LOG_BINS = (_HIGHEST - _LOWEST) * _PER_DECADE
_SLOTS = _LOG_BINS + 3  # K = 0, below the range, the log bins, above the range
_H100_EV = HBAR_EV_S * 1.0e7 / MPC_CM  # hbar times 100 km/s/Mpc (1e7 cm/s per Mpc), in eV


def kernel_scale(mass_eV):
    """K_scale = pi m^2 / H_100 (eV): where the percentiles' histogram sits for each mass."""
    return np.pi * np.asarray(mass_eV) ** 2 / _H100_EV


@dataclass(frozen=True, eq=False)
class BinnedKernels:
    """The redshift-resolved kernel of a sightline run (eV), statistics over its rays.

    ``edges_z`` (B+1) bin edges; ``density_edges`` the class edges in D*; ``names``
    the classes (the boxes' and, last, the homogeneous background's). Per mass:
    ``bin_mean``/``bin_m2`` (B, m): mean and sum of squared deviations of K per bin;
    ``bin_percentiles`` (5, B, m) at :data:`PERCENTILES`; the same for ``class_*``
    (C, m) and ``cumulative_*`` (B+1, m), K(z_c < edge); ``joint_mean`` (B, C, m);
    ``background_bins`` (B, m) the background's part of each bin (the same on every
    ray); ``bin_hits`` (B, m) the number of rays with a kernel from the boxes in each bin; ``ray_bins``
    (n_rays, B, m) each ray's bins, where they were kept.
    """

    edges_z: np.ndarray
    density_edges: np.ndarray
    names: tuple
    n_rays: int
    bin_mean: np.ndarray
    bin_m2: np.ndarray
    bin_percentiles: np.ndarray
    class_mean: np.ndarray
    class_m2: np.ndarray
    class_percentiles: np.ndarray
    cumulative_mean: np.ndarray
    cumulative_m2: np.ndarray
    cumulative_percentiles: np.ndarray
    joint_mean: np.ndarray
    background_bins: np.ndarray
    bin_hits: np.ndarray
    ray_bins: np.ndarray = None

    def __post_init__(self):
        for name, value in vars(self).items():
            if isinstance(value, np.ndarray):
                value.flags.writeable = False

    @property
    def n_bins(self):
        return self.edges_z.size - 1

    def variance(self, kind="bin"):
        """Variance over rays (ddof=1) of ``kind`` ("bin", "class", "cumulative"); nan for one ray."""
        m2 = getattr(self, f"{kind}_m2")
        return m2 / (self.n_rays - 1) if self.n_rays > 1 else np.full(m2.shape, np.nan)

    def standard_error(self, kind="bin"):
        """Monte Carlo standard error of the mean of ``kind``."""
        return np.sqrt(self.variance(kind) / self.n_rays)

    def derivative(self):
        """dK/dz per bin and mass (B, m): each bin's mean over its width."""
        return self.bin_mean / np.diff(self.edges_z)[:, None]

    def class_share(self):
        """Each class's share of <K> per mass (C, m); nan where <K> is 0."""
        total = self.class_mean.sum(axis=0)
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(total > 0, self.class_mean / np.where(total > 0, total, 1.0), np.nan)


#: name -> (unit, description) of the datasets in group "redshift_bins" of a sightline result file.
BINNED_DATASETS = {
    "edges_z": ("1", "edges of the redshift bins in z"),
    "density_edges": ("1", "edges of the density classes in D* = (m / mbar_gamma(z_c))^2 at the crossing"),
    "bin_mean": ("eV", "mean over rays of the kernel of the crossings in each redshift bin, per bin and mass"),
    "bin_m2": ("eV^2", "sum over rays of squared deviations from bin_mean; variance = bin_m2 / (n_rays - 1)"),
    "bin_percentiles": ("eV", "percentiles over rays (attribute 'percentiles') of each bin's kernel, per bin and "
                        "mass, to a factor 1.037"),
    "class_mean": ("eV", "mean over rays of the kernel of the crossings in each density class (attribute "
                   "'classes'), per class and mass"),
    "class_m2": ("eV^2", "sum over rays of squared deviations from class_mean"),
    "class_percentiles": ("eV", "percentiles over rays of each class's kernel, per class and mass, to a factor 1.037"),
    "cumulative_mean": ("eV", "mean over rays of K(z_c < edge), the kernel of the crossings below each bin edge"),
    "cumulative_m2": ("eV^2", "sum over rays of squared deviations from cumulative_mean"),
    "cumulative_percentiles": ("eV", "percentiles over rays of K(z_c < edge), per edge and mass, to a factor 1.037"),
    "joint_mean": ("eV", "mean over rays of the kernel per redshift bin, density class and mass"),
    "background_bins": ("eV", "the homogeneous background's part of each bin, the same on every ray"),
    "bin_hits": ("1", "number of rays with a kernel from the boxes in each redshift bin, per bin and mass"),
    "ray_bins": ("eV", "every ray's kernel per redshift bin and mass"),
}


def binned_group(binned):
    """``binned`` as the (datasets, attributes) of a result file's group "redshift_bins"
    (:func:`raytrace.core.resultfiles.write_group`)."""
    import json

    datasets = {name: (getattr(binned, name), unit, description) for name, (unit, description) in BINNED_DATASETS.items()
                if getattr(binned, name) is not None}
    return datasets, {"n_rays": binned.n_rays, "classes": json.dumps(list(binned.names)), "percentiles": PERCENTILES}


def read_binned(group):
    """The :class:`BinnedKernels` of a group read back from a result file (``(datasets, attributes)``), or None."""
    import json

    if group is None:
        return None
    datasets, attributes = group
    return BinnedKernels(names=tuple(json.loads(attributes["classes"])), n_rays=int(attributes["n_rays"]),
                         **{name: datasets.get(name) for name in BINNED_DATASETS})


class BinAccumulator:
    """Reduces each batch's cells to :class:`BinnedKernels` statistics, never holding all rays' cells."""

    #: The per-row arrays a batch brings (and a resume reads back).
    names = ("kernel_cells",)

    @classmethod
    def for_run(cls, setup, mass_eV, plasma, z_end, kernel_background, n_rays, keep_rays=False):
        """The accumulator of a run whose boxes serve up to ``setup.z_boxes`` and the background up to ``z_end``."""
        from raytrace.tracing.checks import check_run_memory
        from raytrace.tracing.redshiftbins import background_by_bin

        if keep_rays:  # each kept bin takes a sixth of a ray's 48 bytes per mass
            check_run_memory(n_rays, mass_eV.size * (1 + setup.n_bins / 6), "n_rays, mass_eV and redshift_bins with "
                             "keep_ray_bins (--rays, --mass-count, --redshift-bins, --keep-ray-bins)")
        by_bin, below = background_by_bin(plasma, mass_eV, setup.z_boxes, z_end, setup.edges_z)
        return cls(setup, mass_eV, by_bin, below, np.asarray(kernel_background, dtype=float), n_rays, keep_rays)

    def __init__(self, setup, mass_eV, background_bins, background_below, background_total, n_rays,
                 keep_rays=False):
        self.setup = setup
        self.background_bins = background_bins
        self.scale = kernel_scale(mass_eV)
        n_masses = setup.cell_bin.shape[0]
        b, c = setup.n_bins, setup.n_classes
        # Per mass, which cells make each quantity of a ray: its bins, classes and cumulative edges.
        self.select = np.concatenate([setup.bin_selector(), setup.class_selector(), setup.below_selector()],
                                     axis=2).astype(np.float64)
        # The background's part of each quantity, the same on every ray: the rays' statistics are taken
        # without it (so the histogram resolves the boxes' part alone) and it is added to means and
        # percentiles at the end, exactly.
        self.offset = np.zeros((self.select.shape[2], n_masses))
        self.offset[:b] = background_bins
        self.offset[b + c - 1] = background_total  # the background's own class (no cell of the boxes is in it)
        self.offset[b + c:] = background_below
        # int32: half the cache lines of int64 (a run of 2^31 rays is far off)
        self.histogram = np.zeros((self.select.shape[2], n_masses, _SLOTS), dtype=np.int32)
        self.pending, self.next_batch = {}, 0
        self.count, self.mean, self.m2, self.cell_sum = 0, 0.0, 0.0, 0.0
        self.ray_bins = np.zeros((n_rays, b, n_masses)) if keep_rays else None

    def add(self, batch, start, arrays):
        """Take one batch's ``arrays["kernel_cells"]`` (rays, cells, masses), rows ``start``... of the run."""
        from raytrace.kernels.histogram import batch_statistics

        cells = np.asarray(arrays["kernel_cells"], dtype=np.float32).astype(np.float64)
        # (quantities, masses, rays): each quantity's rays side by side for the reduction's one pass.
        values = np.ascontiguousarray(np.matmul(cells.transpose(2, 0, 1), self.select).transpose(2, 0, 1))
        mean, squares = np.empty(values.shape[:2]), np.empty(values.shape[:2])
        # The slot of K is floor((log10(K / K_scale) - lowest) 64), written with log2.
        per_log2 = _PER_DECADE * np.log10(2.0)
        batch_statistics(values, per_log2, np.log2(self.scale) * per_log2 + _LOWEST * _PER_DECADE, _LOG_BINS,
                         self.histogram, mean, squares)
        if self.ray_bins is not None:
            rows = len(cells)
            self.ray_bins[start:start + rows] = values[:self.setup.n_bins].transpose(2, 0, 1) + self.background_bins
        self.pending[batch] = (len(cells), mean, squares, cells.sum(axis=0))
        while self.next_batch in self.pending:
            self._merge(*self.pending.pop(self.next_batch))
            self.next_batch += 1

    def _merge(self, count, mean, m2, cell_sum):
        total = self.count + count
        delta = mean - self.mean
        self.mean = self.mean + delta * (count / total)
        self.m2 = self.m2 + m2 + delta**2 * (self.count * count / total)
        self.cell_sum = self.cell_sum + cell_sum
        self.count = total

    def finish(self):
        """The :class:`BinnedKernels` of every batch added."""
        if self.pending:
            raise RuntimeError(f"binned statistics: batches {sorted(self.pending)} came without those before them")
        setup = self.setup
        b, c = setup.n_bins, setup.n_classes
        mean = self.mean + self.offset
        m2 = self.m2 + np.zeros_like(self.offset)
        percentiles = histogram_percentiles(self.histogram, self.count, self.scale) + self.offset[None]
        # Each (bin, class) pair's mean is linear in the cells': from their mean, with the background's pairs.
        pairs = np.einsum("cm,mcq->qm", self.cell_sum / self.count, setup.pair_selector()).reshape(b, c, -1)
        pairs[:, c - 1] += self.background_bins
        return BinnedKernels(setup.edges_z, setup.density_edges, setup.names, self.count,
                             mean[:b], m2[:b], percentiles[:, :b], mean[b:b + c], m2[b:b + c], percentiles[:, b:b + c],
                             mean[b + c:], m2[b + c:], percentiles[:, b + c:], pairs, self.background_bins,
                             self.count - self.histogram[:b, :, 0], self.ray_bins)


def histogram_percentiles(histogram, count, scale, q=PERCENTILES):
    """(len(q), quantities, masses) values at the percentiles ``q`` of ``histogram`` (quantities, masses, slots).

    As numpy's default ("linear"): the percentile sits at position q/100 (count - 1) among the sorted
    values, between its two neighbours; each of those is read from the histogram at the middle of its
    share of its slot (log-uniform inside a slot).
    """
    cumulative = np.cumsum(histogram, axis=-1)
    out = np.empty((len(q),) + histogram.shape[:2])
    for i, percent in enumerate(q):
        position = percent / 100.0 * (count - 1)
        below = np.floor(position)
        low = _order_statistic(histogram, cumulative, below)
        high = _order_statistic(histogram, cumulative, min(below + 1, count - 1))
        out[i] = (low + (position - below) * (high - low)) * scale[None, :]
    return out


def _order_statistic(histogram, cumulative, index):
    """The value (over K_scale) of the sorted values' element ``index`` (0-based), per quantity and mass."""
    edges = 10.0 ** (_LOWEST + np.arange(_LOG_BINS + 1) / _PER_DECADE)
    lower = np.concatenate([[0.0, edges[0]], edges[:-1], [edges[-1]]])
    upper = np.concatenate([[0.0, edges[0]], edges[1:], [edges[-1]]])
    slot = np.minimum((cumulative <= index).sum(axis=-1), _SLOTS - 1)
    inside = np.take_along_axis(histogram, slot[..., None], -1)[..., 0]
    before = np.take_along_axis(cumulative, slot[..., None], -1)[..., 0] - inside
    fraction = (index - before + 0.5) / np.maximum(inside, 1)
    low, high = lower[slot], upper[slot]
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(low > 0, low * (high / np.where(low > 0, low, 1.0)) ** fraction, 0.0)
