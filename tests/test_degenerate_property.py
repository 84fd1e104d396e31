"""Property test: random small designs, some made degenerate on purpose.

Hypothesis draws a design (n = 5 nodes, 20 directed dyads, all 120 relabellings enumerated):
predictors with small integer values (so that a degenerate design is exactly degenerate
and an ordinary one is far from it), made degenerate on purpose by one of: a duplicated, an
affine copy, a constant, a sum of two, a copy of x1 wherever the response is observed, an
indicator of dyads where the response is missing, an indicator of two dyads (which some
relabellings' dyads leave constant: failed permuted fits); and missing dyads in the response
and in x1. For each scheme either

- the package refuses the design (its own InputError), and then the brute-force reference
  cannot fit it either: the observed design over the complete dyads has rank below p
  (``np.linalg.matrix_rank``), too few dyads, or leaves the response no residual; or
- the package runs, the reference can fit it, and every p-value (two-sided and one-sided)
  equals the brute-force p of ``tests/reference.py`` (full refits over every relabelling,
  failed fits counted as at least as extreme).
"""

from __future__ import annotations

import numpy as np
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import dyadperm as dp
from reference import P_ATOL, all_relabellings, counts, masked_null

N = 5
PERMS = list(all_relabellings(N))
KINDS = ("ordinary", "duplicate", "affine copy", "constant", "sum of two",
         "copy where observed", "indicator of missing", "indicator of two dyads")


def _design(seed: int, kind: str, k: int, missing_y: int, missing_x: int):
    rng = np.random.default_rng(seed)
    off = ~np.eye(N, dtype=bool)
    Xs = [rng.integers(0, 3, size=(N, N)).astype(float) for _ in range(k)]
    Y = rng.normal(size=(N, N)) + 0.5 * Xs[0]
    cells = np.argwhere(off)
    for i, j in cells[rng.choice(len(cells), missing_y, replace=False)]:
        Y[i, j] = np.nan
    for i, j in cells[rng.choice(len(cells), missing_x, replace=False)]:
        Xs[0][i, j] = np.nan
    if kind == "duplicate":
        Xs.append(Xs[0].copy())
    elif kind == "affine copy":
        Xs.append(2 * Xs[0] + 1)
    elif kind == "constant":
        Xs.append(np.full((N, N), 3.0))
    elif kind == "sum of two":
        other = rng.integers(0, 3, size=(N, N)).astype(float)
        Xs += [other, Xs[0] + other]
    elif kind == "copy where observed":
        copy = Xs[0].copy()
        gone = np.isnan(Y) & off
        copy[gone] = rng.integers(0, 3, size=gone.sum())
        Xs.append(copy)
    elif kind == "indicator of missing":
        Xs.append((np.isnan(Y) & off).astype(float))
    elif kind == "indicator of two dyads":  # constant on the dyads of some relabellings
        ind = np.zeros((N, N))
        for i, j in cells[rng.choice(len(cells), 2, replace=False)]:
            ind[i, j] = 1.0
        Xs.append(ind)
    return Y, Xs


def _reference_can_fit(Y, Xs) -> bool:
    use = ~np.eye(N, dtype=bool) & np.isfinite(Y) & np.all([np.isfinite(X) for X in Xs], axis=0)
    A = np.column_stack([np.ones(use.sum())] + [X[use] for X in Xs])
    p = A.shape[1]
    if use.sum() <= p or np.linalg.matrix_rank(A) < p:
        return False
    return np.linalg.matrix_rank(np.column_stack([A, Y[use]])) == p + 1


@settings(max_examples=30, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.too_slow])
@given(seed=st.integers(0, 2 ** 32 - 1), kind=st.sampled_from(KINDS), k=st.integers(1, 2),
       missing_y=st.integers(0, 4), missing_x=st.integers(0, 2),
       scheme=st.sampled_from(("y", "dsp", "freedman-lane")))
def test_refused_exactly_when_the_reference_cannot_fit_and_p_equals_brute_force(
        seed, kind, k, missing_y, missing_x, scheme):
    Y, Xs = _design(seed, kind, k, missing_y, missing_x)
    can = _reference_can_fit(Y, Xs)
    try:
        res = dp.regress(Y, Xs, scheme=scheme, permutations=1000)
    except dp.InputError as err:
        assert not can, f"refused a design the reference fits: {err}"
        return
    assert can, "ran a design the reference cannot fit"
    assert res.exact and res.permutations == len(PERMS)
    obs, null = masked_null(Y, Xs, ~np.eye(N, dtype=bool), scheme, "t", PERMS)
    assert np.all(np.isfinite(obs)) and np.all(np.isfinite(res.p[1:]))
    b2, bg, bl = counts(obs, null)
    m = len(PERMS)
    for field, b in (("p", b2), ("p_greater", bg), ("p_less", bl)):
        np.testing.assert_allclose(getattr(res, field)[1:], b / m, atol=P_ATOL, err_msg=field)
    np.testing.assert_array_equal(res.failed, np.isnan(null).sum(axis=0))
