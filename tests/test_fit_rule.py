"""One rule decides whether a design can be fitted (``kernels.options``).

The observed fit, each route's setup and the kernels share it: every predictor keeps at
least a relative pivot apart from the intercept and the other predictors (sqrt(1 - R^2),
1 / sqrt of its variance inflation factor), and the response a residual. A design that
breaks it is refused before any relabelling, naming the predictors and the condition
number; one that passes is fitted by the kernels too (no NaN observed statistic, the
kernels' statistic equal to the QR fit's).

Outside references: numpy's SVD of the standardised design gives each predictor's
sqrt(1 - R^2) and the condition number independently of the package's QR (common
practice: VIF_j = diag((X_c'X_c)^-1) of the standardised predictors); statsmodels OLS
gives the t statistics the kernels must reproduce.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
import statsmodels.api as sm

import dyadperm as dp
from dyadperm.inputs.describe import describe_study
from dyadperm.kernels import irls, options, stats
from test_bad_inputs import _run_cli

SCHEMES = ("y", "dsp", "freedman-lane")


def _apart(Xs, use):
    """sqrt(1 - R^2) of each predictor on the others, and the condition number, of the
    standardised predictors over the dyads ``use`` (numpy SVD; common practice)."""
    X = np.column_stack([x[use] for x in Xs])
    X = (X - X.mean(axis=0)) / X.std(axis=0)
    _, sv, vt = np.linalg.svd(X / np.sqrt(X.shape[0]), full_matrices=False)
    vif = ((vt / sv[:, None]) ** 2).sum(axis=0)
    return 1.0 / np.sqrt(vif), sv[0] / sv[-1]


def issue_case(seed=5):
    """The issue's design: n = 10, a pure-noise response with three missing dyads, x2 =
    x1 + 1e-8 noise except at those three dyads (x1 and x2 differ only where the response
    is missing), x3 pure noise. Invented data."""
    rng = np.random.default_rng(seed)
    n = 10
    y = rng.normal(size=(n, n))
    x1 = rng.normal(size=(n, n))
    x2 = x1 + 1e-8 * rng.normal(size=(n, n))
    for i, j in [(0, 1), (3, 7), (8, 2)]:
        y[i, j] = np.nan
        x2[i, j] = x1[i, j] + rng.normal()
    x3 = rng.normal(size=(n, n))
    return y, {"x1": x1, "x2": x2, "x3": x3}


def test_the_rule_is_one_constant_pair_shared_by_the_kernels():
    # the kernels test pivot^2 > FIT_PIVOT_SQUARED * diagonal: the same rule on sums of
    # squares (1e-5 ** 2 rounds to 1.0000000000000002e-10, hence the written-out constant)
    assert options.FIT_PIVOT_SQUARED == pytest.approx(options.FIT_PIVOT ** 2, rel=1e-15)
    assert irls.SINGULAR_PIVOT == options.FIT_PIVOT_SQUARED
    assert stats.FIT_PIVOT_SQUARED is options.FIT_PIVOT_SQUARED
    assert options.QR_PIVOT < options.FIT_PIVOT


@pytest.mark.parametrize("statistic", ["t", "coef"])
@pytest.mark.parametrize("scheme", SCHEMES)
def test_issue_case_is_refused_before_any_relabelling(scheme, statistic):
    """Before: y and freedman-lane gave p = 1/(m + 1) for every term (x3 included) from
    NaN observed statistics; dsp and freedman-lane could end in a bare LinAlgError."""
    y, X = issue_case()
    use = ~np.eye(10, dtype=bool) & np.isfinite(y)
    apart, cond = _apart(list(X.values()), use)
    assert apart[1] < options.FIT_PIVOT  # numpy agrees the design breaks the rule
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        with pytest.raises(dp.InputError) as err:
            dp.regress(y, X, scheme=scheme, statistic=statistic, permutations=999, seed=1)
    msg = str(err.value)
    assert msg.startswith("predictor 'x2' is nearly collinear with 'x1' over the 87 complete "
                          "dyads (where the response and every predictor are observed): "
                          "condition number ")
    # printed to three digits
    assert float(msg.split("condition number ")[1].split(";")[0]) == pytest.approx(cond,
                                                                                    rel=5e-3)
    assert f"is {apart[1]:.2g} of its spread, below the 1e-05 a fit resolves" in msg
    # without x2 the design is fine and x3 gets an ordinary p-value (0.8 in the issue)
    res = dp.regress(y, {"x1": X["x1"], "x3": X["x3"]}, scheme=scheme, statistic=statistic,
                     permutations=199, seed=1)
    assert np.all(np.isfinite(res.observed)) and res.p[2] > 0.1


@pytest.mark.parametrize("statistic", ["t", "score"])
@pytest.mark.parametrize("scheme", ["y", "dsp"])
def test_issue_case_is_refused_on_the_logistic_route(scheme, statistic):
    y, X = issue_case()
    yb = np.where(np.isnan(y), np.nan, (y > 0).astype(float))
    with pytest.raises(dp.InputError, match=r"predictor 'x2' is nearly collinear with 'x1' over "
                                            r"the 87 complete dyads .*: condition number "
                                            r"\d\.\d+e\+08"):
        dp.regress(yb, X, model="logistic", scheme=scheme, statistic=statistic, permutations=99)


def _pair(rng, n, apart, missing):
    """x2 = x1 + a residual scaled so that x2 keeps about ``apart`` of its spread apart from
    x1 over the complete dyads; x3 independent; y = x1 + x3 + noise."""
    x1 = rng.normal(size=(n, n))
    x3 = rng.normal(size=(n, n))
    y = x1 + 0.5 * x3 + rng.normal(size=(n, n))
    if missing:
        y[rng.random((n, n)) < 0.1] = np.nan
    use = ~np.eye(n, dtype=bool) & np.isfinite(y)
    z = rng.normal(size=(n, n))
    A = np.column_stack([np.ones(use.sum()), x1[use], x3[use]])
    zr = z[use] - A @ np.linalg.lstsq(A, z[use], rcond=None)[0]
    x2 = x1 + apart * (np.std(x1[use]) / np.std(zr)) * z
    return y, {"x1": x1, "x2": x2, "x3": x3}, use


@pytest.mark.parametrize("scheme", SCHEMES)
def test_missing_data_routes_fit_just_above_the_rule_and_refuse_just_below(scheme):
    """Missing data: the kernels fit from Gram matrices of standardised layers, so the
    rule is FIT_PIVOT. At 3 FIT_PIVOT the kernels' observed t equals statsmodels' to 1e-6
    (the agreement check would warn otherwise, and warnings are errors here); at
    FIT_PIVOT / 3 the design is refused."""
    rng = np.random.default_rng(61)
    n = 12
    for factor, runs in ((3.0, True), (1 / 3, False)):
        y, X, use = _pair(rng, n, factor * options.FIT_PIVOT, missing=True)
        apart, cond = _apart(list(X.values()), use)
        assert apart[1] == pytest.approx(factor * options.FIT_PIVOT, rel=0.05)
        if not runs:
            with pytest.raises(dp.InputError, match=r"predictor 'x2' is nearly collinear with "
                                                    r"'x1' over the \d+ complete dyads"):
                dp.regress(y, X, scheme=scheme, permutations=19, seed=2)
            continue
        res = dp.regress(y, X, scheme=scheme, permutations=99, seed=2)
        A = np.column_stack([np.ones(use.sum())] + [x[use] for x in X.values()])
        ols = sm.OLS(y[use], A).fit()  # source: statsmodels OLS
        np.testing.assert_allclose(res.observed, ols.tvalues[1:], rtol=1e-6)
        assert res.failed.sum() == 0 and np.all(np.isfinite(res.p[1:]))


@pytest.mark.parametrize("scheme", SCHEMES)
def test_complete_data_reads_an_orthonormal_basis_down_to_qr_pivot(scheme):
    """Complete float64 data: the kernels read an orthonormal basis, so the rule is the
    QR's, QR_PIVOT. A pair apart by 1e-7 (refused with missing data) is fitted, with the
    collinearity warning and the kernels' t equal to statsmodels' to 1e-6; one apart by
    QR_PIVOT / 3 is refused. (Between the two the design runs and the agreement check
    warns when the kernels' t loses digits: at 1e-9 here by 1.5e-5.)"""
    rng = np.random.default_rng(62)
    y, X, use = _pair(rng, 14, 1e-7, missing=False)
    with pytest.warns(dp.DyadpermWarning, match=r"nearly collinear \(condition number 2\.\d+e\+07"):
        res = dp.regress(y, X, scheme=scheme, permutations=99, seed=2)
    A = np.column_stack([np.ones(use.sum())] + [x[use] for x in X.values()])
    ols = sm.OLS(y[use], A).fit()  # source: statsmodels OLS
    np.testing.assert_allclose(res.observed, ols.tvalues[1:], rtol=1e-6)
    y, X, use = _pair(rng, 14, options.QR_PIVOT / 3, missing=False)
    with pytest.raises(dp.InputError, match=r"predictor 'x2' is perfectly collinear with 'x1' "
                                            r"over the dyad set: condition number \d\.\d+e\+1[12]"):
        dp.regress(y, X, scheme=scheme, permutations=19, seed=2)
    # float32 layers keep about 7 digits: their rule is FIT_PIVOT
    y, X, use = _pair(rng, 14, 1e-7, missing=False)
    with pytest.raises(dp.InputError, match=r"below the 1e-05 a fit resolves"):
        dp.regress(y, X, scheme=scheme, storage="float32", permutations=19, seed=2)


def test_collinear_set_of_three_is_named_with_its_condition_number():
    rng = np.random.default_rng(63)
    n = 9
    a, b, c = (rng.normal(size=(n, n)) for _ in range(3))
    y = rng.normal(size=(n, n))
    with pytest.raises(dp.InputError, match=r"predictor 'sum' is perfectly collinear with 'a' "
                                            r"and 'b' over the dyad set: condition number "):
        dp.regress(y, {"a": a, "c": c, "b": b, "sum": a - 2 * b}, permutations=19)
    with pytest.raises(dp.InputError, match=r"predictor 'flat' is constant over the dyad set"):
        dp.regress(y, {"a": a, "flat": np.full((n, n), 4.0)}, permutations=19)
    ym = y.copy()
    ym[0, 1] = np.nan  # missing data: fits from Gram matrices, the rule at FIT_PIVOT
    with pytest.raises(dp.InputError, match=r"predictor 'c' is nearly constant over the 71 "
                                            r"complete dyads \(where the response and every "
                                            r"predictor are observed\): its spread about its "
                                            r"mean is \d\.\de-0[78] of its size, below the 1e-05"):
        dp.regress(ym, {"a": a, "c": 10 + 1e-6 * c}, permutations=19)
    with pytest.raises(dp.InputError, match=r"response 'response' is fitted exactly by the "
                                            r"predictors over the dyad set: its residuals keep "
                                            r"\S+ of its spread, below the 1e-05 a test needs"):
        dp.regress(2 * a - b + 1, {"a": a, "b": b}, permutations=19)


STUDY = """[study]
title = "Invented: ten nodes, three missing dyads, x2 a near copy of x1"

[response]
file = "y.npy"

[[predictor]]
name = "x1"
file = "x1.npy"

[[predictor]]
name = "x2"
file = "x2.npy"

[[predictor]]
name = "x3"
file = "x3.npy"

[test]
scheme = "{scheme}"
permutations = 999
seed = 1
"""


@pytest.mark.parametrize("scheme", SCHEMES)
def test_issue_case_through_the_command_line(scheme, tmp_path, capsys):
    """What a user sees: `dyadperm run` exits 2 with one line naming the pair and the
    condition number; `dyadperm check` says a run would refuse the design."""
    y, X = issue_case()
    np.save(tmp_path / "y.npy", y)
    for name, x in X.items():
        np.save(tmp_path / f"{name}.npy", x)
    path = tmp_path / "study.toml"
    path.write_text(STUDY.format(scheme=scheme))
    code, err = _run_cli(["run", path, "--quiet"], capsys)
    assert code == 2 and "Traceback" not in err
    assert err.strip().startswith("dyadperm: error: predictor 'x2' is nearly collinear with "
                                  "'x1' over the 87 complete dyads")
    notes = describe_study(path).notes
    assert any(n.startswith("a run would refuse this design: predictor 'x2' is nearly "
                            "collinear with 'x1'") for n in notes), notes


def test_the_named_set_is_the_near_null_combination():
    """x3 = x1 + 0.001 x2 + 1e-7 noise: x1 and x3 keep about 1e-7 of their spread apart
    from the others, x2 about 1e-4 (numpy SVD): with missing data (rule 1e-5) the refusal
    names x3 with x1, and not x2, which the near-null combination barely carries."""
    rng = np.random.default_rng(64)
    n = 12
    x1, x2, noise, y = (rng.normal(size=(n, n)) for _ in range(4))
    x3 = x1 + 1e-3 * x2 + 1e-7 * noise
    y[0, 1] = np.nan
    use = ~np.eye(n, dtype=bool) & np.isfinite(y)
    apart, _ = _apart([x1, x2, x3], use)
    assert apart[0] < options.FIT_PIVOT and apart[2] < options.FIT_PIVOT <= apart[1]
    with pytest.raises(dp.InputError, match=r"predictor 'x3' is nearly collinear with 'x1' over "
                                            r"the 131 complete dyads .*: condition number "):
        dp.regress(y, {"x1": x1, "x2": x2, "x3": x3}, permutations=19)
