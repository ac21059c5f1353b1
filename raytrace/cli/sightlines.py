"""``raytrace sightlines``: random sightlines through a box series, from a TOML run file or flags."""

import os

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
    """The run's mass grid: [masses] values_eV (--mass-values), or min_eV, max_eV and count (log-spaced)."""
    from raytrace.core.errors import require_positive_finite
    from raytrace.tracing.checks import check_run_memory

    grid_keys = ("masses.min_eV", "masses.max_eV", "masses.count")
    if values.get("masses.values_eV") is not None:  # settings() let only one of the two grids through
        mass = require_positive_finite(values["masses.values_eV"], "--mass-values (TOML masses.values_eV)")
        if np.any(np.diff(mass) <= 0):
            raise InputError(f"--mass-values (TOML masses.values_eV): expected increasing masses, got "
                             f"{', '.join(f'{m:g}' for m in mass)}")
        return mass
    low, high, count = (values[key] for key in grid_keys)
    if not low < high and count > 1:
        raise InputError(f"masses: expected min_eV < max_eV, got {low:g} and {high:g}")
    check_run_memory(1, count, "--mass-count (TOML masses.count)")  # the grid alone, before it is made
    return np.geomspace(low, high, count)


def bins_value(value, flag):
    """A bins option's value for the library: one number is a count (0: none), a list the edges in z."""
    if value is None or isinstance(value, list):
        return value
    if not float(value).is_integer():
        raise InputError(f"{flag}: one value is a count of bins, expected a whole number, got {value:g}; give edges "
                         "in z as a comma-separated list")
    return int(value)


def observed_energy(values, default=None):
    """--frequency as a photon energy in eV; without it ``default`` (None: k T_0)."""
    from raytrace.physics.units import CMB_PHOTON_ENERGY_EV, photon_energy_eV

    if values["output.frequency"] is None:
        return CMB_PHOTON_ENERGY_EV if default is None else default
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


def run_inputs(args, values):
    """The input files of a run from a run file: (path or glob patterns, option) pairs."""
    inputs = [(getattr(args, "run_file", None), "run file"), (values.get("boxes.files"), "--boxes (TOML boxes.files)")]
    if values.get("anisotropy.cl_limits"):
        inputs.append((values["anisotropy.cl_limits"], _flag("anisotropy.cl_limits")))
    return inputs


def prepare_outputs(args, values, keys):
    """Check the run's outputs once before any work; returns a note when --resume finds the run complete.

    Refuses an output that is an input file, outputs that exist (without
    --overwrite), cannot be made or repeat a path, files marked by another run
    (:func:`raytrace.core.companions.check_outputs`), and a figure name without a known
    format. With --resume, first completes a final write a kill interrupted
    (:mod:`raytrace.core.journal`); a run whose outputs are then all in place is done.
    """
    from raytrace.core.companions import check_outputs
    from raytrace.core.outputguard import output_lock, refuse_outputs_over_inputs

    refuse_outputs_over_inputs([(values[key], _flag(key)) for key in keys], run_inputs(args, values))
    if values["output.path"] and values.get("output.resume"):
        with output_lock([values[key] for key in keys]):
            done = finished_run(values["output.path"])
        if done:
            return done
    check_outputs([(values[key], _flag(key)) for key in keys], values["output.overwrite"], values["output.path"])
    if values.get("output.plot"):
        from raytrace.core.figures import check_figure_path

        check_figure_path(values["output.plot"], _flag("output.plot"))
    return None


def finished_run(output):
    """With --resume: complete an interrupted final write; a note when the run is then complete, else None."""
    from raytrace.core.journal import complete_interrupted_write, journal_path
    from raytrace.tracing.backends import HDF5Backend

    # A journal left means the final write had begun: every output was complete (a sky's result is
    # its checkpoint, renamed: no checkpoint is left beside it), so the run is done once it is completed.
    journaled = journal_path(output).is_file()
    moved = complete_interrupted_write(output)
    if not (HDF5Backend(output, resume=True).finished() or moved or journaled):
        return None
    completed = (f"; a kill during its final write had left {', '.join(str(path) for path in moved)} unmoved, "
                 "now in place") if moved else ""
    return f"{output}: this run is already complete{completed}; nothing left to resume"


def report_outputs(command, values, keys, done=None):
    """Print the outputs in place (a note on stderr first when --resume found the run complete)."""
    import sys

    if done:
        print(f"raytrace {command}: note: {done}", file=sys.stderr)
    names = {"output.path": "result", "output.plot": "plot", "output.fits": "maps"}
    for key in keys:
        if values[key] and os.path.exists(values[key]):
            print(f"{names[key]}: {values[key]}")


def _flag(key):
    return f"{VOCABULARY[key].flag} (TOML {key})"


def run(args):
    from raytrace.core.outputguard import output_lock
    from raytrace.core.provenance import output_set

    values = settings(args, SIGHTLINE_OPTIONS)
    output = values["output.path"]
    plot = values["output.plot"]
    keys = ("output.path", "output.plot")
    done = prepare_outputs(args, values, keys)
    if done is None:
        # One run per output at a time; the result and the plot appear together or not at all.
        with output_lock([output, plot]), output_set():
            run_outputs(values, output, plot)
    report_outputs("sightlines", values, keys, done)
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
            device=values["rays.device"],
            redshift_bins=bins_value(values["rays.redshift_bins"], "--redshift-bins (TOML rays.redshift_bins)"),
            keep_ray_bins=values["rays.keep_ray_bins"], **classes_option(values),
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


def classes_option(values):
    """The density classes' edges as a keyword, where given (a single edge is a list of one)."""
    edges = values["rays.density_classes"]
    return {} if edges is None else {"density_classes": edges if isinstance(edges, list) else [edges]}


def print_summary(result, epsilon, omega0):
    from raytrace.core.textcells import cell, no_resonance
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
        probability = result.probability(epsilon, omega0).mean(axis=0)  # saturating where it must be
    print(header)
    step = max(1, result.mass_eV.size // 16)
    for k in range(0, result.mass_eV.size, step):
        empty = no_resonance(result.kernel[:, k], "ray")
        if empty:
            print(f"  {result.mass_eV[k]:11.4e} {empty}")
            continue
        line = (f"  {result.mass_eV[k]:11.4e} {mean[k]:11.4e} {error[k]:10.3e} {q16[k]:10.3e} {q84[k]:10.3e} "
                f"{cell(fraction[k], '.2f', 6)} {cell(ratio[k], '.4f', 7)} {cell(relative_sem[k], '.4f', 7)} "
                f"{half_width[k]:9.3e} {mad[k]:9.3e} {cell(100 * top[k], '.1f', 5)}%")
        if epsilon is not None:
            line += f" {probability[k]:10.3e}"
        print(line)
    print("# MC/PDF: the mean over rays / the one-point-PDF mean of the same boxes (the built-in check), "
          "sem/PDF its standard error; hw16-84: half the 16-84 % range; top1%: the variance share of the top 1 % of rays")
    from raytrace.report.environments import environment_lines

    for line in environment_lines(result):
        print(f"# {line}")
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
