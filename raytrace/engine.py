"""The sightline engine: casts random rays through a series of boxes.

In: a box series (or a list of boxes, or one box), a sorted mass grid (eV), the
number of rays, z_max and the run's options. Out: a
:class:`~raytrace.results.SightlineResult`.

The boxes serve redshifts up to ``z_boxes``; with ``include_background`` the
homogeneous universe adds the rest up to ``z_max`` (the same for every ray and
reported apart). Ray i draws its random numbers from a stream fixed by
(seed, i) alone and every ray is computed on its own, so results are
bit-identical for any ``n_jobs`` and ``batch_size``.
"""

import math
import warnings
from contextlib import contextmanager

import numba
import numpy as np

from . import __version__
from .background import MeanPlasma
from .boxes import as_series
from .constants import HBAR_EV_S, PLASMA_MASS2_PER_DENSITY
from .errors import InputError, ProbedRangeWarning, require_positive_finite
from .kernels.crossings import add_crossings
from .kernels.sampling import add_log_density
from .rays import draw_rays, plan_samples
from .results import FORMAT, SIGHTLINE_LAYOUT, MemoryBackend, SightlineResult

#: Interpolated densities are floored at this fraction of the box mean so that
#: empty cells give a finite ln n_e; masses that low are never probed by a box.
DENSITY_FLOOR = 1e-8


def check_seed(seed):
    """A seed the counter-based streams take: a whole number in [0, 2^63)."""
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or not 0 <= int(seed) < 2**63:
        raise InputError(f"seed (--seed): expected a whole number from 0 to 2^63 - 1, got {seed!r}")
    return int(seed)


def check_trace_options(z_max, step, batch, batch_name):
    """The options every trace takes: z_max > 0, step > 0 cells, a batch of >= 1 rows."""
    if isinstance(batch, bool) or not isinstance(batch, (int, np.integer)) or batch < 1:
        raise InputError(f"{batch_name}: expected a whole number >= 1, got {batch!r}")
    if not (isinstance(step, (int, float)) and math.isfinite(step) and step > 0):
        raise InputError(f"step: expected a positive step in cells, got {step!r}")
    if not (isinstance(z_max, (int, float)) and math.isfinite(z_max) and z_max > 0):
        raise InputError(f"z_max: expected a positive redshift, got {z_max!r}")


def check_masses(mass_eV):
    """Positive, finite, strictly increasing masses as a float array."""
    mass = require_positive_finite(np.atleast_1d(mass_eV), "mass_eV")
    if mass.ndim != 1 or np.any(np.diff(mass) <= 0):
        raise InputError("mass_eV: expected a one-dimensional, strictly increasing grid of masses")
    return mass


def box_mean(box):
    """Mean of a box's stored values (the loader computed it while reading)."""
    return box.describe()["mean_comoving_density_cm3"] / box.comoving_scale


def probed_mass_range(box, z_start, z_end, density_floor=DENSITY_FLOOR):
    """(lowest, highest) mass in eV that can resonate in ``box`` while it serves z_start..z_end.

    The engine samples the trilinear interpolant of the cells, which spans the
    lowest to the highest cell (zero where a box has empty cells), floored at
    ``density_floor`` times the box mean: so the floor, not the lowest cell, bounds
    the range from below where it is higher. Densities scale by (1+z)^3 (PHYSICS.md section 3).
    """
    lowest_cell, high = box.plasma_mass_range(z_start, z_end)
    floor = density_floor * box_mean(box) * box.comoving_scale * (1.0 + z_start) ** 3
    floor_mass = math.sqrt(PLASMA_MASS2_PER_DENSITY * floor)
    low = floor_mass if box.describe()["zero_cells"] else max(lowest_cell, floor_mass)
    return low, high


def boxes_redshift_range(series, plasma, z_max, z_boxes, include_background):
    """The highest redshift the boxes serve, checked against what the tables cover.

    With the background included, the boxes serve up to ``z_boxes`` (default: the
    highest snapshot's redshift) and the homogeneous universe the rest to z_max;
    without it, the boxes serve all of 0..z_max.
    """
    from .cosmology import Z_TABLE_MAX

    if not include_background:
        if z_boxes is not None and float(z_boxes) != z_max:
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
    z_boxes = float(z_boxes)
    if not (math.isfinite(z_boxes) and z_boxes > 0):
        raise InputError(f"z_boxes (--z-boxes): expected a positive redshift, got {z_boxes!r}")
    return min(z_boxes, float(z_max))


