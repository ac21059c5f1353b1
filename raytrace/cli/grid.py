"""``raytrace grid``: gas particles in an HDF5 file, or any snapshot yt loads -> a box file of comoving n_e.

In: the particle file, the names of its datasets and their units (flags below,
the same options as raytrace.boxes.gridding.grid_particles); or ``--yt SNAPSHOT``
(raytrace.boxes.ytgrid.grid_yt). Out: a box file that ``raytrace.load_box`` reads with
no extra flags, and the electron totals before and after deposition on stdout.
``--ionised-fraction`` means electrons per hydrogen nucleus n_e / n_H, as in
every other subcommand; hydrogen's own n_HII / n_H is ``--hydrogen-ionised-fraction``.
"""

from raytrace.cli.runfile import add_option

NAME = "grid"
HELP = ("Deposit gas particles (CIC, or SPH cubic spline with smoothing lengths), or any snapshot yt loads "
        "(--yt), onto an N^3 box of n_e.")

# Options of HDF5 particle files that have no meaning with --yt.
_PARTICLE_FILE_OPTIONS = ("positions", "position_unit", "box_size", "masses", "densities", "volumes", "mass_unit",
                          "hydrogen_ionised_fraction", "helium_electrons", "smoothing_lengths", "kernel_support")


def dataset_or_number(text):
    """A number when the text reads as one (one value for every particle), else a dataset name."""
    try:
        return float(text)
    except ValueError:
        return text


def add_arguments(parser):
    parser.add_argument("particles", metavar="PARTICLES.h5", nargs="?", help="HDF5 file of gas particles")
    parser.add_argument("--cells", type=int, required=True, metavar="N", help="cells along each side of the grid")
    parser.add_argument("--output", required=True, metavar="BOX.h5", help="box file to write")
    add_option(parser, "output.overwrite")
    parser.add_argument("--compress", action="store_true",
                        help="gzip the box (smaller; cannot be memory-mapped) (default: off)")

    where = parser.add_argument_group("positions and box")
    where.add_argument("--positions", metavar="DATASET", help="dataset of positions, shape (N, 3) (required "
                       "for a particle file)")
    where.add_argument(
        "--position-unit", metavar="UNIT",
        help="unit of positions and smoothing lengths: [c|p](pc|kpc|Mpc|Gpc)[/h], 'c' comoving, 'p' proper, "
        "e.g. ckpc/h",
    )
    where.add_argument("--box-size", metavar="LENGTH", help="box side with a unit, e.g. '25 cMpc/h'")
    where.add_argument("--redshift", type=float, metavar="Z", help="snapshot redshift")
    where.add_argument("--hubble-h", type=float, metavar="H", help="H0 / (100 km/s/Mpc); needed by any '/h' unit")
    where.add_argument(
        "--not-periodic", dest="periodic", action="store_false",
        help="the box is not periodic: positions outside it are an error instead of being wrapped "
        "(default: periodic)",
    )

    mass = parser.add_argument_group("gas mass: --masses, or --densities with --volumes (mass = density * volume)")
    mass.add_argument("--masses", type=dataset_or_number, metavar="X|DATASET", help="particle masses")
    mass.add_argument("--densities", metavar="DATASET", help="densities, in mass unit per position unit^3")
    mass.add_argument("--volumes", metavar="DATASET", help="volumes, in position unit^3")
    mass.add_argument("--mass-unit", metavar="UNIT", help="e.g. '1e10 Msun/h', 'Msun' or 'g'")
    mass.add_argument(
        "--hydrogen-fraction", type=float, default=0.76, metavar="X_H",
        help="hydrogen mass fraction (default: 0.76)",
    )

    electrons = parser.add_argument_group(
        "electrons: --ionised-fraction, or --hydrogen-ionised-fraction with --helium-electrons"
    )
    electrons.add_argument(
        "--ionised-fraction", type=dataset_or_number, metavar="X|DATASET",
        help="electrons per hydrogen nucleus n_e / n_H (with --yt: a number or a yt field)",
    )
    electrons.add_argument(
        "--hydrogen-ionised-fraction", type=dataset_or_number, metavar="X|DATASET", help="n_HII / n_H, in [0, 1]"
    )
    electrons.add_argument(
        "--helium-electrons", type=int, choices=(0, 1, 2),
        help="electrons per helium atom where hydrogen is ionised (with --hydrogen-ionised-fraction)",
    )

    yt = parser.add_argument_group("any snapshot yt loads (the raytrace[yt] extra), instead of PARTICLES.h5")
    yt.add_argument("--yt", metavar="SNAPSHOT", help="a file or folder yt.load opens (AMR, uniform grid, particles)")
    yt.add_argument("--yt-field", metavar="FIELD",
                    help="yt field of electron number density, 'name' or 'type,name' (default: gas El_number_density "
                    "when the dataset has it)")
    yt.add_argument("--yt-particle-type", metavar="TYPE", help="the gas particle type (default: the SPH or only one)")

    kernel = parser.add_argument_group("deposit (default: SPH with --smoothing-lengths, else cloud in cell)")
    kernel.add_argument("--smoothing-lengths", metavar="DATASET", help="SPH smoothing lengths, in the position unit")
    kernel.add_argument(
        "--kernel-support", type=float, metavar="FACTOR",
        help="kernel support radius / stored smoothing length: 2 for Monaghan's h, 1 for a stored support radius",
    )
    kernel.add_argument("--method", choices=("auto", "cic", "sph"), default="auto",
                        help="deposit scheme (default: auto, SPH with --smoothing-lengths, else CIC)")


#: Grids of this many cells a side and more say on stderr what grid is doing.
LARGE_CELLS = 128
#: More empty cells than this share of the grid get a warning: the grid is too fine for the particles.
EMPTY_WARNING = 0.10


