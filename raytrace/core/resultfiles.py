"""The HDF5 file format of results: sightline, sky and one-point-PDF results alike.

In: a result's per-row arrays (rays or pixels) by a layout of names
(:class:`RowArray`: shape, stored dtype, the axis that holds the rows), its
masses, run record, per-mass datasets, attributes and groups. Out: a result
file made whole at once (:func:`allocate`: every dataset is there, the per-row
ones allocated contiguous at creation), then filled in place a batch of rows at
a time by a run, or a mass at a time by a save (:func:`write_rows`), and marked
complete (:func:`mark_complete`): so a file of any size is written without
holding it in memory, and filling it never touches HDF5's metadata. A unit and a
description sit on every dataset; NaN or inf is refused before it is written.
Reading opens only a complete file of the expected format and version, with
clear errors (:func:`open_complete`, :class:`open_result`).
"""

import errno
import json
import os
from pathlib import Path
from typing import NamedTuple

import h5py
import numpy as np

from raytrace.core.errors import InputError, require_path
from raytrace.core.provenance import atomic_output, provenance_json
from raytrace.core.resultchecks import (
    check_values,
    format_version,
    mass_grid,
    read_arrays,
    run_record,
    scalar_attribute,
    sky_rows,
)

#: Version of the layout inside a format (attribute 'format_version'): 2 adds a unit and a description to
#: every dataset and stores crossings as float64 in sightline and sky files alike; 3 fills the files in
#: place, uncompressed, gives every per-row dataset the axis of its rows (attribute 'rows_axis'; a sky's
#: maps are mass-major, so one mass's map is one contiguous read) and keeps each batch's checksum.
#: Files without the attribute are version 1, still read; a newer version is refused.
FORMAT_VERSION = 3

# name -> (unit, one-line description) of each dataset a result file holds; {row} is "ray" or "pixel".
# Crossings are float64 in both files: a pixel's count is the mean over its rays.
DATASETS = {
    "mass_eV": ("eV", "dark-photon masses of the grid"),
    "kernel_boxes": ("eV", "conversion kernel K from the boxes per {row} and mass; P = epsilon^2 K / omega_0"),
    "kernel_background": ("eV", "kernel of the homogeneous universe beyond the boxes per mass, the same for every {row}"),
    "crossings": ("1", "resonances inside the boxes per {row} and mass{mean}"),
    "tangent_events": ("1", "near-tangent resonance pairs (and near misses) taken in the Airy form per {row} and mass{mean}"),
    "kernel_splits": ("eV", "the boxes' kernel of each of the two independent splits of a pixel's rays, per pixel, "
                      "split and mass (their cross-spectrum is free of the rays' sampling noise)"),
    "kernel_tangent": ("eV", "the part of kernel_boxes from near-tangent (Airy) events per {row} and mass"),
    "dispersion_measure_boxes": ("pc cm^-3", "dispersion measure through the boxes per {row}"),
    "direction": ("1", "unit vector of each {row} in the boxes' axes"),
    "kernel_shells_boxes": ("eV", "kernel from the boxes per {row}, redshift shell (group redshift_shells) and mass"),
    "kernel_cells": ("eV", "kernel from the boxes per {row}, redshift cell and mass, which the run reduces to its "
                     "bins (in a checkpoint only, for a resume)"),
    "batch_rows": ("1", "first and end row of each batch the run traced"),
    "batch_sha256": ("1", "SHA-256 of each batch's rows as stored (layout order), with its index and first row"),
    "batch_done": ("1", "whether each batch is written with its checksum"),
}

#: The run's bookkeeping datasets, one row per batch: (shape after the batch count, dtype).
BATCH_DATASETS = {"batch_rows": ((2,), np.int64), "batch_sha256": ((32,), np.uint8), "batch_done": ((), bool)}


class RowArray(NamedTuple):
    """One per-row dataset of a result: its shape from (rows, masses), its stored dtype, the axis of its rows,
    and whether it is ``streamed``: a run's input to a reduction (:mod:`raytrace.statistics.binstats`) that
    its checkpoint keeps for a resume to reduce again, but its result does not."""

    shape: object
    dtype: object
    rows_axis: int = 0
    streamed: bool = False


def rows_index(entry, start, stop):
    """The index of rows start..stop-1 in a dataset of ``entry``'s layout."""
    return (slice(None),) * entry.rows_axis + (slice(start, stop),)


#: Bytes of a result file besides its per-row and batch datasets: attributes (run record, provenance),
#: the per-mass datasets and groups, HDF5's own headers (measured 40-60 kB for 16-128 masses).
FILE_OVERHEAD = 1 << 17


