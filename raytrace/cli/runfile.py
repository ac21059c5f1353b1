"""Run files: a TOML document of sections and keys, every key also a CLI flag.

In: a TOML file and/or command-line flags. Out: a validated, flat dict of run
settings (``{"rays.count": 2000, ...}``). Unknown sections or keys, wrong types
and out-of-range values are InputErrors that name the key, the file and what
is expected (an unknown key lists the known ones).

The schema is data (:data:`SIGHTLINE_OPTIONS`, :data:`SKY_OPTIONS`), so the TOML keys, the flags, their help
and their checks cannot drift apart. It is also the project's one vocabulary: every subcommand, with a run
file or without, spells a concept with the flag, metavar, default and help of its :class:`Option` here
(:data:`VOCABULARY`; :func:`add_option` adds one to a plain parser). Old spellings (``aliases``,
``old_keys``) keep working for one release and print a one-line deprecation notice.
"""

import argparse
import os
import sys
from dataclasses import dataclass, replace
from pathlib import Path

try:
    import tomllib
except ModuleNotFoundError:  # Python 3.10
    import tomli as tomllib

from raytrace.cli.runvalues import NumberOrText, check_range, convert
from raytrace.core.errors import InputError
from raytrace.physics.units import CMB_PHOTON_ENERGY_EV

#: Options that older releases took and this one refuses, with the reason (API keywords).
REMOVED_OPTIONS = {"step": "the engine now solves the interpolated field's crossings exactly, cell by cell, so "
                           "there is no step length to choose; remove it",
                   "density_floor": "empty cells are now exact zeros of the interpolated field, which never resonate; "
                                    "remove it"}

#: The run-file keys (and their flags) of those options: refused with the same reason, in one line.
REMOVED_KEYS = {"rays.step_cells": ("--step-cells", REMOVED_OPTIONS["step"])}


@dataclass(frozen=True)
class Option:
    key: str            # "section.name" in the TOML file
    kind: type          # str, int, float, bool, list (of str or float)
    default: object
    help: str
    at_least: float = None   # inclusive lower bound
    above: float = None      # exclusive lower bound
    at_most: float = None    # inclusive upper bound
    flag_name: str = None    # when the key's own name would be ambiguous as a flag
    path: bool = False       # a file path: in a run file, relative to the run file's folder
    forbidden: tuple = ()    # values refused although within the bounds
    choices: tuple = ()      # the only values accepted, when not empty
    listable: bool = False   # one value or a list: a TOML list, or comma-separated in a flag
    metavar: str = None      # default: by kind (N, X, TEXT, FILE)
    aliases: tuple = ()      # deprecated flags, still accepted for one release
    old_keys: tuple = ()     # deprecated TOML keys, still accepted for one release
    numbers: bool = False    # kind list: a list of numbers (a TOML list, or flag values, comma-separated too)

    @property
    def flag(self):
        return "--" + (self.flag_name or self.key.split(".", 1)[1].replace("_", "-"))

    @property
    def dest(self):
        return self.key.replace(".", "__")


BOX_OPTIONS = (
    Option("boxes.files", list, None, "box files or glob patterns (HDF5); a series when several", flag_name="boxes",
           path=True),
    Option("boxes.dataset", str, None, "path of the 3-D density dataset in each file, or several comma-separated "
           "(default: the only 3-D dataset, or those that carry their own redshift attribute)", listable=True,
           metavar="PATH"),
    Option("boxes.quantity", str, None, "what the values are (overrides the file's 'quantity' attribute)",
           choices=("n_e_physical", "n_e_comoving", "overdensity", "gas_density", "gas_overdensity",
                    "density_contrast")),
    Option("boxes.box_size", str, None, "box side with its unit, e.g. '100 Mpc/h', one for all files or one per "
           "file (overrides the file's box size)", listable=True, metavar="LENGTH"),
    Option("boxes.redshift", float, None, "snapshot redshift, one for all files or one per file in the files' "
           "order (overrides the file's redshift)", at_least=0.0, listable=True, metavar="Z"),
    Option("boxes.hubble_h", float, None, "the simulation's h, when the box size unit has /h", above=0.0, metavar="H"),
    Option("boxes.ionised_fraction", NumberOrText, None, "electrons per hydrogen nucleus n_e/n_H: a number, or a "
           "3-D dataset of it in each file (gas quantities; overdensity with mean_density = 'box')", listable=True),
    Option("boxes.neutral_fraction", NumberOrText, None, "instead of ionised_fraction: the neutral hydrogen "
           "fraction n_HI/n_H, a number or a 3-D dataset (needs helium_electrons)", listable=True),
    Option("boxes.helium_electrons", int, None, "with neutral_fraction: electrons per helium atom where hydrogen "
           "is ionised", choices=(0, 1, 2)),
    Option("boxes.mean_density", str, None, "what an overdensity is relative to: 'history' (nbar_e of the "
           "background ionisation history, the default) or 'box' (the box's own ionisation)",
           choices=("history", "box")),
    Option("boxes.blend", bool, False, "blend the two snapshots bracketing each redshift (linear in n_e, weights linear in z)"),
)

