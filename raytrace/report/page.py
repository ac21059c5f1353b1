"""One page about a sightline run: what it did, what it found, and the limits it gives.

In: a :class:`~raytrace.statistics.results.SightlineResult` (object or file), optionally a
:class:`~raytrace.sky.maps.SkyResult`, a mixing epsilon and photon energy omega_0, a
spectrum and a confidence level. Out: ``<stem>.png`` and ``<stem>.pdf``, one
figure page (the mean kernel with its sightline bands, the distribution of K
over the rays at three masses, the dispersion measures, the limit curves and,
with a sky, its Mollweide map and C_l), and ``<stem>.txt``, the text summary
also printed on the page; each written atomically, none replaced unless asked.
"""

import textwrap
import warnings
from pathlib import Path

import numpy as np

from raytrace.core.errors import InputError, RaytraceWarning, require_positive_finite
from raytrace.core.figures import pyplot
from raytrace.core.provenance import atomic_output, check_outputs, output_set
from raytrace.limits.anisotropy import COMPONENT_SEPARATION_CAVEAT, DEFAULT_PHOTON_ENERGY_EV, anisotropy_limits
from raytrace.limits.limitset import plot_limits, same_mass_grid
from raytrace.limits.spectral import UnconstrainedMassWarning, result_kernels, sightline_limits
from raytrace.limits.spectrum import Spectrum, read_spectrum
from raytrace.physics.units import CMB_PHOTON_ENERGY_EV
from raytrace.report.crosscheck import warn_differences
from raytrace.report.environments import environment_lines, environment_page
from raytrace.report.plots import kernel_bands, shown_mass_index
from raytrace.report.skyfigures import draw_spectra
from raytrace.report.trust import trust_lines
from raytrace.sky.figures import draw_map, shown_epsilon
from raytrace.sky.maps import SkyResult
from raytrace.statistics.results import SightlineResult

DPI = 150
PAGE_WIDTH_IN = 11.0
KINDS = ("png", "pdf", "txt")

# Page geometry in inches: panel height, the room under a panel for its axis
# label and the next panel's title, the side margins, and one line of summary text.
_PANEL_IN, _GAP_IN, _LEFT_IN, _MIDDLE_IN, _RIGHT_IN = 3.3, 0.85, 0.85, 0.95, 0.25
_TOP_IN, _BOTTOM_IN, _LINE_IN = 0.35, 0.2, 0.125
_TEXT_POINTS = 7
_TEXT_COLUMNS = 170
# A mass is well sampled for the histograms when at least this share of the rays resonate there.
_WELL_SAMPLED = 0.5
# Share of a panel's log height kept free of data for its legend.
_LEGEND_ROOM = 0.3


