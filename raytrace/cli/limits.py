"""``raytrace limits``: upper limits epsilon_max(m) from the measured CMB spectrum.

In: a mass grid, the confidence level, optionally a spectrum table and an
ionisation history. Out: a table on stdout, and on request a CSV and/or HDF5
table and a log-log plot.

For now the kernel is that of the homogeneous universe. :func:`report` is the
hook for a sightline result: it takes the mass grid and kernel arrays (mean
over sightlines, a pair of sightline quantiles, the homogeneous background),
computes the limits and writes what the options ask for.
"""

import numpy as np

from .background import add_ionisation_arguments, ionisation_from_args, masses_from_args

NAME = "limits"
HELP = "Upper limits on the kinetic mixing epsilon versus mass from the CMB spectrum (FIRAS by default)."


def add_arguments(parser):
    masses = parser.add_mutually_exclusive_group(required=True)
    masses.add_argument("--mass", nargs="+", type=float, metavar="EV", help="dark-photon masses in eV")
    masses.add_argument(
        "--mass-range", nargs=3, metavar=("MIN", "MAX", "COUNT"),
        help="log-spaced masses: lowest and highest in eV, and how many",
    )
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
    parser.add_argument(
        "--output", nargs="+", default=(), metavar="FILE",
        help="write the limits as a table: .csv and/or .h5 (both may be given)",
    )
    parser.add_argument("--plot", default=None, metavar="FILE", help="write a log-log plot (.png, .pdf)")
    parser.add_argument("--overwrite", action="store_true", help="replace existing output files")
    add_ionisation_arguments(parser)


def report(args, mass_eV, mean_kernel_eV=None, spread_kernels_eV=None, background_kernel_eV=None):
    """Compute the limits from kernel arrays and print / write them as ``args`` asks.

    The hook for sightline results: ``mass_eV`` the mass grid, ``mean_kernel_eV``
    <K>(m) over sightlines, ``spread_kernels_eV`` a pair (K at the 16 % and at
    the 84 % sightline quantile), ``background_kernel_eV`` K of the homogeneous
    universe (None: CAMB with Planck 2018). ``args`` supplies --confidence,
    --spectrum, --fit-galaxy, --output, --plot and --overwrite. Returns the
    :class:`~raytrace.limits.LimitSet`.
    """
    from ..errors import InputError
    from ..limits import delta_chi2, limit_table, plot_limits, sightline_limits
    from ..provenance import check_writable
    from ..spectrum import read_spectrum

    try:
        delta_chi2(args.confidence)
    except InputError as error:  # the library names the parameter; the user typed the flag
        raise InputError(f"--{error}") from None
    # Refuse existing outputs before any work is done.
    for path in (*args.output, *([args.plot] if args.plot else [])):
        check_writable(path, args.overwrite)
    limits = sightline_limits(
        mass_eV, mean_kernel_eV, spread_kernels_eV, background_kernel_eV=background_kernel_eV,
        spectrum=read_spectrum(args.spectrum), confidence=args.confidence, fit_galaxy=args.fit_galaxy,
    )
    _print(limits)
    for path in args.output:
        limit_table(path, limits, overwrite=args.overwrite)
    if args.plot:
        plot_limits(args.plot, limits, overwrite=args.overwrite)
    return limits


def run(args):
    from ..background import MeanPlasma
    from ..errors import require_positive_finite

    masses = require_positive_finite(masses_from_args(args), "--mass-range" if args.mass is None else "--mass")
    kernel = MeanPlasma(None, ionisation_from_args(args)).kernel(masses)
    report(args, masses, background_kernel_eV=kernel)
    return 0


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
    columns = {"mass_eV": first.mass_eV}
    for curve in curves:
        if hasattr(curve, "kernel_eV"):
            columns[f"{curve.name}_K_eV"] = curve.kernel_eV
        columns[f"{curve.name}_eps_max"] = curve.epsilon_max
    print("# " + " ".join(f"{name:>22}" for name in columns))
    for row in np.column_stack(list(columns.values())):
        print("  " + " ".join(f"{value:22.4e}" for value in row))
