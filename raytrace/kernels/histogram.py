"""One batch's statistics of the redshift-resolved kernel: means, squared deviations, logarithmic counts.

In: values (quantities, masses, rows), and where a value's slot is: its position
log2(value) * per_log2 - offset[m], per mass (the caller's scale and range). Out: per quantity and mass, the
mean over the rows and the sum of squared deviations from it, and the rows counted
into a histogram (quantities, masses, slots): slot 0 counts values <= 0, slot 1
those below the range, slots 2 .. 2 + n - 1 the logarithmic bins, the last one
those above. One pass per (quantity, mass), its slots in cache meanwhile; quantities
on the run's numba threads.
"""

import math

import numba


@numba.njit(cache=True, parallel=True)
def batch_statistics(values, per_log2, offset, log_bins, histogram, mean, squares):
    """mean[q, m], squares[q, m] = mean and sum of squared deviations of values[q, m]; histogram[q, m] += counts."""
    quantities, masses, rows = values.shape
    last = histogram.shape[2] - 1
    for q in numba.prange(quantities):  # each quantity's rows of the histogram its own: the same on any threads
        for m in range(masses):
            total = 0.0
            for r in range(rows):
                total += values[q, m, r]
            average = total / rows
            deviations = 0.0
            for r in range(rows):
                value = values[q, m, r]
                deviations += (value - average) * (value - average)
                if value <= 0.0:
                    slot = 0
                else:
                    position = math.log2(value) * per_log2 - offset[m]  # log2: half log10's cost
                    if position < 0.0:
                        slot = 1
                    elif position >= log_bins:
                        slot = last
                    else:
                        slot = 2 + int(position)
                histogram[q, m, slot] += 1
            mean[q, m] = average
            squares[q, m] = deviations
