"""Is a result converged in the simulation's resolution? Degraded boxes and a Richardson estimate.

In: a box (or series), degrade factors, masses and z_max. Out: :func:`degrade`,
a coarser :class:`~raytrace.boxes.Box` with the same electrons;
:func:`resolution_convergence`, the one-point-PDF mean <K>(m) at each
resolution (and, with ``n_rays``, the sightline std/mean), the change between
resolutions and a Richardson extrapolation to zero cell size; its figure and a
report page (PNG, PDF, text).

Degrading: the new grid has M = round(N / factor) cells a side over the same
box, and each new cell holds the average of the old cells over its volume (old
cells as uniform cubes; separable overlap weights along each axis). Where
factor divides N this is the plain block average of factor^3 cells; where it
does not, cells straddling a new boundary are shared in proportion to their
overlap, and the effective factor is N / M. Either way the total number of
electrons (the mean times the volume) is unchanged.

Richardson extrapolation (Richardson 1911): with cell size h and an error
c h^p, K(0) = K(h) + (K(h) - K(r h)) / (r^p - 1) from the two finest levels,
r their ratio of cell sizes; the order p is assumed (default 2: the trilinear
interpolant of a smooth field is second-order in h; common practice, no
source), and the order the three levels show, p_obs = log((K_3 - K_2) / (K_2 - K_1)) / log r,
is reported beside it.
"""

import math
from dataclasses import dataclass

import numpy as np

from raytrace.boxes import Box, BoxSeries, as_series
from raytrace.boxes.values import scan_density
from raytrace.core.errors import InputError

FACTORS = (1, 2, 4)
ORDER = 2.0


def _overlap_weights(n, m):
    """(m, n) weights: new cell j's average of old cells i, by overlap length on [0, 1)."""
    old = np.arange(n + 1) / n
    new = np.arange(m + 1) / m
    left = np.maximum(new[:-1, None], old[None, :-1])
    right = np.minimum(new[1:, None], old[None, 1:])
    return np.clip(right - left, 0.0, None) * m


def degrade(box, factor):
    """A new :class:`Box` with about ``factor`` times larger cells (module docstring), electrons conserved."""
    if not isinstance(box, Box):
        raise InputError(f"box: expected a Box, got {type(box).__name__}")
    n = box.n_cells
    if isinstance(factor, bool) or not isinstance(factor, (int, np.integer)) or factor < 1:
        raise InputError(f"factor: expected a whole number >= 1, got {factor!r}")
    m = max(1, int(round(n / factor)))
    if m < 2:
        raise InputError(f"factor: {factor} would leave the {n}^3 box {_where(box)} with fewer than 2 cells a side; "
                         f"expected a factor up to {n // 2}")
    if factor == 1:
        return box
    data = np.asarray(box.data, dtype=np.float64)
    if n % factor == 0:
        coarse = data.reshape(m, factor, m, factor, m, factor).mean(axis=(1, 3, 5))
    else:
        weights = _overlap_weights(n, m)
        coarse = np.einsum("ai,bj,ck,ijk->abc", weights, weights, weights, data, optimize=True)
    coarse = np.ascontiguousarray(coarse, dtype=np.float32)
    info = dict(box._info)
    info.update(scan_density(coarse, f"degraded {_where(box)}"))
    info["provenance"] = {"degraded_from": box.checksum, "factor": int(factor), "cells": [n, m],
                          "method": "block average" if n % factor == 0 else "volume-overlap average"}
    return Box(coarse, box.comoving_scale, box.redshift, box.box_size_cMpc, box.quantity, _info=info)


def _where(box):
    return str(box.path) if box.path is not None else f"(in memory, z = {box.redshift:g})"


def degrade_series(series, factor):
    """Each box of ``series`` degraded by ``factor``, blending kept."""
    series = as_series(series)
    return BoxSeries([degrade(box, factor) for box in series.boxes], blend=series.blend)


def richardson(fine, coarse, ratio, order=ORDER):
    """K(h -> 0) from K at cell sizes h (``fine``) and ratio * h (``coarse``), error ~ h^order."""
    return fine + (fine - coarse) / (ratio**order - 1.0)


@dataclass(frozen=True)
class Convergence:
    """<K>(m) at each resolution (finest first), the extrapolation, and optionally the sightline spread."""

    mass_eV: np.ndarray
    factors: tuple
    cells: tuple
    kernel: np.ndarray          # (levels, masses), eV
    error: np.ndarray           # (levels, masses), eV: each PDF mean's own error
    extrapolated: np.ndarray    # (masses,)
    order: float
    observed_order: np.ndarray  # (masses,), nan where undefined
    relative_spread: np.ndarray = None  # (levels, masses) sightline std/mean, or None

    def change(self):
        """Relative change of <K> from each level to the next coarser one, (levels - 1, masses)."""
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(self.kernel[:-1] > 0, self.kernel[1:] / self.kernel[:-1] - 1.0, np.nan)

    def lines(self, rows):
        """The page's text for the masses ``rows``."""
        grids = " -> ".join(f"{c}^3" for c in self.cells)
        out = [f"resolution: {grids} (degrade factors {', '.join(str(f) for f in self.factors)}, block or "
               "volume-overlap averages, electrons conserved)",
               f"Richardson extrapolation from the two finest levels, assumed order p = {self.order:g} "
               "(error ~ cell size^p); p_obs: the order the three levels show"]
        header = [f"{'m [eV]':>11}"] + [f"{'<K> ' + str(c) + '^3':>13}" for c in self.cells]
        header += [f"{'chg ' + str(b) + '/' + str(a):>10}" for a, b in zip(self.cells[:-1], self.cells[1:])]
        header += [f"{'<K> extrap.':>12}", f"{'p_obs':>6}"]
        if self.relative_spread is not None:
            header += [f"{'sd/mean ' + str(c):>12}" for c in self.cells]
        out.append("  " + " ".join(header))
        change = self.change()
        for k in rows:
            cells = [f"{self.mass_eV[k]:11.4g}"] + [f"{v:13.4g}" for v in self.kernel[:, k]]
            cells += [f"{100 * v:9.2f}%" if np.isfinite(v) else f"{'-':>10}" for v in change[:, k]]
            cells += [f"{self.extrapolated[k]:12.4g}",
                      f"{self.observed_order[k]:6.2f}" if np.isfinite(self.observed_order[k]) else f"{'-':>6}"]
            if self.relative_spread is not None:
                cells += [f"{v:12.3g}" for v in self.relative_spread[:, k]]
            out.append("  " + " ".join(cells))
        return out


