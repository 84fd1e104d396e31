"""dsp and Freedman–Lane on the sparse path (runner/routes/sparse_schemes.py) against references.

Sources named beside each check:
- the dense engine's plan (``routes.linear.build_statistics`` on ``design.prepare`` of the same data as
  dense arrays) for the same relabellings;
- statsmodels OLS on the vectorised dyads (the observed statistic of both schemes is the
  full model's t, by Frisch–Waugh–Lovell for dsp, and because y* = y at the identity for
  Freedman–Lane);
- the exact brute-force oracle of tests/reference.py (all 6! relabellings, lstsq refits;
  Dekker, Krackhardt & Snijders 2007; Freedman & Lane 1983);
- the engine's contract (design.md "Engine"): statistics bit-identical for any chunk size
  and number of jobs.

Tolerance against the dense engine: |sparse - dense| <= NULL_TOL * max(1, |dense|). The two
paths round along different sequences of operations (the dense path sums standardised
values over all N dyads of an orthonormalised stack; the sparse path sums over edges and
closed forms, then standardises), so bit equality is not expected; tests/test_sparse.py
explains the same tolerance for the y scheme.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp
import statsmodels.api as sm

import dyadperm as dp
from dyadperm.inputs import design
from dyadperm.routes import linear as schemes
from dyadperm.routes import sparse as sparse_path
from dyadperm.routes import sparse_products as products
from dyadperm.inputs.dyadic import NodeDerived, Reverse
from dyadperm.pipeline.engine import Draws, run_all
from dyadperm.pipeline.permutations import draw, enumerate_exact
from dyadperm.routes.sparse_schemes import build_sparse_scheme_plan
from reference import counts, exact_null

NULL_TOL = 1e-10
FIT_RTOL = 1e-9
EXACT_RTOL = 1e-9
SCHEMES = ("dsp", "freedman-lane")


# --- helpers ------------------------------------------------------------------------------------
def sparse_response(rng, n, density, *, directed):
    """Mostly-zero counts, no self-loops; symmetric when undirected."""
    Y = (rng.random((n, n)) < density) * (rng.poisson(2.0, (n, n)) + 1.0)
    np.fill_diagonal(Y, 0.0)
    if not directed:
        Y = np.triu(Y, 1)
        Y = Y + Y.T
    return Y


def sparse_predictor(rng, n, density, *, directed):
    X = (rng.random((n, n)) < density) * rng.normal(1.0, 1.0, (n, n))
    np.fill_diagonal(X, 0.0)
    if not directed:
        X = np.triu(X, 1)
        X = X + X.T
    return X


def dense_of(pred, labels, Y):
    if isinstance(pred, NodeDerived):
        return pred.dense(labels)
    if isinstance(pred, Reverse):
        return Y.T.copy()
    return pred.toarray()  # scipy.sparse or SparseNetwork


def edges_of(M, directed, name):
    r, c = np.nonzero(M)
    return dp.SparseNetwork(r, c, M[r, c], M.shape[0], directed=directed or None, name=name)


def inputs(rng, n, *, directed, groups=None, kinds="all"):
    """A sparse response, every kind of derived predictor and a sparse one; their dense
    twins; groups (or None)."""
    labels = tuple(str(i) for i in range(n))
    Y = sparse_response(rng, n, 0.06, directed=directed)
    preds = {"same_region": dp.same(rng.integers(0, 5, n)),
             "age_gap": dp.gap(rng.normal(40.0, 12.0, n).round()),  # ties
             "age_sum": dp.pair_sum(rng.gamma(2.0, 1.0, n)),
             "contacts": sp.csr_array(sparse_predictor(rng, n, 0.05, directed=directed))}
    if directed:
        preds["activity"] = dp.sender(rng.gamma(2.0, 1.0, n))
        preds["appeal"] = dp.receiver(rng.normal(size=n))
        preds["returned"] = dp.reverse(None)
    if kinds != "all":
        preds = {k: v for k, v in preds.items() if k in kinds}
    g = rng.integers(0, 3, n) if groups else None
    dense = {k: dense_of(v, labels, Y) for k, v in preds.items()}
    return Y, preds, dense, g


def problem(rng, n, *, directed, groups=None, dyads=None, kinds="all"):
    """The prepared sparse problem of ``inputs``, the dense one, and the dense arrays."""
    Y, preds, dense, g = inputs(rng, n, directed=directed, groups=groups, kinds=kinds)
    prep = sparse_path.prepare_sparse(sp.csr_array(Y), preds, directed=directed, groups=g,
                                      dyads=dyads)
    dprep = design.prepare(Y, dense, directed=directed, groups=g, dyads=dyads)
    return prep, dprep, Y, dense


def close(a, b):
    return np.all(np.abs(a - b) <= NULL_TOL * np.maximum(1.0, np.abs(b)))


CASES = {
    "directed": dict(directed=True),
    "undirected": dict(directed=False),
    "groups-within": dict(directed=True, groups=True, dyads="within"),
    "groups-all": dict(directed=False, groups=True, dyads="all"),
    "groups-within-undirected": dict(directed=False, groups=True, dyads="within"),
}


# --- against the dense engine -----------------------------------------------------------------
@pytest.mark.parametrize("case", list(CASES))
def test_statistics_match_dense_engine(rng, case):
    prep, dprep, _, _ = problem(rng, 240, **CASES[case])
    rows, _ = draw(prep.blocks, 20240611, 0, 40)
    ident = np.arange(prep.n, dtype=np.int64)[None, :]
    for scheme in SCHEMES:
        for statistic in ("t", "coef"):
            plan = build_sparse_scheme_plan(prep, scheme=scheme, statistic=statistic)
            ref = schemes.build_statistics(dprep, scheme=scheme, statistic=statistic)
            assert plan.k == ref.k == prep.k and plan.n_dyads == ref.n_dyads
            got, want = plan.statistics(rows, rows), ref.statistics(rows, rows)
            assert got.shape == (40, prep.k)
            assert close(got, want), (scheme, statistic, np.abs(got - want).max())
            obs, obs_ref = plan.statistics(ident, ident)[0], ref.statistics(ident, ident)[0]
            assert close(obs, obs_ref)
            # identical exceedance counts (p-value rule of methods.md, ties within 1e-9)
            for a, b in zip(counts(obs, got), counts(obs_ref, want)):
                np.testing.assert_array_equal(a, b)


def test_single_predictor_matches_dense_engine(rng):
    for kinds in (("age_gap",), ("contacts",), ("same_region",)):
        prep, dprep, _, _ = problem(rng, 90, directed=True, kinds=kinds)
        rows, _ = draw(prep.blocks, 5, 0, 30)
        for scheme in SCHEMES:
            plan = build_sparse_scheme_plan(prep, scheme=scheme, statistic="t")
            ref = schemes.build_statistics(dprep, scheme=scheme, statistic="t")
            assert close(plan.statistics(rows, rows), ref.statistics(rows, rows)), kinds


@pytest.mark.slow
@pytest.mark.parametrize("case", ["directed", "groups-within-undirected"])
def test_statistics_match_dense_engine_n2000(rng, case):
    prep, dprep, _, _ = problem(rng, 2000, **CASES[case])
    rows, _ = draw(prep.blocks, 7, 0, 24)
    for scheme in SCHEMES:
        for statistic in ("t", "coef"):
            plan = build_sparse_scheme_plan(prep, scheme=scheme, statistic=statistic)
            ref = schemes.build_statistics(dprep, scheme=scheme, statistic=statistic)
            assert close(plan.statistics(rows, rows), ref.statistics(rows, rows))


@pytest.mark.parametrize("case", ["directed", "undirected", "groups-within-undirected"])
def test_route_matches_dense_route_same_seed(rng, case):
    """dp.regress on edge lists (the sparse route) against dp.regress on the dense twins:
    the same relabellings (same seed), statistics to 1e-10, identical exceedance counts and
    p-values; the observed fit against statsmodels OLS on the vectorised dyads."""
    opts = CASES[case]
    Y, preds, dense, groups = inputs(rng, 120, directed=opts["directed"],
                                     groups=opts.get("groups"))
    net = edges_of(Y, opts["directed"], "ties")
    sparse_preds = {k: (edges_of(dense[k], opts["directed"], k) if k == "contacts" else v)
                    for k, v in preds.items()}
    for scheme in SCHEMES:
        for statistic in ("t", "coef"):
            kw = dict(scheme=scheme, statistic=statistic, permutations=150, seed=20240611,
                      groups=groups, dyads=opts.get("dyads"))
            res = dp.regress(net, sparse_preds, **kw)
            ref = dp.regress(Y, dense, directed=opts["directed"], **kw)
            assert res.notes[0].startswith(f"sparse path: {scheme}") \
                and not [n for n in ref.notes if not n.startswith("no intervals")]
            assert res.terms == ref.terms and res.n_dyads == ref.n_dyads
            null_s, null_d = np.asarray(res.null), np.asarray(ref.null)
            assert close(null_s, null_d), (scheme, statistic)
            np.testing.assert_array_equal(res.exceed, ref.exceed)
            np.testing.assert_array_equal(res.p, ref.p)
            np.testing.assert_allclose(res.stat, ref.stat, rtol=FIT_RTOL, atol=1e-12)
            np.testing.assert_allclose(res.se, ref.se, rtol=FIT_RTOL)
            assert res.r2 == pytest.approx(ref.r2, rel=FIT_RTOL)


# --- observed fit -----------------------------------------------------------------------------
@pytest.mark.parametrize("directed", [True, False])
def test_observed_statistic_is_the_full_model_fit(rng, directed):
    prep, _, Y, dense = problem(rng, 70, directed=directed)
    n = prep.n
    mask = ~np.eye(n, dtype=bool) if directed else np.triu(np.ones((n, n), dtype=bool), 1)
    # source: statsmodels OLS of the vectorised dyads on [1, predictors]
    ols = sm.OLS(Y[mask], sm.add_constant(np.column_stack([M[mask] for M in dense.values()])))
    fit = ols.fit()
    ident = np.arange(n, dtype=np.int64)[None, :]
    mom = products.fixed_products(prep)
    for scheme in SCHEMES:
        t = build_sparse_scheme_plan(prep, scheme=scheme, statistic="t", moments=mom)
        coef = build_sparse_scheme_plan(prep, scheme=scheme, statistic="coef", moments=mom)
        np.testing.assert_allclose(t.statistics(ident, ident)[0], fit.tvalues[1:],
                                   rtol=FIT_RTOL)
        np.testing.assert_allclose(coef.statistics(ident, ident)[0], fit.params[1:],
                                   rtol=FIT_RTOL, atol=1e-12)
        # the plan's observed products: R^2 from them equals statsmodels' (one more outside
        # check of gram_xx and xy)
        r2 = t.xy @ np.linalg.solve(t.gram_xx, t.xy) / prep.n_dyads
        assert r2 == pytest.approx(fit.rsquared, rel=FIT_RTOL)


# --- exact enumeration ------------------------------------------------------------------------
@pytest.mark.parametrize("directed", [True, False])
@pytest.mark.parametrize("scheme", SCHEMES)
def test_exact_enumeration_matches_brute_force_n6(rng, scheme, directed):
    n = 6
    labels = tuple(str(i) for i in range(n))
    Y = sparse_response(rng, n, 0.5, directed=directed)
    Y[0, 1] = Y[1, 0] = 3.0
    preds = {"kin": edges_of(sparse_predictor(rng, n, 0.5, directed=directed), directed, "kin"),
             "same": dp.same(np.array([0, 0, 1, 1, 1, 2])),
             "gap": dp.gap(rng.integers(0, 3, n).astype(float))}  # ties
    if directed:
        preds["snd"] = dp.sender(rng.normal(size=n))
    prep = sparse_path.prepare_sparse(edges_of(Y, directed, "ties"), preds, directed=directed)
    rows, cols = enumerate_exact(prep.blocks, 0, 720)
    Xs = [dense_of(p, labels, Y) for p in preds.values()]
    for statistic in ("t", "coef"):
        plan = build_sparse_scheme_plan(prep, scheme=scheme, statistic=statistic)
        null = plan.statistics(rows, cols)
        obs = plan.statistics(rows[:1], cols[:1])[0]  # index 0 is the identity
        # source: brute force over all 6! relabellings in lexicographic order, lstsq refits
        obs_ref, null_ref = exact_null(Y, Xs, scheme, statistic, directed=directed)
        np.testing.assert_allclose(obs, obs_ref, rtol=EXACT_RTOL)
        np.testing.assert_allclose(null, null_ref, rtol=EXACT_RTOL, atol=1e-12)
        for a, b in zip(counts(obs, null), counts(obs_ref, null_ref)):
            np.testing.assert_array_equal(a, b)


def test_scheme_y_by_pair_sums_matches_the_y_kernel(rng):
    """Scheme y through the pair sums (what two-mode data use) against the one-mode y plan
    of the route (``sparse_products.SparsePlan``, its own kernel) and the dense engine."""
    for case in ("directed", "undirected"):
        prep, dprep, _, _ = problem(rng, 90, **CASES[case])
        mom = products.fixed_products(prep)
        _, y_sd = products._response_sd("y", prep.n_dyads, mom.y_sum, mom.y_sq)
        rows, _ = draw(prep.blocks, 3, 0, 25)
        for statistic in ("t", "coef"):
            plan = build_sparse_scheme_plan(prep, scheme="y", statistic=statistic)
            kernel = products.build_sparse_plan(prep, mom, y_sd, statistic=statistic)
            dense = schemes.build_statistics(dprep, scheme="y", statistic=statistic)
            got = plan.statistics(rows, rows)
            assert close(got, kernel.statistics(rows, rows))
            assert close(got, dense.statistics(rows, rows))


# --- invariance and memory --------------------------------------------------------------------
def test_null_is_bit_identical_for_any_chunking_and_jobs(rng):
    prep, _, _, _ = problem(rng, 80, directed=True, groups=True, dyads="within")
    for scheme in SCHEMES:
        plan = build_sparse_scheme_plan(prep, scheme=scheme, statistic="t")
        # source: the engine's contract (design.md): per-permutation streams, fixed sums
        a = run_all(plan, Draws(prep.blocks, 57, 57, False, 99), jobs=1)
        b = run_all(plan, Draws(prep.blocks, 57, 5, False, 99), jobs=2)
        c = run_all(plan, Draws(prep.blocks, 57, 1, False, 99), jobs=1)
        np.testing.assert_array_equal(a, b)
        np.testing.assert_array_equal(a, c)


def test_plan_holds_nothing_of_size_n_squared(rng):
    """Every array of the plan is O(edges + nodes) (the issue's memory rule)."""
    n = 20_000
    E = 30_000
    src = rng.integers(0, n, E)
    dst = (src + 1 + rng.integers(0, n - 1, E)) % n
    keys = np.unique(src * n + dst)
    y = dp.SparseNetwork(keys // n, keys % n, rng.poisson(1.0, keys.size) + 1.0, n,
                         name="messages")
    keys2 = np.unique(rng.integers(0, n, E) * n + rng.integers(0, n, E))
    keys2 = keys2[keys2 // n != keys2 % n]
    x = dp.SparseNetwork(keys2 // n, keys2 % n, None, n, name="contacts")
    preds = {"contacts": x, "s": dp.same(rng.integers(0, 10, n)), "g": dp.gap(rng.normal(size=n)),
             "a": dp.sender(rng.normal(size=n))}
    prep = sparse_path.prepare_sparse(y, preds)
    bound = 10 * (n + keys.size + keys2.size)
    for scheme in SCHEMES:
        plan = build_sparse_scheme_plan(prep, scheme=scheme, statistic="t")
        arrays = [v for v in vars(plan.pairs).values() if isinstance(v, np.ndarray)]
        arrays += [v for v in vars(plan).values() if isinstance(v, np.ndarray)]
        assert max(a.size for a in arrays) <= bound
        rows, _ = draw(prep.blocks, 1, 0, 2)
        assert np.isfinite(plan.statistics(rows, rows)).all()


def test_errors_name_the_rule(rng):
    n = 15
    Y = sparse_response(rng, n, 0.3, directed=True)
    s = dp.same(rng.integers(0, 2, n))
    prep = sparse_path.prepare_sparse(edges_of(Y, True, "ties"), {"s": s})
    with pytest.raises(dp.InputError, match="scheme must be one of y, dsp, freedman-lane"):
        build_sparse_scheme_plan(prep, scheme="permute-x", statistic="t")
    with pytest.raises(dp.InputError, match="statistic must be one of t, coef"):
        build_sparse_scheme_plan(prep, scheme="dsp", statistic="z")
    twice = sparse_path.prepare_sparse(edges_of(Y, True, "ties"), {"s": s, "again": s})
    with pytest.raises(dp.InputError, match="predictor 'again' is perfectly collinear with "
                                            "'s' over the dyad set: condition number inf"):
        build_sparse_scheme_plan(twice, scheme="freedman-lane", statistic="t")
    flat = sparse_path.prepare_sparse(dp.SparseNetwork([], [], None, n, name="flat"), {"s": s})
    with pytest.raises(dp.InputError, match="response 'flat' has no variation"):
        build_sparse_scheme_plan(flat, scheme="dsp", statistic="t")