#: A list of masses instead of the log-spaced grid; the old flag --mass still works where it means no other
#: option (not in sky and report, whose --mass is the shown mass).
MASS_VALUES = Option("masses.values_eV", list, None, "dark-photon masses in eV, increasing (instead of "
                     "--mass-min/--mass-max/--mass-count)", flag_name="mass-values", metavar="EV", numbers=True)
MASS_GRID = (
    Option("masses.min_eV", float, 1e-15, "lowest dark-photon mass in eV", above=0.0, flag_name="mass-min",
           metavar="EV"),
    Option("masses.max_eV", float, 1e-12, "highest dark-photon mass in eV", above=0.0, flag_name="mass-max",
           metavar="EV"),
    Option("masses.count", int, 64, "number of log-spaced masses", at_least=1, flag_name="mass-count"),
)
MASS_OPTIONS = MASS_GRID + (replace(MASS_VALUES, aliases=("--mass",)),)

TRACE_OPTIONS = (
    Option("rays.z_max", float, 6.0, "redshift the rays reach (1100 reaches last scattering)", above=0.0,
           metavar="Z"),
    Option("rays.z_boxes", float, None, "highest redshift the boxes serve (default: the highest snapshot's)", above=0.0,
           metavar="Z"),
    Option("rays.include_background", bool, True, "add the homogeneous universe from z_boxes to z_max"),
    Option("rays.photon_energy_eV", float, CMB_PHOTON_ENERGY_EV, "observed photon energy (eV) at which near-tangent "
           "resonances take their Airy form (default k T_0)", above=0.0, flag_name="photon-energy"),
    Option("rays.seed", int, 0, "random seed (0 to 2^63 - 1); ray i's stream is fixed by (seed, i)", at_least=0,
           at_most=2**63 - 1, metavar="SEED"),
    Option("rays.jobs", int, 1, "parallel threads (-1: all cores); with --scheduler, threads per worker task",
           at_least=-1, forbidden=(0,)),
    Option("rays.batch_size", int, 256, "rays per batch, the checkpoint's granularity (results do not depend on it)",
           at_least=1),
    Option("rays.scheduler", str, None, "dask.distributed scheduler address, or 'local' for a local cluster of processes",
           metavar="ADDRESS"),
    Option("rays.workers", int, None, "worker processes of the local cluster (--scheduler local; default: one per core)",
           at_least=1),
    Option("rays.device", str, "cpu", "where the rays are traced: the CPU, a CUDA GPU (numba-cuda: the 'gpu' "
           "extra), or auto, a GPU where numba-cuda sees one and else the CPU", choices=("cpu", "gpu", "auto")),
)

