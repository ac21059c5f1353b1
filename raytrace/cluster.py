"""Sightline batches on a dask.distributed cluster.

In: a scheduler address (``'local'`` for a cluster of processes on this
machine, or a ready ``distributed.Client``), then, from
``cast_sightlines(executor=...)`` or ``cast_sky(executor=...)``, the run's
tracer and its batches
(batch index, first ray, stop). Out: ``(batch, start, arrays)`` for each batch
as soon as it completes, in any order, so the backend checkpoints each one.

Boxes never travel through the scheduler: the tracer goes out once per run
without them (its plan and mass targets: small arrays), with each box's
``load_arguments``, and every worker reopens the box files itself (a shared
file system) and keeps the rebuilt tracer for the run's later batches. Ray i's
numbers depend on (seed, i) alone and the tracer's arrays are the client's own,
so the result is bit-identical to the serial run.

dask and distributed are optional (``pip install 'raytrace[dist]'``); this
module imports them only when an executor is made.
"""

import itertools
import os
import threading
import time

from .errors import InputError

_WHAT = "scheduler (--scheduler, TOML rays.scheduler)"

# Per worker process: the tracer of the latest run, keyed by the token of its recipe.
# One run at a time is kept so that a long-lived worker does not hold old boxes.
_TRACERS = {}
_TRACERS_LOCK = threading.Lock()


def _distributed():
    try:
        import distributed
    except ModuleNotFoundError:
        raise InputError(
            f"{_WHAT}: cluster runs need dask.distributed, which is not installed; "
            "install it with: pip install 'raytrace[dist]'"
        ) from None
    return distributed


def tracer_recipe(tracer):
    """What a worker needs to rebuild ``tracer``: its state without the boxes, and how to reopen them."""
    for index, box in enumerate(tracer.boxes):
        if box.load_arguments is None:
            raise InputError(
                f"{_WHAT}: cluster runs need boxes read from files, which every worker reopens; "
                f"box {index} (z = {box.redshift:g}) is an in-memory array: save it to HDF5 and load it "
                "with raytrace.load_box, or run without a scheduler"
            )
    return {
        "kind": type(tracer),
        "state": tracer.state(),
        "boxes": [box.load_arguments for box in tracer.boxes],
        "checksums": [box.checksum for box in tracer.boxes],
    }


def rebuild_tracer(recipe):
    """The tracer of ``recipe`` with its boxes reopened from their files (on a worker)."""
    from .boxes import load_box

    boxes = [load_box(**arguments) for arguments in recipe["boxes"]]
    for box, checksum in zip(boxes, recipe["checksums"]):
        if box.checksum != checksum:
            raise InputError(
                f"{box.path}: the file a worker reads is not the one the run started with "
                f"(checksum {box.checksum}, expected {checksum}); the boxes must not change during a run "
                "and every worker must see the same files (a shared file system)"
            )
    return recipe["kind"].from_state(recipe["state"], boxes)


def trace_batch(token, recipe, start, stop, numba_threads):
    """Run on a worker: the arrays of rays start..stop-1 (the tracer is built on first use)."""
    from .engine import numba_threads as threads

    with _TRACERS_LOCK:
        tracer = _TRACERS.get(token)
        if tracer is None:
            tracer = rebuild_tracer(recipe)
            _TRACERS.clear()
            _TRACERS[token] = tracer
    with threads(numba_threads):
        return tracer.trace(range(start, stop))


