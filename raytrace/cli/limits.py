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

from raytrace.cli.background import add_ionisation_arguments, add_mass_arguments, ionisation_from_args, masses_from_args
from raytrace.cli.background import flags_named as background_flags_named
from raytrace.cli.runfile import add_option

NAME = "limits"
HELP = "Upper limits on the kinetic mixing epsilon versus mass from the CMB spectrum (FIRAS by default)."


def add_arguments(parser):
    add_option(parser, "inputs.result", help="sightline result (raytrace sightlines --output): limits from its mean "
               "kernel and 16-84 %% sightline band, beside the homogeneous universe to the same z_max; or a "
               "one-point-PDF mean (raytrace onepoint-mean): its mean alone; its masses are the grid")
    add_mass_arguments(parser, "masses: a list, or a log-spaced grid (default with --sky: the sky's grid)")
    add_spectrum_arguments(parser)
    add_sky_arguments(parser)
    parser.add_argument(
        "--output", nargs="+", default=(), metavar="FILE",
        help="write the limits as a table: .csv and/or .h5 (both may be given; '' writes none)",
    )
    parser.add_argument("--plot", default=None, metavar="FILE", help="write a log-log plot (.png, .pdf)")
    parser.add_argument("--all", action="store_true", help="print every mass of the grid, not a handful")
    add_option(parser, "output.overwrite")
    add_ionisation_arguments(parser)


def add_spectrum_arguments(parser):
    """Options of the spectral fit; shared with ``raytrace report``."""
    parser.add_argument(
        "--confidence", type=float, default=0.95, metavar="X",
        help="confidence level of the one-sided upper limit (default: 0.95, Delta chi^2 = 2.71)",
    )
    parser.add_argument(
        "--spectrum", default=None, metavar="FILE",
        help="spectrum table: the FIRAS monopole layout of Fixsen et al. 1996 or a three-column table "
        "with a '# columns: frequency GHz, intensity MJy/sr, sigma MJy/sr' header "
        "(default: the shipped Fixsen et al. 1996 Table 4)",
    )
    parser.add_argument(
        "--fit-galaxy", action="store_true",
        help="fit the amplitude of the spectrum's Galaxy template as well as T (default: off)",
    )


def add_sky_arguments(parser):
    """Options of the sky's anisotropy limit; shared with ``raytrace report``."""
    group = parser.add_argument_group("anisotropy limit from a sky result")
    add_option(group, "inputs.sky")
    add_option(group, "output.frequency", help="observed photon frequency or energy with a unit of the anisotropy "
               "limits, e.g. '100 GHz' (default: 143 GHz, the central channel of the Planck TT spectrum, whose "
               "100-217 GHz the limit from the measured spectrum needs), and of P in the report with --epsilon "
               "(default there: k T_0 = 2.35e-4 eV, T_0 = 2.72548 K, Fixsen 2009)")
    add_option(group, "anisotropy.threshold", shown="1e-05", type=float)
    add_option(group, "anisotropy.cl_limits")


# Parameter names in the library's messages and the flags a user typed.
_LIMIT_FLAGS = {
    "confidence": "--confidence",
    "threshold": "--isotropy-threshold",
    "epsilon": "--epsilon",
}


def flags_named():
    """An InputError inside that names a limit parameter names its flag instead."""
    return background_flags_named(_LIMIT_FLAGS)


def photon_energy_from_args(args, default=None):
    """--frequency as a photon energy in eV; without it ``default`` (None: k T_0)."""
    from raytrace.physics.units import CMB_PHOTON_ENERGY_EV, photon_energy_eV

    if args.frequency is None:
        return CMB_PHOTON_ENERGY_EV if default is None else default
    return photon_energy_eV(args.frequency, "--frequency")


def anisotropy_from_args(args, sky):
    """The anisotropy curves of ``sky`` (a LimitSet) that --frequency, --confidence, --isotropy-threshold and
    --cl-limits ask for (:func:`raytrace.limits.anisotropy.anisotropy_limits`)."""
    from raytrace.limits.anisotropy import DEFAULT_PHOTON_ENERGY_EV, anisotropy_limits

    with flags_named():
        return anisotropy_limits(sky, photon_energy_from_args(args, DEFAULT_PHOTON_ENERGY_EV), args.confidence,
                                 threshold=args.isotropy_threshold, cl_limits=args.cl_limits)


