"""The logistic model (``model="logistic"``) against references outside the engine.

Sources named beside each check:
- statsmodels ``Logit`` and ``GLM(Binomial)`` on the vectorised dyads (estimates, std.
  errors, z, deviance) and ``GLMResults.score_test`` (Rao's score statistic);
- an exact brute-force oracle written here from the formulas in runner/logistic.py's
  docstring (Krackhardt 1988 for the Y-permutation; Potter 2005 for the DSP scheme):
  every relabelling is applied with ``M[np.ix_(p, q)]`` and the model refitted by a plain
  numpy Newton fit, separation being decided by the linear programme of Albert &
  Anderson (1984) through ``scipy.optimize.linprog``;
- plain-numpy twins of every kernel in kernels/irls.py (the same algorithm written with
  vector operations);
- networkx's bundled Davis southern women data (two-mode, 0/1 attendance).
"""

from __future__ import annotations

import itertools
import math

import networkx as nx
import numpy as np
import pytest
import scipy.linalg
import statsmodels.api as sm
from numba import njit
from scipy.optimize import linprog
from scipy.special import expit

import dyadperm as dp
from dyadperm.routes import logistic as lg
from dyadperm.kernels import irls as kn
from reference import P_ATOL, TIE_RTOL, relabel

# --- tolerances -------------------------------------------------------------------------
#: kernel vs its numpy twin: the same Newton steps, sums in another order.
TWIN_RTOL = 1e-9
TWIN_ATOL = 1e-11
#: engine vs statsmodels / the brute-force oracle: both fits converged (Newton's last step
#: below 1e-8, so the estimates agree to far better than this).
FIT_RTOL = 1e-7
FIT_ATOL = 1e-9


# --- data -------------------------------------------------------------------------------
def binary_response(rng, eta):
    """0/1 draws with P(1) = expit(eta), both values present."""
    for _ in range(100):
        Y = (rng.random(eta.shape) < expit(eta)).astype(float)
        if 0 < Y.sum() < Y.size:
            return Y
    raise AssertionError("could not draw a response with both values")


def sym(M):
    U = np.triu(M, 1)
    return U + U.T


def dyad_index(n, m, *, directed=True, two_mode=False, groups=None, within=True):
    """(rows, cols) of the dyad set in row-major order (methods.md, "Dyads and relabelling")."""
    rows, cols = [], []
    for i in range(n):
        for j in range(m):
            if not two_mode:
                if i == j or (not directed and i > j):
                    continue
                if groups is not None and within and groups[i] != groups[j]:
                    continue
            rows.append(i)
            cols.append(j)
    return np.array(rows), np.array(cols)


def all_relabellings(n, m, *, two_mode=False, groups=None):
    """Every relabelling (identity included): n!, n! m!, or within groups."""
    if two_mode:
        for a in itertools.permutations(range(n)):
            for b in itertools.permutations(range(m)):
                yield np.array(a), np.array(b)
        return
    if groups is None:
        for a in itertools.permutations(range(n)):
            yield np.array(a), np.array(a)
        return
    members = [np.flatnonzero(groups == g) for g in np.unique(groups)]
    for combo in itertools.product(*[itertools.permutations(ix) for ix in members]):
        p = np.arange(n)
        for ix, moved in zip(members, combo):
            p[ix] = moved
        yield p, p


# --- the oracle: plain Newton fit, LP separation test, score statistic -------------------
def separated(X, y):
    """Albert & Anderson (1984): the MLE is infinite iff some b has s_d x_d'b >= 0 for every
    dyad with at least one strict (s_d = 2 y_d - 1); found by scipy's linprog (HiGHS)."""
    A = np.where(y == 1, 1.0, -1.0)[:, None] * X
    res = linprog(-A.sum(axis=0), A_ub=-A, b_ub=np.zeros(len(y)),
                  bounds=[(-1, 1)] * X.shape[1], method="highs")
    margins = A @ res.x
    return margins.max() > 1e-7 and margins.min() > -1e-9 * max(1.0, margins.max())


def newton_fit(X, y):
    """Logistic MLE by plain Newton steps from zero, iterated to machine precision; None
    when the data are separated.

    The log likelihood is strictly concave, so a Newton run that settles proves a finite
    maximum; a run that does not settle is referred to the LP test, and must be confirmed
    there (else the oracle itself is in doubt and the test fails).
    """
    b = np.zeros(X.shape[1])
    for _ in range(100):
        mu = expit(X @ b)
        H = X.T @ ((mu * (1 - mu))[:, None] * X)
        try:
            step = np.linalg.solve(H, X.T @ (y - mu))
        except np.linalg.LinAlgError:
            break
        b = b + step
        if np.max(np.abs(step)) < 1e-13 * (1 + np.max(np.abs(b))):
            mu = expit(X @ b)
            return b, np.linalg.inv(X.T @ ((mu * (1 - mu))[:, None] * X))
    assert separated(X, y), "oracle Newton fit did not settle on non-separated data"
    return None


def wald(X, y, col, statistic):
    fit = newton_fit(X, y)
    if fit is None:
        return np.nan
    b, cov = fit
    return b[col] / math.sqrt(cov[col, col]) if statistic == "t" else b[col]


def score_stat(Z, x, y):
    """Rao (1948) score statistic of x added to the reduced model y ~ Z:
    U / sqrt(x'Wx - x'WZ (Z'WZ)^-1 Z'Wx), W from the reduced fit."""
    fit = newton_fit(Z, y)
    if fit is None:
        return np.nan
    mu = expit(Z @ fit[0])
    w = mu * (1 - mu)
    zwx = Z.T @ (w * x)
    info = x @ (w * x) - zwx @ np.linalg.solve(Z.T @ (w[:, None] * Z), zwx)
    return x @ (y - mu) / math.sqrt(info)


def oracle_stats(Y, Xs, scheme, statistic, prow, pcol, rows, cols):
    """The k statistics of one relabelling, by full refits (runner/logistic.py docstring).

    y: relabel Y, fit y_pi on [1, X] (Wald) or score each x_j under y_pi ~ Z_j.
    dsp: e_j = x_j - Z_j c (least squares over the observed complete dyads) as a matrix,
    relabel it, fit y on [Z_j, e_pi] (Wald) or score e_pi under y ~ Z_j.
    Each fit uses the dyads where every vector of that fit is finite (methods.md).
    """
    k = len(Xs)
    X = np.column_stack([np.ones(len(rows))] + [M[rows, cols] for M in Xs])
    y = Y[rows, cols]
    out = np.empty(k)
    if scheme == "y":
        y_pi = relabel(Y, prow, pcol)[rows, cols]
        ok = np.isfinite(y_pi) & np.isfinite(X).all(axis=1)
        for j in range(k):
            if statistic == "score":
                Z = np.delete(X, j + 1, axis=1)
                out[j] = score_stat(Z[ok], X[ok, j + 1], y_pi[ok])
            else:
                out[j] = wald(X[ok], y_pi[ok], j + 1, statistic)
        return out
    ok0 = np.isfinite(y) & np.isfinite(X).all(axis=1)
    for j in range(k):
        others = [c for c in range(k) if c != j]
        Z = np.delete(X, j + 1, axis=1)
        c, *_ = np.linalg.lstsq(Z[ok0], X[ok0, j + 1], rcond=None)
        E = Xs[j] - c[0] - sum(cc * Xs[o] for cc, o in zip(c[1:], others))
        e_pi = relabel(E, prow, pcol)[rows, cols]
        D = np.column_stack([Z, e_pi])
        ok = np.isfinite(y) & np.isfinite(D).all(axis=1)
        if statistic == "score":
            out[j] = score_stat(Z[ok], e_pi[ok], y[ok])
        else:
            out[j] = wald(D[ok], y[ok], k, statistic)
    return out


