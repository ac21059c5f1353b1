"""The sky's tracer: one observer, rays along HEALPix pixels through a lattice of transformed copies.

In: a box series, a mass grid, nside, rays per pixel and z_max. Out: a
:class:`~raytrace.tracing.batches.Traced` run: per-pixel means over each
pixel's rays of the kernel from the boxes, crossings, near-tangent events and
dispersion measure, in NESTED order, plus the homogeneous background's part.

The observer sits at a seeded random point of the lattice of box copies around
it. Each copy, indexed by its integer position and by the snapshot serving its
shell, gets one random cube symmetry (about its centre) and periodic shift,
derived from (seed, snapshot, copy index) alone (blended snapshots share one
transform per copy, since they are mixed sample by sample), so every ray through
a copy sees the same structures and neighbouring directions are correlated as in
a real sky.
"""

import math

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

FORMAT = "raytrace-sky-2"
ORDERINGS = ("RING", "NESTED")

SKY_LAYOUT = {
    "kernel_boxes": (lambda r, m: (r, m), np.float64),
    "crossings": (lambda r, m: (r, m), np.float64),
    "tangent_events": (lambda r, m: (r, m), np.float64),
    "kernel_tangent": (lambda r, m: (r, m), np.float64),
    "dispersion_measure_boxes": (lambda r, m: (r,), np.float64),
}


def _check_nside(nside):
    what = "nside (--nside)"
    expected = "a power of 2 (1, 2, 4, ..., 2^29)"
    nside = require_number(nside, what, whole=True, at_least=1, at_most=2**29, expected=expected)
    if nside & (nside - 1):
        raise InputError(f"{what}: expected {expected}, got {nside!r}")
    return nside


def _sub_pixel_level(rays_per_pixel):
    """rays_per_pixel = 4^k: the rays follow the centres of the pixels at nside * 2^k inside each pixel."""
    rays_per_pixel = require_number(rays_per_pixel, "rays_per_pixel", whole=True, at_least=1,
                                    expected="1, 4, 16, 64 ...")
    level = round(math.log(rays_per_pixel, 4))
    if 4**level != rays_per_pixel:
        raise InputError(f"rays_per_pixel: expected a power of 4 (1, 4, 16, 64 ...) so the rays sit at the "
                         f"centres of sub-pixels, got {rays_per_pixel}")
    return level


def observer_position(seed, box_size_cMpc):
    """The observer's seeded random point in copy (0, 0, 0) of the first box, in Mpc."""
    rng = np.random.default_rng(np.random.SeedSequence([int(seed), 0x0B5E]))
    return rng.random(3) * box_size_cMpc


def sky_layout(shells):
    """The per-pixel arrays of a sky run: :data:`SKY_LAYOUT`, with the maps of each shell where there are shells."""
    if shells is None:
        return SKY_LAYOUT
    count = shells.n_bins
    return dict(SKY_LAYOUT, kernel_shells_boxes=(lambda r, m: (r, count, m), np.float64))


class SkyTracer(Tracer):
    """What one batch of pixels needs; :meth:`trace` is a pure function of the pixel indices (NESTED)."""

    def __init__(self, series, mass_eV, nside, rays_per_pixel, z_boxes, seed, photon_energy_eV, cosmology,
                 randomise_copies=True, shells=None):
        self._set_up(series, mass_eV, z_boxes, seed, photon_energy_eV, cosmology, shells)
        self.shells = shells
        self.nside = nside
        self.level = _sub_pixel_level(rays_per_pixel)
        self.randomise = bool(randomise_copies)
        self.observer = observer_position(seed, self.boxes[0].box_size_cMpc)
        # Blended snapshots share a grid and are mixed point by point: they must see the
        # same transform in each copy, or the blend would average two unrelated fields.
        self.copy_keys = [0 if series.blend else b for b in range(len(self.boxes))]

    def ray_directions(self, pixels):
        """Unit vectors of the sub-pixel centres of NESTED ``pixels``, (n_pixels * 4^level, 3)."""
        import healpy

        children = (np.asarray(pixels, dtype=np.int64)[:, None] * 4**self.level
                    + np.arange(4**self.level)[None, :]).ravel()
        return np.ascontiguousarray(np.array(healpy.pix2vec(self.nside * 2**self.level, children, nest=True)).T)

    def trace(self, pixels):
        directions = self.ray_directions(pixels)
        out = self._outputs(directions.shape[0])
        for span in range(self.plan.n_spans):
            trace_lattice(*self._lattice_arguments(span, directions), *out.values())
        per_pixel = 4**self.level
        return self._with_shells({name: values.reshape((len(pixels), per_pixel) + values.shape[1:]).mean(axis=1)
                                  for name, values in out.items()})

    def _with_shells(self, pixel):
        """A batch's per-pixel arrays, with each pixel's kernel per shell where the run has shells."""
        if self.shells is not None:
            pixel["kernel_shells_boxes"] = self.shells.cells_to_bins(pixel["kernel_cells"])
        return pixel

    def _lattice_arguments(self, span, directions):
        """The arguments of a lattice kernel for span ``span``, all but the outputs."""
        plan = self.plan
        box = int(plan.span_box[span])
        return (*self._span_arguments(span), float(plan.span_chi_a[span]), float(plan.span_chi_b[span]), directions,
                self.observer, float(self.boxes[box].box_size_cMpc), self.seed, self.copy_keys[box], CUBE_SYMMETRIES,
                self.randomise, *self._physics_arguments())


