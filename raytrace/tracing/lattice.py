"""The sky's tracer: one observer, rays along HEALPix pixels through a lattice of transformed copies.

In: a box series, a mass grid, nside, rays per pixel and z_max. Out: a
:class:`~raytrace.tracing.batches.Traced` run: per-pixel means over each
pixel's rays of the kernel from the boxes, crossings, near-tangent events and
dispersion measure, and the boxes' kernel of each of the two independent splits
of a pixel's rays (:mod:`raytrace.tracing.splits`), in NESTED order, plus the
homogeneous background's part.

The observer sits at a seeded random point of the lattice of box copies around
it. Each copy, indexed by its integer position and by the snapshot serving its
shell, gets one random cube symmetry (about its centre) and periodic shift,
derived from (seed, snapshot, copy index) alone (blended snapshots share one
transform per copy, since they are mixed sample by sample), so every ray through
a copy sees the same structures and neighbouring directions are correlated as in
a real sky.
"""

import numpy as np

from raytrace import __version__
from raytrace.boxes import as_series
from raytrace.core.errors import InputError, require_number
from raytrace.kernels.lattice import trace_lattice
from raytrace.tracing.backends import MemoryBackend
from raytrace.tracing.batches import Traced, run_batches
from raytrace.tracing.checks import (
    DEFAULT_PHOTON_ENERGY_EV,
    background_part,
    boxes_redshift_range,
    check_background,
    check_masses,
    check_no_other_options,
    check_run_memory,
    check_seed,
    check_trace_options,
    warn_outside_probed_range,
)
from raytrace.tracing.devices import choose_device, device_record, device_tracer
from raytrace.tracing.gputrace import GpuTracing
from raytrace.tracing.rays import CUBE_SYMMETRIES
from raytrace.tracing.redshiftbins import bin_edges, bin_setup
from raytrace.tracing.sightlines import Tracer
from raytrace.tracing.splits import (SPLITS, check_rays_per_pixel, check_split_geometry, pixel_means, ray_directions,
                                     split_counts)

FORMAT = "raytrace-sky-2"
ORDERINGS = ("RING", "NESTED")

SKY_LAYOUT = {
    "kernel_boxes": (lambda r, m: (r, m), np.float64),
    "crossings": (lambda r, m: (r, m), np.float64),
    "tangent_events": (lambda r, m: (r, m), np.float64),
    "kernel_tangent": (lambda r, m: (r, m), np.float64),
    "dispersion_measure_boxes": (lambda r, m: (r,), np.float64),
}
#: With two or more rays per pixel: the boxes' kernel of each independent split.
SPLIT_LAYOUT = {"kernel_splits": (lambda r, m: (r, SPLITS, m), np.float64)}


def _check_nside(nside):
    what = "nside (--nside)"
    expected = "a power of 2 (1, 2, 4, ..., 2^29)"
    nside = require_number(nside, what, whole=True, at_least=1, at_most=2**29, expected=expected)
    if nside & (nside - 1):
        raise InputError(f"{what}: expected {expected}, got {nside!r}")
    return nside


def observer_position(seed, box_size_cMpc):
    """The observer's seeded random point in copy (0, 0, 0) of the first box, in Mpc."""
    rng = np.random.default_rng(np.random.SeedSequence([int(seed), 0x0B5E]))
    return rng.random(3) * box_size_cMpc


def sky_layout(rays_per_pixel, shells=None):
    """The per-pixel arrays of a sky run: :data:`SKY_LAYOUT`, with each split's map where a pixel has two or
    more rays (:data:`SPLIT_LAYOUT`) and the maps of each shell where there are shells."""
    layout = dict(SKY_LAYOUT, **(SPLIT_LAYOUT if split_counts(rays_per_pixel) else {}))
    if shells is not None:
        count = shells.n_bins
        layout["kernel_shells_boxes"] = (lambda r, m: (r, count, m), np.float64)
    return layout


