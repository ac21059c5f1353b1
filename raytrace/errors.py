"""Error types of raytrace.

`InputError` is what a user's input (a file, a dataset, an option, a value)
raises when it is not what the tool needs; the CLI turns it into one line and
exit status 2. Anything else that escapes is a bug in raytrace (exit status 1).
"""


class RaytraceError(Exception):
    """Base class of every error raytrace raises on purpose."""


class InputError(RaytraceError, ValueError):
    """The user's input (file, dataset, option or value) is not usable.

    The message names the file, dataset, key or flag and says what was expected.
    """


class WriteError(InputError):
    """The machine refused a write (full disk, quota, I/O error); the message names the file and the free space."""


class RaytraceWarning(UserWarning):
    """Something in a run the user should know about; the run's results are still valid."""


class ProbedRangeWarning(RaytraceWarning):
    """Some masses of the grid resonate nowhere in the boxes."""


def require_positive_finite(values, name):
    """Return ``values`` as a float array, or raise InputError naming ``name``."""
    import numpy as np

    array = np.asarray(values, dtype=float)
    if array.size == 0:
        raise InputError(f"{name}: expected at least one value, got none")
    bad = ~np.isfinite(array) | (array <= 0)
    if bad.any():
        first = array[bad].flat[0]
        raise InputError(
            f"{name}: expected positive finite values; {int(bad.sum())} of "
            f"{array.size} are not (first offending value: {float(first)!r})"
        )
    return array
