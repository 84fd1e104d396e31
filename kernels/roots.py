"""Real roots, where the sign changes, of many small polynomials: the inversion of a test.

A coefficient's interval comes from one polynomial of degree at most 4 per relabelling
(``dyadperm.pipeline.intervals``): the relabelling is at least as extreme as the data at b
exactly where its polynomial is >= 0, so the interval's ends are among the points where
the polynomials change sign. Tens of thousands of them per term are solved here, each on
its own, without eigenvalues:

- the roots of a polynomial of degree d split the line into pieces where it has one sign;
  its critical points (the roots of its derivative) split it into pieces where it is
  monotone, so each such piece holds at most one root, found by Newton steps kept inside
  a bracket that bisection shrinks when a step leaves it (common practice, a "safeguarded
  Newton" iteration);
- the critical points come the same way from the derivative's own critical points, from
  the linear (d - 1)-th derivative upwards;
- every real root lies strictly inside the Cauchy bound 1 + max_j<d |c_j / c_d| (Cauchy
  1829 [memory]), and so do the critical points (the Gauss-Lucas theorem [memory]), so the
  outermost pieces are brackets too, with the sign of the polynomial at +-infinity at
  their outer ends.

Only sign changes are roots here: a root of even multiplicity (the polynomial touches 0
and turns back) changes no relabelling's verdict and is not reported. The slope of a root
is the sign the polynomial takes just above it (+1: it becomes >= 0 as b passes upwards).
"""

import numpy as np
from numba import njit

from .options import KERNEL_OPTIONS

#: Highest degree solved (quartic: a squared t statistic's numerator times a quadratic).
MAX_DEGREE = 4
#: Newton and bisection steps allowed per root (bisection alone halves a bracket from the
#: Cauchy bound, at most 2^1024, to one unit in the last place in about 1100 halvings).
MAX_STEPS = 1200


@njit(inline="always", **KERNEL_OPTIONS)
def _value(c, deg, x):
    """c[0] + c[1] x + ... + c[deg] x^deg (Horner)."""
    v = c[deg]
    for j in range(deg - 1, -1, -1):
        v = v * x + c[j]
    return v


@njit(inline="always", **KERNEL_OPTIONS)
def _sign(v):
    if v > 0.0:
        return 1
    if v < 0.0:
        return -1
    return 0


@njit(**KERNEL_OPTIONS)
def _solve(c, deg, dc, lo, hi, s_lo):
    """The root of c (degree ``deg``) in [lo, hi], where c has sign ``s_lo`` at lo and the
    opposite sign at hi and is monotone; ``dc`` is its derivative's coefficients."""
    x = 0.5 * (lo + hi)
    for _ in range(MAX_STEPS):
        v = _value(c, deg, x)
        s = _sign(v)
        if s == 0:
            return x
        if s == s_lo:
            lo = x
        else:
            hi = x
        d = _value(dc, deg - 1, x) if deg > 1 else dc[0]
        xn = x - v / d  # Newton step: x - c(x) / c'(x)
        if not (xn > lo and xn < hi):  # left the bracket (or not finite): bisect
            xn = 0.5 * (lo + hi)
        if xn == x or not (hi - lo > 4.0 * np.finfo(np.float64).eps * max(abs(lo), abs(hi))):
            return xn
        x = xn
    return x


@njit(**KERNEL_OPTIONS)
def _sign_changes(c, deg, dc, crit, n_crit, out_x, out_s):
    """Roots of c where its sign changes, in increasing order, with the sign above each.

    ``crit[:n_crit]``: the critical points of c in increasing order (where c' changes
    sign). Returns the number of roots written to ``out_x``/``out_s``.
    """
    lead = c[deg]
    bound = 0.0
    for j in range(deg):
        bound = max(bound, abs(c[j] / lead))
    bound += 1.0
    s_inf = _sign(lead)  # sign for b beyond every root, above
    s_minus = s_inf if deg % 2 == 0 else -s_inf  # and below
    found = 0
    prev = s_minus  # sign of the last stretch where c is not zero
    left = -bound
    s_left = s_minus
    for i in range(n_crit + 1):
        if i < n_crit:
            right = crit[i]
            s_right = _sign(_value(c, deg, right))
        else:
            right = bound
            s_right = s_inf
        if s_right != 0 and s_right != prev:
            if s_left == 0:
                out_x[found] = left  # c is 0 exactly at the critical point below
            else:
                out_x[found] = _solve(c, deg, dc, left, right, s_left)
            out_s[found] = s_right
            found += 1
            prev = s_right
        left, s_left = right, s_right
    return found


@njit(**KERNEL_OPTIONS)
def real_roots(poly, roots, slopes, counts):
    """For each row of ``poly`` (coefficients lowest degree first, degree <= 4): the points
    where it changes sign, in increasing order, and the sign it takes above each.

    poly : float64 (m, 5)
    roots : float64 (m, 4), written in columns 0 .. counts[i] - 1 of row i
    slopes : int8 (m, 4), +1 or -1, as ``roots``
    counts : int64 (m,), the number of roots of each row
    """
    m = poly.shape[0]
    width = poly.shape[1]
    if width > MAX_DEGREE + 1:
        raise ValueError("real_roots: polynomials of degree at most 4")
    ders = np.zeros((MAX_DEGREE + 1, MAX_DEGREE + 1))  # ders[k]: k-th derivative
    crit = np.zeros(MAX_DEGREE)
    nxt = np.zeros(MAX_DEGREE)
    signs = np.zeros(MAX_DEGREE, dtype=np.int8)
    for i in range(m):
        deg = -1
        scale = 0.0
        for j in range(width):
            if poly[i, j] != 0.0:
                deg = j
            scale = max(scale, abs(poly[i, j]))
        counts[i] = 0
        if deg < 1:
            continue
        for j in range(deg + 1):
            ders[0, j] = poly[i, j] / scale
        for k in range(1, deg + 1):  # coefficients of the k-th derivative
            for j in range(deg - k + 1):
                ders[k, j] = ders[k - 1, j + 1] * (j + 1)
        # the (deg - 1)-th derivative is linear: no critical points; climb to c itself
        n_crit = 0
        for k in range(deg - 1, -1, -1):
            n_new = _sign_changes(ders[k], deg - k, ders[k + 1], crit, n_crit, nxt, signs)
            for r in range(n_new):
                crit[r] = nxt[r]
            n_crit = n_new
        counts[i] = n_crit
        for r in range(n_crit):
            roots[i, r] = crit[r]
            slopes[i, r] = signs[r]
