"""Two-mode data on the sparse path (rows and columns relabelled independently).

Sources named beside each check:
- the dense path on the same data as n x m arrays (``dp.regress``/``dp.correlate`` on the
  dense twins; its two-mode rules: ``sender`` reads the row nodes' attribute, ``receiver``
  the column nodes', ``same``/``gap``/``pair_sum`` both), with the same seed: the same
  relabellings, so identical exceedance counts and statistics equal to 1e-10 relative
  (tests/test_sparse.py explains why not bit for bit);
- statsmodels OLS on the vectorised cells (observed fit);
- scipy.stats pearsonr / spearmanr on the vectorised cells (correlations);
- the exact brute-force oracle of tests/reference.py over all n! m! relabellings (lstsq
  refits; Krackhardt 1988, Dekker, Krackhardt & Snijders 2007, Freedman & Lane 1983).
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.stats as st
import statsmodels.api as sm

import dyadperm as dp
from dyadperm.inputs.dyadic import NodeDerived
from reference import counts, exact_null

NULL_TOL = 1e-10
FIT_RTOL = 1e-9
EXACT_RTOL = 1e-9
SCHEMES = ("y", "dsp", "freedman-lane")


def close(a, b):
    return np.all(np.abs(a - b) <= NULL_TOL * np.maximum(1.0, np.abs(b)))


def two_mode(rng, n, m, density):
    """Mostly-zero counts (a person x event attendance count, say) and a sparse predictor."""
    Y = (rng.random((n, m)) < density) * (rng.poisson(2.0, (n, m)) + 1.0)
    X = (rng.random((n, m)) < density) * rng.normal(1.0, 1.0, (n, m))
    return Y, X


def edges(M, name, rows=None, cols=None):
    r, c = np.nonzero(M)
    n, m = M.shape
    return dp.SparseNetwork(r, c, M[r, c], n if rows is None else rows, name=name,
                            col_labels=m if cols is None else cols)


def derived_sets(rng, n, m):
    """Two predictor sets covering every derived kind (sender + receiver + pair_sum
    together would be collinear)."""
    age_r, age_c = rng.normal(40, 12, n).round(), rng.normal(40, 12, m).round()  # ties
    cat_r, cat_c = rng.integers(0, 4, n), rng.integers(0, 4, m)
    first = {"same_area": dp.same(cat_r, cat_c), "age_gap": dp.gap(age_r, age_c),
             "activity": dp.sender(rng.gamma(2.0, 1.0, n)),
             "size": dp.receiver(rng.normal(size=m))}
    second = {"age_sum": dp.pair_sum(rng.gamma(2.0, 1.0, n), rng.gamma(2.0, 1.0, m)),
              "same_area": dp.same(cat_r, cat_c)}
    return first, second


@pytest.mark.parametrize("which", [0, 1])
def test_route_matches_dense_route_same_seed(rng, which):
    n, m = 70, 45
    Y, X = two_mode(rng, n, m, 0.08)
    preds = derived_sets(rng, n, m)[which]
    sparse_preds = dict(preds, contacts=edges(X, "contacts"))
    dense_preds = dict(preds, contacts=X)
    net = edges(Y, "attended")
    cells = np.ones((n, m), dtype=bool)
    for scheme in SCHEMES:
        for statistic in ("t", "coef"):
            kw = dict(scheme=scheme, statistic=statistic, permutations=150, seed=20240611)
            res = dp.regress(net, sparse_preds, **kw)
            ref = dp.regress(Y, dense_preds, **kw)
            assert res.notes[0].startswith(f"sparse path: {scheme}") \
                and not [n for n in ref.notes if not n.startswith("no intervals")]
            assert res.two_mode and ref.two_mode and res.n_nodes == ref.n_nodes == n + m
            assert res.n_dyads == ref.n_dyads == n * m
            null_s, null_d = np.asarray(res.null), np.asarray(ref.null)
            assert close(null_s, null_d), (scheme, statistic, np.abs(null_s - null_d).max())
            np.testing.assert_array_equal(res.exceed, ref.exceed)
            np.testing.assert_array_equal(res.p, ref.p)
    # source: statsmodels OLS on the vectorised cells (the observed fit)
    A = sm.add_constant(np.column_stack([
        (p.dense(tuple(map(str, range(n))), tuple(map(str, range(m))))
         if isinstance(p, NodeDerived) else p)[cells] for p in dense_preds.values()]))
    ols = sm.OLS(Y[cells], A).fit()
    res = dp.regress(net, sparse_preds, scheme="dsp", permutations=20, seed=1)
    np.testing.assert_allclose(res.coef, ols.params, rtol=FIT_RTOL, atol=1e-12)
    np.testing.assert_allclose(res.se, ols.bse, rtol=FIT_RTOL)
    np.testing.assert_allclose(res.stat, ols.tvalues, rtol=FIT_RTOL)
    assert res.r2 == pytest.approx(ols.rsquared, rel=FIT_RTOL)


@pytest.mark.parametrize("scheme", SCHEMES)
def test_exact_enumeration_matches_brute_force(rng, scheme):
    n, m = 4, 3
    Y, X = two_mode(rng, n, m, 0.6)
    Y[0, 0] = 4.0
    X[1, 2] = 1.5
    a_r, a_c = rng.integers(0, 3, n).astype(float), rng.integers(0, 3, m).astype(float)
    cat_r, cat_c = np.array([0, 1, 1, 0]), np.array([1, 0, 1])
    preds = {"x": edges(X, "x"), "gap": dp.gap(a_r, a_c), "same": dp.same(cat_r, cat_c)}
    rows, cols = tuple(map(str, range(n))), tuple(map(str, range(m)))
    Xs = [X] + [p.dense(rows, cols) for p in list(preds.values())[1:]]
    for statistic in ("t", "coef"):
        res = dp.regress(edges(Y, "y"), preds, scheme=scheme, statistic=statistic,
                         permutations=1000)
        assert res.exact is True and res.permutations == 144  # 4! 3!
        # source: brute force over all 4! x 3! independent row/column relabellings
        obs, null = exact_null(Y, Xs, scheme, statistic, directed=True, two_mode=True)
        np.testing.assert_allclose(res.stat[1:], obs, rtol=EXACT_RTOL)
        np.testing.assert_allclose(np.sort(np.asarray(res.null), axis=0), np.sort(null, axis=0),
                                   rtol=EXACT_RTOL, atol=1e-12)
        b2, bg, bl = counts(obs, null)
        np.testing.assert_array_equal(res.p[1:], b2 / 144)
        np.testing.assert_array_equal(res.p_greater[1:], bg / 144)


@pytest.mark.parametrize("method", ["pearson", "spearman"])
def test_correlation_matches_scipy_and_dense_path(rng, method):
    n, m = 40, 30
    Y, X = two_mode(rng, n, m, 0.15)
    Y[0, 1] = -2.0  # a negative value: its rank lies below the zeros'
    rows, cols = tuple(map(str, range(n))), tuple(map(str, range(m)))
    fn = st.pearsonr if method == "pearson" else st.spearmanr
    for other in (sp.csr_array(X), dp.sender(rng.integers(0, 4, n).astype(float)),
                  dp.receiver(rng.integers(0, 4, m).astype(float)),
                  dp.same(rng.integers(0, 3, n), rng.integers(0, 3, m))):
        res = dp.correlate(sp.csr_array(Y), other, method=method, permutations=120, seed=5)
        dense = other.toarray() if sp.issparse(other) else other.dense(rows, cols)
        # source: scipy.stats pearsonr / spearmanr on the vectorised cells
        assert res.r[0] == pytest.approx(fn(Y.ravel(), dense.ravel())[0], rel=FIT_RTOL)
        ref = dp.correlate(Y, other.toarray() if sp.issparse(other) else other,
                           method=method, permutations=120, seed=5)
        assert res.notes[0].startswith("sparse path") \
                and not [n for n in ref.notes if not n.startswith("no intervals")]
        assert close(np.asarray(res.null), np.asarray(ref.null))
        np.testing.assert_array_equal(res.exceed, ref.exceed)


def test_edge_tables_and_labels(rng):
    """from_edges / from_scipy of two-mode data, aligned by label as the dense path is."""
    table = {"person": ["ann", "bo", "bo", "cy", "ann"], "event": ["e2", "e1", "e3", "e3", "e1"],
             "times": [1.0, 2.0, 1.0, 3.0, 2.0]}
    net = dp.SparseNetwork.from_edges(table, source="person", target="event", weight="times",
                                      two_mode=True, name="went")
    assert net.two_mode and net.labels == ("ann", "bo", "cy")
    assert net.col_labels == ("e1", "e2", "e3") and net.shape == (3, 3)
    np.testing.assert_array_equal(net.toarray(), [[2, 1, 0], [2, 0, 1], [0, 0, 3]])
    # the same node sets in another order, isolated nodes included
    other = dp.SparseNetwork.from_edges(table, source="person", target="event",
                                        weight="times", nodes=["cy", "bo", "ann", "dee"],
                                        col_nodes=["e3", "e2", "e1"])
    assert other.shape == (4, 3) and other.toarray()[3].sum() == 0.0
    rect = dp.SparseNetwork.from_scipy(sp.csr_array(np.ones((2, 5))))
    assert rect.two_mode and rect.col_labels == ("0", "1", "2", "3", "4")
    # a predictor given in another node order is aligned by label
    n, m = 12, 9
    Y, X = two_mode(rng, n, m, 0.4)
    perm_r, perm_c = rng.permutation(n), rng.permutation(m)
    rows, cols = [f"p{i}" for i in range(n)], [f"e{j}" for j in range(m)]
    shuffled = edges(X[np.ix_(perm_r, perm_c)], "x", [rows[i] for i in perm_r],
                     [cols[j] for j in perm_c])
    a = dp.regress(edges(Y, "y", rows, cols), {"x": shuffled}, scheme="dsp", permutations=30,
                   seed=2)
    b = dp.regress(edges(Y, "y", rows, cols), {"x": edges(X, "x", rows, cols)}, scheme="dsp",
                   permutations=30, seed=2)
    np.testing.assert_array_equal(np.asarray(a.null), np.asarray(b.null))


def test_errors_name_the_rule(rng):
    n, m = 6, 4
    Y, X = two_mode(rng, n, m, 0.5)
    Y[0, 0] = 1.0
    net = edges(Y, "y")
    with pytest.raises(dp.InputError, match="directed=False applies to one-mode data only"):
        dp.SparseNetwork([0], [1], None, 3, directed=False, col_labels=2)
    with pytest.raises(dp.InputError, match=r"column position 4 is outside 0 \.\. 1"):
        dp.SparseNetwork([0], [4], None, 3, col_labels=2)
    with pytest.raises(dp.InputError, match="reverse needs one-mode data"):
        dp.regress(net, {"r": dp.reverse(None)}, scheme="dsp", permutations=5)
    with pytest.raises(dp.InputError, match="groups: supported for one-mode networks only"):
        dp.regress(net, {"s": dp.sender(np.arange(n))}, groups=np.arange(n) % 2,
                   permutations=5)
    with pytest.raises(dp.InputError, match="directed=False does not apply to two-mode"):
        dp.regress(net, {"s": dp.sender(np.arange(n))}, directed=False, permutations=5)
    with pytest.raises(dp.InputError, match="two-mode data need col_values"):
        dp.regress(net, {"g": dp.gap(np.arange(n))}, permutations=5)
    with pytest.raises(dp.InputError, match="predictor 'x' is one-mode but the response is "
                                            "two-mode"):
        dp.regress(net, {"x": dp.SparseNetwork([0], [1], None, n, name="x")}, permutations=5)
    with pytest.raises(dp.InputError, match=r"predictor 'x' has shape 4 x 6; the response "
                                            r"has 6 x 4"):
        dp.regress(net, {"x": sp.csr_array(X.T)}, permutations=5)
    with pytest.raises(dp.InputError, match="method='spearman': 'b' is a gap predictor"):
        dp.correlate(net, dp.gap(np.arange(n), np.arange(m)), method="spearman",
                     permutations=5)
