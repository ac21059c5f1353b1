"""``raytrace sky``: a HEALPix sky map of conversion seen by one observer, from a TOML run file or flags.

With ``--estimate`` it traces nothing and prints what the run will take (:mod:`raytrace.sky.estimate`).
"""

import os
import time
import warnings

import numpy as np

from raytrace.cli.runfile import SKY_OPTIONS, add_flags, settings
from raytrace.cli.sightlines import (
    _warn_spread,
    bins_value,
    cluster_executor,
    load_boxes,
    masses,
    note_without_outputs,
    observed_energy,
    prepare_outputs,
    report_outputs,
)

FITS_SUFFIXES = (".fits", ".fits.gz", ".fit", ".fts")

NAME = "sky"
HELP = ("Trace rays along HEALPix pixels through a consistent light cone of box copies; write the kernel "
        "maps (HDF5, FITS), a Mollweide view and the anisotropy limit on epsilon.")


def add_arguments(parser):
    add_flags(parser, SKY_OPTIONS)


def run(args):
    from raytrace.core.outputguard import output_lock
    from raytrace.core.provenance import output_set

    started = time.perf_counter() - process_age()
    values = settings(args, SKY_OPTIONS)
    if values["sky.estimate"]:
        return print_estimate(values, started)
    keys = ("output.path", "output.fits", "output.plot")
    if values["output.fits"]:
        check_fits_path(values["output.fits"])
    done = prepare_outputs(args, values, keys)  # every output, and another run's files, once before any work
    if done is None:
        # One run per output at a time; the result, the maps and the plot appear together or not at all.
        with output_lock([values[key] for key in keys]), output_set():
            shown_eV = run_outputs(values)
        if values["output.fits"]:
            print(f"# {values['output.fits']}: HDU 1 the shown mass m = {shown_eV:.4g} eV (healpy.read_map's "
                  "default), HDU 2 every grid mass in the grid's order")
    report_outputs("sky", values, keys, done)
    note_without_outputs("sky", values, keys)
    return 0


def print_estimate(values, started):
    """Size the run (``--estimate``) and print it; nothing is traced or written."""
    import contextlib
    import io

    from raytrace.limits.anisotropy import DEFAULT_PHOTON_ENERGY_EV
    from raytrace.report.plots import shown_mass_index
    from raytrace.sky.estimate import estimate_sky

    def summary(sky):  # the run's summary, in silence: its cost is what counts here
        with contextlib.redirect_stdout(io.StringIO()), warnings.catch_warnings():
            warnings.simplefilter("ignore")
            omega0 = observed_energy(values, DEFAULT_PHOTON_ENERGY_EV)
            print_summary(sky, *sky_limits(sky, values, omega0), omega0,
                          shown_mass_index(sky, values["output.mass_eV"]))

    estimate = estimate_sky(load_boxes(values), masses(values), values["sky.nside"], values["rays.z_max"],
                            n_jobs=values["rays.jobs"], started=started, summary=summary, **sky_options(values))
    print(f"# sky of nside {values['sky.nside']} to z = {values['rays.z_max']:g}: what the run will take "
          "(nothing traced or written)")
    for line in estimate.lines():
        print(line)
    if values["output.path"]:  # the check the run makes before any work
        from raytrace.core.errors import InputError
        from raytrace.tracing.backends import HDF5Backend

        try:
            HDF5Backend(values["output.path"], resume=values["output.resume"]).check_room(
                estimate.result_bytes, "pixels or masses")
            print(f"disk: room for the result at {values['output.path']}")
        except InputError as error:
            print(f"disk: the run would be refused: {error}")
    return 0


def process_age():
    """Seconds since this process started (Linux: /proc; elsewhere 0): an estimate counts the interpreter's start."""
    try:
        with open("/proc/self/stat") as stat, open("/proc/uptime") as uptime:
            started_ticks = float(stat.read().rsplit(")", 1)[1].split()[19])
            return max(0.0, float(uptime.read().split()[0]) - started_ticks / os.sysconf("SC_CLK_TCK"))
    except (OSError, ValueError, IndexError):
        return 0.0


