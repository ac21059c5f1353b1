"""``raytrace spread-check``: how well a result's spread between rays (or pixels) is determined."""

NAME = "spread-check"
HELP = ("Bootstrap intervals of std/mean, the share of the variance in the top 1 percent of rays or pixels, the "
        "Hill tail index and robust spreads, per mass; for a sky, its signal and noise side by side (rms and "
        "spectra from its independent splits) and where the noise exceeds the signal.")


def add_arguments(parser):
    from raytrace.cli.runfile import add_option

    parser.add_argument("result", metavar="RESULT.h5", help="sightline or sky result file")
    parser.add_argument("--resamples", type=int, default=1000, metavar="N", help="bootstrap resamples (default: 1000)")
    add_option(parser, "rays.seed", default=0, type=int, help="seed of the bootstrap resamples")
    parser.add_argument("--level", type=float, default=0.68, metavar="X", help="level of the intervals (default: 0.68)")


def run(args):
    import warnings

    from raytrace.statistics.spread import spread

    result = load_rows(args.result)
    is_sky = hasattr(result, "nside")
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
        from raytrace.sky.spectra import signal_noise_lines, sky_spectra

        if result.splits is None:
            print(f"# {args.result}: one ray per pixel, no independent splits: the map's signal and noise cannot "
                  "be told apart (cast it with --rays-per-pixel 2 or more)")
            return 0
        with _flag_names():
            spectra = sky_spectra(result, n_resamples=args.resamples, seed=args.seed, level=args.level)
        lines = signal_noise_lines(spectra, rows)
        print("# sky: " + lines[0])
        print("\n".join(lines[1:-1]))
        print("# " + lines[-1])
    return 0


def load_rows(path):
    """A sightline or sky result from its file, by the file's format attribute."""
    from raytrace.core.resultfiles import open_result
    from raytrace.statistics.results import SightlineResult
    from raytrace.tracing.sightlines import FORMAT
    from raytrace.tracing.lattice import FORMAT as SKY_FORMAT
    from raytrace.sky.maps import SkyResult

    import h5py

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
