"""Random sightlines: each ray walks its own stack of randomly transformed box copies.

In: a box series (or a list of boxes, or one box), a sorted mass grid (eV), the
number of rays, z_max and the run's options. Out: a :class:`Traced` run: its
result file of per-ray arrays (kernel from the boxes, crossings, near-tangent
events, dispersion measure, direction) and the homogeneous background's part.

The boxes serve redshifts up to ``z_boxes``; with ``include_background`` the
homogeneous universe adds the rest up to ``z_max`` (the same for every ray and
reported apart). Ray i draws its random numbers from a stream fixed by
(seed, i) alone and every ray is computed on its own, so results are
bit-identical for any ``n_jobs`` and ``batch_size``.
"""

import numpy as np

from raytrace.boxes import as_series
from raytrace.core.errors import require_number
from raytrace.core.resultfiles import RowArray, result_bytes
from raytrace.kernels.sightlines import trace_pieces
from raytrace.physics.constants import C_MPC_S, HBAR_EV_S, PLASMA_MASS2_PER_DENSITY
from raytrace.tracing.backends import MemoryBackend
from raytrace.tracing.batches import Traced, check_backend_and_executor, run_batches
from raytrace.tracing.checks import (
    DEFAULT_PHOTON_ENERGY_EV,
    background_contents,
    boxes_redshift_range,
    check_background,
    check_masses,
    check_no_other_options,
    check_seed,
    check_trace_options,
    run_record,
    warn_outside_probed_range,
)
from raytrace.tracing.devices import choose_device, device_record, device_tracer
from raytrace.tracing.gputrace import GpuTracing
from raytrace.tracing.rays import draw_rays, plan_rays
from raytrace.tracing.redshiftbins import DEFAULT_DENSITY_EDGES, run_bins, run_layout

FORMAT = "raytrace-sightlines-2"

# The per-ray arrays a sightline run fills, rows first (counts stored as float64, as a sky's means are).
SIGHTLINE_LAYOUT = {
    "kernel_boxes": RowArray(lambda r, m: (r, m), np.float64),
    "crossings": RowArray(lambda r, m: (r, m), np.float64),
    "tangent_events": RowArray(lambda r, m: (r, m), np.float64),
    "kernel_tangent": RowArray(lambda r, m: (r, m), np.float64),
    "dispersion_measure_boxes": RowArray(lambda r, m: (r,), np.float64),
    "direction": RowArray(lambda r, m: (r, 3), np.float64),
}


class Tracer:
    """What sightline and sky tracers share: the ray plan, the mass targets, the
    kernel's constants, and (for a cluster) their state without the boxes."""

    device = "cpu"  # where :meth:`trace` runs (raytrace.tracing.gputrace: "gpu")

    def _set_up(self, series, mass_eV, z_boxes, seed, photon_energy_eV, cosmology, bins=None):
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
        # Each crossing's kernel also goes to its redshift cell (raytrace.tracing.redshiftbins); none without bins.
        self.cell_edges = np.zeros((mass_eV.size, 0)) if bins is None else bins.inner_opz
        self.cell_count = 0 if bins is None else bins.n_cells

    #: Rays traced per row (a sky's pixel averages several).
    rays_per_row = 1

    def cells_per_row(self):
        """Length of one row's rays in cells of the boxes that serve each span: what a row costs."""
        plan = self.plan
        cell = np.array([self.boxes[int(box)].cell_size_cMpc for box in plan.span_box])
        return self.rays_per_row * float(np.sum((plan.span_chi_b - plan.span_chi_a) / cell))

    def _span_arguments(self, span):
        """The leading arguments of a kernel call for span ``span``: cubes, scales, blending."""
        plan = self.plan
        low, high = int(plan.span_low[span]), int(plan.span_high[span])
        box_low, box_high = self.boxes[low], self.boxes[high]
        blended = self.blend and low != high
        return (box_low.data, box_high.data, float(box_low.comoving_scale), float(box_high.comoving_scale),
                blended, float(self.redshifts[low]), float(self.redshifts[high]))

    def _physics_arguments(self):
        """The trailing arguments of a kernel call: tables, targets, constants, the redshift cells' edges."""
        plan = self.plan
        return (plan.one_plus_z, plan.hubble_over_c, 1.0 / plan.chi_step, self.targets, self.ln_targets,
                self.mass2, self.uniform, HBAR_EV_S * C_MPC_S, PLASMA_MASS2_PER_DENSITY, self.photon_energy_eV,
                self.cell_edges)

    def _outputs(self, n_rows):
        """The per-row output arrays, zero, in the order the kernels take them."""
        n_masses = self.mass2.size
        return {"kernel_boxes": np.zeros((n_rows, n_masses)),
                "crossings": np.zeros((n_rows, n_masses), dtype=np.int32),
                "tangent_events": np.zeros((n_rows, n_masses), dtype=np.int32),
                "kernel_tangent": np.zeros((n_rows, n_masses)),
                "dispersion_measure_boxes": np.zeros(n_rows),
                "kernel_cells": np.zeros((n_rows, self.cell_count, n_masses))}

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

    def __init__(self, series, mass_eV, z_boxes, seed, photon_energy_eV, cosmology, bins=None):
        self._set_up(series, mass_eV, z_boxes, seed, photon_energy_eV, cosmology, bins)
        self.n_cells = np.array([box.n_cells for box in self.boxes])

    def trace(self, ray_indices):
        """Per-ray arrays (kernel_boxes, crossings, tangent_events, kernel_tangent,
        dispersion_measure_boxes, kernel_cells, direction) for the given rays."""
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


