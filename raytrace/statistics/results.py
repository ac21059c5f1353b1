"""Statistics of a sightline run, and the public call that makes one.

In: per-ray arrays from :mod:`raytrace.tracing` (kernel from the boxes, crossing
counts, dispersion measures, directions) plus the homogeneous-background part.
Out: :class:`SightlineResult` with the mean, variance, standard error,
percentiles, bootstrap error of the variance and P(epsilon, omega_0); saved to
and loaded from HDF5 with provenance (the file format is
:mod:`raytrace.core.resultfiles`'s), with the built-in check of
:mod:`raytrace.statistics.meancheck` attached by :func:`cast_sightlines`.
"""

from functools import partial

import numpy as np

from raytrace.core.errors import InputError, float_array
from raytrace.core.resultfiles import ROW_DATASETS, open_result, read_group, read_rows, save_rows, write_rows
from raytrace.physics.conversion import probability_from_kernel
from raytrace.statistics.binstats import BinAccumulator, binned_group, read_binned
from raytrace.statistics.meancheck import check_groups, mean_check, pdf_check_group, read_pdf_check, warn_on_mismatch
from raytrace.statistics.onepoint import FORMAT as PDF_MEAN_FORMAT
from raytrace.statistics.onepoint import PER_MASS, PdfMean
from raytrace.statistics.spread import Columns
from raytrace.tracing.checks import DEFAULT_PHOTON_ENERGY_EV, check_background
from raytrace.tracing.redshiftbins import DEFAULT_BIN_COUNT, DEFAULT_DENSITY_EDGES
from raytrace.tracing.sightlines import FORMAT, SIGHTLINE_LAYOUT, trace_sightlines

PERCENTILES = (2.5, 16.0, 50.0, 84.0, 97.5)


class KernelRows:
    """What sightline and sky results share: per-row (ray or pixel) kernels from the boxes
    plus the homogeneous background beyond them, and the same for the dispersion measure."""

    #: The one-point-PDF mean over the same redshifts (:mod:`raytrace.statistics.meancheck`), when computed.
    pdf_check = None
    #: The kernel per redshift bin and density class (:class:`raytrace.binstats.BinnedKernels`), when asked.
    redshift_bins = None

    def mean_check(self):
        """The Monte Carlo mean against :attr:`pdf_check` per mass (a MeanCheck), or None without one."""
        return mean_check(self)

    def stored_groups(self):
        """The groups of the result file beside the per-row arrays: the built-in check's, when there is one."""
        return {} if self.pdf_check is None else {"pdf_mean": pdf_check_group(self.pdf_check)}

    @property
    def kernel(self):
        """K in eV per row and mass, boxes plus background; P = epsilon^2 K / omega_0."""
        return self.kernel_boxes + self.kernel_background[None, :]

    def columns(self, name="kernel", masses=None, scale=1.0):
        """The per-row values of ``name`` at the mass indices ``masses`` (default all) times ``scale``, as
        :class:`~raytrace.statistics.spread.Columns` (a sky reads them from its file one map at a time)."""
        values = getattr(self, name)
        return Columns.of((values if masses is None else values[:, list(masses)]) * scale)

    @property
    def dispersion_measure(self):
        """DM to z_max in pc cm^-3 per row, boxes plus background."""
        return self.dispersion_measure_boxes + self.dispersion_measure_background

    def saturates(self, epsilon, omega0_eV):
        """Whether P = epsilon^2 K / omega_0 leaves the linear regime on some row and mass (then P is
        given in the saturating form; :func:`raytrace.physics.conversion.needs_saturation` warns once)."""
        from raytrace.physics.conversion import needs_saturation

        cache = self.__dict__.setdefault("_saturation", {})
        key = (float(epsilon), float(omega0_eV))
        if key not in cache:
            cache[key] = needs_saturation(self.kernel, epsilon, omega0_eV)
        return cache[key]

    def tangent_events_per_row(self):
        """Mean number of near-tangent (Airy) events per row, per mass."""
        return self.tangent_events.mean(axis=0)

    def tangent_share(self):
        """Share of the boxes' kernel carried by near-tangent (Airy) events, per mass (nan where 0)."""
        total = self.kernel_boxes.sum(axis=0)
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(total > 0, self.kernel_tangent.sum(axis=0) / total, np.nan)

    def _mass_range(self):
        return f"{self.mass_eV.size} masses {self.mass_eV[0]:.3g}-{self.mass_eV[-1]:.3g} eV, z_max = {self.run.get('z_max')}"