#: Every output path can be switched off with an empty value (--plot "", or plot = "" in a run file).
OUTPUT_OPTIONS = (
    Option("output.path", str, None, "result file (HDF5)", flag_name="output", path=True, metavar="RESULT.h5"),
    Option("output.plot", str, None, "figure of the kernel versus mass (PNG or PDF)", path=True),
    Option("output.epsilon", float, None, "plot P for this mixing instead of the kernel (a sky: its dT/T figure, "
           "by default at the shown mass's limit, and P maps in FITS)", above=0.0),
    Option("output.frequency", str, None, "observed photon frequency or energy with a unit, e.g. '160 GHz' (default: "
           "k T_0 = 2.35e-4 eV, T_0 = 2.72548 K, Fixsen 2009; a sky's dT/T and anisotropy limits: 143 GHz, "
           "the measured TT spectrum's limit needs 100-217 GHz)", metavar="FREQUENCY"),
    Option("output.overwrite", bool, False, "replace this run's existing outputs (never another run's files)"),
    Option("output.resume", bool, False, "continue an interrupted run from its checkpoint"),
)

#: When and where conversion happens (raytrace.redshiftbins): the kernel per redshift bin and density class.
BIN_OPTIONS = (
    Option("rays.redshift_bins", float, 16.0, "redshift bins of the kernel: a count (equal steps in ln(1+z) over the "
           "boxes' redshifts, the background beyond in a bin of its own; 0: none) or edges in z", at_least=0.0,
           listable=True, metavar="N|Z"),
    Option("rays.density_classes", float, None, "edges in D* = (m / mbar_gamma(z_c))^2 of the crossings' density "
           "classes (default: 1,100: voids, sheets and filaments, halos)", above=0.0, listable=True, metavar="D"),
    Option("rays.keep_ray_bins", bool, False, "keep every ray's redshift bins in the result (rays x bins x masses)"),
)
SIGHTLINE_OPTIONS = (BOX_OPTIONS + MASS_OPTIONS
                     + (Option("rays.count", int, 1000, "number of sightlines", at_least=1, flag_name="rays"),)
                     + TRACE_OPTIONS + BIN_OPTIONS + OUTPUT_OPTIONS)

#: The mass whose map a sky figure, the first FITS map and the report show (default: :func:`raytrace.report.plots.shown_mass_index`).
SHOWN_MASS = Option("output.mass_eV", float, None, "dark-photon mass in eV of the map shown: the figure and the "
                    "first FITS map (default: the middle of the masses resonating in most pixels)", above=0.0,
                    flag_name="mass", metavar="EV")
ISOTROPY_THRESHOLD = Option("anisotropy.threshold", float, 1e-5, "quick look: signal rms of dT/T to stay below (~1e-5)",
                            above=0.0, flag_name="isotropy-threshold", metavar="DT_T", aliases=("--threshold",))
CL_LIMITS = Option("anisotropy.cl_limits", str, None, "table of l, C_l upper limit in (dT/T)^2: a further limit", path=True)

SKY_OPTIONS = (
    BOX_OPTIONS + MASS_GRID + (MASS_VALUES,)
    + tuple(option for option in TRACE_OPTIONS if option.key != "rays.batch_size")
    + (
        replace(TRACE_OPTIONS[6], default=1024, help="pixels per batch, the checkpoint's granularity "
                "(results do not depend on it)", aliases=("--batch-pixels",), old_keys=("sky.batch_pixels",)),
        Option("sky.nside", int, 32, "HEALPix nside of the map (a power of 2)", at_least=1),
        Option("sky.rays_per_pixel", int, 4, "rays per pixel, two independent splits (1: noise unknown)", at_least=1),
        Option("sky.ordering", str, "RING", "pixel ordering of the maps: RING or NESTED"),
        Option("sky.randomise_copies", bool, True, "give each box copy a random symmetry and shift (off: diagnostic)"),
        Option("sky.shells", float, None, "redshift shells with a map each: edges in z (or a count, as "
               "--redshift-bins)", at_least=0.0, listable=True, metavar="Z"),
        Option("sky.map_precision", str, "float64", "stored precision of the maps per mass: float32 halves the result "
               "and rounds to 6e-8 of a value, far below a pixel's sampling noise", choices=("float64", "float32")),
        Option("sky.estimate", bool, False, "trace nothing: print the cells to trace, the result's size on disk, the "
               "memory per worker and the wall time at a rate measured on a sample of the run's own rays here"),
        ISOTROPY_THRESHOLD,
        CL_LIMITS,
    )
    + OUTPUT_OPTIONS[:1]
    + (
        Option("output.fits", str, None, "HEALPix FITS file of the kernel maps (and P with epsilon), the shown "
               "mass first", path=True),
        Option("output.plot", str, None, "Mollweide view of the shown mass's map (PNG or PDF)", path=True),
        SHOWN_MASS,
    )
    + OUTPUT_OPTIONS[2:]
)