def refuse_unused_sky_options(args, flags=("--frequency", "--isotropy-threshold", "--cl-limits")):
    """Options of the sky test given without --sky would be silently ignored: refuse them."""
    from raytrace.core.errors import InputError

    if args.sky is None:
        given = [flag for flag in flags if getattr(args, flag.lstrip("-").replace("-", "_")) is not None]
        if given:
            raise InputError(f"{', '.join(given)}: only meaningful with --sky SKY.h5 (the anisotropy limit)")


def check_confidence(args):
    """--confidence as the library checks it, the message naming the flag."""
    from raytrace.limits.spectral import delta_chi2

    with flags_named():
        delta_chi2(args.confidence)


def report(args, mass_eV, mean_kernel_eV=None, spread_kernels_eV=None, background_kernel_eV=None, extra=None):
    """Compute the limits from kernel arrays and print / write them as ``args`` asks.

    ``mass_eV`` the mass grid, ``mean_kernel_eV`` <K>(m) over sightlines,
    ``spread_kernels_eV`` a pair (K at the 16 % and at the 84 % sightline
    quantile), ``background_kernel_eV`` K of the homogeneous universe (None:
    CAMB with Planck 2018); the curves and bands of ``extra`` (a LimitSet, e.g.
    a sky's anisotropy limits on the same masses) join the set. ``args`` supplies --confidence, --spectrum,
    --fit-galaxy, --output, --plot and --overwrite, already checked by
    :func:`run` before any work. Returns the :class:`~raytrace.limits.limitset.LimitSet`.
    """
    from raytrace.limits.spectral import sightline_limits
    from raytrace.core.provenance import output_set
    from raytrace.limits.limitset import limit_table, plot_limits
    from raytrace.limits.spectrum import read_spectrum

    limits = sightline_limits(
        mass_eV, mean_kernel_eV, spread_kernels_eV, background_kernel_eV=background_kernel_eV,
        spectrum=read_spectrum(args.spectrum), confidence=args.confidence, fit_galaxy=args.fit_galaxy,
    )
    if extra is not None:
        limits = limits.joined(extra)
    _print(limits, getattr(args, "all", False))
    with output_set():  # all the tables and the plot, or none of them (checked by _check_outputs)
        for path in args.output:
            limit_table(path, limits, overwrite=args.overwrite)
        if args.plot:
            plot_limits(args.plot, limits, overwrite=args.overwrite)
    return limits


def run(args):
    from raytrace.core.outputguard import output_lock

    check_confidence(args)
    refuse_unused_sky_options(args)
    _check_outputs(args)
    with output_lock([*args.output, args.plot]):  # one run per output at a time
        return _limits(args)


def input_files(args):
    """The input files of ``limits`` and ``report``: (path, flag) pairs of those given."""
    flags = {"result": "--result", "sky": "--sky", "spectrum": "--spectrum", "ionisation_table": "--ionisation-table",
             "cl_limits": "--cl-limits"}
    return [(getattr(args, name, None), flag) for name, flag in flags.items()]


def _limits(args):
    from raytrace.core.errors import InputError
    from raytrace.limits.limitset import same_mass_grid
    from raytrace.limits.spectral import result_kernels
    from raytrace.physics.background import MeanPlasma
    from raytrace.report.crosscheck import warn_differences
    from raytrace.sky.maps import SkyResult
    from raytrace.statistics.results import load_mean_result

    masses = masses_from_args(args, required=False)
    if args.result is not None and masses is not None:
        raise InputError("--result: its masses are the grid; leave out --mass-values and --mass-min/--mass-max/--mass-count")
    if args.result is None and args.sky is None and masses is None:
        masses = masses_from_args(args)  # the schema's default grid
    sky = SkyResult.load(args.sky) if args.sky else None
    plasma = MeanPlasma(None, ionisation_from_args(args))
    if args.result is not None:
        result = load_mean_result(args.result)
        if sky is not None:
            warn_differences(result, sky, f"--result {args.result}", f"--sky {args.sky}")
        kernels = result_kernels(result, plasma)
        grid = f"--result {args.result}"
    else:
        if masses is None:
            masses, grid = sky.mass_eV, None
        else:
            grid = "--mass-values" if args.mass_values is not None else "--mass-min/--mass-max/--mass-count"
        kernels = {"mass_eV": masses, "background_kernel_eV": plasma.kernel(masses)}
    extra = None
    if sky is not None:
        if grid is not None and not same_mass_grid(sky.mass_eV, kernels["mass_eV"]):
            raise InputError(
                f"--sky {args.sky}: its {sky.mass_eV.size} masses ({sky.mass_eV[0]:.4g} to {sky.mass_eV[-1]:.4g} eV) "
                f"are not those of {grid} ({len(kernels['mass_eV'])} masses); the table needs one grid: "
                "cast the sky on the same masses, or leave out the other mass option to use the sky's"
            )
        sky.require_splits(f"--sky {args.sky}")
        extra = anisotropy_from_args(args, sky)
    report(args, **kernels, extra=extra)
    return 0


