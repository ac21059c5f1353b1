"""``raytrace background``: K(m) and P(m) of the homogeneous universe."""

from contextlib import contextmanager

import numpy as np

from raytrace.cli.runfile import VOCABULARY, add_deprecated, add_option

NAME = "background"
HELP = "Conversion kernel K(m) and probability P(m) of the homogeneous universe (no boxes)."


def add_arguments(parser):
    add_mass_arguments(parser)
    add_option(parser, "output.epsilon", default=1e-7, type=float, help="kinetic mixing of P")
    add_option(parser, "output.frequency")
    parser.add_argument("--z-min", type=float, default=0.0, metavar="Z", help="lowest redshift (default: 0)")
    add_option(parser, "rays.z_max", default=1100.0, type=float, help="highest redshift (last scattering)")
    add_ionisation_arguments(parser)


def add_mass_arguments(parser, title="masses: a list, or a log-spaced grid"):
    """The mass grid in the run files' vocabulary: --mass-values, or --mass-min/--mass-max/--mass-count
    (the schema's defaults fill in, see :func:`masses_from_args`)."""
    group = parser.add_argument_group(title)
    add_option(group, "masses.values_eV", type=float)
    for key in ("masses.min_eV", "masses.max_eV", "masses.count"):
        add_option(group, key, shown=f"{VOCABULARY[key].default:g}")

    def store_range(namespace, values):
        try:
            namespace.mass_min, namespace.mass_max, namespace.mass_count = float(values[0]), float(values[1]), int(values[2])
        except ValueError:
            parser.error("--mass-range: expected MIN MAX COUNT, two numbers in eV and a whole number")

    add_deprecated(group, "--mass-range", "--mass-min MIN --mass-max MAX --mass-count COUNT", nargs=3,
                   store=store_range)


def add_ionisation_arguments(parser):
    """Options choosing the mean ionisation history; shared by every command that needs one."""
    group = parser.add_argument_group("ionisation history (default: CAMB, Planck 2018, tau = 0.0561)")
    choice = group.add_mutually_exclusive_group()
    choice.add_argument("--optical-depth", type=float, default=None, metavar="X",
                        help="optical depth to reionisation (default: 0.0561)")
    choice.add_argument("--reionisation-redshift", type=float, default=None, metavar="Z",
                        help="tanh reionisation redshift (default: from the optical depth)")
    choice.add_argument("--ionisation-table", default=None, metavar="FILE", help="two-column text table z, x_e")
    group.add_argument("--helium-fraction", type=float, default=None, metavar="X",
                       help="helium mass fraction Y_p (default: CAMB's BBN value; 0.2454 with a table)")


# Parameter names in the library's messages and the flags a user typed.
_IONISATION_FLAGS = {
    "optical_depth": "--optical-depth",
    "reionisation_redshift": "--reionisation-redshift",
    "helium_fraction": "--helium-fraction",
}


@contextmanager
def flags_named(flag_of_parameter):
    """An InputError inside that names a library parameter names the flag the user typed instead."""
    from raytrace.core.errors import InputError

    try:
        yield
    except InputError as error:
        message = str(error)
        for parameter, flag in flag_of_parameter.items():
            if message.startswith(parameter + ":"):
                raise InputError(flag + message[len(parameter):]) from None
        raise


def ionisation_from_args(args, cosmology=None):
    from raytrace.physics.ionisation import DEFAULT_HELIUM_FRACTION, IonisationHistory

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


def masses_from_args(args, required=True):
    """The masses of --mass-values or of --mass-min/--mass-max/--mass-count (the schema's defaults fill in);
    None when none is given and ``required`` is False."""
    from raytrace.core.errors import InputError, require_positive_finite

    grid = (args.mass_min, args.mass_max, args.mass_count)
    if args.mass_values is not None:
        if any(value is not None for value in grid):
            raise InputError("--mass-values: give either the masses or --mass-min/--mass-max/--mass-count, not both")
        return require_positive_finite(np.asarray(args.mass_values, dtype=float), "--mass-values")
    if not required and all(value is None for value in grid):
        return None
    low, high, count = (VOCABULARY[key].default if value is None else value
                        for key, value in zip(("masses.min_eV", "masses.max_eV", "masses.count"), grid))
    if not (np.isfinite(low) and np.isfinite(high) and 0 < low and (low < high or count == 1)) or count < 1:
        raise InputError(f"--mass-min, --mass-max, --mass-count: expected 0 < min < max and count >= 1, "
                         f"got {low!r}, {high!r}, {count!r}")
    return np.geomspace(low, high, count)


def run(args):
    from raytrace.core.errors import InputError
    from raytrace.physics.background import MeanPlasma
    from raytrace.physics.conversion import needs_saturation, probability_from_kernel
    from raytrace.physics.units import CMB_PHOTON_ENERGY_EV, photon_energy_eV

    masses = masses_from_args(args)
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
    probability = probability_from_kernel(kernel, args.epsilon, omega0,
                                          saturate=needs_saturation(kernel, args.epsilon, omega0))
    print(f"# homogeneous universe, {plasma.ionisation.description}")
    print(f"# z from {args.z_min:g} to {args.z_max:g}; epsilon = {args.epsilon:g}; omega_0 = {omega0:.4e} eV")
    print(f"# {'mass_eV':>12} {'K_eV':>12} {'P':>12}  resonance redshifts")
    for index, mass in enumerate(masses):
        redshifts = found.redshift[found.mass_index == index]
        listed = ", ".join(f"{z:.3f}" for z in redshifts) or "none"
        print(f"  {mass:12.4e} {kernel[index]:12.4e} {probability[index]:12.4e}  {listed}")
    return 0