#: Options of subcommands without a run file, spelled as in the schema above.
VOCABULARY = {option.key: option for option in (
    *SIGHTLINE_OPTIONS, *SKY_OPTIONS,
    MASS_OPTIONS[-1],
    Option("inputs.result", str, None, "sightline result (raytrace sightlines --output)", flag_name="result",
           metavar="RESULT.h5", path=True),
    Option("inputs.sky", str, None, "sky result (raytrace sky --output): adds the limit from the isotropy of its "
           "dT/T map", flag_name="sky", metavar="SKY.h5", path=True),
)}


def _metavar(option):
    """The option's metavar: its own, its choices, or by kind; with [,...] when it takes a list."""
    if option.metavar:
        metavar = option.metavar
    elif option.choices:
        metavar = "|".join(str(choice) for choice in option.choices)
    elif option.path or option.kind is list:
        metavar = "FILE"
    else:
        metavar = {int: "N", float: "X", str: "TEXT", NumberOrText: "X|DATASET"}[option.kind]
    return f"{metavar}[,{metavar}...]" if option.listable else metavar


def _default_text(option, default):
    if default is None or option.kind is list:
        return ""
    if option.kind is bool:
        return f"default: {'on' if default else 'off'}"
    if isinstance(default, str) and " " in default:
        return f"default: {default}"
    return f"default: {default:g}" if isinstance(default, float) else f"default: {default}"


def help_text(option, default=None, toml=True):
    """An option's help with its default (unless the help already says it) and, for run files, its TOML key."""
    notes = [] if "default" in option.help else [_default_text(option, default)]
    notes += [f"TOML {option.key}"] if toml else []
    notes = "; ".join(note for note in notes if note)
    return f"{option.help} ({notes})" if notes else option.help


class _Deprecated(argparse.Action):
    """An old spelling: stores like the new flag and says so once on stderr."""

    def __init__(self, option_strings, dest, new_flag=None, store=None, **kwargs):
        self.new_flag, self.store = new_flag, store
        super().__init__(option_strings, dest, **kwargs)

    def __call__(self, parser, namespace, values, option_string=None):
        print(f"raytrace: note: {option_string} is deprecated and will be removed in the next release; "
              f"use {self.new_flag}", file=sys.stderr)
        if self.store is not None:
            self.store(namespace, values)
        else:
            setattr(namespace, self.dest, values)


def add_deprecated(parser, old_flag, new_flag, dest=None, store=None, **kwargs):
    """Accept ``old_flag`` for one more release, hidden from --help, with a deprecation notice when used."""
    parser.add_argument(old_flag, dest=dest or old_flag.lstrip("-").replace("-", "_"), action=_Deprecated,
                        new_flag=new_flag, store=store, help=argparse.SUPPRESS, **kwargs)


def add_option(parser, key, dest=None, default=None, shown=None, help=None, **kwargs):
    """Add the vocabulary's flag for ``key`` to a plain parser (no run file).

    ``default`` is argparse's value when the flag is absent; ``shown`` the default
    the help names where that differs (a value filled in later, or words);
    ``help`` replaces the vocabulary's help where the command uses the concept in
    its own way. Other ``kwargs`` go to argparse (``type``, ``nargs``); the flag,
    metavar and deprecated aliases come from the vocabulary.
    """
    option = VOCABULARY[key]
    dest = dest or option.flag.lstrip("-").replace("-", "_")
    if option.kind is bool:
        kwargs.setdefault("action", "store_true")
    else:
        kwargs.setdefault("metavar", _metavar(option))
        kwargs.setdefault("type", {int: int, float: float}.get(option.kind, str))
        if option.kind is list:
            kwargs.setdefault("nargs", "+")
    described = replace(option, help=help) if help else option
    parser.add_argument(option.flag, dest=dest, default=default,
                        help=help_text(described, default if shown is None else shown, toml=False), **kwargs)
    for alias in option.aliases:
        add_deprecated(parser, alias, option.flag, dest=dest,
                       **{k: v for k, v in kwargs.items() if k in ("type", "nargs")})
    return option


