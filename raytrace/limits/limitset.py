"""A set of limit curves, and its tables and plots.

In: limit curves of any kind (the :class:`~raytrace.limits.spectral.SpectralLimit` of
:mod:`raytrace.limits.spectral`, the :class:`~raytrace.limits.anisotropy.AnisotropyLimit` of
:mod:`raytrace.limits.anisotropy`) gathered in
a :class:`LimitSet` (lines plus :class:`LimitBand` bands) on one mass grid.
Out: a CSV or HDF5 table (:func:`limit_table`) and a log-log plot of
epsilon_max(m) (:func:`plot_limits`).

Curves are duck-typed so that different limits can sit side by side in one
LimitSet, table and plot: a curve has ``name`` (an identifier for table
columns), ``label`` (legend text), ``mass_eV``, ``epsilon_max``, ``columns()``
(dict of per-mass arrays), ``unconstrained()`` (per mass, why epsilon is not
constrained there, '' where it is) and ``metadata()`` (dict of scalars).
"""

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from raytrace.core.errors import InputError
from raytrace.core.provenance import atomic_output, hdf5_image, provenance_json

_TABLE_SUFFIXES = {".csv": "csv", ".h5": "hdf5", ".hdf5": "hdf5"}


@dataclass(frozen=True)
class LimitBand:
    """A band between two curves (e.g. the limits from two sightline quantiles of K)."""

    lower: object
    upper: object
    label: str


@dataclass(frozen=True)
class LimitSet:
    """Curves drawn as lines and bands drawn filled; all share one mass grid for a table."""

    curves: tuple = ()
    bands: tuple = ()

    def __post_init__(self):
        object.__setattr__(self, "curves", tuple(self.curves))
        object.__setattr__(self, "bands", tuple(self.bands))

    def with_curve(self, curve):
        """A new LimitSet with ``curve`` added to the lines (e.g. an anisotropy limit)."""
        return LimitSet(self.curves + (curve,), self.bands)

    def joined(self, other):
        """A new LimitSet with the curves and bands of ``other`` (a LimitSet) added."""
        return LimitSet(self.curves + other.curves, self.bands + other.bands)

    def all_curves(self):
        """Lines, then each band's two edges."""
        return self.curves + tuple(edge for band in self.bands for edge in (band.lower, band.upper))

def same_mass_grid(mass_a, mass_b):
    """Whether two mass grids are the same (to rounding), as one table needs."""
    a, b = np.asarray(mass_a, dtype=float), np.asarray(mass_b, dtype=float)
    return a.shape == b.shape and bool(np.allclose(a, b, rtol=1e-12, atol=0))


def limit_table(path, limits, overwrite=False):
    """Write the curves (and band edges) of ``limits`` as CSV (.csv) or HDF5 (.h5, .hdf5), atomically.

    ``limits``: a :class:`LimitSet` or a sequence of curves, all on one mass
    grid. CSV: '#' header lines with each curve's metadata, then one row per
    mass, columns mass_eV and <curve>_<column>. HDF5: dataset mass_eV, one
    group per curve (its columns as datasets, metadata as attributes) and a
    provenance attribute.

    No table holds NaN or inf: where a curve does not constrain epsilon (K = 0,
    a flat map) its column ``<curve>_unconstrained`` (HDF5: dataset
    ``<curve>/unconstrained``) says why, empty where it is constrained, and the
    numbers there are empty CSV fields, or :data:`FILL_VALUE` in HDF5 (each
    dataset's ``_FillValue`` attribute, as CF readers expect).
    """
    path = Path(path)
    kind = _TABLE_SUFFIXES.get(path.suffix.lower())
    if kind is None:
        raise InputError(f"{path}: expected a table file ending in {', '.join(_TABLE_SUFFIXES)}")
    limits = _as_limit_set(limits)
    curves = limits.all_curves()
    if not curves:
        raise InputError(f"{path}: no limit curves to write")
    mass = np.asarray(curves[0].mass_eV)
    for curve in curves[1:]:
        if not np.array_equal(np.asarray(curve.mass_eV), mass):
            raise InputError(f"{path}: curves {curves[0].name!r} and {curve.name!r} are on different mass grids")
    bands = {band.label: [band.lower.name, band.upper.name] for band in limits.bands}
    with atomic_output(path, overwrite) as temporary:
        if kind == "csv":
            _write_csv(temporary, mass, curves, bands)
        else:
            _write_hdf5(temporary, mass, curves, bands)
    return path


