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

import os
import sys
import warnings
from contextlib import contextmanager

import numba
import numpy as np

from . import __version__
from .background import MeanPlasma
from .boxes import as_series
from .constants import C_MPC_S, HBAR_EV_S, PLASMA_MASS2_PER_DENSITY
from .devices import choose_device, device_record, device_tracer
from .errors import InputError, ProbedRangeWarning, RaytraceWarning, require_number, require_positive_finite
from .kernels.sightlines import trace_pieces
from .progress import compile_notice, step_rows
from .rays import draw_rays, plan_rays
from .runfile import REMOVED_OPTIONS
from .units import CMB_PHOTON_ENERGY_EV
from .meancheck import attach_pdf_check
from .results import FORMAT, SIGHTLINE_LAYOUT, MemoryBackend, SightlineResult

#: The default observed photon energy of near-tangent (Airy) events: k T_0, the
#: energy at which the report evaluates the anisotropy (x = h nu / k T_0 = 1).
DEFAULT_PHOTON_ENERGY_EV = CMB_PHOTON_ENERGY_EV


def refuse_removed(options):
    """An InputError naming any removed option present in the ``options`` mapping."""
    for name in options:
        if name in REMOVED_OPTIONS:
            raise InputError(f"{name}: no longer an option: {REMOVED_OPTIONS[name]}")


def check_seed(seed):
    """A seed the counter-based streams take: a whole number in [0, 2^63)."""
    return require_number(seed, "seed (--seed)", whole=True, at_least=0, at_most=2**63 - 1,
                          expected="a whole number from 0 to 2^63 - 1")


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


def check_masses(mass_eV):
    """Positive, finite, strictly increasing masses as a float array."""
    mass = require_positive_finite(np.atleast_1d(mass_eV), "mass_eV")
    if mass.ndim != 1 or np.any(np.diff(mass) <= 0):
        raise InputError("mass_eV: expected a one-dimensional, strictly increasing grid of masses")
    return mass


def boxes_redshift_range(series, plasma, z_max, z_boxes, include_background):
    """The highest redshift the boxes serve, checked against what the tables cover.

    With the background included, the boxes serve up to ``z_boxes`` (default: the
    highest snapshot's redshift) and the homogeneous universe the rest to z_max;
    without it, the boxes serve all of 0..z_max.
    """
    from .cosmology import Z_TABLE_MAX

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
                          stacklevel=3)
    return min(float(z_boxes), float(z_max))


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
        ), stacklevel=3)


