"""Coefficient intervals by inverting the scheme's own test (issue: confidence intervals).

References:
- brute force (tests/reference.py, the plain refit of every relabelling): at each endpoint
  the exact p-value of the test of beta_k = b -- the same scheme on y - b x_k, every
  relabelling of n = 6 nodes -- is above alpha just inside and at most alpha just outside;
- the permutation test itself (same relabellings): the interval excludes 0 exactly when
  the two-sided p <= alpha;
- coverage: on simulated networks with node-level sender and receiver effects in both the
  errors and the predictor (dyadic dependence, common practice for checking QAP tests)
  and a known coefficient, 95% intervals cover it at a rate inside the binomial band
  around 0.95 (scipy.stats.binom), while the classical OLS interval (statsmodels) covers
  it less often.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp
from scipy.stats import binom

import dyadperm as dp
from dyadperm.output.table import ci_text
from reference import exact_pvalues

ALPHA = 0.05


def _data(rng, n, directed=True, effect=0.4):
    x1 = rng.normal(size=(n, n))
    x2 = 0.5 * x1 + rng.normal(size=(n, n))
    y = effect * x1 - 0.3 * x2 + rng.normal(size=(n, n))
    if not directed:
        x1, x2, y = (x1 + x1.T) / 2, (x2 + x2.T) / 2, (y + y.T) / 2
    return y, [x1, x2]


@pytest.mark.parametrize("directed", [True, False])
@pytest.mark.parametrize("scheme", ["dsp", "freedman-lane"])
def test_endpoints_against_brute_force(scheme, directed):
    rng = np.random.default_rng(11 if directed else 12)
    y, xs = _data(rng, 6, directed)
    res = dp.regress(y, {"a": xs[0], "b": xs[1]}, scheme=scheme, permutations=1000, ci=0.95)
    assert res.exact and res.permutations == 720
    for j in (1, 2):
        lo, hi = res.ci_low[j], res.ci_high[j]
        assert np.isfinite(lo) and np.isfinite(hi) and lo < res.coef[j] < hi
        eps = 1e-6 * (hi - lo)
        for end, inward in ((lo, 1.0), (hi, -1.0)):
            # source: brute-force exact p-value of the test of beta_j = b (reference.py)
            p_in = exact_pvalues(y - (end + inward * eps) * xs[j - 1], xs, scheme, "t",
                                 directed)[0][j - 1]
            p_out = exact_pvalues(y - (end - inward * eps) * xs[j - 1], xs, scheme, "t",
                                  directed)[0][j - 1]
            assert p_in > ALPHA >= p_out, (j, end, p_in, p_out)


@pytest.mark.parametrize("scheme", ["dsp", "freedman-lane"])
def test_interval_excludes_zero_exactly_when_p_is_at_most_alpha(scheme):
    rng = np.random.default_rng(3)
    seen = set()
    for rep in range(12):
        effect = (0.0, 0.08, 0.15)[rep % 3]
        y, xs = _data(rng, 14, effect=effect)
        res = dp.regress(y, {"a": xs[0], "b": xs[1]}, scheme=scheme, permutations=399,
                         seed=rep)
        for j in (1, 2):
            if any(note.startswith(f"{res.terms[j]}: the values its test accepts")
                   for note in res.notes):
                continue  # a hull: 0 may sit in a gap
            excluded = not res.ci_low[j] <= 0.0 <= res.ci_high[j]
            assert excluded == (res.p[j] <= ALPHA), (rep, j, res.p[j], res.ci_low[j],
                                                     res.ci_high[j])
            seen.add(excluded)
    assert seen == {True, False}  # both kinds of decision were checked


def _panel(rng, n, beta):
    """y = beta x + sender + receiver + noise, x with its own node effects: dyads that
    share a node are dependent in both (the setting where classical OLS misleads)."""
    a, b, c, d = (rng.normal(size=n) for _ in range(4))
    x = c[:, None] + d[None, :] + 0.5 * rng.normal(size=(n, n))
    y = beta * x + a[:, None] + b[None, :] + 0.5 * rng.normal(size=(n, n))
    return y, x


def _coverage(replicates, n, permutations, seed):
    import statsmodels.api as sm

    rng = np.random.default_rng(seed)
    beta = 0.3
    hit = hit_ols = 0
    off = ~np.eye(n, dtype=bool)
    for r in range(replicates):
        y, x = _panel(rng, n, beta)
        res = dp.regress(y, {"x": x}, scheme="dsp", permutations=permutations, seed=r)
        hit += res.ci_low[1] <= beta <= res.ci_high[1]
        # source: statsmodels OLS on the vectorised dyads, classical 95% interval
        fit = sm.OLS(y[off], sm.add_constant(x[off])).fit()
        lo, hi = fit.conf_int(ALPHA)[1]
        hit_ols += lo <= beta <= hi
    return hit, hit_ols


def _band(replicates):
    # source: scipy.stats.binom, the central 95% range of the count of covering intervals
    return binom.interval(0.95, replicates, 0.95)


def test_coverage_small():
    R = 150
    hit, hit_ols = _coverage(R, 12, 199, seed=5)
    lo, hi = _band(R)
    assert lo <= hit <= hi, (hit, lo, hi)
    assert hit_ols < lo  # the classical interval under-covers with node effects


@pytest.mark.slow
def test_coverage_study():
    R = 1000
    hit, hit_ols = _coverage(R, 20, 499, seed=6)
    lo, hi = _band(R)
    assert lo <= hit <= hi, (hit, lo, hi)
    assert hit_ols < lo


def test_sparse_route_gives_the_dense_interval():
    n = 40
    ys = sp.random(n, n, density=0.15, random_state=3, format="csr")
    xs = sp.random(n, n, density=0.15, random_state=4, format="csr")
    attr = np.random.default_rng(1).normal(size=n)
    for scheme in ("dsp", "freedman-lane"):
        kw = dict(scheme=scheme, permutations=299, seed=2)
        sparse = dp.regress(dp.SparseNetwork.from_scipy(ys), {"xs": xs, "g": dp.gap(attr)}, **kw)
        dense = dp.regress(ys.toarray(), {"xs": xs.toarray(), "g": dp.gap(attr)}, **kw)
        assert "sparse path" in " ".join(sparse.notes)
        np.testing.assert_array_equal(sparse.exceed, dense.exceed)
        np.testing.assert_allclose(sparse.ci_low[1:], dense.ci_low[1:], rtol=1e-8)
        np.testing.assert_allclose(sparse.ci_high[1:], dense.ci_high[1:], rtol=1e-8)


def test_run_file_gives_the_same_interval_and_reports_carry_it(tmp_path):
    from dyadperm.output.report import csv_text, html_text, json_text

    rng = np.random.default_rng(8)
    y, xs = _data(rng, 12)
    live = dp.regress(y, {"a": xs[0], "b": xs[1]}, permutations=200, seed=4, chunk_size=50,
                      out=tmp_path / "r.h5", ci=0.9)
    back = dp.open_result(tmp_path / "r.h5")
    for field in ("ci_low", "ci_high", "ci_mc_se"):
        np.testing.assert_array_equal(getattr(back, field), getattr(live, field))
    assert back.ci_level == 0.9 and "90% CI" in back.table()
    head = csv_text(back).splitlines()[0].split(",")
    assert head[-4:] == ["ci_low", "ci_high", "ci_low_mc_se", "ci_high_mc_se"]
    assert '"ci_low"' in json_text(back) and "90% CI" in html_text(back)
    # grown to more relabellings, the interval comes from all of them
    grown = dp.regress(y, {"a": xs[0], "b": xs[1]}, permutations=400, seed=4, chunk_size=50,
                       out=tmp_path / "r.h5", ci=0.9)
    full = dp.regress(y, {"a": xs[0], "b": xs[1]}, permutations=400, seed=4, ci=0.9)
    np.testing.assert_array_equal(grown.ci_low, full.ci_low)


def test_where_no_interval_is_given_a_note_says_why():
    rng = np.random.default_rng(9)
    y, xs = _data(rng, 10)
    preds = {"a": xs[0], "b": xs[1]}
    res = dp.regress(y, preds, scheme="y", permutations=100, seed=1)
    assert np.isnan(res.ci_low).all() and "no intervals with scheme y" in " ".join(res.notes)
    assert "95% CI" not in res.table()
    res = dp.regress(y, preds, statistic="coef", permutations=100, seed=1)
    assert "no intervals with statistic coef" in " ".join(res.notes)
    y2 = y.copy()
    y2[0, 3] = np.nan
    res = dp.regress(y2, preds, permutations=100, seed=1)
    assert "no intervals with missing dyads" in " ".join(res.notes)
    off = dp.regress(y, preds, permutations=100, seed=1, ci=None)
    assert np.isnan(off.ci_level) and not any("interval" in n for n in off.notes)
    with pytest.raises(dp.InputError, match=r"ci must be a level with 0 < ci < 1"):
        dp.regress(y, preds, permutations=100, ci=1.5)


def test_study_file_and_cli_take_ci(tmp_path, monkeypatch, capsys):
    import sys

    from dyadperm import cli

    rng = np.random.default_rng(10)
    y, xs = _data(rng, 10)
    np.save(tmp_path / "y.npy", y)
    np.save(tmp_path / "a.npy", xs[0])
    (tmp_path / "s.toml").write_text(
        '[study]\ntitle = "invented"\n[response]\nname = "y"\nfile = "y.npy"\n'
        '[[predictor]]\nname = "a"\nfile = "a.npy"\n'
        "[test]\npermutations = 99\nseed = 1\nci = 0.8\n")
    assert dp.load_study(tmp_path / "s.toml").run().ci_level == 0.8
    monkeypatch.setattr(sys, "argv", ["dyadperm", "run", str(tmp_path / "s.toml"), "--quiet",
                                      "--ci", "0.9"])
    code = 0
    try:
        cli.main()
    except SystemExit as exc:
        code = int(exc.code or 0)
    assert code == 0
    assert "90% CI" in capsys.readouterr().out


def test_long_intervals_keep_their_column_apart():
    # ends below 1e-3 print as "-4.012e-05", so an interval with both ends negative takes
    # 24 characters; the column had 23 and ran into the standard error before it
    rng = np.random.default_rng(9)
    y, xs = _data(rng, 12)
    res = dp.regress(y, {"a": -1e4 * xs[0], "b": 1e4 * xs[1]}, permutations=99, seed=2)
    texts = [ci_text(res, i) for i in range(len(res.terms))]
    assert max(len(t) for t in texts) >= 24
    lines = res.table().splitlines()
    head = next(line for line in lines if "95% CI" in line)
    end = head.index("95% CI") + len("95% CI")
    for term, text in zip(res.terms, texts):
        row = next(line for line in lines if line.startswith(term + " "))
        at = row.index(text)
        assert row[at - 1] == " " and at + len(text) == end  # right-aligned under its label
