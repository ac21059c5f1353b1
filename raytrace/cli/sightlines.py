"""``raytrace sightlines``: random sightlines through a box series, from a TOML run file or flags."""

import numpy as np

from raytrace.cli.runfile import SIGHTLINE_OPTIONS, VOCABULARY, add_flags, settings
from raytrace.core.errors import InputError

NAME = "sightlines"
HELP = ("Cast random sightlines through stacked, rotated copies of the boxes; write the per-ray "
        "conversion kernels (HDF5) and a plot of the mean with sightline bands.")


def add_arguments(parser):
    add_flags(parser, SIGHTLINE_OPTIONS)


def load_boxes(values):
    """The box series a run file's [boxes] section describes."""
    from raytrace.cli.box_options import load_run_series

    return load_run_series(values, SIGHTLINE_OPTIONS)


def masses(values):
    from raytrace.tracing.checks import check_run_memory

    low, high, count = values["masses.min_eV"], values["masses.max_eV"], values["masses.count"]
    if not low < high and count > 1:
        raise InputError(f"masses: expected min_eV < max_eV, got {low:g} and {high:g}")
    check_run_memory(1, count, "--mass-count (TOML masses.count)")  # the grid alone, before it is made
    return np.geomspace(low, high, count)


def observed_energy(values):
    from raytrace.physics.units import CMB_PHOTON_ENERGY_EV, photon_energy_eV

    if values["output.frequency"] is None:
        return CMB_PHOTON_ENERGY_EV
    return photon_energy_eV(values["output.frequency"], "output.frequency (--frequency)")


def cluster_executor(values):
    """The dask executor of --scheduler, connected for the run (None, in a null context, without one)."""
    from contextlib import nullcontext

    scheduler = values["rays.scheduler"]
    if scheduler is None:
        if values["rays.workers"] is not None:
            raise InputError("--workers (TOML rays.workers): sizes a local cluster; add --scheduler local")
        return nullcontext()
    from raytrace.tracing.cluster import DaskExecutor

    # On the workers, --jobs is the numba threads of each task.
    return DaskExecutor(scheduler, workers=values["rays.workers"], numba_threads=values["rays.jobs"])


def note_without_outputs(command, values, keys):
    """Say on stderr that a run asked for no output file: it printed a summary and saved nothing."""
    import sys

    if not any(values[key] for key in keys):
        flags = ", ".join(VOCABULARY[key].flag for key in keys)
        print(f"raytrace {command}: note: no output file requested ({flags}): the summary above is all "
              "this run kept", file=sys.stderr)


def output_paths(values, keys):
    """The run's output paths among ``keys``, checked once before any work; write them in an output_set.

    Refuses a --resume of a finished result, outputs that exist (without
    --overwrite), cannot be made or repeat a path, files marked by another run
    (:func:`raytrace.core.companions.check_outputs`), and a figure name without a known format.
    """
    from raytrace.core.companions import check_outputs

    if values["output.path"] and values.get("output.resume"):
        from raytrace.tracing.backends import HDF5Backend

        HDF5Backend(values["output.path"], resume=True).refuse_if_finished()
    check_outputs([(values[key], _flag(key)) for key in keys], values["output.overwrite"], values["output.path"])
    if values.get("output.plot"):
        from raytrace.core.figures import check_figure_path

        check_figure_path(values["output.plot"], _flag("output.plot"))
    return [values[key] for key in keys if values[key]]


def _flag(key):
    return f"{VOCABULARY[key].flag} (TOML {key})"


def run(args):
    from raytrace.core.provenance import output_set

    values = settings(args, SIGHTLINE_OPTIONS)
    output = values["output.path"]
    plot = values["output.plot"]
    keys = ("output.path", "output.plot")
    output_paths(values, keys)
    with output_set():  # checked above; the result and the plot appear together or not at all
        run_outputs(values, output, plot)
    if output:
        print(f"result: {output}")
    if plot:
        print(f"plot: {plot}")
    note_without_outputs("sightlines", values, keys)
    return 0