def add_flags(parser, options):
    """Add one flag per option; flags default to None so the run file's value stands unless given."""
    parser.add_argument("run_file", nargs="?", default=None, help="TOML run file (flags override its keys)")
    add_option_flags(parser, options)


def add_option_flags(parser, options):
    """The flags of ``options`` alone, grouped by section (for commands without a run file)."""
    sections = {}
    for option in options:
        section = option.key.split(".")[0]
        group = sections.setdefault(section, parser.add_argument_group(f"[{section}]"))
        kwargs = {"dest": option.dest, "default": None, "help": help_text(option, option.default)}
        if option.kind is not bool:
            kwargs["metavar"] = _metavar(option)
        if option.kind is bool:
            group.add_argument(option.flag, action=argparse.BooleanOptionalAction, **kwargs)
        elif option.kind is list:
            group.add_argument(option.flag, nargs="+", **kwargs)
        else:
            group.add_argument(option.flag, type=str, **kwargs)
        for alias in option.aliases:
            add_deprecated(group, alias, option.flag, dest=option.dest, type=str,
                           **({"nargs": "+"} if option.kind is list else {}))
    for key, (flag, _) in REMOVED_KEYS.items():
        parser.add_argument(flag, dest="removed__" + key.replace(".", "__"), default=None, help=argparse.SUPPRESS)


def settings(args, options):
    """The run's settings: defaults, then the run file, then the flags."""
    for key, (flag, reason) in REMOVED_KEYS.items():
        if getattr(args, "removed__" + key.replace(".", "__"), None) is not None:
            raise InputError(f"{flag}: no longer an option: {reason}")
    values = {option.key: option.default for option in options}
    from_file = read_run_file(args.run_file, options) if getattr(args, "run_file", None) else {}
    by_key = {option.key: option for option in options}
    from_flags = {option.key: convert(option, getattr(args, option.dest), f"flag {option.flag}", from_flag=True)
                  for option in options if getattr(args, option.dest, None) is not None}
    values.update(_one_mass_grid(from_file, from_flags))
    values.update(from_flags)
    for key, value in values.items():
        check_range(by_key[key], value)
    return values


_GRID_KEYS = tuple(option.key for option in MASS_GRID)


def _one_mass_grid(from_file, from_flags):
    """The run file's settings, less the mass grid that flags replace: a list of masses (values_eV) or
    min_eV/max_eV/count, never both from one place; a flag's grid replaces the run file's other one."""
    given = {"file": from_file, "flags": from_flags}
    for where, found in given.items():
        if MASS_VALUES.key in found and any(key in found for key in _GRID_KEYS):
            place = "flags" if where == "flags" else "keys of the run file"
            raise InputError(f"--mass-values (TOML masses.values_eV): give either the masses or "
                             f"--mass-min/--mass-max/--mass-count (min_eV, max_eV, count), not both ({place})")
    if MASS_VALUES.key in from_flags:
        return {key: value for key, value in from_file.items() if key not in _GRID_KEYS}
    if any(key in from_flags for key in _GRID_KEYS):
        return {key: value for key, value in from_file.items() if key != MASS_VALUES.key}
    return from_file


