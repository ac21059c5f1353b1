"""The checks and shared parts of a run that several stages use: sightlines, the sky and the one-point mean.

In: the arguments of a run (masses, seed, z_max, photon energy, thread count,
the series and its background). Out: checked values, one-line InputErrors naming
the option, the redshift range the boxes serve, and the homogeneous
background's part of the kernel and dispersion measure beyond the boxes.
"""

import os
import warnings
from contextlib import contextmanager

import numba
import numpy as np

from raytrace import __version__
from raytrace.core.errors import (
    InputError,
    ProbedRangeWarning,
    RaytraceWarning,
    require_number,
    require_positive_finite,
)
from raytrace.physics.background import MeanPlasma
from raytrace.physics.cosmology import Z_TABLE_MAX
from raytrace.physics.units import CMB_PHOTON_ENERGY_EV
from raytrace.tracing.backends import Contents

#: Options the API no longer takes, with the reason a user is told (the run file and the flags too).
REMOVED_OPTIONS = {
    "step": "the engine now solves the interpolated field's crossings exactly, cell by cell, so there is no "
            "step length to choose; remove it",
    "density_floor": "empty cells are now exact zeros of the interpolated field, which never resonate; "
                     "remove it",
}

#: The default observed photon energy of near-tangent (Airy) events: k T_0, the
#: energy at which the report evaluates the anisotropy (x = h nu / k T_0 = 1).
DEFAULT_PHOTON_ENERGY_EV = CMB_PHOTON_ENERGY_EV


def refuse_removed(options):
    """An InputError naming any removed option present in the ``options`` mapping."""
    for name in options:
        if name in REMOVED_OPTIONS:
            raise InputError(f"{name}: no longer an option: {REMOVED_OPTIONS[name]}")


def check_no_other_options(function, options):
    """Refuse removed options with their reason, and any other unknown keyword by name."""
    refuse_removed(options)
    if options:
        raise InputError(f"{function}: unknown option(s) {', '.join(sorted(options))}")


def check_seed(seed):
    """A seed the counter-based streams take: a whole number in [0, 2^63)."""
    return require_number(seed, "seed (--seed)", whole=True, at_least=0, at_most=2**63 - 1,
                          expected="a whole number from 0 to 2^63 - 1")


def check_masses(mass_eV):
    """Positive, finite, strictly increasing masses as a float array."""
    mass = require_positive_finite(np.atleast_1d(mass_eV), "mass_eV")
    if mass.ndim != 1 or np.any(np.diff(mass) <= 0):
        raise InputError("mass_eV: expected a one-dimensional, strictly increasing grid of masses")
    return mass


def check_trace_options(z_max, photon_energy_eV, batch, batch_name):
    """The options every trace takes: z_max > 0, a photon energy > 0 (eV), a batch of >= 1 rows.

    Returns (z_max, photon_energy_eV) as floats.
    """
    require_number(batch, batch_name, whole=True, at_least=1)
    photon_energy_eV = require_number(photon_energy_eV, "photon_energy_eV (--photon-energy)", above=0,
                                      expected="a positive photon energy in eV")
    z_max = require_number(z_max, "z_max", above=0, expected="a positive redshift")
    return z_max, photon_energy_eV


#: Bytes a run holds per row (ray or pixel) and mass: the kernel and the near-tangent kernel
#: (float64), the crossing and tangent counts (int32), and as much again while the backend hands them over.
RUN_BYTES_PER_ROW_AND_MASS = 48


def check_run_memory(n_rows, n_masses, what):
    """Refuse, naming ``what``, a run whose per-row arrays could not fit in this machine's memory."""
    need = float(n_rows) * n_masses * RUN_BYTES_PER_ROW_AND_MASS
    try:
        total = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    except (ValueError, OSError, AttributeError):
        return  # no way to know here: let the run try
    if need > total:
        raise InputError(f"{what}: the run's arrays would need {need / 1e9:.3g} GB, more than this machine's "
                         f"{total / 1e9:.3g} GB of memory; ask for fewer")


def check_background(plasma):
    """The run's MeanPlasma (None: CAMB with Planck 2018), checked."""
    if plasma is None:
        return MeanPlasma()
    if not isinstance(plasma, MeanPlasma):
        raise InputError(f"plasma: expected a raytrace.MeanPlasma or None (the default), got {plasma!r}")
    return plasma


