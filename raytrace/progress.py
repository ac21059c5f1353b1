"""Signs of life for long runs: the numba compile notice and the size of a progress step.

In: the kernels package, a batch of rows. Out: whether the ray kernels still have
to be compiled (neither in memory nor in numba's on-disk cache), a one-line
notice with the time the compilation took, and how many rows one progress step
traces (a few per thread, so a bar moves per small group of rays, not per
checkpoint batch).
"""

import importlib
import os
import pkgutil
import sys
import time
from contextlib import contextmanager

# Kernels that no trace calls (the particle deposit of ``raytrace grid``).
_NOT_TRACING = ("deposit",)


def _dispatchers():
    from . import kernels

    found = []
    for info in pkgutil.iter_modules(kernels.__path__):
        if info.name in _NOT_TRACING:
            continue
        module = importlib.import_module(f"{kernels.__name__}.{info.name}")
        found += [value for value in vars(module).values()
                  if hasattr(value, "signatures") and hasattr(value, "stats") and getattr(value, "__module__", "")
                  == module.__name__]
    return found


def _cached_on_disk(dispatcher):
    try:
        return os.path.exists(dispatcher._cache._cache_file._index_path)
    except AttributeError:  # a numba without this layout, or a kernel without cache=True: cannot tell
        return True


def needs_compiling():
    """True when some tracing kernel is neither compiled in this process nor in numba's cache."""
    return any(not d.signatures and not _cached_on_disk(d) for d in _dispatchers())


def _misses():
    return sum(sum(d.stats.cache_misses.values()) for d in _dispatchers())


@contextmanager
def compile_notice(enabled, write=None):
    """Around the first traced rows: say the kernels are compiling (when they must) and, after, how long it took."""
    write = write or (lambda text: print(text, file=sys.stderr))
    if not enabled or not needs_compiling():
        yield
        return
    write("raytrace: compiling the ray kernels (first run only: numba caches them for later runs) ...")
    before, start = _misses(), time.perf_counter()
    yield
    if _misses() > before:
        write(f"raytrace: compiled the ray kernels in {time.perf_counter() - start:.1f} s")


def step_rows(batch_rows, threads):
    """Rows per progress step: four per thread (enough to keep them busy), at most a batch."""
    return max(1, min(int(batch_rows), 4 * max(1, int(threads))))
