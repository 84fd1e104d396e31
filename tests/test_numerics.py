"""Numerical stability: nearly collinear predictors (condition number about 1e10).

Sources of truth: the exact least-squares solution in rational arithmetic (Python's
fractions: the floats are exact rationals, the normal equations solved without rounding),
and statsmodels OLS (pinv/SVD) on the vectorised dyads. At condition number kappa a
backward-stable method gets coefficients right to about kappa * 1e-16 relative (common
practice: the forward error bound of least squares). Measured here: our QR 1e-6 relative on
the collinear pair and 3e-10 on the independent predictor; statsmodels 7e-6 and 5e-8.
"""

import warnings
from fractions import Fraction

import numpy as np
import pytest

import dyadperm as dp

COLLINEAR_RTOL = 1e-4  # ~ condition number 1e10 x machine epsilon, with margin
WELL_DETERMINED_RTOL = 1e-6  # statsmodels' own error on x3 is 5e-8
EXACT_RTOL = (1e-5, 1e-8)  # ours against the exact solution: collinear pair, the rest


def _exact_least_squares(A, b):
    """Solve the normal equations exactly in rationals; return floats."""
    F = [[Fraction(v) for v in row] for row in A]
    fb = [Fraction(v) for v in b]
    p = A.shape[1]
    M = [[sum(r[i] * r[j] for r in F) for j in range(p)] + [sum(r[i] * v for r, v in zip(F, fb))]
         for i in range(p)]
    for c in range(p):
        for r in range(p):
            if r != c and M[r][c] != 0:
                f = M[r][c] / M[c][c]
                M[r] = [a - f * e for a, e in zip(M[r], M[c])]
    return np.array([float(M[i][p] / M[i][i]) for i in range(p)])


@pytest.fixture
def near_collinear():
    rng = np.random.default_rng(3)
    n = 40
    x1 = rng.normal(size=(n, n))
    x2 = x1 + 1e-10 * rng.normal(size=(n, n))
    x3 = rng.normal(size=(n, n))
    y = x1 + 0.5 * x3 + rng.normal(size=(n, n))
    return y, [x1, x2, x3]


@pytest.mark.parametrize("scheme", ["y", "dsp", "freedman-lane"])
def test_condition_1e10_matches_statsmodels(near_collinear, scheme):
    sm = pytest.importorskip("statsmodels.api")
    y, xs = near_collinear
    mask = ~np.eye(y.shape[0], dtype=bool)
    A = np.column_stack([np.ones(mask.sum())] + [x[mask] for x in xs])
    ols = sm.OLS(y[mask], A).fit()
    assert ols.condition_number > 1e9
    with pytest.warns(dp.DyadpermWarning, match=r"nearly collinear \(condition number 1\.\de\+10; "
                                                  r"most correlated pair 'x1' and 'x2'"):
        res = dp.regress(y, xs, scheme=scheme, permutations=200, seed=1)
    np.testing.assert_allclose(res.coef[1:3], ols.params[1:3], rtol=COLLINEAR_RTOL)
    np.testing.assert_allclose(res.coef[3], ols.params[3], rtol=WELL_DETERMINED_RTOL)
    np.testing.assert_allclose(res.stat[3], ols.tvalues[3], rtol=WELL_DETERMINED_RTOL)
    exact = _exact_least_squares(A, y[mask])
    np.testing.assert_allclose(res.coef[1:3], exact[1:3], rtol=EXACT_RTOL[0])
    np.testing.assert_allclose(res.coef[[0, 3]], exact[[0, 3]], rtol=EXACT_RTOL[0])
    np.testing.assert_allclose(res.coef[3], exact[3], rtol=EXACT_RTOL[1])
    # the permutation statistics keep their digits: no failed fit, the clear effect found
    assert res.failed.sum() == 0
    assert res.p[3] < 0.01 and res.p[1] > 0.05


def test_exactly_collinear_predictors_are_refused():
    rng = np.random.default_rng(4)
    x = rng.normal(size=(12, 12))
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        with pytest.raises(dp.InputError, match="'x2' is perfectly collinear with 'x1'"):
            dp.regress(x + rng.normal(size=(12, 12)), [x, 3 * x - 1], permutations=10)
