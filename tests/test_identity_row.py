"""The observed statistic is the identity relabelling through the same kernels.

design.md: "the observed statistic and the permuted ones go through the same code path".
With exact enumeration the identity is relabelling number 0 (``pipeline.permutations``:
index 0 unranks to the identity), so ``res.null[0]`` must equal ``res.observed`` bit for
bit on every route, statistic and data shape: dense linear (y, dsp, freedman-lane; t and
coef; complete, missing, undirected, two-mode, groups with dyads within and all, float32
layers), logistic (y, dsp; z, coef, score; complete and missing), the sparse path (t, coef;
correlations), dense correlations (Pearson, Spearman; complete and missing) and the layer
matrix. The observed statistic also agrees with the route's own fit (statsmodels-checked
elsewhere) to rounding. Invented data.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp

import dyadperm as dp

RNG = np.random.default_rng(20261203)
N = 5
Y, X1, X2 = (RNG.normal(size=(N, N)) for _ in range(3))
X1[1, 0] = 0.3  # (keeps the values apart from any tie)
YM = Y.copy()
YM[0, 2] = YM[3, 1] = np.nan
X2M = X2.copy()
X2M[4, 0] = np.nan
SYM_Y, SYM_X = (Y + Y.T) / 2, (X1 + X1.T) / 2
TWO_Y, TWO_X = RNG.normal(size=(3, 4)), RNG.normal(size=(3, 4))
G = 6
GY, GX = RNG.normal(size=(G, G)), RNG.normal(size=(G, G))
GROUPS = np.array(["a", "b", "a", "b", "a", "b"])
NB = 6
XB1, XB2 = RNG.normal(size=(NB, NB)), RNG.normal(size=(NB, NB))
YB = (RNG.random((NB, NB)) < 1 / (1 + np.exp(-(0.7 * XB1)))).astype(float)
YBM = YB.copy()
YBM[0, 3] = YBM[5, 1] = np.nan
SPARSE_Y = sp.csr_array(np.where(RNG.random((NB, NB)) < 0.4, np.round(RNG.random((NB, NB)), 2),
                                 0.0) * (1 - np.eye(NB)))
ATTR = RNG.normal(size=NB)


def _cases() -> dict:
    cases = {}
    shapes = {
        "complete": lambda **kw: dp.regress(Y, {"x1": X1, "x2": X2}, **kw),
        "missing": lambda **kw: dp.regress(YM, {"x1": X1, "x2": X2M}, **kw),
        "undirected": lambda **kw: dp.regress(SYM_Y, {"s": SYM_X, "near": dp.gap(ATTR[:N])},
                                              **kw),
        "two-mode": lambda **kw: dp.regress(TWO_Y, {"x": TWO_X}, **kw),
        "groups within": lambda **kw: dp.regress(GY, {"x": GX}, groups=GROUPS, **kw),
        "groups all": lambda **kw: dp.regress(GY, {"x": GX}, groups=GROUPS, dyads="all", **kw),
        "float32": lambda **kw: dp.regress(Y, {"x1": X1, "x2": X2}, storage="float32", **kw),
    }
    for shape, call in shapes.items():
        for scheme in ("y", "dsp", "freedman-lane"):
            for stat in ("t", "coef"):
                cases[f"linear {shape} {scheme} {stat}"] = (
                    lambda c=call, s=scheme, t=stat, **kw: c(scheme=s, statistic=t, **kw))
    for shape, yb in (("complete", YB), ("missing", YBM)):
        for scheme in ("y", "dsp"):
            for stat in ("t", "coef", "score"):
                cases[f"logistic {shape} {scheme} {stat}"] = (
                    lambda y=yb, s=scheme, t=stat, **kw: dp.regress(
                        y, {"x1": XB1, "x2": XB2}, model="logistic", scheme=s, statistic=t,
                        **kw))
    for stat in ("t", "coef"):
        cases[f"sparse y {stat}"] = (lambda t=stat, **kw: dp.regress(
            dp.SparseNetwork.from_scipy(SPARSE_Y), {"near": dp.gap(ATTR), "up": dp.sender(ATTR ** 2)},
            scheme="y", statistic=t, **kw))
    for method in ("pearson", "spearman"):
        cases[f"sparse correlation {method}"] = (lambda m=method, **kw: dp.correlate(
            dp.SparseNetwork.from_scipy(SPARSE_Y), dp.sender(ATTR), method=m, **kw))
        cases[f"correlation complete {method}"] = (
            lambda m=method, **kw: dp.correlate(Y, X1, method=m, **kw))
        cases[f"correlation missing {method}"] = (
            lambda m=method, **kw: dp.correlate(YM, X2M, method=m, **kw))
    cases["layer matrix"] = lambda **kw: dp.correlate([Y[:4, :4], X1[:4, :4], X2[:4, :4]], **kw)
    return cases


CASES = _cases()


def same_bits(a, b) -> bool:
    a, b = np.asarray(a, dtype=np.float64), np.asarray(b, dtype=np.float64)
    return a.shape == b.shape and np.array_equal(a.view(np.uint64), b.view(np.uint64))


@pytest.mark.parametrize("case", sorted(CASES))
def test_identity_is_null_row_zero_and_the_observed_statistic(case):
    res = CASES[case](exact=True, permutations=1)
    assert res.exact and np.all(np.isfinite(res.observed))
    assert same_bits(np.asarray(res.null)[0], res.observed), (res.null[0], res.observed)
    fit = np.asarray(res.stat)[res.tested_index()] if res.kind == "regression" \
        else np.asarray(res.stat)
    tol = 1e-5 if "float32" in case else 1e-8
    np.testing.assert_allclose(res.observed, fit, rtol=tol, atol=tol)