def plot_limits(target, limits, overwrite=False, title=None):
    """Draw epsilon_max(m) log-log: curves as lines, bands filled between their edges.

    ``target``: a matplotlib Axes (drawn on and returned) or a file path
    (PNG, PDF, ...; written atomically with the Agg backend, path returned).
    Masses with epsilon_max = inf are left out of lines; a band edge at inf
    fills to the top of the plot.
    """
    limits = _as_limit_set(limits)
    if hasattr(target, "plot"):
        _draw(target, limits, title)
        return target
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    path = Path(target)
    figure = Figure(figsize=(7.0, 4.8), layout="constrained")
    FigureCanvasAgg(figure)
    _draw(figure.add_subplot(), limits, title)
    with atomic_output(path, overwrite) as temporary:
        try:
            figure.savefig(temporary, format=path.suffix.lstrip(".").lower() or None, dpi=150)
        except ValueError as error:  # matplotlib's message for an unknown format
            raise InputError(f"{path}: cannot write the plot ({error})") from None
    return path


# -- internals ------------------------------------------------------------------


def _as_limit_set(limits):
    if isinstance(limits, LimitSet):
        return limits
    if hasattr(limits, "epsilon_max"):
        return LimitSet((limits,))
    return LimitSet(tuple(limits))


def _table_columns(curves):
    """(name, values, reason) per table column: numbers with the reason, per mass, where they are not finite.

    Where a curve does not constrain epsilon its numbers are no numbers (inf, NaN in
    memory); a table holds none of them but an explicit reason column instead.
    """
    columns = []
    for curve in curves:
        reasons = np.asarray(curve.unconstrained(), dtype=str)
        for key, values in curve.columns().items():
            values = np.asarray(values, dtype=float)
            # Only an unconstrained mass may lack a number: anything else would be a bug to show, not hide.
            if np.any(~np.isfinite(values) & (reasons == "")):
                raise RuntimeError(f"limit curve {curve.name!r}: column {key} is not finite at a constrained mass")
            columns.append((f"{curve.name}_{key}", values, reasons))
        columns.append((f"{curve.name}_unconstrained", None, reasons))
    return columns


def _write_csv(temporary, mass, curves, bands):
    columns = _table_columns(curves)
    with open(temporary, "w") as handle:
        handle.write("# raytrace epsilon_max(m) upper limits\n")
        handle.write(f"# provenance: {provenance_json(bands=bands)}\n")
        for curve in curves:
            for key, value in curve.metadata().items():
                handle.write(f"# {curve.name}.{key}: {'none' if value is None else value}\n")
        handle.write("# fields of a mass where a curve does not constrain epsilon are empty; its "
                     "<curve>_unconstrained column says why (empty where it is constrained)\n")
        handle.write(",".join(["mass_eV"] + [name for name, _, _ in columns]) + "\n")
        for row in range(mass.size):
            fields = [f"{mass[row]:.10g}"]
            for _, values, reasons in columns:
                if values is None:
                    fields.append(reasons[row])
                else:
                    fields.append("" if reasons[row] else f"{values[row]:.10g}")
            handle.write(",".join(fields) + "\n")


#: What an HDF5 table holds where a curve does not constrain epsilon (netCDF's default fill
#: of a double, so CF readers such as netCDF4 and xarray mask it); the 'unconstrained' dataset says why.
FILL_VALUE = 9.969209968386869e36


