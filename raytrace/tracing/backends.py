"""Where a run's per-row arrays go while it runs: its result file, on disk or in memory.

In: the run's masses, number of rows (rays or pixels), run record, batch count,
layout and :class:`Contents` (what the file holds besides its rows), then each
finished batch's rows. Out: the result file, open for reading, once every batch
is in. :class:`HDF5Backend` writes the result file itself while the run goes,
as ``<path>.partial``: made whole at the start (every dataset allocated, its
blocks reserved), each finished batch lands in place with its checksum and is
flushed, so an interrupted run resumes from its complete, intact batches; the
finished file is marked complete and renamed onto ``path``. Nothing holds more
than a batch of rows. :class:`MemoryBackend` builds the same file in memory.
"""

import hashlib
import itertools
import json
import os
import shutil
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import h5py
import numpy as np

from raytrace.core.errors import InputError, RaytraceWarning, WriteError, require_path
from raytrace.core.provenance import (
    after_outputs,
    atomic_output,
    check_writable,
    hdf5_image,
    is_write_failure,
    move_into_place,
    output_folder,
    write_failure,
)
from raytrace.core.resultfiles import (
    _check_finite,
    allocate,
    mark_complete,
    reserve_blocks,
    rows_index,
    write_group,
    write_rows,
)


@dataclass(frozen=True)
class Contents:
    """What a result file holds besides its rows, known before the first batch: per-mass datasets (the
    background's kernel), attributes, and ``groups``, a function of the run record that gives the file's
    groups (the built-in check); it is called when the file is made, not when a run resumes."""

    per_mass: dict = field(default_factory=dict)
    attributes: dict = field(default_factory=dict)
    groups: object = None

    def made_groups(self, run):
        return {} if self.groups is None else self.groups(run)


def _differences(stored, current, where=""):
    """'key[i].name: checkpoint X, now Y' for each leaf where two run dicts differ."""
    if isinstance(stored, dict) and isinstance(current, dict):
        return [line for key in sorted(set(stored) | set(current))
                for line in _differences(stored.get(key), current.get(key), f"{where}.{key}" if where else key)]
    if isinstance(stored, list) and isinstance(current, list) and len(stored) == len(current):
        return [line for i, (a, b) in enumerate(zip(stored, current)) for line in _differences(a, b, f"{where}[{i}]")]
    return [] if stored == current else [f"{where}: checkpoint {stored!r}, now {current!r}"]


def _batch_digest(batch, start, rows):
    """SHA-256 (32 bytes) of one batch's rows as stored, in layout order, with its index and first row."""
    digest = hashlib.sha256(np.array([batch, start], dtype=np.int64).tobytes())
    for values in rows:
        digest.update(np.ascontiguousarray(values).tobytes())
    return np.frombuffer(digest.digest(), dtype=np.uint8)


def _header_digest(run_json, layout_shapes):
    """SHA-256 hex of a checkpoint's run record and array shapes: what a resume compares against."""
    return hashlib.sha256(json.dumps([run_json, layout_shapes], sort_keys=True).encode()).hexdigest()


def _open_to_fill(path):
    """``path`` open for writing, HDF5's sieve buffer off: a batch is a piece of every mass's map, each
    written straight to its place (the buffer reads and rewrites 64 kB around each: measured 2.5 times
    slower for 1024 pixels of 32 masses)."""
    access = h5py.h5p.create(h5py.h5p.FILE_ACCESS)
    access.set_libver_bounds(h5py.h5f.LIBVER_EARLIEST, h5py.h5f.LIBVER_LATEST)
    access.set_sieve_buf_size(0)
    return h5py.File(h5py.h5f.open(os.fsencode(path), h5py.h5f.ACC_RDWR, fapl=access))


def size_text(n_bytes):
    """Bytes in words people read: '3.2 GB', '740 MB'."""
    return f"{n_bytes / 1e9:.3g} GB" if n_bytes >= 1e9 else f"{n_bytes / 1e6:.3g} MB"


