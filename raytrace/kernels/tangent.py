"""Near-tangent resonances: the uniform (Airy) kernel of a pair of crossings around an extremum.

In: one cell's breakpoints (places, values of the physical density, the number of
targets below the first), the density's second derivative, the cell's 1+z, the
targets and the photon energy. Out: added into one ray's rows, the Airy events'
kernel and counts (PHYSICS.md section 9); in ``marks``, the targets below each
breakpoint and the crossings each event claims, which the crossing solver of
:mod:`.crossings` then leaves out.
"""

import math

import numpy as np

from raytrace.kernels.polynomial import airy_ai, evaluate
from raytrace.kernels.targets import both_targets
from raytrace.kernels.zcells import add_to_cell

#: |xi| below which a near-tangent pair takes the Airy form. At this root of
#: X Ai(-X)^2 + Ai'(-X)^2 - int_X^inf Ai^2 = sqrt(X)/pi the Airy kernel integrated
#: over the window equals the two Landau-Zener terms integrated over it, so the
#: mean over rays is unchanged; the next roots are 4.11 and 5.53.
XI_CUT = 4.838497102421105

_TWO_THIRD = 2.0 / 3.0
_CUBE_ROOT_TWO = 2.0 ** (1.0 / 3.0)


@both_targets
def cube_root(x):
    """x^(1/3); :mod:`.gpu` has its own (numpy.cbrt has no CUDA form)."""
    return np.cbrt(x)


@both_targets
def count_below_near(targets, value, hint):
    """Number of targets < value, stepping from ``hint`` (a count for a nearby value)."""
    k = hint
    n = targets.shape[0]
    while k < n and targets[k] < value:
        k += 1
    while k > 0 and targets[k - 1] >= value:
        k -= 1
    return k


@both_targets(inline=False)
def pair_kernel(mass2, one_plus_z, omega, curvature, delta):
    """K (eV) of one near-tangent pair or near miss (PHYSICS.md section 9).

    K = pi^2 m^4 / ((1+z) omega) (4 omega / |a|)^(2/3) Ai(xi)^2 with
    xi = sign(a) Delta 2^(-1/3) omega^(-2/3) |a|^(-1/3); ``mass2`` = m^2 (eV^2),
    ``omega`` the photon energy there (eV), ``curvature`` a = d^2 m_gamma^2/dt^2
    (eV^4), ``delta`` = m_gamma^2 - m^2 at the extremum (eV^2).
    """
    scale = _CUBE_ROOT_TWO * omega**_TWO_THIRD * abs(curvature) ** (1.0 / 3.0)
    ai = airy_ai(math.copysign(1.0, curvature) * delta / scale)
    return math.pi**2 * mass2 * mass2 / (one_plus_z * omega) * (4.0 * omega / abs(curvature)) ** _TWO_THIRD * ai * ai


@both_targets(inline=False)
def tangent_events(bp, bv, below_start, n_bp, e0, e1, e2, e3, opz_a, opz_b, length, sigma_rate, omega0, targets,
                    mass2, m2_per_density, marks, kernel, count, tangent_count, tangent_kernel, cell_edges,
                    cell_kernel):
    """Airy events at the interior extrema bp[1..n_bp-2] of a cell (e0..e3: the density's second
    derivative; ``below_start``: the number of targets below bv[0]). Fills marks[0] with the
    number of targets below each breakpoint, and marks[1:3] with the targets each event claims
    from the two pieces next to its extremum (an empty range where none; ``omega0`` = 0 turns
    the events off, and so every claim)."""
    below, claim_low, claim_high = marks[0], marks[1], marks[2]
    below[0] = below_start
    for j in range(n_bp - 1):
        below[j + 1] = count_below_near(targets, bv[j + 1], below[j])
    # Every breakpoint's claim starts empty: one left from an earlier cell must not hide a crossing.
    for j in range(n_bp):
        claim_low[j] = 0
        claim_high[j] = 0
    if omega0 <= 0.0:
        return
    for j in range(1, n_bp - 1):
        e = bp[j]
        pe = bv[j]
        curvature_s = evaluate(e0, e1, e2, e3, 0.0, 0.0, e)
        if curvature_s == 0.0:
            continue
        opz = opz_a + (opz_b - opz_a) * e / length
        rate = sigma_rate * opz  # d s / dt in eV (cells per eV^-1)
        a = m2_per_density * curvature_s * rate * rate  # d^2 m_gamma^2 / dt^2, eV^4
        omega = omega0 * opz
        abs_a = abs(a)
        # The window is narrow (~1e-3 of P; the targets lie ~0.1 apart in ln P): first compare the
        # nearest target's distance with the window in cubes, then take the cube root only where
        # it falls inside; its edges' counts step from the count at the extremum.
        k = below[j]
        below_distance = pe - targets[k - 1] if k > 0 else math.inf
        above_distance = targets[k] - pe if k < targets.shape[0] else math.inf
        nearest = min(below_distance, above_distance)
        if nearest * nearest * nearest > 2.0 * (XI_CUT / m2_per_density) ** 3 * omega * omega * abs_a:
            continue
        half_width = XI_CUT * _CUBE_ROOT_TWO * cube_root(omega * omega * abs_a) / m2_per_density
        k_start = count_below_near(targets, pe - half_width, k)
        k_stop = count_below_near(targets, pe + half_width, k)
        if k_start == k_stop:
            continue
        # The crossing side: targets below a maximum (above a minimum) that both neighbours reach.
        if a < 0.0:
            lo_claim, hi_claim = max(max(below[j - 1], below[j + 1]), k_start), below[j]
            miss_start, miss_stop = below[j], k_stop
        else:
            lo_claim, hi_claim = below[j], min(min(below[j - 1], below[j + 1]), k_stop)
            miss_start, miss_stop = k_start, below[j]
        if hi_claim > lo_claim:
            claim_low[j] = lo_claim
            claim_high[j] = hi_claim
        for k in range(k_start, k_stop):
            claimed = lo_claim <= k < hi_claim
            if not claimed and not (miss_start <= k < miss_stop):
                continue
            value = pair_kernel(mass2[k], opz, omega, a, m2_per_density * (pe - targets[k]))
            kernel[k] += value
            add_to_cell(cell_kernel, cell_edges, k, opz, value)
            tangent_kernel[k] += value
            tangent_count[k] += 1
            if claimed:
                count[k] += 2
