"""Where conversion happens: a sightline run's kernel by density class and by redshift (PHYSICS.md section 11).

In: a :class:`~raytrace.results.SightlineResult` with redshift bins
(:class:`raytrace.binstats.BinnedKernels`). Out: text lines for the report
(:func:`environment_lines`: each class's share of <K> at a few masses, where dK/dz
peaks, the built-in check per bin) and a page (:func:`environment_page`, drawn by
:func:`draw_environments`): <K>(m) stacked by class (voids, sheets and filaments,
halos, the homogeneous background beyond the boxes), and dK/dz against z at a few
masses, each bin's mean over its width with its Monte Carlo standard error.
"""

import numpy as np

from raytrace.core.errors import InputError


def shown_masses(binned, mass_eV, count=5):
    """Indices of ``count`` masses spread (in log) over those where the boxes give a kernel on some ray."""
    boxes = np.flatnonzero(binned.class_mean[:-1].sum(axis=0) > 0)
    candidates = boxes if boxes.size else np.flatnonzero(binned.class_mean.sum(axis=0) > 0)
    if candidates.size == 0:
        return np.zeros(0, dtype=int)
    return np.unique(candidates[np.round(np.linspace(0, candidates.size - 1, min(count, candidates.size))).astype(int)])


def environment_lines(result, count=5):
    """The report's lines on where conversion happens (nothing without bins)."""
    from raytrace.statistics.meancheck import binned_mean_check

    binned = result.redshift_bins
    if binned is None:
        return []
    mass = result.mass_eV
    edges = ", ".join(f"{e:g}" for e in binned.density_edges)
    lines = [f"where: the crossings' density contrast D* = (m / mbar_gamma(z_c))^2 in classes with edges {edges}; "
             f"{binned.n_bins} redshift bins from z = {binned.edges_z[0]:g} to {binned.edges_z[-1]:g}"]
    share = binned.class_share()
    derivative = binned.derivative()
    lines.append("  " + " ".join(f"{name:>12}" for name in ("m [eV]", "<K> [eV]", *_short_names(binned.names),
                                                             "dK/dz peak z")))
    for k in shown_masses(binned, mass, count):
        peak = int(np.argmax(derivative[:, k]))
        cells = [f"{mass[k]:.4g}", f"{binned.class_mean[:, k].sum():.4g}",
                 *(f"{100 * value:.1f} %" if np.isfinite(value) else "-" for value in share[:, k]),
                 f"{binned.edges_z[peak]:.3g}-{binned.edges_z[peak + 1]:.3g}"]
        lines.append("  " + " ".join(f"{cell:>12}" for cell in cells))
    check = binned_mean_check(result)
    if check is not None and check.pull().size:
        pull = np.abs(check.pull())
        lines.append(f"  per-bin check: the rays' mean against the one-point-PDF mean in {pull.size} (bin, mass) "
                     f"pairs with >= 20 rays hitting: largest |pull| {pull.max():.2f} (flagged above "
                     f"{check.limit():.2f})")
    return lines


def _short_names(names):
    return [{"sheets and filaments": "sheets+fil.", "homogeneous background": "background"}.get(n, n[:12])
            for n in names]


def draw_environments(figure, result, masses_eV=None):
    """Two panels on ``figure``: <K>(m) stacked by class, and dK/dz against z at a few masses."""
    binned = result.redshift_bins
    if binned is None:
        raise InputError("the result has no redshift bins (cast it with redshift_bins / --redshift-bins)")
    mass = result.mass_eV
    left, right = figure.subplots(1, 2)
    stacked = np.cumsum(binned.class_mean, axis=0)
    lower = np.zeros(mass.size)
    for colour, (name, upper) in enumerate(zip(binned.names, stacked)):
        left.fill_between(mass, np.maximum(lower, 1e-300), np.maximum(upper, 1e-300), color=f"C{colour}", alpha=0.7,
                          lw=0, label=name)
        lower = upper
    total = stacked[-1]
    positive = total[total > 0]
    left.set_xscale("log")
    if positive.size:
        left.set_yscale("log")
        left.set_ylim(positive.min() / 3, positive.max() * 3)
    left.set_xlabel("dark-photon mass m [eV]")
    left.set_ylabel("<K> by density class, stacked [eV]")
    left.set_title(f"where: D* = (m / mbar_gamma)^2, edges {', '.join(f'{e:g}' for e in binned.density_edges)}",
                   fontsize=9)
    left.legend(fontsize="small")
    _draw_derivative(right, binned, mass, masses_eV, float(result.run["z_boxes"]))
    return left, right


def _draw_derivative(ax, binned, mass, masses_eV, z_boxes):
    """dK/dz per bin at a few masses over the bins the boxes serve (beyond, the background's few crossings)."""
    picks = shown_masses(binned, mass, 3) if masses_eV is None else \
        [int(np.argmin(np.abs(np.log(mass / m)))) for m in np.atleast_1d(masses_eV)]
    count = max(int(np.sum(binned.edges_z[1:] <= z_boxes * (1 + 1e-12))), 1)
    edges = binned.edges_z[:count + 1]
    middle = np.sqrt((1 + edges[:-1]) * (1 + edges[1:])) - 1
    for colour, k in enumerate(picks):
        values = binned.derivative()[:count, k]
        error = binned.standard_error("bin")[:count, k] / np.diff(edges)
        ax.stairs(np.where(values > 0, values, np.nan), edges, color=f"C{colour}", label=f"m = {mass[k]:.3g} eV")
        ax.errorbar(middle, values, yerr=error, fmt="none", color=f"C{colour}", lw=0.8)
    ax.set_yscale("log")
    ax.set_xlabel(f"redshift of the crossing z_c (the boxes' range, z <= {z_boxes:g})")
    ax.set_ylabel("dK/dz, mean over rays [eV]")
    ax.set_title("when: the kernel per unit redshift (bars: Monte Carlo standard error)", fontsize=9)
    ax.legend(fontsize="small")


def environment_page(result, path, overwrite=False, masses_eV=None):
    """Write the page of :func:`draw_environments`, with :func:`environment_lines` under it, to ``path``
    (PNG, PDF) atomically; returns the path."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    from raytrace.core.provenance import atomic_output

    lines = environment_lines(result)
    figure = Figure(figsize=(11.0, 4.6 + 0.14 * len(lines)), layout="constrained")
    FigureCanvasAgg(figure)
    panels, text = figure.subfigures(2, 1, height_ratios=[4.6, 0.14 * len(lines) + 0.01])
    draw_environments(panels, result, masses_eV)
    text.text(0.01, 0.98, "\n".join(lines), family="monospace", fontsize=7, va="top")
    with atomic_output(path, overwrite) as temporary:
        figure.savefig(temporary, format=str(path).rsplit(".", 1)[-1].lower(), dpi=150)
    return path
