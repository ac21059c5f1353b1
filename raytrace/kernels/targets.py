"""One Python source, two compilers: the engine's scalar helpers for the CPU and for a CUDA GPU.

In: functions decorated with :func:`both_targets` (the per-cell mathematics of
:mod:`.crossings`, :mod:`.polynomial`, :mod:`.tangent`, :mod:`.zcells`, :mod:`.geometry` and the
per-ray bodies of :mod:`.sightlines` and :mod:`.lattice`). Out: each is compiled
for the CPU at once (``numba.njit(cache=True)``, as before); :func:`device_twins`
compiles the same Python source again as CUDA device functions.

A twin is the function's own code object with a copy of its module's globals in
which every other shared function is replaced by its twin, and each name in
``replacements`` by the device function given for it (the GPU's streaming
segment walk for the CPU's table walk, say). So a helper is written once; a fix
to it reaches both engines, and only what must differ (how a segment's cells are
held, how scratch memory is allocated, how rays are spread over threads) is
written per target.
"""

import importlib
import types

import numba
import numpy

#: (module, name) -> the CPU dispatcher of every function compiled for both targets.
SHARED = {}


def both_targets(function=None, *, inline=True):
    """Compile ``function`` for the CPU (numba.njit, cache, inlined by default) and register it for a GPU twin."""
    def decorate(python_function):
        dispatcher = numba.njit(cache=True, inline="always" if inline else "never")(python_function)
        SHARED[(python_function.__module__, python_function.__name__)] = dispatcher
        return dispatcher

    return decorate(function) if function is not None else decorate


def device_twins(compile_device, replacements):
    """{(module, name): device function} for every shared function.

    ``compile_device`` compiles a Python function as a device function (e.g.
    ``numba.cuda.jit(device=True)``); ``replacements`` maps CPU functions that a
    shared function calls but that have no twin to what the GPU calls instead (a
    device function, or another shared function, whose twin is then used).
    Compilation is lazy (at a kernel's first launch), so the globals of every
    twin are filled in after all of them exist.
    """
    namespaces, twins = {}, {}
    for (module, name), dispatcher in SHARED.items():
        source = dispatcher.py_func
        namespace = namespaces.setdefault(module, dict(source.__globals__))
        clone = types.FunctionType(source.__code__, namespace, name, source.__defaults__, source.__closure__)
        clone.__qualname__ = source.__qualname__
        clone.__module__ = module
        twins[(module, name)] = compile_device(clone)
    device_of = {id(SHARED[key]): twin for key, twin in twins.items()}
    device_of.update({id(cpu): device_of.get(id(device), device) for cpu, device in replacements.items()})
    for namespace in namespaces.values():
        for name, value in list(namespace.items()):
            if id(value) in device_of:
                namespace[name] = device_of[id(value)]
    return twins


def cuda_target():
    """numba.cuda, imported (ImportError where numba-cuda is not installed)."""
    # numba-cuda (0.30 and earlier) still registers an overload for numpy.row_stack, which numpy 2.4
    # removed: its first kernel compile then fails with an AttributeError. numpy.vstack is what
    # row_stack was an alias of; set it only where it is missing, before numba.cuda is imported,
    # until numba-cuda drops the name. This is the one place that imports numba.cuda.
    if not hasattr(numpy, "row_stack"):
        numpy.row_stack = numpy.vstack
    return importlib.import_module("numba.cuda")
