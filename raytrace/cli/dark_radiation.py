"""``raytrace dark-radiation``: the photons a dark-photon background becomes on a run's resonances.

In: a sightline result with redshift bins (or a sky with shells), epsilon, the
transverse fraction, the observer's redshift and a source (decaying dark matter,
or an emission table). Out: a summary on stdout; on request the spectrum as
CSV / HDF5 tables and a figure, the limits on epsilon from the CMB monopole and a
radio level as tables and a figure, and a sky map at one frequency (FITS).
"""

import numpy as np

from raytrace.cli.runfile import add_option
from raytrace.cli.background import add_ionisation_arguments, ionisation_from_args
from raytrace.cli.limits import add_spectrum_arguments, check_confidence, flags_named

NAME = "dark-radiation"
HELP = ("The photons a dark-photon background (decaying dark matter, or a table) becomes on the resonances of a "
        "sightline result with redshift bins or a sky with shells: their spectrum, excess over the CMB at the "
        "observer, and the limits on epsilon from the CMB monopole and a radio background level.")


def add_arguments(parser):
    from raytrace.limits.darkradiation import DEFAULT_TRANSVERSE_FRACTION

    add_option(parser, "inputs.result", required=True, help="sightline result with redshift bins (raytrace "
               "sightlines), or sky result with shells (raytrace sky --shells)")
    add_option(parser, "output.epsilon", type=float, required=True, help="kinetic mixing of the spectrum")
    parser.add_argument("--transverse-fraction", type=float, default=DEFAULT_TRANSVERSE_FRACTION, metavar="X",
                        help="share of the dark photons in transverse states (default: 2/3, three states alike; "
                        "1 for a source that emits transverse states only)")
    parser.add_argument("--observer-redshift", type=float, default=0.0, metavar="Z",
                        help="the observer's redshift, e.g. 17 for cosmic dawn (default: 0)")
    source = parser.add_argument_group("source (decaying dark matter, or --source-table)")
    source.add_argument("--source-mass", type=float, metavar="EV", help="decaying particle's mass M in eV")
    source.add_argument("--lifetime", type=float, metavar="S", help="its lifetime tau in s")
    source.add_argument("--fraction", type=float, default=1.0, metavar="X",
                        help="its share of the dark matter (default: 1)")
    source.add_argument("--source-table", metavar="FILE", help="emission table: '# columns: redshift, energy eV, "
                        "rate cm^-3 s^-1 eV^-1' then rows of a full grid (instead of a decaying source)")
    parser.add_argument("--frequency-range", nargs=2, metavar=("LOW", "HIGH"),
                        help="frequencies at the observer with units, e.g. '10 MHz' '10 GHz' (default: the "
                        "source's whole range)")
    parser.add_argument("--frequency-count", type=int, default=160, metavar="N",
                        help="log-spaced frequencies of the spectrum (default: 160)")
    outputs = parser.add_argument_group("outputs")
    outputs.add_argument("--output", nargs="+", default=(), metavar="FILE", help="the spectrum as tables: .csv "
                         "and/or .h5")
    add_option(outputs, "output.plot", help="figure of the spectrum (PNG or PDF)")
    outputs.add_argument("--limits", nargs="+", default=(), metavar="FILE", help="the limits on epsilon as tables: "
                         ".csv and/or .h5")
    outputs.add_argument("--limits-plot", metavar="FILE", help="figure of the limits on epsilon (PNG or PDF)")
    outputs.add_argument("--sky-map", metavar="FILE", help="HEALPix FITS map of the brightness temperature at "
                         "--frequency and --mass (a sky result with shells)")
    add_option(outputs, "output.frequency", help="frequency of the sky map at the observer, with a unit")
    add_option(outputs, "output.mass_eV", type=float, help="dark-photon mass in eV of the sky map")
    add_option(outputs, "output.overwrite")
    radio = parser.add_argument_group("radio background level (default: the ARCADE 2 excess, quoted from memory)")
    radio.add_argument("--radio-level", nargs=3, type=float, metavar=("T_K", "NU_HZ", "INDEX"),
                       help="T(nu) = T_K (nu / NU_HZ)^INDEX at the observer")
    radio.add_argument("--radio-band", nargs=2, type=float, metavar=("LOW_HZ", "HIGH_HZ"),
                       help="frequencies where the level holds (with --radio-level)")
    add_spectrum_arguments(parser)
    add_ionisation_arguments(parser)