def make_report(sightlines, path_stem, sky=None, epsilon=None, omega0_eV=None, spectrum=None, confidence=0.95,
                overwrite=False, fit_galaxy=False, threshold=None, cl_limits=None, plasma=None, mass_eV=None,
                kinds=KINDS):
    """Write the one-page report of a run: ``<path_stem>.png``, ``.pdf`` and ``.txt``.

    ``sightlines``, ``sky``: result objects or their HDF5 files (a sky with
    independent splits: two or more rays per pixel). ``epsilon`` (with
    ``omega0_eV``, default k T_0): show P = epsilon^2 K / omega_0 instead of K, and
    the sky's dT/T map at that epsilon (without it, at the anisotropy limit of the
    shown mass). ``omega0_eV`` is also the photon energy of the anisotropy limits
    and the sky's figures (default there 143 GHz; ``threshold``, ``cl_limits`` as
    in :func:`raytrace.limits.anisotropy.anisotropy_limits`). ``spectrum``: a Spectrum, a file
    for :func:`raytrace.limits.spectrum.read_spectrum`, or None for FIRAS. ``plasma``:
    the MeanPlasma of the homogeneous comparison (default CAMB, Planck 2018).
    ``mass_eV``: the sky map's mass (default: :func:`raytrace.report.plots.shown_mass_index`,
    the rule the sky figure follows). A sky from another set-up (boxes, masses,
    history, seed) is warned about, one line per difference. ``kinds``: which of
    png, pdf and txt to write. A run with redshift bins gets a second page,
    ``<path_stem>_where.png`` / ``.pdf`` / ``.txt`` (:mod:`raytrace.report.environments`: where
    and when conversion happens). Returns a dict kind -> path.
    """
    unknown = set(kinds) - set(KINDS)
    if unknown or not kinds:
        raise InputError(f"kinds (--formats): expected some of {', '.join(KINDS)}, got {', '.join(kinds) or 'none'}")
    paths = {kind: Path(f"{path_stem}.{kind}") for kind in KINDS if kind in kinds}
    check_outputs(paths.values(), overwrite)  # refuse before any work
    result = _load(sightlines, SightlineResult)
    if result.redshift_bins is not None:
        where = {f"where_{kind}": Path(f"{path_stem}_where.{kind}") for kind in KINDS if kind in kinds}
        check_outputs(where.values(), overwrite)
        paths.update(where)
    sky_name = f"sky {sky}" if isinstance(sky, (str, Path)) else "the sky"
    sky = None if sky is None else _load(sky, SkyResult)
    spectra = None
    if sky is not None:
        from raytrace.sky.spectra import sky_spectra

        sky.require_splits(sky_name)
        spectra = sky_spectra(sky)
        warn_differences(result, sky, f"sightlines {sightlines}" if isinstance(sightlines, (str, Path))
                         else "the sightlines", sky_name)
    omega0 = CMB_PHOTON_ENERGY_EV if omega0_eV is None else float(require_positive_finite(omega0_eV, "omega0_eV"))
    sky_omega0 = DEFAULT_PHOTON_ENERGY_EV if omega0_eV is None else omega0
    if epsilon is not None:
        epsilon = float(require_positive_finite(epsilon, "epsilon"))
    spectrum = spectrum if isinstance(spectrum, Spectrum) else read_spectrum(spectrum)

    limits, notes = _limits(result, sky, spectra, spectrum, confidence, fit_galaxy, sky_omega0, threshold, cl_limits,
                            plasma)
    picked = histogram_masses(result)
    sky_index = None if sky is None else shown_mass_index(sky, mass_eV)
    text = summary(result, limits, picked, notes, sky, sky_index, epsilon, omega0, spectra)
    plt = pyplot()
    figure = _page(plt, result, limits, picked, text, (sky, spectra, sky_index, sky_omega0), epsilon, omega0)
    with output_set():  # the chosen files, or none (checked above)
        try:
            for kind in [kind for kind in ("png", "pdf") if kind in paths]:
                # Not figures.save_figure: a page keeps its size (no tight bounding box).
                with atomic_output(paths[kind], overwrite) as temporary:
                    figure.savefig(temporary, format=kind, dpi=DPI)
        finally:
            plt.close(figure)
        for kind in ("png", "pdf"):
            if f"where_{kind}" in paths:
                environment_page(result, paths[f"where_{kind}"], overwrite)
        if "where_txt" in paths:
            with atomic_output(paths["where_txt"], overwrite) as temporary:
                temporary.write_text("".join(line + "\n" for line in environment_lines(result)))
        if "txt" in paths:
            with atomic_output(paths["txt"], overwrite) as temporary:
                temporary.write_text(text)
    return paths


def histogram_masses(result, count=3):
    """Indices of ``count`` grid masses at the quartiles of the well-sampled range.

    Well sampled: at least half of the rays resonate in the boxes; failing
    that, any ray does; failing that, the mean kernel is non-zero. Fewer indices
    come back where fewer masses qualify.
    """
    hit = (result.crossings > 0).mean(axis=0)
    for candidates in (hit >= _WELL_SAMPLED, hit > 0, result.mean() > 0):
        usable = np.flatnonzero(candidates)
        if usable.size:
            quantiles = np.arange(1, count + 1) / (count + 1)
            return np.unique(usable[np.round(quantiles * (usable.size - 1)).astype(int)])
    return np.zeros(0, dtype=int)


def _share(result):
    """The near-tangent events' share of the boxes' kernel over all masses, in words."""
    total = result.kernel_boxes.sum()
    return f"{100 * result.kernel_tangent.sum() / total:.2g} %" if total > 0 else "none"