def oracle(Y, Xs, scheme, statistic, *, directed=True, two_mode=False, groups=None,
           within=True):
    n, m = Y.shape
    rows, cols = dyad_index(n, m, directed=directed, two_mode=two_mode, groups=groups,
                            within=within)
    ident = np.arange(n), np.arange(m)
    obs = oracle_stats(Y, Xs, scheme, statistic, *ident, rows, cols)
    null = np.array([oracle_stats(Y, Xs, scheme, statistic, a, b, rows, cols)
                     for a, b in all_relabellings(n, m, two_mode=two_mode, groups=groups)])
    return obs, null


def exact_counts(obs, null):
    """b (two-sided, greater, less) with the tie rule of methods.md (relative 1e-9) and a
    failed fit (NaN) counted as at least as extreme."""
    tol = TIE_RTOL * np.abs(obs)
    bad = np.isnan(null)
    with np.errstate(invalid="ignore"):
        two = ((np.abs(null) >= np.abs(obs) - tol) | bad).sum(axis=0)
        greater = ((null >= obs - tol) | bad).sum(axis=0)
        less = ((null <= obs + tol) | bad).sum(axis=0)
    return two, greater, less


def check_exact(res, obs, null):
    total = null.shape[0]
    assert res.exact is True and res.permutations == total
    # source: exact brute-force enumeration — the observed statistics
    np.testing.assert_allclose(res.stat[1:], obs, rtol=FIT_RTOL, atol=FIT_ATOL)
    # source: exact brute-force enumeration — the whole null, order-free, failures included
    np.testing.assert_allclose(np.sort(np.asarray(res.null), axis=0), np.sort(null, axis=0),
                               rtol=FIT_RTOL, atol=FIT_ATOL)
    np.testing.assert_array_equal(res.failed, np.isnan(null).sum(axis=0))
    # source: exact enumeration — p = b / total, the identity counted (methods.md)
    two, greater, less = exact_counts(obs, null)
    np.testing.assert_allclose(res.p[1:], two / total, rtol=0, atol=P_ATOL)
    np.testing.assert_allclose(res.p_greater[1:], greater / total, rtol=0, atol=P_ATOL)
    np.testing.assert_allclose(res.p_less[1:], less / total, rtol=0, atol=P_ATOL)


# --- observed fit vs statsmodels -------------------------------------------------------------
@pytest.mark.parametrize("shape", ["directed", "undirected", "two-mode", "missing"])
@pytest.mark.parametrize("scheme", ["y", "dsp"])
def test_observed_fit_matches_statsmodels(rng, shape, scheme):
    n, m = (20, 20) if shape != "two-mode" else (15, 22)
    X1 = rng.normal(size=(n, m))
    X2 = 0.5 * X1 + rng.gamma(2.0, size=(n, m))
    if shape == "undirected":
        X1, X2 = sym(X1), sym(X2)
    eta = -1.0 + 0.8 * X1 - 0.4 * X2
    Y = binary_response(rng, sym(eta) if shape == "undirected" else eta)
    if shape == "undirected":
        Y = sym(Y)
    if shape == "missing":
        Y[rng.random((n, m)) < 0.05] = np.nan
        X2[rng.random((n, m)) < 0.05] = np.nan
    res = dp.regress(Y, {"kin": X1, "canal": X2}, model="logistic", scheme=scheme,
                     permutations=9, seed=1)
    rows, cols = dyad_index(n, m, directed=shape != "undirected", two_mode=shape == "two-mode")
    X = sm.add_constant(np.column_stack([X1[rows, cols], X2[rows, cols]]))
    y = Y[rows, cols]
    ok = np.isfinite(y) & np.isfinite(X).all(axis=1)
    logit = sm.Logit(y[ok], X[ok]).fit(disp=0, tol=1e-12)
    glm = sm.GLM(y[ok], X[ok], family=sm.families.Binomial()).fit(tol=1e-12)
    assert res.terms == ("intercept", "kin", "canal")
    assert res.model == "logistic" and res.n_dyads == int(ok.sum())
    # source: statsmodels Logit on the vectorised dyads (complete ones)
    np.testing.assert_allclose(res.coef, logit.params, rtol=FIT_RTOL, atol=FIT_ATOL)
    np.testing.assert_allclose(res.se, logit.bse, rtol=FIT_RTOL, atol=FIT_ATOL)
    np.testing.assert_allclose(res.stat, logit.tvalues, rtol=FIT_RTOL, atol=FIT_ATOL)
    # source: statsmodels GLM(Binomial): same estimates, and its deviance
    np.testing.assert_allclose(res.coef, glm.params, rtol=FIT_RTOL, atol=FIT_ATOL)
    np.testing.assert_allclose(res.stat, glm.tvalues, rtol=FIT_RTOL, atol=FIT_ATOL)
    np.testing.assert_allclose(res.deviance, glm.deviance, rtol=FIT_RTOL)
    assert np.isnan(res.r2)
    # the Wald statistic is labelled z wherever it appears (table, dict, CSV/JSON)
    assert res.statistic == "z" and res.to_dict()["statistic"] == "z"
    head = [line for line in res.table().splitlines() if line.startswith("term")][0]
    assert head.split()[3] == "z" and "statistic z" in res.table()


@pytest.mark.parametrize("scheme", ["y", "dsp"])
def test_observed_score_matches_statsmodels_score_test(rng, scheme):
    n = 18
    X1, X2 = rng.normal(size=(n, n)), rng.normal(size=(n, n))
    Y = binary_response(rng, -0.5 + 0.6 * X1 + 0.2 * X2)
    res = dp.regress(Y, {"a": X1, "b": X2}, model="logistic", scheme=scheme,
                     statistic="score", permutations=9, seed=1)
    rows, cols = dyad_index(n, n)
    X = sm.add_constant(np.column_stack([X1[rows, cols], X2[rows, cols]]))
    y = Y[rows, cols]
    assert np.isnan(res.stat[0])
    for j in (1, 2):
        reduced = sm.GLM(y, np.delete(X, j, axis=1), family=sm.families.Binomial()).fit(tol=1e-12)
        # source: statsmodels GLMResults.score_test (Rao 1948): chi2 = U^2 / I
        chi2 = reduced.score_test(exog_extra=X[:, j:j + 1])[0]
        np.testing.assert_allclose(res.stat[j] ** 2, float(np.squeeze(chi2)), rtol=1e-7)
        # the sign is that of U = x'(y - mu) (the definition of the signed statistic)
        assert np.sign(res.stat[j]) == np.sign(X[:, j] @ (y - reduced.fittedvalues))
    # score and Wald statistics are asymptotically equivalent (Rao 1948) [memory]: close here
    wald_res = dp.regress(Y, {"a": X1, "b": X2}, model="logistic", scheme=scheme,
                          permutations=9, seed=1)
    np.testing.assert_allclose(res.stat[1:], wald_res.stat[1:], rtol=0.15)


