"""What a run will cost, measured here before it runs: its tracing rate and a worker's memory.

In: a tracer (sightlines or sky), the run's row count, batch size and threads.
Out: the rate in box cells per second at which the run's own rows trace on this
machine (:func:`sample_rate`: rows spread over the whole run, in the calls of a
run's progress steps, after a first call that compiles or loads the kernels),
and the bytes a worker holds (:func:`worker_bytes`: its boxes and a batch).
"""

import math
import time
from dataclasses import dataclass

import numba
import numpy as np

from raytrace.tracing.checks import numba_threads
from raytrace.tracing.progress import step_rows

_GOLDEN = (math.sqrt(5.0) - 1.0) / 2.0  # the golden-ratio sequence spreads rows evenly over the run
#: Bytes per ray and mass a tracer fills (kernel and near-tangent kernel float64, two int32 counts), and
#: per row and mass what a batch keeps (four float64 means, and the same again as stored).
_RAY_BYTES, _ROW_BYTES = 24, 64


def spread_rows(n_rows, first, count):
    """Rows first..first+count-1 of the golden-ratio sequence over 0..n_rows-1: any stretch of it is
    spread evenly over the run (every part of the sky, every stretch of redshift alike)."""
    return (np.modf(np.arange(first, first + count) * _GOLDEN)[0] * n_rows).astype(np.int64)


@dataclass(frozen=True)
class Rate:
    """A measured tracing rate: ``cells`` box cells in ``seconds`` on ``threads`` threads, over ``rows`` rows;
    ``first_call`` seconds more than its rows took the first call (loading or compiling the kernels)."""

    cells: float
    seconds: float
    threads: int
    rows: int
    first_call: float

    @property
    def per_second(self):
        return self.cells / self.seconds


def sample_rate(tracer, n_rows, n_jobs, batch_rows, seconds=4.0):
    """The :class:`Rate` of ``tracer`` on ``n_jobs`` threads, on rows spread over the run, traced in the
    steps a run with a progress bar takes, for about ``seconds`` (at most every row once)."""
    cells = tracer.cells_per_row()
    with numba_threads(n_jobs):
        threads = numba.get_num_threads()
        step = step_rows(batch_rows, threads, cells)
        start = time.perf_counter()
        tracer.trace(spread_rows(n_rows, 0, min(step, n_rows)))  # compiles, or loads the kernels
        first_call = time.perf_counter() - start
        done, elapsed, calls = 0, 0.0, 1
        while elapsed < seconds and done < n_rows:
            count = min(calls * step, n_rows - done)
            start = time.perf_counter()
            for first in range(done, done + count, step):
                tracer.trace(spread_rows(n_rows, first + step, min(step, done + count - first)))
            elapsed += time.perf_counter() - start
            done, calls = done + count, 2 * calls
    return Rate(done * cells, elapsed, threads, done, max(0.0, first_call - min(step, n_rows) * elapsed / done))


def worker_bytes(tracer, batch_rows):
    """(bytes of the boxes, whether all are memory-mapped, bytes of one batch) that a worker holds."""
    boxes = sum(box.data.nbytes for box in tracer.boxes)
    mapped = all(isinstance(box.data, np.memmap) for box in tracer.boxes)
    masses = tracer.mass2.size
    batch = batch_rows * masses * (tracer.rays_per_row * _RAY_BYTES + _ROW_BYTES)
    return boxes, mapped, batch
