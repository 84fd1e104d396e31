"""The sparse path (runner/sparse.py, kernels/sparse.py) against references outside it.

Sources named beside each check:
- an exact brute-force oracle written here from the formulas of shared/methods.md
  (relabel M[np.ix_(p, p)], refit by numpy lstsq; Krackhardt 1988 for Y-permutation);
- statsmodels OLS on the vectorised dyads (observed fit);
- scipy.stats pearsonr / spearmanr on the vectorised dyads (correlations);
- dense n x n arrays built by ``NodeDerived.dense`` and summed by numpy (closed forms);
- plain-numpy twins of the kernels, written here (O(n^2) sums, dict lookups);
- the dense engine path on the same data and seed (null statistics).

Why the null statistics are compared to 1e-10 and not bit for bit: the dense path
standardises every layer (subtracts the mean, divides by the standard deviation), turns the
predictors into an orthonormal basis by a streaming QR, and sums products of those values
over all N dyads in row order; the sparse path sums
over the response's edges only, with predictors centred by their closed-form means, and
never visits the other N - E dyads. The two Gram matrices are equal in exact arithmetic
but are rounded along different sequences of operations, so their last bits differ (at
n = 300 every null statistic differs, by 2e-13 typically and 5e-13 at most, scaled by
max(1, |t|)); bit equality would need the same rounding sequence, i.e. the O(N)
dense sum the sparse path exists to avoid. The tests therefore require
|t_sparse - t_dense| <= 1e-10 * max(1, |t_dense|) for every permutation, and identical
exceedance counts and p-values for the same seed (the p-value rule counts ties within a
relative 1e-9, far above this rounding).
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.stats as st
import statsmodels.api as sm

import dyadperm as dp
from dyadperm.inputs import memory
from dyadperm.inputs import sparse as dsp_
from dyadperm.routes import sparse_products as products
from dyadperm.inputs.dyadic import NodeDerived
from dyadperm.kernels.sparse import gap_gap_sum, row_lookup

# Tolerances (named in one place)
NULL_TOL = 1e-10  # |sparse - dense| <= NULL_TOL * max(1, |dense|), see the module docstring
FIT_RTOL = 1e-9  # observed fit vs statsmodels / the dense QR fit
SUM_RTOL = 1e-11  # closed forms vs numpy sums over the dense arrays
EXACT_RTOL = 1e-9  # brute-force oracle vs the sparse path


# --- helpers ------------------------------------------------------------------------------
def dyad_index(n: int, directed: bool):
    """Rows and columns of the dyad set: off-diagonal (directed) or i < j (undirected)."""
    mask = ~np.eye(n, dtype=bool) if directed else np.triu(np.ones((n, n), dtype=bool), 1)
    return np.nonzero(mask)


def sparse_response(rng, n: int, density: float, *, directed: bool, weighted: bool = True):
    """A mostly-zero response (counts) with no self-loops; symmetric when undirected."""
    Y = (rng.random((n, n)) < density) * (rng.poisson(2.0, (n, n)) + 1.0 if weighted else 1.0)
    np.fill_diagonal(Y, 0.0)
    if not directed:
        Y = np.triu(Y, 1)
        Y = Y + Y.T
    return Y


def sparse_predictor(rng, n: int, density: float, *, directed: bool):
    X = (rng.random((n, n)) < density) * rng.normal(1.0, 1.0, (n, n))
    np.fill_diagonal(X, 0.0)
    if not directed:
        X = np.triu(X, 1)
        X = X + X.T
    return X


def dense_of(pred, labels):
    """A predictor as the dense n x n array the dense path sees."""
    if isinstance(pred, NodeDerived):
        return pred.dense(labels)
    if sp.issparse(pred):
        return pred.toarray()
    return pred


def brute_force_t(Y, Xs, perm, directed):
    """t statistics of every predictor for one relabelling, by lstsq on the dyads.

    Source: methods.md, Y-permutation (Krackhardt 1988): relabel the response
    Y'[i, j] = Y[p[i], p[j]], regress it on [1, X] over the dyad set, t = b / se.
    """
    rows, cols = dyad_index(Y.shape[0], directed)
    Yp = Y[np.ix_(perm, perm)]
    A = np.column_stack([np.ones(rows.size)] + [X[rows, cols] for X in Xs])
    yv = Yp[rows, cols]
    beta, *_ = np.linalg.lstsq(A, yv, rcond=None)
    resid = yv - A @ beta
    df = rows.size - A.shape[1]
    cov = resid @ resid / df * np.linalg.inv(A.T @ A)
    return (beta / np.sqrt(np.diag(cov)))[1:]


# --- kernels against plain-numpy twins ------------------------------------------------------
@pytest.mark.parametrize("n", [2, 3, 7, 40])
def test_gap_gap_sum_matches_pairwise_sum(rng, n):
    a = rng.integers(0, 4, n).astype(float)  # ties on purpose
    c = rng.normal(size=n)
    c[: n // 2] = c[0]  # ties in the second attribute too
    # source: plain numpy twin, the O(n^2) sum over pairs i < j
    i, j = np.triu_indices(n, 1)
    want = (np.abs(a[i] - a[j]) * np.abs(c[i] - c[j])).sum()
    assert gap_gap_sum(a, c) == pytest.approx(want, rel=SUM_RTOL, abs=1e-12)
    # same attribute twice: sum (a_i - a_j)^2 over pairs (common practice)
    assert gap_gap_sum(c, c) == pytest.approx(((c[i] - c[j]) ** 2).sum(), rel=SUM_RTOL,
                                              abs=1e-12)


@pytest.mark.parametrize("directed", [True, False])
def test_row_lookup_matches_dense_array(rng, directed):
    n = 17
    X = sparse_predictor(rng, n, 0.3, directed=directed)
    Y = sparse_response(rng, n, 0.3, directed=directed)
    preds = {"x": sp.csr_array(X), "x2": sp.csr_array(sparse_predictor(rng, n, 0.2,
                                                                       directed=directed))}
    prep = dsp_.prepare_sparse(sp.csr_array(Y), preds, directed=directed)
    nptr, nidx, nval = products._row_tables(prep.terms, n, not directed)
    # source: the dense arrays themselves, at every off-diagonal dyad
    for s, M in enumerate([X, preds["x2"].toarray()]):
        for i in range(n):
            for j in range(n):
                if i != j:
                    assert row_lookup(nptr, nidx, nval, s, i, j) == M[i, j]


@pytest.mark.parametrize("directed", [True, False])
@pytest.mark.parametrize("n", [3, 9, 31])
def test_sparse_cross_matches_numpy_twin(rng, n, directed):
    Y = sparse_response(rng, n, 0.3, directed=directed)
    Y[1, 2] = Y[2, 1] = 2.0  # never an empty response, even at n = 3
    labels = tuple(str(i) for i in range(n))
    attr_a = rng.permutation(np.arange(n) % 2)  # both values occur: 'same' varies
    attr_b = rng.normal(size=n)
    X = sparse_predictor(rng, n, 0.4, directed=directed)
    X[0, 1] = X[1, 0] = 1.5  # at least one tie, and a zero dyad beside it
    X[0, 2] = X[2, 0] = 0.0
    preds = {"s": dp.same(attr_a), "g": dp.gap(attr_b), "p": dp.pair_sum(attr_b),
             "x": sp.csr_array(X)}
    if directed:
        preds.update(snd=dp.sender(attr_b), rcv=dp.receiver(attr_a.astype(float)))
    prep = dsp_.prepare_sparse(sp.csr_array(Y), preds, directed=directed)
    mom = products.fixed_products(prep)
    _, ysd = products._response_sd("y", prep.n_dyads, mom.y_sum, mom.y_sq)
    plan = products.build_sparse_plan(prep, mom, ysd, statistic="t")
    perms = np.stack([rng.permutation(n) for _ in range(5)] + [np.arange(n)])
    got = plan.cross(perms)
    rows, cols = dyad_index(n, directed)
    for b, p in enumerate(perms):
        Yp = Y[np.ix_(p, p)]  # source: methods.md, Y'[i, j] = Y[p[i], p[j]]
        for c, (name, pred) in enumerate(preds.items()):
            x = dense_of(pred, labels)[rows, cols]
            want = (Yp[rows, cols] * (x - x.mean())).sum()  # numpy twin: centred cross product
            assert got[b, c] == pytest.approx(want, rel=SUM_RTOL, abs=1e-9), (name, b)


# --- closed forms against dense sums --------------------------------------------------------
KINDS = ("same", "gap", "sender", "receiver", "pair_sum")


def _derived(kind, values):
    return getattr(dp, kind)(values)


@pytest.mark.parametrize("directed,groups", [(True, None), (True, "within"), (True, "all"),
                                             (False, None), (False, "within")])
def test_fixed_products_match_dense_arrays(rng, directed, groups):
    n = 23
    labels = tuple(str(i) for i in range(n))
    kinds = KINDS if directed else ("same", "gap", "pair_sum")
    preds = {}
    for kind in kinds:
        # integer attributes with ties, and a continuous one, for every kind
        preds[f"{kind}_int"] = _derived(kind, rng.integers(0, 4, n).astype(float))
        preds[f"{kind}_cont"] = _derived(kind, rng.normal(10.0, 2.0, n))
    preds["net"] = sp.csr_array(sparse_predictor(rng, n, 0.3, directed=directed))
    preds["net2"] = sp.csr_array(sparse_predictor(rng, n, 0.3, directed=directed))
    g = rng.integers(0, 3, n) if groups else None
    Y = sparse_response(rng, n, 0.2, directed=directed)
    prep = dsp_.prepare_sparse(sp.csr_array(Y), preds, directed=directed, groups=g,
                               dyads=groups)
    mom = products.fixed_products(prep)
    # source: numpy sums over the dense arrays of NodeDerived.dense, on the dyad set
    mask = ~np.eye(n, dtype=bool) if directed else np.triu(np.ones((n, n), dtype=bool), 1)
    if groups == "within":
        mask &= g[:, None] == g[None, :]
    assert prep.n_dyads == mask.sum()
    X = np.stack([dense_of(p, labels)[mask] for p in preds.values()], axis=1)
    shift = np.array([t.shift for t in prep.terms])
    np.testing.assert_allclose(mom.mean + shift, X.mean(axis=0), rtol=SUM_RTOL, atol=1e-12)
    Xc = X - X.mean(axis=0)
    np.testing.assert_allclose(mom.cross, Xc.T @ Xc, rtol=SUM_RTOL, atol=1e-9)
    assert mom.y_sum == pytest.approx(Y[mask].sum(), rel=SUM_RTOL)
    assert mom.y_sq == pytest.approx((Y[mask] ** 2).sum(), rel=SUM_RTOL)


# --- n = 300: sparse path vs dense path and statsmodels ---------------------------------------
CASES = {
    "directed": dict(directed=True, groups=None, dyads=None),
    "undirected": dict(directed=False, groups=None, dyads=None),
    "groups-within": dict(directed=True, groups=True, dyads="within"),
    "groups-all": dict(directed=False, groups=True, dyads="all"),
}


@pytest.mark.parametrize("case", list(CASES))
def test_sparse_path_matches_dense_path_n300(rng, case):
    opts = CASES[case]
    directed = opts["directed"]
    n = 300
    labels = tuple(str(i) for i in range(n))
    Y = sparse_response(rng, n, 0.03, directed=directed)
    region = rng.integers(0, 6, n)
    age = rng.normal(40.0, 12.0, n).round()
    preds = {"same_region": dp.same(region), "age_gap": dp.gap(age),
             "age_sum": dp.pair_sum(age),
             "contacts": sp.csr_array(sparse_predictor(rng, n, 0.05, directed=directed))}
    if directed:
        preds["activity"] = dp.sender(rng.gamma(2.0, 1.0, n))
        preds["appeal"] = dp.receiver(rng.gamma(2.0, 1.0, n))
    groups = rng.integers(0, 3, n) if opts["groups"] else None
    kw = dict(scheme="y", permutations=300, seed=20240611, groups=groups, dyads=opts["dyads"])
    res = dp.regress(sp.csr_array(Y), preds, **kw)
    assert any("sparse path" in note for note in res.notes)
    dense_preds = {k: dense_of(v, labels) for k, v in preds.items()}
    ref = dp.regress(Y, dense_preds, directed=directed, **kw)
    assert not any("sparse path" in note for note in ref.notes)
    assert res.directed == ref.directed == directed
    assert res.n_dyads == ref.n_dyads
    # source: statsmodels OLS on the vectorised dyads (observed fit)
    mask = ~np.eye(n, dtype=bool) if directed else np.triu(np.ones((n, n), dtype=bool), 1)
    if opts["dyads"] == "within":
        mask &= groups[:, None] == groups[None, :]
    A = sm.add_constant(np.column_stack([m[mask] for m in dense_preds.values()]))
    ols = sm.OLS(Y[mask], A).fit()
    np.testing.assert_allclose(res.coef, ols.params, rtol=FIT_RTOL, atol=1e-12)
    np.testing.assert_allclose(res.se, ols.bse, rtol=FIT_RTOL)
    np.testing.assert_allclose(res.stat, ols.tvalues, rtol=FIT_RTOL)
    assert res.r2 == pytest.approx(ols.rsquared, rel=FIT_RTOL)
    # dense engine path, same seed: null statistics to 1e-10 (module docstring)
    null_s, null_d = np.asarray(res.null), np.asarray(ref.null)
    assert null_s.shape == null_d.shape == (300, len(preds))
    assert np.all(np.abs(null_s - null_d) <= NULL_TOL * np.maximum(1.0, np.abs(null_d)))
    # identical exceedance counts and p-values for the same seed
    np.testing.assert_array_equal(res.exceed, ref.exceed)
    np.testing.assert_array_equal(res.p, ref.p)
    np.testing.assert_array_equal(res.p_greater, ref.p_greater)
    np.testing.assert_array_equal(res.p_less, ref.p_less)


def test_coefficient_statistic_matches_dense_path(rng):
    n = 60
    labels = tuple(str(i) for i in range(n))
    Y = sparse_response(rng, n, 0.1, directed=True)
    preds = {"same": dp.same(rng.integers(0, 3, n)), "snd": dp.sender(rng.normal(5, 2, n))}
    kw = dict(scheme="y", statistic="coef", permutations=100, seed=7)
    res = dp.regress(sp.csr_array(Y), preds, **kw)
    ref = dp.regress(Y, {k: dense_of(v, labels) for k, v in preds.items()}, **kw)
    np.testing.assert_allclose(res.stat, ref.stat, rtol=FIT_RTOL)
    null_s, null_d = np.asarray(res.null), np.asarray(ref.null)
    assert np.all(np.abs(null_s - null_d) <= NULL_TOL * np.maximum(1.0, np.abs(null_d)))
    np.testing.assert_array_equal(res.exceed, ref.exceed)


# --- exact brute force at n = 6 --------------------------------------------------------------
@pytest.mark.parametrize("directed", [True, False])
def test_exact_enumeration_matches_brute_force_n6(rng, directed):
    n = 6
    labels = tuple(str(i) for i in range(n))
    Y = sparse_response(rng, n, 0.5, directed=directed)
    preds = {"kin": sp.csr_array(sparse_predictor(rng, n, 0.5, directed=directed)),
             "same": dp.same(np.array([0, 0, 1, 1, 1, 2])),
             "gap": dp.gap(rng.normal(size=n))}
    if directed:
        preds["snd"] = dp.sender(rng.normal(size=n))
    res = dp.regress(SparseNet(Y, directed), preds, scheme="y", permutations=1000)
    assert res.exact is True and res.permutations == 720
    Xs = [dense_of(p, labels) for p in preds.values()]
    # source: brute force over all 6! relabellings in lexicographic order, lstsq refits
    null = np.array([brute_force_t(Y, Xs, np.array(p), directed)
                     for p in itertools.permutations(range(n))])
    obs = brute_force_t(Y, Xs, np.arange(n), directed)
    np.testing.assert_allclose(res.stat[1:], obs, rtol=EXACT_RTOL)
    np.testing.assert_allclose(np.asarray(res.null), null, rtol=EXACT_RTOL, atol=1e-12)
    # source: methods.md, exact p = b / n! with ties within a relative 1e-9 (identity counted)
    tol = 1e-9 * np.abs(obs)
    b = (np.abs(null) >= np.abs(obs) - tol).sum(axis=0)
    np.testing.assert_array_equal(res.p[1:], b / 720)


def SparseNet(Y, directed):
    """A dense test array as a dp.SparseNetwork (edges only)."""
    r, c = np.nonzero(Y)
    return dp.SparseNetwork(r, c, Y[r, c], Y.shape[0], directed=directed or None, name="ties")


# --- correlation ------------------------------------------------------------------------------
@pytest.mark.parametrize("method", ["pearson", "spearman"])
@pytest.mark.parametrize("other", ["network", "sender", "same"])
def test_correlation_matches_scipy_and_dense_path(rng, method, other):
    n = 80
    labels = tuple(str(i) for i in range(n))
    A = sparse_response(rng, n, 0.08, directed=True)
    A[0, 1] = -3.0  # a negative value: its rank lies below the zeros'
    if other == "network":
        B = sp.csr_array(sparse_predictor(rng, n, 0.1, directed=True))
    elif other == "sender":
        B = dp.sender(rng.integers(0, 5, n).astype(float))
    else:
        B = dp.same(rng.integers(0, 3, n))
    res = dp.correlate(sp.csr_array(A), B, method=method, permutations=200, seed=3)
    assert any("sparse path" in note for note in res.notes)
    Bd = dense_of(B, labels)
    rows, cols = dyad_index(n, True)
    # source: scipy.stats pearsonr / spearmanr on the vectorised dyads
    fn = st.pearsonr if method == "pearson" else st.spearmanr
    want = fn(A[rows, cols], Bd[rows, cols])[0]
    assert res.r[0] == pytest.approx(want, rel=FIT_RTOL)
    ref = dp.correlate(A, Bd, method=method, permutations=200, seed=3)
    null_s, null_d = np.asarray(res.null), np.asarray(ref.null)
    assert np.all(np.abs(null_s - null_d) <= NULL_TOL * np.maximum(1.0, np.abs(null_d)))
    np.testing.assert_array_equal(res.exceed, ref.exceed)
    np.testing.assert_array_equal(res.p, ref.p)


@pytest.mark.parametrize("method", ["pearson", "spearman"])
def test_undirected_correlation_of_two_sparse_networks(rng, method):
    n = 70
    A = sparse_response(rng, n, 0.1, directed=False)
    B = sparse_predictor(rng, n, 0.15, directed=False)
    res = dp.correlate(SparseNet(A, False), sp.csr_array(B), method=method, permutations=150,
                       seed=9)
    assert res.directed is False and res.n_dyads == n * (n - 1) // 2
    rows, cols = dyad_index(n, False)
    # source: scipy.stats pearsonr / spearmanr on one triangle of the dyads
    fn = st.pearsonr if method == "pearson" else st.spearmanr
    assert res.r[0] == pytest.approx(fn(A[rows, cols], B[rows, cols])[0], rel=FIT_RTOL)
    ref = dp.correlate(A, B, method=method, permutations=150, seed=9)
    null_s, null_d = np.asarray(res.null), np.asarray(ref.null)
    assert np.all(np.abs(null_s - null_d) <= NULL_TOL * np.maximum(1.0, np.abs(null_d)))
    np.testing.assert_array_equal(res.p, ref.p)


def test_undirected_edge_list_may_list_each_pair_once(rng):
    n = 25
    A = sparse_response(rng, n, 0.2, directed=False)
    r, c = np.nonzero(np.triu(A, 1))
    flip = rng.random(r.size) < 0.5  # either orientation
    once = dp.SparseNetwork(np.where(flip, c, r), np.where(flip, r, c), A[r, c], n,
                            directed=False)
    np.testing.assert_array_equal(once.toarray(), A)
    x = dp.gap(rng.normal(size=n))
    a = dp.regress(once, {"x": x}, scheme="y", permutations=30, seed=4)
    b = dp.regress(SparseNet(A, False), {"x": x}, scheme="y", permutations=30, seed=4)
    assert a.directed is False
    np.testing.assert_array_equal(np.asarray(a.null), np.asarray(b.null))
    with pytest.raises(dp.InputError, match=r"the dyad \('1', '0'\) is given in both "
                                            "orientations with different values"):
        dp.SparseNetwork([0, 1], [1, 0], [1.0, 2.0], 3, directed=False)


# --- invariance, dispatch and errors -----------------------------------------------------------
def test_null_is_the_same_for_any_jobs_and_chunk_size(rng):
    n = 50
    Y = sparse_response(rng, n, 0.1, directed=True)
    preds = {"g": dp.gap(rng.normal(size=n)), "r": dp.receiver(rng.normal(size=n))}
    a = dp.regress(sp.csr_array(Y), preds, scheme="y", permutations=97, seed=11, jobs=1)
    b = dp.regress(sp.csr_array(Y), preds, scheme="y", permutations=97, seed=11, jobs=2,
                   chunk_size=10)
    # common practice: per-permutation streams make the null independent of the chunking
    np.testing.assert_array_equal(np.asarray(a.null), np.asarray(b.null))


def test_sparse_network_and_scipy_input_agree(rng):
    n = 40
    Y = sparse_response(rng, n, 0.1, directed=True)
    preds = [dp.same(rng.integers(0, 2, n), name="club")]
    a = dp.regress(sp.coo_array(Y), preds, scheme="y", permutations=50, seed=1)
    seen = []
    b = dp.regress(SparseNet(Y, True), preds, scheme="y", permutations=50, seed=1,
                   chunk_size=20, progress=lambda done, total: seen.append((done, total)))
    assert seen[-1] == (50, 50) and len(seen) == 3  # one call per chunk of 20, 20, 10
    # invariance (common practice): the same network as scipy.sparse or SparseNetwork
    assert a.terms == b.terms == ("intercept", "club")
    np.testing.assert_array_equal(np.asarray(a.null), np.asarray(b.null))
    np.testing.assert_array_equal(a.coef, b.coef)


def test_reverse_of_a_sparse_network_is_its_transpose(rng):
    n = 30
    Y = sparse_response(rng, n, 0.15, directed=True)
    res = dp.regress(sp.csr_array(Y), {"recip": dp.reverse(sp.csr_array(Y))}, scheme="y",
                     permutations=20, seed=2)
    rows, cols = dyad_index(n, True)
    # source: statsmodels OLS of y_ij on y_ji (reciprocity)
    ols = sm.OLS(Y[rows, cols], sm.add_constant(Y.T[rows, cols])).fit()
    np.testing.assert_allclose(res.stat, ols.tvalues, rtol=FIT_RTOL)


def test_small_scipy_input_with_dsp_still_runs_dense(rng):
    """A small scipy.sparse response with dsp or freedman-lane keeps the dense path it took
    before the sparse path had those schemes (its results, bit for bit); a SparseNetwork,
    or a scipy.sparse response too large to densify, takes the sparse path."""
    n = 20
    Y = sparse_response(rng, n, 0.2, directed=True)
    s = dp.same(rng.integers(0, 2, n))
    for scheme in ("dsp", "freedman-lane"):
        res = dp.regress(sp.csr_array(Y), {"s": s}, scheme=scheme, permutations=20, seed=1)
        assert res.scheme == scheme and not res.notes
        res = dp.regress(SparseNet(Y, True), {"s": s}, scheme=scheme, permutations=20, seed=1)
        assert res.notes[0].startswith(f"sparse path: {scheme} relabels")
    big = sp.coo_array((np.ones(2), ([0, 5], [1, 0])), shape=(20_000, 20_000))
    assert 8 * 20_000 ** 2 * 3 > dsp_.DENSIFY_LIMIT
    res = dp.regress(big, {"s": dp.same(np.arange(20_000) % 2)}, scheme="dsp",
                     permutations=10, seed=1)
    assert res.notes[0].startswith("sparse path: dsp relabels the predictors")


def test_refusals_name_the_network_and_the_dense_memory(rng, monkeypatch):
    """What the sparse path cannot take is refused before any work, in one line naming the
    network and what the dense route would need (a fake small 'available memory')."""
    monkeypatch.setattr(memory, "available_bytes", lambda: 5 * 1024 ** 2)
    n = 12
    Y = sparse_response(rng, n, 0.3, directed=True)
    net = SparseNet(Y, True)
    gaps = rng.normal(size=n)
    gaps[3] = np.nan
    # n = 12, one predictor: 2 built arrays, 2 layers and the masks, 35 bytes per dyad
    with pytest.raises(dp.InputError, match=r"node '3' has no attribute value \(NaN\); the "
                       r"sparse path takes no missing values; the dense route would need "
                       r"5 KiB of memory for 12 x 12 dyads \(5.0 MiB available\)"):
        dp.regress(net, {"g": dp.gap(gaps)}, scheme="dsp", permutations=10)
    with pytest.raises(dp.InputError, match=r"has value nan; .* 74.5 GiB per network of "
                                            r"100,000 nodes"):
        dp.SparseNetwork([0], [1], [np.nan], 100_000)
    with pytest.raises(dp.InputError, match=r"predictor 'd' is a ndarray: .* the dense route "
                                            r"would need 5 KiB"):
        dp.regress(net, {"d": Y}, scheme="dsp", permutations=10)


def test_errors_name_the_rule(rng):
    n = 12
    Y = sparse_response(rng, n, 0.3, directed=True)
    net = SparseNet(Y, True)
    s = dp.same(rng.integers(0, 2, n))
    with pytest.raises(dp.InputError, match=r"edge 0 \('0', '1'\) has value nan"):
        dp.SparseNetwork([0], [1], [np.nan], 3)
    with pytest.raises(dp.InputError, match=r"the dyad \('0', '1'\) is given more than once"):
        dp.SparseNetwork([0, 0], [1, 1], [1.0, 2.0], 3)
    with pytest.raises(dp.InputError, match="node position 5 is outside 0 .. 2"):
        dp.SparseNetwork([0], [5], None, 3)
    with pytest.raises(dp.InputError, match="predictor 'd' is a ndarray: with a SparseNetwork"):
        dp.regress(net, {"d": Y}, scheme="y", permutations=10)
    with pytest.raises(dp.InputError, match="response 'ties' is a SparseNetwork .edge list., "
                                            "but model='logistic' runs on dense arrays only"):
        dp.regress(net, {"s": s}, model="logistic", permutations=10)
    with pytest.raises(dp.InputError, match="predictor 'x' is a SparseNetwork .edge list., but "
                                            "the response is not sparse"):
        dp.regress(Y, {"x": net}, permutations=10)
    with pytest.raises(dp.InputError, match="method='spearman': 'b' is a gap predictor"):
        dp.correlate(net, dp.gap(rng.normal(size=n)), method="spearman", permutations=10)
    with pytest.raises(dp.InputError, match="directed=False but 'ties' is not symmetric"):
        dp.regress(net, {"s": s}, scheme="y", directed=False, permutations=10)
    with pytest.raises(dp.InputError, match="node '3' has no attribute value"):
        vals = rng.normal(size=n)
        vals[3] = np.nan
        dp.regress(net, {"g": dp.gap(vals)}, scheme="y", permutations=10)
    with pytest.raises(dp.InputError, match="predictor 'twice' is perfectly collinear with 's' "
                                            "over the dyad set: condition number"):
        dp.regress(net, {"s": s, "twice": s}, scheme="y", permutations=10)
    with pytest.raises(dp.InputError, match="response 'ties' has no variation"):
        dp.regress(dp.SparseNetwork([], [], None, n, name="ties"), {"s": s}, scheme="y",
                   permutations=10)


def test_near_collinear_predictors_are_refused_by_the_one_rule(rng):
    """The sparse path fits from Gram matrices (the normal equations, and the kernels'
    Cholesky of each relabelling's Gram): a predictor that keeps less than FIT_PIVOT of its
    spread apart from the others cannot be fitted there, so it is refused before any
    relabelling, naming the pair and the condition number (kernels.options). Just above
    the rule the run goes through and the kernels reproduce the fit's t."""
    n = 40
    Y = sparse_response(rng, n, 0.2, directed=True)
    a = rng.normal(size=n)
    noise = rng.normal(size=n)
    with pytest.raises(dp.InputError, match=r"predictor 'b' is nearly collinear with 'a' over "
                                            r"the dyad set: condition number 2\.\d+e\+06; the "
                                            r"part of 'b' apart from the other predictors is "
                                            r"9\.\de-07 of its spread, below the 1e-05"):
        dp.regress(sp.csr_array(Y), {"a": dp.sender(a), "b": dp.sender(a + 1e-6 * noise)},
                   scheme="y", permutations=10, seed=1)
    res = dp.regress(sp.csr_array(Y), {"a": dp.sender(a), "b": dp.sender(a + 1e-4 * noise)},
                     scheme="y", permutations=10, seed=1)
    assert np.all(np.isfinite(res.observed)) and np.all(np.isfinite(res.p[1:]))
    np.testing.assert_allclose(res.observed, res.stat[1:], rtol=1e-6)
