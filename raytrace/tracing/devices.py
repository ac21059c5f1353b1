"""Which device traces a run: the CPU, or a CUDA GPU through numba-cuda.

In: the run's ``device`` option ("cpu", "gpu" or "auto") and whether a cluster
traces the run. Out: the device used, and a note for the run record where "auto"
settled on the CPU; the tracer of that device and the executor that feeds it.
The GPU's kernels (:mod:`raytrace.kernels.gpu`, and with them numba.cuda) are imported
only when a run uses a GPU.
"""

from raytrace.core.errors import InputError

DEVICES = ("cpu", "gpu", "auto")
OPTION = "device (--device)"


def gpu_missing():
    """None where numba-cuda is installed and sees a CUDA GPU; otherwise why not, in a few words."""
    from raytrace.kernels.targets import cuda_target

    try:
        cuda = cuda_target()
    except ImportError:
        return "numba-cuda is not installed (pip install 'raytrace[gpu]')"
    try:
        if cuda.is_available():
            return None
    except Exception as error:  # a broken driver or toolkit: numba-cuda's own error, said in one line
        return f"numba-cuda cannot use the GPU driver ({str(error).strip().splitlines()[0]})"
    return "numba-cuda finds no CUDA GPU"


def choose_device(device, executor=None):
    """(the device that traces the run, a note for its record or None)."""
    if device not in DEVICES:
        raise InputError(f"{OPTION}: expected one of {', '.join(DEVICES)}, got {device!r}")
    if device == "cpu":
        return "cpu", None
    if executor is not None:
        if device == "gpu":
            raise InputError(f"{OPTION}: 'gpu' traces in this process and cannot be combined with a cluster "
                             "(--scheduler); use 'cpu' or 'auto' there")
        return "cpu", "auto: a cluster traces on its workers' CPUs"
    missing = gpu_missing()
    if missing is None:
        return "gpu", None
    if device == "gpu":
        raise InputError(f"{OPTION}: 'gpu' asked for, but {missing}; use 'cpu' or 'auto'")
    return "cpu", f"auto: no GPU ({missing}), traced on the CPU"


def device_record(device, note):
    """The run record's entries for the device used."""
    return {"device": device, **({"device_note": note} if note else {})}


def device_tracer(device, cpu_tracer, gpu_tracer, arguments, executor):
    """(tracer, executor) of a run on ``device``: ``cpu_tracer(*arguments)`` and the run's executor, or
    ``gpu_tracer(*arguments)`` with the GPU's own (its calls sized to the device)."""
    if device == "cpu":
        return cpu_tracer(*arguments), executor
    from raytrace.tracing.gputrace import trace_on_device

    return gpu_tracer(*arguments), trace_on_device
