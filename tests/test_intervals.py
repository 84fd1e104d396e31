"""Test inversion (dyadperm.pipeline.intervals) against direct evaluation.

Reference: the statistic of each relabelling at b evaluated directly from its formula
t(b) = sqrt(df) (l10 - b l20) / sqrt((l11 - b l21)^2 + (b l22)^2)) and the p-value rule of methods.md ((b + 1)/(m + 1); exact: b/m; ties within a
relative 1e-9 count), on a fine grid of b and just inside and outside each endpoint.
"""

from __future__ import annotations

import numpy as np
import pytest

from dyadperm.pipeline import intervals
from dyadperm.pipeline.pvalues import pvalues


def _stat(rows, b):
    l10, l11, l20, l21, l22, df = (rows[..., c] for c in range(6))
    return np.sqrt(df) * (l10 - b * l20) / np.sqrt((l11 - b * l21) ** 2 + (b * l22) ** 2)


def _p(rows, obs, b, exact):
    null = _stat(rows, b)[:, None]
    o = np.atleast_1d(_stat(obs, b))
    return pvalues(null, o, exact=exact).p[0]


def _rows(rng, m, *, identity_first=False):
    """Cholesky blocks of plausible relabellings: the observed one has l21 = l22 = 0 (its X
    lies in the span of Z and A, as for DSP at the identity)."""
    rows = np.empty((m, 6))
    rows[:, 0] = rng.normal(0.0, 1.0, m)           # l10
    rows[:, 1] = rng.uniform(3.0, 5.0, m)          # l11
    rows[:, 2] = rng.normal(0.0, 0.5, m)           # l20
    rows[:, 3] = rng.normal(0.0, 0.5, m)           # l21
    rows[:, 4] = rng.uniform(0.5, 1.5, m)          # l22
    rows[:, 5] = 40.0
    obs = np.array([2.5, 4.0, 1.3, 0.0, 0.0, 40.0])
    if identity_first:
        rows[0] = obs
    return rows, obs


@pytest.mark.parametrize("exact", [False, True])
def test_endpoints_match_the_p_value_just_inside_and_outside(exact):
    rng = np.random.default_rng(4)
    rows, obs = _rows(rng, 399, identity_first=exact)
    alpha = 0.05
    iv = intervals.invert(rows, obs, exact=exact, alpha=alpha)
    assert np.isfinite(iv.low) and np.isfinite(iv.high) and iv.low < iv.high
    for end, inside in ((iv.low, +1), (iv.high, -1)):
        eps = 1e-7 * max(1.0, abs(end))
        assert _p(rows, obs, end + inside * eps, exact) > alpha
        assert _p(rows, obs, end - inside * eps, exact) <= alpha
    # on a grid: accepted exactly inside the accepted pieces
    grid = np.linspace(iv.low - 2.0, iv.high + 2.0, 801)
    pieces = intervals.accepted_set(
        intervals.extreme_polynomials(rows, obs), exact=exact, alpha=alpha)
    for b in grid:
        inside = any(lo <= b < hi for lo, hi in pieces)
        assert (_p(rows, obs, b, exact) > alpha) == inside, b


def test_interval_excludes_zero_exactly_when_p_at_zero_is_small():
    rng = np.random.default_rng(8)
    for shift in np.linspace(0.0, 3.0, 13):
        rows, obs = _rows(rng, 199)
        obs = obs.copy()
        obs[0] = shift
        iv = intervals.invert(rows, obs, exact=False, alpha=0.05)
        p0 = _p(rows, obs, 0.0, False)
        assert (not iv.low <= 0.0 <= iv.high) == (p0 <= 0.05) or iv.pieces > 1


def test_failed_relabellings_count_at_every_b():
    rng = np.random.default_rng(1)
    rows, obs = _rows(rng, 99)
    base = intervals.invert(rows, obs, exact=False, alpha=0.05)
    rows[:20] = np.nan  # twenty fits failed: conservative, the interval can only widen
    wide = intervals.invert(rows, obs, exact=False, alpha=0.05)
    assert wide.low <= base.low and wide.high >= base.high


