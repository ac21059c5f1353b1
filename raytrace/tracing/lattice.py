"""The sky's tracer: one observer, rays along HEALPix pixels through a lattice of transformed copies.

In: a box series, a mass grid, nside, rays per pixel and z_max. Out: a
:class:`~raytrace.tracing.batches.Traced` run: its result file of per-pixel
means over each pixel's rays of the kernel from the boxes, crossings,
near-tangent events and dispersion measure, and the boxes' kernel of each of
the two independent splits of a pixel's rays (:mod:`raytrace.tracing.splits`),
in the run's pixel order (RING or NESTED), each mass's map (and each mass's
pair of split maps) contiguous, plus the homogeneous background's part.
:func:`plan_sky` checks a run and sizes it without tracing.

The observer sits at a seeded random point of the lattice of box copies around
it. Each copy, indexed by its integer position and by the snapshot serving its
shell, gets one random cube symmetry (about its centre) and periodic shift,
derived from (seed, snapshot, copy index) alone (blended snapshots share one
transform per copy, since they are mixed sample by sample), so every ray through
a copy sees the same structures and neighbouring directions are correlated as in
a real sky.
"""

from dataclasses import dataclass, replace

import numpy as np

from raytrace.boxes import as_series
from raytrace.core.errors import InputError, require_number
from raytrace.core.resultfiles import RowArray, result_bytes
from raytrace.kernels.lattice import trace_lattice
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
from raytrace.tracing.rays import CUBE_SYMMETRIES
from raytrace.tracing.redshiftbins import background_by_bin, bin_edges, bin_setup
from raytrace.tracing.sightlines import Tracer
from raytrace.tracing.splits import (SPLITS, check_rays_per_pixel, check_split_geometry, pixel_means, ray_directions,
                                     split_counts)

FORMAT = "raytrace-sky-2"
ORDERINGS = ("RING", "NESTED")
#: Largest nside: 50 M pixels, l up to 6143, past the measured TT spectrum's 2508 (nside 1024 reaches 3071);
#: what reads a sky holds one map of it at a time (400 MB).
MAX_NSIDE = 2048
#: Stored precisions of the per-pixel maps. float32 rounds a value to 6e-8 of itself (half a unit in the
#: 24th bit), some 10^6 times below a pixel's sampling noise (rms/mean 0.08-0.4 for 1-16 rays per pixel,
#: PHYSICS.md section 10), and halves the file.
PRECISIONS = ("float64", "float32")

# The per-pixel arrays a sky fills: the maps per mass are mass-major (axis 1 holds the pixels), so one
# mass's map is one contiguous read of the result file.
SKY_LAYOUT = {
    "kernel_boxes": RowArray(lambda r, m: (m, r), np.float64, 1),
    "crossings": RowArray(lambda r, m: (m, r), np.float64, 1),
    "tangent_events": RowArray(lambda r, m: (m, r), np.float64, 1),
    "kernel_tangent": RowArray(lambda r, m: (m, r), np.float64, 1),
    "dispersion_measure_boxes": RowArray(lambda r, m: (r,), np.float64),
}
#: With two or more rays per pixel: the boxes' kernel of each independent split, mass-major too (a mass's
#: two split maps are one contiguous read); a tracer gives it as (pixels, masses, splits).
SPLIT_LAYOUT = {"kernel_splits": RowArray(lambda r, m: (m, SPLITS, r), np.float64, 2)}


def sky_layout(precision, rays_per_pixel, shells=None):
    """The per-pixel arrays of a sky run: :data:`SKY_LAYOUT`, with each split's map where a pixel has two or
    more rays (:data:`SPLIT_LAYOUT`), its maps per mass stored in ``precision`` (one of :data:`PRECISIONS`),
    and the maps of each redshift shell where there are shells."""
    if precision not in PRECISIONS:
        raise InputError(f"map_precision (--map-precision): expected one of {', '.join(PRECISIONS)}, got "
                         f"{precision!r}")
    layout = {name: entry._replace(dtype=np.dtype(precision)) if entry.rows_axis else entry
              for name, entry in {**SKY_LAYOUT, **(SPLIT_LAYOUT if split_counts(rays_per_pixel) else {})}.items()}
    if shells is not None:
        count = shells.n_bins
        layout["kernel_shells_boxes"] = RowArray(lambda r, m: (r, count, m), np.float64)
    return layout


def _check_nside(nside):
    what = "nside (--nside)"
    expected = f"a power of 2 from 1 to {MAX_NSIDE}"
    nside = require_number(nside, what, whole=True, at_least=1, at_most=MAX_NSIDE, expected=expected)
    if nside & (nside - 1):
        raise InputError(f"{what}: expected {expected}, got {nside!r}")
    return int(nside)