def _check_outputs(args):
    """Refuse, before any work is done, outputs that are inputs, exist, are folders, or cannot be made."""
    from raytrace.core.outputguard import refuse_outputs_over_inputs
    from raytrace.core.provenance import check_outputs

    args.output = [path for path in args.output if path]  # '' switches the table off
    flags = ["--output"] * len(args.output) + (["--plot"] if args.plot else [])
    paths = [*args.output, *([args.plot] if args.plot else [])]
    refuse_outputs_over_inputs(list(zip(paths, flags)), input_files(args))
    check_outputs(paths, args.overwrite, flags)


# Rows printed without --all: a handful of masses spread over the grid, plus the tightest limit.
_ROWS = 12


def _print(limits, every_mass=False):
    """The limits as tables that fit 100 columns: a handful of masses, or all with ``every_mass``; the
    spectral curves first, then the sky's anisotropy curves, if any."""
    import textwrap

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
    spectral = [curve for curve in curves if hasattr(curve, "kernel_eV")]
    sky = [curve for curve in curves if not hasattr(curve, "kernel_eV")]
    rows = np.arange(first.mass_eV.size)
    if not every_mass and first.mass_eV.size > _ROWS:
        tightest = np.nanargmin(np.where(np.isfinite(first.epsilon_max), first.epsilon_max, np.nan)) \
            if np.isfinite(first.epsilon_max).any() else 0
        rows = np.unique(np.append(np.round(np.linspace(0, first.mass_eV.size - 1, _ROWS)).astype(int), tightest))
        print(f"# {rows.size} of {first.mass_eV.size} masses (--all prints every one); eps: epsilon_max, "
              "'-': not constrained")
    else:
        print("# eps: epsilon_max, '-': not constrained")
    columns = {"mass_eV": first.mass_eV}
    columns.update({f"K_{_short(curve.name)}": curve.kernel_eV for curve in spectral[:2]})
    columns.update({f"eps_{_short(curve.name)}": curve.epsilon_max for curve in spectral})
    _print_table(columns, rows)
    if sky:
        print("# the sky's anisotropy limits:")
        for curve in sky:
            print(f"#   eps_{_short(curve.name)}: {curve.label}")
        caveat = next((curve.details["caveat"] for curve in sky if "caveat" in curve.details), None)
        if caveat:
            text = (f"'*': noise exceeds signal in the bands that decide the limit, which the noise biases "
                    f"tight there: quote the band's upper edge (eps_skyhi); {caveat}")
            print("\n".join("#   " + line for line in textwrap.wrap(text, 94)))
        columns = {"mass_eV": first.mass_eV}
        columns.update({f"eps_{_short(curve.name)}": curve.epsilon_max for curve in sky})
        noisy = {f"eps_{_short(curve.name)}": curve.noisy for curve in sky if np.any(curve.noisy)}
        _print_table(columns, rows, noisy)


def _print_table(columns, rows, marked=None):
    """Columns (name -> per-mass values) at ``rows``; a '*' after the cells that ``marked`` flags."""
    marked = marked or {}
    width = 11 if len(columns) <= 8 else 9
    print("#" + " ".join(f"{name[:width]:>{width}}" for name in columns)[1:])
    for k in rows:
        cells = [(f"{values[k]:.{3 if width == 9 else 4}e}" if np.isfinite(values[k]) else "-")
                 + ("*" if name in marked and marked[name][k] else "") for name, values in columns.items()]
        print(" ".join(f"{cell:>{width}}" for cell in cells))


def _short(name):
    """A column name's curve part that fits a narrow column (sightline_p16 -> p16)."""
    return {"background": "homog", "anisotropy": "sky", "anisotropy_rms": "skyrms", "anisotropy_low": "skylo",
            "anisotropy_high": "skyhi", "anisotropy_cl": "skyCl"}.get(name, name.replace("sightline_", ""))