def summary(result, limits, picked, notes, sky=None, sky_index=None, epsilon=None, omega0_eV=CMB_PHOTON_ENERGY_EV,
            spectra=None):
    """The report's text: run parameters, boxes versus background, probed masses, limits at a few masses,
    the built-in mean check and how well the spread is determined (:mod:`raytrace.report.trust`)."""
    z_max = float(result.run["z_max"])
    mass, mean, fraction = result.mass_eV, result.mean(), result.boxes_fraction()
    lines = _run_lines(result) + _kernel_lines(result, mean, fraction)

    by_name = {curve.name: curve for curve in limits.all_curves()}
    fit = by_name["background"]
    lines.append(f"limits: one-sided {100 * fit.confidence:g} % CL, spectrum {fit.spectrum_source}")
    lines.append(f"  blackbody fit T = {fit.temperature_K:.6f} +- {fit.temperature_sigma_K:.1e} K, chi^2 = "
                 f"{fit.chi2:.2f} for {fit.dof} dof; homogeneous comparison: the mean plasma from z = 0 to {z_max:g}")
    anisotropy = by_name.get("anisotropy")
    if sky is not None:
        lines.append(f"sky: nside {sky.nside} ({sky.npix} pixels, {sky.run.get('rays_per_pixel')} ray(s) per pixel), "
                     f"seed {sky.run.get('seed')}, z = 0 to {sky.run['z_max']:g}, boxes to {sky.run['z_boxes']:g}; "
                     f"map at m = {sky.mass_eV[sky_index]:.3g} eV (resonating in "
                     f"{100 * np.count_nonzero(sky.map('crossings', sky_index)) / sky.npix:.0f} % of pixels)")
        lines.append(f"  eps sky: {anisotropy.label.replace('sky: ', '')} (band: signal spectrum +-1 sigma; '*': noise exceeds signal in "
                     f"the bands that decide it); also {by_name['anisotropy_rms'].label.replace('sky ', '')}"
                     + ("" if same_mass_grid(sky.mass_eV, mass) else "; on its own mass grid, plotted only"))
        lines.append(f"  {COMPONENT_SEPARATION_CAVEAT}")
    shown_sky = anisotropy is not None and same_mass_grid(anisotropy.mass_eV, mass)

    best = np.argmin(by_name["mean"].epsilon_max)
    rows = np.unique(np.concatenate([picked, [best] if np.isfinite(by_name["mean"].epsilon_max[best]) else []]))
    header = ["m [eV]", "<K> [eV]", "boxes", "rays hit", "eps mean", "eps homog.", "eps K16%", "eps K84%"]
    header += ["eps sky"] if shown_sky else []
    header += ["<P>"] if epsilon is not None else []
    lines.append("  " + " ".join(f"{name:>11}" for name in header))
    for k in rows.astype(int):
        cells = [f"{mass[k]:.4g}", f"{mean[k]:.4g}", _percent(fraction[k]),
                 _percent((result.crossings[:, k] > 0).mean())]
        cells += [_epsilon(by_name[name].epsilon_max[k]) for name in ("mean", "background", "sightline_p16",
                                                                      "sightline_p84")]
        cells += [_epsilon(anisotropy.epsilon_max[k]) + ("*" if anisotropy.noisy[k] else "")] if shown_sky else []
        cells += [f"{result.probability(epsilon, omega0_eV)[:, k].mean():.3g}"] if epsilon is not None else []
        lines.append("  " + " ".join(f"{cell:>11}" for cell in cells))
    lines.append("  boxes: the boxes' share of <K>; rays hit: share of rays with a resonance in the boxes; "
                 "eps K16% / K84%: the limit with K at that sightline quantile")
    legend = ["none: K = 0, not constrained"] if any(
        not np.isfinite(by_name[name].epsilon_max[k]) for name in ("mean", "background", "sightline_p16", "sightline_p84")
        for k in rows.astype(int)) or (shown_sky and not np.all(np.isfinite(anisotropy.epsilon_max[rows.astype(int)]))) else []
    if epsilon is not None:
        legend.append(f"<P>: mean over rays at epsilon = {epsilon:g}, omega_0 = {omega0_eV:.4g} eV")
    if legend:
        lines.append("  " + "; ".join(legend))
    trust, warned = trust_lines(result, rows.astype(int), sky, sky_index, spectra)
    lines += trust
    for message in warned:
        warnings.warn(message, RaytraceWarning, stacklevel=3)
    lines += [f"note: {note}" for note in notes]
    # Lines this long still fit the page's width in its monospaced font.
    return "".join((line if len(line) <= _TEXT_COLUMNS else textwrap.fill(line, _TEXT_COLUMNS, subsequent_indent="      "))
                   + "\n" for line in lines)


