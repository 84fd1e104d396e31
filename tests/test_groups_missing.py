"""Exact p-values with groups, missing dyads and two-mode 4 x 5 against brute force.

Source of truth: an exhaustive enumeration of every relabelling written here from the
formulas of methods.md (relabel with M[np.ix_(p, q)], refit each model with lstsq over the
dyads where every matrix of that fit is finite). Nothing from dyadperm's engine is reused.
"""

import itertools

import numpy as np
import pytest

import dyadperm as dp
from reference import P_ATOL, TIE_RTOL


def _fit_t(cols, y):
    """Classical OLS t statistics of [1, cols] on y (lstsq)."""
    A = np.column_stack([np.ones(y.size)] + list(cols))
    beta, *_ = np.linalg.lstsq(A, y, rcond=None)
    r = y - A @ beta
    s2 = r @ r / (y.size - A.shape[1])
    cov = s2 * np.linalg.inv(A.T @ A)
    return beta / np.sqrt(np.diag(cov))


def _stat(Y, Xs, mask, scheme, p, q):
    """Statistics of all terms for relabelling (p rows, q columns), with NaN as missing."""
    k = len(Xs)
    out = np.empty(k)
    mats = list(Xs) + [Y]
    complete = mask & np.all([np.isfinite(M) for M in mats], axis=0)
    for j in range(k):
        others = [Xs[c] for c in range(k) if c != j]
        if scheme == "y":
            Yp = Y[np.ix_(p, q)]
            use = mask & np.isfinite(Yp) & np.all([np.isfinite(X) for X in Xs], axis=0)
            out[j] = _fit_t([X[use] for X in Xs], Yp[use])[1 + j]
        elif scheme == "dsp":
            Z = np.column_stack([np.ones(complete.sum())] + [X[complete] for X in others])
            g, *_ = np.linalg.lstsq(Z, Xs[j][complete], rcond=None)
            E = Xs[j] - g[0] - sum(gc * X for gc, X in zip(g[1:], others))
            E = np.where(mask | mask.T, E, np.nan) if E.shape[0] == E.shape[1] else E
            Ep = E[np.ix_(p, q)]
            use = mask & np.isfinite(Ep) & np.isfinite(Y) & np.all(
                [np.isfinite(X) for X in others] or [np.ones_like(mask)], axis=0)
            out[j] = _fit_t([X[use] for X in others] + [Ep[use]], Y[use])[-1]
        else:  # freedman-lane
            Z = np.column_stack([np.ones(complete.sum())] + [X[complete] for X in others])
            g, *_ = np.linalg.lstsq(Z, Y[complete], rcond=None)
            fitted = g[0] + sum(gc * X for gc, X in zip(g[1:], others))
            R = Y - fitted
            R = np.where(mask | mask.T, R, np.nan) if R.shape[0] == R.shape[1] else R
            ystar = fitted + R[np.ix_(p, q)]
            use = mask & np.isfinite(ystar) & np.all([np.isfinite(X) for X in Xs], axis=0)
            out[j] = _fit_t([X[use] for X in Xs], ystar[use])[1 + j]
    return out


def _exact_p(Y, Xs, mask, scheme, relabellings):
    n, m = Y.shape
    obs = _stat(Y, Xs, mask, scheme, np.arange(n), np.arange(m))
    null = np.array([_stat(Y, Xs, mask, scheme, p, q) for p, q in relabellings])
    tol = TIE_RTOL * np.abs(obs)
    return (np.abs(null) >= np.abs(obs) - tol).mean(axis=0), null.shape[0]


def _within_group_relabellings(groups):
    idx = [np.flatnonzero(groups == g) for g in np.unique(groups)]
    for parts in itertools.product(*[itertools.permutations(ix) for ix in idx]):
        p = np.arange(groups.size)
        for ix, perm in zip(idx, parts):
            p[ix] = perm
        yield p, p


@pytest.mark.parametrize("dyads", ["within", "all"])
@pytest.mark.parametrize("scheme", ["y", "dsp", "freedman-lane"])
def test_two_groups_of_four_match_brute_force(scheme, dyads):
    rng = np.random.default_rng(11)
    groups = np.array(["a", "b", "a", "b", "b", "a", "b", "a"])  # interleaved on purpose
    n = groups.size
    Xs = [rng.normal(size=(n, n)) for _ in range(2)]
    Y = 0.8 * Xs[0] + rng.normal(size=(n, n))
    mask = ~np.eye(n, dtype=bool)
    if dyads == "within":
        mask &= groups[:, None] == groups[None, :]
    p_bf, total = _exact_p(Y, Xs, mask, scheme, _within_group_relabellings(groups))
    res = dp.regress(Y, Xs, scheme=scheme, groups=groups, dyads=dyads, permutations=1000)
    assert res.exact and res.permutations == total == 576
    assert res.n_dyads == mask.sum()
    np.testing.assert_allclose(res.p[1:], p_bf, atol=P_ATOL)


