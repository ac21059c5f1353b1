"""``raytrace resolution-check``: how <K>(m) changes as the boxes are degraded, and its extrapolation."""

from raytrace.cli.runfile import RESOLUTION_OPTIONS, add_flags, require, settings

NAME = "resolution-check"
HELP = ("Degrade every box by 2, 4 ... (electrons conserved), compute the one-point-PDF mean at each "
        "resolution, and report the change per mass and a Richardson extrapolation (figure and table).")


def add_arguments(parser):
    add_flags(parser, RESOLUTION_OPTIONS)


def run(args):
    from raytrace.cli.sightlines import run_inputs
    from raytrace.core.errors import InputError
    from raytrace.core.outputguard import output_lock, refuse_outputs_over_inputs
    from raytrace.core.provenance import check_outputs

    values = settings(args, RESOLUTION_OPTIONS)
    stem = require(values, "output.report", RESOLUTION_OPTIONS)
    paths = [f"{stem}.{kind}" for kind in ("png", "pdf", "txt")]
    refuse_outputs_over_inputs([(path, "--report") for path in paths], run_inputs(args, values))
    check_outputs(paths, values["output.overwrite"], ["--report"] * len(paths))
    coarsest = values["resolution.coarsest"]
    if coarsest & (coarsest - 1):
        raise InputError(f"--coarsest (TOML resolution.coarsest): expected a power of 2 (2, 4, 8 ...), got {coarsest}")
    with output_lock(paths):  # one run per output at a time
        return _run(values, stem, tuple(2**k for k in range(coarsest.bit_length())))


def _run(values, stem, factors):
    from raytrace.cli.sightlines import load_boxes, masses
    from raytrace.statistics.resolution import resolution_convergence, write_convergence_page

    series = load_boxes(values)
    convergence = resolution_convergence(
        series, masses(values), values["rays.z_max"], factors=factors, order=values["resolution.order"],
        n_rays=values["resolution.rays"], seed=values["rays.seed"], n_jobs=values["rays.jobs"],
        include_background=values["rays.include_background"], z_boxes=values["rays.z_boxes"],
        points=values["onepoint.points"], groups=values["onepoint.groups"],
        blend_steps=values["onepoint.blend_steps"],
    )
    for line in convergence.lines(range(convergence.mass_eV.size)):
        print(line)
    for kind, path in write_convergence_page(convergence, stem, overwrite=values["output.overwrite"]).items():
        print(f"{kind}: {path}")
    return 0
