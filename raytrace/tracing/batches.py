"""Rows (rays or pixels) traced in batches into a backend, here on numba threads or on a cluster.

In: a tracer (a pure function of row indices), a backend, the run record and
what its result file holds besides the rows. Out: the backend's result file,
every batch written as it completes (and given to a reducer), resumable; a
progress bar in box cells per second with the time left.
"""

import sys
from dataclasses import dataclass

import numba
import numpy as np

from raytrace.core.errors import InputError
from raytrace.core.provenance import InputWatch
from raytrace.tracing.checks import numba_threads
from raytrace.tracing.progress import compile_notice, step_rows


def check_backend_and_executor(backend, executor):
    """An InputError saying what a backend and an executor must be, where they are not."""
    needed = ("open", "completed_batches", "write_batch", "read_rows", "finish")
    if not all(callable(getattr(backend, name, None)) for name in needed):
        raise InputError("backend: expected raytrace.tracing.backends.MemoryBackend() or HDF5Backend(path), "
                         f"got {backend!r}")
    if executor is not None and not callable(executor):
        raise InputError(f"executor: expected None or a callable executor(tracer, batches) such as "
                         f"raytrace.DaskExecutor('local'), got {executor!r}")


def run_batches(tracer, backend, mass, run, layout, format_name, n_rows, batch_size, n_jobs, executor, progress,
                description, contents, reducer=None):
    """Trace rows 0..n_rows-1 (rays or pixels) in batches into ``backend`` (its result file, made with
    ``contents``: :class:`~raytrace.tracing.backends.Contents`); the caller finishes it (``backend.finish``).

    Batches the backend already holds (a resumed checkpoint) are skipped; the rest
    run here on ``n_jobs`` numba threads, or through ``executor`` (a cluster), each
    written to the backend as it completes, then given to ``reducer`` (``add(batch,
    start, arrays)``; a resume gives it the finished batches' rows of ``reducer.names``
    first). The box files must not change meanwhile:
    their size and modification time are compared after every batch, their
    checksums once at the end (InputError naming the file).
    """
    from tqdm.auto import tqdm  # here: the CLI's --help does not pay for it

    check_backend_and_executor(backend, executor)
    if executor is not None and hasattr(executor, "prepare"):
        executor.prepare(tracer)
    watch = InputWatch([(box.path, box.checksum) for box in tracer.boxes if box.path is not None])
    starts = list(range(0, n_rows, batch_size))
    backend.open(mass, n_rows, run, len(starts), layout, format_name, contents)
    done = backend.completed_batches()
    todo = [(b, s, min(s + batch_size, n_rows)) for b, s in enumerate(starts) if not done[b]]
    if reducer is not None:
        for b in np.flatnonzero(done):
            reducer.add(b, starts[b], backend.read_rows(starts[b], min(starts[b] + batch_size, n_rows), reducer.names))
    cells = tracer.cells_per_row()  # every row is as long: the bar counts cells, so it shows cells/s
    left = sum(stop - start for _, start, stop in todo)
    with tqdm(total=round(n_rows * cells), initial=round((n_rows - left) * cells), unit="cell", unit_scale=True,
              desc=description, disable=not progress, smoothing=0.05) as bar:
        if executor is None:
            with numba_threads(n_jobs):
                # Without a bar, one call per batch; with one, steps small enough for it to move.
                step = step_rows(batch_size, numba.get_num_threads(), cells) if progress else batch_size
                for number, (b, start, stop) in enumerate(todo):
                    # Small steps move the bar per group of rays; each row is traced on its own,
                    # so the arrays are the same bits as one call for the batch.
                    parts = []
                    for first in range(start, stop, step):
                        with compile_notice(progress and number == 0 and first == start,
                                            lambda text: bar.write(text, file=sys.stderr)):
                            parts.append(tracer.trace(range(first, min(first + step, stop))))
                        bar.update(round(min(first + step, stop) * cells) - round(first * cells))
                    watch.quick()  # before the write: a batch that read a changed box is never stored
                    _store(backend, reducer, b, start, joined(parts))
        else:
            for b, start, arrays in executor(tracer, todo):
                watch.quick()
                _store(backend, reducer, b, start, arrays)
                bar.update(round(len(next(iter(arrays.values()))) * cells))
    watch.final()


def joined(parts):
    """The per-row arrays of consecutive groups of rows, as one."""
    return parts[0] if len(parts) == 1 else {name: np.concatenate([part[name] for part in parts]) for name in parts[0]}


def _store(backend, reducer, batch, start, arrays):
    backend.write_batch(batch, start, arrays)
    if reducer is not None:
        reducer.add(batch, start, arrays)


@dataclass(frozen=True, eq=False)
class Traced:
    """A finished trace: its backend (``finish`` gives its result file, open for reading) and what a
    result is built from."""

    backend: object
    run: dict
    series: object
    plasma: object
    n_jobs: object
    #: What took the batches' redshift cells (``reducer`` of :func:`run_batches`), where there were any.
    reducer: object = None
