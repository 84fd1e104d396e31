"""Scheme y with complete data: logistic fits from moments of the design (kernels.irls).

Sources named beside each check:
- exact rational arithmetic (``fractions``) of the derivatives of the logistic function,
  sigma' = sigma (1 - sigma) (calculus; common practice), for the Taylor coefficients;
- numpy/scipy sums over the dyads (``scipy.special.expit``) for X'mu and X'WX;
- statsmodels ``Logit`` and ``GLM(Binomial).score_test`` for the fits and score statistics;
- the refits by passes over the dyads (kernels.irls.newton_fit, itself checked against
  statsmodels in tests/test_logistic.py) for the whole route.
"""

from __future__ import annotations

import math
from fractions import Fraction

import numpy as np
import pytest
import statsmodels.api as sm
from scipy.special import expit

import dyadperm as dp
from dyadperm.routes import logistic as lg
from dyadperm.inputs.design import prepare
from dyadperm.kernels import irls as kn
from reference import relabel

#: the series against exact sums: its truncation is below a pass's rounding
SERIES_RTOL = 1e-11
#: the series route against refits by passes converged to TOL (their covariance is taken
#: where the last step started, within a relative TOL of the estimate's)
ROUTE_RTOL = 1e-6


def derivative_polynomials(n):
    """P_j with sigma^(j) = P_j(sigma): P_0 = s, P_(j+1) = P_j'(s) s (1 - s), exact."""
    polys = [[Fraction(0), Fraction(1)]]  # coefficients of s^0, s^1, ...
    for _ in range(n - 1):
        P = polys[-1]
        dP = [i * P[i] for i in range(1, len(P))]
        # dP(s) * (s - s^2)
        out = [Fraction(0)] * (len(dP) + 2)
        for i, c in enumerate(dP):
            out[i + 1] += c
            out[i + 2] -= c
        polys.append(out)
    return polys


@pytest.mark.parametrize("eta", [-9.0, -3.2, -0.4, 0.0, 0.7, 4.5])
def test_taylor_coefficients_match_exact_derivatives(eta):
    n = 16
    coef = np.empty(n)
    kn.logistic_taylor(eta, coef)
    s = Fraction(float(expit(eta)))
    for j, P in enumerate(derivative_polynomials(n)):
        exact = sum(c * s ** i for i, c in enumerate(P)) / math.factorial(j)
        # source: exact rational derivatives of sigma at (the double nearest) sigma(eta)
        size = abs(complex(eta, math.pi)) ** -(j + 1)  # |a_j| <= 2.5 size (the poles)
        assert abs(coef[j] - float(exact)) <= 1e-13 * max(abs(float(exact)), size), j


def test_monomial_tables():
    T = kn.monomial_tables(3, 4)
    assert T["expo"].shape == (math.comb(7, 3), 3)
    assert np.all(np.diff(T["deg"]) >= 0)
    for a in range(1, T["deg"].shape[0]):
        e = T["expo"][T["parent"][a]].copy()
        e[T["pvar"][a]] += 1
        assert np.array_equal(e, T["expo"][a])
        assert T["mult"][a] == math.factorial(T["deg"][a]) / np.prod(
            [math.factorial(x) for x in T["expo"][a]])
    i = int(np.flatnonzero((T["expo"] == [1, 0, 1]).all(axis=1))[0])
    assert np.array_equal(T["expo"][T["up1"][i, 1]], [1, 1, 1])
    assert np.array_equal(T["expo"][T["up2"][i, 3]], [1, 2, 1])  # pairs (0,0) (0,1) (0,2) (1,1)


def _design(rng, N, k=3):
    X = np.column_stack([np.ones(N)] + [
        (rng.random(N) < 0.05).astype(float), (rng.random(N) < 0.2).astype(float),
        np.abs(rng.normal(size=N)), rng.normal(size=N)][:k])
    sd = X[:, 1:].std(axis=0)
    X[:, 1:] = (X[:, 1:] - X[:, 1:].mean(axis=0)) / np.where(sd > 0, sd, 1.0)
    return X


@pytest.mark.parametrize("N", [1, 5, 33, 1000])
@pytest.mark.parametrize("k", [1, 3])
def test_moments_match_numpy(rng, N, k):
    X = _design(rng, N, k)
    T = kn.monomial_tables(k, 6)
    mom = np.empty(T["deg"].shape[0])
    kn.series_moments(np.ascontiguousarray(X.T), T["parent"], T["pvar"], mom)
    # source: numpy products and sums
    want = np.array([np.prod(X[:, 1:] ** e, axis=1).sum() for e in T["expo"]])
    np.testing.assert_allclose(mom, want, rtol=1e-12, atol=1e-12 * N)


