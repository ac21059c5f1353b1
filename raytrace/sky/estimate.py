"""A sky run sized before it runs (``raytrace sky --estimate``).

In: a sky run's arguments (those of :func:`~raytrace.sky.maps.cast_sky`), its
threads and the time its command started. Out: :class:`SkyEstimate`: the box
cells to trace, the result's size on disk, the memory of a worker, the run's
fixed costs as measured here (set-up, and its built-in one-point check, which
is computed: it is the run's own), the tracing rate measured on a short sample
of the run's own pixels here (:func:`raytrace.tracing.sizing.sample_rate`), and
the command's summary after the run (``summary``: timed here on a stand-in sky
of nside 64 and scaled to the run's pixels), with the wall time they give, on
this machine and on a cluster of N threads.
"""

import resource
import time
from dataclasses import dataclass

from raytrace.statistics.meancheck import SKY_CHECK_POINTS, check_groups
from raytrace.tracing.backends import size_text
from raytrace.tracing.lattice import plan_sky
from raytrace.tracing.sizing import sample_rate, worker_bytes


@dataclass(frozen=True)
class SkyEstimate:
    """What a sky run will take: sizes in bytes, times in seconds (see the module docstring)."""

    n_pixels: int
    rays_per_pixel: int
    n_masses: int
    cells: float
    result_bytes: int
    boxes_bytes: int
    boxes_mapped: bool
    batch_pixels: int
    batch_bytes: int
    process_bytes: int
    planned_seconds: float
    check_seconds: float
    summary_seconds: float
    rate: object

    @property
    def tracing_seconds(self):
        return self.cells / self.rate.per_second

    @property
    def wall_seconds(self):
        return self.setup_seconds + self.check_seconds + self.tracing_seconds + self.summary_seconds

    @property
    def setup_seconds(self):
        """From the command's start to its first pixel: boxes, plan, and loading (or compiling) the kernels."""
        return self.planned_seconds + self.rate.first_call

    def lines(self):
        """The estimate in words, one fact a line."""
        rate = self.rate
        per_thread = rate.per_second / rate.threads
        return [
            f"cells to trace: {self.cells:.3g} ({self.n_pixels} pixels x {self.rays_per_pixel} rays x "
            f"{self.cells / self.n_pixels / self.rays_per_pixel:.0f} box cells each), {self.n_masses} masses",
            f"result on disk: {size_text(self.result_bytes)}",
            f"memory per worker: {size_text(self.process_bytes)} as this process holds it after its sample (libraries, "
            f"kernels, boxes: {size_text(self.boxes_bytes)}"
            + (", memory-mapped: shared by a node's workers" if self.boxes_mapped else ", read into memory")
            + f") + {size_text(self.batch_bytes)} per batch of {self.batch_pixels} pixels",
            f"rate here: {rate.per_second / 1e6:.3g} M cells/s on {rate.threads} threads "
            f"({per_thread / 1e6:.3g} M cells/s per thread), measured on {rate.rows} of the run's pixels in "
            f"{rate.seconds:.1f} s",
            f"expected wall time here: {_duration(self.wall_seconds)} (set-up {_duration(self.setup_seconds)}, "
            f"one-point check {_duration(self.check_seconds)}, tracing {_duration(self.tracing_seconds)}, "
            f"summary {_duration(self.summary_seconds)}); FITS maps add a read of every map",
            f"on a cluster of N threads like these: tracing {_duration(self.cells / per_thread)} / N "
            f"({self.cells / per_thread / 3600:.3g} thread-hours)",
        ]


def estimate_sky(series, mass_eV, nside, z_max, n_jobs=1, started=None, summary=None, sample_seconds=4.0,
                 **options):
    """The :class:`SkyEstimate` of ``cast_sky(series, mass_eV, nside, z_max, n_jobs=n_jobs, **options)``,
    tracing only a sample of its pixels; ``started``: the ``time.perf_counter()`` of the command's start;
    ``summary(sky)``: what the command does with the finished sky (timed on a stand-in)."""
    started = time.perf_counter() if started is None else started
    plan = plan_sky(series, mass_eV, nside, z_max, **options)
    setup = time.perf_counter() - started
    begun = time.perf_counter()
    check_groups(plan.series, plan.plasma, n_jobs, SKY_CHECK_POINTS)(plan.run)  # the run's own check, computed
    check = time.perf_counter() - begun
    batch = plan.run["batch_pixels"]
    rate = sample_rate(plan.tracer, plan.n_pixels, n_jobs, batch, sample_seconds)
    boxes, mapped, batch_bytes = worker_bytes(plan.tracer, batch)
    process = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024  # kB on Linux
    summary = 0.0 if summary is None else _timed_on_a_stand_in(summary, plan) * plan.n_pixels / (12 * STAND_IN**2)
    return SkyEstimate(plan.n_pixels, plan.tracer.rays_per_row, plan.mass_eV.size,
                       plan.n_pixels * plan.tracer.cells_per_row(), plan.result_bytes(), boxes, mapped, batch,
                       batch_bytes, process, setup, check, summary, rate)


#: nside of the stand-in sky on which the summary is timed (its cost grows with the pixels).
STAND_IN = 64


def _timed_on_a_stand_in(summary, plan):
    """Seconds ``summary`` takes on a sky of nside :data:`STAND_IN` with the run's masses (log-normal maps)."""
    import numpy as np

    from raytrace.sky.maps import SkyResult

    n_pixels, masses = 12 * STAND_IN**2, plan.mass_eV.size
    rng = np.random.default_rng(0)
    maps = rng.lognormal(0.0, 0.5, (n_pixels, masses))
    # With splits the summary also computes their spectra and limits: the stand-in has splits too.
    splits = rng.lognormal(0.0, 0.5, (n_pixels, 2, masses)) if plan.run["split_rays"] else None
    sky = SkyResult(plan.mass_eV, maps, np.zeros(masses), maps, np.zeros(n_pixels), 0.0,
                    dict(plan.run, nside=STAND_IN), kernel_splits=splits)
    begun = time.perf_counter()
    summary(sky)
    return time.perf_counter() - begun


def _duration(seconds):
    """Seconds in the unit people plan with: '42 s', '12.5 min', '7.3 h', '3.1 days'."""
    for unit, size in (("days", 86400.0), ("h", 3600.0), ("min", 60.0)):
        if seconds >= 2 * size:
            return f"{seconds / size:.3g} {unit}"
    return f"{seconds:.3g} s"
