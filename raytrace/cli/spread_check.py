"""``raytrace spread-check``: how well a result's spread between rays (or pixels) is determined."""

NAME = "spread-check"
HELP = ("Bootstrap intervals of std/mean (and, for a sky, of the dT/T rms and the anisotropy limit), the share "
        "of the variance in the top 1 percent of rays or pixels, the Hill tail index and robust spreads, per mass.")


def add_arguments(parser):
    from raytrace.cli.runfile import add_option

    parser.add_argument("result", metavar="RESULT.h5", help="sightline or sky result file")
    parser.add_argument("--resamples", type=int, default=1000, metavar="N", help="bootstrap resamples (default: 1000)")
    add_option(parser, "rays.seed", default=0, type=int, help="seed of the bootstrap resamples")
    parser.add_argument("--level", type=float, default=0.68, metavar="X", help="level of the intervals (default: 0.68)")
    add_option(parser, "output.frequency", help="observed photon frequency or energy with a unit for a sky's dT/T "
               "(default: k T_0 = 2.35e-4 eV, T_0 = 2.72548 K, Fixsen 2009)")
    add_option(parser, "anisotropy.threshold", shown="1e-05", type=float,
               help="the dT/T rms a sky map must stay below (CMB isotropy ~1e-5)")


def run(args):
    import warnings

    from raytrace.cli.limits import photon_energy_from_args
    from raytrace.core.errors import InputError
    from raytrace.core.textcells import no_resonance
    from raytrace.statistics.spread import sky_rms_interval, spread

    result = load_rows(args.result)
    is_sky = hasattr(result, "nside")
    if not is_sky and (args.frequency is not None or args.isotropy_threshold is not None):
        raise InputError("--frequency, --isotropy-threshold: only meaningful for a sky result")
    kernel = result.columns()  # a sky's maps are read one at a time, or in blocks of pixels
    with _flag_names():
        found = spread(kernel, result.mass_eV, args.resamples, args.seed, args.level)
    rows = range(result.mass_eV.size)
    print(f"# {args.result}: {kernel.n_rows} {'pixels' if is_sky else 'rays'}")
    for line in found.table(rows, kernel, "pixel" if is_sky else "ray"):
        print(line)
    message = found.warning()
    if message:
        warnings.warn(message)
    if is_sky:
        with _flag_names():
            sky = sky_rms_interval(result, photon_energy_from_args(args), args.resamples, args.seed, args.level,
                                   args.isotropy_threshold)
        print(f"# sky: rms of dT/T at epsilon = 1 and the rms anisotropy limit (threshold {sky['threshold']:g}), "
              f"{100 * args.level:.0f} % bootstrap intervals over pixels (correlated: a lower bound on the width)")
        print(f"  {'m [eV]':>11} {'rms dT/T':>10} {'interval':>21} {'eps_max':>10} {'interval':>21}")
        for k in rows:
            empty = no_resonance(result.kernel[:, k], "pixel")
            if empty or not sky["rms"][k] > 0:
                print(f"  {result.mass_eV[k]:11.4g} {empty or 'a flat map (no anisotropy): no limit at this mass'}")
                continue
            print(f"  {result.mass_eV[k]:11.4g} {sky['rms'][k]:10.3g} {sky['rms_low'][k]:10.3g}-{sky['rms_high'][k]:<10.3g} "
                  f"{sky['epsilon_max'][k]:10.3g} {sky['epsilon_low'][k]:10.3g}-{sky['epsilon_high'][k]:<10.3g}")
    return 0


def load_rows(path):
    """A sightline or sky result from its file, by the file's format attribute."""
    import h5py

    from raytrace.core.resultfiles import open_result
    from raytrace.sky.maps import SkyResult
    from raytrace.statistics.results import SightlineResult
    from raytrace.tracing.lattice import FORMAT as SKY_FORMAT
    from raytrace.tracing.sightlines import FORMAT

    try:
        with h5py.File(path, "r") as handle:
            kind = handle.attrs.get("format")
    except OSError:
        kind = None  # open_result below says what is wrong with the file
    if kind == SKY_FORMAT:
        return SkyResult.load(path)
    if kind == FORMAT:
        return SightlineResult.load(path)
    with open_result(path, FORMAT, "sightline or sky"):
        pass  # raises the clear error (missing, unreadable, another format)


def _flag_names():
    from raytrace.cli.background import flags_named

    return flags_named({"n_resamples": "--resamples", "level": "--level", "seed": "--seed",
                        "threshold": "--isotropy-threshold"})
