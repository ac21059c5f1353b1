"""Statistics of a sightline run, and where its arrays live while it runs.

In: per-ray arrays from the engine (kernel from the boxes, crossing counts,
dispersion measures, directions) plus the homogeneous-background part.
Out: :class:`SightlineResult` with the mean, variance, standard error,
percentiles, bootstrap error of the variance and P(epsilon, omega_0); saved to
and loaded from HDF5 with provenance.

Two interchangeable backends hold the arrays during a run, with one
interface: :class:`MemoryBackend`, and :class:`HDF5Backend`, which appends each
finished batch with its checksum to a checkpoint file and flushes it, so that
an interrupted run resumes from its complete, intact batches.
"""

import errno
import hashlib
import json
import os
import warnings
from pathlib import Path

import h5py
import numpy as np

from .conversion import probability_from_kernel
from .errors import InputError, RaytraceWarning, WriteError, require_path
from .provenance import (after_outputs, atomic_output, check_writable, hdf5_image, is_write_failure, output_folder,
                         provenance_json, write_failure)

FORMAT = "raytrace-sightlines-2"
#: Version of the layout inside a format (attribute 'format_version'): 2 adds a unit and a description to
#: every dataset and stores crossings as float64 in sightline and sky files alike. Files without the
#: attribute are version 1, still read; a newer version is refused.
FORMAT_VERSION = 2
PERCENTILES = (2.5, 16.0, 50.0, 84.0, 97.5)

# name -> (shape from (n_rows, n_masses), dtype): the per-ray arrays a sightline run fills.
SIGHTLINE_LAYOUT = {
    "kernel_boxes": (lambda r, m: (r, m), np.float64),
    "crossings": (lambda r, m: (r, m), np.int32),
    "tangent_events": (lambda r, m: (r, m), np.int32),
    "kernel_tangent": (lambda r, m: (r, m), np.float64),
    "dispersion_measure_boxes": (lambda r, m: (r,), np.float64),
    "direction": (lambda r, m: (r, 3), np.float64),
}


# name -> (unit, one-line description) of each dataset a result file holds; {row} is "ray" or "pixel".
# Crossings are float64 in both files: a pixel's count is the mean over its rays.
DATASETS = {
    "mass_eV": ("eV", "dark-photon masses of the grid"),
    "kernel_boxes": ("eV", "conversion kernel K from the boxes per {row} and mass; P = epsilon^2 K / omega_0"),
    "kernel_background": ("eV", "kernel of the homogeneous universe beyond the boxes per mass, the same for every {row}"),
    "crossings": ("1", "resonances inside the boxes per {row} and mass{mean}"),
    "tangent_events": ("1", "near-tangent resonance pairs (and near misses) taken in the Airy form per {row} and mass{mean}"),
    "kernel_tangent": ("eV", "the part of kernel_boxes from near-tangent (Airy) events per {row} and mass"),
    "dispersion_measure_boxes": ("pc cm^-3", "dispersion measure through the boxes per {row}"),
    "direction": ("1", "unit vector of each {row} in the boxes' axes"),
    "pdf_mean/kernel_boxes": ("eV", "one-point-PDF mean of the boxes' kernel per mass, over the run's redshifts"),
    "pdf_mean/kernel_background": ("eV", "the homogeneous background's kernel per mass in the one-point-PDF mean"),
    "pdf_mean/error": ("eV", "error estimate of the one-point-PDF mean of the boxes' kernel per mass"),
}
# Stored dtypes that differ from the arrays' own (the sightline counts are int32 while a run fills them,
# a sky's are means over a pixel's rays).
FILE_DTYPES = {"crossings": np.float64, "tangent_events": np.float64}


def _describe(dataset, name, format_name):
    unit, description = DATASETS[name]
    dataset.attrs["unit"] = unit
    sky = "sky" in format_name
    dataset.attrs["description"] = description.format(row="pixel" if sky else "ray",
                                                       mean=" (mean over the pixel's rays)" if sky else "")


