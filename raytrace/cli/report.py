"""``raytrace report``: one figure page and a text summary of a sightline run.

In: a sightline result file, optionally a sky result, epsilon with a photon
frequency, a spectrum table and the confidence level. Out: STEM.png, STEM.pdf
and STEM.txt (:func:`raytrace.report.make_report`); the paths on stdout.
"""

from .background import add_ionisation_arguments, ionisation_from_args
from .limits import (add_sky_arguments, add_spectrum_arguments, check_confidence, flags_named, photon_energy_from_args,
                     refuse_unused_sky_options)

NAME = "report"
HELP = ("One page (PNG and PDF) and a text summary of a sightline run: the kernel and its spread, "
        "K over rays, dispersion measures, the limits on epsilon and, with --sky, the sky map and its C_l.")


def add_arguments(parser):
    parser.add_argument("result", metavar="RESULT.h5", help="sightline result (raytrace sightlines --output)")
    parser.add_argument("--output", required=True, metavar="STEM",
                        help="write STEM.png, STEM.pdf and STEM.txt")
    parser.add_argument("--epsilon", type=float, default=None,
                        help="kinetic mixing: show P = epsilon^2 K / omega_0 and the sky's dT/T instead of K")
    add_spectrum_arguments(parser)
    add_sky_arguments(parser)
    parser.add_argument("--overwrite", action="store_true", help="replace existing output files")
    add_ionisation_arguments(parser)


def run(args):
    from ..background import MeanPlasma
    from ..provenance import check_writable
    from ..report import KINDS, make_report
    from ..spectrum import read_spectrum

    check_confidence(args)
    # --frequency is also the photon energy of P with --epsilon.
    refuse_unused_sky_options(args, ("--isotropy-threshold", "--cl-limits") if args.epsilon is not None else
                              ("--frequency", "--isotropy-threshold", "--cl-limits"))
    for kind in KINDS:  # refuse before any work
        check_writable(f"{args.output}.{kind}", args.overwrite)
    with flags_named():
        paths = make_report(
            args.result, args.output, sky=args.sky, epsilon=args.epsilon, omega0_eV=photon_energy_from_args(args),
            spectrum=read_spectrum(args.spectrum), confidence=args.confidence, overwrite=args.overwrite,
            fit_galaxy=args.fit_galaxy, threshold=args.isotropy_threshold, cl_limits=args.cl_limits,
            plasma=MeanPlasma(None, ionisation_from_args(args)),
        )
    for kind, path in paths.items():
        print(f"{kind}: {path}")
    return 0
