"""``raytrace sky``: a HEALPix sky map of conversion seen by one observer, from a TOML run file or flags."""

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

    values = settings(args, SKY_OPTIONS)
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


def check_fits_path(path):
    """A FITS map needs a FITS name: healpy and other readers go by the suffix."""
    from raytrace.core.errors import InputError

    if not str(path).lower().endswith(FITS_SUFFIXES):
        raise InputError(f"--fits (TOML output.fits): {path}: expected a FITS file name ending in "
                         f"{', '.join(FITS_SUFFIXES)}")


def run_outputs(values):
    """Trace, print the summary and write the outputs (inside the run's output set); return the shown mass."""
    from raytrace.core.companions import owner_name
    from raytrace.limits.anisotropy import anisotropy_limit, read_cl_limits
    from raytrace.report.plots import shown_mass_index
    from raytrace.sky.maps import cast_sky
    from raytrace.tracing.backends import HDF5Backend, MemoryBackend

    overwrite = values["output.overwrite"]
    output = values["output.path"]
    cl_limits = read_cl_limits(values["anisotropy.cl_limits"]) if values["anisotropy.cl_limits"] else None
    series = load_boxes(values)
    mass = masses(values)
    omega0 = observed_energy(values)
    backend = HDF5Backend(output, resume=values["output.resume"], overwrite=overwrite) if output else MemoryBackend()
    with cluster_executor(values) as executor:
        sky = cast_sky(
            series, mass, values["sky.nside"], values["rays.z_max"], seed=values["rays.seed"],
            rays_per_pixel=values["sky.rays_per_pixel"], n_jobs=values["rays.jobs"],
            include_background=values["rays.include_background"], z_boxes=values["rays.z_boxes"],
            ordering=values["sky.ordering"], photon_energy_eV=values["rays.photon_energy_eV"],
            randomise_copies=values["sky.randomise_copies"], batch_pixels=values["rays.batch_size"],
            backend=backend, progress=True, executor=executor, device=values["rays.device"],
            shells_z=bins_value(values["sky.shells"], "--shells (TOML sky.shells)"),
        )
    limit = anisotropy_limit(sky, omega0, threshold=values["anisotropy.threshold"], cl_limits=cl_limits)
    shown = shown_mass_index(sky, values["output.mass_eV"])
    print_summary(sky, limit, values["anisotropy.threshold"], omega0, shown)
    owner = owner_name(output)
    if values["output.fits"]:
        # HDU 1 the shown mass (healpy.read_map's default), HDU 2 the grid in its own order.
        sky.write_fits(values["output.fits"], sky.mass_eV, epsilon=values["output.epsilon"], omega0_eV=omega0,
                       overwrite=overwrite, owner=owner, shown_eV=float(sky.mass_eV[shown]))
    if values["output.plot"]:
        sky.plot_mollweide(sky.mass_eV[shown], values["output.plot"], epsilon=values["output.epsilon"],
                           omega0_eV=omega0, overwrite=overwrite, owner=owner)
    return float(sky.mass_eV[shown])


def print_summary(sky, limit, threshold, omega0, shown):
    from raytrace.core.textcells import cell, no_resonance
    from raytrace.statistics.spread import robust_spread, sky_rms_interval

    mean = sky.kernel.mean(axis=0)
    rms = sky.kernel.std(axis=0)
    half_width, mad = robust_spread(sky.kernel)
    check = sky.mean_check()
    ratio = check.ratio() if check is not None else np.full(mean.size, np.nan)
    relative_sem = check.relative_error() if check is not None else np.full(mean.size, np.nan)
    interval = sky_rms_interval(sky, omega0, n_resamples=200, seed=sky.run["seed"], threshold=threshold)
    print(f"# sky of nside {sky.nside} ({sky.npix} pixels, {sky.run['rays_per_pixel']} rays each), z = 0 to "
          f"{sky.run['z_max']:g}, boxes to z = {sky.run['z_boxes']:g}, seed {sky.run['seed']}")
    print(f"# anisotropy test: rms of dT/T below {threshold:g} at omega_0 = {omega0:.4g} eV")
    header = (f"# {'mass_eV':>11} {'mean_K_eV':>11} {'rms/mean':>9} {'hw16-84':>9} {'MAD':>9} {'MC/PDF':>7} "
              f"{'sem/PDF':>7} {'eps_max_rms':>12} {'68% interval':>21}")
    if "epsilon_max_cl" in limit:
        header += f" {'eps_max_Cl':>11}"
    print(header)
    step = max(1, sky.mass_eV.size // 16)
    for k in range(0, sky.mass_eV.size, step):
        empty = no_resonance(sky.kernel[:, k], "pixel")
        if empty:
            print(f"  {sky.mass_eV[k]:11.4e} {empty}")
            continue
        relative = rms[k] / mean[k] if mean[k] > 0 else 0.0
        band = (f"{interval['epsilon_low'][k]:.3e}-{interval['epsilon_high'][k]:.3e}"
                if np.isfinite(interval['epsilon_high'][k]) else "-")
        line = (f"  {sky.mass_eV[k]:11.4e} {mean[k]:11.4e} {relative:9.3f} {half_width[k]:9.3e} {mad[k]:9.3e} "
                f"{cell(ratio[k], '.4f', 7)} {cell(relative_sem[k], '.4f', 7)} "
                f"{cell(limit['epsilon_max_rms'][k], '.3e', 12)} {band:>21}")
        if "epsilon_max_cl" in limit:
            line += f" {cell(limit['epsilon_max_cl'][k], '.3e', 11)}"
        print(line)
    print("# MC/PDF: the mean over pixels / the one-point-PDF mean (sem: batch means over the 12 base pixels); "
          "interval: 200 bootstrap resamples of the pixels (correlated pixels: a lower bound on its width); "
          "'-': no number there (a flat map sets no limit)")
    _warn_spread(sky)
    resonating = (sky.crossings[:, shown] > 0).mean()
    print(f"# shown: m = {sky.mass_eV[shown]:.4e} eV, resonating in {100 * resonating:.1f} % of pixels "
          "(--mass chooses; default: the middle of the masses resonating in most pixels)")