class GpuSkyTracer(GpuTracing, SkyTracer):
    """:class:`SkyTracer` on a GPU (:class:`~raytrace.tracing.gputrace.GpuTracing`); a pixel's rays are averaged
    on the device."""

    def __init__(self, *arguments):
        SkyTracer.__init__(self, *arguments)
        self._set_up_device(4**self.level, self._physics_resident() + [CUBE_SYMMETRIES, self.observer])

    def trace(self, pixels):
        return self._in_calls(pixels, self._trace_call)

    def _trace_call(self, pixels):
        cuda = self._gpu.cuda
        directions = self.ray_directions(pixels)
        n_rays = directions.shape[0]
        out = self._device_outputs(n_rays)
        sent = {}
        for span in range(self.plan.n_spans):
            self._launch(self._gpu.trace_lattice, n_rays, self._lattice_arguments(span, directions), out, sent)
        per_pixel = 4**self.level
        means = {}
        for name, values in out.items():
            columns = values.size // n_rays
            if columns == 0:  # no redshift cells: nothing to average, and a grid of no blocks is no launch
                means[name] = np.zeros((pixels.size,) + values.shape[1:])
                continue
            mean = cuda.device_array((pixels.size, columns))
            grid = ((pixels.size + 31) // 32, (columns + 3) // 4)
            self._gpu.average_rows[grid, (32, 4)](values.reshape(n_rays, columns), per_pixel, mean)
            means[name] = mean.copy_to_host().reshape((pixels.size,) + values.shape[1:])
        return self._with_shells(means)


def trace_sky(series, mass_eV, nside, z_max, seed=0, rays_per_pixel=1, n_jobs=1, include_background=True,
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
    level = _sub_pixel_level(rays_per_pixel)
    if not isinstance(ordering, str) or ordering not in ORDERINGS:
        raise InputError(f"ordering: expected 'RING' or 'NESTED', got {ordering!r}")
    z_max, photon_energy_eV = check_trace_options(z_max, photon_energy_eV, batch_pixels, "batch_pixels")
    check_run_memory(12 * nside * nside, mass.size, "nside and mass_eV (--nside, --mass-count)")
    plasma = check_background(plasma)
    z_boxes = boxes_redshift_range(series, plasma, z_max, z_boxes, include_background)
    device, device_note = choose_device(device, executor)
    npix = 12 * nside * nside
    edges = bin_edges(shells_z, z_boxes, z_max, include_background, "shells_z (--shells)")
    shells = None if edges is None else bin_setup(edges, np.zeros(0), mass, plasma, z_boxes)
    if shells is not None:  # a shell's maps take a third of a pixel's 48 bytes per mass
        check_run_memory(npix, mass.size * (1 + shells.n_bins / 3), "nside, mass_eV and shells_z (--nside, "
                         "--mass-count, --shells)")
    run = {
        "raytrace": __version__, "nside": nside, "ordering": ordering, "rays_per_pixel": 4**level,
        "z_max": float(z_max), "z_boxes": float(z_boxes), "include_background": bool(include_background),
        "seed": int(seed), "photon_energy_eV": photon_energy_eV, "batch_pixels": int(batch_pixels),
        "randomise_copies": bool(randomise_copies),
        "blend": series.blend, "mass_eV": mass.tolist(),
        "boxes": [box.describe() for box in series.boxes], "ionisation": plasma.ionisation.description,
        "cosmology": plasma.cosmology.name, "shell_edges_z": None if edges is None else edges.tolist(),
        **device_record(device, device_note),
    }
    warn_outside_probed_range(series, mass, z_boxes)
    tracer, executor = device_tracer(device, SkyTracer, GpuSkyTracer, (series, mass, nside, 4**level, z_boxes, seed,
                                     photon_energy_eV, plasma.cosmology, randomise_copies, shells), executor)
    kernel_background, dm_background = background_part(plasma, mass, z_boxes, z_max, include_background)
    backend = backend if backend is not None else MemoryBackend()
    # Pixels are traced in NESTED order (sub-pixels are then contiguous children) and
    # stored in that order; the result reorders to RING on request.
    arrays = run_batches(tracer, backend, mass, run, sky_layout(shells), FORMAT, npix, batch_pixels, n_jobs,
                         executor, progress, unit="pixel", description="sky")
    return Traced(mass, arrays, kernel_background, dm_background, run, series, plasma, backend, n_jobs)