def boxes_redshift_range(series, plasma, z_max, z_boxes, include_background):
    """The highest redshift the boxes serve, checked against what the tables cover.

    With the background included, the boxes serve up to ``z_boxes`` (default: the
    highest snapshot's redshift) and the homogeneous universe the rest to z_max;
    without it, the boxes serve all of 0..z_max.
    """
    if not include_background:
        if z_boxes is not None and require_number(z_boxes, "z_boxes (--z-boxes)") != z_max:
            raise InputError("z_boxes (--z-boxes): only meaningful with the background included")
        if z_max > Z_TABLE_MAX:
            raise InputError(f"z_max = {z_max:g} is beyond the distance tables (z <= {Z_TABLE_MAX:g})")
        return float(z_max)
    if z_max > plasma.ionisation.z_max:
        raise InputError(f"z_max = {z_max:g} is beyond the ionisation history ({plasma.ionisation.description}), "
                         f"which ends at z = {plasma.ionisation.z_max:g}")
    if z_boxes is None:
        if not series.z_max > 0:
            raise InputError(
                "z_boxes (--z-boxes): the highest snapshot is at z = 0, so by default the boxes would serve no "
                "redshift at all; say how far they serve with z_boxes, or let them serve everything with "
                "include_background=False (--no-include-background)"
            )
        z_boxes = series.z_max
    else:
        z_boxes = require_number(z_boxes, "z_boxes (--z-boxes)", above=0, expected="a positive redshift")
        if z_boxes > z_max:
            # Meaningful (boxes all the way), so a warning: the rays end at z_max.
            warnings.warn(RaytraceWarning(f"z_boxes (--z-boxes) = {z_boxes:g} is beyond z_max = {z_max:g}: the boxes "
                                          f"serve all of z = 0 to {z_max:g} and there is no background part"),
                          stacklevel=4)
    return min(float(z_boxes), float(z_max))


def run_record(series, mass, plasma, seed, z_max, z_boxes, include_background, photon_energy_eV, batch_name,
               batch):
    """The part of a run's record (the result file's ``run``) that sightlines and skies share: the version,
    the ray range and seed, the batch size, and the inputs (boxes, masses, ionisation, cosmology)."""
    return {
        "raytrace": __version__, "z_max": float(z_max), "z_boxes": float(z_boxes),
        "include_background": bool(include_background), "seed": int(seed), "photon_energy_eV": photon_energy_eV,
        batch_name: int(batch), "blend": series.blend, "mass_eV": mass.tolist(),
        "boxes": [box.describe() for box in series.boxes], "ionisation": plasma.ionisation.description,
        "cosmology": plasma.cosmology.name,
    }


def warn_outside_probed_range(series, mass, z_boxes):
    """Warn, naming the probed range, when grid masses cannot resonate anywhere in the boxes.

    The rays sample the trilinear interpolant of the cells, which spans the lowest
    to the highest cell, down to zero where a box has empty cells; densities scale
    by (1+z)^3 (PHYSICS.md section 3).
    """
    ranges = []
    for z_start, z_end, i in series.intervals(z_boxes):
        low, high = series.boxes[i].plasma_mass_range(z_start, z_end)
        ranges.append((0.0 if series.boxes[i].describe()["zero_cells"] else low, high))
    low, high = min(r[0] for r in ranges), max(r[1] for r in ranges)
    outside = (mass < low) | (mass > high)
    if outside.any():
        warnings.warn(ProbedRangeWarning(
            f"{int(outside.sum())} of {mass.size} masses lie outside the plasma masses the boxes span "
            f"({low:.3g} to {high:.3g} eV for z = 0 to {z_boxes:g}); they get no resonance from the "
            "boxes (kernel 0 there, plus the homogeneous background beyond the boxes if included)"
        ), stacklevel=4)


@contextmanager
def numba_threads(n_jobs):
    """Run numba's parallel loops on ``n_jobs`` threads (-1: all cores), then restore."""
    wanted = None if n_jobs is None else require_number(
        n_jobs, "n_jobs (--jobs)", whole=True, at_least=-1, expected="a positive number of threads or -1 (all cores)")
    if wanted == 0:
        raise InputError("n_jobs (--jobs): expected a positive number of threads or -1 (all cores), got 0")
    wanted = numba.config.NUMBA_NUM_THREADS if wanted in (-1, None) else wanted
    previous = numba.get_num_threads()
    numba.set_num_threads(min(wanted, numba.config.NUMBA_NUM_THREADS))
    try:
        yield
    finally:
        numba.set_num_threads(previous)


def background_dispersion_measure(plasma, z_from, z_to, points=4001):
    """Mean DM (pc cm^-3) of the homogeneous universe from z_from to z_to: integral of nbar_e,com (1+z) dchi."""
    if z_to <= z_from:
        return 0.0
    z = np.expm1(np.linspace(np.log1p(z_from), np.log1p(z_to), points))
    chi = plasma.cosmology.comoving_distance_Mpc(z)
    integrand = plasma.mean_comoving_electron_density_cm3(z) * (1.0 + z)
    return float(np.trapezoid(integrand, chi) * 1.0e6)


def background_part(plasma, mass, z_boxes, z_max, include_background):
    """(K per mass, DM) of the homogeneous universe beyond the boxes, the same for every ray."""
    if include_background and z_max > z_boxes:
        return plasma.kernel(mass, z_boxes, z_max), background_dispersion_measure(plasma, z_boxes, z_max)
    return np.zeros(mass.size), 0.0


def background_contents(plasma, mass, z_boxes, z_max, include_background, groups):
    """A run's result file besides its rows: the homogeneous background's kernel and DM, and ``groups``
    (a function of the run record, :class:`~raytrace.tracing.backends.Contents`)."""
    kernel_background, dm_background = background_part(plasma, mass, z_boxes, z_max, include_background)
    return Contents({"kernel_background": kernel_background}, {"dispersion_measure_background": dm_background},
                    groups)