def observer_position(seed, box_size_cMpc):
    """The observer's seeded random point in copy (0, 0, 0) of the first box, in Mpc."""
    rng = np.random.default_rng(np.random.SeedSequence([int(seed), 0x0B5E]))
    return rng.random(3) * box_size_cMpc


class SkyTracer(Tracer):
    """What one batch of pixels needs; :meth:`trace` is a pure function of the pixel indices (in ``ordering``)."""

    def __init__(self, series, mass_eV, nside, rays_per_pixel, z_boxes, seed, photon_energy_eV, cosmology,
                 randomise_copies=True, shells=None, ordering="NESTED"):
        self._set_up(series, mass_eV, z_boxes, seed, photon_energy_eV, cosmology, shells)
        self.shells = shells
        self.nside = nside
        self.ordering = ordering
        self.rays_per_pixel = self.rays_per_row = int(check_rays_per_pixel(rays_per_pixel))
        self.randomise = bool(randomise_copies)
        self.observer = observer_position(seed, self.boxes[0].box_size_cMpc)
        # Blended snapshots share a grid and are mixed point by point: they must see the
        # same transform in each copy, or the blend would average two unrelated fields.
        self.copy_keys = [0 if series.blend else b for b in range(len(self.boxes))]

    def ray_directions(self, pixels):
        """Unit vectors of the rays of ``pixels`` (in ``ordering``), (n_pixels * rays_per_pixel, 3), per pixel
        split A's then split B's (:func:`raytrace.tracing.splits.ray_directions`, seeded by NESTED index)."""
        nested = np.asarray(pixels, dtype=np.int64)
        if self.ordering == "RING":
            import healpy

            nested = healpy.ring2nest(self.nside, nested)
        return ray_directions(self.nside, nested, self.rays_per_pixel, self.seed)

    def trace(self, pixels):
        directions = self.ray_directions(pixels)
        out = self._outputs(directions.shape[0])
        for span in range(self.plan.n_spans):
            trace_lattice(*self._lattice_arguments(span, directions), *out.values())
        return self._pixel_means(out, len(pixels))

    def _pixel_means(self, rows, n_pixels):
        """Each pixel's means over its rays (and split A's and B's kernel), with its kernel per shell where the
        run has shells: the same arithmetic whichever device traced the rows."""
        means = {}
        for name, values in rows.items():
            means[name], splits = pixel_means(values, n_pixels, self.rays_per_pixel)
            if name == "kernel_boxes" and splits is not None:
                means["kernel_splits"] = np.swapaxes(splits, 1, 2)  # rows, masses, splits: see SPLIT_LAYOUT
        if self.shells is not None:
            means["kernel_shells_boxes"] = self.shells.cells_to_bins(means["kernel_cells"])
        return means

    def _lattice_arguments(self, span, directions):
        """The arguments of a lattice kernel for span ``span``, all but the outputs."""
        plan = self.plan
        box = int(plan.span_box[span])
        return (*self._span_arguments(span), float(plan.span_chi_a[span]), float(plan.span_chi_b[span]), directions,
                self.observer, float(self.boxes[box].box_size_cMpc), self.seed, self.copy_keys[box], CUBE_SYMMETRIES,
                self.randomise, *self._physics_arguments())


class GpuSkyTracer(GpuTracing, SkyTracer):
    """:class:`SkyTracer` on a GPU (:class:`~raytrace.tracing.gputrace.GpuTracing`)."""

    def __init__(self, *arguments):
        SkyTracer.__init__(self, *arguments)
        self._set_up_device(self.rays_per_pixel, self._physics_resident() + [CUBE_SYMMETRIES, self.observer])

    def trace(self, pixels):
        return self._in_calls(pixels, self._trace_call)

    def _trace_call(self, pixels):
        directions = self.ray_directions(pixels)
        out = self._device_outputs(directions.shape[0])
        sent = {}
        for span in range(self.plan.n_spans):
            self._launch(self._gpu.trace_lattice, directions.shape[0], self._lattice_arguments(span, directions), out,
                         sent)
        # The rows come back and are averaged here, as on the CPU: a pixel's rays fall in two splits of any size.
        return self._pixel_means({name: values.copy_to_host() for name, values in out.items()}, len(pixels))


