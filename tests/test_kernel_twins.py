"""gather_gram, fill_gram, regression_stats and correlation_stats against their numpy twins
(tests/reference.py), on hypothesis-drawn shapes, NaN patterns and relabellings, including
n = 2 and 3, two-mode and triangle ranges. Source of truth: the twins' plain formulas."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from dyadperm.kernels.gather import gather_gram
from dyadperm.kernels.stats import NO_ROWS, correlation_stats, fill_gram, regression_stats
from reference import (KERNEL_ATOL, KERNEL_RTOL, STAT_RTOL, correlation_stats_ref, ols_t,
                       fill_gram_ref, gather_gram_ref, regression_stats_ref)
from reference import FIT_PIVOT_SQUARED  # noqa: E402  (the rule, written in the tests)


@st.composite
def layered(draw):
    n = draw(st.integers(2, 6))
    two_mode = draw(st.booleans())
    m = draw(st.integers(2, 6)) if two_mode else n
    lr, lf = draw(st.integers(1, 3)), draw(st.integers(1, 3))
    seed = draw(st.integers(0, 2**31))
    rng = np.random.default_rng(seed)
    rel = rng.normal(size=(n, m, lr))
    fix = rng.normal(size=(n, m, lf))
    nan_share = draw(st.sampled_from([0.0, 0.1, 0.3]))
    rel[rng.random(rel.shape) < nan_share] = np.nan
    fix[rng.random(fix.shape) < nan_share] = np.nan
    B = draw(st.integers(1, 4))
    rows = np.array([rng.permutation(n) for _ in range(B)], dtype=np.int64)
    cols = rows.copy() if not two_mode else np.array([rng.permutation(m) for _ in range(B)],
                                                       dtype=np.int64)
    triangle = not two_mode and draw(st.booleans())
    start = (np.arange(n) + 1 if triangle else np.zeros(n)).astype(np.int64)
    start = np.minimum(start, m)
    stop = np.full(n, m, dtype=np.int64)
    rel_idx = np.array(sorted(set(draw(st.lists(st.integers(0, lr - 1), min_size=1, max_size=lr)))),
                       dtype=np.int64)
    fix_idx = np.array(sorted(set(draw(st.lists(st.integers(0, lf - 1), min_size=1, max_size=lf)))),
                       dtype=np.int64)
    return rel, rel_idx, fix, fix_idx, rows, cols, start, stop


@settings(max_examples=60, deadline=None)
@given(layered())
def test_gather_gram_equals_twin(args):
    rel, rel_idx, fix, fix_idx, rows, cols, start, stop = args
    d = 1 + rel_idx.size + fix_idx.size
    out = np.full((rows.shape[0], d, d), 99.0)
    gather_gram(rel, rel_idx, fix, fix_idx, rows, cols, start, stop, out)
    ref = gather_gram_ref(rel, rel_idx, fix, fix_idx, rows, cols, start, stop)
    np.testing.assert_allclose(out, ref, rtol=KERNEL_RTOL, atol=KERNEL_ATOL)


@settings(max_examples=30, deadline=None)
@given(st.integers(1, 4), st.integers(1, 3), st.integers(1, 3), st.integers(0, 2**31))
def test_fill_gram_equals_twin(B, R, Q, seed):
    rng = np.random.default_rng(seed)
    cross = rng.normal(size=(B, R, Q))
    g0 = rng.normal(size=(1 + R + Q, 1 + R + Q))
    out = np.empty((B, 1 + R + Q, 1 + R + Q))
    fill_gram(cross, g0, out)
    np.testing.assert_array_equal(out, fill_gram_ref(cross, g0))


@settings(max_examples=40, deadline=None)
@given(st.integers(5, 40), st.integers(1, 3), st.integers(1, 3), st.booleans(),
       st.integers(0, 2**31))
def test_regression_stats_equal_twin(N, k, B, use_t, seed):
    rng = np.random.default_rng(seed)
    d = 2 + k
    grams = []
    for _ in range(B):
        V = np.column_stack([np.ones(N), rng.normal(size=(N, d - 1))])
        grams.append(V.T @ V)
    gram = np.array(grams)
    # transforms: term j keeps the intercept, the other columns, then column j, then y
    transforms = np.zeros((k, d, k + 2))
    for j in range(k):
        order = [c for c in range(k) if c != j] + [j]
        transforms[j, 0, 0] = 1.0
        for pos, c in enumerate(order):
            transforms[j, 1 + c, 1 + pos] = 1.0
        transforms[j, d - 1, k + 1] = 1.0
    scale = rng.choice([-1.0, 1.0, 2.5], size=k)
    out = np.empty((B, k))
    regression_stats(gram, transforms, scale, use_t, out, NO_ROWS)
    ref = regression_stats_ref(gram, transforms, scale, use_t)
    np.testing.assert_allclose(out, ref, rtol=STAT_RTOL, atol=1e-10)


def test_regression_stats_singular_design_is_nan():
    """A design column that is all zero makes the fit singular: NaN, counted as extreme."""
    V = np.column_stack([np.ones(10), np.zeros(10), np.arange(10.0)])
    gram = (V.T @ V)[None]
    transforms = np.eye(3)[None]
    out = np.empty((1, 1))
    regression_stats(gram, transforms, np.ones(1), True, out, NO_ROWS)
    assert np.isnan(out[0, 0])


@pytest.mark.parametrize("ratio", [4.0, 1.5, 0.7, 0.25])
@pytest.mark.parametrize("N", [4, 7, 40])
def test_regression_stats_fit_rule_at_its_boundary(N, ratio):
    """The kernel's fit rule is the one of kernels/options.py: a design column whose
    squared residual on the columns before it is ``ratio`` x FIT_PIVOT_SQUARED of its sum of
    squares is fitted above the rule (ratio > 1) and a failed fit (NaN) below it, as its
    twin decides by Schur complements. N = 4 leaves one residual df."""
    rng = np.random.default_rng(int(100 * ratio) + N)
    a = rng.normal(size=N)
    z = rng.normal(size=N)
    basis = np.column_stack([np.ones(N), a])
    z -= basis @ np.linalg.lstsq(basis, z, rcond=None)[0]  # z orthogonal to 1 and a
    # column 2 = a + delta z: squared residual delta^2 |z|^2, sum of squares |a|^2 + that
    target = ratio * FIT_PIVOT_SQUARED
    delta = np.sqrt(target * (a @ a) / ((1 - target) * (z @ z)))
    y = rng.normal(size=N)
    V = np.column_stack([np.ones(N), a, a + delta * z, y])
    gram = (V.T @ V)[None]
    transforms = np.eye(4)[None]
    out = np.empty((1, 1))
    regression_stats(gram, transforms, np.ones(1), True, out, NO_ROWS)
    ref = regression_stats_ref(gram, transforms, np.ones(1), True)
    assert np.isnan(out[0, 0]) == (ratio < 1) == np.isnan(ref[0, 0])
    if ratio > 1:
        np.testing.assert_allclose(out, ref, rtol=1e-3)  # near-singular: fewer digits


@settings(max_examples=30, deadline=None)
@given(st.integers(3, 30), st.integers(1, 4), st.integers(0, 2**31))
def test_correlation_stats_equal_twin_and_pearsonr(N, B, seed):
    from scipy.stats import pearsonr  # source: scipy

    rng = np.random.default_rng(seed)
    grams, rs = [], []
    for _ in range(B):
        a, b = rng.normal(size=N), rng.normal(size=N)
        V = np.column_stack([np.ones(N), a, b])
        grams.append(V.T @ V)
        rs.append(pearsonr(a, b)[0])
    gram = np.array(grams)
    out = np.empty(B)
    correlation_stats(gram, out)
    np.testing.assert_allclose(out, correlation_stats_ref(gram), rtol=1e-10)
    np.testing.assert_allclose(out, rs, rtol=1e-9)


@pytest.mark.parametrize("N, k, seed", [(5, 1, 0), (9, 2, 1), (40, 3, 2), (7, 3, 3)])
def test_regression_stats_interval_rows_give_t_at_every_b(N, k, seed):
    """``rows``: the Cholesky block of [Z, A, Y, X] from which the t of A in the fit of
    Y - b X on [Z, A] is sqrt(df) (l10 - b l20) / sqrt((l11 - b l21)^2 + (b l22)^2).
    Reference: that t by a plain least-squares refit (reference.ols_t) at several b."""
    rng = np.random.default_rng(seed)
    d = 3 + k
    B = 3
    grams, datas = [], []
    for _ in range(B):
        V = np.column_stack([np.ones(N), rng.normal(size=(N, d - 1))])
        grams.append(V.T @ V)
        datas.append(V)
    gram = np.array(grams)
    p = k + 1  # design columns: intercept, k - 1 others, A
    transforms = rng.normal(size=(k, d, p + 2))
    transforms[:, :, 0] = 0.0
    transforms[:, 0, 0] = 1.0  # the intercept
    out = np.empty((B, k))
    rows = np.empty((B, k, 6))
    regression_stats(gram, transforms, np.ones(k), True, out, rows)
    plain = np.empty((B, k))
    regression_stats(gram, np.ascontiguousarray(transforms[:, :, :p + 1]), np.ones(k), True,
                     plain, NO_ROWS)
    np.testing.assert_array_equal(out, plain)  # the extra column leaves t alone, bit for bit
    for b in range(B):
        for j in range(k):
            W = datas[b] @ transforms[j]
            l10, l11, l20, l21, l22, df = rows[b, j]
            assert df == N - p
            for shift in (-1.3, 0.0, 0.7):
                t_ref = ols_t(W[:, :p], W[:, p] - shift * W[:, p + 1])[2][-1]
                t = np.sqrt(df) * (l10 - shift * l20) / np.hypot(l11 - shift * l21, shift * l22)
                np.testing.assert_allclose(t, t_ref, rtol=1e-8)