# -- internals ------------------------------------------------------------------


def _run_lines(result):
    """The report's lines on the run: rays, redshifts, boxes and background, ionisation, cosmology, each box."""
    run = result.run
    z_max = float(run["z_max"])
    z_boxes = float(run.get("z_boxes", z_max))  # a result made by hand may not say: then the boxes served all
    with_background = bool(run.get("include_background")) and z_max > z_boxes
    lines = [
        f"raytrace {run.get('raytrace', '?')} sightline run: {result.n_rays} rays, seed {run.get('seed')}, "
        f"z = 0 to {z_max:g}, exact crossings, near-tangent pairs in the Airy form at "
        f"{float(run.get('photon_energy_eV', float('nan'))):.4g} eV ({_share(result)} of the boxes' kernel), "
        f"batches of {run.get('batch_size', '?')}",
        f"boxes serve z = 0 to {z_boxes:g}"
        + (" (snapshots blended linearly in n_e)" if run.get("blend") else " (the snapshot nearest in z serves)") + "; "
        + (f"the homogeneous background z = {z_boxes:g} to {z_max:g}" if with_background else "no background part"),
        f"ionisation: {run.get('ionisation')}; cosmology: {run.get('cosmology')}",
        f"boxes ({len(run.get('boxes', []))}):",
    ]
    for number, box in enumerate(run.get("boxes", []), 1):
        where = Path(box["path"]).name if box.get("path") else "in memory"
        lines.append(f"  {number}: z = {box['redshift']:g}, {box['box_size_cMpc']:.4g} cMpc "
                     f"(given as {box.get('box_size_given')}), {box['n_cells']}^3 cells, {box['quantity']}, "
                     f"{where}, {box.get('checksum')}")
    return lines


def _kernel_lines(result, mean, fraction):
    """The report's lines on the masses the boxes probe, the boxes' share of <K> and the dispersion measure."""
    mass, z_max = result.mass_eV, float(result.run["z_max"])
    probed = result.crossings.sum(axis=0) > 0
    lines = [f"masses: {mass.size} from {mass[0]:.3g} to {mass[-1]:.3g} eV; probed by the boxes "
             "(a resonance on at least one ray): "
             + (f"{probed.sum()} masses, {mass[probed][0]:.3g} to {mass[probed][-1]:.3g} eV" if probed.any()
                else "none")]
    from_boxes = result.kernel_boxes.mean(axis=0)
    if mean.sum() > 0:
        lines.append(f"<K> from the boxes: {100 * from_boxes.sum() / mean.sum():.1f} % of <K> summed over the grid "
                     f"masses, the homogeneous background the rest; per mass (where <K> > 0) "
                     f"{100 * np.nanmin(fraction):.1f} % to {100 * np.nanmax(fraction):.1f} %")
    else:
        lines.append("<K> = 0 at every mass: no resonance in the boxes nor in the background")
    dm = result.dispersion_measure
    lines.append(f"dispersion measure to z = {z_max:g}: mean {dm.mean():.4g} pc cm^-3 (16-84 %: "
                 f"{np.percentile(dm, 16):.4g} to {np.percentile(dm, 84):.4g}), of which the boxes "
                 f"{100 * result.dispersion_measure_boxes.mean() / dm.mean():.1f} % and the background "
                 f"{result.dispersion_measure_background:.4g} pc cm^-3")
    return lines


def _load(value, kind):
    return value if isinstance(value, kind) else kind.load(value)


def _limits(result, sky, spectra, spectrum, confidence, fit_galaxy, omega0, threshold, cl_limits, plasma):
    """The LimitSet of the page, and the unconstrained-mass warnings turned into notes for its text."""
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        limits = sightline_limits(**result_kernels(result, plasma), spectrum=spectrum, confidence=confidence,
                                  fit_galaxy=fit_galaxy)
        if sky is not None:
            limits = limits.joined(anisotropy_limits(sky, omega0, confidence, threshold, cl_limits, spectra))
    notes = []
    for warning in caught:
        if issubclass(warning.category, UnconstrainedMassWarning):
            notes.append(str(warning.message))
        else:  # anything else is the user's to see, as it would have been
            warnings.warn_explicit(warning.message, warning.category, warning.filename, warning.lineno)
    return limits, notes


