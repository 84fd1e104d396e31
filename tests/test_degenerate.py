"""No numpy exception escapes the package, whatever the design.

Degenerate designs (constant, duplicated, nearly duplicated and summed predictors, all-missing
rows and columns, predictors that lose rank only on the complete dyads, a response fitted
exactly or never observed, the issue's n = 10 case) go to every route and scheme: dense
linear y / dsp / freedman-lane (t and coef), logistic y / dsp (z and score), the sparse path,
and correlations (Pearson, Spearman; dense and sparse). Each run either raises the package's
own error (``dyadperm.DyadpermError``) or returns a result whose p-value is NaN exactly for
the terms without a finite observed statistic. Never LinAlgError, FloatingPointError,
ZeroDivisionError or any warning but the package's own (warnings are errors in the test
configuration; a RuntimeWarning from numpy fails the test). Invented data.
"""

from __future__ import annotations

import re
import warnings

import numpy as np
import pytest
import scipy.sparse as sp

import dyadperm as dp
from test_fit_rule import issue_case

N = 10
KW = dict(permutations=19, seed=3)


def _designs() -> dict:
    rng = np.random.default_rng(0)
    y, x1, x3 = (rng.normal(size=(N, N)) for _ in range(3))
    out = {
        "constant": (y, {"x1": x1, "flat": np.full((N, N), 2.0)}),
        "duplicate": (y, {"x1": x1, "x2": x1.copy()}),
        "affine duplicate": (y, {"x1": x1, "x2": 3 * x1 - 1}),
        "near duplicate 1e-9": (y, {"x1": x1, "x2": x1 + 1e-9 * rng.normal(size=(N, N)),
                                    "x3": x3}),
        "near duplicate 1e-6": (y, {"x1": x1, "x2": x1 + 1e-6 * rng.normal(size=(N, N)),
                                    "x3": x3}),
        "sum of two": (y, {"x1": x1, "x3": x3, "s": x1 + x3}),
        "nearly constant": (y, {"x1": x1, "c": 5 + 1e-13 * rng.normal(size=(N, N))}),
        "response constant": (np.full((N, N), 1.5), {"x1": x1}),
        "response fitted exactly": (2 * x1 - x3 + 1, {"x1": x1, "x3": x3}),
        "response never observed": (np.full((N, N), np.nan), {"x1": x1}),
        "issue n = 10": issue_case(),
    }
    yr = y.copy()
    yr[2, :] = np.nan
    yr[:, 5] = np.nan
    out["response row and column all missing"] = (yr, {"x1": x1, "x3": x3})
    xr = x1.copy()
    xr[4, :] = np.nan
    out["predictor row all missing"] = (y, {"x1": xr, "x3": x3})
    ind = np.zeros((N, N))
    ind[0, 1] = ind[3, 7] = 1.0
    yi = y.copy()
    yi[0, 1] = yi[3, 7] = np.nan
    out["indicator only where the response is missing"] = (yi, {"x1": x1, "ind": ind})
    few = np.full((N, N), np.nan)
    few[0, 1], few[1, 2], few[2, 3] = 1.0, 2.0, 0.5
    out["predictor nearly never observed"] = (y, {"x1": x1, "few": few})
    one = np.zeros((N, N))
    one[0, 1] = 1.0
    out["one nonzero dyad"] = (y, {"x1": x1, "one": one})
    ym = y.copy()
    ym[rng.random((N, N)) < 0.15] = np.nan
    x2 = x1.copy()
    gone = np.isnan(ym) & ~np.eye(N, dtype=bool)
    x2[gone] = rng.normal(size=gone.sum())  # x2 = x1 exactly wherever the response is seen
    out["duplicate on the complete dyads only"] = (ym, {"x1": x1, "x2": x2})
    return out


DESIGNS = _designs()


def _routes(y, X) -> dict:
    yb = np.where(np.isnan(y), np.nan, (y > np.nanmedian(y)).astype(float)) \
        if np.isfinite(y).any() else y
    last = list(X.values())[-1]
    routes = {}
    for scheme in ("y", "dsp", "freedman-lane"):
        for stat in ("t", "coef"):
            routes[f"linear {scheme} {stat}"] = (
                lambda s=scheme, t=stat: dp.regress(y, X, scheme=s, statistic=t, **KW))
    for scheme in ("y", "dsp"):
        for stat in ("t", "score"):
            routes[f"logistic {scheme} {stat}"] = (
                lambda s=scheme, t=stat: dp.regress(yb, X, model="logistic", scheme=s,
                                                    statistic=t, **KW))
    for method in ("pearson", "spearman"):
        routes[f"correlation {method}"] = (
            lambda m=method: dp.correlate(y, last, method=m, **KW))
    return routes


def outcome(call):
    """'error: ...' for the package's own error, else the result; any other exception and
    any warning that is not the package's own fails the test."""
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        warnings.simplefilter("ignore", dp.DyadpermWarning)  # the package's own notes
        try:
            res = call()
        except dp.DyadpermError as err:
            return f"error: {err}"
    tested = res.tested_index()
    # a p-value exactly for the terms with a finite observed statistic, never 1/(m + 1)
    # standing in for a failed observed fit
    assert np.array_equal(np.isnan(np.asarray(res.p)[tested]), ~np.isfinite(res.observed))
    for field in ("p_greater", "p_less", "p_se", "p_adjusted"):
        assert np.array_equal(np.isnan(np.asarray(getattr(res, field))[tested]),
                              ~np.isfinite(res.observed)), field
    return res