class SightlineResult(KernelRows):
    """Conversion kernels of many independent sightlines.

    Attributes
    ----------
    mass_eV : (n_masses,) dark-photon masses.
    kernel : (n_rays, n_masses) K in eV per ray, boxes plus background; P = epsilon^2 K / omega_0.
    kernel_boxes, kernel_background : the part the boxes gave (per ray) and the
        homogeneous-background part beyond the boxes (same for every ray).
    crossings : (n_rays, n_masses) number of resonances inside the boxes.
    tangent_events, kernel_tangent : (n_rays, n_masses) number of near-tangent
        pairs (and near misses) taken in the Airy form, and the kernel they gave
        (part of kernel_boxes); evaluated at ``run["photon_energy_eV"]``.
    dispersion_measure : (n_rays,) DM to z_max in pc cm^-3 (boxes plus background).
    direction : (n_rays, 3) unit vectors.
    run : dict of the run's parameters (seed, z_max, photon energy, boxes, checksums, ...).
    """

    def __init__(self, mass_eV, kernel_boxes, kernel_background, crossings, dispersion_measure_boxes,
                 dispersion_measure_background, direction, run, tangent_events=None, kernel_tangent=None):
        self.mass_eV = np.asarray(mass_eV, dtype=float)
        self.kernel_boxes = np.asarray(kernel_boxes, dtype=float)
        self.kernel_background = np.asarray(kernel_background, dtype=float)
        self.crossings = np.asarray(crossings)
        self.dispersion_measure_boxes = np.asarray(dispersion_measure_boxes, dtype=float)
        self.dispersion_measure_background = float(dispersion_measure_background)
        self.direction = np.asarray(direction, dtype=float)
        self.tangent_events, self.kernel_tangent = tangent_arrays(self.kernel_boxes, tangent_events, kernel_tangent)
        self.run = dict(run)
        for array in (self.mass_eV, self.kernel_boxes, self.kernel_background, self.crossings,
                      self.dispersion_measure_boxes, self.direction, self.tangent_events, self.kernel_tangent):
            array.flags.writeable = False

    def stored_groups(self):
        """The groups beside the per-ray arrays: the built-in check's and the redshift bins', where there are."""
        groups = super().stored_groups()
        if self.redshift_bins is not None:
            groups["redshift_bins"] = binned_group(self.redshift_bins)
        return groups

    def __repr__(self):
        return f"SightlineResult({self.n_rays} rays, {self._mass_range()})"

    @property
    def n_rays(self):
        return self.kernel_boxes.shape[0]

    # -- statistics ---------------------------------------------------------------
    def mean(self):
        """Mean kernel over rays (eV), per mass."""
        return self.kernel.mean(axis=0)

    def variance(self):
        """Variance of the kernel between rays (eV^2), per mass (unbiased, ddof=1)."""
        return self.kernel.var(axis=0, ddof=1) if self.n_rays > 1 else np.full(self.mass_eV.size, np.nan)

    def standard_error(self):
        """Standard error of the mean kernel (eV), per mass."""
        return np.sqrt(self.variance() / self.n_rays)

    def percentiles(self, q=PERCENTILES):
        """Kernel percentiles between rays, shape (len(q), n_masses) (``q`` one number: (n_masses,))."""
        levels = float_array(q, "q (percentiles)")
        if levels.size == 0 or not np.all(np.isfinite(levels) & (levels >= 0) & (levels <= 100)):
            raise InputError(f"q (percentiles): expected percentiles from 0 to 100, got {q!r}")
        return np.percentile(self.kernel, levels, axis=0)

    def variance_error(self, n_resamples=200, seed=0):
        """Bootstrap standard error of :meth:`variance`, per mass."""
        if self.n_rays < 2:
            raise InputError("variance_error: needs at least 2 rays")
        rng = np.random.default_rng(seed)
        kernel = self.kernel
        samples = np.empty((n_resamples, self.mass_eV.size))
        for b in range(n_resamples):
            pick = rng.integers(0, self.n_rays, self.n_rays)
            samples[b] = kernel[pick].var(axis=0, ddof=1)
        return samples.std(axis=0, ddof=1)

    def probability(self, epsilon, omega0_eV, saturate=None):
        """P per ray and mass for mixing ``epsilon`` and observed photon energy ``omega0_eV``: linear,
        or (``saturate`` None) in the saturating form where the linear one is not small (:meth:`saturates`)."""
        saturate = self.saturates(epsilon, omega0_eV) if saturate is None else saturate
        return probability_from_kernel(self.kernel, epsilon, omega0_eV, saturate=saturate)

    def boxes_fraction(self):
        """Fraction of the mean kernel the boxes contributed, per mass (nan where the mean is 0)."""
        mean = self.mean()
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(mean > 0, self.kernel_boxes.mean(axis=0) / mean, np.nan)

    # -- files ------------------------------------------------------------------------
    def save(self, path, overwrite=False):
        """Write the result to HDF5 atomically, with its provenance."""
        return save_rows(path, overwrite, FORMAT, self.mass_eV, self.run, SIGHTLINE_LAYOUT, self.n_rays,
                         {"kernel_background": self.kernel_background},
                         {"dispersion_measure_background": self.dispersion_measure_background}, self.stored_groups(),
                         lambda handle: write_rows(handle, SIGHTLINE_LAYOUT, 0, vars(self), path))

    @classmethod
    def load(cls, path):
        """Read a result written by :meth:`save` or by a run."""
        with open_result(path, FORMAT, "sightline") as handle:
            return cls.from_file(handle)

    @classmethod
    def from_file(cls, handle):
        """The result an open, complete result file holds, every piece checked (read whole: a sightline
        run's rows fit in memory)."""
        run, mass, arrays, dm_background = read_rows(handle, handle.filename, ROW_DATASETS + ("direction",))
        result = cls(mass, arrays["kernel_boxes"], arrays["kernel_background"], arrays["crossings"],
                     arrays["dispersion_measure_boxes"], dm_background, arrays["direction"], run,
                     tangent_events=arrays["tangent_events"], kernel_tangent=arrays["kernel_tangent"])
        result.pdf_check = read_pdf_check(read_group(handle, "pdf_mean", mass.size, PER_MASS), result.mass_eV)
        result.redshift_bins = read_binned(read_group(handle, "redshift_bins", mass.size))
        return result