class KernelRows:
    """What sightline and sky results share: per-row (ray or pixel) kernels from the boxes
    plus the homogeneous background beyond them, and the same for the dispersion measure."""

    #: The one-point-PDF mean over the same redshifts (:mod:`raytrace.meancheck`), when computed.
    pdf_check = None

    def mean_check(self):
        """The Monte Carlo mean against :attr:`pdf_check` per mass (a MeanCheck), or None without one."""
        from .meancheck import mean_check

        return mean_check(self)

    @property
    def kernel(self):
        """K in eV per row and mass, boxes plus background; P = epsilon^2 K / omega_0."""
        return self.kernel_boxes + self.kernel_background[None, :]

    @property
    def dispersion_measure(self):
        """DM to z_max in pc cm^-3 per row, boxes plus background."""
        return self.dispersion_measure_boxes + self.dispersion_measure_background

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
        return save_arrays(path, FORMAT, self.mass_eV, self.run, SIGHTLINE_LAYOUT, self, overwrite,
                           {"dispersion_measure_background": self.dispersion_measure_background})

    @classmethod
    def load(cls, path):
        """Read a result written by :meth:`save`."""
        from .meancheck import read_pdf_check

        with open_result(path, FORMAT, "sightline") as handle:
            result = cls(
                handle["mass_eV"][...],
                handle["kernel_boxes"][...],
                handle["kernel_background"][...],
                handle["crossings"][...],
                handle["dispersion_measure_boxes"][...],
                handle.attrs["dispersion_measure_background"],
                handle["direction"][...],
                json.loads(handle.attrs["run"]),
                tangent_events=handle["tangent_events"][...],
                kernel_tangent=handle["kernel_tangent"][...],
            )
            result.pdf_check = read_pdf_check(handle, result.mass_eV)
        return result


def tangent_arrays(kernel_boxes, tangent_events, kernel_tangent):
    """The near-tangent arrays of a result: zeros of the kernel's shape where none are given."""
    shape = np.shape(kernel_boxes)
    events = np.zeros(shape, dtype=np.int32) if tangent_events is None else np.asarray(tangent_events)
    kernel = np.zeros(shape) if kernel_tangent is None else np.asarray(kernel_tangent, dtype=float)
    if events.shape != shape or kernel.shape != shape:
        raise InputError(f"tangent_events, kernel_tangent: expected the kernel's shape {shape}")
    return events, kernel


def save_arrays(path, format_name, mass_eV, run, layout, source, overwrite, attributes):
    """Write ``layout``'s arrays of ``source`` plus the background kernel to HDF5, atomically.

    NaN or inf in any array aborts the write: no result file ever holds them.
    """
    with atomic_output(path, overwrite=overwrite) as temporary:
        with hdf5_image(temporary) as handle:
            _write_header(handle, format_name, mass_eV, run)
            for name in layout:
                data = getattr(source, name)
                handle.create_dataset(name, data=data, dtype=FILE_DTYPES.get(name, data.dtype), compression="gzip",
                                      shuffle=True)
                _describe(handle[name], name, format_name)
            handle["kernel_background"] = source.kernel_background
            _describe(handle["kernel_background"], "kernel_background", format_name)
            handle.attrs.update(attributes)
            if source.pdf_check is not None:
                from .meancheck import write_pdf_check

                write_pdf_check(handle, source.pdf_check)
                for name in handle["pdf_mean"]:
                    _describe(handle["pdf_mean"][name], f"pdf_mean/{name}", format_name)
            if "dispersion_measure_background" in attributes:
                handle.attrs["dispersion_measure_background_unit"] = "pc cm^-3"
            handle.attrs["complete"] = True
            _check_finite(handle, path)
    return Path(path)


