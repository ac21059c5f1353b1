"""The HDF5 file format of results: sightline, sky and one-point-PDF results alike.

In: a result's per-row arrays (rays or pixels, by a layout of names), its
masses, run record and scalar attributes. Out: a complete result file written
atomically with provenance, a unit and a description on every dataset, and
never a NaN or inf (:func:`save_arrays`); reading opens only a complete file
of the expected format and version, with clear errors (:class:`open_result`).
The header writer is shared with the checkpoints of :mod:`raytrace.tracing.backends`.
"""

import json
from pathlib import Path

import h5py
import numpy as np

from raytrace.core.errors import InputError, require_path
from raytrace.core.provenance import atomic_output, hdf5_image, provenance_json
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
#: every dataset and stores crossings as float64 in sightline and sky files alike. Files without the
#: attribute are version 1, still read; a newer version is refused.
FORMAT_VERSION = 2

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
    "kernel_shells_boxes": ("eV", "kernel from the boxes per {row}, redshift shell (group redshift_shells) and mass"),
}
# Stored dtypes that differ from the arrays' own (the sightline counts are int32 while a run fills them,
# a sky's are means over a pixel's rays).
FILE_DTYPES = {"crossings": np.float64, "tangent_events": np.float64}


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


def save_arrays(path, format_name, mass_eV, run, layout, source, overwrite, attributes, groups=None):
    """Write ``layout``'s arrays of ``source`` plus the background kernel to HDF5, atomically.

    ``groups`` maps a group name to ``(datasets, attributes)`` as :func:`write_group` takes them.
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
            for name, (datasets, group_attributes) in (groups or {}).items():
                write_group(handle, name, datasets, group_attributes)
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
        try:
            version = format_version(self.handle, self.path, FORMAT_VERSION)
        except InputError:
            self.handle.close()
            raise
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
        if isinstance(item, h5py.Dataset) and item.dtype.kind == "f" and not np.all(np.isfinite(item[...])):
            raise InputError(f"{path}: dataset {name} would hold NaN or inf; nothing was written")

    handle.visititems(visit)
    # Numbers stored as attributes (the background's dispersion measure) are results too.
    for name, value in handle.attrs.items():
        if np.asarray(value).dtype.kind == "f" and not np.all(np.isfinite(value)):
            raise InputError(f"{path}: attribute {name} would hold NaN or inf; nothing was written")