@pytest.mark.parametrize("design", sorted(DESIGNS))
def test_every_route_gives_the_package_error_or_nan_p(design):
    y, X = DESIGNS[design]
    for route, call in _routes(y, X).items():
        try:
            outcome(call)
        except AssertionError as err:  # pragma: no cover - names the route on failure
            raise AssertionError(f"{design} / {route}: {err}") from err


def test_designs_that_must_be_refused_are_refused_on_every_regression_route():
    must = {
        "constant": r"predictor 'flat' is constant over the dyad set",
        "duplicate": r"predictor 'x2' is perfectly collinear with 'x1' over the dyad set",
        "affine duplicate": r"predictor 'x2' is perfectly collinear with 'x1'",
        "sum of two": r"predictor 's' is perfectly collinear with 'x1' and 'x3'",
        "nearly constant": r"predictor 'c' is constant over the dyad set",
        "response never observed": r"too few dyads for the model: 0 complete dyads for 2 terms",
        "issue n = 10": r"predictor 'x2' is nearly collinear with 'x1' over the 87 complete",
        "indicator only where the response is missing": (
            r"predictor 'ind' is constant over the 88 complete dyads"),
        "predictor nearly never observed": r"too few dyads for the model: 3 complete dyads",
        "duplicate on the complete dyads only": (
            r"predictor 'x2' is perfectly collinear with 'x1' over the \d+ complete dyads"),
    }
    for design, message in must.items():
        y, X = DESIGNS[design]
        for route, call in _routes(y, X).items():
            if route.startswith("correlation"):
                continue
            got = outcome(call)
            assert isinstance(got, str) and re.search(message, got), (design, route, got)


def test_response_problems_are_named():
    y, X = DESIGNS["response fitted exactly"]
    for scheme in ("y", "dsp", "freedman-lane"):
        with pytest.raises(dp.InputError, match=r"response 'response' is fitted exactly by the "
                                                r"predictors over the dyad set"):
            dp.regress(y, X, scheme=scheme, **KW)
    y, X = DESIGNS["response constant"]
    with pytest.raises(dp.InputError, match=r"response 'response' has no variation over the "
                                            r"dyad set"):
        dp.regress(y, X, **KW)
    with pytest.raises(dp.InputError, match=r"too few dyads for a correlation: 0 dyads where "
                                            r"both 'a' and 'b' are observed"):
        dp.correlate(np.full((N, N), np.nan), X["x1"], **KW)


def _sparse_cases():
    rng = np.random.default_rng(4)
    n = 30
    Y = sp.random(n, n, density=0.15, random_state=3, format="csr")
    Y.setdiag(0)
    Y.eliminate_zeros()
    a = rng.normal(size=n)
    cat = rng.integers(0, 3, n)
    X = sp.random(n, n, density=0.2, random_state=5, format="csr")
    X.setdiag(0)
    X.eliminate_zeros()
    cases = {
        "same twice": ({"s1": dp.same(cat), "s2": dp.same(cat)},
                       r"predictor 's2' is perfectly collinear with 's1' over the dyad set"),
        "sender nearly twice": ({"a": dp.sender(a),
                                 "b": dp.sender(a + 1e-9 * rng.normal(size=n))},
                                r"predictor 'b' is nearly collinear with 'a' over the dyad set: "
                                r"condition number \d\.\d+e\+08"),
        "constant same": ({"a": dp.sender(a), "c": dp.same(np.zeros(n))},
                          r"predictor 'c' is constant over the dyad set"),
        "constant gap": ({"a": dp.sender(a), "g": dp.gap(np.ones(n))},
                         r"predictor 'g' is constant over the dyad set"),
        "pair_sum = sender + receiver": ({"p": dp.pair_sum(a), "s": dp.sender(a),
                                          "r": dp.receiver(a)},
                                         r"predictor 'r' is perfectly collinear with 'p' and 's'"),
        "network twice": ({"x": X, "x2": 2 * X},
                          r"predictor 'x2' is perfectly collinear with 'x' over the dyad set"),
        "response as its predictor": ({"y": Y.copy()},
                                      r"response 'response' is fitted exactly by the predictors"),
    }
    return dp.SparseNetwork.from_scipy(Y), cases


@pytest.mark.parametrize("case", sorted(_sparse_cases()[1]))
def test_sparse_path_refuses_by_the_same_rule(case):
    Ys, cases = _sparse_cases()
    preds, message = cases[case]
    for stat in ("t", "coef"):
        got = outcome(lambda: dp.regress(Ys, preds, scheme="y", statistic=stat, **KW))
        assert isinstance(got, str) and re.search(message, got), got
    last = list(preds.values())[-1]
    for method in ("pearson", "spearman"):
        outcome(lambda: dp.correlate(Ys, last, method=method, **KW))