def source_from_args(args):
    """The decaying source of --source-mass/--lifetime/--fraction, or the table of --source-table."""
    from raytrace.physics.darksources import DecayingDarkMatter, read_emission_table
    from raytrace.core.errors import InputError

    decay = [flag for flag, value in (("--source-mass", args.source_mass), ("--lifetime", args.lifetime))
             if value is not None]
    if args.source_table is not None:
        if decay:
            raise InputError(f"--source-table: give a table or a decaying source ({', '.join(decay)}), not both")
        return read_emission_table(args.source_table)
    if len(decay) != 2:
        raise InputError("source: give --source-mass and --lifetime (a decaying source), or --source-table")
    return DecayingDarkMatter(args.source_mass, args.lifetime, args.fraction)


def level_from_args(args):
    from raytrace.limits.darklimits import ARCADE2_EXCESS, RadioLevel
    from raytrace.core.errors import InputError

    if args.radio_level is None:
        if args.radio_band is not None:
            raise InputError("--radio-band: only meaningful with --radio-level")
        return ARCADE2_EXCESS
    if args.radio_band is None:
        raise InputError("--radio-level: give --radio-band too (the frequencies where the level holds)")
    temperature, reference, index = args.radio_level
    return RadioLevel(temperature, reference, index, tuple(args.radio_band), "radio level given (--radio-level)")


def frequencies_from_args(args):
    import astropy.units as u

    from raytrace.core.errors import InputError
    from raytrace.physics.units import parse_quantity

    if args.frequency_range is None:
        return None
    if args.frequency_count < 2:
        raise InputError(f"--frequency-count: expected at least 2, got {args.frequency_count}")
    try:
        low, high = (parse_quantity(text, "--frequency-range").to_value(u.Hz, equivalencies=u.spectral())
                     for text in args.frequency_range)
    except u.UnitConversionError:
        raise InputError(f"--frequency-range: {args.frequency_range} are not frequencies or energies") from None
    if not 0 < low < high:
        raise InputError(f"--frequency-range: expected 0 < LOW < HIGH, got {args.frequency_range}")
    return np.geomspace(low, high, args.frequency_count)


def run(args):
    from raytrace.physics.background import MeanPlasma
    from raytrace.statistics.results import load_mean_result
    from raytrace.core.provenance import check_outputs, output_set
    from raytrace.sky.maps import SkyResult
    from raytrace.tracing.lattice import FORMAT as SKY_FORMAT

    check_confidence(args)
    paths = [*args.output, *args.limits, *(p for p in (args.plot, args.limits_plot, args.sky_map) if p)]
    check_outputs(paths, args.overwrite)  # every output, before any work
    if args.sky_map and (args.frequency is None or args.mass is None):
        from raytrace.core.errors import InputError

        raise InputError("--sky-map: give --frequency and --mass (the map's frequency and dark-photon mass)")
    source, level, frequencies = source_from_args(args), level_from_args(args), frequencies_from_args(args)
    plasma = MeanPlasma(None, ionisation_from_args(args))
    result = SkyResult.load(args.result) if _format(args.result) == SKY_FORMAT else load_mean_result(args.result)
    with flags_named(), output_set():
        photons, limits = compute(args, result, source, level, frequencies, plasma)
        write_outputs(args, result, source, photons, limits, level, plasma)
    print_summary(photons, limits)
    for path in paths:
        print(f"written: {path}")
    return 0


def _format(path):
    import h5py

    try:
        with h5py.File(path, "r") as handle:
            return handle.attrs.get("format")
    except OSError:
        return None  # the loader says what is wrong with the file