def warn_outside_probed_range(series, mass, z_boxes, density_floor=DENSITY_FLOOR):
    """Warn, naming the probed range, when grid masses cannot resonate anywhere in the boxes."""
    ranges = [probed_mass_range(series.boxes[i], z_start, z_end, density_floor)
              for z_start, z_end, i in series.intervals(z_boxes)]
    low, high = min(r[0] for r in ranges), max(r[1] for r in ranges)
    outside = (mass < low) | (mass > high)
    if outside.any():
        warnings.warn(ProbedRangeWarning(
            f"{int(outside.sum())} of {mass.size} masses lie outside the plasma masses the boxes span "
            f"({low:.3g} to {high:.3g} eV for z = 0 to {z_boxes:g}); they get no resonance from the "
            "boxes (kernel 0 there, plus the homogeneous background beyond the boxes if included)"
        ), stacklevel=3)


class Tracer:
    """What sightline and sky tracers share: the sampling plan, the mass targets, the
    crossing integration, and (for a cluster) their state without the boxes."""

    def _set_up(self, series, mass_eV, z_boxes, seed, step, cosmology, density_floor):
        self.boxes = series.boxes
        self.seed = int(seed)
        self.plan = plan_samples(cosmology, series, z_boxes, step)
        self.dt = self.plan.proper_time_steps
        self.targets = np.log(mass_eV**2 / PLASMA_MASS2_PER_DENSITY)
        self.mass2 = mass_eV**2
        spacing = np.diff(self.targets)
        self.uniform = bool(spacing.size > 0 and np.allclose(spacing, spacing.mean(), rtol=1e-9, atol=0))
        self.floors = [density_floor * box_mean(box) for box in self.boxes]

    def _crossings(self, ln_density):
        """(kernel, crossing counts, DM) per ray from sampled comoving ln n_e, (n_rays, n_samples)."""
        plan = self.plan
        ln_density += 3.0 * plan.u[None, :]  # comoving -> physical at each sample's redshift
        n = ln_density.shape[0]
        kernel = np.zeros((n, self.mass2.size))
        count = np.zeros((n, self.mass2.size), dtype=np.int32)
        dispersion = np.zeros(n)
        add_crossings(plan.chi, plan.u, self.dt, ln_density, self.targets, self.mass2, self.uniform,
                      HBAR_EV_S, kernel, count, dispersion)
        return kernel, count, dispersion

    def state(self):
        """Everything but the boxes: small arrays that rebuild this tracer elsewhere with :meth:`from_state`."""
        return {name: value for name, value in vars(self).items() if name != "boxes"}

    @classmethod
    def from_state(cls, state, boxes):
        """The tracer whose :meth:`state` is ``state``, sampling ``boxes`` (reopened by the caller).

        The state's own arrays (plan, floors, targets) are used, not recomputed, so
        the rebuilt tracer gives the same bits as the original.
        """
        tracer = object.__new__(cls)
        vars(tracer).update(state)
        tracer.boxes = tuple(boxes)
        return tracer


class RayTracer(Tracer):
    """Everything one batch of rays needs: the plan, the boxes' arrays, the mass targets.

    Built once per run (and once per worker process in a cluster run, from the
    boxes' files); :meth:`trace` is a pure function of the ray indices.
    """

    def __init__(self, series, mass_eV, z_boxes, seed, step, cosmology, density_floor=DENSITY_FLOOR):
        self._set_up(series, mass_eV, z_boxes, seed, step, cosmology, density_floor)
        self.n_cells = np.array([box.n_cells for box in self.boxes])
        self.segments = [self.plan.segments_of(b) for b in range(len(self.boxes))]

    def trace(self, ray_indices):
        """Per-ray arrays (kernel_boxes, crossings, dispersion_measure_boxes, direction) for the given rays."""
        plan = self.plan
        n = len(ray_indices)
        ray_direction, starts, directions, _ = draw_rays(self.seed, np.asarray(ray_indices), plan, self.n_cells)
        ln_density = np.zeros((n, plan.n_samples))
        for b, box in enumerate(self.boxes):
            used = self.segments[b]
            if used.size == 0:
                continue
            add_log_density(
                box.data, math.log(box.comoving_scale), self.floors[b],
                plan.segment_first[used], plan.segment_stop[used], plan.local_cells,
                np.ascontiguousarray(starts[:, used]), np.ascontiguousarray(directions[:, used]),
                plan.weights[b], ln_density,
            )
        kernel, count, dispersion = self._crossings(ln_density)
        return {"kernel_boxes": kernel, "crossings": count, "dispersion_measure_boxes": dispersion,
                "direction": ray_direction}


@contextmanager
def numba_threads(n_jobs):
    """Run numba's parallel loops on ``n_jobs`` threads (-1: all cores), then restore."""
    previous = numba.get_num_threads()
    wanted = numba.config.NUMBA_NUM_THREADS if n_jobs in (-1, None) else int(n_jobs)
    if wanted < 1:
        raise InputError(f"n_jobs: expected a positive number of workers or -1, got {n_jobs!r}")
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