#: The HDF5 table's format (attributes 'format', 'format_version'), as every other output carries one.
TABLE_FORMAT = "raytrace-limits-1"
TABLE_FORMAT_VERSION = 1
#: (unit, description) of each dataset of an HDF5 limit table.
TABLE_DATASETS = {
    "mass_eV": ("eV", "dark-photon masses of the grid"),
    "kernel_eV": ("eV", "conversion kernel K the limit is drawn from; P = epsilon^2 K / omega_0"),
    "epsilon_max": ("1", "upper limit on the kinetic mixing epsilon at the curve's confidence level"),
    "s_hat": ("1", "best-fit s = epsilon^2 of the spectral fit (may be negative)"),
    "s_sigma": ("1", "1-sigma error of s = epsilon^2"),
    "unconstrained": ("", "why epsilon is not constrained at this mass; empty where it is"),
}


def _describe(dataset, key):
    unit, description = TABLE_DATASETS[key]
    dataset.attrs["unit"] = unit
    dataset.attrs["description"] = description + (f"; {FILL_VALUE:g} where not constrained"
                                                   if key not in ("mass_eV", "unconstrained") else "")


def _write_hdf5(temporary, mass, curves, bands):
    import h5py

    columns = dict((name, (values, reasons)) for name, values, reasons in _table_columns(curves))
    with hdf5_image(temporary) as handle:
        handle.attrs["format"] = TABLE_FORMAT
        handle.attrs["format_version"] = TABLE_FORMAT_VERSION
        handle.attrs["provenance"] = provenance_json(bands=bands)
        _describe(handle.create_dataset("mass_eV", data=mass), "mass_eV")
        for curve in curves:
            group = handle.create_group(curve.name)
            reasons = columns[f"{curve.name}_unconstrained"][1]
            for key in curve.columns():
                values = np.where(reasons == "", columns[f"{curve.name}_{key}"][0], FILL_VALUE)
                dataset = group.create_dataset(key, data=values, fillvalue=FILL_VALUE)
                dataset.attrs["_FillValue"] = FILL_VALUE
                _describe(dataset, key)
            _describe(group.create_dataset("unconstrained", data=reasons.astype(object), dtype=h5py.string_dtype()),
                      "unconstrained")
            for key, value in curve.metadata().items():
                if value is not None:
                    group.attrs[key] = value


def _draw(ax, limits, title):
    finite = [np.asarray(c.epsilon_max)[np.isfinite(c.epsilon_max)] for c in limits.all_curves()]
    finite = np.concatenate(finite) if finite else np.zeros(0)
    if finite.size == 0:
        raise InputError("plot_limits: every epsilon_max is inf; nothing is constrained to draw")
    top = 3.0 * finite.max()
    for band in limits.bands:
        # An edge at inf fills to beyond the top; where both are inf there is no band at all.
        lower = np.where(np.isfinite(band.lower.epsilon_max), band.lower.epsilon_max, 10 * top)
        upper = np.where(np.isfinite(band.upper.epsilon_max), band.upper.epsilon_max, 10 * top)
        nowhere = ~np.isfinite(band.lower.epsilon_max) & ~np.isfinite(band.upper.epsilon_max)
        lower, upper = np.where(nowhere, np.nan, lower), np.where(nowhere, np.nan, upper)
        # The legend lists only what the plot shows.
        ax.fill_between(band.lower.mass_eV, lower, upper, alpha=0.3, linewidth=0,
                        label=band.label if not nowhere.all() else "_nolegend_")
    for curve in limits.curves:
        values = np.where(np.isfinite(curve.epsilon_max), curve.epsilon_max, np.nan)
        ax.plot(curve.mass_eV, values, label=curve.label if np.isfinite(values).any() else "_nolegend_")
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.set_ylim(finite.min() / 3.0, top)
    confidences = {getattr(c, "confidence", None) for c in limits.all_curves()} - {None}
    level = f" ({', '.join(f'{100 * c:g} %' for c in sorted(confidences))} CL)" if confidences else ""
    ax.set_xlabel("dark-photon mass m [eV]")
    ax.set_ylabel(f"upper limit on kinetic mixing epsilon{level}")
    if title:
        ax.set_title(title)
    ax.legend(fontsize="small")
    ax.grid(True, which="major", alpha=0.3)