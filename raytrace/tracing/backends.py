"""Where a run's per-row arrays live while it runs: two backends with one interface.

In: the run's masses, number of rows (rays or pixels), run record, batch count
and layout, then each finished batch's rows. Out: the arrays for the result,
and the done flags of the batches a run still needs. :class:`MemoryBackend`
holds them in memory; :class:`HDF5Backend` appends each finished batch with its
checksum to a checkpoint file and flushes it, so that an interrupted run
resumes from its complete, intact batches, then writes the result file.
"""

import errno
import hashlib
import json
import os
import warnings

import h5py
import numpy as np

from raytrace.core.errors import InputError, RaytraceWarning, WriteError, require_path
from raytrace.core.provenance import (
    after_outputs,
    atomic_output,
    check_writable,
    is_write_failure,
    output_folder,
    write_failure,
)
from raytrace.core.resultfiles import _write_header


def _differences(stored, current, where=""):
    """'key[i].name: checkpoint X, now Y' for each leaf where two run dicts differ."""
    if isinstance(stored, dict) and isinstance(current, dict):
        return [line for key in sorted(set(stored) | set(current))
                for line in _differences(stored.get(key), current.get(key), f"{where}.{key}" if where else key)]
    if isinstance(stored, list) and isinstance(current, list) and len(stored) == len(current):
        return [line for i, (a, b) in enumerate(zip(stored, current)) for line in _differences(a, b, f"{where}[{i}]")]
    return [] if stored == current else [f"{where}: checkpoint {stored!r}, now {current!r}"]


#: A layout entry (shape, dtype, STREAMED) is a run's input to a reduction (raytrace.binstats), not a result:
#: memory holds it only while its batch is reduced; a checkpoint keeps it, for a resume to reduce again.
STREAMED = "streamed"


def kept(layout):
    """The names of ``layout`` that a run keeps: every entry but the streamed ones."""
    return [name for name, entry in layout.items() if STREAMED not in entry[2:]]


class MemoryBackend:
    """Holds a run's per-row arrays (rows: rays or pixels) in memory; streamed ones not at all."""

    def open(self, mass_eV, n_rows, run, n_batches, layout, format_name):
        self.arrays = {name: np.zeros(layout[name][0](n_rows, mass_eV.size), layout[name][1]) for name in kept(layout)}
        self.done = np.zeros(n_batches, dtype=bool)

    def completed_batches(self):
        return self.done.copy()

    def write_batch(self, batch, start, arrays):
        for name, values in self.arrays.items():
            values[start:start + arrays[name].shape[0]] = arrays[name]
        self.done[batch] = True

    def read(self):
        return self.arrays

    def read_rows(self, start, stop, names):
        """Rows start..stop of the kept arrays ``names`` (a fresh run's memory holds no finished batch)."""
        return {name: self.arrays[name][start:stop] for name in names}

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

    def finished(self):
        """With --resume: whether the result is already in place beside its checkpoint, complete and of the
        checkpoint's run (a kill came between the final save and the checkpoint's removal). If so the
        leftover checkpoint is removed."""
        if not (self.resume and self.path.is_file() and self.checkpoint.is_file()):
            return False
        try:
            with h5py.File(self.path, "r") as result, h5py.File(self.checkpoint, "r") as checkpoint:
                finished = bool(result.attrs.get("complete", False)) and result.attrs["run"] == checkpoint.attrs["run"]
        except (OSError, KeyError):
            return False
        if finished:
            os.unlink(self.checkpoint)
        return finished

    def refuse_if_finished(self):
        """An InputError when :meth:`finished`: there is nothing left to resume."""
        if self.finished():
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
        shapes = {name: entry[0](n_rows, mass_eV.size) for name, entry in self.layout.items()}
        with atomic_output(self.checkpoint, overwrite=True, at_once=True) as temporary:
            with h5py.File(temporary, "w") as handle:
                _write_header(handle, format_name, mass_eV, run)
                handle.attrs["header_sha256"] = _header_digest(handle.attrs["run"], shapes)
                for name, (_, dtype, *_) in self.layout.items():
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
        rows = {name: np.ascontiguousarray(arrays[name], dtype=entry[1]) for name, entry in self.layout.items()}
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
        return {name: self.handle[name][...] for name in kept(self.layout)}

    def read_rows(self, start, stop, names):
        """Rows start..stop of the arrays ``names``, streamed ones included (a resume reduces them again)."""
        return {name: self.handle[name][start:stop] for name in names}

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
