"""Tracing on a CUDA GPU: what the GPU's sightline and sky tracers share, their rays spread over GPU threads.

In: a tracer's boxes, plan and targets (:class:`GpuTracing` is mixed into the CPU's
tracers: ``GpuRayTracer`` in :mod:`raytrace.tracing.sightlines`, ``GpuSkyTracer`` in
:mod:`raytrace.tracing.lattice`). Out: the same per-row arrays as on the CPU, from the
kernels of :mod:`raytrace.kernels.gpu`.

Memory and transfers: the boxes (float32, as stored) and the run's tables go to
the device once per run. A series larger than a third of the device's free
memory is sent span by span instead, on every call (said once, as a warning).
Each call sends its rays' geometry, runs every span with the rows resident on the
device, averages a sky pixel's rays there, and copies the rows back once. A call
is at most :attr:`GpuTracing.rows_per_call` rows: enough rays to keep every
multiprocessor busy, within a tenth of the free memory; :func:`trace_on_device`
groups a run's batches into such calls, so the batch size stays the checkpoint's
granularity alone. Every ray is traced on its own by one thread, so the rows do
not depend on how they are grouped.
"""

import warnings

import numpy as np

from raytrace.core.errors import RaytraceWarning

#: Threads per block. A thread traces one ray and shares nothing with its block, so the size changes no row.
THREADS_PER_BLOCK = 128
#: Rays per multiprocessor in one call: several times what it holds at once (~10 warps at ~200 registers
#: a thread), so that the last rays of a call do not leave it idle for long.
RAYS_PER_MULTIPROCESSOR = 4096
#: Bytes per ray on the device besides its rows: geometry (starts and directions of a few segments) and headroom.
_RAY_BYTES = 512


class GpuTracing:
    """What both GPU tracers share: the run's device copies, launches, and the size of a call."""

    device = "gpu"

    def _set_up_device(self, rays_per_row, resident):
        """Send the boxes and the ``resident`` arrays to the device; size the calls for ``rays_per_row`` rays a row."""
        from raytrace.kernels import gpu

        self._gpu = gpu
        cuda = gpu.cuda
        free, _ = cuda.current_context().get_memory_info()
        box_bytes = sum(box.data.nbytes for box in self.boxes)
        self._boxes = {id(box.data) for box in self.boxes}
        self._boxes_resident = box_bytes <= free / 3
        if not self._boxes_resident:
            warnings.warn(RaytraceWarning(
                f"device (--device): the boxes ({box_bytes / 1e9:.3g} GB) need more than a third of the GPU's free "
                f"memory ({free / 1e9:.3g} GB); each call sends them to it span by span"), stacklevel=4)
        else:
            resident = list(resident) + [box.data for box in self.boxes]
        self._resident = {id(array): (array, cuda.to_device(np.ascontiguousarray(array))) for array in resident}
        free, _ = cuda.current_context().get_memory_info()
        multiprocessors = getattr(cuda.get_current_device(), "MULTIPROCESSOR_COUNT", 1)
        row_bytes = rays_per_row * (self.mass2.size * (24 + 8 * self.cell_count) + 8 + _RAY_BYTES)
        self.rows_per_call = int(max(1, min(multiprocessors * RAYS_PER_MULTIPROCESSOR // rays_per_row,
                                            min(free, 2.0**62) / 10 / row_bytes)))

    def _physics_resident(self):
        plan = self.plan
        return [plan.one_plus_z, plan.hubble_over_c, self.targets, self.ln_targets, self.mass2, self.cell_edges]

    def _launch(self, kernel, n_rays, arguments, out, sent):
        """Run ``kernel`` over ``n_rays`` threads; host arrays among ``arguments`` go as the run's resident
        copies, or are sent now and kept in ``sent`` for the rest of the call (boxes: for this span only)."""
        cuda = self._gpu.cuda
        on_device = []
        for value in arguments:
            if isinstance(value, np.ndarray):
                if id(value) in self._resident:
                    value = self._resident[id(value)][1]
                else:
                    if id(value) not in sent:
                        sent[id(value)] = (value, cuda.to_device(np.ascontiguousarray(value)))
                    value = sent[id(value)][1]
            on_device.append(value)
        blocks = (n_rays + THREADS_PER_BLOCK - 1) // THREADS_PER_BLOCK
        kernel[blocks, THREADS_PER_BLOCK](*on_device, *out.values())
        for key in self._boxes & sent.keys():
            del sent[key]

    def _device_outputs(self, n_rays):
        return {name: self._gpu.cuda.to_device(values) for name, values in self._outputs(n_rays).items()}

    def _in_calls(self, rows, trace_call):
        """trace_call over ``rows`` in parts of at most :attr:`rows_per_call`, joined."""
        rows = np.asarray(rows, dtype=np.int64)
        if rows.size <= self.rows_per_call:
            return trace_call(rows)
        step = self.rows_per_call
        parts = [trace_call(rows[first:first + step]) for first in range(0, rows.size, step)]
        return {name: np.concatenate([part[name] for part in parts]) for name in parts[0]}


def trace_on_device(tracer, batches):
    """The executor of a GPU run (see :func:`~raytrace.tracing.batches.run_batches`): consecutive ``batches``
    (batch, start, stop) traced together in calls of up to ``tracer.rows_per_call`` rows; yields
    (batch, start, arrays) for each."""
    group = []
    for batch in [*batches, None]:
        if group and (batch is None or sum(stop - start for _, start, stop in group) + batch[2] - batch[1]
                      > tracer.rows_per_call):
            arrays = tracer.trace(np.concatenate([np.arange(start, stop) for _, start, stop in group]))
            offset = 0
            for number, start, stop in group:
                yield number, start, {name: values[offset:offset + stop - start] for name, values in arrays.items()}
                offset += stop - start
            group = []
        if batch is not None:
            group.append(batch)