def result_bytes(layout, n_rows, n_masses, n_batches=0):
    """Bytes a result file of ``layout`` takes on disk: its per-row datasets, the batch bookkeeping, the rest."""
    n_rows, n_masses, n_batches = int(n_rows), int(n_masses), int(n_batches)
    rows = sum(int(np.prod(entry.shape(n_rows, n_masses), dtype=np.int64)) * np.dtype(entry.dtype).itemsize
               for entry in layout.values())
    return rows + n_batches * (16 + 32 + 1) + FILE_OVERHEAD


def _describe(dataset, name, format_name):
    unit, description = DATASETS[name]
    sky = "sky" in format_name
    describe(dataset, unit, description.format(row="pixel" if sky else "ray",
                                               mean=" (mean over the pixel's rays)" if sky else ""))


def describe(dataset, unit, description):
    """Give an HDF5 dataset its 'unit' and 'description' attributes."""
    dataset.attrs["unit"] = unit
    dataset.attrs["description"] = description


def write_group(handle, name, datasets, attributes):
    """Group ``name`` of datasets ``{name: (values, unit, description)}`` with ``attributes``."""
    group = handle.create_group(name)
    for key, (values, unit, description) in datasets.items():
        group[key] = values
        describe(group[key], unit, description)
    group.attrs.update(attributes)
    return group


def read_group(handle, name, n_masses, per_mass=()):
    """({dataset: array}, {attribute: value}) of group ``name``, or None when the file has no such group.

    The datasets ``per_mass`` must be there, one value per mass, finite and >= 0; every other dataset
    finite. A JSON run record, where the group has one, is parsed (:mod:`raytrace.core.resultchecks`).
    A damaged group is an InputError naming it.
    """
    if name not in handle:
        return None
    group, path = handle[name], handle.file.filename
    datasets = read_arrays(group, path, tuple(per_mass), n_masses, prefix=f"{name}/", per_mass=True)
    for key in group:
        if key not in datasets:
            datasets[key] = group[key][...]
            check_values(datasets[key], path, f"dataset {name}/{key}", non_negative=False)
    attributes = dict(group.attrs)
    if "run" in attributes or name == "pdf_mean":
        attributes["run"] = run_record(group, path, where=f"attribute run of group {name}")
    return datasets, attributes


def allocate(handle, format_name, mass_eV, run, layout, n_rows, per_mass, attributes, groups, n_batches=0,
             where=None):
    """Every dataset and attribute of a result file, 'complete' false; the per-row datasets of ``layout``
    allocated contiguous at creation and never filled by HDF5, so that filling them only writes bytes at
    fixed offsets (a kill at any moment leaves a readable file). ``per_mass``: ``{name: values}`` (the
    background's kernel); ``groups``: ``{name: (datasets, attributes)}`` as :func:`write_group` takes them;
    ``n_batches`` > 0 adds a run's bookkeeping (:data:`BATCH_DATASETS`). NaN or inf anywhere is refused,
    naming ``where`` (the output the file becomes).
    """
    early = h5py.h5p.create(h5py.h5p.DATASET_CREATE)
    early.set_alloc_time(h5py.h5d.ALLOC_TIME_EARLY)
    early.set_fill_time(h5py.h5d.FILL_TIME_NEVER)
    _write_header(handle, format_name, mass_eV, run)
    for name, entry in layout.items():
        dataset = handle.create_dataset(name, shape=entry.shape(n_rows, len(mass_eV)), dtype=entry.dtype, dcpl=early)
        _describe(dataset, name, format_name)
        dataset.attrs["rows_axis"] = entry.rows_axis
    for name, (shape, dtype) in (BATCH_DATASETS.items() if n_batches else ()):
        _describe(handle.create_dataset(name, shape=(n_batches, *shape), dtype=dtype, dcpl=early), name, format_name)
    if n_batches:
        handle["batch_done"][...] = False
    for name, values in per_mass.items():
        check_finite(values, f"dataset {name}", where)
        handle[name] = values
        _describe(handle[name], name, format_name)
    for name, value in attributes.items():
        check_finite(value, f"attribute {name}", where)
        handle.attrs[name] = value
    if "dispersion_measure_background" in attributes:
        handle.attrs["dispersion_measure_background_unit"] = "pc cm^-3"
    for name, (datasets, group_attributes) in groups.items():
        write_group(handle, name, datasets, group_attributes)
    handle.attrs["complete"] = np.False_


def write_rows(handle, layout, start, arrays, where=None):
    """Write rows start.. of each ``arrays[name]`` (rows first, as tracers give them) where ``layout`` puts
    them; returns the blocks as stored, in layout order. NaN or inf is refused before anything is written,
    naming ``where`` (the output the file becomes)."""
    blocks = []
    for name, entry in layout.items():
        values = np.asarray(arrays[name])
        check_finite(values, f"dataset {name}", where)
        blocks.append(np.ascontiguousarray(np.moveaxis(values, 0, entry.rows_axis), dtype=entry.dtype))
    for (name, entry), block in zip(layout.items(), blocks):
        handle[name][rows_index(entry, start, start + len(arrays[name]))] = block
    return blocks


