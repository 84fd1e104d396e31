"""Missing dyads: every scheme against brute force on the whole null and every p-value.

Source of truth: ``reference.masked_scheme_stat``, full lstsq refits over the dyads where
every matrix of each fit is finite (methods.md: missing values move with their matrix),
written from the formulas, not from the engine. Checked: each relabelling's statistic (the
whole null, row for row, in the statistic's own units: t, or the coefficient in the data's
units, which pins the rescaling of standardised coefficients), which relabellings failed
(NaN: a design that cannot be fitted on that relabelling's dyads), and the two-sided and
one-sided p-values with failed fits counted as at least as extreme. Several sizes and
predictor counts; exact enumeration (every relabelling, the identity included) and random
relabellings (the run's own, redrawn from its seed). Invented data.
"""

from __future__ import annotations

import numpy as np
import pytest

import dyadperm as dp
from dyadperm.inputs.blocks import Blocks
from dyadperm.inputs.design import prepare
from dyadperm.pipeline.permutations import draw
from dyadperm.routes import linear
from reference import (P_ATOL, STAT_ATOL, STAT_RTOL, all_relabellings, counts, masked_null)

SCHEMES = ("y", "dsp", "freedman-lane")


def _data(n, k, seed, share=0.12):
    """Response and k predictors with about ``share`` of their dyads missing; y depends on
    the first predictor. Directed, no groups."""
    rng = np.random.default_rng(seed)
    Xs = [rng.normal(size=(n, n)) for _ in range(k)]
    Y = 0.6 * Xs[0] + rng.normal(size=(n, n))
    for M in [Y] + Xs[1:]:
        M[(rng.random((n, n)) < share) & ~np.eye(n, dtype=bool)] = np.nan
    return Y, Xs


def _check(res, obs, null, exact):
    np.testing.assert_allclose(res.observed, obs, rtol=STAT_RTOL, atol=STAT_ATOL)
    np.testing.assert_allclose(np.asarray(res.null), null, rtol=STAT_RTOL, atol=STAT_ATOL)
    assert np.array_equal(np.isnan(np.asarray(res.null)), np.isnan(null))
    np.testing.assert_array_equal(res.failed, np.isnan(null).sum(axis=0))
    b2, bg, bl = counts(obs, null)
    m = null.shape[0]
    expect = [b / m for b in (b2, bg, bl)] if exact else [(b + 1) / (m + 1) for b in (b2, bg, bl)]
    for field, want in zip(("p", "p_greater", "p_less"), expect):
        np.testing.assert_allclose(getattr(res, field)[1:], want, atol=P_ATOL, err_msg=field)


@pytest.fixture(params=["dyad by dyad", "corrected"])
def missing_path(request, monkeypatch):
    """Both ways the dense route sums a relabelling's complete dyads: one by one
    (``gather_gram``), or the complete-data kernel over the layers with missing values held
    as 0 and the incomplete dyads taken out (``routes.linear._zero_missing``, which runs up
    to ``MISSING_SHARE`` of the dyads missing: forced here whatever the share)."""
    monkeypatch.setattr(linear, "MISSING_SHARE", 0.0 if request.param == "dyad by dyad" else 1.0)
    return request.param


CASES = [  # (n, k, seed, exact or random relabellings)
    (5, 1, 101, 0), (5, 3, 102, 0), (6, 2, 103, 0), (8, 2, 104, 60), (9, 3, 105, 40)]


@pytest.mark.parametrize("statistic", ["t", "coef"])
@pytest.mark.parametrize("scheme", SCHEMES)
@pytest.mark.parametrize("n, k, seed, m", CASES)
def test_missing_data_null_and_pvalues_match_brute_force(n, k, seed, m, scheme, statistic,
                                                         missing_path):
    Y, Xs = _data(n, k, seed)
    mask = ~np.eye(n, dtype=bool)
    if m == 0:  # every relabelling: n! of them, the identity first
        res = dp.regress(Y, Xs, scheme=scheme, statistic=statistic, permutations=10_000)
        assert res.exact and res.permutations == np.prod(range(1, n + 1))
        perms = list(all_relabellings(n))
    else:
        res = dp.regress(Y, Xs, scheme=scheme, statistic=statistic, permutations=m, seed=seed,
                         exact=False)
        rows, _ = draw(Blocks(n, n, ((0, n),), None), res.seed, 0, m)
        perms = [(r, r) for r in rows]
    obs, null = masked_null(Y, Xs, mask, scheme, statistic, perms)
    _check(res, obs, null, exact=m == 0)


