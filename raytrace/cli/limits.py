"""``raytrace limits``: upper limits epsilon_max(m) from the measured CMB spectrum.

In: a sightline result file (--result: the mean and the 16 % / 84 % quantiles
of K over its rays, beside the homogeneous universe to the same z_max) or a
mass grid (--mass, --mass-range: the homogeneous universe alone), optionally a
sky result (--sky: the anisotropy limit beside them), the confidence level, a
spectrum table and an ionisation history. Out: a table on stdout, and on
request a CSV and/or HDF5 table and a log-log plot.

:func:`report` takes the mass grid and kernel arrays (mean over sightlines, a
pair of sightline quantiles, the homogeneous background) and any further
curves, computes the limits and writes what the options ask for.
"""


import numpy as np

from .background import add_ionisation_arguments, ionisation_from_args, masses_from_args
from .background import flags_named as background_flags_named

NAME = "limits"
HELP = "Upper limits on the kinetic mixing epsilon versus mass from the CMB spectrum (FIRAS by default)."


def add_arguments(parser):
    masses = parser.add_mutually_exclusive_group()
    masses.add_argument(
        "--result", default=None, metavar="RESULT.h5",
        help="sightline result (raytrace sightlines): limits from its mean kernel and 16-84 %% sightline band, "
        "beside the homogeneous universe to the same z_max; or a one-point-PDF mean (raytrace onepoint-mean): "
        "its mean alone; its masses are the grid",
    )
    masses.add_argument("--mass", nargs="+", type=float, metavar="EV", help="dark-photon masses in eV")
    masses.add_argument(
        "--mass-range", nargs=3, metavar=("MIN", "MAX", "COUNT"),
        help="log-spaced masses: lowest and highest in eV, and how many",
    )
    add_spectrum_arguments(parser)
    add_sky_arguments(parser)
    parser.add_argument(
        "--output", nargs="+", default=(), metavar="FILE",
        help="write the limits as a table: .csv and/or .h5 (both may be given)",
    )
    parser.add_argument("--plot", default=None, metavar="FILE", help="write a log-log plot (.png, .pdf)")
    parser.add_argument("--overwrite", action="store_true", help="replace existing output files")
    add_ionisation_arguments(parser)


def add_spectrum_arguments(parser):
    """Options of the spectral fit; shared with ``raytrace report``."""
    parser.add_argument(
        "--confidence", type=float, default=0.95,
        help="confidence level of the one-sided upper limit (default 0.95, Delta chi^2 = 2.71)",
    )
    parser.add_argument(
        "--spectrum", default=None, metavar="FILE",
        help="spectrum table: the FIRAS monopole layout of Fixsen et al. 1996 or a three-column table "
        "with a '# columns: frequency GHz, intensity MJy/sr, sigma MJy/sr' header "
        "(default: the shipped Fixsen et al. 1996 Table 4)",
    )
    parser.add_argument(
        "--fit-galaxy", action="store_true",
        help="fit the amplitude of the spectrum's Galaxy template as well as T",
    )


def add_sky_arguments(parser):
    """Options of the sky's anisotropy limit; shared with ``raytrace report``."""
    group = parser.add_argument_group("anisotropy limit from a sky result")
    group.add_argument("--sky", default=None, metavar="SKY.h5", help="sky result (raytrace.cast_sky): "
                       "adds the limit from the isotropy of its dT/T map")
    group.add_argument(
        "--frequency", default=None,
        help="observed photon frequency or energy with a unit for dT/T (and for P in the report), "
        "e.g. '160 GHz' (default: k T_0 = 2.35e-4 eV, T_0 = 2.72548 K, Fixsen 2009)",
    )
    test = group.add_mutually_exclusive_group()
    test.add_argument("--isotropy-threshold", type=float, default=None, metavar="DT_T",
                      help="the dT/T rms the map must stay below (default 1e-5)")
    test.add_argument("--cl-limits", default=None, metavar="FILE",
                      help="two-column table (l, C_l upper limit in (dT/T)^2): the C_l test instead of the rms")


# Parameter names in the library's messages and the flags a user typed.
_LIMIT_FLAGS = {
    "confidence": "--confidence",
    "threshold": "--isotropy-threshold",
    "epsilon": "--epsilon",
}


def flags_named():
    """An InputError inside that names a limit parameter names its flag instead."""
    return background_flags_named(_LIMIT_FLAGS)


def photon_energy_from_args(args):
    """--frequency as a photon energy in eV (default k T_0)."""
    from ..units import CMB_PHOTON_ENERGY_EV, photon_energy_eV

    return CMB_PHOTON_ENERGY_EV if args.frequency is None else photon_energy_eV(args.frequency, "--frequency")


def anisotropy_from_args(args, sky):
    """The anisotropy curve of ``sky`` that --frequency, --isotropy-threshold and --cl-limits ask for."""
    from ..limits import anisotropy_curve

    with flags_named():
        return anisotropy_curve(sky, photon_energy_from_args(args), threshold=args.isotropy_threshold,
                                cl_limits=args.cl_limits)


def refuse_unused_sky_options(args, flags=("--frequency", "--isotropy-threshold", "--cl-limits")):
    """Options of the sky test given without --sky would be silently ignored: refuse them."""
    from ..errors import InputError

    if args.sky is None:
        given = [flag for flag in flags if getattr(args, flag.lstrip("-").replace("-", "_")) is not None]
        if given:
            raise InputError(f"{', '.join(given)}: only meaningful with --sky SKY.h5 (the anisotropy limit)")


