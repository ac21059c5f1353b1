"""Real polynomials on an interval, and the Airy function, for the exact crossing solver.

In: the coefficients of a polynomial, lowest power first, as scalars (c0..c5 for
values, c0..c4 for roots: the engine's density is of degree <= 5, its slope <= 4),
and an interval [0, length]. Out: its value (and slope), its roots inside the
interval (sorted), the root of a monotone piece bracketed by a sign change; Ai(x)
for -8 <= x <= 5.

Coefficients travel as scalars, not arrays, so that the compiler keeps them in
registers: the engine evaluates these polynomials a few times per cell of every ray.

Roots come from the derivative chain: the critical points of p (roots of p',
found the same way one degree down, a quadratic in closed form) split the
interval into monotone pieces, and each piece with a sign change holds exactly
one root, found by Chebyshev steps (Newton's with the curvature term) kept inside
its bracket (bisection where a step would leave it). So no root is missed and none is found twice,
whatever the step sizes (common practice, no source). A cubic whose Bernstein
coefficients on the interval share one sign has no root there (the curve lies in
their convex hull; Farouki & Rajan 1987, Comput. Aided Geom. Des. 4, 191), which
settles most of the engine's cells without the chain.
"""

import math

from raytrace.kernels.targets import both_targets

#: Absolute accuracy of a bracketed root, in the caller's units (cells for the engine). A
#: crossing's rate is its slope there, which a root off by 1e-8 cells moves by ~1e-8 of itself.
ROOT_TOLERANCE = 1e-8


@both_targets
def evaluate(c0, c1, c2, c3, c4, c5, x):
    # Estrin's scheme: shorter chains of dependent multiply-adds than Horner's, the same terms.
    x2 = x * x
    return (c0 + c1 * x) + x2 * ((c2 + c3 * x) + x2 * (c4 + c5 * x))


@both_targets
def evaluate_with_slope(c0, c1, c2, c3, c4, c5, x):
    """(p(x), p'(x))."""
    x2 = x * x
    value = (c0 + c1 * x) + x2 * ((c2 + c3 * x) + x2 * (c4 + c5 * x))
    slope = (c1 + 2.0 * c2 * x) + x2 * ((3.0 * c3 + 4.0 * c4 * x) + 5.0 * c5 * x2)
    return value, slope


@both_targets
def _taylor(c0, c1, c2, c3, c4, c5, x):
    """The first Taylor coefficients at x: p, its slope, half its curvature, a sixth of its third
    derivative (Estrin's scheme for each)."""
    x2 = x * x
    value = (c0 + c1 * x) + x2 * ((c2 + c3 * x) + x2 * (c4 + c5 * x))
    t1 = (c1 + 2.0 * c2 * x) + x2 * ((3.0 * c3 + 4.0 * c4 * x) + 5.0 * c5 * x2)
    t2 = (c2 + 3.0 * c3 * x) + x2 * (6.0 * c4 + 10.0 * c5 * x)
    t3 = c3 + x * (4.0 * c4 + 10.0 * c5 * x)
    return value, t1, t2, t3


@both_targets
def chebyshev_step(c0, c1, c2, c3, c4, c5, x):
    """(root, slope there, error, p(x)): one step to the root of p near x from its Taylor series at x.

    The root of the series' quadratic part (a Chebyshev step), the slope there from the
    whole series (exact for degree <= 5), and the step's error from the series'
    further terms (inf where p'(x) = 0). From within ~1e-4 of a root with curvature
    ~1 per unit, the error is ~1e-12.
    """
    g, slope, t2, t3 = _taylor(c0, c1, c2, c3, c4, c5, x)
    if slope == 0.0:
        return x, slope, math.inf, g
    t4 = c4 + 5.0 * c5 * x
    inverse_slope = 1.0 / slope  # one division serves every ratio
    newton = -g * inverse_slope
    u = t2 * newton * inverse_slope
    size = abs(newton)
    # Series reversion: the Chebyshev step leaves 2 u^2 newton from the quadratic term and
    # (t_n / slope) newton^n from each higher one.
    error = size * (2.0 * u * u + size * size * abs(inverse_slope) * (abs(t3) + size * (abs(t4) + size * abs(c5))))
    e = newton * (1.0 - u)
    return x + e, slope + e * (2.0 * t2 + e * (3.0 * t3 + e * (4.0 * t4 + 5.0 * c5 * e))), error, g


@both_targets(inline=False)
def bracketed_root(c0, c1, c2, c3, c4, c5, low, high, g_low, g_high, start):
    """(x, slope of p at x): the x in [low, high] with p(x) = 0, where p changes sign once there
    (g_ = p at the ends), found from ``start`` (outside the bracket: its regula falsi point).

    Chebyshev steps while their error is above ROOT_TOLERANCE, each kept inside the
    bracket (bisection where it would leave); from a close start one step suffices.
    When an end is the root its slope is returned as 0.
    """
    if g_low == 0.0:
        return low, 0.0
    if g_high == 0.0:
        return high, 0.0
    x = start
    if not (low < x < high):
        x = low - g_low * (high - low) / (g_high - g_low)  # regula falsi: exact for a line
        if not (low < x < high):
            x = 0.5 * (low + high)
    negative_low = g_low < 0.0
    slope = 0.0
    for _ in range(100):
        step_to, slope, error, g = chebyshev_step(c0, c1, c2, c3, c4, c5, x)
        if g == 0.0:
            return x, slope
        if (g < 0.0) == negative_low:
            low = x
        else:
            high = x
        inside = low <= step_to <= high
        if error <= ROOT_TOLERANCE and inside:
            return step_to, slope
        if not inside or step_to == low or step_to == high:
            step_to = 0.5 * (low + high)
        if high - low <= ROOT_TOLERANCE:
            return step_to, slope
        x = step_to
    return x, slope