def run_outputs(values, output, plot):
    """Trace, print the summary and write the outputs (inside the run's output set)."""
    from raytrace.core.companions import owner_name
    from raytrace.statistics.results import cast_sightlines
    from raytrace.tracing.backends import HDF5Backend, MemoryBackend

    series = load_boxes(values)
    mass = masses(values)
    omega0 = observed_energy(values)
    backend = (HDF5Backend(output, resume=values["output.resume"], overwrite=values["output.overwrite"])
               if output else MemoryBackend())
    with cluster_executor(values) as executor:
        result = cast_sightlines(
            series, mass, values["rays.count"], values["rays.z_max"], seed=values["rays.seed"],
            photon_energy_eV=values["rays.photon_energy_eV"], n_jobs=values["rays.jobs"],
            include_background=values["rays.include_background"], z_boxes=values["rays.z_boxes"],
            batch_size=values["rays.batch_size"], backend=backend, progress=True, executor=executor,
        )
    print_summary(result, values["output.epsilon"], omega0)
    if plot:
        from raytrace.core.figures import pyplot, save_figure
        from raytrace.report.plots import kernel_bands

        plt = pyplot()
        figure, ax = plt.subplots(figsize=(6.4, 4.4))
        kernel_bands(result, ax, epsilon=values["output.epsilon"], omega0_eV=omega0)
        save_figure(figure, plot, overwrite=values["output.overwrite"], owner=owner_name(output))
        plt.close(figure)


def print_summary(result, epsilon, omega0):
    from raytrace.statistics.spread import robust_spread, top_share

    mean, error = result.mean(), result.standard_error()
    q16, q84 = result.percentiles((16.0, 84.0))
    check = result.mean_check()
    ratio = check.ratio() if check is not None else np.full(mean.size, np.nan)
    relative_sem = check.relative_error() if check is not None else np.full(mean.size, np.nan)
    half_width, mad = robust_spread(result.kernel) if result.n_rays > 1 else (np.zeros(mean.size),) * 2
    top = top_share(result.kernel) if result.n_rays > 1 else np.full(mean.size, np.nan)
    fraction = result.boxes_fraction()
    print(f"# {result.n_rays} sightlines to z = {result.run['z_max']:g} (boxes to z = {result.run['z_boxes']:g}), "
          f"seed {result.run['seed']}; mean DM = {result.dispersion_measure.mean():.1f} pc cm^-3")
    print(f"# near-tangent (Airy) events at {result.run['photon_energy_eV']:.4g} eV: "
          f"{result.tangent_events.sum(axis=1).mean():.2f} per ray, "
          f"{100 * result.kernel_tangent.sum() / max(result.kernel_boxes.sum(), 1e-300):.2g} % of the boxes' kernel")
    header = (f"# {'mass_eV':>11} {'mean_K_eV':>11} {'sem_K_eV':>10} {'K_16%':>10} {'K_84%':>10} {'boxes':>6} "
              f"{'MC/PDF':>7} {'sem/PDF':>7} {'hw16-84':>9} {'MAD':>9} {'top1%':>6}")
    if epsilon is not None:
        header += f" {'P_mean':>10}"
    print(header)
    step = max(1, result.mass_eV.size // 16)
    for k in range(0, result.mass_eV.size, step):
        line = (f"  {result.mass_eV[k]:11.4e} {mean[k]:11.4e} {error[k]:10.3e} {q16[k]:10.3e} {q84[k]:10.3e} "
                f"{fraction[k]:6.2f} {ratio[k]:7.4f} {relative_sem[k]:7.4f} {half_width[k]:9.3e} {mad[k]:9.3e} "
                f"{100 * top[k]:5.1f}%")
        if epsilon is not None:
            line += f" {epsilon**2 * mean[k] / omega0:10.3e}"
        print(line)
    print("# MC/PDF: the mean over rays / the one-point-PDF mean of the same boxes (the built-in check), "
          "sem/PDF its standard error; hw16-84: half the 16-84 % range; top1%: the variance share of the top 1 % of rays")
    _warn_spread(result)


def _warn_spread(result):
    """Warn, naming the masses, where the top 1 % of rows carry more than half the variance."""
    import warnings

    from raytrace.statistics.spread import TOP_SHARE_WARNING, top_share

    kernel = result.columns()  # a sky's maps one at a time
    if kernel.n_rows < 2:
        return
    share = np.nan_to_num(top_share(kernel))
    bad = np.flatnonzero(share > TOP_SHARE_WARNING)
    if bad.size:
        shown = ", ".join(f"{result.mass_eV[k]:.3g} eV ({100 * share[k]:.0f} %)" for k in bad[:6])
        warnings.warn(f"the top 1 % of rows carry more than half the variance at {bad.size} of {share.size} masses: "
                      f"{shown}{' ...' if bad.size > 6 else ''}; the variance there rests on a few rows "
                      "(raytrace spread-check gives its interval)")