# --- exact p-values vs brute-force enumeration -------------------------------------------
@pytest.mark.parametrize("statistic", ["t", "coef", "score"])
@pytest.mark.parametrize("scheme", ["y", "dsp"])
def test_exact_n6_matches_bruteforce(rng, scheme, statistic):
    n = 6
    X1 = rng.normal(size=(n, n))
    X2 = 0.5 * X1 + rng.normal(size=(n, n))
    Y = binary_response(rng, 0.9 * X1 - 0.3)
    res = dp.regress(Y, {"a": X1, "b": X2}, model="logistic", scheme=scheme,
                     statistic=statistic, exact=True, seed=0)
    # source: exact enumeration over all 6! = 720 relabellings, refitted by the oracle
    obs, null = oracle(Y, [X1, X2], scheme, statistic)
    assert null.shape == (720, 2)
    check_exact(res, obs, null)


@pytest.mark.parametrize("case", ["two-mode", "groups-within", "groups-all", "missing",
                                  "undirected"])
@pytest.mark.parametrize("scheme,statistic", [("y", "t"), ("dsp", "t"), ("dsp", "score"),
                                              ("y", "score")])
def test_exact_data_shapes_match_bruteforce(rng, case, scheme, statistic):
    kw = {}
    groups = None
    two_mode = case == "two-mode"
    n, m = (3, 4) if two_mode else (6, 6)
    if case.startswith("groups"):
        n = m = 8
        groups = np.array([0, 1, 1, 0, 0, 1, 0, 1])
        kw = dict(groups=groups, dyads=case.split("-")[1])
    X1 = rng.normal(size=(n, m))
    X2 = rng.normal(size=(n, m)) + 0.4 * X1
    if case == "undirected":
        X1, X2 = sym(X1), sym(X2)
    Y = binary_response(rng, 0.8 * X1)
    if case == "undirected":
        Y = sym(Y)
    if case == "missing":
        Y[0, 3] = Y[4, 1] = np.nan
        X1[2, 5] = np.nan
        X2[3, 0] = np.nan
    res = dp.regress(Y, {"a": X1, "b": X2}, model="logistic", scheme=scheme,
                     statistic=statistic, exact=True, seed=0, **kw)
    # source: exact enumeration (n! m!, or the product over groups of n_g!)
    obs, null = oracle(Y, [X1, X2], scheme, statistic, directed=case != "undirected",
                       two_mode=two_mode, groups=groups, within=case != "groups-all")
    expected = {"two-mode": 144, "groups-within": 576, "groups-all": 576}.get(case, 720)
    assert null.shape[0] == expected
    check_exact(res, obs, null)


def test_permuted_separation_counts_as_extreme(rng):
    # a sparse response and a binary predictor: many relabellings put no 1 of the
    # response where the predictor is 1 — quasi-complete separation, no finite MLE
    n = 6
    X1 = np.zeros((n, n))
    X1[[0, 0, 1, 2, 3, 4, 5], [1, 2, 0, 3, 5, 1, 4]] = 1.0
    X2 = rng.normal(size=(n, n))
    Y = np.zeros((n, n))
    Y[[0, 1, 2, 4, 5, 3], [1, 3, 3, 0, 2, 4]] = 1.0
    res = dp.regress(Y, {"tie": X1, "x": X2}, model="logistic", scheme="y", exact=True, seed=0)
    # source: exact enumeration, separation decided by the LP of Albert & Anderson (1984)
    obs, null = oracle(Y, [X1, X2], "y", "t")
    assert np.isfinite(obs).all()
    n_sep = int(np.isnan(null[:, 0]).sum())
    assert 50 < n_sep < 700  # the case exercises failed fits
    check_exact(res, obs, null)
    assert res.failed[0] == n_sep
    assert f"tie: {n_sep}" in res.table()
    # the score statistic needs only the reduced fit: the test of 'tie' (reduced model
    # [1, x]) never fails, the test of 'x' fails where [1, tie] separates y_pi
    score = dp.regress(Y, {"tie": X1, "x": X2}, model="logistic", scheme="y",
                       statistic="score", exact=True, seed=0)
    check_exact(score, *oracle(Y, [X1, X2], "y", "score"))
    assert score.failed[0] == 0 and score.failed[1] == n_sep


def test_davis_two_mode_data_run(rng):
    # source: networkx's bundled Davis southern women data (18 women x 14 events, 0/1
    # attendance; Davis, Gardner & Gardner 1941 [memory]): two-mode, rows and columns
    # relabelled independently
    from networkx.algorithms import bipartite

    G = nx.davis_southern_women_graph()
    women, events = G.graph["top"], G.graph["bottom"]
    A = bipartite.biadjacency_matrix(G, women, events).toarray().astype(float)
    # an invented dyadic predictor: woman in the first half of the list and event in the
    # first half of the season, or both in the second halves (the two circles of the data)
    side = ((np.arange(18)[:, None] < 9) == (np.arange(14)[None, :] < 7)).astype(float)
    order = np.arange(14, dtype=float)
    net = dp.Dyadic(A, tuple(women), tuple(events), name="attended")
    X = sm.add_constant(np.column_stack([side.ravel(), np.tile(order, 18)]))
    logit = sm.Logit(A.ravel(), X).fit(disp=0, tol=1e-12)
    for scheme, statistic in (("dsp", "t"), ("dsp", "score"), ("y", "t")):
        res = dp.regress(net, {"same_side": side, "event": dp.receiver(order)},
                         model="logistic", scheme=scheme, statistic=statistic,
                         permutations=199, seed=5)
        assert res.two_mode and res.n_nodes == 32 and res.n_dyads == 18 * 14
        # source: statsmodels Logit on the 252 cells
        np.testing.assert_allclose(res.coef, logit.params, rtol=FIT_RTOL, atol=FIT_ATOL)
        np.testing.assert_allclose(res.se, logit.bse, rtol=FIT_RTOL, atol=FIT_ATOL)
        assert res.failed.sum() == 0
        # the association is strong (z about 6.8): no relabelling of 199 comes close
        assert res.p[1] == 1 / 200


# --- separation in the observed fit, and other errors ---------------------------------------
def test_observed_separation_names_the_predictor(rng):
    n = 12
    crop = (rng.random((n, n)) < 0.4).astype(float)
    Y = binary_response(rng, np.full((n, n), -0.5))
    Y[crop == 1] = 1.0  # every dyad with crop = 1 has a tie: quasi-complete separation
    dist = rng.normal(size=(n, n))
    with pytest.raises(dp.NumericalError,
                       match=r"logistic fit of 'response': the 0s and 1s are separated by "
                             r"predictor 'crop', so .*Albert & Anderson 1984.*Firth's "
                             r"penalised likelihood .*drop or merge categories of 'crop'"):
        dp.regress(Y, {"dist": dist, "crop": crop}, model="logistic", permutations=9, seed=1)


def test_observed_joint_separation_names_the_predictors(rng):
    n = 14
    a, b = rng.normal(size=(n, n)), rng.normal(size=(n, n))
    Y = (a + b > 0).astype(float)  # neither alone separates, together they do
    rows, cols = dyad_index(n, n)
    for x in (a, b):
        y0, y1 = x[rows, cols][Y[rows, cols] == 0], x[rows, cols][Y[rows, cols] == 1]
        assert y0.max() > y1.min() and y1.max() > y0.min()
    with pytest.raises(dp.NumericalError,
                       match=r"separated by predictor '(a|b)' together with '(a|b)'"):
        dp.regress(Y, {"a": a, "b": b}, model="logistic", permutations=9, seed=1)