@both_targets
def _quadratic_roots(c0, c1, c2, length):
    """(n, x1, x2): the roots of c0 + c1 x + c2 x^2 inside (0, length), sorted."""
    n = 0
    r1 = r2 = 0.0
    if c2 == 0.0:
        if c1 != 0.0:
            x = -c0 / c1
            if 0.0 < x < length:
                r1 = x
                n = 1
        return n, r1, r2
    disc = c1 * c1 - 4.0 * c2 * c0
    if disc < 0.0:
        return 0, r1, r2
    # The stable pair of formulas: no cancellation between -c1 and the square root.
    q = -0.5 * (c1 + math.copysign(math.sqrt(disc), c1))
    x1 = q / c2
    x2 = c0 / q if q != 0.0 else x1
    if x1 > x2:
        x1, x2 = x2, x1
    if 0.0 < x1 < length:
        r1 = x1
        n = 1
    if 0.0 < x2 < length and x2 != x1:
        if n == 0:
            r1 = x2
        else:
            r2 = x2
        n += 1
    return n, r1, r2


@both_targets
def _root_of_piece(c0, c1, c2, c3, c4, left, f_left, right, f_right, length):
    """The root of p on its monotone piece [left, right], or -1.0 where it has none."""
    if (f_left < 0.0 < f_right) or (f_right < 0.0 < f_left):
        return bracketed_root(c0, c1, c2, c3, c4, 0.0, left, right, f_left, f_right, -1.0)[0]
    if f_right == 0.0 and 0.0 < right < length and f_left != 0.0:
        return right  # a root exactly at a critical point (a double root)
    return -1.0


@both_targets
def _append(roots, n, x):
    """(n, roots) with x appended where x >= 0 (roots: a 4-tuple; a root is never negative)."""
    if x < 0.0:
        return n, roots
    r0, r1, r2, r3 = roots
    if n == 0:
        return 1, (x, r1, r2, r3)
    if n == 1:
        return 2, (r0, x, r2, r3)
    if n == 2:
        return 3, (r0, r1, x, r3)
    return 4, (r0, r1, r2, x)


@both_targets
def _cubic_roots_in(c0, c1, c2, c3, length):
    """(n, (x0, x1, x2, 0)): the roots of c0 + c1 x + c2 x^2 + c3 x^3 inside (0, length), sorted."""
    none = (0.0, 0.0, 0.0, 0.0)
    third = length / 3.0
    b1 = c0 + c1 * third
    b2 = b1 + (c1 + c2 * length) * third
    b3 = ((c3 * length + c2) * length + c1) * length + c0
    if (c0 > 0.0 and b1 > 0.0 and b2 > 0.0 and b3 > 0.0) or (c0 < 0.0 and b1 < 0.0 and b2 < 0.0 and b3 < 0.0):
        return 0, none
    if c3 == 0.0:
        n, r1, r2 = _quadratic_roots(c0, c1, c2, length)
        return n, (r1, r2, 0.0, 0.0)
    n_crit, x1, x2 = _quadratic_roots(c1, 2.0 * c2, 3.0 * c3, length)
    n, roots = 0, none
    left, f_left = 0.0, c0
    if n_crit > 0:
        f1 = evaluate(c0, c1, c2, c3, 0.0, 0.0, x1)
        n, roots = _append(roots, n, _root_of_piece(c0, c1, c2, c3, 0.0, left, f_left, x1, f1, length))
        left, f_left = x1, f1
    if n_crit > 1:
        f2 = evaluate(c0, c1, c2, c3, 0.0, 0.0, x2)
        n, roots = _append(roots, n, _root_of_piece(c0, c1, c2, c3, 0.0, left, f_left, x2, f2, length))
        left, f_left = x2, f2
    return _append(roots, n, _root_of_piece(c0, c1, c2, c3, 0.0, left, f_left, length, b3, length))


@both_targets(inline=False)
def roots_in(c0, c1, c2, c3, c4, length):
    """(n, (x0, x1, x2, x3)): the roots of c0 + ... + c4 x^4 inside (0, length), sorted, n of them.

    Scalars in and out: no array crosses the call, so it costs no reference counting.
    """
    if c4 == 0.0:
        return _cubic_roots_in(c0, c1, c2, c3, length)
    # Between the quartic's critical points (a cubic's roots) it is monotone.
    n_crit, crit = _cubic_roots_in(c1, 2.0 * c2, 3.0 * c3, 4.0 * c4, length)
    n, roots = 0, (0.0, 0.0, 0.0, 0.0)
    left, f_left = 0.0, c0
    for j in range(n_crit + 1):
        right = crit[j] if j < n_crit else length
        f_right = evaluate(c0, c1, c2, c3, c4, 0.0, right)
        n, roots = _append(roots, n, _root_of_piece(c0, c1, c2, c3, c4, left, f_left, right, f_right, length))
        left, f_left = right, f_right
    return n, roots


@both_targets(inline=False)
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