class Tracer:
    """What sightline and sky tracers share: the ray plan, the mass targets, the
    kernel's constants, and (for a cluster) their state without the boxes."""

    device = "cpu"  # where :meth:`trace` runs (raytrace.gputrace: "gpu")

    def _set_up(self, series, mass_eV, z_boxes, seed, photon_energy_eV, cosmology):
        self.boxes = series.boxes
        self.blend = bool(series.blend)
        self.redshifts = np.array([box.redshift for box in self.boxes])
        self.seed = int(seed)
        self.plan = plan_rays(cosmology, series, z_boxes)
        self.mass2 = mass_eV**2
        self.targets = self.mass2 / PLASMA_MASS2_PER_DENSITY  # physical n_e (cm^-3) of each resonance
        self.ln_targets = np.log(self.targets)
        spacing = np.diff(self.ln_targets)
        self.uniform = bool(spacing.size > 0 and np.allclose(spacing, spacing.mean(), rtol=1e-9, atol=0))
        self.photon_energy_eV = float(photon_energy_eV)

    def _span_arguments(self, span):
        """The leading arguments of a kernel call for span ``span``: cubes, scales, blending."""
        plan = self.plan
        low, high = int(plan.span_low[span]), int(plan.span_high[span])
        box_low, box_high = self.boxes[low], self.boxes[high]
        blended = self.blend and low != high
        return (box_low.data, box_high.data, float(box_low.comoving_scale), float(box_high.comoving_scale),
                blended, float(self.redshifts[low]), float(self.redshifts[high]))

    def _physics_arguments(self):
        """The trailing arguments of a kernel call: tables, targets, constants."""
        plan = self.plan
        return (plan.one_plus_z, plan.hubble_over_c, 1.0 / plan.chi_step, self.targets, self.ln_targets,
                self.mass2, self.uniform, HBAR_EV_S * C_MPC_S, PLASMA_MASS2_PER_DENSITY, self.photon_energy_eV)

    def _outputs(self, n_rows):
        """The per-row output arrays, zero, in the order the kernels take them."""
        n_masses = self.mass2.size
        return {"kernel_boxes": np.zeros((n_rows, n_masses)),
                "crossings": np.zeros((n_rows, n_masses), dtype=np.int32),
                "tangent_events": np.zeros((n_rows, n_masses), dtype=np.int32),
                "kernel_tangent": np.zeros((n_rows, n_masses)),
                "dispersion_measure_boxes": np.zeros(n_rows)}

    def state(self):
        """Everything but the boxes: small arrays that rebuild this tracer elsewhere with :meth:`from_state`."""
        return {name: value for name, value in vars(self).items() if name != "boxes"}

    @classmethod
    def from_state(cls, state, boxes):
        """The tracer whose :meth:`state` is ``state``, sampling ``boxes`` (reopened by the caller).

        The state's own arrays (plan, targets) are used, not recomputed, so the
        rebuilt tracer gives the same bits as the original.
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

    def __init__(self, series, mass_eV, z_boxes, seed, photon_energy_eV, cosmology):
        self._set_up(series, mass_eV, z_boxes, seed, photon_energy_eV, cosmology)
        self.n_cells = np.array([box.n_cells for box in self.boxes])

    def trace(self, ray_indices):
        """Per-ray arrays (kernel_boxes, crossings, tangent_events, kernel_tangent,
        dispersion_measure_boxes, direction) for the given rays."""
        ray_direction, starts, directions = self._ray_geometry(ray_indices)
        out = self._outputs(len(ray_indices))
        for span in range(self.plan.n_spans):
            trace_pieces(*self._piece_arguments(span, starts, directions), *out.values())
        out["direction"] = ray_direction
        return out

    def _ray_geometry(self, ray_indices):
        """(direction, per-segment starts, per-segment directions) of the given rays."""
        ray_direction, starts, directions, _ = draw_rays(self.seed, np.asarray(ray_indices), self.plan, self.n_cells)
        return ray_direction, starts, directions

    def _piece_arguments(self, span, starts, directions):
        """The arguments of a sightline kernel for span ``span``, all but the outputs."""
        plan = self.plan
        pieces = plan.pieces_of(span)
        geometry = self.boxes[int(plan.span_box[span])]
        return (*self._span_arguments(span), plan.piece_segment[pieces], plan.piece_chi_a[pieces],
                plan.piece_chi_b[pieces], plan.segment_chi0, float(geometry.cell_size_cMpc), starts, directions,
                *self._physics_arguments())


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


def run_batches(tracer, backend, mass, run, layout, format_name, n_rows, batch_size, n_jobs, executor, progress,
                unit, description):
    """Trace rows 0..n_rows-1 (rays or pixels) in batches into ``backend`` and return its arrays.

    Batches the backend already holds (a resumed checkpoint) are skipped; the rest
    run here on ``n_jobs`` numba threads, or through ``executor`` (a cluster), each
    written to the backend as it completes. The box files must not change meanwhile:
    their size and modification time are compared after every batch, their
    checksums once at the end (InputError naming the file).
    """
    from tqdm.auto import tqdm

    from .provenance import InputWatch

    if executor is not None and hasattr(executor, "prepare"):
        executor.prepare(tracer)
    watch = InputWatch([(box.path, box.checksum) for box in tracer.boxes if box.path is not None])
    starts = list(range(0, n_rows, batch_size))
    backend.open(mass, n_rows, run, len(starts), layout, format_name)
    done = backend.completed_batches()
    todo = [(b, s, min(s + batch_size, n_rows)) for b, s in enumerate(starts) if not done[b]]
    with tqdm(total=n_rows, initial=n_rows - sum(stop - start for _, start, stop in todo), unit=unit,
              desc=description, disable=not progress) as bar:
        if executor is None:
            with numba_threads(n_jobs):
                # Without a bar, one call per batch; with one, steps small enough for it to move.
                step = step_rows(batch_size, numba.get_num_threads()) if progress else batch_size
                for number, (b, start, stop) in enumerate(todo):
                    # Small steps move the bar per group of rays; each row is traced on its own,
                    # so the arrays are the same bits as one call for the batch.
                    parts = []
                    for first in range(start, stop, step):
                        with compile_notice(progress and number == 0 and first == start,
                                            lambda text: bar.write(text, file=sys.stderr)):
                            parts.append(tracer.trace(range(first, min(first + step, stop))))
                        bar.update(min(first + step, stop) - first)
                    arrays = {name: np.concatenate([part[name] for part in parts]) for name in parts[0]}
                    watch.quick()  # before the write: a batch that read a changed box is never stored
                    backend.write_batch(b, start, arrays)
        else:
            finished = dict((b, stop - start) for b, start, stop in todo)
            for b, start, arrays in executor(tracer, todo):
                watch.quick()
                backend.write_batch(b, start, arrays)
                bar.update(finished[b])
    watch.final()
    return backend.read()


def check_no_other_options(function, options):
    """Refuse removed options with their reason, and any other unknown keyword by name."""
    refuse_removed(options)
    if options:
        raise InputError(f"{function}: unknown option(s) {', '.join(sorted(options))}")


def cast_sightlines(series, mass_eV, n_rays, z_max, seed=0, n_jobs=1, include_background=True, z_boxes=None,
                    batch_size=256, plasma=None, backend=None, progress=False, executor=None,
                    photon_energy_eV=DEFAULT_PHOTON_ENERGY_EV, device="cpu", **removed):
    """Cast ``n_rays`` random sightlines from z = 0 to ``z_max`` through ``series``.

    Parameters
    ----------
    series : BoxSeries, Box or list of Box
    mass_eV : sorted array of dark-photon masses in eV
    n_rays : number of sightlines
    z_max : redshift the rays reach (last scattering: ~1100)
    seed : ray i draws from a stream fixed by (seed, i) alone
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
    photon_energy_eV : observed photon energy (eV) at which near-tangent pairs take
        their Airy form (PHYSICS.md section 9); every other crossing's kernel is
        frequency-free. Default: k T_0.
    device : "cpu", "gpu" (CUDA through numba-cuda: the ``gpu`` extra) or "auto"
        (a GPU where numba-cuda sees one, else the CPU); the run records the
        device used. Per ray, a GPU's rows equal the CPU's to rounding.
    """
    check_no_other_options("cast_sightlines", removed)
    series = as_series(series)
    mass = check_masses(mass_eV)
    seed = check_seed(seed)
    n_rays = require_number(n_rays, "n_rays", whole=True, at_least=1)
    z_max, photon_energy_eV = check_trace_options(z_max, photon_energy_eV, batch_size, "batch_size")
    check_run_memory(n_rays, mass.size, "n_rays and mass_eV (--rays, --mass-count)")
    plasma = check_background(plasma)
    z_boxes = boxes_redshift_range(series, plasma, z_max, z_boxes, include_background)
    device, device_note = choose_device(device, executor)
    run = {
        "raytrace": __version__,
        "n_rays": int(n_rays),
        "z_max": float(z_max),
        "z_boxes": float(z_boxes),
        "include_background": bool(include_background),
        "seed": int(seed),
        "photon_energy_eV": photon_energy_eV,
        "batch_size": int(batch_size),
        "blend": series.blend,
        "mass_eV": mass.tolist(),
        "boxes": [box.describe() for box in series.boxes],
        "ionisation": plasma.ionisation.description,
        "cosmology": plasma.cosmology.name,
        **device_record(device, device_note),
    }
    warn_outside_probed_range(series, mass, z_boxes)
    tracer, executor = device_tracer(device, "sightlines", RayTracer,
                                     (series, mass, z_boxes, seed, photon_energy_eV, plasma.cosmology), executor)
    kernel_background, dm_background = background_part(plasma, mass, z_boxes, z_max, include_background)
    backend = backend if backend is not None else MemoryBackend()
    arrays = run_batches(tracer, backend, mass, run, SIGHTLINE_LAYOUT, FORMAT, n_rays, batch_size, n_jobs,
                         executor, progress, unit="ray", description="sightlines")
    result = SightlineResult(mass, arrays["kernel_boxes"], kernel_background, arrays["crossings"],
                             arrays["dispersion_measure_boxes"], dm_background, arrays["direction"], run,
                             tangent_events=arrays["tangent_events"], kernel_tangent=arrays["kernel_tangent"])
    attach_pdf_check(result, series, plasma, n_jobs)  # the built-in check (raytrace.meancheck)
    return backend.finish(result)