class GpuRayTracer(GpuTracing, RayTracer):
    """:class:`RayTracer` on a GPU (:class:`~raytrace.tracing.gputrace.GpuTracing`)."""

    def __init__(self, *arguments):
        RayTracer.__init__(self, *arguments)
        self._set_up_device(1, self._physics_resident())

    def trace(self, ray_indices):
        return self._in_calls(ray_indices, self._trace_call)

    def _trace_call(self, ray_indices):
        ray_direction, starts, directions = self._ray_geometry(ray_indices)
        out = self._device_outputs(ray_indices.size)
        sent = {}
        for span in range(self.plan.n_spans):
            self._launch(self._gpu.trace_pieces, ray_indices.size, self._piece_arguments(span, starts, directions),
                         out, sent)
        arrays = {name: values.copy_to_host() for name, values in out.items()}
        arrays["direction"] = ray_direction
        return arrays


def trace_sightlines(series, mass_eV, n_rays, z_max, seed=0, n_jobs=1, include_background=True, z_boxes=None,
                     batch_size=256, plasma=None, backend=None, progress=False, executor=None,
                     photon_energy_eV=DEFAULT_PHOTON_ENERGY_EV, redshift_bins=None,
                     density_classes=DEFAULT_DENSITY_EDGES, reducer=None, groups=None, device="cpu", **removed):
    """Trace ``n_rays`` random sightlines; the arguments are :func:`raytrace.cast_sightlines`'s, and
    ``groups`` that of :class:`~raytrace.tracing.backends.Contents`. Returns a :class:`Traced`.

    With ``redshift_bins`` each ray's kernel also goes to its redshift cells, which the object
    ``reducer(bins, mass_eV, plasma, z_end, kernel_background, n_rays)`` makes takes batch by batch
    (``add(batch, start, arrays)``, :func:`raytrace.tracing.batches.run_batches`): the Traced run's ``reducer``.
    """
    check_no_other_options("cast_sightlines", removed)
    series = as_series(series)
    mass = check_masses(mass_eV)
    seed = check_seed(seed)
    n_rays = int(require_number(n_rays, "n_rays", whole=True, at_least=1))
    z_max, photon_energy_eV = check_trace_options(z_max, photon_energy_eV, batch_size, "batch_size")
    plasma = check_background(plasma)
    z_boxes = boxes_redshift_range(series, plasma, z_max, z_boxes, include_background)
    device, device_note = choose_device(device, executor)
    run = {**run_record(series, mass, plasma, seed, z_max, z_boxes, include_background, photon_energy_eV,
                        "batch_size", batch_size),
           "n_rays": int(n_rays), **device_record(device, device_note)}
    bins = run_bins(redshift_bins, density_classes, mass, plasma, z_boxes, z_max, include_background)
    run.update(bins.run_record() if bins is not None else {})
    warn_outside_probed_range(series, mass, z_boxes)
    tracer, device_executor = device_tracer(device, RayTracer, GpuRayTracer, (series, mass, z_boxes, seed,
                                            photon_energy_eV, plasma.cosmology, bins), executor)
    contents = background_contents(plasma, mass, z_boxes, z_max, include_background, groups)
    reduce = None if bins is None or reducer is None else reducer(
        bins, mass, plasma, z_max if include_background else z_boxes, contents.per_mass["kernel_background"], n_rays)
    backend = backend if backend is not None else MemoryBackend()
    check_backend_and_executor(backend, executor)
    layout = run_layout(SIGHTLINE_LAYOUT, bins)
    # With bins the checkpoint keeps each ray's cells and the result is written apart at the end: room for both.
    kept = {name: entry for name, entry in layout.items() if not entry.streamed}
    n_batches = -(-n_rays // int(batch_size))
    backend.check_room(result_bytes(layout, n_rays, mass.size, n_batches)
                       + (result_bytes(kept, n_rays, mass.size, n_batches) if len(kept) < len(layout) else 0),
                       "rays or masses (--rays, --mass-count)")
    run_batches(tracer, backend, mass, run, layout, FORMAT, n_rays, batch_size, n_jobs, device_executor, progress,
                f"{n_rays} sightlines", contents, reduce)
    return Traced(backend, run, series, plasma, n_jobs, reduce)