def test_non_binary_response_is_named(rng):
    n = 5
    Y = (rng.random((n, n)) < 0.5).astype(float)
    Y[3, 1] = 2.0
    Y[1, 4] = 0.5  # first in row-major order of the user's nodes
    labels = ("ash", "birch", "cedar", "elm", "fir")
    net = dp.Dyadic(Y, labels, directed=True, name="water")
    with pytest.raises(dp.InputError, match=r"model='logistic' needs a 0/1 response; 'water' "
                                            r"has 0\.5 at row 'birch', column 'fir'"):
        dp.regress(net, [rng.normal(size=(n, n))], model="logistic", permutations=9)


@pytest.mark.parametrize("kw,message", [
    (dict(scheme="freedman-lane"), r"scheme 'freedman-lane' is not offered for "
                                   r"model='logistic': .*not 0/1"),
    (dict(scheme="x"), r"scheme must be one of y, dsp for model='logistic'; got 'x'"),
    (dict(statistic="r"), r"statistic must be one of t, coef, score for model='logistic'; "
                          r"got 'r'"),
    (dict(storage="float32"), r"storage must be 'float64' for model='logistic'; got 'float32'"),
])
def test_setting_errors(rng, kw, message):
    Y = (rng.random((5, 5)) < 0.5).astype(float)
    with pytest.raises(dp.InputError, match=message):
        dp.regress(Y, [rng.normal(size=(5, 5))], model="logistic", permutations=9, **kw)


def test_response_without_variation(rng):
    with pytest.raises(dp.InputError, match=r"no variation over the dyad set"):
        dp.regress(np.zeros((5, 5)), [rng.normal(size=(5, 5))], model="logistic",
                   permutations=9)


# --- score vs refit decisions, invariances, run files --------------------------------------
def test_score_and_refit_agree_on_a_clear_case(rng):
    n = 25
    kin = rng.normal(size=(n, n))
    canal = 0.4 * kin + rng.normal(size=(n, n))
    Y = binary_response(rng, -1.0 + 1.2 * kin)  # kin: strong effect; canal: true null
    kw = dict(model="logistic", permutations=199, seed=7)
    for scheme in ("y", "dsp"):
        refit = dp.regress(Y, {"kin": kin, "canal": canal}, scheme=scheme, **kw)
        score = dp.regress(Y, {"kin": kin, "canal": canal}, scheme=scheme,
                           statistic="score", **kw)
        # common practice: decisions at alpha = 0.05 agree on a clear case
        assert refit.p[1] == score.p[1] == 1 / 200  # nothing as extreme as kin
        assert refit.p[2] > 0.2 and score.p[2] > 0.2
        # the relabelled statistics of the two agree closely (asymptotic equivalence)
        assert np.corrcoef(refit.null[:, 1], score.null[:, 1])[0, 1] > 0.99


@pytest.mark.parametrize("scheme,statistic", [("y", "t"), ("dsp", "t"), ("dsp", "score"),
                                              ("y", "score")])
def test_null_independent_of_chunks_and_jobs(rng, scheme, statistic):
    n = 15
    X1, X2 = rng.normal(size=(n, n)), rng.normal(size=(n, n))
    Y = binary_response(rng, 0.5 * X1)
    Y[2, 7] = np.nan  # the masked paths too
    kw = dict(model="logistic", scheme=scheme, statistic=statistic, permutations=60, seed=3)
    base = dp.regress(Y, [X1, X2], chunk_size=60, **kw)
    for other in (dict(chunk_size=7), dict(chunk_size=13, jobs=2)):
        res = dp.regress(Y, [X1, X2], **other, **kw)
        # engine contract (design.md): bit-identical for any chunking and jobs
        np.testing.assert_array_equal(np.asarray(res.null), np.asarray(base.null))


def test_run_file_round_trip(rng, tmp_path):
    n = 10
    X1 = rng.normal(size=(n, n))
    Y = binary_response(rng, X1)
    path = tmp_path / "run.h5"
    res = dp.regress(Y, {"a": X1}, model="logistic", permutations=50, seed=2, out=path)
    back = dp.open_result(path)
    assert back.model == "logistic" and np.isnan(back.r2)
    np.testing.assert_array_equal(np.asarray(back.null), np.asarray(res.null))
    np.testing.assert_array_equal(back.p, res.p)
    assert back.deviance == res.deviance


# --- kernels vs plain-numpy twins ---------------------------------------------------------
def _pivots_ok(H):
    """The kernel's test of the information matrix (kernels.irls._cholesky): finite, and
    every Cholesky pivot L[c, c]**2 above SINGULAR_PIVOT * H[c, c]. numpy's cholesky alone
    accepts a matrix holding NaN on some LAPACK builds, and tiny pivots."""
    if not np.all(np.isfinite(H)):
        return False
    try:
        L = np.linalg.cholesky(H)
    except np.linalg.LinAlgError:
        return False
    piv = np.diag(L) ** 2
    return bool(np.all(piv > kn.SINGULAR_PIVOT * np.diag(H)) and np.all(piv > 0))


def pass_twin(Xc, valid, beta):
    """Twin of kernels.irls.newton_pass with numpy vector operations: (X'mu, X'WX) over the
    valid rows of Xc (N, qa); beta carries the first len(beta) columns."""
    Xv = Xc[valid]
    mu = expit(Xv[:, :len(beta)] @ beta)
    return Xv.T @ mu, Xv.T @ ((mu * (1 - mu))[:, None] * Xv)


def h_bound(u):
    """(e^u - 1 - u) / u^2 (kernels.irls: the deviance bound of a step of size u)."""
    with np.errstate(over="ignore"):  # inf past e^709: no step of that size is certified
        return (np.expm1(u) - u) / u ** 2 if u > 1e-4 else 0.5 + u / 6 + u * u / 24


def k_bound(u):
    """(u - 1 + e^-u) / u^2 (kernels.irls: the backward bound)."""
    return (u + np.expm1(-u)) / u ** 2 if u > 1e-4 else 0.5 - u / 6 + u * u / 24


