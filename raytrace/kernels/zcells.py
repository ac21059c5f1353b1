"""Where along the ray a crossing's kernel goes: its redshift cell.

In: one ray's cell rows (cells, masses), each mass's inner cell edges in 1+z
(ascending, padded with +inf), the crossing's mass index, its 1+z and its kernel.
Out: the kernel added into the row of its cell. Cell j of mass k holds the
crossings with inner[k, j - 1] <= 1+z < inner[k, j] (no lower edge for j = 0,
no upper one for the last). The cells are set up in :mod:`raytrace.tracing.redshiftbins`:
the redshift bins and the density classes of the crossing, D* = (m / mbar_gamma(z))^2,
are both unions of cells, so one addition per crossing serves both.
"""

from raytrace.kernels.targets import both_targets


@both_targets
def add_to_cell(cell_kernel, inner_edges, k, opz, value):
    """cell_kernel[cell of (k, opz), k] += value; nothing where no cells are kept (zero rows)."""
    if cell_kernel.shape[0] == 0:
        return
    low, high = 0, inner_edges.shape[1]
    while low < high:  # bisection: the number of inner edges <= opz
        middle = (low + high) >> 1
        if inner_edges[k, middle] <= opz:
            low = middle + 1
        else:
            high = middle
    cell_kernel[low, k] += value