def run_batches(tracer, backend, mass, run, layout, format_name, n_rows, batch_size, n_jobs, executor, progress,
                unit, description):
    """Trace rows 0..n_rows-1 (rays or pixels) in batches into ``backend`` and return its arrays.

    Batches the backend already holds (a resumed checkpoint) are skipped; the rest
    run here on ``n_jobs`` numba threads, or through ``executor`` (a cluster), each
    written to the backend as it completes.
    """
    from tqdm.auto import tqdm

    if executor is not None and hasattr(executor, "prepare"):
        executor.prepare(tracer)
    starts = list(range(0, n_rows, batch_size))
    backend.open(mass, n_rows, run, len(starts), layout, format_name)
    done = backend.completed_batches()
    todo = [(b, s, min(s + batch_size, n_rows)) for b, s in enumerate(starts) if not done[b]]
    with tqdm(total=n_rows, initial=n_rows - sum(stop - start for _, start, stop in todo), unit=unit,
              desc=description, disable=not progress) as bar:
        if executor is None:
            with numba_threads(n_jobs):
                for b, start, stop in todo:
                    backend.write_batch(b, start, tracer.trace(range(start, stop)))
                    bar.update(stop - start)
        else:
            finished = dict((b, stop - start) for b, start, stop in todo)
            for b, start, arrays in executor(tracer, todo):
                backend.write_batch(b, start, arrays)
                bar.update(finished[b])
    return backend.read()


def cast_sightlines(series, mass_eV, n_rays, z_max, seed=0, step=0.5, n_jobs=1, include_background=True,
                    z_boxes=None, batch_size=256, plasma=None, backend=None, progress=False,
                    density_floor=DENSITY_FLOOR, executor=None):
    """Cast ``n_rays`` random sightlines from z = 0 to ``z_max`` through ``series``.

    Parameters
    ----------
    series : BoxSeries, Box or list of Box
    mass_eV : sorted array of dark-photon masses in eV
    n_rays : number of sightlines
    z_max : redshift the rays reach (last scattering: ~1100)
    seed : ray i draws from a stream fixed by (seed, i) alone
    step : sampling step in cells of the serving box
    n_jobs : numba threads (-1: all cores)
    include_background : boxes serve up to ``z_boxes`` (default: the highest
        snapshot's redshift) and the homogeneous background the rest; if False
        the boxes serve all of 0..z_max
    batch_size : rays per batch (results do not depend on it)
    plasma : MeanPlasma for the background part (default: CAMB, Planck 2018)
    backend : MemoryBackend (default) or HDF5Backend (checkpointed, resumable)
    executor : optional callable ``executor(tracer, batches)`` that runs the
        batches ``(batch, start, stop)`` elsewhere (a cluster) and yields
        ``(batch, start, arrays)`` as they complete; if it has a ``prepare(tracer)``
        method, that is called before anything is written, to refuse early
        (e.g. :class:`raytrace.cluster.DaskExecutor`)
    """
    series = as_series(series)
    mass = check_masses(mass_eV)
    seed = check_seed(seed)
    if isinstance(n_rays, bool) or not isinstance(n_rays, (int, np.integer)) or n_rays < 1:
        raise InputError(f"n_rays: expected a whole number >= 1, got {n_rays!r}")
    check_trace_options(z_max, step, batch_size, "batch_size")
    plasma = plasma if plasma is not None else MeanPlasma()
    z_boxes = boxes_redshift_range(series, plasma, z_max, z_boxes, include_background)
    run = {
        "raytrace": __version__,
        "n_rays": int(n_rays),
        "z_max": float(z_max),
        "z_boxes": float(z_boxes),
        "include_background": bool(include_background),
        "seed": int(seed),
        "step_cells": float(step),
        "batch_size": int(batch_size),
        "density_floor": float(density_floor),
        "blend": series.blend,
        "mass_eV": mass.tolist(),
        "boxes": [box.describe() for box in series.boxes],
        "ionisation": plasma.ionisation.description,
        "cosmology": plasma.cosmology.name,
    }
    warn_outside_probed_range(series, mass, z_boxes, density_floor)
    tracer = RayTracer(series, mass, z_boxes, seed, step, plasma.cosmology, density_floor)
    kernel_background, dm_background = background_part(plasma, mass, z_boxes, z_max, include_background)
    backend = backend if backend is not None else MemoryBackend()
    arrays = run_batches(tracer, backend, mass, run, SIGHTLINE_LAYOUT, FORMAT, n_rays, batch_size, n_jobs,
                         executor, progress, unit="ray", description="sightlines")
    result = SightlineResult(mass, arrays["kernel_boxes"], kernel_background, arrays["crossings"],
                             arrays["dispersion_measure_boxes"], dm_background, arrays["direction"], run)
    return backend.finish(result)