def _percent(value):
    return "-" if not np.isfinite(value) else f"{100 * value:.1f} %"


def _epsilon(value):
    return f"{value:.3g}" if np.isfinite(value) else "none"


def _page(plt, result, limits, picked, text, shown_sky, epsilon, omega0):
    """The figure: two panels a row, the sky's row when there is one, then the text.

    ``shown_sky``: (sky or None, its spectra, the shown mass's index, the sky's photon energy)."""
    sky, spectra, sky_index, sky_omega0 = shown_sky
    panel_rows = 3 if sky is not None else 2
    text_in = _LINE_IN * (text.count("\n") + 1)
    height = _TOP_IN + panel_rows * (_PANEL_IN + _GAP_IN) + text_in + _BOTTOM_IN
    figure = plt.figure(figsize=(PAGE_WIDTH_IN, height))
    column_in = (PAGE_WIDTH_IN - _LEFT_IN - _MIDDLE_IN - _RIGHT_IN) / 2

    def rect(row, column, width_in=column_in):
        """[left, bottom, width, height] in figure fractions of panel (row, column)."""
        left = _LEFT_IN + column * (column_in + _MIDDLE_IN)
        top = _TOP_IN + row * (_PANEL_IN + _GAP_IN)
        return [left / PAGE_WIDTH_IN, 1 - (top + _PANEL_IN) / height, width_in / PAGE_WIDTH_IN, _PANEL_IN / height]

    _draw_kernel(figure.add_axes(rect(0, 0)), result, epsilon, omega0)
    _draw_limits(figure.add_axes(rect(0, 1)), limits, result)
    _draw_histograms(figure.add_axes(rect(1, 0)), result, picked)
    _draw_dispersion(figure.add_axes(rect(1, 1)), result)
    if sky is not None:
        measured = next(curve for curve in limits.curves if curve.name == "anisotropy")
        sky_epsilon, _ = shown_epsilon(measured if same_mass_grid(measured.mass_eV, sky.mass_eV) else None,
                                       sky_index, epsilon)
        _draw_sky(plt, figure, rect(2, 0), sky, sky_index, sky_epsilon, sky_omega0)
        draw_spectra(figure.add_axes(rect(2, 1)), spectra, sky_index, sky_epsilon, sky_omega0)
    words = figure.add_axes([_LEFT_IN / 2 / PAGE_WIDTH_IN, _BOTTOM_IN / height,
                             1 - (_LEFT_IN / 2 + _RIGHT_IN) / PAGE_WIDTH_IN, text_in / height])
    words.axis("off")
    words.text(0, 1, text, family="monospace", fontsize=_TEXT_POINTS, va="top", ha="left",
               transform=words.transAxes)
    return figure


def _readable_log_axis(axis, integers=False):
    """Major ticks at 1, 2, 5 (or 1, 3) of each decade when the axis spans few decades, minor ones unlabelled,
    so that labels neither vanish nor collide."""
    from matplotlib import ticker

    low, high = axis.get_view_interval()
    decades = np.log10(high / low)
    subs = (1.0, 2.0, 5.0) if decades < 1.5 else (1.0, 3.0) if decades < 3 else (1.0,)
    axis.set_major_locator(ticker.LogLocator(subs=subs))
    axis.set_minor_formatter(ticker.NullFormatter())
    axis.set_major_formatter(ticker.FormatStrFormatter("%d") if integers
                             else ticker.LogFormatterSciNotation(labelOnlyBase=False, minor_thresholds=(np.inf, np.inf)))


def _legend_room(ax, where):
    """Widen a log y axis at the top or the bottom so that a legend there covers no data."""
    bottom, top = ax.get_ylim()
    widen = (top / bottom) ** (_LEGEND_ROOM / (1 - _LEGEND_ROOM))
    ax.set_ylim(bottom, top * widen) if where == "top" else ax.set_ylim(bottom / widen, top)


