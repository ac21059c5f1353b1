"""``raytrace report``: one figure page and a text summary of a sightline run.

In: a sightline result file, optionally a sky result, epsilon with a photon
frequency, a spectrum table and the confidence level. Out: STEM.png, STEM.pdf
and STEM.txt (:func:`raytrace.report.page.make_report`); the paths on stdout.
"""

from raytrace.cli.background import add_ionisation_arguments, ionisation_from_args
from raytrace.cli.limits import (
    add_sky_arguments,
    add_spectrum_arguments,
    check_confidence,
    flags_named,
    input_files,
    photon_energy_from_args,
    refuse_unused_sky_options,
)
from raytrace.cli.runfile import add_option

NAME = "report"
HELP = ("One page (PNG and PDF) and a text summary of a sightline run: the kernel and its spread, "
        "K over rays, dispersion measures, the limits on epsilon and, with --sky, the sky map and its C_l.")


def add_arguments(parser):
    parser.add_argument("result", metavar="RESULT.h5", help="sightline result (raytrace sightlines --output)")
    parser.add_argument("--output", required=True, metavar="STEM",
                        help="write STEM.png, STEM.pdf and STEM.txt (those of --formats)")
    parser.add_argument("--formats", default="png,pdf,txt", metavar="LIST",
                        help="which of png, pdf, txt to write, comma-separated (default: png,pdf,txt)")
    add_option(parser, "output.epsilon", type=float,
               help="kinetic mixing: show P = epsilon^2 K / omega_0 and the sky's dT/T instead of K")
    add_spectrum_arguments(parser)
    add_sky_arguments(parser)
    add_option(parser, "output.mass_eV", type=float, help="dark-photon mass in eV of the sky map shown (with --sky; "
               "default: the middle of the masses resonating in most pixels)")
    add_option(parser, "output.overwrite")
    add_ionisation_arguments(parser)


def run(args):
    from raytrace.core.outputguard import output_lock, refuse_outputs_over_inputs
    from raytrace.core.provenance import check_writable
    from raytrace.limits.spectrum import read_spectrum
    from raytrace.physics.background import MeanPlasma
    from raytrace.report.page import KINDS, make_report

    check_confidence(args)
    # --frequency is also the photon energy of P with --epsilon.
    refuse_unused_sky_options(args, ("--isotropy-threshold", "--cl-limits", "--mass") if args.epsilon is not None else
                              ("--frequency", "--isotropy-threshold", "--cl-limits", "--mass"))
    kinds = tuple(kind.strip() for kind in args.formats.split(",") if kind.strip())
    paths = [f"{args.output}.{kind}" for kind in kinds if kind in KINDS]
    refuse_outputs_over_inputs([(path, "--output") for path in paths], input_files(args))  # before any work
    for path in paths:
        check_writable(path, args.overwrite)
    with flags_named(), output_lock(paths):  # one run per output at a time
        paths = make_report(
            args.result, args.output, sky=args.sky, epsilon=args.epsilon,
            omega0_eV=None if args.frequency is None else photon_energy_from_args(args),
            spectrum=read_spectrum(args.spectrum), confidence=args.confidence, overwrite=args.overwrite,
            fit_galaxy=args.fit_galaxy, threshold=args.isotropy_threshold, cl_limits=args.cl_limits, mass_eV=args.mass,
            plasma=MeanPlasma(None, ionisation_from_args(args)), kinds=kinds,
        )
    for kind, path in paths.items():
        print(f"{kind}: {path}")
    return 0