def newton_twin(Xc, q, xy, valid, xmax, beta0, max_iter=lg.MAX_ITER, tol=lg.TOL):
    """Twin of kernels.irls.newton_fit: Newton steps from beta0 over the valid rows of Xc
    (N, qa), the model on its first q columns; a step of size s is taken when
    s h(s M) < 1 (M = sum |d_c| xmax_c) or, after its pass, D'H D k(sM) + D'g > 0 (D = s d),
    else halved; converged when M <= tol or the Newton decrement d'g <= DECREMENT_TOL^2 (the
    step is then taken without a new pass),
    unless the coefficients could put a linear predictor beyond ETA_SUSPECT and some
    combination of them has a mean weight below SATURATED_WEIGHT (FAIL_SATURATED).
    Returns (status, beta, cov, passes, (H, f, d) at the last coefficients evaluated)."""
    if valid.sum() <= q:
        return kn.FAIL_DYADS, None, None, 0, None
    beta = np.array(beta0, dtype=float)
    f, H = pass_twin(Xc, valid, beta)
    passes = 1
    for _ in range(max_iter):
        g = xy[:q] - f[:q]
        if not _pivots_ok(H[:q, :q]):
            return kn.FAIL_SINGULAR, None, None, passes, None
        d = np.linalg.solve(H[:q, :q], g)
        move = np.abs(d) @ xmax
        if move <= tol or d @ g <= kn.DECREMENT_TOL ** 2:
            cols_max = np.concatenate([[1.0], xmax[1:]])  # the intercept: 1
            if np.abs(beta) @ cols_max > kn.ETA_SUSPECT:
                # the least mean weight along a combination of the coefficients
                Xv = Xc[valid][:, :q]
                passes += 1
                if scipy.linalg.eigh(H[:q, :q], Xv.T @ Xv, eigvals_only=True)[0] \
                        < kn.SATURATED_WEIGHT:
                    return kn.FAIL_SATURATED, None, None, passes, None
            return 0, beta + d, np.linalg.inv(H[:q, :q]), passes, (H, f, d)
        for h in range(kn.MAX_HALVINGS + 1):
            s = 0.5 ** h
            f_t, H_t = pass_twin(Xc, valid, beta + s * d)
            passes += 1
            if s * h_bound(s * move) < 1:
                break
            D = s * d
            if D @ H_t[:q, :q] @ D * k_bound(s * move) + D @ (xy[:q] - f_t[:q]) > 0:
                break
        else:
            return kn.FAIL_STEP, None, None, passes, None
        beta, f, H = beta + s * d, f_t, H_t
    return kn.FAIL_ITERATIONS, None, None, passes, None


def score_twin(state, q, xy_x):
    """Twin of kernels.irls.score_from_state (Rao 1948): U = x'y - x'mu - H_xZ d,
    I = H_xx - H_xZ H_ZZ^-1 H_Zx."""
    H, f, d = state
    u = xy_x - f[q] - H[q, :q] @ d
    info = H[q, q] - H[q, :q] @ np.linalg.solve(H[:q, :q], H[:q, q])
    return u / np.sqrt(info) if info > kn.SINGULAR_PIVOT * H[q, q] else np.nan


def run_fit(Xc, q, xy, valid, xmax, beta0, tol=lg.TOL):
    """kernels.irls.newton_fit on the columns of Xc (N, qa): (status, beta, cov, passes,
    score of column q or NaN)."""
    qa = Xc.shape[1]
    XT = np.ascontiguousarray(np.nan_to_num(Xc).T)
    shapes = kn.fit_workspace(qa)
    state = np.empty(shapes[3])
    beta, cov, info = np.full(q, np.nan), np.full((q, q), np.nan), np.zeros(kn.INFO_SIZE)
    status = kn.newton_fit(XT, np.empty(0), np.arange(qa), q, np.asarray(xy, float), valid,
                           bool(valid.all()), np.asarray(xmax, float), np.asarray(beta0, float),
                           np.empty(shapes[0]), np.empty(shapes[1], np.int64),
                           np.empty(shapes[2]), state, beta, cov, info, lg.MAX_ITER, tol)
    score = (kn.score_from_state(state, q, qa, float(xy[q])) if status > 0 and qa > q
             else np.nan)
    return status, beta, cov, int(info[kn.INFO_PASSES]), score


@njit
def _vdot(a, b, n):
    """kernels.irls.vdot (an LLVM intrinsic) called from compiled code."""
    return kn.vdot(a, b, n)


def test_vdot_matches_numpy(rng):
    for n in (16, 32, 256):
        a, b = rng.normal(size=n), rng.normal(size=n)
        # source: numpy's dot product (another summation order)
        np.testing.assert_allclose(_vdot(a, b, n), a @ b, rtol=1e-13, atol=1e-13)
        assert _vdot(a, b, n) == kn._vdot_python(a, b, n) or abs(
            _vdot(a, b, n) - kn._vdot_python(a, b, n)) <= 1e-13 * np.abs(a * b).sum()
    a = rng.normal(size=64)
    assert _vdot(a, a, 32) == _vdot(a[:32].copy(), a[:32].copy(), 32)  # only n entries


@njit
def _vdot_acc_sum(a, b, n, acc, at):
    """kernels.irls.vdot_acc then the lane sum, from compiled code."""
    kn.vdot_acc(a, b, n, acc, at)
    return kn._lane_sum(acc, at)


def test_vdot_acc_matches_numpy(rng):
    L = kn.ACC_LANES
    for n in (L, 2 * L, kn.BLOCK):
        a, b = rng.normal(size=n), rng.normal(size=n)
        acc = np.zeros(3 * L)
        acc[L:2 * L] = rng.normal(size=L)  # lanes carried over from earlier blocks
        carried = acc[L:2 * L].sum()
        # source: numpy's dot product; the other lanes untouched, the summed ones zeroed
        np.testing.assert_allclose(_vdot_acc_sum(a, b, n, acc, L), a @ b + carried,
                                   rtol=1e-13, atol=1e-13)
        assert not acc.any()


@pytest.mark.parametrize("N", [1, 2, 3, 17, 255, 256, 257, 600])
@pytest.mark.parametrize("qa,q", [(1, 1), (3, 2), (4, 4), (6, 5)])
def test_newton_pass_matches_twin(rng, N, qa, q):
    X = rng.normal(size=(N, qa)) * 3
    if qa > 1:
        X[rng.random(N) < 0.2, -1] = 0.0  # ties
    X[:, 0] = 1.0  # the intercept (kernels.irls.newton_pass does not read it)
    valid = rng.random(N) < 0.8
    beta = rng.normal(size=q)
    XT = np.ascontiguousarray(X.T)
    for ext_col in (False, True):
        cols = np.arange(qa, dtype=np.int64)
        ext = np.empty(0)
        XTu = XT
        if ext_col:  # the last column read from ``ext`` (design column P)
            XTu, ext = np.ascontiguousarray(XT[:-1]), np.ascontiguousarray(XT[-1])
            cols[-1] = qa - 1
        for all_valid in (False, True):
            v = np.ones(N, bool) if all_valid else valid
            shapes = kn.fit_workspace(qa)
            H, f = np.empty((qa, qa)), np.empty(qa)
            work = (np.empty(shapes[0]), np.empty(shapes[1], np.int64), np.empty(shapes[2]))
            kn.newton_pass(XTu, ext, cols, q, v, all_valid, beta, *work, H, f)
            t_f, t_H = pass_twin(X, v, beta)
            np.testing.assert_allclose(f, t_f, rtol=TWIN_RTOL, atol=TWIN_ATOL)
            np.testing.assert_allclose(H, t_H, rtol=TWIN_RTOL, atol=TWIN_ATOL)


@pytest.mark.parametrize("N,q", [(2, 1), (3, 2), (17, 3), (600, 4)])
def test_gram_and_smallest_weight_match_scipy(rng, N, q):
    X = np.column_stack([np.ones(N), rng.normal(size=(N, q - 1)) * 2])
    if q > 1:
        X[rng.random(N) < 0.3, -1] = 0.0  # ties
    valid = rng.random(N) < 0.8
    valid[:q] = True
    shapes = kn.fit_workspace(q)
    G = np.empty((q, q))
    kn.gram_pass(np.ascontiguousarray(X.T), np.empty(0), np.arange(q), q, valid, False,
                 np.empty(shapes[0]), np.empty(shapes[2]), G)
    Xv = X[valid]
    # source: numpy's X'X over the valid rows
    np.testing.assert_allclose(G, Xv.T @ Xv, rtol=TWIN_RTOL, atol=TWIN_ATOL)
    w = expit(Xv @ rng.normal(size=q)) * (1 - expit(Xv @ rng.normal(size=q)))
    H = Xv.T @ (w[:, None] * Xv)
    if np.linalg.matrix_rank(Xv) == q:
        # source: scipy's generalized symmetric eigenproblem H v = lambda G v
        np.testing.assert_allclose(kn.smallest_weight(H, G, q, np.empty((3, q, q))),
                                   scipy.linalg.eigh(H, G, eigvals_only=True)[0],
                                   rtol=1e-9, atol=1e-15)