@dataclass(frozen=True, eq=False)
class SkyPlan:
    """A checked sky run before any tracing: its tracer, record, result layout and what else its file holds."""

    tracer: SkyTracer
    mass_eV: np.ndarray
    run: dict
    layout: dict
    contents: object
    series: object
    plasma: object
    executor: object = None

    @property
    def n_pixels(self):
        return 12 * self.tracer.nside**2

    @property
    def n_batches(self):
        return -(-self.n_pixels // self.run["batch_pixels"])

    def result_bytes(self):
        """Bytes of the run's result file on disk."""
        return result_bytes(self.layout, self.n_pixels, self.mass_eV.size, self.n_batches)


def plan_sky(series, mass_eV, nside, z_max, seed=0, rays_per_pixel=4, include_background=True, z_boxes=None,
             ordering="RING", plasma=None, randomise_copies=True, batch_pixels=1024,
             photon_energy_eV=DEFAULT_PHOTON_ENERGY_EV, map_precision="float64", shells_z=None, device="cpu",
             executor=None, **removed):
    """Check a sky run's arguments (those of :func:`raytrace.cast_sky`) and plan it: a :class:`SkyPlan`.
    With ``shells_z``, its layout holds each pixel's kernel per shell (``kernel_shells_boxes``), its run
    record the shells' edges (``shell_edges_z``) and its file the group ``redshift_shells``. Its tracer is
    ``device``'s, and its executor the run's (a GPU brings its own)."""
    check_no_other_options("cast_sky", removed)
    series = as_series(series)
    mass = check_masses(mass_eV)
    seed = check_seed(seed)
    nside = _check_nside(nside)
    rays_per_pixel = check_rays_per_pixel(rays_per_pixel)
    check_split_geometry(nside, rays_per_pixel)
    if not isinstance(ordering, str) or ordering not in ORDERINGS:
        raise InputError(f"ordering: expected 'RING' or 'NESTED', got {ordering!r}")
    z_max, photon_energy_eV = check_trace_options(z_max, photon_energy_eV, batch_pixels, "batch_pixels")
    plasma = check_background(plasma)
    z_boxes = boxes_redshift_range(series, plasma, z_max, z_boxes, include_background)
    device, device_note = choose_device(device, executor)
    edges = bin_edges(shells_z, z_boxes, z_max, include_background, "shells_z (--shells)")
    shells = None if edges is None else bin_setup(edges, np.zeros(0), mass, plasma, z_boxes)
    layout = sky_layout(map_precision, rays_per_pixel, shells)
    run = {**run_record(series, mass, plasma, seed, z_max, z_boxes, include_background, photon_energy_eV,
                        "batch_pixels", batch_pixels),
           "nside": nside, "ordering": ordering, "rays_per_pixel": rays_per_pixel,
           "split_rays": list(split_counts(rays_per_pixel)), "randomise_copies": bool(randomise_copies),
           "map_precision": map_precision, "shell_edges_z": None if edges is None else edges.tolist(),
           **device_record(device, device_note)}
    warn_outside_probed_range(series, mass, z_boxes)
    # Pixels are traced and stored in the result's own order: each is traced on its own,
    # so the maps are the same bits in RING or NESTED order, with no reordering pass.
    tracer, executor = device_tracer(device, SkyTracer, GpuSkyTracer, (series, mass, nside, rays_per_pixel, z_boxes,
                                     seed, photon_energy_eV, plasma.cosmology, randomise_copies, shells, ordering),
                                     executor)
    contents = background_contents(plasma, mass, z_boxes, z_max, include_background, None)
    return SkyPlan(tracer, mass, run, layout, contents, series, plasma, executor)


def shell_group(plan):
    """The group ``redshift_shells`` of a sky with shells (their edges, the background's part of each), or {}."""
    edges, run = plan.run["shell_edges_z"], plan.run
    if edges is None:
        return {}
    by_shell, _ = background_by_bin(plan.plasma, plan.mass_eV, run["z_boxes"],
                                    run["z_max"] if run["include_background"] else run["z_boxes"], np.array(edges))
    return {"redshift_shells": ({
        "edges_z": (np.array(edges), "1", "edges in z of the redshift shells of kernel_shells_boxes"),
        "background": (by_shell, "eV", "the homogeneous background's kernel per shell and mass, the same in "
                       "every pixel")}, {})}


def trace_sky(series, mass_eV, nside, z_max, n_jobs=1, backend=None, progress=False, executor=None, groups=None,
              **options):
    """Trace a sky; the arguments are :func:`raytrace.cast_sky`'s, and ``groups`` that of
    :class:`~raytrace.tracing.backends.Contents`. Returns a :class:`Traced` run."""
    backend = backend if backend is not None else MemoryBackend()
    check_backend_and_executor(backend, executor)
    plan = plan_sky(series, mass_eV, nside, z_max, executor=executor, **options)
    backend.check_room(plan.result_bytes(), "pixels or masses (--nside, --mass-count; --map-precision float32 "
                                            "halves the maps)")

    def all_groups(run):  # the shells' group beside the caller's (the built-in check)
        return {**shell_group(plan), **({} if groups is None else groups(run))}

    run_batches(plan.tracer, backend, plan.mass_eV, plan.run, plan.layout, FORMAT, plan.n_pixels,
                plan.run["batch_pixels"], n_jobs, plan.executor, progress, f"sky of {plan.n_pixels} pixels",
                replace(plan.contents, groups=all_groups))
    return Traced(backend, plan.run, plan.series, plan.plasma, n_jobs)