class HDF5Backend:
    """Writes the run's result file batch by batch as ``<path>.partial``, then renames it onto ``path``.

    Every finished batch carries a SHA-256 of its rows (written after the rows,
    before its done flag) and the header one of the run record. ``resume=True``
    continues a checkpoint whose run parameters match exactly (otherwise the
    differences are listed and nothing is touched); a finished batch whose
    checksum fails is recomputed, with a warning. A refused write (full disk,
    I/O error) is an InputError naming the file and the free space; the
    checkpoint then still says only what is done. :meth:`finish` marks the file
    complete and renames it onto ``path`` (with the run's other outputs, inside
    an output set, which keeps the file where it is if another output fails).
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

    def check_room(self, n_bytes, what):
        """Refuse, before any work, a result of ``n_bytes`` that the disk at ``path`` cannot hold
        (a resumed checkpoint has its room already)."""
        if self.resume and self.checkpoint.is_file():
            return
        folder = self.path.parent
        while not folder.exists() and folder != folder.parent:
            folder = folder.parent
        try:
            free = shutil.disk_usage(folder).free
        except OSError:
            return  # no way to know here: the reservation at its creation still refuses a full disk
        if n_bytes > free:
            raise InputError(f"{self.path} (--output): the result will take {size_text(n_bytes)} on disk and "
                             f"{size_text(free)} are free there; free space, write it elsewhere, or ask for fewer "
                             f"{what}")

    def open(self, mass_eV, n_rows, run, n_batches, layout, format_name, contents):
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
        groups = contents.made_groups(run)
        try:
            self._create(mass_eV, n_rows, run, n_batches, format_name, contents, groups)
            self.handle = _open_to_fill(self.checkpoint)
        except OSError as error:
            if is_write_failure(error):
                raise write_failure(self.checkpoint, error, "no checkpoint was made") from None
            raise

    def _create(self, mass_eV, n_rows, run, n_batches, format_name, contents, groups):
        # Crash safety (SIGKILL at any moment): the file appears whole, by rename, with
        # every dataset there and the per-row ones contiguous and allocated at creation,
        # so a batch only writes raw bytes at fixed offsets and never touches HDF5's
        # metadata. The default (oldest) file format reopens a file whose writer was
        # killed (with libver="latest" HDF5 finds it marked open-for-write and refuses).
        shapes = {name: entry.shape(n_rows, mass_eV.size) for name, entry in self.layout.items()}
        with atomic_output(self.checkpoint, overwrite=True, at_once=True) as temporary:
            with h5py.File(temporary, "w") as handle:
                allocate(handle, format_name, mass_eV, run, self.layout, n_rows, contents.per_mass,
                         contents.attributes, groups, n_batches, self.path)
                handle.attrs["header_sha256"] = _header_digest(handle.attrs["run"], shapes)
            reserve_blocks(temporary)

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
        return _open_to_fill(self.checkpoint)

    def _rows_of(self, batch_rows):
        """The rows of each dataset in this batch's place, as stored."""
        start, stop = batch_rows
        return (self.handle[name][rows_index(entry, start, stop)] for name, entry in self.layout.items())

    def completed_batches(self):
        """Done flags of the batches whose rows still match their checksum; the others are redone."""
        done = self.handle["batch_done"][...]
        rows = self.handle["batch_rows"][...]
        stored = self.handle["batch_sha256"][...]
        name, entry = next(iter(self.layout.items()))
        n_rows = self.handle[name].shape[entry.rows_axis]
        failed = []
        for batch in np.flatnonzero(done):
            start, stop = (int(v) for v in rows[batch])
            intact = (0 <= start < stop <= n_rows
                      and np.array_equal(stored[batch], _batch_digest(batch, start, self._rows_of((start, stop)))))
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
        stop = start + len(arrays[next(iter(self.layout))])
        try:
            blocks = write_rows(self.handle, self.layout, start, arrays, self.path)
            self.handle["batch_rows"][batch] = (start, stop)
            self.handle["batch_sha256"][batch] = _batch_digest(batch, start, blocks)
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

    def read_rows(self, start, stop, names):
        """Rows start..stop of the arrays ``names`` (rows first), streamed ones included (a resume reduces
        them again)."""
        return {name: np.moveaxis(self.handle[name][rows_index(self.layout[name], start, stop)],
                                  self.layout[name].rows_axis, 0) for name in names}

    def finish(self, groups=None):
        """Mark the file complete, put it in place and return it open for reading.

        ``groups`` made after the run (``{name: (datasets, attributes)}``: a reduction of its batches), or
        streamed arrays in its layout, need a result file apart: the checkpoint is copied into it without
        the streamed arrays, with the groups; the checkpoint goes once the result is in place. Otherwise
        the checkpoint itself is the result: its flag is set in place (one small write) and it is renamed.
        """
        if groups or any(entry.streamed for entry in self.layout.values()):
            return self._finish_apart(groups or {})
        try:
            mark_complete(self.handle)
        except OSError as error:
            if not is_write_failure(error):
                raise
            raise write_failure(self.checkpoint, error, "the checkpoint keeps every batch: free space and "
                                "finish with --resume") from None
        finally:
            self.handle.close()
        finished = h5py.File(self.checkpoint, "r")
        move_into_place(self.checkpoint, self.path)
        return finished

    def _finish_apart(self, groups):
        """The result as a copy of the checkpoint (its kept arrays, dataset by dataset) with ``groups``."""
        try:
            with atomic_output(self.path, overwrite=True) as temporary:
                # Built in memory and written in one go (a sightline run's rows fit in memory): a full
                # disk is a clean error, never HDF5 failing mid-file.
                with hdf5_image(temporary) as result:
                    for name, value in self.handle.attrs.items():
                        if name != "header_sha256":
                            result.attrs[name] = value
                    for name in self.handle:
                        if name not in self.layout or not self.layout[name].streamed:
                            self.handle.copy(self.handle[name], result, name)
                    for name, (datasets, attributes) in groups.items():
                        write_group(result, name, datasets, attributes)
                    _check_finite(result, self.path)
                    result.attrs["complete"] = np.True_
                finished = h5py.File(temporary, "r")
        except WriteError as error:
            raise WriteError(f"{error}; the checkpoint {self.checkpoint} keeps every batch: free space and "
                             "finish with --resume") from None
        finally:
            self.handle.close()
        # Inside an output set the checkpoint stays until every output of the run is in place.
        after_outputs(lambda: os.unlink(self.checkpoint))
        return finished