@pytest.mark.parametrize("N,q", [(3, 1), (7, 2), (40, 3), (301, 4), (1000, 5)])
def test_newton_fit_matches_twin(rng, N, q):
    P = q + 1
    X = rng.normal(size=(N, P))
    X[:, 0] = 1.0
    y = (rng.random(N) < expit(X[:, :q] @ rng.normal(scale=0.7, size=q))).astype(float)
    valid = rng.random(N) < 0.9
    beta0 = rng.normal(scale=0.3, size=q)
    xy = X[valid].T @ y[valid]
    xmax = np.abs(X[valid][:, :q]).max(axis=0)
    status, beta, cov, passes, score = run_fit(X, q, xy, valid, xmax, beta0)
    t_status, t_beta, t_cov, t_passes, t_state = newton_twin(X, q, xy, valid, xmax, beta0)
    assert (status > 0) == (t_status == 0) and (status < 0) == (t_status < 0)
    if status < 0:
        assert status == t_status
        return
    assert passes == t_passes
    np.testing.assert_allclose(beta, t_beta, rtol=TWIN_RTOL, atol=TWIN_ATOL)
    np.testing.assert_allclose(cov, t_cov, rtol=TWIN_RTOL, atol=TWIN_ATOL)
    # the score of column q at the fit of the first q: kernel vs twin
    np.testing.assert_allclose(score, score_twin(t_state, q, xy[q]), rtol=TWIN_RTOL,
                               atol=TWIN_ATOL)
    # source: statsmodels Logit on the same rows
    sm_fit = sm.Logit(y[valid], X[valid][:, :q]).fit(disp=0, tol=1e-12)
    np.testing.assert_allclose(beta, sm_fit.params, rtol=FIT_RTOL, atol=FIT_ATOL)
    np.testing.assert_allclose(np.sqrt(np.diag(cov)), sm_fit.bse, rtol=FIT_RTOL)
    if q < P:  # source: statsmodels GLM score test of column q (Rao 1948): chi2 = U^2 / I
        glm = sm.GLM(y[valid], X[valid][:, :q], family=sm.families.Binomial()).fit(tol=1e-12)
        chi2 = float(np.squeeze(glm.score_test(exog_extra=X[valid][:, q:q + 1])[0]))
        np.testing.assert_allclose(score ** 2, chi2, rtol=1e-6)


def test_newton_fit_failure_codes(rng):
    X = np.column_stack([np.ones(8), np.arange(8.0)])
    y = (np.arange(8) >= 4).astype(float)  # x separates y completely
    valid = np.ones(8, dtype=bool)
    xmax = np.abs(X).max(axis=0)
    # diverging coefficients: no convergence, an information that underflows to singular,
    # or fitted probabilities of 0 and 1 to double precision
    failed = (kn.FAIL_ITERATIONS, kn.FAIL_SINGULAR, kn.FAIL_SATURATED)
    assert run_fit(X, 2, X.T @ y, valid, xmax, np.zeros(2))[0] in failed
    assert newton_twin(X, 2, X.T @ y, valid, xmax, np.zeros(2))[0] in failed
    assert separated(X, y)  # source: the LP of Albert & Anderson (1984)
    few = np.zeros(8, dtype=bool)
    few[:2] = True
    assert run_fit(X, 2, X.T @ y, few, xmax, np.zeros(2))[0] == kn.FAIL_DYADS
    dup = np.column_stack([np.ones(8), np.ones(8)])  # singular information
    y2 = np.array([0, 1, 0, 1, 1, 0, 0, 1], float)
    assert run_fit(dup, 2, dup.T @ y2, valid, np.ones(2), np.zeros(2))[0] == kn.FAIL_SINGULAR
    # a step limit of 1 from a distant start: no convergence, not a separation
    X3 = np.column_stack([np.ones(50), rng.normal(size=50)])
    y3 = (rng.random(50) < expit(X3[:, 1])).astype(float)
    assert not separated(X3, y3)
    shapes = kn.fit_workspace(2)
    info = np.zeros(kn.INFO_SIZE)
    status = kn.newton_fit(np.ascontiguousarray(X3.T), np.empty(0), np.arange(2), 2, X3.T @ y3,
                           np.ones(50, bool), True, np.abs(X3).max(axis=0), np.zeros(2),
                           np.empty(shapes[0]), np.empty(shapes[1], np.int64),
                           np.empty(shapes[2]), np.empty(shapes[3]), np.empty(2),
                           np.empty((2, 2)), info, 1, lg.TOL)
    assert status == kn.FAIL_ITERATIONS
    assert info[kn.INFO_STEPS] == 1 and info[kn.INFO_MOVE] > lg.TOL and info[kn.INFO_TERM] >= 0


def _driver_inputs(rng, n, m, k, two_mode, nan):
    p = k + 1
    rows, cols = dyad_index(n, m, two_mode=two_mode)
    N = len(rows)
    X = np.column_stack([np.ones(N), rng.normal(size=(N, k))])
    layer_y = (rng.random((n, m)) < 0.4).astype(float)
    layer_e = rng.normal(size=(n, m, k))
    y = (rng.random(N) < 0.4).astype(float)
    if nan:
        layer_y[rng.integers(n), rng.integers(m)] = np.nan
        layer_e[rng.integers(n), rng.integers(m), 0] = np.nan
        X[rng.integers(N), 1] = np.nan
        y[rng.integers(N)] = np.nan
    B = 5
    rp = np.array([rng.permutation(n) for _ in range(B)], dtype=np.int64)
    cp = np.array([rng.permutation(m) for _ in range(B)], dtype=np.int64) if two_mode else rp
    return dict(rows=rows.astype(np.int64), cols=cols.astype(np.int64), X=X, y=y,
                XT=np.ascontiguousarray(np.nan_to_num(X).T),
                layer_ek=np.ascontiguousarray(layer_e.transpose(2, 0, 1)),
                xmax=np.nan_to_num(np.nanmax(np.abs(X), axis=0)),
                layer_y=layer_y, layer_e=layer_e, rp=rp, cp=cp, p=p, k=k, N=N)


SIZES = [(3, 3, 1, False), (2, 3, 1, True), (7, 7, 2, False), (5, 6, 3, True)]


@pytest.mark.parametrize("n,m,two_mode,directed", [(2, 2, False, True), (3, 3, False, False),
                                                   (7, 7, False, True), (3, 5, True, True),
                                                   (40, 40, False, True)])