def resolution_convergence(series, mass_eV, z_max, factors=FACTORS, order=ORDER, n_rays=0, seed=0, n_jobs=1,
                           **pdf_options):
    """<K>(m) of ``series`` degraded by each of ``factors`` (the first the finest), as a :class:`Convergence`.

    ``pdf_options`` go to :func:`raytrace.pdf_mean` (include_background, z_boxes,
    plasma, points ...). With ``n_rays`` > 0, sightlines at each level give
    the std/mean of K between rays too.
    """
    from raytrace.statistics.onepoint import pdf_mean

    series = as_series(series)
    factors = tuple(factors)
    if len(factors) < 2 or list(factors) != sorted(set(factors)):
        raise InputError(f"factors: expected at least two increasing degrade factors, got {factors!r}")
    if not (isinstance(order, (int, float)) and math.isfinite(order) and order > 0):
        raise InputError(f"order: expected a positive order of convergence, got {order!r}")
    levels = [degrade_series(series, f) for f in factors]
    results = [pdf_mean(level, mass_eV, z_max, seed=seed, n_jobs=n_jobs, **pdf_options) for level in levels]
    kernel = np.array([r.kernel for r in results])
    error = np.array([r.error for r in results])
    cells = tuple(level.boxes[0].n_cells for level in levels)
    ratio = cells[0] / cells[1]
    extrapolated = richardson(kernel[0], kernel[1], ratio, order)
    observed = np.full(kernel.shape[1], np.nan)
    if len(factors) >= 3:
        with np.errstate(invalid="ignore", divide="ignore"):
            q = (kernel[2] - kernel[1]) / (kernel[1] - kernel[0])
            observed = np.where(q > 0, np.log(q) / np.log(cells[1] / cells[2]), np.nan)
    spread = None
    if n_rays:
        from raytrace.statistics.results import cast_sightlines

        keep = {k: v for k, v in pdf_options.items() if k in ("include_background", "z_boxes", "plasma")}
        spread = []
        for level in levels:
            rays = cast_sightlines(level, mass_eV, n_rays, z_max, seed=seed, n_jobs=n_jobs, **keep)
            with np.errstate(invalid="ignore", divide="ignore"):
                spread.append(rays.kernel.std(axis=0, ddof=1) / rays.mean())
        spread = np.array(spread)
    return Convergence(results[0].mass_eV, factors, cells, kernel, error, extrapolated, float(order), observed,
                       spread)


def plot_convergence(convergence, ax=None):
    """<K>(m) at each resolution and the extrapolation (upper), and each over the extrapolation (lower)."""
    from raytrace.core.figures import pyplot

    plt = pyplot()
    if ax is None:
        figure, ax = plt.subplots(2, 1, figsize=(6.4, 6.0), sharex=True, gridspec_kw={"height_ratios": (2, 1)})
    top, bottom = ax
    mass = convergence.mass_eV
    for level, cells in enumerate(convergence.cells):
        top.loglog(mass, convergence.kernel[level], label=f"{cells}^3")
        with np.errstate(invalid="ignore", divide="ignore"):
            bottom.semilogx(mass, convergence.kernel[level] / convergence.extrapolated, label=f"{cells}^3")
    top.loglog(mass, convergence.extrapolated, "k--", label=f"extrapolated (p = {convergence.order:g})")
    top.set_ylabel("<K> from the one-point PDF [eV]")
    top.legend(fontsize=8)
    bottom.axhline(1.0, color="k", ls="--", lw=0.8)
    bottom.set_xlabel("dark-photon mass m [eV]")
    bottom.set_ylabel("<K> / extrapolated")
    return top.figure


def write_convergence_page(convergence, path_stem, overwrite=False, rows=None):
    """``<stem>.png``, ``.pdf`` (the figure) and ``.txt`` (the table), each atomic; returns kind -> path."""
    from pathlib import Path

    from raytrace.core.figures import pyplot
    from raytrace.core.provenance import atomic_output, check_outputs, output_set

    paths = {kind: Path(f"{path_stem}.{kind}") for kind in ("png", "pdf", "txt")}
    check_outputs(paths.values(), overwrite)
    rows = range(convergence.mass_eV.size) if rows is None else rows
    text = "\n".join(convergence.lines(rows)) + "\n"
    plt = pyplot()
    figure = plot_convergence(convergence)
    # The figure and the table appear together or not at all (a full disk leaves none of them).
    with output_set():
        try:
            for kind in ("png", "pdf"):
                with atomic_output(paths[kind], overwrite) as temporary:
                    figure.savefig(temporary, format=kind, dpi=150, bbox_inches="tight")
        finally:
            plt.close(figure)
        with atomic_output(paths["txt"], overwrite) as temporary:
            temporary.write_text(text)
    return paths