class MemoryBackend(HDF5Backend):
    """The same result file, built in memory: a run without an output file (nothing to resume)."""

    _files = itertools.count()

    def __init__(self):
        pass

    def check_room(self, n_bytes, what):
        """Refuse, naming ``what``, a run whose file (and a result read out of it) would not fit in memory."""
        try:
            total = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
        except (ValueError, OSError, AttributeError):
            return  # no way to know here: let the run try
        if 2 * n_bytes > total:
            raise InputError(f"{what}: the run's arrays would need {size_text(2 * n_bytes)} of memory, more than "
                             f"this machine's {size_text(total)}; give an output file (--output): a run with one "
                             "keeps them on disk")

    def open(self, mass_eV, n_rows, run, n_batches, layout, format_name, contents):
        # Streamed arrays go only to a reducer: memory holds none of them (nothing resumes here).
        self.layout = layout = {name: entry for name, entry in layout.items() if not entry.streamed}
        groups = contents.made_groups(run)
        self.path = self.checkpoint = Path(f"raytrace-run-{os.getpid()}-{next(self._files)}.h5 (in memory)")
        self.handle = h5py.File(self.checkpoint.name, "w", driver="core", backing_store=False)
        allocate(self.handle, format_name, mass_eV, run, layout, n_rows, contents.per_mass, contents.attributes,
                 groups, n_batches, self.path)

    def finish(self, groups=None):
        for name, (datasets, attributes) in (groups or {}).items():
            write_group(self.handle, name, datasets, attributes)
        mark_complete(self.handle)
        return self.handle