def test_gather_rows_matches_twin(rng, n, m, two_mode, directed):
    rows, cols = dyad_index(n, m, directed=directed, two_mode=two_mode)
    layer = rng.normal(size=(n, m))
    layer[rng.random((n, m)) < 0.1] = np.nan
    for _ in range(4):
        rp = rng.permutation(n).astype(np.int64)
        cp = rng.permutation(m).astype(np.int64) if two_mode else rp
        out = np.empty(len(rows))
        kn.gather_rows(layer, rows.astype(np.int64), cols.astype(np.int64), rp, cp, out)
        # twin: the relabelled matrix by fancy indexing, read on the dyad set
        np.testing.assert_array_equal(out, relabel(layer, rp, cp)[rows, cols])


def _fit_twin(Xc, q, y, valid, beta0):
    """newton_twin with X'y and max |x| of the valid rows: (status, beta, cov, passes,
    state)."""
    yv = np.where(valid, np.nan_to_num(y), 0.0)
    Xz = np.nan_to_num(Xc)
    xmax = np.abs(Xz[valid][:, :q]).max(axis=0) if valid.any() else np.zeros(q)
    return newton_twin(Xz, q, Xz.T @ yv, valid, xmax, beta0)


@pytest.mark.parametrize("n,m,k,two_mode", SIZES)
@pytest.mark.parametrize("nan", [False, True])
def test_refit_drivers_match_twin(rng, n, m, k, two_mode, nan):
    d = _driver_inputs(rng, n, m, k, two_mode, nan)
    X, p, B, N = d["X"], d["p"], d["rp"].shape[0], d["N"]
    fixed_ok = np.isfinite(X).all(axis=1)
    beta0 = rng.normal(scale=0.1, size=p)
    # the free first step of complete data: start + A (X'y_pi - m), A and m given
    A = rng.normal(scale=0.01, size=(p, p))
    onesteps = [np.zeros((0, p + 1))] + ([] if nan else [np.column_stack([A, rng.normal(size=p)])])
    for onestep in onesteps:
        for use_z in (True, False):
            out = np.empty((B, k))
            passes = np.zeros(B, np.int64)
            kn.refit_y(d["layer_y"], d["rows"], d["cols"], d["rp"], d["cp"], d["XT"], fixed_ok,
                       d["xmax"], beta0, onestep, out, passes, lg.MAX_ITER, lg.TOL, use_z)
            for b in range(B):
                yb = relabel(d["layer_y"], d["rp"][b], d["cp"][b])[d["rows"], d["cols"]]
                valid = fixed_ok & np.isfinite(yb)
                start = beta0.copy()
                if onestep.shape[0]:
                    start += onestep[:, :p] @ (np.nan_to_num(X).T @ yb - onestep[:, p])
                # the driver bounds |x| over the dyads of fixed_ok
                yv = np.where(valid, yb, 0.0)
                Xz = np.nan_to_num(X)
                st, beta, cov, n_pass, _ = newton_twin(Xz, p, Xz.T @ yv, valid, d["xmax"],
                                                       start)
                want = (np.full(k, np.nan) if st < 0 else
                        beta[1:] / np.sqrt(np.diag(cov)[1:]) if use_z else beta[1:])
                np.testing.assert_allclose(out[b], want, rtol=TWIN_RTOL, atol=TWIN_ATOL)
                if st == 0:  # (a diverging fit may stop a pass sooner or later)
                    assert passes[b] == 1 + n_pass
    zcols = lg._reduced_columns(k)
    design = np.concatenate([zcols, np.full((k, 1), p, np.int64)], axis=1)
    ok = np.array([np.isfinite(d["y"]) & np.isfinite(X[:, zc]).all(axis=1) for zc in zcols])
    b0 = rng.normal(scale=0.1, size=(k, p))
    cinv = np.array([np.linalg.inv(M @ M.T + np.eye(k)) for M in rng.normal(size=(k, k, k))])
    reduced_fits = [np.zeros((0, N))] + ([] if nan else [rng.random(size=(k, N))])
    ties = np.flatnonzero(d["y"] == 1.0).astype(np.int64)
    for reduced in reduced_fits:  # mu of each reduced fit (complete data)
        out = np.empty((B, k))
        passes = np.zeros(B, np.int64)
        emax = np.nan_to_num(np.nanmax(np.abs(d["layer_e"]), axis=(0, 1)))
        kn.refit_dsp(d["layer_ek"], d["rows"], d["cols"], d["rp"], d["cp"], d["XT"], d["y"],
                     ok, design, d["xmax"], emax, b0, reduced, ties, cinv, out, passes,
                     lg.MAX_ITER, lg.TOL, True)
        for b in range(B):
            total = 0
            for a in range(k):
                e = relabel(d["layer_e"][:, :, a], d["rp"][b], d["cp"][b])[d["rows"], d["cols"]]
                Xb = np.column_stack([X[:, zcols[a]], e])
                valid = ok[a] & np.isfinite(e)
                start = b0[a].copy()
                if reduced.shape[0]:
                    # the first Newton step from the reduced fit: gradient (0, U),
                    # information [[Z'WZ, S], [S', Q]] (kernels.irls.refit_dsp)
                    r, w = d["y"] - reduced[a], reduced[a] * (1 - reduced[a])
                    S = X[:, zcols[a]].T @ (w * e)
                    info = (w * e) @ e - S @ cinv[a] @ S
                    if info > 0:
                        step_e = (e @ r) / info
                        start[-1] += step_e
                        start[:-1] -= cinv[a] @ S * step_e
                # max |e| over the relabelled dyads, or (complete data) over the matrix
                xmax = np.append(d["xmax"][zcols[a]], emax[a] if reduced.shape[0] else
                                 np.abs(np.nan_to_num(e[valid])).max())
                yv = np.where(valid, np.nan_to_num(d["y"]), 0.0)
                Xz = np.nan_to_num(Xb)
                st, beta, cov, n_pass, _ = newton_twin(Xz, p, Xz.T @ yv, valid, xmax, start)
                want = np.nan if st < 0 else beta[-1] / np.sqrt(cov[-1, -1])
                np.testing.assert_allclose(out[b, a], want, rtol=TWIN_RTOL, atol=TWIN_ATOL)
                total += 1 + n_pass if st == 0 else np.nan
            if np.isfinite(total):
                assert passes[b] == total


def score_rows_twin(E, F, resid_at, weight_at, x_at, rp, cp, col_start, col_stop):
    """Twin of kernels.irls.score_rows with relabelled matrices built by M[np.ix_(p, q)]:
    for term a, over the cells j in [col_start[i], col_stop[i]) of each row i,
    U = sum e r, Q = sum w e^2, S_0 = sum w e, S_c = sum w e x_c (e relabelled)."""
    n, K, m = E.shape
    jj = np.arange(m)[None, :]
    cells = (jj >= col_start[:, None]) & (jj < col_stop[:, None])
    out = np.empty((rp.shape[0], K, x_at.shape[1] + 3))
    for b in range(rp.shape[0]):
        for a in range(K):
            e = relabel(E[:, a, :], rp[b], cp[b])[cells]
            r, w = F[:, resid_at[a], :][cells], F[:, weight_at[a], :][cells]
            sums = [e @ r, w @ (e * e), w @ e] + [(w * e) @ F[:, c, :][cells] for c in x_at[a]]
            out[b, a] = sums
    return out


ROW_CASES = [(*size, ranges) for size in SIZES + [(4, 4, 5, False)]
             for ranges in ("full", "upper", "ragged")
             if not (ranges == "upper" and size[3])]  # a triangle is a one-mode dyad set


