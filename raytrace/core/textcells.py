"""Cells of the text tables that commands print: a number, or words where there is none.

In: a value and its format. Out: the formatted number, or "-" where it is not
finite (a ratio at K = 0, an unconstrained limit); and the words a table shows
for a mass that resonates nowhere, instead of rows of nan and inf.
"""

import numpy as np

#: What a table row says for a mass whose kernel is zero on every row (ray or pixel).
NO_RESONANCE = "no resonance (K = 0"


def cell(value, spec, width=0, missing="-"):
    """``value`` formatted by ``spec``, or ``missing`` where it is not a finite number; right-aligned to ``width``."""
    text = f"{value:{spec}}" if np.isfinite(value) else missing
    return f"{text:>{width}}"


def no_resonance(kernel_column, rows="ray"):
    """The words for a mass whose kernel column is zero on every row, or None where it resonates somewhere."""
    if np.any(np.asarray(kernel_column) > 0):
        return None
    return f"{NO_RESONANCE} on every {rows}): nothing to show at this mass"
