"""``raytrace background``: K(m) and P(m) of the homogeneous universe."""

from contextlib import contextmanager

import numpy as np

NAME = "background"
HELP = "Conversion kernel K(m) and probability P(m) of the homogeneous universe (no boxes)."


def add_arguments(parser):
    masses = parser.add_mutually_exclusive_group(required=True)
    masses.add_argument("--mass", nargs="+", type=float, metavar="EV", help="dark-photon masses in eV")
    masses.add_argument(
        "--mass-range", nargs=3, metavar=("MIN", "MAX", "COUNT"),
        help="log-spaced masses: lowest and highest in eV, and how many",
    )
    parser.add_argument("--epsilon", type=float, default=1e-7, help="kinetic mixing (default 1e-7)")
    parser.add_argument(
        "--frequency", default=None,
        help="observed photon frequency or energy with a unit, e.g. '160 GHz' or '5.45 1/cm' "
        "(default: k T_0 = 2.35e-4 eV, T_0 = 2.72548 K, Fixsen 2009)",
    )
    parser.add_argument("--z-min", type=float, default=0.0, help="lowest redshift (default 0)")
    parser.add_argument("--z-max", type=float, default=1100.0, help="highest redshift (default 1100)")
    add_ionisation_arguments(parser)


def add_ionisation_arguments(parser):
    """Options choosing the mean ionisation history; shared by every command that needs one."""
    group = parser.add_argument_group("ionisation history (default: CAMB, Planck 2018, tau = 0.0561)")
    choice = group.add_mutually_exclusive_group()
    choice.add_argument("--optical-depth", type=float, default=None, help="optical depth to reionisation")
    choice.add_argument("--reionisation-redshift", type=float, default=None, help="tanh reionisation redshift")
    choice.add_argument("--ionisation-table", default=None, metavar="FILE", help="two-column text table z, x_e")
    group.add_argument("--helium-fraction", type=float, default=None, help="helium mass fraction Y_p")


# Parameter names in the library's messages and the flags a user typed.
_IONISATION_FLAGS = {
    "optical_depth": "--optical-depth",
    "reionisation_redshift": "--reionisation-redshift",
    "helium_fraction": "--helium-fraction",
}


@contextmanager
def flags_named(flag_of_parameter):
    """An InputError inside that names a library parameter names the flag the user typed instead."""
    from ..errors import InputError

    try:
        yield
    except InputError as error:
        message = str(error)
        for parameter, flag in flag_of_parameter.items():
            if message.startswith(parameter + ":"):
                raise InputError(flag + message[len(parameter):]) from None
        raise


def ionisation_from_args(args, cosmology=None):
    from ..ionisation import DEFAULT_HELIUM_FRACTION, IonisationHistory

    with flags_named(_IONISATION_FLAGS):
        if args.ionisation_table:
            helium = DEFAULT_HELIUM_FRACTION if args.helium_fraction is None else args.helium_fraction
            return IonisationHistory.from_table(args.ionisation_table, helium_fraction=helium)
        return IonisationHistory.from_camb(
            cosmology,
            optical_depth=args.optical_depth,
            reionisation_redshift=args.reionisation_redshift,
            helium_fraction=args.helium_fraction,
        )


def masses_from_args(args):
    from ..errors import InputError

    if args.mass is not None:
        return np.asarray(args.mass, dtype=float)
    try:
        low, high, count = float(args.mass_range[0]), float(args.mass_range[1]), int(args.mass_range[2])
    except ValueError:
        raise InputError("--mass-range: expected MIN MAX COUNT, two numbers in eV and a whole number") from None
    if not (0 < low < high) or count < 1:
        raise InputError("--mass-range: expected 0 < MIN < MAX and COUNT >= 1")
    return np.geomspace(low, high, count)


def run(args):
    from ..background import MeanPlasma
    from ..conversion import probability_from_kernel
    from ..errors import InputError, require_positive_finite
    from ..units import CMB_PHOTON_ENERGY_EV, photon_energy_eV

    masses = require_positive_finite(masses_from_args(args), "--mass-range" if args.mass is None else "--mass")
    if not (np.isfinite(args.epsilon) and args.epsilon >= 0):
        raise InputError(f"--epsilon: expected a finite value >= 0, got {args.epsilon!r}")
    if not (np.isfinite(args.z_min) and np.isfinite(args.z_max) and 0 <= args.z_min < args.z_max):
        raise InputError(f"--z-min, --z-max: expected 0 <= z_min < z_max, got {args.z_min!r} and {args.z_max!r}")
    omega0 = CMB_PHOTON_ENERGY_EV if args.frequency is None else photon_energy_eV(args.frequency, "--frequency")
    plasma = MeanPlasma(None, ionisation_from_args(args))
    if args.z_max > plasma.ionisation.z_max:
        raise InputError(
            f"--z-max: {args.z_max:g} is beyond the ionisation history ({plasma.ionisation.description}), "
            f"which ends at z = {plasma.ionisation.z_max:g}"
        )
    found = plasma.crossings(masses, args.z_min, args.z_max)
    kernel = np.bincount(found.mass_index, weights=found.kernel_eV, minlength=masses.size)
    probability = probability_from_kernel(kernel, args.epsilon, omega0)
    print(f"# homogeneous universe, {plasma.ionisation.description}")
    print(f"# z from {args.z_min:g} to {args.z_max:g}; epsilon = {args.epsilon:g}; omega_0 = {omega0:.4e} eV")
    print(f"# {'mass_eV':>12} {'K_eV':>12} {'P':>12}  resonance redshifts")
    for index, mass in enumerate(masses):
        redshifts = found.redshift[found.mass_index == index]
        listed = ", ".join(f"{z:.3f}" for z in redshifts) or "none"
        print(f"  {mass:12.4e} {kernel[index]:12.4e} {probability[index]:12.4e}  {listed}")
    return 0
