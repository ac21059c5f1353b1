"""``raytrace onepoint-mean``: <K>(m) straight from the boxes' one-point PDF, no rays (a fast mode)."""

from raytrace.cli.runfile import ONEPOINT_OPTIONS, add_flags, settings

NAME = "onepoint-mean"
HELP = ("The mean conversion kernel <K>(m) from the one-point density PDF of the boxes' interpolated field "
        "(no rays: seconds), with its error; the file feeds 'raytrace limits --result' like a sightline result.")


def add_arguments(parser):
    add_flags(parser, ONEPOINT_OPTIONS)


def run(args):
    from raytrace.cli.sightlines import prepare_outputs
    from raytrace.core.outputguard import output_lock

    values = settings(args, ONEPOINT_OPTIONS)
    prepare_outputs(args, values, ("output.path", "output.plot"))  # before the work
    with output_lock([values["output.path"], values["output.plot"]]):  # one run per output at a time
        return _run(values)


def _run(values):
    from raytrace.cli.sightlines import load_boxes, masses
    from raytrace.core.provenance import output_set
    from raytrace.core.textcells import NO_RESONANCE
    from raytrace.statistics.onepoint import pdf_mean

    overwrite = values["output.overwrite"]
    output, plot = values["output.path"], values["output.plot"]
    series = load_boxes(values)
    result = pdf_mean(series, masses(values), values["rays.z_max"],
                      include_background=values["rays.include_background"], z_boxes=values["rays.z_boxes"],
                      points=values["onepoint.points"], groups=values["onepoint.groups"],
                      blend_steps=values["onepoint.blend_steps"], seed=values["rays.seed"],
                      n_jobs=values["rays.jobs"])
    run = result.run
    print(f"# one-point-PDF mean: z = 0 to {run['z_max']:g} (boxes to {run['z_boxes']:g}), {run['points']} points "
          f"per box in {run['groups']} groups, seed {run['seed']}")
    print(f"# {'mass_eV':>11} {'mean_K_eV':>11} {'error_eV':>10} {'boxes':>6}")
    for k in range(result.mass_eV.size):
        if not result.kernel[k] > 0:
            print(f"  {result.mass_eV[k]:11.4e} {NO_RESONANCE} at any point of the boxes nor in the background)")
            continue
        share = result.kernel_boxes[k] / result.kernel[k]
        print(f"  {result.mass_eV[k]:11.4e} {result.kernel[k]:11.4e} {result.error[k]:10.3e} {share:6.2f}")
    with output_set():  # the result and the plot, or neither
        if output:
            result.save(output, overwrite=overwrite)
        if plot:
            from raytrace.core.figures import pyplot, save_figure

            plt = pyplot()
            figure, ax = plt.subplots(figsize=(6.4, 4.4))
            ax.loglog(result.mass_eV, result.kernel, label="boxes + background")
            ax.loglog(result.mass_eV, result.kernel_boxes, ls=":", label="boxes")
            ax.set_xlabel("dark-photon mass m [eV]")
            ax.set_ylabel("<K> from the one-point PDF [eV]")
            ax.legend()
            save_figure(figure, plot, overwrite=overwrite)
            plt.close(figure)
    for what, path in (("result", output), ("plot", plot)):
        if path:
            print(f"{what}: {path}")
    return 0
