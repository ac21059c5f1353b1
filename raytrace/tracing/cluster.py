"""Sightline batches on a dask.distributed cluster.

In: a scheduler address (``'local'`` for a cluster of processes on this
machine, or a ready ``distributed.Client``), then, from
``cast_sightlines(executor=...)`` or ``cast_sky(executor=...)``, the run's
tracer and its batches
(batch index, first ray, stop). Out: ``(batch, start, arrays)`` for each batch
as soon as it completes, in any order, so the client writes each one into the
run's result file (:mod:`raytrace.tracing.backends`) as it arrives: a killed
client resumes from that file, and holds no more than the batches in flight.

Boxes never travel through the scheduler: the tracer goes out once per run
without them (its plan and mass targets: small arrays), with each box's
``load_arguments``, and every worker reopens the box files itself (a shared
file system; contiguous boxes are memory-mapped, shared by a node's workers)
and keeps the rebuilt tracer for the run's later batches. Ray i's
numbers depend on (seed, i) alone and the tracer's arrays are the client's own,
so the result is bit-identical to the serial run.

A worker may leave at any time: the recipe is a task's result (recomputed when
its holder leaves), a batch lost with its worker is submitted again, and a run
left with no worker waits for one, saying so every 30 s; a local cluster's
workers are started again meanwhile, and after ``worker_timeout`` without any
worker the run stops with one line (the finished batches stay in the
checkpoint, for --resume). A scheduler that goes away stops the run the same way.

dask and distributed are optional (``pip install 'raytrace[dist]'``); this
module imports them only when an executor is made.
"""

import os
import threading
import time
import warnings

from raytrace.core.errors import InputError, RaytraceWarning, require_number