@pytest.mark.parametrize("n,m,k,two_mode,ranges", ROW_CASES)
def test_score_rows_matches_twin(rng, n, m, k, two_mode, ranges):
    B = 11  # more than one block of permutations, and a partial block
    E = rng.normal(size=(n, k, m))
    F = rng.normal(size=(n, 2 * k + k, m))
    F[:, k:2 * k, :] = rng.random(size=(n, k, m))  # weights
    resid_at = np.arange(k, dtype=np.int64)
    weight_at = np.arange(k, 2 * k, dtype=np.int64)
    x_at = np.array([[2 * k + c for c in range(k) if c != a] for a in range(k)],
                    dtype=np.int64).reshape(k, k - 1)
    rp = np.array([rng.permutation(n) for _ in range(B)], dtype=np.int64)
    cp = np.array([rng.permutation(m) for _ in range(B)], dtype=np.int64) if two_mode else rp
    if ranges == "full":
        cs, ce = np.zeros(n, np.int64), np.full(n, m, np.int64)
    elif ranges == "upper":
        cs, ce = np.arange(1, n + 1, dtype=np.int64), np.full(n, m, np.int64)
    else:
        cs = rng.integers(0, m + 1, size=n).astype(np.int64)
        ce = np.array([rng.integers(s, m + 1) for s in cs], dtype=np.int64)
    for block in (1, 4, 8):
        out = np.empty((B, k, k + 2))
        kn.score_rows(E.reshape(-1), k, F.reshape(-1), F.shape[1], resid_at, weight_at, x_at,
                      rp, cp, cs, ce, np.empty((block, m), np.int32),
                      np.empty((block, k, k + 2)), out)
        want = score_rows_twin(E, F, resid_at, weight_at, x_at, rp, cp, cs, ce)
        np.testing.assert_allclose(out, want, rtol=TWIN_RTOL, atol=TWIN_ATOL)
        if block == 1:
            first = out.copy()
        else:  # the same bits whatever the block (kernels.irls.score_rows notes)
            np.testing.assert_array_equal(out, first)
    # the statistic from the sums: U / sqrt(Q - S'(Z'WZ)^-1 S) (Rao 1948)
    A = rng.normal(size=(k, k, k))
    cinv = np.array([a @ a.T + k * np.eye(k) for a in A]) * 1e-3
    stat = np.empty((B, k))
    kn.score_from_sums(out, cinv, stat)
    for b in range(B):
        for a in range(k):
            S = out[b, a, 2:]
            info = out[b, a, 1] - S @ cinv[a] @ S
            want = out[b, a, 0] / np.sqrt(info) if info > 0 else np.nan
            np.testing.assert_allclose(stat[b, a], want, rtol=TWIN_RTOL, atol=TWIN_ATOL)


@pytest.mark.parametrize("n,m,k,two_mode", SIZES)
@pytest.mark.parametrize("nan", [False, True])
def test_score_refit_drivers_match_twin(rng, n, m, k, two_mode, nan):
    d = _driver_inputs(rng, n, m, k, two_mode, nan)
    X, B = d["X"], d["rp"].shape[0]
    zcols = lg._reduced_columns(k)
    gamma = rng.normal(scale=0.3, size=(k, k))
    out = np.empty((B, k))
    passes = np.zeros(B, np.int64)
    # dsp with a reduced refit per relabelling
    ok = np.array([np.isfinite(d["y"]) & np.isfinite(X[:, zc]).all(axis=1) for zc in zcols])
    kn.score_dsp_refit(d["layer_ek"], d["rows"], d["cols"], d["rp"], d["cp"], d["XT"], d["y"],
                       ok, zcols, d["xmax"], gamma, out, passes, lg.MAX_ITER, lg.TOL)
    for b in range(B):
        total = 0
        for a in range(k):
            e = relabel(d["layer_e"][:, :, a], d["rp"][b], d["cp"][b])[d["rows"], d["cols"]]
            Xb = np.nan_to_num(np.column_stack([X[:, zcols[a]], e]))
            valid = ok[a] & np.isfinite(e)
            yv = np.where(valid, np.nan_to_num(d["y"]), 0.0)
            st, g, c, n_pass, state = newton_twin(Xb, k, Xb.T @ yv, valid,
                                                  d["xmax"][zcols[a]], gamma[a])
            want = np.nan if st < 0 else score_twin(state, k, Xb[:, k] @ yv)
            np.testing.assert_allclose(out[b, a], want, rtol=TWIN_RTOL, atol=TWIN_ATOL)
            total += 1 + n_pass if st == 0 else np.nan
        if np.isfinite(total):
            assert passes[b] == total
    # y: reduced refit per relabelling, from gamma or (complete data) from the
    # intercept-only fit plus its free first step
    fixed_ok = np.isfinite(X).all(axis=1)
    Xz = np.nan_to_num(X)
    A = rng.normal(scale=0.01, size=(k, k, k))
    onesteps = [np.zeros((0, k, k + 1))] + ([] if nan else [
        np.concatenate([A, rng.normal(size=(k, k, 1))], axis=2)])
    for onestep in onesteps:
        kn.score_y(d["layer_y"], d["rows"], d["cols"], d["rp"], d["cp"], d["XT"], fixed_ok,
                   d["xmax"], zcols, gamma, onestep, out, passes, lg.MAX_ITER, lg.TOL)
        for b in range(B):
            yb = relabel(d["layer_y"], d["rp"][b], d["cp"][b])[d["rows"], d["cols"]]
            valid = fixed_ok & np.isfinite(yb)
            yv = np.where(valid, yb, 0.0)
            total = 1
            for a in range(k):
                Xa = Xz[:, np.append(zcols[a], a + 1)]
                xy = Xa.T @ yv
                start = gamma[a].copy()
                if onestep.shape[0]:
                    start += onestep[a, :, :k] @ (xy[:k] - onestep[a, :, k])
                st, g, c, n_pass, state = newton_twin(Xa, k, xy, valid, d["xmax"][zcols[a]],
                                                      start)
                want = np.nan if st < 0 else score_twin(state, k, xy[k])
                np.testing.assert_allclose(out[b, a], want, rtol=TWIN_RTOL, atol=TWIN_ATOL)
                total += n_pass if st == 0 else np.nan
            if np.isfinite(total):
                assert passes[b] == total


def test_score_y_with_one_predictor_keeps_the_observed_reduced_fit(rng):
    # one predictor, complete data: Z = intercept, sum y_pi = sum y for every relabelling,
    # so the products-only route must equal a reduced refit (canonical-link sufficiency)
    n = 9
    x = rng.normal(size=(n, n))
    Y = binary_response(rng, 0.7 * x)
    res = dp.regress(Y, {"x": x}, model="logistic", scheme="y", statistic="score",
                     permutations=40, seed=4)
    rows, cols = dyad_index(n, n)
    X = np.column_stack([np.ones(len(rows)), x[rows, cols]])
    draws = dp.pipeline.engine.Draws(dp.inputs.design.prepare(Y, {"x": x}).blocks, 40, 40, False, 4)
    rp, _ = draws.permutations(0)
    for b in range(40):
        yb = relabel(Y, rp[b], rp[b])[rows, cols]
        # source: Rao (1948) score statistic after a full reduced refit (the oracle)
        np.testing.assert_allclose(res.null[b, 0], score_stat(X[:, :1], X[:, 1], yb),
                                   rtol=1e-9, atol=1e-12)
