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


def test_roots_of_every_degree_against_numpy():
    rng = np.random.default_rng(3)
    polys = rng.normal(size=(50, 5))
    polys[10:20, 4] = 0.0
    polys[20:30, 3:] = 0.0
    polys[30:40, 2:] = 0.0
    pts, slope = intervals.real_roots(polys)
    want = []
    for c in polys:  # source: numpy.roots (companion matrix of the monic polynomial)
        nz = np.flatnonzero(c)
        r = np.roots(c[:nz[-1] + 1][::-1])
        want += list(r[np.abs(r.imag) < 1e-9].real)
    np.testing.assert_allclose(np.sort(pts), np.sort(want), rtol=1e-8, atol=1e-10)
    assert set(np.unique(slope)) <= {-1.0, 0.0, 1.0}


def test_halves_give_a_monte_carlo_error():
    rng = np.random.default_rng(5)
    rows, obs = _rows(rng, 2000)
    iv = intervals.invert(rows, obs, exact=False, alpha=0.05)
    assert np.all(np.isfinite(iv.halves)) and np.all(iv.mc_se >= 0)
    np.testing.assert_allclose(iv.mc_se, np.abs(iv.halves[0] - iv.halves[1]) / 2)