def tangent_arrays(kernel_boxes, tangent_events, kernel_tangent):
    """The near-tangent arrays of a result: zeros of the kernel's shape where none are given."""
    shape = np.shape(kernel_boxes)
    events = np.zeros(shape, dtype=np.int32) if tangent_events is None else np.asarray(tangent_events)
    kernel = np.zeros(shape) if kernel_tangent is None else np.asarray(kernel_tangent, dtype=float)
    if events.shape != shape or kernel.shape != shape:
        raise InputError(f"tangent_events, kernel_tangent: expected the kernel's shape {shape}")
    return events, kernel


def load_mean_result(path):
    """A :class:`~raytrace.statistics.onepoint.PdfMean` or a :class:`SightlineResult` from its file, by its format attribute."""
    import h5py

    try:
        with h5py.File(path, "r") as handle:
            kind = handle.attrs.get("format")
    except OSError:
        kind = None  # SightlineResult.load says what is wrong with the file
    return PdfMean.load(path) if kind == PDF_MEAN_FORMAT else SightlineResult.load(path)


def cast_sightlines(series, mass_eV, n_rays, z_max, seed=0, n_jobs=1, include_background=True, z_boxes=None,
                    batch_size=256, plasma=None, backend=None, progress=False, executor=None,
                    photon_energy_eV=DEFAULT_PHOTON_ENERGY_EV, redshift_bins=DEFAULT_BIN_COUNT,
                    density_classes=DEFAULT_DENSITY_EDGES, keep_ray_bins=False, device="cpu", **removed):
    """Cast ``n_rays`` random sightlines from z = 0 to ``z_max`` through ``series``.

    Returns a :class:`SightlineResult` carrying its built-in check (the
    one-point-PDF mean over the same redshifts, :mod:`raytrace.statistics.meancheck`).

    Parameters
    ----------
    series : BoxSeries, Box or list of Box
    mass_eV : sorted array of dark-photon masses in eV
    n_rays : number of sightlines
    z_max : redshift the rays reach (last scattering: ~1100)
    seed : ray i draws from a stream fixed by (seed, i) alone
    n_jobs : numba threads (-1: all cores)
    include_background : boxes serve up to ``z_boxes`` (default: the highest
        snapshot's redshift) and the homogeneous background the rest; if False
        the boxes serve all of 0..z_max
    batch_size : rays per batch (results do not depend on it)
    plasma : MeanPlasma for the background part (default: CAMB, Planck 2018)
    backend : MemoryBackend (default) or HDF5Backend (the result file written batch by
        batch, resumable), both in :mod:`raytrace.tracing.backends`
    executor : optional callable ``executor(tracer, batches)`` that runs the
        batches ``(batch, start, stop)`` elsewhere (a cluster) and yields
        ``(batch, start, arrays)`` as they complete; if it has a ``prepare(tracer)``
        method, that is called before anything is written, to refuse early
        (e.g. :class:`raytrace.tracing.cluster.DaskExecutor`)
    photon_energy_eV : observed photon energy (eV) at which near-tangent pairs take
        their Airy form (PHYSICS.md section 9); every other crossing's kernel is
        frequency-free. Default: k T_0.
    redshift_bins : the kernel per redshift bin as well (:mod:`raytrace.tracing.redshiftbins`): a count
        (equal steps in ln(1+z) over the boxes' redshifts, the background beyond in one bin;
        default 16), edges in z, or None; the result's ``redshift_bins`` holds the mean,
        variance and percentiles over rays per bin, per density class and per cumulative edge
        (:class:`raytrace.statistics.binstats.BinnedKernels`)
    density_classes : edges in D* = (m / mbar_gamma(z_c))^2 of the crossings' density classes
        (default 1 and 100: voids, sheets and filaments, halos)
    keep_ray_bins : also keep every ray's bins (rays x bins x masses) in the result
    device : "cpu", "gpu" (CUDA through numba-cuda: the ``gpu`` extra) or "auto"
        (a GPU where numba-cuda sees one, else the CPU); the run records the
        device used. Per ray, a GPU's rows equal the CPU's to rounding.
    """
    plasma = check_background(plasma)
    traced = trace_sightlines(series, mass_eV, n_rays, z_max, seed=seed, n_jobs=n_jobs,
                              include_background=include_background, z_boxes=z_boxes, batch_size=batch_size,
                              plasma=plasma, backend=backend, progress=progress, executor=executor,
                              photon_energy_eV=photon_energy_eV, redshift_bins=redshift_bins,
                              density_classes=density_classes, groups=check_groups(series, plasma, n_jobs),
                              reducer=partial(BinAccumulator.for_run, keep_rays=bool(keep_ray_bins)), device=device,
                              **removed)
    bins = None if traced.reducer is None else traced.reducer.finish()
    with traced.backend.finish({} if bins is None else {"redshift_bins": binned_group(bins)}) as handle:
        result = SightlineResult.from_file(handle)
    return warn_on_mismatch(result)