def compute(args, result, source, level, frequencies, plasma):
    """The spectrum at the observer and the limits (monopole and radio level, today)."""
    from raytrace.limits.darklimits import added_photon_limit, radio_limit
    from raytrace.limits.darkradiation import converted_photons, kernel_profile
    from raytrace.limits.limitset import LimitSet
    from raytrace.limits.spectrum import read_spectrum

    profile = kernel_profile(result, plasma)
    photons = converted_photons(result, source, args.epsilon, args.transverse_fraction, args.observer_redshift,
                                frequencies, plasma, profile)
    monopole = added_photon_limit(result, source, args.transverse_fraction, read_spectrum(args.spectrum),
                                  args.confidence, args.fit_galaxy, plasma, profile)
    radio = radio_limit(result, source, args.transverse_fraction, level, 0.0, plasma=plasma, profile=profile)
    return photons, LimitSet((monopole, radio))


def write_outputs(args, result, source, photons, limits, level, plasma):
    from raytrace.limits.darklimits import photon_table, plot_spectrum
    from raytrace.limits.limitset import limit_table, plot_limits

    for path in args.output:
        photon_table(path, photons, args.overwrite)
    if args.plot:
        plot_spectrum(photons, args.plot, level=level if photons.z_obs == 0 else None, overwrite=args.overwrite)
    for path in args.limits:
        limit_table(path, limits, overwrite=args.overwrite)
    if args.limits_plot:
        plot_limits(args.limits_plot, limits, overwrite=args.overwrite, title=f"dark radiation: {source.describe()}")
    if args.sky_map:
        write_sky_map(args, result, source, plasma)


def write_sky_map(args, result, source, plasma):
    """The brightness temperature map at --frequency and --mass, as HEALPix FITS."""
    import healpy

    from raytrace.physics.constants import H_PLANCK_EV_S
    from raytrace.limits.darkradiation import converted_photon_map
    from raytrace.core.errors import InputError
    from raytrace.core.provenance import atomic_output
    from raytrace.physics.units import photon_energy_eV

    if not hasattr(result, "nside"):
        raise InputError(f"--sky-map: {args.result} is a sightline result; a map needs a sky result with shells")
    frequency = photon_energy_eV(args.frequency, "--frequency") / H_PLANCK_EV_S
    values = converted_photon_map(result, source, args.epsilon, frequency, args.mass, args.transverse_fraction,
                                  args.observer_redshift, plasma)
    with atomic_output(args.sky_map, args.overwrite) as temporary:
        healpy.write_map(str(temporary), values, nest=result.ordering == "NESTED", coord=None, column_names=["TB"],
                         column_units=["K"], overwrite=True, dtype=np.float64,
                         extra_header=[("FREQ", frequency, "frequency at the observer, Hz"),
                                       ("MASS", float(result.mass_eV[result.mass_index(args.mass)]), "eV"),
                                       ("EPSILON", args.epsilon), ("ZOBS", args.observer_redshift)])


def print_summary(photons, limits):
    curves = {curve.name: curve for curve in limits.curves}
    print(f"# converted dark radiation: epsilon = {photons.epsilon:g}, f_T = {photons.transverse_fraction:.3g}, "
          f"observer at z = {photons.z_obs:g} (T_CMB = {photons.cmb_temperature_K:.4g} K); source {photons.source}")
    print(f"# spread: {photons.spread}")
    print(f"# {'m [eV]':>11} {'nu_peak GHz':>12} {'T_b [K]':>11} {'T_b/T_CMB':>11} {'T_b 16-84 % [K]':>23} "
          f"{'eps monopole':>12} {'eps radio':>11}")
    lit = np.flatnonzero(np.any(photons.temperature_K > 0, axis=0))
    for k in lit[np.round(np.linspace(0, lit.size - 1, min(8, lit.size))).astype(int)] if lit.size else []:
        j = int(np.argmax(photons.excess()[:, k]))
        band = ("-" if photons.temperature_percentiles_K is None else
                f"{photons.temperature_percentiles_K[1, j, k]:.3g}-{photons.temperature_percentiles_K[3, j, k]:.3g}")
        print(f"  {photons.mass_eV[k]:11.4g} {photons.frequency_hz[j] / 1e9:12.4g} {photons.temperature_K[j, k]:11.4g} "
              f"{photons.excess()[j, k]:11.4g} {band:>23} {curves['monopole'].epsilon_max[k]:12.4g} "
              f"{curves['radio'].epsilon_max[k]:11.4g}")
    print("# nu_peak: the frequency of the largest excess; eps: epsilon_max from the CMB monopole with the photons "
          f"added and from {curves['radio'].details['level']} (today)")
