"""Error types of raytrace.

`InputError` is what a user's input (a file, a dataset, an option, a value)
raises when it is not what the tool needs; the CLI turns it into one line and
exit status 2. Anything else that escapes is a bug in raytrace (exit status 1).
"""

import math


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


def require_number(value, name, whole=False, at_least=None, above=None, at_most=None, expected=None):
    """``value`` as an int (``whole``) or float, or InputError naming ``name``.

    Python and numpy numbers of the right kind are accepted (np.float32(1.5),
    np.int64(2)); bools, strings, NaN, inf and whole-number floats where a whole
    number is asked for are refused. ``expected`` words the message.
    """
    import numbers

    import numpy as np

    kinds = (numbers.Integral,) if whole else (numbers.Real,)
    number = None
    if isinstance(value, kinds) and not isinstance(value, (bool, np.bool_)):
        number = int(value) if whole else float(value)
    good = number is not None and (whole or math.isfinite(number))
    good = good and (at_least is None or number >= at_least) and (above is None or number > above)
    good = good and (at_most is None or number <= at_most)
    if not good:
        if expected is None:
            bound = "".join(f" {sign} {limit:g}" for sign, limit in ((">=", at_least), (">", above), ("<=", at_most))
                            if limit is not None)
            expected = ("a whole number" if whole else "a finite number") + bound
        raise InputError(f"{name}: expected {expected}, got {value!r}")
    return number


def require_path(value, name):
    """``value`` (a str or os.PathLike) as a Path, or InputError naming ``name``."""
    import os
    from pathlib import Path

    if isinstance(value, bytes) or not isinstance(value, (str, os.PathLike)) or os.fspath(value) == "":
        raise InputError(f"{name}: expected a file path, got {value!r}")
    return Path(value)


def float_array(values, name):
    """``values`` as a float numpy array, or InputError naming ``name`` (strings, objects, ragged lists)."""
    import numpy as np

    try:
        return np.asarray(values, dtype=float)
    except (TypeError, ValueError):
        raise InputError(f"{name}: expected numbers, got {values!r}") from None


def require_positive_finite(values, name):
    """Return ``values`` as a float array, or raise InputError naming ``name``."""
    import numpy as np

    array = float_array(values, name)
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
