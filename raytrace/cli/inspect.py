"""``raytrace inspect``: what box files hold and which dark-photon masses they can probe.

In: HDF5 box files or quoted globs, with the box options (runfile.BOX_OPTIONS) that
fill in or override their metadata. Out (stdout, text or JSON): for each box its
grid, dtype, size, cell, redshift, what the values mean, each with where it came
from (a flag, or which attribute of which group), the mean and percentiles of n_e / nbar_e,
the plasma-mass range at its redshift and so the masses it can probe; for
several boxes, the series' redshift coverage (which box serves where). With
``--plot FILE`` a figure of each box's density PDF and a slice.
"""

import json

import numpy as np

NAME = "inspect"
HELP = "Describe box files: grid, size, redshift, meaning, n_e/nbar_e percentiles and the masses they probe."


def add_box_arguments(parser):
    """The box options (runfile.BOX_OPTIONS but the files) as flags; each overrides what the file says."""
    from raytrace.cli.box_options import BOX_SETTINGS
    from raytrace.cli.runfile import add_option_flags

    add_option_flags(parser, BOX_SETTINGS)


def add_arguments(parser):
    from raytrace.cli.background import add_ionisation_arguments
    from raytrace.cli.runfile import add_option

    parser.add_argument("files", nargs="+", metavar="FILE", help="HDF5 box files, or quoted glob patterns")
    add_box_arguments(parser)
    add_option(parser, "rays.z_max", type=float,
               help="highest redshift of the coverage shown (default: the highest snapshot redshift)")
    parser.add_argument("--plot", default=None, metavar="FILE", help="write a figure: density PDF and a slice per box")
    add_option(parser, "output.overwrite")
    parser.add_argument("--json", action="store_true", help="print JSON instead of text")
    add_ionisation_arguments(parser)


def run(args):
    from raytrace.boxes import BoxSeries, load_boxes
    from raytrace.cli.background import ionisation_from_args
    from raytrace.cli.box_options import BOX_SETTINGS, box_arguments
    from raytrace.cli.runfile import settings
    from raytrace.core.errors import InputError
    from raytrace.core.provenance import check_writable
    from raytrace.physics.background import MeanPlasma
    from raytrace.physics.cosmology import Z_TABLE_MAX

    if args.z_max is not None and not (np.isfinite(args.z_max) and 0 < args.z_max <= Z_TABLE_MAX):
        raise InputError(f"--z-max: expected a redshift in (0, {Z_TABLE_MAX:g}], got {args.z_max!r}")
    if args.plot:
        from raytrace.core.outputguard import refuse_outputs_over_inputs

        refuse_outputs_over_inputs([(args.plot, "--plot")], [(args.files, "FILE"),
                                                              (args.ionisation_table, "--ionisation-table")])
        check_writable(args.plot, args.overwrite)
        _image_format(args.plot)
    values = settings(args, BOX_SETTINGS)
    plasma = MeanPlasma(None, ionisation_from_args(args))
    boxes = load_boxes(args.files, **box_arguments(values, plasma))
    statistics = [_timed_statistics(box, plasma, number, len(boxes)) for number, box in enumerate(boxes, 1)]

    series, series_error = None, None
    try:
        series = BoxSeries(boxes, blend=values["boxes.blend"])
    except InputError as error:
        series_error = error
    z_stop = None
    if series is not None:
        z_stop = args.z_max if args.z_max is not None else (series.z_max if series.z_max > 0 else None)
    coverage = _coverage(series, z_stop) if z_stop is not None else []

    if args.json:
        report = {
            "ionisation": plasma.ionisation.description,
            "boxes": [{**box.describe(), "statistics": stats} for box, stats in zip(boxes, statistics)],
            "series": None if series is None else {
                "redshifts": [float(z) for z in series.redshifts],
                "blend": series.blend,
                "coverage": coverage,
            },
        }
        print(json.dumps(report, indent=2, default=_plain))
    else:
        print(f"# nbar_e(z) from {plasma.ionisation.description}")
        for number, (box, stats) in enumerate(zip(boxes, statistics), 1):
            print(_box_text(box, stats, number, len(boxes)))
        if len(boxes) > 1 and series is not None:
            print(_series_text(series, coverage))
    if args.plot:
        from raytrace.core.outputguard import output_lock

        with output_lock([args.plot]):  # one run per output at a time
            _plot(boxes, statistics, args.plot, args.overwrite)
        print(f"# figure written to {args.plot}")
    if series_error is not None:
        raise series_error
    return 0