class DaskExecutor:
    """Runs the batches of ``cast_sightlines`` or ``cast_sky`` on dask.distributed workers.

    Parameters
    ----------
    scheduler : a scheduler address ('tcp://host:8786'), 'local' for a
        LocalCluster of ``workers`` processes with one thread each, or a
        ``distributed.Client`` (left open afterwards).
    workers : processes of the local cluster (default: one per core).
    numba_threads : numba threads per task on the workers (1 with one task per core).
    max_in_flight : tasks submitted but not yet collected (default: twice the
        cluster's threads, at least 4), which bounds the results held in memory.
    connect_timeout : seconds to wait for the scheduler at an address.

    Use as a context manager around the run (the connection, or the local
    cluster, lasts for the block); called outside one, it connects for the run.
    """

    def __init__(self, scheduler, workers=None, numba_threads=1, max_in_flight=None, connect_timeout=30):
        distributed = _distributed()
        if not isinstance(scheduler, (str, distributed.Client)) or scheduler == "":
            raise InputError(f"{_WHAT}: expected a scheduler address or 'local', got {scheduler!r}")
        for name, value in (("workers", workers), ("max_in_flight", max_in_flight)):
            if value is not None and (isinstance(value, bool) or not isinstance(value, int) or value < 1):
                raise InputError(f"{name}: expected a whole number >= 1, got {value!r}")
        if isinstance(numba_threads, bool) or not isinstance(numba_threads, int) or not (numba_threads >= 1 or numba_threads == -1):
            raise InputError(f"numba_threads: expected a whole number >= 1 or -1 (all cores), got {numba_threads!r}")
        if workers is not None and scheduler != "local":
            raise InputError(f"workers (--workers, TOML rays.workers): sizes a local cluster only (--scheduler local), "
                             f"not the cluster at {scheduler!r}")
        self.scheduler = scheduler
        self.workers = workers
        self.numba_threads = numba_threads
        self.max_in_flight = max_in_flight
        self.connect_timeout = connect_timeout
        self.client = None
        self._owned = []

    def __enter__(self):
        distributed = _distributed()
        if isinstance(self.scheduler, distributed.Client):
            self.client = self.scheduler
        elif self.scheduler == "local":
            cluster = distributed.LocalCluster(n_workers=self.workers or os.cpu_count(), threads_per_worker=1,
                                               processes=True)
            self._owned.append(cluster)
            self.client = distributed.Client(cluster)
            self._owned.insert(0, self.client)
        else:
            try:
                self.client = distributed.Client(self.scheduler, timeout=self.connect_timeout)
            except (OSError, TimeoutError, ValueError) as error:
                raise InputError(f"{_WHAT}: cannot reach a dask scheduler at {self.scheduler!r} ({error})") from None
            self._owned.append(self.client)
        return self

    def __exit__(self, *exc):
        for thing in self._owned:
            thing.close()
        self._owned = []
        self.client = None

    def prepare(self, tracer):
        """Refuse, before the run writes anything, a tracer the workers could not rebuild."""
        tracer_recipe(tracer)

    def __call__(self, tracer, batches):
        """Yield ``(batch, start, arrays)`` for each ``(batch, start, stop)`` as it completes."""
        recipe = tracer_recipe(tracer)
        if not batches:
            return
        if self.client is None:
            with self:
                yield from self._run(recipe, batches)
        else:
            yield from self._run(recipe, batches)

    def _run(self, recipe, batches):
        from dask.base import tokenize

        distributed = _distributed()
        client = self.client
        token = tokenize(recipe)
        # A batch-system cluster may still be waiting for its first job to start.
        client.wait_for_workers(1)
        shared = client.scatter([recipe], broadcast=True)[0]
        queue = iter(batches)
        where = {}
        running = distributed.as_completed()

        recount = [0.0, 0]  # when to re-read the cluster's size, and the limit it gave

        def top_up():
            # Batch-system clusters grow as their jobs start: re-read the size now and then.
            if time.monotonic() >= recount[0]:
                recount[:] = [time.monotonic() + 10.0,
                              self.max_in_flight or max(4, 2 * sum(client.nthreads().values()))]
            for batch, start, stop in itertools.islice(queue, max(0, recount[1] - len(where))):
                future = client.submit(trace_batch, token, shared, start, stop, self.numba_threads, pure=False)
                where[future] = (batch, start)
                running.add(future)

        try:
            top_up()
            for future in running:
                arrays = future.result()
                batch, start = where.pop(future)
                top_up()
                yield batch, start, arrays
        finally:
            # A failed batch or an abandoned run must not leave the cluster busy.
            if where:
                client.cancel(list(where))
            client.cancel([shared])