def mark_complete(handle):
    """Set 'complete' in place (an attribute of fixed size: one small write, no new metadata)."""
    handle.attrs.modify("complete", np.True_)
    handle.flush()


def check_finite(values, name, path):
    """Refuse, naming the dataset, values that hold NaN or inf: no result file ever holds them."""
    values = np.asarray(values)
    if values.dtype.kind == "f" and not np.all(np.isfinite(values)):
        raise InputError(f"{path}: {name} would hold NaN or inf; nothing was written")


def reserve_blocks(path):
    """Reserve the disk blocks of ``path``'s holes (early allocation leaves a sparse file), so that a
    full disk refuses the file when it is made and never while it is filled. Where the system cannot
    (no posix_fallocate, or a file system without it), a refused write still stops cleanly."""
    if not hasattr(os, "posix_fallocate"):
        return
    with open(path, "r+b") as raw:
        try:
            os.posix_fallocate(raw.fileno(), 0, os.fstat(raw.fileno()).st_size)
        except OSError as error:
            if error.errno not in (errno.EOPNOTSUPP, errno.EINVAL):
                raise


def save_rows(path, overwrite, format_name, mass_eV, run, layout, n_rows, per_mass, attributes, groups, fill):
    """Write a result file atomically: :func:`allocate`, reserve its blocks, ``fill(handle)``, mark it complete."""
    with atomic_output(path, overwrite=overwrite) as temporary:
        with h5py.File(temporary, "w") as handle:
            allocate(handle, format_name, mass_eV, run, layout, n_rows, per_mass, attributes, groups, where=path)
        reserve_blocks(temporary)
        with h5py.File(temporary, "r+") as handle:
            fill(handle)
            mark_complete(handle)
    return Path(path)


def open_complete(path, format_name, what):
    """An open (read-only) complete result file of ``format_name``, or an InputError saying what is wrong."""
    path = require_path(path, f"{what} result path")
    if not path.exists():
        raise InputError(f"{path}: result file not found")
    try:
        handle = h5py.File(path, "r")
    except OSError as error:
        raise InputError(f"{path}: not a readable HDF5 file ({error})") from None
    try:
        if handle.attrs.get("format") != format_name:
            raise InputError(f"{path}: not a raytrace {what} result (attribute 'format' is not {format_name!r})")
        version = format_version(handle, path, FORMAT_VERSION)
        if version > FORMAT_VERSION:
            raise InputError(f"{path}: written by a newer raytrace (format version {version}; this one reads "
                             f"up to {FORMAT_VERSION}); update raytrace to read it")
        if not handle.attrs.get("complete", False):
            raise InputError(f"{path}: the run is not complete; finish it with --resume")
    except BaseException:
        handle.close()
        raise
    return handle


class open_result:
    """Context manager around :func:`open_complete`: the file is closed at the end of the block."""

    def __init__(self, path, format_name, what):
        self.path, self.format_name, self.what = path, format_name, what

    def __enter__(self):
        self.handle = open_complete(self.path, self.format_name, self.what)
        return self.handle

    def __exit__(self, *exc):
        self.handle.close()


#: The datasets of a result with a row per ray or pixel, as its loader reads them.
ROW_DATASETS = ("kernel_boxes", "kernel_background", "crossings", "dispersion_measure_boxes", "tangent_events",
                "kernel_tangent")


def read_rows(handle, path, names=ROW_DATASETS, required=("z_max",), sky=False):
    """``(run record, mass grid, arrays, background DM)`` of an open result, every piece checked
    (:mod:`raytrace.core.resultchecks`): a sky's pixel count against its nside. Files of format version 1
    may lack the near-tangent arrays (None: zeros)."""
    record = run_record(handle, path, required)
    n_rows = sky_rows(record, path) if sky else None
    mass = mass_grid(handle, path)
    optional = ("tangent_events", "kernel_tangent") if format_version(handle, path, FORMAT_VERSION) == 1 else ()
    arrays = read_arrays(handle, path, names, mass.size, n_rows, optional=optional)
    return record, mass, arrays, scalar_attribute(handle, path, "dispersion_measure_background")


def _write_header(handle, format_name, mass_eV, run):
    handle.attrs["format"] = format_name
    handle.attrs["format_version"] = FORMAT_VERSION
    handle.attrs["run"] = json.dumps(run, sort_keys=True, default=str)
    handle.attrs["provenance"] = provenance_json(run=run)
    handle["mass_eV"] = mass_eV
    _describe(handle["mass_eV"], "mass_eV", format_name)


def _check_finite(handle, path):
    def visit(name, item):
        if isinstance(item, h5py.Dataset):
            check_finite(item[...], f"dataset {name}", path)

    handle.visititems(visit)
    # Numbers stored as attributes (the background's dispersion measure) are results too.
    for name, value in handle.attrs.items():
        check_finite(value, f"attribute {name}", path)