#: Boxes of this many cells a side and more say on stderr what inspect is doing (seconds of work each).
LARGE_CELLS = 128


def _timed_statistics(box, plasma, number, count):
    """box.statistics, with a line on stderr before and after for a large box (a sign of life)."""
    import sys
    import time

    if box.n_cells < LARGE_CELLS:
        return box.statistics(plasma)
    print(f"raytrace inspect: box {number} of {count} ({box.n_cells}^3 cells): statistics ...", file=sys.stderr,
          flush=True)
    start = time.perf_counter()
    stats = box.statistics(plasma)
    print(f"raytrace inspect: box {number} of {count}: done in {time.perf_counter() - start:.1f} s", file=sys.stderr)
    return stats


def _coverage(series, z_stop):
    """Which box serves which redshifts up to z_stop, and the masses it can probe there."""
    pieces = []
    for z_start, z_end, index in series.intervals(z_stop):
        box = series.boxes[index]
        low, high = box.plasma_mass_range(z_start, z_end)
        pieces.append({
            "z_start": z_start, "z_end": z_end, "box": index,
            "box_redshift": box.redshift, "mass_low_eV": low, "mass_high_eV": high,
        })
    return pieces


def _box_text(box, stats, number, count):
    info = box.describe()
    where = f"{info['path']} : {info['dataset']}" if info["path"] else "in-memory box"
    mapped = ", memory-mapped" if info["memory_mapped"] else ""
    sources = info["sources"]

    def source(key):
        return f"  [{sources[key]}]" if key in sources else ""

    lines = [
        f"box {number} of {count}: {where}",
        f"  grid           {box.n_cells}^3 cells, stored as {info['stored_dtype']}{mapped}",
        f"  box size       {box.box_size_cMpc:.6g} cMpc, as '{info['box_size_given']}'{source('box_size')}; "
        f"cell {box.cell_size_cMpc:.4g} cMpc",
    ]
    if info["hubble_h"] is not None:
        lines.append(f"  hubble h       {info['hubble_h']:g}{source('hubble_h')}")
    lines += [
        f"  redshift       {box.redshift:g}{source('redshift')}",
        f"  values         {info['quantity']}: {info['meaning']}{source('quantity')}",
    ]
    if info["mean_density"] is not None:
        lines.append(f"  relative to    {info['mean_density']}{source('mean_density')}")
    if info["ionised_fraction"] is not None:
        key = "neutral_fraction" if "neutral_fraction" in sources else "ionised_fraction"
        helium = f"; helium electrons{source('helium_electrons')}" if "helium_electrons" in sources else ""
        lines.append(f"  ionisation     {info['ionised_fraction']}{source(key)}{helium}")
    if info["box_ionisation"] is not None:
        lines.append(f"  box's own x_e  {info['box_ionisation']:.4g} electrons per hydrogen nucleus (mean)")
    masses = stats["plasma_mass_eV"]
    used = stats["percentile_cells"]
    sampled = "" if used == box.n_cells**3 else f" (from a random sample of {used} cells)"
    percentiles = "  ".join(f"{p:g}%: {v:.4g}" for p, v in stats["percentiles"].items())
    lines += [
        f"  nbar_e(z)      {stats['mean_electron_density_cm3']:.4e} cm^-3 physical (background history)",
        f"  n_e/nbar_e     mean {stats['mean_overdensity']:.4f}; "
        f"lowest non-zero {stats['min_positive_overdensity']:.4g}; "
        f"highest {stats['max_overdensity']:.4g}; zero cells {stats['zero_cells']}",
        f"  percentiles    {percentiles}{sampled}",
        f"  plasma mass    mean density {masses['mean_density']:.4e} eV; cells {masses['lowest_cell']:.4e} .. "
        f"{masses['highest_cell']:.4e} eV; {masses['percentile_range'][0]:g}-{masses['percentile_range'][1]:g} %: "
        f"{masses['percentile_low']:.4e} .. {masses['percentile_high']:.4e} eV",
        _probes_line(box, stats),
        f"  checksum       {info['checksum']}",
    ]
    if info["provenance"]:
        lines.append(f"  provenance     {info['provenance']}")
    return "\n".join(lines)