@pytest.mark.parametrize("k", [1, 2, 3])
def test_series_sums_match_direct_sums(rng, k):
    N = 20_000
    X = _design(rng, N, k)
    xmax = np.abs(X).max(axis=0)
    D = 16
    T = kn.monomial_tables(k, D + 2)
    mom = np.empty(T["deg"].shape[0])
    kn.series_moments(np.ascontiguousarray(X.T), T["parent"], T["pvar"], mom)
    n_alpha = int((T["deg"] <= D).sum())
    for _ in range(5):
        b = np.concatenate([[rng.uniform(-5, 1)], rng.normal(scale=0.03, size=k)])
        tail_mu, tail_w = kn.series_tail(b[0], np.abs(b[1:]) @ xmax[1:], D)
        coef = np.empty(D + 2)
        kn.logistic_taylor(b[0], coef)
        F, H = np.empty(k + 1), np.empty((k + 1, k + 1))
        kn.series_sums(mom, T["deg"], T["parent"], T["pvar"], T["mult"], T["up1"], T["up2"],
                       n_alpha, coef, b, np.empty(n_alpha), F, H)
        # source: direct sums with scipy's expit
        mu = expit(X @ b)
        w = mu * (1 - mu)
        scale_f = np.abs(X).T @ mu
        assert np.all(np.abs(F - X.T @ mu) <= SERIES_RTOL * scale_f + N * tail_mu)
        scale_h = np.abs(X).T @ (w[:, None] * np.abs(X))
        assert np.all(np.abs(H - X.T @ (w[:, None] * X)) <= SERIES_RTOL * scale_h + N * tail_w)


def test_tail_bound_holds(rng):
    # the truncation of sum_j a_j u^j after degree D is within the bound, for u up to U
    for eta in (-6.0, -3.0, 0.0, 2.0):
        coef = np.empty(90)
        kn.logistic_taylor(eta, coef)
        for U in (0.3, 1.0, 2.5):
            for D in (4, 10, 20):
                tail_mu, tail_w = kn.series_tail(eta, U, D)
                for u in (-U, -U / 2, U / 3, U):
                    # source: scipy's expit and its derivative at eta + u
                    head = sum(coef[j] * u ** j for j in range(D + 1))
                    assert abs(expit(eta + u) - head) <= tail_mu * (1 + 1e-9) + 1e-15
                    dhead = sum((j + 1) * coef[j + 1] * u ** j for j in range(D + 1))
                    s = expit(eta + u)
                    assert abs(s * (1 - s) - dhead) <= tail_w * (1 + 1e-9) + 1e-15
    assert kn.series_tail(-3.0, 4.5, 10)[0] == np.inf  # past the radius |eta + i pi|


def _series_inputs(rng, N, k, D):
    X = _design(rng, N, k)
    T = kn.monomial_tables(k, D + 2)
    XT = np.ascontiguousarray(X.T)
    mom = np.empty(T["deg"].shape[0])
    kn.series_moments(XT, T["parent"], T["pvar"], mom)
    return X, XT, T, mom, int((T["deg"] <= D).sum())


def test_series_fit_matches_statsmodels(rng):
    N, k, D = 40_000, 3, 18
    X, XT, T, mom, n_alpha = _series_inputs(rng, N, k, D)
    b_true = np.array([-2.5, 0.02, -0.03, 0.01])
    xmax = np.abs(X).max(axis=0)
    tables = [T[key] for key in ("deg", "parent", "pvar", "mult", "up1", "up2")]
    for _ in range(3):
        y = (rng.random(N) < expit(X @ b_true)).astype(float)
        beta0 = np.array([math.log(y.mean() / (1 - y.mean())), 0, 0, 0])
        state = np.empty(kn.series_workspace(k + 1))
        st = kn.series_fit(X.T @ y, np.arange(k + 1), mom, *tables, n_alpha, D, xmax, beta0,
                           np.empty(D + 2), np.empty(n_alpha), state, lg.MAX_ITER, lg.TOL)
        assert st > 0
        est = state[4 * (k + 1)]
        # source: statsmodels Logit
        fit = sm.Logit(y, X).fit(disp=0, method="newton", tol=1e-12)
        np.testing.assert_allclose(est, fit.params, rtol=1e-9, atol=1e-12)
        H = state[:k + 1]
        np.testing.assert_allclose(np.sqrt(np.diag(np.linalg.inv(H))), fit.bse, rtol=1e-9)
        # a start far out: the truncation bound fails and the caller refits by passes
        far = beta0 + np.array([0, 3.0, 0, 0])
        assert kn.series_fit(X.T @ y, np.arange(k + 1), mom, *tables, n_alpha, D, xmax, far,
                             np.empty(D + 2), np.empty(n_alpha), state, lg.MAX_ITER,
                             lg.TOL) == kn.SERIES_FALLBACK


def _network_inputs(rng, n, k):
    """A complete directed network with k dyadic predictors and a sparse response with
    strong effects (so the observed fit lies beyond the series' reach)."""
    xs = [(rng.random((n, n)) < 0.1).astype(float), rng.normal(size=(n, n)),
          np.abs(rng.normal(size=(n, n)))][:k]
    Y = (rng.random((n, n)) < expit(-2.5 + 1.5 * xs[0] + 0.3 * xs[1])).astype(float)
    return Y, {f"x{i + 1}": x for i, x in enumerate(xs)}