def _failing_design():
    """An indicator predictor that is 1 on two dyads, the response missing on one of them
    and x1 on another dyad: relabellings that move the missing values onto the other one
    leave the indicator constant over their dyads, so those fits fail (NaN) on every scheme."""
    n = 5
    rng = np.random.default_rng(0)
    x1 = rng.normal(size=(n, n))
    ind = np.zeros((n, n))
    ind[0, 1] = ind[2, 3] = 1.0
    y = rng.normal(size=(n, n)) + ind
    y[0, 1] = y[3, 4] = np.nan
    x1[2, 1] = np.nan
    return y, [x1, ind]


@pytest.mark.parametrize("statistic", ["t", "coef"])
@pytest.mark.parametrize("scheme", SCHEMES)
def test_failed_permuted_fits_count_as_extreme_on_linear_routes(scheme, statistic,
                                                                 missing_path):
    """methods.md (p-values): a permuted fit that cannot be computed counts as at least as
    extreme. Brute force finds the same failed relabellings (2 to 6 of 120 here)."""
    y, Xs = _failing_design()
    res = dp.regress(y, Xs, scheme=scheme, statistic=statistic, permutations=1000)
    obs, null = masked_null(y, Xs, ~np.eye(5, dtype=bool), scheme, statistic,
                            list(all_relabellings(5)))
    assert np.isnan(null).any() and np.all(np.isfinite(obs))
    _check(res, obs, null, exact=True)
    assert "failed permuted fits, counted as extreme" in res.table()


def test_few_missing_values_take_the_corrected_path():
    # one missing value among 870 dyads: the complete-data kernel and corrections; 12% of
    # the values missing: every relabelling sums its complete dyads one by one
    Y, Xs = _data(30, 2, 7, share=0.0)
    Y[3, 4] = np.nan
    st = linear.build_statistics(prepare(Y, Xs), scheme="dsp", statistic="t")
    assert all(ps.gram0 is not None and ps.missing is not None for ps in st.passes)
    assert [ps.missing[0].tolist() for ps in st.passes] == [[[3, 4]], [[3, 4]]]
    Y, Xs = _data(30, 2, 7)
    st = linear.build_statistics(prepare(Y, Xs), scheme="dsp", statistic="t")
    assert all(ps.gram0 is None and ps.missing is None for ps in st.passes)


def _few_missing(rng, n, m=None, symmetric=False):
    m = n if m is None else m
    Xs = [rng.normal(size=(n, m)) for _ in range(2)]
    Y = 0.5 * Xs[0] + rng.normal(size=(n, m))
    if symmetric:
        Y, Xs = (Y + Y.T) / 2, [(X + X.T) / 2 for X in Xs]
    for M, cells in ((Y, [(0, 1), (2, 3)]), (Xs[1], [(1, 0), (2, 3)])):
        for i, j in cells:  # (2, 3) missing in both: a dyad lost twice, taken out once
            M[i, j] = np.nan
            if symmetric:
                M[j, i] = np.nan
    return Y, Xs


@pytest.mark.parametrize("scheme", SCHEMES)
@pytest.mark.parametrize("layout", ["undirected", "groups within", "two-mode", "float32",
                                    "panel"])
def test_corrected_path_equals_dyad_by_dyad_path(rng, monkeypatch, scheme, layout):
    # the layouts the brute-force test above does not reach; the dyad-by-dyad path is
    # the reference (itself checked against brute force there and in tests/test_waves.py)
    kw = dict(scheme=scheme, permutations=150, seed=4, ci=False)
    if layout == "undirected":
        Y, Xs = _few_missing(rng, 12, symmetric=True)
        kw["directed"] = False
    elif layout == "groups within":
        Y, Xs = _few_missing(rng, 12)
        kw.update(groups=np.repeat(["a", "b", "c"], 4), dyads="within")
    elif layout == "two-mode":
        Y, Xs = _few_missing(rng, 9, 7)
    elif layout == "float32":
        Y, Xs = _few_missing(rng, 12)
        kw["storage"] = "float32"
    else:
        waves = [_few_missing(rng, 10) for _ in range(3)]
        Y = dp.Waves([w[0] for w in waves])
        Xs = [dp.Waves([w[1][c] for w in waves]) for c in range(2)]
    calls = []
    subtract = linear.subtract_missing

    def counted(*args):
        calls.append(args[4].shape[0])
        return subtract(*args)

    monkeypatch.setattr(linear, "subtract_missing", counted)
    runs = {}
    for share in (0.0, 1.0):
        monkeypatch.setattr(linear, "MISSING_SHARE", share)
        runs[share] = dp.regress(Y, Xs, **kw)
        assert (sum(calls) > 0) == (share > 0)  # the corrected path ran, and only then
    old, new = runs[0.0], runs[1.0]
    np.testing.assert_allclose(np.asarray(new.null), np.asarray(old.null), rtol=1e-10,
                               atol=1e-12)
    np.testing.assert_array_equal(new.failed, old.failed)
    np.testing.assert_array_equal(new.p, old.p)