class open_result:
    """Context manager opening a complete result file of ``format_name``, with clear errors."""

    def __init__(self, path, format_name, what):
        self.path, self.format_name, self.what = require_path(path, f"{what} result path"), format_name, what

    def __enter__(self):
        if not self.path.exists():
            raise InputError(f"{self.path}: result file not found")
        try:
            self.handle = h5py.File(self.path, "r")
        except OSError as error:
            raise InputError(f"{self.path}: not a readable HDF5 file ({error})") from None
        if self.handle.attrs.get("format") != self.format_name:
            self.handle.close()
            raise InputError(f"{self.path}: not a raytrace {self.what} result "
                             f"(attribute 'format' is not {self.format_name!r})")
        version = int(self.handle.attrs.get("format_version", 1))
        if version > FORMAT_VERSION:
            self.handle.close()
            raise InputError(f"{self.path}: written by a newer raytrace (format version {version}; this one reads "
                             f"up to {FORMAT_VERSION}); update raytrace to read it")
        if not self.handle.attrs.get("complete", False):
            self.handle.close()
            raise InputError(f"{self.path}: the run is not complete; finish it with --resume")
        return self.handle

    def __exit__(self, *exc):
        self.handle.close()


def _write_header(handle, format_name, mass_eV, run):
    handle.attrs["format"] = format_name
    handle.attrs["format_version"] = FORMAT_VERSION
    handle.attrs["run"] = json.dumps(run, sort_keys=True, default=str)
    handle.attrs["provenance"] = provenance_json(run=run)
    handle["mass_eV"] = mass_eV
    _describe(handle["mass_eV"], "mass_eV", format_name)


def _check_finite(handle, path):
    for name, item in handle.items():
        if isinstance(item, h5py.Dataset) and item.dtype.kind == "f" and not np.all(np.isfinite(item[...])):
            raise InputError(f"{path}: dataset {name} would hold NaN or inf; nothing was written")
    # Numbers stored as attributes (the background's dispersion measure) are results too.
    for name, value in handle.attrs.items():
        if np.asarray(value).dtype.kind == "f" and not np.all(np.isfinite(value)):
            raise InputError(f"{path}: attribute {name} would hold NaN or inf; nothing was written")


def _differences(stored, current, where=""):
    """'key[i].name: checkpoint X, now Y' for each leaf where two run dicts differ."""
    if isinstance(stored, dict) and isinstance(current, dict):
        return [line for key in sorted(set(stored) | set(current))
                for line in _differences(stored.get(key), current.get(key), f"{where}.{key}" if where else key)]
    if isinstance(stored, list) and isinstance(current, list) and len(stored) == len(current):
        return [line for i, (a, b) in enumerate(zip(stored, current)) for line in _differences(a, b, f"{where}[{i}]")]
    return [] if stored == current else [f"{where}: checkpoint {stored!r}, now {current!r}"]


class MemoryBackend:
    """Holds a run's per-row arrays (rows: rays or pixels) in memory."""

    def open(self, mass_eV, n_rows, run, n_batches, layout, format_name):
        self.arrays = {name: np.zeros(shape(n_rows, mass_eV.size), dtype) for name, (shape, dtype) in layout.items()}
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


def _batch_digest(batch, start, rows):
    """SHA-256 (32 bytes) of one batch's rows as stored, in layout order, with its index and first row."""
    digest = hashlib.sha256(np.array([batch, start], dtype=np.int64).tobytes())
    for values in rows:
        digest.update(np.ascontiguousarray(values).tobytes())
    return np.frombuffer(digest.digest(), dtype=np.uint8)


def _header_digest(run_json, layout_shapes):
    """SHA-256 hex of a checkpoint's run record and array shapes: what a resume compares against."""
    return hashlib.sha256(json.dumps([run_json, layout_shapes], sort_keys=True).encode()).hexdigest()


