"""Seeded null statistics of every route, pinned bit for bit.

Refactoring the orchestration must not move a single bit of any result. These cases were
recorded with the code as it stood before the routes were made plug-ins of one pipeline
(``tests/data/pinned_nulls.npz``); a change that is meant to alter results (a new
numerical method, say) regenerates the file in its own commit and says why:

    python tests/test_pinned_nulls.py --write
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest
import scipy.sparse as sp

import dyadperm as dp

DATA = Path(__file__).resolve().parent / "data" / "pinned_nulls.npz"


def _inputs():
    rng = np.random.default_rng(20261202)
    n = 11
    x1 = rng.normal(size=(n, n))
    x2 = rng.poisson(1.0, size=(n, n)).astype(float)
    y = 0.4 * x1 - 0.2 * x2 + rng.normal(size=(n, n))
    ym = y.copy()
    ym[rng.random((n, n)) < 0.08] = np.nan
    sym = (y + y.T) / 2
    s1 = (x1 + x1.T) / 2
    attr = rng.normal(size=n)
    cat = rng.integers(0, 3, n)
    groups = np.repeat(["a", "b"], [6, 5])
    two = rng.normal(size=(7, 5))
    two_x = rng.normal(size=(7, 5))
    yb = (rng.random((n, n)) < 1 / (1 + np.exp(-(0.8 * x1 - 0.3)))).astype(float)
    big = 60
    ys = sp.random(big, big, density=0.08, random_state=3, format="csr")
    xs = sp.random(big, big, density=0.1, random_state=4, format="csr")
    battr = rng.normal(size=big)
    return dict(n=n, x1=x1, x2=x2, y=y, ym=ym, sym=sym, s1=s1, attr=attr, cat=cat,
                groups=groups, two=two, two_x=two_x, yb=yb, ys=ys, xs=xs, battr=battr)


def _cases():
    d = _inputs()
    d["yf"] = d["y"].copy()
    d["yf"][1, 2] = d["yf"][4, 7] = np.nan
    X = {"x1": d["x1"], "x2": d["x2"], "near": dp.gap(d["attr"]), "kin": dp.same(d["cat"])}
    common = dict(permutations=120, seed=17, chunk_size=32)
    cases = {}
    for scheme in ("y", "dsp", "freedman-lane"):
        for stat in ("t", "coef"):
            cases[f"linear-{scheme}-{stat}"] = lambda s=scheme, t=stat: dp.regress(
                d["y"], X, scheme=s, statistic=t, **common)
        cases[f"linear-missing-{scheme}"] = lambda s=scheme: dp.regress(
            d["ym"], {"x1": d["x1"], "x2": d["x2"]}, scheme=s, **common)
        # two missing values: the complete-data kernel with the incomplete dyads taken out
        cases[f"linear-fewmissing-{scheme}"] = lambda s=scheme: dp.regress(
            d["yf"], {"x1": d["x1"], "x2": d["x2"]}, scheme=s, **common)
        cases[f"linear-groups-{scheme}"] = lambda s=scheme: dp.regress(
            d["y"], {"x1": d["x1"], "near": dp.gap(d["attr"])}, scheme=s, groups=d["groups"],
            **common)
        cases[f"linear-undirected-{scheme}"] = lambda s=scheme: dp.regress(
            d["sym"], {"s1": d["s1"], "near": dp.gap(d["attr"])}, scheme=s, **common)
        cases[f"linear-twomode-{scheme}"] = lambda s=scheme: dp.regress(
            d["two"], {"x": d["two_x"]}, scheme=s, **common)
    for scheme in ("y", "dsp"):
        for stat in ("t", "score"):
            cases[f"logistic-{scheme}-{stat}"] = lambda s=scheme, t=stat: dp.regress(
                d["yb"], {"x1": d["x1"], "kin": dp.same(d["cat"])}, model="logistic",
                scheme=s, statistic=t, **common)
    for method in ("pearson", "spearman"):
        cases[f"correlation-{method}"] = lambda m=method: dp.correlate(
            d["y"], d["x1"], method=m, **common)
        cases[f"correlation-missing-{method}"] = lambda m=method: dp.correlate(
            d["ym"], d["x2"], method=m, **common)
    cases["layers"] = lambda: dp.correlate([d["y"], d["x1"], d["x2"]], **common)
    cases["sparse-y"] = lambda: dp.regress(
        dp.SparseNetwork.from_scipy(d["ys"]),
        {"xs": d["xs"], "near": dp.gap(d["battr"])}, scheme="y", **common)
    cases["sparse-correlation"] = lambda: dp.correlate(
        dp.SparseNetwork.from_scipy(d["ys"]), d["xs"], **common)
    cases["exact"] = lambda: dp.regress(d["y"][:5, :5], {"x1": d["x1"][:5, :5]}, scheme="dsp",
                                        permutations=200, seed=1)
    return cases


CASES = _cases()


@pytest.mark.parametrize("name", sorted(CASES))
def test_null_is_bit_identical_to_the_pinned_one(name):
    pinned = np.load(DATA)
    res = CASES[name]()
    got = np.asarray(res.null)
    want = pinned[name]
    assert got.shape == want.shape
    # bit for bit, NaN (failed fits) included
    assert np.array_equal(got.view(np.uint64), want.view(np.uint64)), name
    obs = pinned[name + ":observed"]
    assert np.array_equal(np.asarray(res.stat, dtype=np.float64).view(np.uint64),
                          obs.view(np.uint64)), name


if __name__ == "__main__" and sys.argv[1:] == ["--write"]:
    out = {}
    for name, make in sorted(CASES.items()):
        res = make()
        out[name] = np.asarray(res.null, dtype=np.float64)
        out[name + ":observed"] = np.asarray(res.stat, dtype=np.float64)
        print(name, out[name].shape)
    DATA.parent.mkdir(exist_ok=True)
    np.savez(DATA, **out)
