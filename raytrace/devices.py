"""Which device traces a run: the CPU, or a CUDA GPU through numba-cuda.

In: the run's ``device`` option ("cpu", "gpu" or "auto") and whether a cluster
traces the run. Out: the device used, and a note for the run record where "auto"
settled on the CPU; the tracer of that device and the executor that feeds it.
The GPU's tracers and kernels (:mod:`raytrace.gputrace`, :mod:`raytrace.kernels.gpu`)
are imported only when a run uses a GPU.
"""

from .errors import InputError

DEVICES = ("cpu", "gpu", "auto")
OPTION = "device (--device)"


def gpu_missing():
    """None where numba-cuda is installed and sees a CUDA GPU; otherwise why not, in a few words."""
    from .kernels.targets import cuda_target

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


def device_tracer(device, kind, cpu_tracer, arguments, executor):
    """(tracer, executor) of a run on ``device``: the CPU's tracer class ``cpu_tracer`` and the run's executor,
    or the GPU's tracer of ``kind`` ("sightlines" or "sky") built from the same ``arguments``, with its own."""
    if device == "cpu":
        return cpu_tracer(*arguments), executor
    from . import gputrace

    tracer = {"sightlines": gputrace.GpuRayTracer, "sky": gputrace.GpuSkyTracer}[kind]
    return tracer(*arguments), gputrace.trace_on_device
