"""The logistic kernels' one-call entry points, called directly, against statsmodels.

``irls_logistic`` (one maximum-likelihood fit) and ``score_logistic`` (the reduced fit,
then the signed score statistic of one more column) are what the logistic route calls
for the observed fit and the observed score statistics; the route's tests reach them
through the route. Here they are called as a user of the kernel would, on seeded data
(odd and even numbers of dyads, tied predictor values, and too few dyads), and compared
with statsmodels' Logit (its Newton fit, and its covariance at the estimate) and with the
score statistic written out in numpy from that fit (Rao 1948, Proc. Camb. Philos. Soc.
44:50-57: U = x'(y - mu), I = x'Wx - x'WZ (Z'WZ)^-1 Z'Wx, statistic U / sqrt(I)).
"""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm

from dyadperm.kernels.irls import FAIL_DYADS, INFO_SIZE, irls_logistic, score_logistic

MAX_ITER = 100
TOL = 1e-10


def _data(seed: int, n_dyads: int, ties: bool = False):
    rng = np.random.default_rng(seed)
    X = np.column_stack([np.ones(n_dyads), rng.normal(size=(n_dyads, 2))])
    if ties:
        X[:, 2] = np.round(X[:, 2])  # a predictor with many tied values
    eta = -0.3 + 0.8 * X[:, 1] - 0.5 * X[:, 2]
    y = (rng.random(n_dyads) < 1.0 / (1.0 + np.exp(-eta))).astype(np.float64)
    return X, y


def _kernel_inputs(X, y):
    XT = np.ascontiguousarray(X.T)
    valid = np.ones(X.shape[0], dtype=bool)
    return XT, valid, XT @ y, np.abs(XT).max(axis=1)


@pytest.mark.parametrize("seed,n_dyads,ties", [(1, 41, False), (2, 600, False),
                                               (3, 333, True), (4, 2001, True)])
def test_irls_logistic_equals_statsmodels(seed, n_dyads, ties):
    X, y = _data(seed, n_dyads, ties)
    XT, valid, xy, xmax = _kernel_inputs(X, y)
    q = X.shape[1]
    beta, cov, info = np.full(q, np.nan), np.full((q, q), np.nan), np.zeros(INFO_SIZE)
    status = irls_logistic(XT, np.empty(0), np.arange(q, dtype=np.int64), xy, valid, xmax,
                           np.zeros(q), beta, cov, info, MAX_ITER, TOL)
    assert status >= 0  # the Newton steps taken; failures are the negative FAIL_* codes
    ref = sm.Logit(y, X).fit(disp=0, tol=1e-12, maxiter=100)  # source: statsmodels
    np.testing.assert_allclose(beta, ref.params, rtol=1e-7, atol=1e-9)
    np.testing.assert_allclose(cov, ref.cov_params(), rtol=1e-6, atol=1e-12)


def test_irls_logistic_ignores_dyads_off_the_valid_set():
    X, y = _data(5, 301)
    XT, valid, _, _ = _kernel_inputs(X, y)
    valid[::3] = False
    q = X.shape[1]
    xy = XT[:, valid] @ y[valid]
    xmax = np.abs(XT[:, valid]).max(axis=1)
    beta, cov, info = np.full(q, np.nan), np.full((q, q), np.nan), np.zeros(INFO_SIZE)
    assert irls_logistic(XT, np.empty(0), np.arange(q, dtype=np.int64), xy, valid, xmax,
                         np.zeros(q), beta, cov, info, MAX_ITER, TOL) >= 0
    ref = sm.Logit(y[valid], X[valid]).fit(disp=0, tol=1e-12, maxiter=100)
    np.testing.assert_allclose(beta, ref.params, rtol=1e-7, atol=1e-9)


@pytest.mark.parametrize("seed,n_dyads,ties", [(6, 57, False), (7, 800, True)])
def test_score_logistic_equals_the_score_statistic_from_statsmodels(seed, n_dyads, ties):
    X, y = _data(seed, n_dyads, ties)
    XT, valid, xy, xmax = _kernel_inputs(X, y)
    Z, x = X[:, :2], X[:, 2]
    red = sm.Logit(y, Z).fit(disp=0, tol=1e-12, maxiter=100)  # source: statsmodels
    mu = red.predict(Z)
    w = mu * (1.0 - mu)
    u = x @ (y - mu)
    zwx = Z.T @ (w * x)
    info = x @ (w * x) - zwx @ np.linalg.solve(Z.T @ (w[:, None] * Z), zwx)
    want = u / np.sqrt(info)
    got = score_logistic(XT, np.empty(0), np.arange(2, dtype=np.int64), 2, xy, valid,
                         xmax[:2], np.zeros(2), np.zeros(INFO_SIZE), MAX_ITER, TOL)
    np.testing.assert_allclose(got, want, rtol=1e-7)


def test_score_logistic_is_nan_for_a_column_in_the_span_of_the_others():
    X, y = _data(8, 120)
    X[:, 2] = 2.0 * X[:, 1] + 1.0  # exactly collinear with the intercept and x1
    XT, valid, xy, xmax = _kernel_inputs(X, y)
    got = score_logistic(XT, np.empty(0), np.arange(2, dtype=np.int64), 2, xy, valid,
                         xmax[:2], np.zeros(2), np.zeros(INFO_SIZE), MAX_ITER, TOL)
    assert np.isnan(got)


def test_irls_logistic_refuses_no_more_dyads_than_coefficients():
    X, y = _data(9, 3)
    y[:] = [0.0, 1.0, 0.0]
    XT, valid, xy, xmax = _kernel_inputs(X, y)
    beta, cov, info = np.full(3, np.nan), np.full((3, 3), np.nan), np.zeros(INFO_SIZE)
    status = irls_logistic(XT, np.empty(0), np.arange(3, dtype=np.int64), xy, valid, xmax,
                           np.zeros(3), beta, cov, info, MAX_ITER, TOL)
    assert status == FAIL_DYADS