def sky_options(values):
    """The keyword arguments of cast_sky that the run file and flags give, besides the boxes, masses, nside,
    z_max and threads."""
    return dict(seed=values["rays.seed"], rays_per_pixel=values["sky.rays_per_pixel"],
                include_background=values["rays.include_background"], z_boxes=values["rays.z_boxes"],
                ordering=values["sky.ordering"], photon_energy_eV=values["rays.photon_energy_eV"],
                randomise_copies=values["sky.randomise_copies"], batch_pixels=values["rays.batch_size"],
                map_precision=values["sky.map_precision"], device=values["rays.device"],
                shells_z=bins_value(values["sky.shells"], "--shells (TOML sky.shells)"))


def sky_limits(sky, values, omega0):
    """(signal and noise spectra, anisotropy limits) of a sky with splits, each read one mass at a time;
    (None, None) for one ray per pixel (no splits: its noise is unknown)."""
    from raytrace.limits.anisotropy import anisotropy_limits
    from raytrace.sky.spectra import sky_spectra

    if sky.splits is None:
        return None, None
    spectra = sky_spectra(sky, n_resamples=200)
    return spectra, anisotropy_limits(sky, omega0, threshold=values["anisotropy.threshold"],
                                      cl_limits=values["anisotropy.cl_limits"], spectra=spectra)


def check_fits_path(path):
    """A FITS map needs a FITS name: healpy and other readers go by the suffix."""
    from raytrace.core.errors import InputError

    if not str(path).lower().endswith(FITS_SUFFIXES):
        raise InputError(f"--fits (TOML output.fits): {path}: expected a FITS file name ending in "
                         f"{', '.join(FITS_SUFFIXES)}")


def run_outputs(values):
    """Trace, print the summary and write the outputs (inside the run's output set); return the shown mass."""
    from raytrace.core.companions import owner_name
    from raytrace.limits.anisotropy import DEFAULT_PHOTON_ENERGY_EV
    from raytrace.report.plots import shown_mass_index
    from raytrace.report.skyfigures import sky_figure
    from raytrace.sky.figures import shown_epsilon
    from raytrace.sky.maps import cast_sky
    from raytrace.tracing.backends import HDF5Backend, MemoryBackend

    overwrite = values["output.overwrite"]
    output = values["output.path"]
    series = load_boxes(values)
    mass = masses(values)
    omega0 = observed_energy(values, DEFAULT_PHOTON_ENERGY_EV)
    backend = HDF5Backend(output, resume=values["output.resume"], overwrite=overwrite) if output else MemoryBackend()
    with cluster_executor(values) as executor:
        sky = cast_sky(series, mass, values["sky.nside"], values["rays.z_max"], n_jobs=values["rays.jobs"],
                       backend=backend, progress=True, executor=executor, **sky_options(values))
    spectra, limits = sky_limits(sky, values, omega0)
    shown = shown_mass_index(sky, values["output.mass_eV"])
    print_summary(sky, spectra, limits, omega0, shown)
    owner = owner_name(output)
    epsilon, why = shown_epsilon(limits.curves[0] if limits else None, shown, values["output.epsilon"])
    if values["output.fits"]:
        # HDU 1 the shown mass (healpy.read_map's default), HDU 2 the grid in its own order.
        sky.write_fits(values["output.fits"], sky.mass_eV, epsilon=values["output.epsilon"], omega0_eV=omega0,
                       overwrite=overwrite, owner=owner, shown_eV=float(sky.mass_eV[shown]))
    if values["output.plot"]:
        sky_figure(values["output.plot"], sky, shown, epsilon, omega0, spectra, overwrite=overwrite, owner=owner)
        print(f"# figure: dT/T at epsilon = {epsilon:.3g} ({why})")
    return float(sky.mass_eV[shown])