def read_run_file(path, options):
    """Validated settings from a TOML run file (only the keys it sets)."""
    path = Path(path)
    try:
        with open(path, "rb") as handle:
            document = tomllib.load(handle)
    except FileNotFoundError:
        raise InputError(f"{path}: run file not found") from None
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as error:
        raise InputError(f"{path}: not valid TOML ({error})") from None
    except OSError as error:
        raise InputError(f"{path}: cannot read the run file ({error})") from None
    known = {option.key: option for option in options}
    old = {old_key: option for option in options for old_key in option.old_keys}
    # One run file drives every subcommand: a key another subcommand takes is noted here, not refused.
    elsewhere = {key for schema in _RUN_FILE_SCHEMAS() for option in schema
                 for key in (option.key, *option.old_keys)} - set(known) - set(old)
    sections = sorted({key.split(".")[0] for key in (*known, *old, *elsewhere)})
    found, unused = {}, []
    for section, table in document.items():
        if section not in sections:
            raise InputError(f"{path}: unknown section [{section}]; known sections: {', '.join(sections)}")
        if not isinstance(table, dict):
            raise InputError(f"{path}: [{section}] must be a table of keys")
        for name, value in table.items():
            key = f"{section}.{name}"
            if key in REMOVED_KEYS:
                raise InputError(f"{path}: key {key} is no longer an option: {REMOVED_KEYS[key][1]}")
            if key in old:
                print(f"raytrace: note: {path}: key {key} is deprecated and will be removed in the next release; "
                      f"use {old[key].key}", file=sys.stderr)
                key = old[key].key
            if key in elsewhere:
                unused.append(key)
                continue
            if key not in known:
                names = ", ".join(k.split(".", 1)[1] for k in known if k.startswith(section + "."))
                raise InputError(f"{path}: unknown key '{name}' in [{section}]; known keys: {names}")
            found[key] = convert(known[key], value, f"{path}: key {key}")
    if unused:
        print(f"raytrace: note: {path}: {', '.join(unused)} not used by this subcommand (another one's); ignored",
              file=sys.stderr)
    # Relative paths in a run file are relative to the run file, so it runs from anywhere.
    for key, value in found.items():
        if known[key].path and value is not None:
            anchored = [v if Path(v).is_absolute() else os.path.normpath(path.parent / v)
                        for v in ([value] if isinstance(value, str) else value)]
            found[key] = anchored[0] if isinstance(value, str) else anchored
    return found


def _RUN_FILE_SCHEMAS():
    """The option lists of every subcommand that reads a run file."""
    return (SIGHTLINE_OPTIONS, SKY_OPTIONS, ONEPOINT_OPTIONS, RESOLUTION_OPTIONS)


def require(values, key, options):
    """The value of a key that has no default, or an InputError naming its flag and TOML key."""
    if values.get(key) is None:
        option = {o.key: o for o in options}[key]
        raise InputError(f"{option.flag} (TOML {key}) is required: {option.help}")
    return values[key]


_ONEPOINT_TRACE_KEYS = ("rays.z_max", "rays.z_boxes", "rays.include_background", "rays.seed", "rays.jobs")
_PDF_SAMPLING = (
    Option("onepoint.points", int, 1 << 24, "random points of the interpolated field per box (per blended pair)",
           at_least=2),
    Option("onepoint.groups", int, 16, "independent groups the points are split into, for the error estimate",
           at_least=2),
    Option("onepoint.blend_steps", int, 16, "redshift pieces per blended pair of snapshots (midpoint rule)",
           at_least=1),
)

ONEPOINT_OPTIONS = (
    BOX_OPTIONS + MASS_OPTIONS
    + tuple(option for option in TRACE_OPTIONS if option.key in _ONEPOINT_TRACE_KEYS)
    + _PDF_SAMPLING
    + (
        Option("output.path", str, None, "result file (HDF5): <K>(m), its error and provenance", flag_name="output",
               path=True),
        Option("output.plot", str, None, "figure of <K>(m) (PNG or PDF)", path=True),
        Option("output.overwrite", bool, False, "replace existing outputs"),
    )
)

RESOLUTION_OPTIONS = (
    BOX_OPTIONS + MASS_OPTIONS
    + tuple(option for option in TRACE_OPTIONS if option.key in _ONEPOINT_TRACE_KEYS)
    + _PDF_SAMPLING
    + (
        Option("resolution.coarsest", int, 4, "largest degrade factor; the levels are 1, 2, 4 ... up to it",
               at_least=2),
        Option("resolution.order", float, 2.0, "assumed order p of convergence (error ~ cell size^p) for the "
               "Richardson extrapolation", above=0.0),
        Option("resolution.rays", int, 0, "also cast this many sightlines at each level for the std/mean "
               "(0: the mean only)", at_least=0),
        Option("output.report", str, None, "write STEM.png, STEM.pdf (figure) and STEM.txt (table)", path=True),
        Option("output.overwrite", bool, False, "replace existing outputs"),
    )
)
