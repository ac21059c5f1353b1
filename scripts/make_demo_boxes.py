"""Make the synthetic demo boxes of cubes_demo/: a scenario of our own, not a simulation.

In: a seed, cells per side, a comoving box side in cMpc/h, redshifts and an
output folder (see --help). Out: one HDF5 file per redshift, demo_z{z}.h5,
whose dataset "electron_density" (float32, gzip with shuffle) holds the
physical electron density in cm^-3 at that redshift: a log-normal overdensity
(raytrace.boxes.fields.lognormal_overdensity, the same realisation at every
redshift) times the mean nbar_e(z) of raytrace.physics.background.MeanPlasma (Planck18,
CAMB ionisation). The attributes quantity, box_size, box_size_unit, redshift,
hubble_h and provenance (JSON) sit on the dataset and on the file root, so the
box loader needs no flags.

Remake the shipped files with:
    python scripts/make_demo_boxes.py --overwrite
"""

import argparse
import sys
from pathlib import Path

import h5py
import numpy as np

from raytrace.boxes.fields import GROWTH_Z_MAX, lognormal_overdensity
from raytrace.core.errors import InputError
from raytrace.core.provenance import atomic_output, check_writable, provenance_json
from raytrace.physics.background import MeanPlasma

DEFAULT_SEED = 1991  # arbitrary, fixed so the shipped files can be remade bit for bit
DEFAULT_REDSHIFTS = (0.0, 0.5, 1.0, 2.0, 3.0, 4.0, 6.0)
DATASET = "electron_density"
BOX_SIZE_UNIT = "cMpc/h"


def build_parser():
    parser = argparse.ArgumentParser(
        description="Write synthetic log-normal electron-density boxes (physical n_e in cm^-3), one file per redshift."
    )
    parser.add_argument("--cells", type=int, default=64, help="cells per side (default 64; e.g. 256 for a finer box)")
    parser.add_argument("--box-size", type=float, default=100.0, help="comoving side in cMpc/h (default 100)")
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED, help=f"random seed (default {DEFAULT_SEED})")
    parser.add_argument(
        "--redshifts", type=float, nargs="+", default=list(DEFAULT_REDSHIFTS), metavar="Z",
        help="snapshot redshifts (default 0 0.5 1 2 3 4 6)",
    )
    parser.add_argument(
        "--smoothing-cells", type=float, default=1.0,
        help="Gaussian smoothing length of the field in cells (default 1)",
    )
    parser.add_argument("--output-dir", default="cubes_demo", help="folder for demo_z{z}.h5 (default cubes_demo)")
    parser.add_argument("--overwrite", action="store_true", help="replace existing files")
    return parser


def check_arguments(args):
    """Raise InputError naming the option whose value cannot be used."""
    if args.cells < 2:
        raise InputError(f"--cells: expected a whole number >= 2, got {args.cells}")
    if not (np.isfinite(args.box_size) and args.box_size > 0):
        raise InputError(f"--box-size: expected a positive side length in cMpc/h, got {args.box_size}")
    if args.seed < 0:
        raise InputError(f"--seed: expected a whole number >= 0, got {args.seed}")
    if not (np.isfinite(args.smoothing_cells) and args.smoothing_cells >= 0):
        raise InputError(f"--smoothing-cells: expected a number of cells >= 0, got {args.smoothing_cells}")
    redshifts = np.asarray(args.redshifts, dtype=float)
    if np.any(~np.isfinite(redshifts)) or np.any(redshifts < 0) or np.any(redshifts > GROWTH_Z_MAX):
        raise InputError(f"--redshifts: expected values in [0, {GROWTH_Z_MAX:g}], got {args.redshifts}")
    names = [box_name(z) for z in redshifts]
    if len(set(names)) != len(names):
        raise InputError(f"--redshifts: expected distinct redshifts, got {args.redshifts}")


def box_name(redshift):
    return f"demo_z{redshift:g}.h5"


def write_box(path, density_cm3, attributes, overwrite):
    """One box file, written to a temporary file and renamed into place."""
    with atomic_output(path, overwrite=overwrite) as temporary:
        with h5py.File(temporary, "w") as handle:
            dataset = handle.create_dataset(
                DATASET, data=density_cm3, compression="gzip", compression_opts=9, shuffle=True
            )
            for target in (dataset, handle):
                target.attrs.update(attributes)


def main(argv=None):
    args = build_parser().parse_args(argv)
    try:
        check_arguments(args)
        output_dir = Path(args.output_dir)
        output_dir.mkdir(parents=True, exist_ok=True)
        paths = [output_dir / box_name(z) for z in args.redshifts]
        # Refuse before any work, so that a refused run leaves no partial set behind.
        for path in paths:
            check_writable(path, args.overwrite)
        plasma = MeanPlasma()
        cosmology = plasma.cosmology
        box_size_cMpc = args.box_size / cosmology.h
        for z, path in zip(args.redshifts, paths):
            overdensity = lognormal_overdensity(
                args.cells, box_size_cMpc, z, args.seed, smoothing_cells=args.smoothing_cells, cosmology=cosmology
            )
            density = overdensity * np.float32(plasma.mean_electron_density_cm3(z))
            provenance = provenance_json(
                generator="scripts/make_demo_boxes.py",
                scenario="synthetic log-normal field of our own (Coles & Jones 1991), not a simulation",
                power_spectrum="linear, Eisenstein & Hu 1998 no-wiggle transfer function, sigma_8 normalised",
                seed=args.seed,
                cells=args.cells,
                box_size=args.box_size,
                box_size_unit=BOX_SIZE_UNIT,
                smoothing_cells=args.smoothing_cells,
                redshift=z,
                cosmology=cosmology.name,
                ionisation=plasma.ionisation.description,
                mean_electron_density_cm3=float(plasma.mean_electron_density_cm3(z)),
            )
            attributes = {
                "quantity": "n_e_physical",
                "box_size": float(args.box_size),
                "box_size_unit": BOX_SIZE_UNIT,
                "redshift": float(z),
                "hubble_h": cosmology.h,
                "provenance": provenance,
            }
            write_box(path, density, attributes, args.overwrite)
            print(f"{path}: z = {z:g}, mean n_e = {density.mean(dtype=np.float64):.4e} cm^-3")
    except InputError as error:
        print(f"make_demo_boxes: error: {error}", file=sys.stderr)
        return 2
    return 0


if __name__ == "__main__":
    sys.exit(main())
