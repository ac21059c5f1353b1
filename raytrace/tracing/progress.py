"""Signs of life for long runs: the numba compile notice and the size of a progress step.

In: the kernels package, a batch of rows. Out: a notice while the ray kernels
compile (numba, on the first run; later runs load them from its cache) and a
line with the time it took, and how many rows one progress step traces (about
2^18 box cells per thread, a few hundredths of a second: a bar moves per small
group of rays, not per checkpoint batch, and a call's fixed cost stays small).
"""

import importlib
import pkgutil
import sys
import time
from contextlib import contextmanager

# Kernels that no trace calls (the particle deposit of ``raytrace grid``).
_NOT_TRACING = ("deposit",)


def _dispatchers():
    from raytrace import kernels

    found = []
    for info in pkgutil.iter_modules(kernels.__path__):
        if info.name in _NOT_TRACING:
            continue
        module = importlib.import_module(f"{kernels.__name__}.{info.name}")
        found += [value for value in vars(module).values()
                  if hasattr(value, "signatures") and hasattr(value, "stats") and getattr(value, "__module__", "")
                  == module.__name__]
    return found


def _misses():
    return sum(sum(d.stats.cache_misses.values()) for d in _dispatchers())


#: Seconds the first traced rows may take before the notice says the kernels are compiling.
NOTICE_AFTER_S = 1.0


@contextmanager
def compile_notice(enabled, write=None):
    """Around the first traced rows of a process: when they take long, say the kernels are compiling,
    and when numba did compile (a cache miss), say how long it took; silent when loaded from the cache."""
    import threading

    write = write or (lambda text: print(text, file=sys.stderr))
    if not enabled or all(d.signatures for d in _dispatchers()):
        yield
        return
    before, start = _misses(), time.perf_counter()
    timer = threading.Timer(NOTICE_AFTER_S, write,
                            ("raytrace: compiling the ray kernels (first run only: numba caches them) ...",))
    timer.daemon = True
    timer.start()
    try:
        yield
    finally:
        timer.cancel()
    if _misses() > before:
        write(f"raytrace: compiled the ray kernels in {time.perf_counter() - start:.1f} s")


#: Box cells per thread in a progress step. Measured on the demo series (nside 64, z = 3, 2816 cells a
#: ray, one thread): calls of 64 rows or more trace at full speed, of 8 rows 13 % slower, of one 28 %.
STEP_CELLS_PER_THREAD = 1 << 18


def step_rows(batch_rows, threads, cells_per_row):
    """Rows per progress step: about :data:`STEP_CELLS_PER_THREAD` box cells and at least four rows per
    thread (enough to keep them busy), at most a batch."""
    per_thread = max(4, -(-STEP_CELLS_PER_THREAD // max(1, int(cells_per_row))))
    return max(1, min(int(batch_rows), per_thread * max(1, int(threads))))