def check_confidence(args):
    """--confidence as the library checks it, the message naming the flag."""
    from ..limits import delta_chi2

    with flags_named():
        delta_chi2(args.confidence)


def report(args, mass_eV, mean_kernel_eV=None, spread_kernels_eV=None, background_kernel_eV=None, extra_curves=()):
    """Compute the limits from kernel arrays and print / write them as ``args`` asks.

    ``mass_eV`` the mass grid, ``mean_kernel_eV`` <K>(m) over sightlines,
    ``spread_kernels_eV`` a pair (K at the 16 % and at the 84 % sightline
    quantile), ``background_kernel_eV`` K of the homogeneous universe (None:
    CAMB with Planck 2018); ``extra_curves`` (e.g. an anisotropy limit on the
    same masses) join the set. ``args`` supplies --confidence, --spectrum,
    --fit-galaxy, --output, --plot and --overwrite. Returns the
    :class:`~raytrace.limits.LimitSet`.
    """
    from ..limits import limit_table, plot_limits, sightline_limits
    from ..provenance import output_set
    from ..spectrum import read_spectrum

    check_confidence(args)
    _check_outputs(args)
    limits = sightline_limits(
        mass_eV, mean_kernel_eV, spread_kernels_eV, background_kernel_eV=background_kernel_eV,
        spectrum=read_spectrum(args.spectrum), confidence=args.confidence, fit_galaxy=args.fit_galaxy,
    )
    for curve in extra_curves:
        limits = limits.with_curve(curve)
    _print(limits)
    with output_set():  # all the tables and the plot, or none of them
        for path in args.output:
            limit_table(path, limits, overwrite=args.overwrite)
        if args.plot:
            plot_limits(args.plot, limits, overwrite=args.overwrite)
    return limits


def run(args):
    from ..background import MeanPlasma
    from ..errors import InputError, require_positive_finite
    from ..limits import result_kernels, same_mass_grid
    from ..onepoint import load_mean_result
    from ..sky import SkyResult

    check_confidence(args)
    refuse_unused_sky_options(args)
    _check_outputs(args)
    if args.result is None and args.mass is None and args.mass_range is None and args.sky is None:
        raise InputError("give the masses: --result RESULT.h5, --mass, --mass-range, or --sky SKY.h5 for its grid")
    sky = SkyResult.load(args.sky) if args.sky else None
    plasma = MeanPlasma(None, ionisation_from_args(args))
    if args.result is not None:
        kernels = result_kernels(load_mean_result(args.result), plasma)
        grid = f"--result {args.result}"
    else:
        if args.mass is None and args.mass_range is None:
            masses, grid = sky.mass_eV, None
        else:
            masses = require_positive_finite(masses_from_args(args), "--mass-range" if args.mass is None else "--mass")
            grid = "--mass-range" if args.mass is None else "--mass"
        kernels = {"mass_eV": masses, "background_kernel_eV": plasma.kernel(masses)}
    extra = ()
    if sky is not None:
        if grid is not None and not same_mass_grid(sky.mass_eV, kernels["mass_eV"]):
            raise InputError(
                f"--sky {args.sky}: its {sky.mass_eV.size} masses ({sky.mass_eV[0]:.4g} to {sky.mass_eV[-1]:.4g} eV) "
                f"are not those of {grid} ({len(kernels['mass_eV'])} masses); the table needs one grid: "
                "cast the sky on the same masses, or leave out the other mass option to use the sky's"
            )
        extra = (anisotropy_from_args(args, sky),)
    report(args, **kernels, extra_curves=extra)
    return 0


def _check_outputs(args):
    """Refuse, before any work is done, outputs that exist, are folders, or cannot be made."""
    from ..errors import InputError
    from ..provenance import check_outputs

    for flag, paths in (("--output", args.output), ("--plot", [args.plot] if args.plot else [])):
        try:
            check_outputs(paths, args.overwrite)
        except InputError as error:
            raise InputError(f"{flag}: {error}") from None
    check_outputs([*args.output, *([args.plot] if args.plot else [])], args.overwrite)


def _print(limits):
    curves = limits.all_curves()
    first = curves[0]
    galaxy = "" if first.galaxy_amplitude is None else (
        f", Galaxy amplitude {first.galaxy_amplitude:.4g} +- {first.galaxy_amplitude_sigma:.2g}"
    )
    print(f"# spectrum: {first.spectrum_source}")
    print(
        f"# fit without distortion: T = {first.temperature_K:.6f} +- {first.temperature_sigma_K:.1e} K{galaxy}, "
        f"chi^2 = {first.chi2:.2f} for {first.dof} dof"
    )
    print(f"# one-sided {100 * first.confidence:g} % upper limit, Delta chi^2 = {first.delta_chi2:.3f}: {first.method}")
    for curve in curves:
        if not hasattr(curve, "kernel_eV"):  # a limit of another kind (the sky's): say what it is
            print(f"# {curve.name}: {curve.label}")
    columns = {"mass_eV": first.mass_eV}
    for curve in curves:
        if hasattr(curve, "kernel_eV"):
            columns[f"{curve.name}_K_eV"] = curve.kernel_eV
        columns[f"{curve.name}_eps_max"] = curve.epsilon_max
    print("# " + " ".join(f"{name:>22}" for name in columns))
    for row in np.column_stack(list(columns.values())):
        print("  " + " ".join(f"{value:22.4e}" for value in row))
