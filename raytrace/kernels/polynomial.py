"""Real polynomials on an interval, and the Airy function, for the exact crossing solver.

In: coefficients c[0..deg] (lowest power first) of a polynomial of degree <= 5 and
an interval [0, length]. Out: its value, its roots inside the interval (sorted),
the root of a monotone piece bracketed by a sign change; Ai(x) for |x| <= 8.

Roots come from the derivative chain: the critical points of p (roots of p',
found the same way one degree down, a quadratic in closed form) split the
interval into monotone pieces, and each piece with a sign change holds exactly
one root, found by Newton's method kept inside its bracket (bisection where a
Newton step would leave it). So no root is missed and none is found twice,
whatever the step sizes (common practice, no source).
"""

import math

import numba

#: Absolute accuracy of a bracketed root, in the caller's units (cells for the engine).
ROOT_TOLERANCE = 1e-10

#: Largest degree handled (a trilinear cubic, times a linear blend weight, times (1+z)^3 linear).
MAX_DEGREE = 5


@numba.njit(cache=True, inline="always")
def evaluate(c, deg, x):
    value = c[deg]
    for i in range(deg - 1, -1, -1):
        value = value * x + c[i]
    return value


@numba.njit(cache=True, inline="always")
def evaluate_with_slope(c, deg, x):
    value = c[deg]
    slope = 0.0
    for i in range(deg - 1, -1, -1):
        slope = slope * x + value
        value = value * x + c[i]
    return value, slope


@numba.njit(cache=True, inline="always")
def derivative(c, deg, out):
    """Coefficients of p' into ``out``; returns its degree (0 for a constant p)."""
    for i in range(deg):
        out[i] = (i + 1) * c[i + 1]
    if deg == 0:
        out[0] = 0.0
        return 0
    return deg - 1


@numba.njit(cache=True)
def bracketed_root(c, deg, low, high, f_low, f_high, target):
    """The x in [low, high] with p(x) = target, where p - target changes sign once there."""
    g_low = f_low - target
    g_high = f_high - target
    if g_low == 0.0:
        return low
    if g_high == 0.0:
        return high
    x = low - g_low * (high - low) / (g_high - g_low)  # regula falsi: exact for a line
    if not (low < x < high):
        x = 0.5 * (low + high)
    # Path lengths are in cells: a root to 1e-10 cells moves a crossing's 1+z by ~1e-14 and its
    # rate by ~1e-10 of itself, and saves Newton's last, idle iteration.
    tolerance = ROOT_TOLERANCE
    for _ in range(100):
        value, slope = evaluate_with_slope(c, deg, x)
        g = value - target
        if g == 0.0:
            return x
        if (g < 0.0) == (g_low < 0.0):
            low, g_low = x, g
        else:
            high = x
        step_to = x - g / slope if slope != 0.0 else low - 1.0
        if not (low < step_to < high):
            step_to = 0.5 * (low + high)
        if abs(step_to - x) <= tolerance or high - low <= tolerance:
            return step_to
        x = step_to
    return x


@numba.njit(cache=True, inline="always")
def _quadratic_roots(c0, c1, c2, length, out):
    """Roots of c0 + c1 x + c2 x^2 inside (0, length), sorted; returns their number."""
    n = 0
    if c2 == 0.0:
        if c1 != 0.0:
            x = -c0 / c1
            if 0.0 < x < length:
                out[0] = x
                n = 1
        return n
    disc = c1 * c1 - 4.0 * c2 * c0
    if disc < 0.0:
        return 0
    # The stable pair of formulas: no cancellation between -c1 and the square root.
    q = -0.5 * (c1 + math.copysign(math.sqrt(disc), c1))
    x1 = q / c2
    x2 = c0 / q if q != 0.0 else x1
    if x1 > x2:
        x1, x2 = x2, x1
    if 0.0 < x1 < length:
        out[n] = x1
        n += 1
    if 0.0 < x2 < length and x2 != x1:
        out[n] = x2
        n += 1
    return n


@numba.njit(cache=True)
def roots_in(c, deg, length, work, out):
    """Roots of p (degree ``deg`` <= 5) inside (0, length), sorted into ``out``; returns their number.

    ``work`` is scratch of shape (>= MAX_DEGREE + 3, >= MAX_DEGREE + 1).
    """
    while deg > 0 and c[deg] == 0.0:
        deg -= 1
    if deg == 0:
        return 0
    if deg <= 2:
        return _quadratic_roots(c[0], c[1], c[2] if deg == 2 else 0.0, length, out)
    # Derivative chain down to a quadratic: work[d] holds the derivative of degree d.
    for i in range(deg + 1):
        work[deg, i] = c[i]
    for d in range(deg, 2, -1):
        derivative(work[d], d, work[d - 1])
    # Roots of the quadratic, then climb: each level's roots split the next level into monotone pieces.
    crit = work[MAX_DEGREE + 1]
    n_crit = _quadratic_roots(work[2, 0], work[2, 1], work[2, 2], length, crit)
    found = work[MAX_DEGREE + 2]
    for d in range(3, deg + 1):
        poly = work[d]
        n_found = 0
        left = 0.0
        f_left = evaluate(poly, d, left)
        for j in range(n_crit + 1):
            right = crit[j] if j < n_crit else length
            f_right = evaluate(poly, d, right)
            if (f_left < 0.0 < f_right) or (f_right < 0.0 < f_left):
                found[n_found] = bracketed_root(poly, d, left, right, f_left, f_right, 0.0)
                n_found += 1
            elif f_right == 0.0 and 0.0 < right < length and f_left != 0.0:
                found[n_found] = right  # a root exactly at a critical point (a double root)
                n_found += 1
            left, f_left = right, f_right
        for j in range(n_found):
            crit[j] = found[j]
        n_crit = n_found
    for j in range(n_crit):
        out[j] = crit[j]
    return n_crit


@numba.njit(cache=True)
def airy_ai(x):
    """Ai(x) (DLMF 9.2) from its Maclaurin series (DLMF 9.4.1), for -8 <= x <= 5.

    For x > 0 the terms grow to ~exp(2/3 x^1.5) times Ai(x) before they fall, so
    digits cancel: at x = 5 about 8 are left (the engine needs |x| < XI_CUT = 4.84).
    """
    c1 = 0.355028053887817239  # Ai(0) = 3^(-2/3) / Gamma(2/3)
    c2 = 0.258819403792806798  # -Ai'(0) = 3^(-1/3) / Gamma(1/3)
    x3 = x * x * x
    f_term, g_term = 1.0, x
    f_sum, g_sum = 1.0, x
    k = 0
    while k < 200:
        k += 1
        f_term *= x3 / ((3 * k - 1) * (3 * k))
        g_term *= x3 / ((3 * k) * (3 * k + 1))
        f_sum += f_term
        g_sum += g_term
        if abs(f_term) < 1e-18 * abs(f_sum) and abs(g_term) < 1e-18 * (abs(g_sum) + 1e-300):
            break
    return c1 * f_sum - c2 * g_sum