def _check_memory(cells):
    """A grid larger than the machine's memory is refused before the notice and the work (main says: memory)."""
    import os

    try:
        total = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    except (ValueError, OSError, AttributeError):  # not a POSIX system: the deposit finds out itself
        return
    needed = 8.0 * cells**3  # the float64 grid alone
    if cells > 0 and needed > total:
        raise MemoryError(f"--cells {cells}: the grid alone needs {needed / 2**30:.3g} GiB, "
                          f"this machine has {total / 2**30:.3g} GiB")


def _warn_empty(density, written, cells):
    """Warn when more than EMPTY_WARNING of the written cells hold no electrons."""
    import warnings

    import numpy as np

    from raytrace.core.errors import RaytraceWarning

    empty = float(np.mean(np.asarray(density) <= 0))
    if empty > EMPTY_WARNING:
        warnings.warn(RaytraceWarning(
            f"{100 * empty:.0f} % of the {cells}^3 cells of {written} are empty (nothing deposited there): "
            "the grid is finer than the particles sample the gas; fewer --cells, or smoothing lengths for SPH, "
            "fill it"), stacklevel=2)


def run(args):
    from raytrace.core.errors import InputError
    from raytrace.core.outputguard import output_lock, refuse_outputs_over_inputs
    from raytrace.core.provenance import check_writable

    refuse_outputs_over_inputs([(args.output, "--output")], [(args.particles, "PARTICLES.h5"), (args.yt, "--yt")])
    check_writable(args.output, args.overwrite)  # before the work, not after it
    if args.cells < 2:  # every loader needs 2 cells a side: a grid of one would be written and never read
        raise InputError(f"--cells: expected a whole number >= 2 (cells along each side), got {args.cells}")
    if (args.yt is None) == (args.particles is None):
        raise InputError("grid: give a particle file PARTICLES.h5 or --yt SNAPSHOT, one of the two")
    with output_lock([args.output]):  # one run per output at a time
        return _run_yt(args) if args.yt is not None else _run_particles(args)


def _run_particles(args):
    import sys
    import time

    from raytrace.boxes.gridding import grid_particles
    from raytrace.core.errors import InputError

    for name in ("yt_field", "yt_particle_type"):
        if getattr(args, name) is not None:
            raise InputError(f"--{name.replace('_', '-')}: applies with --yt SNAPSHOT only")
    large = args.cells >= LARGE_CELLS
    _check_memory(args.cells)
    start = time.perf_counter()
    if large:
        print(f"raytrace grid: depositing the particles of {args.particles} on {args.cells}^3 cells ...",
              file=sys.stderr, flush=True)
    result = grid_particles(
        args.particles, args.cells,
        positions=args.positions, position_unit=args.position_unit, box_size=args.box_size,
        redshift=args.redshift, hubble_h=args.hubble_h, periodic=args.periodic,
        masses=args.masses, densities=args.densities, volumes=args.volumes, mass_unit=args.mass_unit,
        hydrogen_fraction=args.hydrogen_fraction,
        electron_abundance=args.ionised_fraction, hydrogen_ionised_fraction=args.hydrogen_ionised_fraction,
        helium_electrons=args.helium_electrons,
        smoothing_lengths=args.smoothing_lengths, kernel_support=args.kernel_support, method=args.method,
    )
    if large:
        print(f"raytrace grid: deposited in {time.perf_counter() - start:.1f} s; writing {args.output} ...",
              file=sys.stderr, flush=True)
    written = result.write(args.output, overwrite=args.overwrite, compression="gzip" if args.compress else None)
    _warn_empty(result.density, written, args.cells)
    print(f"# {result.n_particles} particles from {args.particles}, deposit {result.method}", end="")
    print(f" ({result.kernel_fallbacks} by CIC: kernel under one cell)" if result.method == "sph" else "")
    print(
        f"# electrons: {result.electrons_read:.10e} read, {result.electrons_gridded:.10e} on the grid "
        f"(relative difference {result.relative_difference:.2e})"
    )
    print(
        f"# wrote {written}: {args.cells}^3 cells, {result.box_size_cMpc:g} cMpc, z = {result.redshift:g}, "
        f"mean n_e = {result.density.mean():.4e} cm^-3 comoving"
    )
    return 0


def _run_yt(args):
    from raytrace.boxes.ytgrid import grid_yt
    from raytrace.core.errors import InputError

    for name in _PARTICLE_FILE_OPTIONS:
        if getattr(args, name) is not None:
            raise InputError(f"--{name.replace('_', '-')}: applies to a particle file, not to --yt (yt's dataset "
                             "knows its positions, masses and units)")
    if args.method != "auto" or not args.periodic:
        raise InputError("--method, --not-periodic: apply to a particle file, not to --yt")
    result = grid_yt(args.yt, args.cells, electron_field=args.yt_field, ionised_fraction=args.ionised_fraction,
                     hydrogen_fraction=args.hydrogen_fraction, particle_type=args.yt_particle_type,
                     redshift=args.redshift, hubble_h=args.hubble_h)
    written = result.write(args.output, overwrite=args.overwrite, compression="gzip" if args.compress else None)
    _warn_empty(result.density, written, args.cells)
    print(f"# {args.yt} through yt: {result.n_particles} particles or cells, {result.method}")
    print(f"# electrons: {result.electrons_read:.10e} in the dataset, {result.electrons_gridded:.10e} on the grid "
          f"(relative difference {result.relative_difference:.2e})")
    print(f"# wrote {written}: {args.cells}^3 cells, {result.box_size_cMpc:g} cMpc, z = {result.redshift:g}"
          + (f", h = {result.hubble_h:g}" if result.hubble_h is not None else ""))
    return 0