def _probes_line(box, stats):
    """Which masses can resonate: between the lowest and highest cell, or below too where cells are empty."""
    masses = stats["plasma_mass_eV"]
    zero = stats["zero_cells"]
    if not zero:
        return (f"  probes         dark-photon masses {masses['lowest_cell']:.4e} .. {masses['highest_cell']:.4e} eV "
                f"at z = {box.redshift:g} (a resonance needs m between the lowest and highest cell's plasma mass)")
    return (f"  probes         dark-photon masses up to {masses['highest_cell']:.4e} eV at z = {box.redshift:g}; "
            f"{zero} cells ({100 * zero / box.n_cells**3:.1f} %) are empty, so below the lowest non-empty cell "
            f"({masses['lowest_cell']:.4e} eV) masses resonate only at the edges of empty regions")


def _series_text(series, coverage):
    rule = "blended linearly in n_e between bracketing snapshots" if series.blend else "nearest snapshot in redshift"
    lines = [
        f"series: {len(series)} boxes at z = {', '.join(f'{z:g}' for z in series.redshifts)} ({rule})",
        f"  {'z from':>8} {'z to':>8}  {'box':>4} {'at z':>6}  masses probed (eV)",
    ]
    for piece in coverage:
        lines.append(
            f"  {piece['z_start']:8.4g} {piece['z_end']:8.4g}  {piece['box'] + 1:4d} {piece['box_redshift']:6g}  "
            f"{piece['mass_low_eV']:.4e} .. {piece['mass_high_eV']:.4e}"
        )
    if coverage:
        low = min(piece["mass_low_eV"] for piece in coverage)
        high = max(piece["mass_high_eV"] for piece in coverage)
        lines.append(
            f"  over z = 0 .. {coverage[-1]['z_end']:g}: dark-photon masses {low:.4e} .. {high:.4e} eV"
        )
    return "\n".join(lines)


def _plain(value):
    if isinstance(value, np.generic):
        return value.item()
    return str(value)


def _image_format(path):
    from pathlib import Path

    from matplotlib.figure import Figure

    from raytrace.core.errors import InputError

    suffix = Path(path).suffix.lstrip(".").lower()
    supported = Figure().canvas.get_supported_filetypes()
    if suffix not in supported:
        raise InputError(
            f"--plot {path}: cannot tell the image format from {('.' + suffix) if suffix else 'no suffix'}; "
            f"use one of {', '.join('.' + key for key in sorted(supported))}"
        )
    return suffix


def _plot(boxes, statistics, path, overwrite):
    from matplotlib.figure import Figure

    from raytrace.boxes import sample_cells
    from raytrace.core.provenance import atomic_output

    figure = Figure(figsize=(10.0, 3.8 * len(boxes)), layout="constrained")
    axes = figure.subplots(len(boxes), 2, squeeze=False)
    for row, (box, stats) in enumerate(zip(boxes, statistics)):
        to_overdensity = box.comoving_scale * (1.0 + box.redshift) ** 3 / stats["mean_electron_density_cm3"]
        values, _ = sample_cells(box.data)
        positive = values[values > 0].astype(np.float64) * to_overdensity
        name = box.path.name if box.path is not None else "in-memory box"
        pdf = axes[row, 0]
        pdf.hist(np.log10(positive), bins=100, density=True, histtype="step", color="k")
        for p in (16.0, 50.0, 84.0):
            if stats["percentiles"][p] > 0:  # a percentile in the empty cells has no place on a log axis
                pdf.axvline(np.log10(stats["percentiles"][p]), ls=":", color="0.5")
        pdf.set_xlabel(r"$\log_{10}(n_e / \bar n_e)$")
        pdf.set_ylabel("probability density")
        pdf.set_title(f"{name} {box.dataset or ''}, z = {box.redshift:g} (dotted: 16, 50, 84 %)", fontsize=9)
        plane = np.asarray(box.data[box.n_cells // 2], dtype=np.float64) * to_overdensity
        shown = np.ma.masked_less_equal(plane, 0.0)
        image = axes[row, 1].imshow(
            np.ma.log10(shown).T, origin="lower", cmap="viridis",
            extent=(0.0, box.box_size_cMpc, 0.0, box.box_size_cMpc),
        )
        axes[row, 1].set_xlabel("axis 1 (cMpc)")
        axes[row, 1].set_ylabel("axis 2 (cMpc)")
        axes[row, 1].set_title(
            f"slice through the middle plane of axis 0 ({box.cell_size_cMpc:.3g} cMpc thick)", fontsize=9
        )
        figure.colorbar(image, ax=axes[row, 1], label=r"$\log_{10}(n_e / \bar n_e)$")
    with atomic_output(path, overwrite=overwrite) as temporary:
        figure.savefig(temporary, format=_image_format(path), dpi=110)