_WHAT = "scheduler (--scheduler, TOML rays.scheduler)"
_WAIT_S = 30.0     # seconds without a worker (or any finished batch) before saying so
_MAX_LOSSES = 5    # times one batch may be lost with its worker before the run stops
#: Seconds without any worker after which a run stops: a local cluster's workers are started again
#: meanwhile, so this long means they cannot start; a remote cluster may be waiting for its batch jobs.
LOCAL_WORKER_TIMEOUT_S = 300.0
REMOTE_WORKER_TIMEOUT_S = 3600.0
_RESTART_S = 60.0  # seconds without a worker before a local cluster's workers are started again (and between restarts)

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
    from raytrace.boxes import load_box

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
    from raytrace.tracing.checks import numba_threads as threads

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
    worker_timeout : seconds a run waits without any worker before it stops, the finished
        batches kept (default: :data:`LOCAL_WORKER_TIMEOUT_S` for 'local',
        :data:`REMOTE_WORKER_TIMEOUT_S` otherwise).

    Use as a context manager around the run (the connection, or the local
    cluster, lasts for the block); called outside one, it connects for the run.
    """

    def __init__(self, scheduler, workers=None, numba_threads=1, max_in_flight=None, connect_timeout=30,
                 worker_timeout=None):
        distributed = _distributed()
        if not isinstance(scheduler, (str, distributed.Client)) or scheduler == "":
            raise InputError(f"{_WHAT}: expected a scheduler address or 'local', got {scheduler!r}")
        workers, max_in_flight = (None if value is None else require_number(value, name, whole=True, at_least=1)
                                  for name, value in (("workers", workers), ("max_in_flight", max_in_flight)))
        numba_threads = require_number(numba_threads, "numba_threads", whole=True, at_least=-1,
                                       expected="a whole number >= 1 or -1 (all cores)")
        if numba_threads == 0:
            raise InputError("numba_threads: expected a whole number >= 1 or -1 (all cores), got 0")
        connect_timeout = require_number(connect_timeout, "connect_timeout", above=0)
        default = LOCAL_WORKER_TIMEOUT_S if scheduler == "local" else REMOTE_WORKER_TIMEOUT_S
        self.worker_timeout = default if worker_timeout is None else require_number(worker_timeout, "worker_timeout",
                                                                                     above=0)
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
        self._cluster = None  # the local cluster this executor started, whose workers it may start again
        self._restarted = 0.0  # when its workers were last started again (time.monotonic)

    def __enter__(self):
        distributed = _distributed()
        if isinstance(self.scheduler, distributed.Client):
            self.client = self.scheduler
        elif self.scheduler == "local":
            # Started empty and then scaled: a worker that dies while starting is replaced in the
            # background instead of failing the cluster's start (LocalCluster(n_workers=...) raises).
            cluster = distributed.LocalCluster(n_workers=0, threads_per_worker=1, processes=True)
            cluster.scale(self.workers or os.cpu_count())
            self._owned.append(cluster)
            self._cluster = cluster
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
            if thing is self._cluster:
                _close_local_cluster(thing)
            else:
                thing.close()
        self._owned = []
        self.client = None
        self._cluster = None

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
        self._wait_for_workers(client)
        shared = self._submit_recipe(client, recipe, token)
        queue = list(reversed(batches))  # popped from the end: batches go out in order, lost ones first
        where = {}
        losses = {}
        recount = [0.0, 0]  # when to re-read the cluster's size, and the limit it gave

        def top_up():
            # Batch-system clusters grow as their jobs start: re-read the size now and then.
            if time.monotonic() >= recount[0]:
                recount[:] = [time.monotonic() + 10.0,
                              self.max_in_flight or max(4, 2 * sum(client.nthreads().values()))]
            while queue and len(where) < recount[1]:
                batch, start, stop = queue.pop()
                future = client.submit(trace_batch, token, shared, start, stop, self.numba_threads, pure=False)
                where[future] = (batch, start, stop)

        try:
            top_up()
            quiet_since = time.monotonic()
            while where:
                try:
                    done, _ = distributed.wait(list(where), timeout=_WAIT_S, return_when="FIRST_COMPLETED")
                except TimeoutError:
                    done = ()
                except distributed.client.FuturesCancelledError as error:
                    self._refuse_if_scheduler_lost(client, error)
                    done = [future for future in where if future.cancelled()]  # lost: submitted again below
                if not done:
                    if not client.nthreads():
                        self._no_workers(quiet_since)
                    else:
                        quiet_since = time.monotonic()
                    continue
                quiet_since = time.monotonic()
                for future in done:
                    batch, start, stop = where.pop(future)
                    try:
                        arrays = future.result()
                    except _lost_errors(distributed) as error:
                        shared = self._resubmit(client, recipe, token, shared, batch, losses, error)
                        queue.append((batch, start, stop))
                        continue
                    yield batch, start, arrays
                top_up()
        except (OSError, distributed.client.FuturesCancelledError) as error:  # the connection to the scheduler
            self._refuse_if_scheduler_lost(client, error)
            raise
        finally:
            # A failed batch or an abandoned run must not leave the cluster busy.
            if client.status == "running":
                if where:
                    client.cancel(list(where))
                client.cancel([shared])

    @staticmethod
    def _submit_recipe(client, recipe, token):
        # The recipe goes out as a task's result, not as scattered data: when the worker
        # holding it leaves, the scheduler recomputes it from the task (a broadcast
        # scatter fails, or retries replication forever, when a worker leaves early).
        return client.submit(_recipe, recipe, key=f"raytrace-recipe-{token}-{time.monotonic_ns()}", pure=False)

    def _resubmit(self, client, recipe, token, shared, batch, losses, error):
        """Count a batch lost with its worker; refuse after too many; return the recipe future to use."""
        losses[batch] = losses.get(batch, 0) + 1
        if losses[batch] > _MAX_LOSSES:
            raise InputError(
                f"{_WHAT}: batch {batch} was lost with its worker {losses[batch]} times "
                f"({type(error).__name__}); the workers keep dying (out of memory?); the finished batches "
                "are kept: rerun with --resume"
            )
        if shared.status in ("error", "cancelled", "lost"):
            return self._submit_recipe(client, recipe, token)
        return shared

    def _wait_for_workers(self, client):
        """Block until a worker is there, saying so every while: a cluster may be waiting for its jobs."""
        started = time.monotonic()
        while True:
            try:
                client.wait_for_workers(1, timeout=_WAIT_S)
                return
            except (TimeoutError, OSError):
                self._no_workers(started)

    def _no_workers(self, since):
        """No worker since ``since``: say so, start a local cluster's workers again, stop after worker_timeout."""
        waited = time.monotonic() - since
        if waited >= self.worker_timeout:
            raise InputError(f"{_WHAT}: no dask worker at {self._address()} for {waited:.0f} s (worker_timeout "
                             f"{self.worker_timeout:g} s); stopped: the finished batches are kept, rerun with "
                             "--resume once workers can start")
        self._say_waiting(since)
        if self._cluster is not None and time.monotonic() - max(since, self._restarted) >= _RESTART_S:
            # Workers killed while starting may never be replaced by their nannies: start fresh ones.
            self._restarted = time.monotonic()
            self._cluster.scale(0)
            self._cluster.scale(self.workers or os.cpu_count())

    def _say_waiting(self, since):
        restart = (f"; the local cluster's workers are started again every {_RESTART_S:g} s" if self._cluster is not None
                   else "")
        warnings.warn(RaytraceWarning(
            f"{_WHAT}: no dask worker at {self._address()} for {time.monotonic() - since:.0f} s{restart}; waiting "
            f"up to {self.worker_timeout:g} s for one (interrupt to stop; the finished batches are kept)"))

    def _refuse_if_scheduler_lost(self, client, error):
        """One line (InputError) when the connection to the scheduler is gone; otherwise return."""
        if client.status == "running" and client.scheduler_info().get("address"):
            return
        raise InputError(f"{_WHAT}: the dask scheduler at {self._address()} went away ({type(error).__name__}); "
                         "the finished batches are kept: rerun with --resume") from None

    def _address(self):
        return self.scheduler if isinstance(self.scheduler, str) else "the given client's scheduler"


def _close_local_cluster(cluster):
    """Close a local cluster this executor started, whose workers may have been started again.

    distributed's cluster watches the scheduler's worker events and, for a worker that left,
    looks up its name in the cluster's copy of the scheduler's worker table; a worker retired
    (by a restart) before that copy saw it is no longer there, and the KeyError is re-raised
    when the cluster closes (dask/distributed issue 5407, seen here after a restart). It comes
    after the cluster has closed its workers and scheduler, and every batch is in by then; the
    cluster is ours and thrown away, so that error alone is passed over.
    """
    try:
        cluster.close()
    except KeyError as error:
        if not str(error).strip("'").startswith(("tcp://", "inproc://", "tls://", "ucx://")):
            raise


def _recipe(recipe):
    """The recipe itself, as a task's result that the scheduler can recompute."""
    return recipe


def _lost_errors(distributed):
    """Errors of a batch whose worker left (not of the batch itself): it is submitted again."""
    from distributed.comm.core import CommClosedError

    return (distributed.KilledWorker, CommClosedError, distributed.client.FutureCancelledError)