def _sign_changes_numpy(c):
    """Plain twin of kernels.roots for one polynomial (lowest degree first): the real
    roots from numpy.roots (eigenvalues of the companion matrix), kept where the
    polynomial's sign differs on the two sides (evaluated half-way to the neighbours)."""
    nz = np.flatnonzero(c)
    if nz.size == 0 or nz[-1] == 0:
        return np.zeros(0), np.zeros(0)
    r = np.roots(c[:nz[-1] + 1][::-1])
    r = np.unique(np.round(r[np.abs(r.imag) <= 1e-7 * np.maximum(1, np.abs(r))].real, 12))
    if r.size == 0:
        return r, r
    gaps = np.diff(r)
    below = np.concatenate([[r[0] - 1.0], r[1:] - gaps / 2])
    above = np.concatenate([r[:-1] + gaps / 2, [r[-1] + 1.0]])
    val = np.polynomial.polynomial.polyval
    s_below, s_above = np.sign(val(below, c)), np.sign(val(above, c))
    keep = s_below != s_above
    return r[keep], s_above[keep]


def test_roots_of_every_degree_against_numpy():
    rng = np.random.default_rng(3)
    polys = rng.normal(size=(400, 5))
    polys[100:200, 4] = 0.0
    polys[200:300, 3:] = 0.0
    polys[300:350, 2:] = 0.0
    polys[350:360] *= 1e-200  # tiny and huge coefficients: the kernel scales each row
    polys[360:370] *= 1e200
    polys[370:375] = 0.0  # identically zero
    polys[375:380, 1:] = 0.0  # constants
    pts, slope, row = intervals.real_roots(polys)
    for i, c in enumerate(polys):
        want, want_slope = _sign_changes_numpy(c)
        mine = row == i
        np.testing.assert_allclose(pts[mine], want, rtol=1e-9, atol=1e-12)
        np.testing.assert_array_equal(slope[mine], want_slope)


def test_roots_with_ties_and_given_roots():
    # polynomials built from known roots (source: the factor theorem): simple roots
    # change sign, a double root does not, a triple root does; coincident roots of
    # different polynomials (ties) are all reported
    rng = np.random.default_rng(11)
    P = np.polynomial.polynomial
    cases = [
        ([0.5], None), ([-2.0, 3.0], None), ([1.0, 1.0], []), ([1.0, 1.0, 1.0], [1.0]),
        ([-1.0, 2.0, 2.0], [-1.0]), ([0.25, 0.5, 0.75, 1.0], None), ([3.0, 3.0, -3.0, -3.0], []),
        ([1e-3, 2e-3, 1e3], None), ([0.0, 0.0, 0.0, 1.0], [0.0, 1.0]),
    ]
    for roots, changes in cases:
        for lead in (1.0, -2.5):
            c = np.zeros(5)
            coef = lead * P.polyfromroots(roots)
            c[:coef.size] = coef
            pts, slope, _ = intervals.real_roots(np.vstack([c, c]))  # the same row twice
            want = np.array(roots if changes is None else changes)
            assert pts.size == 2 * want.size
            # a root of multiplicity k is fixed by double precision only to about
            # eps^(1/k) (common practice): 6e-6 for a triple root
            tol = 2e-5 if len(set(roots)) < len(roots) else 1e-9
            np.testing.assert_allclose(np.sort(pts)[::2], np.sort(want), rtol=tol, atol=tol)
            # slopes alternate and end with the sign of the leading coefficient
            if want.size:
                assert slope[want.size - 1] == np.sign(lead)
    # quadratics with two real roots, then one with a complex pair: none
    a, b = rng.normal(size=2)
    c = np.array([a * b, -(a + b), 1.0, 0.0, 0.0])
    pts, _, _ = intervals.real_roots(c[None, :])
    np.testing.assert_allclose(np.sort(pts), np.sort([a, b]), rtol=1e-12)
    pts, _, _ = intervals.real_roots(np.array([[1.0, 0.0, 1.0, 0.0, 0.0]]))
    assert pts.size == 0


def test_halves_give_a_monte_carlo_error():
    rng = np.random.default_rng(5)
    rows, obs = _rows(rng, 2000)
    iv = intervals.invert(rows, obs, exact=False, alpha=0.05)
    assert np.all(np.isfinite(iv.halves)) and np.all(iv.mc_se >= 0)
    np.testing.assert_allclose(iv.mc_se, np.abs(iv.halves[0] - iv.halves[1]) / 2)