@pytest.mark.parametrize("statistic", ["t", "coef", "score"])
def test_series_route_matches_refits_by_passes(rng, monkeypatch, statistic):
    # n = 200 (39,800 dyads) needs a shorter reach (3 standard errors) for the series to be
    # chosen; relabellings beyond it are refitted by passes inside the route
    monkeypatch.setattr(lg, "SERIES_SE", 3.0)
    n, k = 200, 3
    Y, preds = _network_inputs(rng, n, k)
    prep = prepare(Y, preds)
    dd = lg.dyad_data(prep)
    fit = lg.observed_fit(prep, dd)
    plan = lg.build_plan(prep, dd, fit, scheme="y", statistic=statistic)
    assert plan.kind == "series-y"  # its statistics are the kernel kn.series_y's
    perms = np.array([np.arange(n)] + [rng.permutation(n) for _ in range(40)])
    stats, passes = plan.statistics_and_passes(perms, perms)
    assert passes[0] > 1 and np.sum(passes == 1) > 20  # the observed fit is far: by passes
    monkeypatch.setattr(lg, "_series_degree", lambda *args: None)
    by_passes = lg.build_plan(prep, dd, fit, scheme="y", statistic=statistic)
    assert by_passes.kind in ("refit-y", "score-y")
    np.testing.assert_allclose(stats, by_passes.statistics(perms, perms), rtol=ROUTE_RTOL)
    if statistic != "score":
        return
    # source: statsmodels GLM reduced fit and score test (Rao 1948), relabelling 1
    rows, cols = np.nonzero(prep.mask)
    X = np.column_stack([np.ones(rows.shape[0])] + [preds[f"x{i + 1}"][rows, cols]
                                                     for i in range(k)])
    y1 = relabel(Y, perms[1], perms[1])[rows, cols]
    for j in range(1, k + 1):
        red = sm.GLM(y1, np.delete(X, j, axis=1), family=sm.families.Binomial()).fit(tol=1e-12)
        chi2 = float(np.squeeze(red.score_test(exog_extra=X[:, j:j + 1])[0]))
        np.testing.assert_allclose(stats[1, j - 1] ** 2, chi2, rtol=1e-9)


def test_series_route_bits_independent_of_chunks(rng, monkeypatch):
    monkeypatch.setattr(lg, "SERIES_SE", 3.0)
    Y, preds = _network_inputs(rng, 200, 2)
    kw = dict(model="logistic", scheme="y", permutations=60, seed=3)
    base = dp.regress(Y, preds, chunk_size=60, **kw)
    for other in (dict(chunk_size=7), dict(chunk_size=13, jobs=2)):
        res = dp.regress(Y, preds, **other, **kw)
        # engine contract (design.md): bit-identical for any chunking and jobs
        np.testing.assert_array_equal(np.asarray(res.null), np.asarray(base.null))


@pytest.mark.parametrize("shape", ["undirected", "groups-within", "two-mode"])
@pytest.mark.parametrize("statistic", ["t", "score"])
def test_series_route_on_data_shapes(rng, monkeypatch, shape, statistic):
    # the gather of X'y_pi over the dyad set of each shape (the linear engine's ranges);
    # a series degree is forced (the plan's choice needs larger networks), so relabellings
    # within the series' reach use it and the others are refitted by passes
    n, m = (60, 70) if shape == "two-mode" else (80, 80)
    x1 = (rng.random((n, m)) < 0.2).astype(float)
    x2 = rng.normal(size=(n, m))
    kw = {}
    if shape == "undirected":
        x1, x2 = np.triu(x1, 1) + np.triu(x1, 1).T, np.triu(x2, 1) + np.triu(x2, 1).T
    if shape == "groups-within":
        kw = dict(groups=np.repeat([0, 1, 2, 3], 20), dyads="within")
    Y = (rng.random((n, m)) < expit(-1.5 + 0.4 * x1)).astype(float)
    if shape == "undirected":
        Y = np.triu(Y, 1) + np.triu(Y, 1).T
    preds = {"a": x1, "b": x2}
    prep = prepare(Y, preds, **kw)
    dd = lg.dyad_data(prep)
    fit = lg.observed_fit(prep, dd)
    monkeypatch.setattr(lg, "_series_degree", lambda *args: 24)
    plan = lg.build_plan(prep, dd, fit, scheme="y", statistic=statistic)
    assert plan.kind == "series-y"
    rows = np.array([rng.permutation(n) for _ in range(30)])
    cols = rows if shape != "two-mode" else np.array([rng.permutation(m) for _ in range(30)])
    if shape == "groups-within":  # relabel within the groups
        rows = np.array([np.concatenate([20 * g + rng.permutation(20) for g in range(4)])
                         for _ in range(30)])
        cols = rows
    stats, passes = plan.statistics_and_passes(rows, cols)
    assert np.sum(passes == 1) >= 10  # most relabellings within the series' reach
    monkeypatch.setattr(lg, "_series_degree", lambda *args: None)
    by_passes = lg.build_plan(prep, dd, fit, scheme="y", statistic=statistic)
    np.testing.assert_allclose(stats, by_passes.statistics(rows, cols), rtol=ROUTE_RTOL)