def print_summary(sky, spectra, limits, omega0, shown):
    """The run, per mass (up to 16) its map's mean and spreads, the anisotropy limits; then signal and noise.
    Every statistic reads one map at a time."""
    from raytrace.core.textcells import cell, no_resonance
    from raytrace.limits.anisotropy import COMPONENT_SEPARATION_CAVEAT
    from raytrace.physics.units import frequency_label

    mean = sky.mean()
    check = sky.mean_check()
    ratio = check.ratio() if check is not None else np.full(mean.size, np.nan)
    print(f"# sky of nside {sky.nside} ({sky.npix} pixels, {sky.run['rays_per_pixel']} rays each), z = 0 to "
          f"{sky.run['z_max']:g}, boxes to z = {sky.run['z_boxes']:g}, seed {sky.run['seed']}")
    if spectra is None:
        print("# one ray per pixel: no independent splits, the map's sampling noise is unknown, and no anisotropy "
              "limit is computed (--rays-per-pixel 2 or more)")
    else:
        by_name = {curve.name: curve for curve in limits.all_curves()}
        print(f"# anisotropy limits at {frequency_label(omega0)}: eps_Cl = {by_name['anisotropy'].label} "
              f"(band: signal +-1 sigma; '*': noise exceeds signal in the bands that decide it, biasing it tight: "
              f"quote the band's upper edge); eps_rms = "
              f"{by_name['anisotropy_rms'].label}")
        print(f"# {COMPONENT_SEPARATION_CAVEAT}")
    header = f"# {'mass_eV':>11} {'mean_K_eV':>11} {'raw rms':>8} {'MC/PDF':>7}"
    if spectra is not None:
        header += f" {'signal rms':>10} {'noise rms':>9} {'eps_Cl':>10} {'band':>21} {'eps_rms':>9}"
    print(header + "   (rms: of K/<K> over pixels)")
    step = max(1, sky.mass_eV.size // 16)
    rows = list(range(0, sky.mass_eV.size, step))
    for k in rows:
        kernel = sky.map("kernel", k)
        empty = no_resonance(kernel, "pixel")
        if empty:
            print(f"  {sky.mass_eV[k]:11.4e} {empty}")
            continue
        relative = kernel.std() / mean[k] if mean[k] > 0 else 0.0
        line = f"  {sky.mass_eV[k]:11.4e} {mean[k]:11.4e} {relative:8.3f} {cell(ratio[k], '.4f', 7)}"
        if spectra is not None:
            scale = mean[k] if mean[k] > 0 else 1.0
            line += (f" {spectra.rms()[0][k] / scale:10.3g} {np.sqrt(spectra.noise_variance[k]) / scale:9.3g} "
                     f"{_cells(by_name, k)}")
        print(line)
    print("# MC/PDF: the mean over pixels / the one-point-PDF mean")
    _warn_spread(sky)
    if spectra is not None:
        from raytrace.sky.spectra import signal_noise_lines

        for line in signal_noise_lines(spectra, [shown]):
            print("# " + line)
    resonating = np.count_nonzero(sky.map("crossings", shown)) / sky.npix
    print(f"# shown: m = {sky.mass_eV[shown]:.4e} eV, resonating in {100 * resonating:.1f} % of pixels "
          "(--mass chooses; default: the middle of the masses resonating in most pixels)")


def _cells(by_name, k):
    """eps_Cl (marked where noisy), its band and eps_rms of mass ``k``; '-' where not constrained."""
    def number(value, width):
        return f"{value:{width}.3e}" if np.isfinite(value) else f"{'-':>{width}}"

    measured = by_name["anisotropy"]
    mark = "*" if measured.noisy[k] else " "
    band = f"{number(by_name['anisotropy_low'].epsilon_max[k], 10)}-{number(by_name['anisotropy_high'].epsilon_max[k], 10)}"
    return f"{number(measured.epsilon_max[k], 9)}{mark} {band} {number(by_name['anisotropy_rms'].epsilon_max[k], 9)}"