class SkyTracer(Tracer):
    """What one batch of pixels needs; :meth:`trace` is a pure function of the pixel indices (NESTED)."""

    def __init__(self, series, mass_eV, nside, rays_per_pixel, z_boxes, seed, photon_energy_eV, cosmology,
                 randomise_copies=True, shells=None):
        self._set_up(series, mass_eV, z_boxes, seed, photon_energy_eV, cosmology, shells)
        self.shells = shells
        self.nside = nside
        self.rays_per_pixel = check_rays_per_pixel(rays_per_pixel)
        self.randomise = bool(randomise_copies)
        self.observer = observer_position(seed, self.boxes[0].box_size_cMpc)
        # Blended snapshots share a grid and are mixed point by point: they must see the
        # same transform in each copy, or the blend would average two unrelated fields.
        self.copy_keys = [0 if series.blend else b for b in range(len(self.boxes))]

    def ray_directions(self, pixels):
        """Unit vectors of the rays of NESTED ``pixels``, (n_pixels * rays_per_pixel, 3), per pixel split A's
        then split B's (:func:`raytrace.tracing.splits.ray_directions`)."""
        return ray_directions(self.nside, pixels, self.rays_per_pixel, self.seed)

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
                means["kernel_splits"] = splits
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


def trace_sky(series, mass_eV, nside, z_max, seed=0, rays_per_pixel=4, n_jobs=1, include_background=True,
             z_boxes=None, ordering="RING", plasma=None, randomise_copies=True, batch_pixels=1024,
             backend=None, progress=False, executor=None, photon_energy_eV=DEFAULT_PHOTON_ENERGY_EV, shells_z=None,
             device="cpu", **removed):
    """Trace a sky; the arguments are :func:`raytrace.cast_sky`'s. Returns a Traced run, pixels in NESTED order;
    with ``shells_z``, its arrays hold each pixel's kernel per shell (``kernel_shells_boxes``) and its run
    record the shells' edges (``shell_edges_z``)."""
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
    layout = sky_layout(rays_per_pixel, shells)
    # The split maps hold as much again as the map's kernel arrays (a conservative count); a shell's maps
    # take a third of a pixel's 48 bytes per mass.
    per_mass = (2 if "kernel_splits" in layout else 1) + (0 if shells is None else shells.n_bins / 3)
    check_run_memory(12 * nside * nside, mass.size * per_mass, "nside, mass_eV and shells_z (--nside, "
                     "--mass-count, --shells)")
    run = {
        "raytrace": __version__, "nside": nside, "ordering": ordering, "rays_per_pixel": rays_per_pixel,
        "split_rays": list(split_counts(rays_per_pixel)),
        "z_max": float(z_max), "z_boxes": float(z_boxes), "include_background": bool(include_background),
        "seed": int(seed), "photon_energy_eV": photon_energy_eV, "batch_pixels": int(batch_pixels),
        "randomise_copies": bool(randomise_copies),
        "blend": series.blend, "mass_eV": mass.tolist(),
        "boxes": [box.describe() for box in series.boxes], "ionisation": plasma.ionisation.description,
        "cosmology": plasma.cosmology.name, "shell_edges_z": None if edges is None else edges.tolist(),
        **device_record(device, device_note),
    }
    warn_outside_probed_range(series, mass, z_boxes)
    tracer, executor = device_tracer(device, SkyTracer, GpuSkyTracer, (series, mass, nside, rays_per_pixel, z_boxes,
                                     seed, photon_energy_eV, plasma.cosmology, randomise_copies, shells), executor)
    kernel_background, dm_background = background_part(plasma, mass, z_boxes, z_max, include_background)
    backend = backend if backend is not None else MemoryBackend()
    # Pixels are traced in NESTED order and stored in that order; the result reorders to RING on request.
    arrays = run_batches(tracer, backend, mass, run, layout, FORMAT, 12 * nside * nside, batch_pixels, n_jobs,
                         executor, progress, unit="pixel", description="sky")
    return Traced(mass, arrays, kernel_background, dm_background, run, series, plasma, backend, n_jobs)
