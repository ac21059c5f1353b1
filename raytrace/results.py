"""Statistics of a sightline run, and where its arrays live while it runs.

In: per-ray arrays from the engine (kernel from the boxes, crossing counts,
dispersion measures, directions) plus the homogeneous-background part.
Out: :class:`SightlineResult` with the mean, variance, standard error,
percentiles, bootstrap error of the variance and P(epsilon, omega_0); saved to
and loaded from HDF5 with provenance.

Two interchangeable backends hold the arrays during a run, with one
interface: :class:`MemoryBackend`, and :class:`HDF5Backend`, which appends each
finished batch to a checkpoint file and flushes it, so that an interrupted run
resumes from its last complete batch.
"""

import json
import os
from pathlib import Path

import h5py
import numpy as np

from .conversion import probability_from_kernel
from .errors import InputError
from .provenance import atomic_output, check_writable, provenance_json

FORMAT = "raytrace-sightlines-1"
PERCENTILES = (2.5, 16.0, 50.0, 84.0, 97.5)

# name -> (shape from (n_rays, n_masses), dtype): the per-ray arrays a run fills.
_PER_RAY = {
    "kernel_boxes": (lambda r, m: (r, m), np.float64),
    "crossings": (lambda r, m: (r, m), np.int32),
    "dispersion_measure_boxes": (lambda r, m: (r,), np.float64),
    "direction": (lambda r, m: (r, 3), np.float64),
}


class SightlineResult:
    """Conversion kernels of many independent sightlines.

    Attributes
    ----------
    mass_eV : (n_masses,) dark-photon masses.
    kernel : (n_rays, n_masses) K in eV per ray, boxes plus background; P = epsilon^2 K / omega_0.
    kernel_boxes, kernel_background : the part the boxes gave (per ray) and the
        homogeneous-background part beyond the boxes (same for every ray).
    crossings : (n_rays, n_masses) number of resonances inside the boxes.
    dispersion_measure : (n_rays,) DM to z_max in pc cm^-3 (boxes plus background).
    direction : (n_rays, 3) unit vectors.
    run : dict of the run's parameters (seed, z_max, step, boxes, checksums, ...).
    """

    def __init__(self, mass_eV, kernel_boxes, kernel_background, crossings, dispersion_measure_boxes,
                 dispersion_measure_background, direction, run):
        self.mass_eV = np.asarray(mass_eV, dtype=float)
        self.kernel_boxes = np.asarray(kernel_boxes, dtype=float)
        self.kernel_background = np.asarray(kernel_background, dtype=float)
        self.crossings = np.asarray(crossings)
        self.dispersion_measure_boxes = np.asarray(dispersion_measure_boxes, dtype=float)
        self.dispersion_measure_background = float(dispersion_measure_background)
        self.direction = np.asarray(direction, dtype=float)
        self.run = dict(run)
        for array in (self.mass_eV, self.kernel_boxes, self.kernel_background, self.crossings,
                      self.dispersion_measure_boxes, self.direction):
            array.flags.writeable = False

    def __repr__(self):
        return (f"SightlineResult({self.n_rays} rays, {self.mass_eV.size} masses "
                f"{self.mass_eV[0]:.3g}-{self.mass_eV[-1]:.3g} eV, z_max = {self.run.get('z_max')})")

    @property
    def n_rays(self):
        return self.kernel_boxes.shape[0]

    @property
    def kernel(self):
        return self.kernel_boxes + self.kernel_background[None, :]

    @property
    def dispersion_measure(self):
        return self.dispersion_measure_boxes + self.dispersion_measure_background

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
        """Kernel percentiles between rays, shape (len(q), n_masses)."""
        return np.percentile(self.kernel, q, axis=0)

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

    def probability(self, epsilon, omega0_eV, saturate=False):
        """P per ray and mass for mixing ``epsilon`` and observed photon energy ``omega0_eV``."""
        return probability_from_kernel(self.kernel, epsilon, omega0_eV, saturate=saturate)

    def boxes_fraction(self):
        """Fraction of the mean kernel the boxes contributed, per mass (nan where the mean is 0)."""
        mean = self.mean()
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(mean > 0, self.kernel_boxes.mean(axis=0) / mean, np.nan)

    # -- files ------------------------------------------------------------------------
    def save(self, path, overwrite=False):
        """Write the result to HDF5 atomically, with its provenance."""
        with atomic_output(path, overwrite=overwrite) as temporary:
            with h5py.File(temporary, "w") as handle:
                _write_header(handle, self.mass_eV, self.run)
                for name in _PER_RAY:
                    handle.create_dataset(name, data=getattr(self, name), compression="gzip", shuffle=True)
                handle["kernel_background"] = self.kernel_background
                handle.attrs["dispersion_measure_background"] = self.dispersion_measure_background
                handle.attrs["complete"] = True
                _check_finite(handle, path)
        return Path(path)

    @classmethod
    def load(cls, path):
        """Read a result written by :meth:`save` (or a completed checkpoint)."""
        path = Path(path)
        if not path.exists():
            raise InputError(f"{path}: result file not found")
        try:
            handle = h5py.File(path, "r")
        except OSError as error:
            raise InputError(f"{path}: not a readable HDF5 file ({error})") from None
        with handle:
            if handle.attrs.get("format") != FORMAT:
                raise InputError(f"{path}: not a raytrace sightline result (attribute 'format' is not {FORMAT!r})")
            if not handle.attrs.get("complete", False):
                raise InputError(f"{path}: the run is not complete; finish it with --resume")
            return cls(
                handle["mass_eV"][...],
                handle["kernel_boxes"][...],
                handle["kernel_background"][...],
                handle["crossings"][...],
                handle["dispersion_measure_boxes"][...],
                handle.attrs["dispersion_measure_background"],
                handle["direction"][...],
                json.loads(handle.attrs["run"]),
            )