def _reserve_blocks(path):
    """Reserve the disk blocks of ``path``'s holes (early allocation leaves a sparse file), so that a
    full disk refuses the checkpoint when it is made and never a batch later. Where the system
    cannot (no posix_fallocate, or a file system without it), a refused batch write still stops
    the run cleanly."""
    if not hasattr(os, "posix_fallocate"):
        return
    with open(path, "r+b") as raw:
        try:
            os.posix_fallocate(raw.fileno(), 0, os.fstat(raw.fileno()).st_size)
        except OSError as error:
            if error.errno not in (errno.EOPNOTSUPP, errno.EINVAL):
                raise


class HDF5Backend:
    """Appends each finished batch to ``<path>.partial`` and flushes it.

    Every finished batch carries a SHA-256 of its rows (written after the rows,
    before its done flag) and the header one of the run record. ``resume=True``
    continues a checkpoint whose run parameters match exactly (otherwise the
    differences are listed and nothing is touched); a finished batch whose
    checksum fails is recomputed, with a warning. A refused write (full disk,
    I/O error) is an InputError naming the file and the free space; the
    checkpoint then still says only what is done. ``finish`` writes the complete
    result to ``path`` atomically and removes the checkpoint once it is in place.
    """

    def __init__(self, path, resume=False, overwrite=False):
        self.path = require_path(path, "path (--output)")
        self.checkpoint = self.path.with_name(self.path.name + ".partial")
        self.resume = resume
        self.overwrite = overwrite

    def refuse_if_finished(self):
        """With --resume, a result already in place beside its checkpoint means a kill came between the
        final save and the checkpoint's removal: the run is done. Remove the leftover and say so."""
        if not (self.resume and self.path.is_file() and self.checkpoint.is_file()):
            return
        try:
            with h5py.File(self.path, "r") as result, h5py.File(self.checkpoint, "r") as checkpoint:
                finished = bool(result.attrs.get("complete", False)) and result.attrs["run"] == checkpoint.attrs["run"]
        except (OSError, KeyError):
            return
        if finished:
            os.unlink(self.checkpoint)
            raise InputError(f"{self.path}: this run is already complete (a kill after its final save left "
                             f"{self.checkpoint.name}, now removed); nothing to resume")

    def open(self, mass_eV, n_rows, run, n_batches, layout, format_name):
        self.layout = layout
        self.refuse_if_finished()
        check_writable(self.path, self.overwrite)
        if self.checkpoint.is_dir():
            raise InputError(f"{self.checkpoint}: is a folder where the run's checkpoint goes; move it away")
        output_folder(self.path)
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
        try:
            self._create(mass_eV, n_rows, run, n_batches, format_name)
            self.handle = h5py.File(self.checkpoint, "r+")
        except OSError as error:
            if is_write_failure(error):
                raise write_failure(self.checkpoint, error, "no checkpoint was made") from None
            raise

    def _create(self, mass_eV, n_rows, run, n_batches, format_name):
        # Crash safety (SIGKILL at any moment): the checkpoint appears whole, by rename,
        # with every dataset contiguous and allocated at creation, so a batch only
        # writes raw bytes at fixed offsets and never touches HDF5's metadata. The
        # default (oldest) file format reopens a file whose writer was killed (with
        # libver="latest" HDF5 finds it marked open-for-write and refuses).
        allocate = h5py.h5p.create(h5py.h5p.DATASET_CREATE)
        allocate.set_alloc_time(h5py.h5d.ALLOC_TIME_EARLY)
        allocate.set_fill_time(h5py.h5d.FILL_TIME_NEVER)
        shapes = {name: shape(n_rows, mass_eV.size) for name, (shape, _) in self.layout.items()}
        with atomic_output(self.checkpoint, overwrite=True, at_once=True) as temporary:
            with h5py.File(temporary, "w") as handle:
                _write_header(handle, format_name, mass_eV, run)
                handle.attrs["header_sha256"] = _header_digest(handle.attrs["run"], shapes)
                for name, (_, dtype) in self.layout.items():
                    handle.create_dataset(name, shape=shapes[name], dtype=dtype, dcpl=allocate)
                handle.create_dataset("batch_rows", shape=(n_batches, 2), dtype=np.int64, dcpl=allocate)
                handle.create_dataset("batch_sha256", shape=(n_batches, 32), dtype=np.uint8, dcpl=allocate)
                handle.create_dataset("batch_done", shape=(n_batches,), dtype=bool, dcpl=allocate)
                handle["batch_done"][...] = False
            _reserve_blocks(temporary)

    def _reopen(self, run):
        # Compared read-only first: a refused resume leaves the checkpoint's bytes as they were.
        try:
            with h5py.File(self.checkpoint, "r") as handle:
                stored_text = handle.attrs["run"]
                stored = json.loads(stored_text)
                shapes = {name: list(handle[name].shape) for name in self.layout}
                header = handle.attrs["header_sha256"]
        except (OSError, KeyError, ValueError) as error:
            raise InputError(f"{self.checkpoint}: the checkpoint cannot be read ({error}); "
                             "start afresh with --overwrite") from None
        if header != _header_digest(stored_text, {name: tuple(shape) for name, shape in shapes.items()}):
            raise InputError(f"{self.checkpoint}: the checkpoint's header fails its checksum (damaged); "
                             "start afresh with --overwrite")
        current = json.loads(json.dumps(run, sort_keys=True, default=str))
        differences = _differences(stored, current)
        if differences:
            raise InputError(f"{self.checkpoint}: cannot resume, the run differs: " + "; ".join(differences))
        return h5py.File(self.checkpoint, "r+")

    def completed_batches(self):
        """Done flags of the batches whose rows still match their checksum; the others are redone."""
        done = self.handle["batch_done"][...]
        rows = self.handle["batch_rows"][...]
        stored = self.handle["batch_sha256"][...]
        n_rows = self.handle[next(iter(self.layout))].shape[0]
        failed = []
        for batch in np.flatnonzero(done):
            start, stop = (int(v) for v in rows[batch])
            intact = (0 <= start < stop <= n_rows and np.array_equal(
                stored[batch], _batch_digest(batch, start, (self.handle[name][start:stop] for name in self.layout))))
            if not intact:
                done[batch] = False
                failed.append(int(batch))
        if failed:
            listed = ", ".join(map(str, failed[:10])) + (", ..." if len(failed) > 10 else "")
            warnings.warn(RaytraceWarning(
                f"{self.checkpoint}: {len(failed)} finished batches fail their checksum (batches {listed}); "
                "they are recomputed"))
        return done

    def write_batch(self, batch, start, arrays):
        rows = {name: np.ascontiguousarray(arrays[name], dtype=dtype) for name, (_, dtype) in self.layout.items()}
        stop = start + next(iter(rows.values())).shape[0]
        try:
            for name, values in rows.items():
                self.handle[name][start:stop] = values
            self.handle["batch_rows"][batch] = (start, stop)
            self.handle["batch_sha256"][batch] = _batch_digest(batch, start, rows.values())
            self.handle.flush()
            # The done flag goes last, after the data and checksum are on disk: a kill
            # between the two only costs this batch, which a resume recomputes.
            self.handle["batch_done"][batch] = True
            self.handle.flush()
        except OSError as error:
            if not is_write_failure(error):
                raise
            raise write_failure(self.checkpoint, error, "the checkpoint keeps the batches finished before; "
                                "free space and continue with --resume") from None

    def read(self):
        return {name: self.handle[name][...] for name in self.layout}

    def finish(self, result):
        self.handle.close()
        try:
            result.save(self.path, overwrite=self.overwrite)
        except WriteError as error:
            raise WriteError(f"{error}; the checkpoint {self.checkpoint} keeps every batch: free space and "
                             "finish with --resume") from None
        # Inside an output set the checkpoint stays until every output of the run is in place.
        after_outputs(lambda: os.unlink(self.checkpoint))
        return result