@pytest.mark.parametrize("scheme", ["y", "dsp", "freedman-lane"])
def test_missing_dyads_match_brute_force(scheme):
    rng = np.random.default_rng(12)
    n = 6
    Xs = [rng.normal(size=(n, n)) for _ in range(2)]
    Y = 0.7 * Xs[0] + rng.normal(size=(n, n))
    Y[0, 3] = Y[4, 1] = Y[2, 5] = np.nan
    Xs[1][1, 2] = Xs[1][5, 0] = np.nan
    mask = ~np.eye(n, dtype=bool)
    perms = [(np.array(p), np.array(p)) for p in itertools.permutations(range(n))]
    p_bf, total = _exact_p(Y, Xs, mask, scheme, perms)
    res = dp.regress(Y, Xs, scheme=scheme, permutations=1000)
    assert res.exact and res.permutations == total == 720
    np.testing.assert_allclose(res.p[1:], p_bf, atol=P_ATOL)


def test_missing_values_travel_with_their_matrix():
    """The observed fit drops the dyads missing in any matrix (statsmodels-free check:
    lstsq on the complete dyads, common practice)."""
    rng = np.random.default_rng(13)
    n = 12
    X = rng.normal(size=(n, n))
    Y = X + rng.normal(size=(n, n))
    Y[3, 7] = np.nan
    X[8, 2] = np.nan
    res = dp.regress(Y, [X], scheme="y", permutations=50, seed=1)
    mask = ~np.eye(n, dtype=bool) & np.isfinite(X) & np.isfinite(Y)
    assert res.n_dyads == mask.sum() == n * (n - 1) - 2
    np.testing.assert_allclose(res.stat[1], _fit_t([X[mask]], Y[mask])[1], rtol=1e-10)



def test_complete_data_decided_from_the_dyad_set():
    """Whether the data are complete (the fast route) looks at the dyad set only: a NaN on
    the diagonal of a network leaves the data complete, one in a dyad does not, nor a
    missing node attribute of a derived predictor (whose matrix no network scan saw).
    Checked against the dyads numpy finds finite (common practice: the diagonal of
    one-mode data is no dyad)."""
    from dyadperm.inputs.design import prepare

    rng = np.random.default_rng(4)
    n = 9
    X = rng.normal(size=(n, n))
    Y = X + rng.normal(size=(n, n))
    assert not dp.Dyadic(Y, tuple("abcdefghi")).has_nan
    Xd = X.copy()
    np.fill_diagonal(Xd, np.nan)
    assert dp.Dyadic(Xd, tuple("abcdefghi")).has_nan
    assert prepare(Y, [Xd]).complete
    Xm = X.copy()
    Xm[2, 5] = np.nan
    prep = prepare(Y, [Xm])
    assert not prep.complete and prep.n_dyads == n * (n - 1)
    attr = rng.normal(size=n)
    attr[4] = np.nan
    assert not prepare(Y, [X, dp.sender(attr)]).complete
    assert prepare(Y, [X, dp.sender(np.nan_to_num(attr))]).complete


def test_two_mode_four_by_five_matches_brute_force():
    rng = np.random.default_rng(14)
    Xs = [rng.normal(size=(4, 5)) for _ in range(2)]
    Y = Xs[0] + rng.normal(size=(4, 5))
    mask = np.ones((4, 5), dtype=bool)
    perms = [(np.array(p), np.array(q)) for p in itertools.permutations(range(4))
             for q in itertools.permutations(range(5))]
    p_bf, total = _exact_p(Y, Xs, mask, "dsp", perms)
    res = dp.regress(Y, Xs, scheme="dsp", permutations=5000)
    assert res.exact and res.two_mode and res.permutations == total == 2880
    np.testing.assert_allclose(res.p[1:], p_bf, atol=P_ATOL)


def test_davis_two_mode_data_runs():
    """networkx's bundled Davis southern women data (18 women x 14 events, two-mode)."""
    nx = pytest.importorskip("networkx")
    from networkx.algorithms import bipartite

    g = nx.davis_southern_women_graph()
    women = sorted(n for n, d in g.nodes(data=True) if d["bipartite"] == 0)
    events = sorted(n for n, d in g.nodes(data=True) if d["bipartite"] == 1)
    A = bipartite.biadjacency_matrix(g, women, events).toarray().astype(float)
    # predictor: the event's size (column attribute) and the woman's number of events (row)
    res = dp.regress(dp.Dyadic(A, tuple(women), tuple(events)),
                     {"event_size": dp.receiver(A.sum(axis=0)),
                      "woman_activity": dp.sender(A.sum(axis=1))},
                     scheme="y", permutations=200, seed=3)
    assert res.two_mode and res.n_dyads == 18 * 14
    assert res.coef[1] > 0 and res.coef[2] > 0  # attendance follows event size and activity
    assert res.p[1] < 0.05