def _draw_kernel(ax, result, epsilon, omega0):
    kernel_bands(result, ax, epsilon=epsilon, omega0_eV=omega0)
    ax.set_title("mean and sightline bands, " + ax.get_title(), fontsize=10)
    ax.set_xlim(result.mass_eV[0], result.mass_eV[-1])
    _readable_log_axis(ax.xaxis)
    ax.legend(fontsize=7, loc="best", ncol=2, framealpha=0.8)


def _draw_limits(ax, limits, result):
    if not any(np.isfinite(curve.epsilon_max).any() for curve in limits.all_curves()):
        ax.text(0.5, 0.5, "no mass is constrained (K = 0 everywhere)", ha="center", transform=ax.transAxes)
        ax.set_axis_off()
        return
    plot_limits(ax, limits, title=f"upper limits on epsilon, sightlines to z = {result.run['z_max']:g}")
    ax.title.set_fontsize(10)
    ax.set_xlim(result.mass_eV[0], result.mass_eV[-1])
    _readable_log_axis(ax.xaxis)
    # Bands reach the top where a quantile's K is 0: the free room for the legend is at the bottom.
    _legend_room(ax, "bottom")
    ax.legend(fontsize=7, loc="lower center")


def _draw_histograms(ax, result, picked):
    ax.set_title("K over sightlines at three masses", fontsize=10)
    kernel = result.kernel[:, picked]
    positive = kernel[kernel > 0]
    if positive.size == 0:
        ax.text(0.5, 0.5, "no mass with K > 0", ha="center", transform=ax.transAxes)
        return
    low, high = positive.min(), positive.max()
    if high <= low * 1.01:  # all rays alike (the background alone): give the single value a visible bin
        low, high = low / 1.5, high * 1.5
    bins = int(np.clip(2 * np.sqrt(result.n_rays), 8, 40))
    edges = np.geomspace(low, high * 1.0001, bins + 1)
    for colour, k in zip(("C1", "C2", "C3"), picked):
        values = result.kernel[:, k]
        zeros = int(np.sum(values <= 0))
        label = f"m = {result.mass_eV[k]:.3g} eV" + (f" ({zeros} rays with K = 0)" if zeros else "")
        ax.hist(values[values > 0], bins=edges, histtype="step", lw=1.5, color=colour, label=label)
        ax.axvline(values.mean(), color=colour, ls="--", lw=1)
    ax.plot([], [], color="0.4", ls="--", lw=1, label="mean over sightlines")
    ax.set_xscale("log")
    _readable_log_axis(ax.xaxis)
    ax.set_xlabel("conversion kernel K [eV]  (log-spaced bins)")
    ax.set_ylabel("number of sightlines")
    ax.legend(fontsize=7, loc="upper left")


def _draw_dispersion(ax, result):
    dm = result.dispersion_measure
    bins = int(np.clip(2 * np.sqrt(result.n_rays), 8, 40))
    ax.hist(dm, bins=bins, color="C0", alpha=0.7)
    ax.axvline(dm.mean(), color="k", ls="--", lw=1, label=f"mean {dm.mean():.4g} pc cm$^{{-3}}$")
    if result.dispersion_measure_background > 0:
        ax.plot([], [], " ", label=f"of which background: {result.dispersion_measure_background:.4g} pc cm$^{{-3}}$")
    ax.set_title(f"dispersion measure to z = {result.run['z_max']:g}", fontsize=10)
    ax.set_xlabel("DM [pc cm$^{-3}$]")
    ax.set_ylabel("number of sightlines")
    ax.legend(fontsize=7, loc="upper right")


def _draw_sky(plt, figure, where, sky, index, epsilon, omega0):
    left, bottom, width, height = where
    plt.figure(figure.number)  # mollview draws on pyplot's current figure
    # sub=(1, 1, 1) spans the page; the margins cut it down to this panel's place.
    draw_map(sky, index, epsilon, omega0, sub=(1, 1, 1), margins=(left, bottom, 1 - left - width, 1 - bottom - height),
             title=f"sky at m = {sky.mass_eV[index]:.3g} eV, z < {sky.run['z_max']:g}")
    plt.gca().title.set_fontsize(10)  # mollview leaves its map axes current, the colour bar last
    figure.axes[-1].tick_params(labelsize=7)
