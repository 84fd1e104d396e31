"""The p-value rules of methods.md, pinned where a wrong constant or a dropped case shows.

- Ties (methods.md, p-values): a relabelling counts as at least as extreme when its
  statistic is within a relative 1e-9 of the observed one. Statistics equal up to rounding
  must count, statistics just apart must not: nulls built on purpose around the observed
  value for ``count_extreme``, ``pvalues``, the max-statistic adjustment and the stop rules'
  exceedances, and near-ties in real runs from a relabelling that is (up to a controlled
  perturbation) an automorphism of the data, checked against brute-force enumeration
  (``tests/reference.py``).
- A term whose observed statistic is not finite has no p-value (NaN everywhere, a note in
  the table), the other terms keep theirs and their adjusted p-values, and stop rules do not
  wait for it: a plan whose kernels give NaN (or inf) for one term on the identity.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

import dyadperm as dp
from dyadperm.output import report
from dyadperm.pipeline import adjustment, pvalues, stopping
from dyadperm.pipeline.run import run
from dyadperm.routes import linear
from dyadperm.settings import run_options
from reference import (P_ATOL, TIE_RTOL, dyad_corr, exact_corr_null, exact_null, relabel,
                       scheme_stat)

# relative gaps around the observed statistic: inside the 1e-9 rule (rounding, must count)
# and outside it (just apart, must not); both below what the default tolerance's neighbours
# (1e-12 and 1e-6) would decide the other way
INSIDE = 1e-10
OUTSIDE = 1e-7


def _near_null(obs: np.ndarray) -> np.ndarray:
    """Null rows around ``obs`` (k,): equal; nearer to zero by INSIDE and by OUTSIDE
    (relative); farther by INSIDE; a NaN (a failed fit); the mirror image -obs."""
    rows = [obs, obs * (1 - INSIDE), obs * (1 - OUTSIDE), obs * (1 + INSIDE),
            np.full_like(obs, np.nan), -obs * (1 - INSIDE), -obs * (1 - OUTSIDE)]
    return np.array(rows)


def test_count_extreme_ties_within_a_relative_1e9():
    obs = np.array([2.5, -0.75, 1e6])
    null = _near_null(obs)
    two, greater, less, failed = pvalues.count_extreme(null, obs)
    # two-sided |T| >= |T_obs| (1 - 1e-9): equal, inside, farther, NaN, mirror inside
    np.testing.assert_array_equal(two, [5, 5, 5])
    # T >= T_obs - 1e-9 |T_obs|: for T_obs > 0 equal, inside, farther and NaN (not the
    # outside row nor the mirrors); for T_obs < 0 every row
    np.testing.assert_array_equal(greater, [4, 7, 4])
    np.testing.assert_array_equal(less, [7, 4, 7])
    np.testing.assert_array_equal(failed, [1, 1, 1])
    pv = pvalues.pvalues(null, obs, exact=False)
    np.testing.assert_allclose(pv.p, (two + 1) / (null.shape[0] + 1), atol=P_ATOL)
    ex = pvalues.pvalues(null, obs, exact=True)
    np.testing.assert_allclose(ex.p_greater, greater / null.shape[0], atol=P_ATOL)


def test_max_statistic_and_stop_rules_use_the_same_ties():
    obs = np.array([2.5, -0.75])
    null = _near_null(obs)
    # one term at a time, the max statistic is the term's own |T|: the two-sided count
    for j in range(2):
        adj = adjustment.maxt_adjusted(null[:, [j]], obs[[j]], exact=True)
        assert adj[0] == pytest.approx(5 / null.shape[0])
    x = stopping.exceedances(null, obs)
    np.testing.assert_array_equal(x.sum(axis=0), [5, 5])
    np.testing.assert_array_equal(x[:, 0], [True, True, False, True, True, True, False])


def _nearly_symmetric(rng, n):
    """A matrix M0 invariant under swapping nodes 0 and 1, and A that changes sign under
    it: M0 + eps A relabelled by the swap is M0 - eps A, a controlled perturbation."""
    swap = np.array([1, 0] + list(range(2, n)))
    M = rng.normal(size=(n, n))
    M0 = (M + relabel(M, swap, swap)) / 2
    R = rng.normal(size=(n, n))
    A = (R - relabel(R, swap, swap)) / 2
    return M0, A, swap


def _scaled(base, A, swap, stat, gap):
    """eps for which the swap's statistic is nearer to zero than the observed by ``gap``
    (relative): stat(swap) / stat - 1 is linear in eps at this scale."""
    probe = 1e-6
    g = stat(base + probe * A, swap) / stat(base + probe * A, None) - 1.0
    return -gap * probe / g


def _bites(obs, null, j):
    """The counts under the tie rule and under 1e-12 and 1e-6 differ for term j: so a
    wrong tolerance in the package would change its p-value."""
    def count(tol):
        return int(np.sum(np.abs(null[:, j]) >= np.abs(obs[j]) * (1 - tol)))
    return count(TIE_RTOL), count(1e-12), count(1e-6)


@pytest.mark.parametrize("gap, counted", [(INSIDE, True), (OUTSIDE, False)])
def test_near_tie_in_a_y_scheme_run_follows_the_rule(gap, counted):
    """Response nearly invariant under swapping nodes 0 and 1: that relabelling's t is the
    observed t moved toward zero by ``gap`` (relative). Exact enumeration (n = 5, 120
    relabellings) against brute force, two- and one-sided."""
    rng = np.random.default_rng(7)
    n = 5
    X = [rng.normal(size=(n, n)), rng.normal(size=(n, n))]
    Y0, A, swap = _nearly_symmetric(rng, n)
    Y0 = Y0 + 0.8 * (X[0] + relabel(X[0], swap, swap)) / 2  # an effect, still invariant

    def stat(Ymat, perm):
        p = np.arange(n) if perm is None else perm
        return scheme_stat(Ymat, X, "y", "t", p, p)[0]

    eps = _scaled(Y0, A, swap, stat, gap)
    Y = Y0 + eps * A
    obs, null = exact_null(Y, X, "y", "t")
    rel = (stat(Y, swap) - obs[0]) / obs[0]
    assert abs(rel) == pytest.approx(gap, rel=1e-2) and abs(stat(Y, swap)) < abs(obs[0])
    rule, tight, loose = _bites(obs, null, 0)
    assert (rule != tight) if counted else (rule != loose)
    res = dp.regress(Y, X, scheme="y", permutations=1000)
    assert res.exact and res.permutations == 120
    b2 = int(np.sum(np.abs(null[:, 0]) >= np.abs(obs[0]) * (1 - TIE_RTOL)))
    assert res.p[1] == pytest.approx(b2 / 120, abs=P_ATOL)
    bg = int(np.sum(null[:, 0] >= obs[0] - TIE_RTOL * abs(obs[0])))
    bl = int(np.sum(null[:, 0] <= obs[0] + TIE_RTOL * abs(obs[0])))
    assert res.p_greater[1] == pytest.approx(bg / 120, abs=P_ATOL)
    assert res.p_less[1] == pytest.approx(bl / 120, abs=P_ATOL)


@pytest.mark.parametrize("gap, counted", [(INSIDE, True), (OUTSIDE, False)])
def test_near_tie_in_a_correlation_run_follows_the_rule(gap, counted):
    rng = np.random.default_rng(8)
    n = 5
    a = rng.normal(size=(n, n))
    B0, A, swap = _nearly_symmetric(rng, n)

    def stat(Bmat, perm):
        return dyad_corr(a, Bmat if perm is None else relabel(Bmat, perm, perm))

    eps = _scaled(B0, A, swap, stat, gap)
    B = B0 + eps * A
    obs, null = exact_corr_null(a, B)
    rule, tight, loose = _bites(np.array([obs]), null[:, None], 0)
    assert (rule != tight) if counted else (rule != loose)
    res = dp.correlate(a, B, permutations=1000)
    assert res.exact and res.permutations == 120
    b2 = int(np.sum(np.abs(null) >= abs(obs) * (1 - TIE_RTOL)))
    assert res.p[0] == pytest.approx(b2 / 120, abs=P_ATOL)


# --------------------------------------------------------------------------- no statistic

@dataclasses.dataclass(frozen=True, eq=False)
class _Broken:
    """The kernels of a plan, with term ``j``'s statistic of the identity relabelling
    replaced by ``value`` (a fit that failed, or came out infinite, on the observed data)."""

    inner: object
    j: int
    value: float

    @property
    def k(self):
        return self.inner.k

    def statistics(self, rows, cols):
        out = self.inner.statistics(rows, cols)
        ident = np.all(rows == np.arange(rows.shape[1]), axis=1)
        out[ident, self.j] = self.value
        return out


def _plan(value, seed=3, n=12, effect=0.4):
    rng = np.random.default_rng(seed)
    y, x1, x2, x3 = (rng.normal(size=(n, n)) for _ in range(4))
    plan = linear.plan(y + effect * x1, {"x1": x1, "x2": x2, "x3": x3}, scheme="dsp",
                       statistic="t")
    return plan, dataclasses.replace(plan, kernel=_Broken(plan.kernel, 1, value),
                                     expected=None)


@pytest.mark.parametrize("value", [np.nan, np.inf, -np.inf])
def test_a_term_without_statistic_gets_nan_and_the_others_keep_theirs(value, tmp_path):
    good, broken = _plan(value)
    opts = dict(permutations=199, seed=5)
    ref = run(good, run_options(**opts))
    res = run(broken, run_options(**opts, out=tmp_path / "r.h5"))
    assert np.isnan(res.observed[1]) or np.isinf(res.observed[1])
    for field in ("p", "p_greater", "p_less", "p_se", "p_adjusted"):
        assert np.isnan(getattr(res, field)[2]), field  # terms: intercept, x1, x2, x3
    for field in ("p", "p_greater", "p_less", "p_se"):
        np.testing.assert_array_equal(getattr(res, field)[[1, 3]], getattr(ref, field)[[1, 3]])
    assert np.isnan(res.p_interval[2]).all()
    np.testing.assert_array_equal(res.p_interval[[1, 3]], ref.p_interval[[1, 3]])
    # the adjustment runs over the terms that have a statistic: x1 and x3 alone
    null = np.asarray(ref.null)[:, [0, 2]]
    expect = np.maximum(adjustment.maxt_adjusted(null, ref.observed[[0, 2]], exact=False),
                        ref.p[[1, 3]])
    np.testing.assert_allclose(res.p_adjusted[[1, 3]], expect, atol=P_ATOL)
    assert np.all(np.isfinite(res.p_adjusted[[1, 3]]))
    text = res.table()
    assert "note: no p-value for 'x2'" in text
    assert "through the permutation kernels is not finite" in text
    again = dp.open_result(tmp_path / "r.h5")
    np.testing.assert_array_equal(again.p, res.p)
    assert again.notes == res.notes


@pytest.mark.parametrize("rule", ["besag-clifford", "gandy"])
def test_stop_rules_do_not_wait_for_a_term_without_statistic(rule):
    good, broken = _plan(np.nan, seed=4, effect=0.0)  # no effects: every term stops early
    opts = dict(permutations=4000, seed=6, chunk_size=50, stop=rule)
    ref = run(good, run_options(**opts))
    res = run(broken, run_options(**opts))
    # the term without a statistic is never done; the run stops where the others are
    tau = ref.stop_at[[1, 3]]
    assert np.all(np.isfinite(tau)) and res.stopped_by == rule
    assert res.permutations == -(-int(tau.max()) // 50) * 50 <= ref.permutations
    assert np.isnan(res.stop_at[2]) and np.isnan(res.p[2])
    np.testing.assert_array_equal(res.stop_at[[1, 3]], tau)
    assert "x2: no observed statistic, not waited for" in res.table()


def test_no_term_with_a_statistic_stops_after_one_chunk():
    good, broken = _plan(np.nan, seed=4)
    kernel = _Broken(_Broken(_Broken(good.kernel, 0, np.nan), 1, np.nan), 2, np.nan)
    plan = dataclasses.replace(good, kernel=kernel, expected=None)
    res = run(plan, run_options(permutations=400, seed=6, chunk_size=40, stop="gandy"))
    assert res.permutations == 40 and np.all(np.isnan(res.p[1:]))
    assert np.all(np.isnan(res.p_adjusted[1:]))


def test_exact_enumeration_with_a_term_without_statistic():
    rng = np.random.default_rng(9)
    n = 5
    y, x1, x2 = (rng.normal(size=(n, n)) for _ in range(3))
    plan = linear.plan(y, {"x1": x1, "x2": x2}, scheme="y", statistic="t")
    broken = dataclasses.replace(plan, kernel=_Broken(plan.kernel, 0, np.nan), expected=None)
    res = run(broken, run_options(permutations=500))
    assert res.exact and np.isnan(res.p[1]) and np.isnan(res.null[0, 0])
    ref = run(plan, run_options(permutations=500))
    assert res.p[2] == ref.p[2] and np.isfinite(res.p[2])


def test_reports_leave_the_missing_statistic_empty():
    """The CSV report and to_frame leave every p-value cell and the exceedance count of a
    term without an observed statistic empty (NaN), and fill the others'."""
    _, broken = _plan(np.nan)
    res = run(broken, run_options(permutations=99, seed=5))
    frame = res.to_frame().set_index("term")
    for column in ("p", "p_se", "p_low", "p_high", "p_adjusted", "p_greater", "p_less",
                   "exceedances"):
        assert np.isnan(frame.loc["x2", column]), column
        assert np.isfinite(frame.loc["x1", column]), column
    lines = report.csv_text(res).splitlines()
    header = lines[0].split(",")
    row = dict(zip(header, next(ln for ln in lines if ln.startswith("x2,")).split(",")))
    assert row["p"] == row["exceedances"] == row["p_adjusted"] == ""
    assert row["failed"] != ""