def _write_header(handle, mass_eV, run):
    handle.attrs["format"] = FORMAT
    handle.attrs["run"] = json.dumps(run, sort_keys=True, default=str)
    handle.attrs["provenance"] = provenance_json(run=run)
    handle["mass_eV"] = mass_eV
    handle["mass_eV"].attrs["unit"] = "eV"


def _check_finite(handle, path):
    for name, item in handle.items():
        if item.dtype.kind == "f" and not np.all(np.isfinite(item[...])):
            raise InputError(f"{path}: dataset {name} would hold NaN or inf; nothing was written")


class MemoryBackend:
    """Holds a run's per-ray arrays in memory."""

    def open(self, mass_eV, n_rays, run, n_batches):
        self.arrays = {name: np.zeros(shape(n_rays, mass_eV.size), dtype) for name, (shape, dtype) in _PER_RAY.items()}
        self.done = np.zeros(n_batches, dtype=bool)

    def completed_batches(self):
        return self.done.copy()

    def write_batch(self, batch, start, arrays):
        for name, values in arrays.items():
            self.arrays[name][start:start + values.shape[0]] = values
        self.done[batch] = True

    def read(self):
        return self.arrays

    def finish(self, result):
        return result


class HDF5Backend:
    """Appends each finished batch to ``<path>.partial`` and flushes it.

    ``resume=True`` continues a checkpoint whose run parameters match exactly
    (otherwise the differences are listed and nothing is touched). ``finish``
    writes the complete result to ``path`` atomically and removes the checkpoint.
    """

    def __init__(self, path, resume=False, overwrite=False):
        self.path = Path(path)
        self.checkpoint = self.path.with_name(self.path.name + ".partial")
        self.resume = resume
        self.overwrite = overwrite

    def open(self, mass_eV, n_rays, run, n_batches):
        check_writable(self.path, self.overwrite)
        if self.checkpoint.exists() and self.resume:
            self.handle = self._reopen(run)
            return
        if self.checkpoint.exists() and not self.overwrite:
            raise InputError(
                f"{self.checkpoint}: an unfinished run's checkpoint is here; continue it with --resume "
                "or start afresh with --overwrite"
            )
        if self.resume and not self.checkpoint.exists():
            raise InputError(f"{self.checkpoint}: no checkpoint to resume")
        handle = h5py.File(self.checkpoint, "w", libver="latest")
        _write_header(handle, mass_eV, run)
        for name, (shape, dtype) in _PER_RAY.items():
            full = shape(n_rays, mass_eV.size)
            handle.create_dataset(name, shape=full, dtype=dtype, chunks=(min(max(1, run["batch_size"]), full[0]),) + full[1:])
        handle.create_dataset("batch_done", shape=(n_batches,), dtype=bool)
        handle.flush()
        self.handle = handle

    def _reopen(self, run):
        try:
            handle = h5py.File(self.checkpoint, "r+", libver="latest")
        except OSError as error:
            raise InputError(f"{self.checkpoint}: the checkpoint cannot be read ({error}); start afresh with --overwrite") from None
        stored = json.loads(handle.attrs["run"])
        current = json.loads(json.dumps(run, sort_keys=True, default=str))
        differences = [f"{key}: checkpoint {stored.get(key)!r}, now {current.get(key)!r}"
                       for key in sorted(set(stored) | set(current)) if stored.get(key) != current.get(key)]
        if differences:
            handle.close()
            raise InputError(f"{self.checkpoint}: cannot resume, the run differs: " + "; ".join(differences))
        return handle

    def completed_batches(self):
        return self.handle["batch_done"][...]

    def write_batch(self, batch, start, arrays):
        for name, values in arrays.items():
            self.handle[name][start:start + values.shape[0]] = values
        self.handle.flush()
        # The done flag goes last, after the data are on disk: a kill between the
        # two only costs this batch, which a resume recomputes.
        self.handle["batch_done"][batch] = True
        self.handle.flush()

    def read(self):
        return {name: self.handle[name][...] for name in _PER_RAY}

    def finish(self, result):
        self.handle.close()
        result.save(self.path, overwrite=self.overwrite)
        os.unlink(self.checkpoint)
        return result
