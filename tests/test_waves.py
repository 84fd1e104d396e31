"""Panels: several waves of one node set under one relabelling shared by every wave.

Sources named beside each check:
- exact brute force (tests/reference.py, ``panel_scheme_stat``): all 120 relabellings of
  5 nodes, each applied to every wave, pooled least squares with one intercept per wave
  refitted per relabelling by numpy lstsq, for the schemes of Krackhardt 1988 (y), Dekker,
  Krackhardt & Snijders 2007 (dsp) and Freedman & Lane 1983;
- statsmodels OLS on the stacked dyads with wave dummies (observed fit).
"""

from __future__ import annotations

import itertools

import numpy as np
import pandas as pd
import pytest
import scipy.sparse as sp
from scipy.linalg import block_diag
from scipy.stats import binom
import statsmodels.api as sm

import dyadperm as dp
from dyadperm.inputs.describe import describe_study
from dyadperm.output import report
from test_logistic import FIT_ATOL, FIT_RTOL, oracle_stats
from reference import (P_ATOL, SCHEMES, STAT_ATOL, STAT_RTOL, counts, dyads, panel_exact_null,
                       panel_scheme_stat)

N = 5


def _panel(rng, n=N, waves=3, directed=True, k=2):
    """Waves of a response and k predictors, with a node propensity that persists."""
    def sym(M):
        U = np.triu(M, 1)
        return U + U.T

    send = rng.normal(size=n)
    Xs = [[rng.normal(size=(n, n)) + send[:, None] for _ in range(waves)] for _ in range(k)]
    Ys = [0.8 * Xs[0][t] + rng.normal(size=(n, n)) + send[:, None] + 0.3 * t
          for t in range(waves)]
    if not directed:
        Xs = [[sym(X) for X in W] for W in Xs]
        Ys = [sym(Y) for Y in Ys]
    return Ys, Xs


def _mask(n, directed=True):
    r, c = dyads(n, n, directed)
    m = np.zeros((n, n), dtype=bool)
    m[r, c] = True
    return m


def _check(res, obs, null, fixed, rtol=STAT_RTOL, atol=STAT_ATOL):
    total = null.shape[0]
    tested = slice(fixed, None)
    assert res.exact and res.permutations == total
    # source: exact brute force — observed statistic and the whole null (order-free)
    np.testing.assert_allclose(res.stat[tested], obs, rtol=rtol, atol=atol)
    np.testing.assert_allclose(np.sort(np.asarray(res.null), axis=0), np.sort(null, axis=0),
                               rtol=rtol, atol=atol)
    # source: exact brute force — p = b / n! with the identity counted
    b2, bg, bl = counts(obs, null)
    np.testing.assert_allclose(res.p[tested], b2 / total, rtol=0, atol=P_ATOL)
    np.testing.assert_allclose(res.p_greater[tested], bg / total, rtol=0, atol=P_ATOL)
    np.testing.assert_allclose(res.p_less[tested], bl / total, rtol=0, atol=P_ATOL)
    assert np.all(np.isnan(res.p[:fixed]))


@pytest.mark.parametrize("statistic", ["t", "coef"])
@pytest.mark.parametrize("scheme", SCHEMES)
@pytest.mark.parametrize("waves", [2, 3])
def test_exact_pvalues_equal_brute_force(rng, waves, scheme, statistic):
    Ys, Xs = _panel(rng, waves=waves)
    res = dp.regress(dp.Waves(Ys), {"a": dp.Waves(Xs[0]), "b": dp.Waves(Xs[1])},
                     scheme=scheme, statistic=statistic, exact=True)
    assert res.terms == tuple(f"wave {t + 1}" for t in range(waves)) + ("a", "b")
    obs, null = panel_exact_null(Ys, Xs, _mask(N), scheme, statistic)
    _check(res, obs, null, waves)


@pytest.mark.parametrize("scheme", SCHEMES)
def test_exact_pvalues_with_a_lagged_predictor(rng, scheme):
    Ys, Xs = _panel(rng, waves=3)
    res = dp.regress(dp.Waves(Ys, names=["2023", "2024", "2025"]),
                     {"before": dp.Waves(Xs[0], lag=1), "now": dp.Waves(Xs[1])},
                     scheme=scheme, exact=True)
    assert res.terms == ("wave 2024", "wave 2025", "before", "now")
    assert any("wave 2023 drops out" in note for note in res.notes)
    # source: brute force on the response's waves 2..3 with 'before' at waves 1..2
    obs, null = panel_exact_null(Ys[1:], [Xs[0][:2], Xs[1][1:]], _mask(N), scheme, "t")
    _check(res, obs, null, 2)


@pytest.mark.parametrize("scheme", SCHEMES)
def test_exact_pvalues_undirected(rng, scheme):
    Ys, Xs = _panel(rng, waves=3, directed=False)
    res = dp.regress(dp.Waves(Ys), {"a": dp.Waves(Xs[0]), "b": Xs[1][0]}, scheme=scheme,
                     exact=True)
    assert not res.directed
    # source: brute force; the single network 'b' stands at every wave
    obs, null = panel_exact_null(Ys, [Xs[0], [Xs[1][0]] * 3], _mask(N, False), scheme, "t")
    _check(res, obs, null, 3)


@pytest.mark.parametrize("scheme", SCHEMES)
def test_exact_pvalues_with_missing_dyads_and_an_absent_node(rng, scheme):
    Ys, Xs = _panel(rng, waves=3)
    Ys[0][1, 3] = np.nan
    Xs[1][2][4, 0] = np.nan
    labels = [f"n{i}" for i in range(N)]
    frames = [pd.DataFrame(Y, index=labels, columns=labels) for Y in Ys]
    frames[1] = frames[1].drop(index="n2", columns="n2")  # n2 absent at wave 2
    res = dp.regress(dp.Waves(frames), {"a": dp.Waves(Xs[0]), "b": dp.Waves(Xs[1])},
                     scheme=scheme, exact=True)
    Ys[1][2, :] = np.nan
    Ys[1][:, 2] = np.nan
    # source: brute force with missing values moving with their matrices
    obs, null = panel_exact_null(Ys, Xs, _mask(N), scheme, "t")
    _check(res, obs, null, 3)


def test_one_intercept_when_wave_effects_are_off(rng):
    Ys, Xs = _panel(rng, waves=2)
    res = dp.regress(dp.Waves(Ys), {"a": dp.Waves(Xs[0])}, scheme="dsp", exact=True,
                     wave_effects=False)
    assert res.terms == ("intercept", "a")
    # source: brute force with the single intercept
    obs, null = panel_exact_null(Ys, Xs[:1], _mask(N), "dsp", "t", wave_effects=False)
    _check(res, obs, null, 1)


def test_waves_of_one_wave_equal_the_plain_network(rng):
    # source: the plain dense route (itself checked against brute force elsewhere)
    Ys, Xs = _panel(rng, waves=1)
    res = dp.regress(dp.Waves(Ys), {"a": dp.Waves(Xs[0]), "b": dp.Waves(Xs[1])}, exact=True)
    plain = dp.regress(Ys[0], {"a": Xs[0][0], "b": Xs[1][0]}, exact=True)
    np.testing.assert_allclose(res.stat, plain.stat, rtol=1e-10)
    np.testing.assert_allclose(res.p, plain.p, atol=P_ATOL)


def test_observed_fit_equals_statsmodels_with_wave_dummies(rng):
    n, T = 25, 3
    Ys, Xs = _panel(rng, n=n, waves=T)
    attr = rng.normal(size=n)
    res = dp.regress(dp.Waves(Ys), {"a": dp.Waves(Xs[0]), "b": Xs[1][0],
                                    "same_attr": dp.gap(attr)}, permutations=19, seed=2)
    r, c = dyads(n, n, True)
    gapm = np.abs(attr[:, None] - attr[None, :])
    y = np.concatenate([Y[r, c] for Y in Ys])
    X = np.column_stack([np.repeat(np.eye(T), len(r), axis=0),
                         np.concatenate([X[r, c] for X in Xs[0]]),
                         np.tile(Xs[1][0][r, c], T), np.tile(gapm[r, c], T)])
    fit = sm.OLS(y, X).fit()  # source: statsmodels OLS, wave dummies and no constant
    np.testing.assert_allclose(res.coef, fit.params, rtol=1e-9)
    np.testing.assert_allclose(res.se, fit.bse, rtol=1e-9)
    np.testing.assert_allclose(res.stat, fit.tvalues, rtol=1e-9)
    assert res.n_dyads == T * n * (n - 1)
    # the kernels' observed t (identity relabelling) equals the fit's
    np.testing.assert_allclose(res.observed, fit.tvalues[T:], rtol=1e-9)


def test_groups_within_waves_equal_brute_force(rng):
    # relabelling within two groups, repeated at every wave; dyads within groups
    n = 6
    Ys, Xs = _panel(rng, n=n, waves=2, k=1)
    groups = np.array([0, 0, 0, 1, 1, 1])
    res = dp.regress(dp.Waves(Ys), {"a": dp.Waves(Xs[0])}, scheme="dsp", groups=groups,
                     exact=True)
    mask = _mask(n) & (groups[:, None] == groups[None, :])
    perms = [np.array(p + tuple(3 + np.array(q))) for p in itertools.permutations(range(3))
             for q in itertools.permutations(range(3))]
    ident = np.arange(n)
    # source: brute force over the 36 relabellings within groups
    obs = panel_scheme_stat(Ys, Xs, mask, "dsp", "t", ident)
    null = np.array([panel_scheme_stat(Ys, Xs, mask, "dsp", "t", p) for p in perms])
    _check(res, obs, null, 2)


def test_table_marks_wave_intercepts_untested(rng):
    Ys, Xs = _panel(rng, waves=2)
    res = dp.regress(dp.Waves(Ys, names=["spring", "autumn"]), {"a": dp.Waves(Xs[0])},
                     permutations=99, seed=1)
    text = res.table()
    assert "wave spring" in text and "wave autumn" in text
    assert "not tested" in text
    frame = res.to_frame()
    assert frame["p"].isna().tolist() == [True, True, False]


# --- bad input ------------------------------------------------------------------------------
def test_bad_inputs_are_named(rng):
    Ys, Xs = _panel(rng, waves=3)
    with pytest.raises(dp.InputError, match="'a' has 2 waves; the response has 3"):
        dp.regress(dp.Waves(Ys), {"a": dp.Waves(Xs[0][:2])})
    with pytest.raises(dp.InputError, match="lag applies to predictors"):
        dp.regress(dp.Waves(Ys, lag=1), {"a": dp.Waves(Xs[0])})
    with pytest.raises(dp.InputError, match="lag must be a whole number"):
        dp.Waves(Xs[0], lag=3)
    with pytest.raises(dp.InputError, match="logistic"):
        dp.regress(dp.Waves(Ys), {"a": dp.Waves(Xs[0])}, model="logistic")
    with pytest.raises(dp.InputError, match="correlate does not take waves"):
        dp.correlate(dp.Waves(Ys), dp.Waves(Xs[0]))
    with pytest.raises(dp.InputError, match="response must be a dyadperm.Waves"):
        dp.regress(Ys[0], {"a": dp.Waves(Xs[0])})
    with pytest.raises(dp.InputError, match="3 names for 2 waves"):
        dp.Waves(Ys[:2], names=["a", "b", "c"])
    labels = [f"n{i}" for i in range(N)]
    other = pd.DataFrame(Xs[0][0], index=[f"m{i}" for i in range(N)],
                         columns=[f"m{i}" for i in range(N)])
    frames = [pd.DataFrame(Y, index=labels, columns=labels) for Y in Ys]
    with pytest.raises(dp.InputError, match="labels not among the response's nodes"):
        dp.regress(dp.Waves(frames), {"a": dp.Waves([other] * 3)})


# --- study files --------------------------------------------------------------------------
def _matrix_csv(path, labels, values):
    path.write_text("id," + ",".join(labels) + "\n" + "".join(
        lab + "," + ",".join("NA" if np.isnan(v) else f"{v:.4f}" for v in row) + "\n"
        for lab, row in zip(labels, values)))


@pytest.fixture
def panel_folder(tmp_path):
    rng = np.random.default_rng(12)
    labels = [f"f{i}" for i in range(7)]
    Ys, Xs = _panel(rng, n=7, waves=3)
    Ys = [np.round(Y, 4) for Y in Ys]
    Xs = [[np.round(X, 4) for X in W] for W in Xs]
    for t, w in enumerate(["2023", "2024", "2025"]):
        keep = [i for i in range(7) if not (w == "2024" and i == 3)]  # f3 absent in 2024
        _matrix_csv(tmp_path / f"trade{w}.csv", [labels[i] for i in keep],
                    Ys[t][np.ix_(keep, keep)])
        _matrix_csv(tmp_path / f"kin{w}.csv", labels, Xs[0][t])
    _matrix_csv(tmp_path / "road.csv", labels, Xs[1][0])
    (tmp_path / "nodes.csv").write_text("id,size\n" + "".join(
        f"{lab},{v:.3f}\n" for lab, v in zip(labels, rng.normal(size=7))))
    return tmp_path, labels, Ys, Xs


def _panel_study(folder, extra="", lag=""):
    path = folder / "panel.toml"
    path.write_text(
        '[study]\ntitle = "trade panel"\nnodes = "nodes.csv"\nid_column = "id"\n'
        'waves = ["2023", "2024", "2025"]\n'
        '[response]\nname = "trade"\n'
        'file = { "2023" = "trade2023.csv", "2024" = "trade2024.csv", "2025" = "trade2025.csv" }\n'
        '[[predictor]]\nname = "kin"\n'
        'file = { "2023" = "kin2023.csv", "2024" = "kin2024.csv", "2025" = "kin2025.csv" }\n'
        + lag +
        '[[predictor]]\nname = "road"\nfile = "road.csv"\n'
        '[[predictor]]\nname = "size_gap"\ngap = "size"\n'
        '[test]\nscheme = "dsp"\npermutations = 99\nseed = 5\njobs = 1\n' + extra)
    return path


def test_study_file_with_waves_equals_the_python_call(panel_folder):
    folder, labels, Ys, Xs = panel_folder
    study = dp.load_study(_panel_study(folder, lag="lag = 1\n"))
    res = study.run()
    assert res.terms == ("wave 2024", "wave 2025", "kin", "road", "size_gap")
    Ys = [pd.DataFrame(Y, index=labels, columns=labels) for Y in Ys]
    Ys[1] = Ys[1].drop(index="f3", columns="f3")
    sizes = pd.read_csv(folder / "nodes.csv", index_col="id")["size"]
    sizes.index = sizes.index.astype(str)
    direct = dp.regress(dp.Waves(Ys, names=["2023", "2024", "2025"]),
                        {"kin": dp.Waves(Xs[0], lag=1), "road": Xs[1][0],
                         "size_gap": dp.gap(sizes)},
                        scheme="dsp", permutations=99, seed=5)
    np.testing.assert_allclose(res.coef, direct.coef, rtol=1e-12)
    np.testing.assert_array_equal(np.asarray(res.null), np.asarray(direct.null))
    assert any("wave 2023 drops out" in note for note in res.notes)


def test_check_prints_per_wave_counts(panel_folder):
    folder = panel_folder[0]
    text = describe_study(_panel_study(folder)).text()  # what `dyadperm check` prints
    assert "waves: 3 used (2023, 2024, 2025)" in text
    # 7 nodes: 42 dyads per wave; f3 absent in 2024 leaves 6 * 5 = 30
    assert "wave 2023: 42 complete dyads" in text
    assert "wave 2024: 30 complete dyads" in text
    assert "trade2024.csv: 1 node(s) absent at wave 2024 (their dyads missing there): 'f3'" \
        in text


def test_study_file_wave_errors(panel_folder):
    folder = panel_folder[0]
    path = _panel_study(folder)
    path.write_text(path.read_text().replace(', "2025" = "kin2025.csv"', ""))
    with pytest.raises(dp.InputError, match=r"\[\[predictor\]\] #1 file: needs one file per "
                                            r"wave .* no file for wave '2025'"):
        dp.load_study(path)
    path = _panel_study(folder)
    path.write_text(path.read_text().replace('waves = ["2023", "2024", "2025"]\n', ""))
    with pytest.raises(dp.InputError, match=r"no file for this group|one file per group"):
        dp.load_study(path)
    path = _panel_study(folder)
    path.write_text(path.read_text().replace('name = "road"\n', 'name = "road"\nlag = 1\n'))
    with pytest.raises(dp.InputError, match=r"lag: needs the predictor given per wave"):
        dp.load_study(path)


def test_sparse_and_two_mode_networks_are_refused_in_one_line(rng):
    Ys, Xs = _panel(rng, waves=2)
    with pytest.raises(dp.InputError, match="is two-mode; waves of two-mode networks are not"):
        dp.regress(dp.Waves([Y[:, :4] for Y in Ys]), {"a": dp.Waves([X[:, :4] for X in Xs[0]])})
    waves_sparse = [dp.SparseNetwork.from_scipy(sp.csr_array(np.abs(Y))) for Y in Ys]
    with pytest.raises(dp.InputError, match="SparseNetwork; waves run on the dense route only"):
        dp.regress(dp.Waves(waves_sparse), {"a": dp.Waves(Xs[0])})


# --- the difference the shared relabelling makes (slow) -------------------------------------
@pytest.mark.slow
def test_shared_relabelling_holds_its_size_where_per_wave_relabelling_does_not():
    """Panels under the null (the response independent of the predictor) where each node's
    sender propensity persists across the waves, in the response and in the predictor
    alike. One relabelling shared by every wave keeps a node's rows together across waves,
    so its rejection rate stays inside the binomial band around alpha (source:
    scipy.stats.binom); relabelling each wave on its own (the waves as groups of one
    block-diagonal network) breaks that link and rejects far too often."""
    rng = np.random.default_rng(2026)
    n, T, reps, perms, alpha = 12, 3, 400, 99, 0.05
    shared = per_wave = 0
    for _ in range(reps):
        sy, sx = rng.normal(size=n), rng.normal(size=n)
        Ys = [sy[:, None] + rng.normal(size=(n, n)) for _ in range(T)]
        Xs = [sx[:, None] + rng.normal(size=(n, n)) for _ in range(T)]
        seed = int(rng.integers(2**31))
        a = dp.regress(dp.Waves(Ys), {"x": dp.Waves(Xs)}, permutations=perms, seed=seed,
                       ci=None)
        b = dp.regress(block_diag(*Ys), {"x": block_diag(*Xs)}, permutations=perms,
                       seed=seed, groups=np.repeat(np.arange(T), n), ci=None)
        shared += a.p[-1] <= alpha
        per_wave += b.p[-1] <= alpha
    low, high = binom.interval(0.999, reps, alpha)
    assert low <= shared <= high, (shared, low, high)
    assert per_wave > high, (per_wave, high)


# --- logistic model --------------------------------------------------------------------------
def _binary_panel(rng, n, waves):
    send = rng.normal(size=n)
    Xs = [rng.normal(size=(n, n)) + 0.5 * send[:, None] for _ in range(waves)]
    Ys = [(rng.random((n, n)) < 1 / (1 + np.exp(-(0.6 * X + send[:, None] - 0.3 * t))))
          .astype(float) for t, X in enumerate(Xs)]
    return Ys, Xs


def test_logistic_observed_fit_equals_statsmodels_logit_with_wave_dummies(rng):
    n, T = 20, 3
    Ys, Xs = _binary_panel(rng, n, T)
    road = rng.normal(size=(n, n))
    res = dp.regress(dp.Waves(Ys), {"x": dp.Waves(Xs), "road": road}, model="logistic",
                     permutations=19, seed=2)
    r, c = dyads(n, n, True)
    y = np.concatenate([Y[r, c] for Y in Ys])
    X = np.column_stack([np.repeat(np.eye(T), len(r), axis=0),
                         np.concatenate([X[r, c] for X in Xs]), np.tile(road[r, c], T)])
    fit = sm.Logit(y, X).fit(disp=0, tol=1e-12, maxiter=100)  # source: statsmodels Logit
    assert res.terms == ("wave 1", "wave 2", "wave 3", "x", "road")
    np.testing.assert_allclose(res.coef, fit.params, rtol=1e-7)
    np.testing.assert_allclose(res.se, fit.bse, rtol=1e-6)
    np.testing.assert_allclose(res.stat, fit.tvalues, rtol=1e-6)
    np.testing.assert_allclose(res.deviance, -2 * fit.llf, rtol=1e-9)


@pytest.mark.parametrize("scheme,statistic,missing", [("y", "t", False), ("dsp", "t", False),
                                                     ("dsp", "score", False),
                                                     ("dsp", "t", True), ("y", "coef", True)])
def test_logistic_exact_pvalues_equal_brute_force(rng, scheme, statistic, missing):
    n, T = 5, 2
    Ys, Xs = _binary_panel(rng, n, T)
    if missing:
        Ys[1][0, 3] = np.nan
        Xs[0][2, 4] = np.nan
    res = dp.regress(dp.Waves(Ys), {"x": dp.Waves(Xs)}, model="logistic", scheme=scheme,
                     statistic=statistic, exact=True)
    # source: the logistic brute-force oracle of tests/test_logistic.py (Newton refits on
    # the stacked dyads) over all 120 relabellings, each applied to every wave: the waves
    # side by side as one n x nT matrix, wave 2's indicator as a predictor beside the
    # constant, columns relabelled as pi at every wave
    def side(mats):
        return np.stack(mats, axis=2).reshape(n, n * T)

    D = side([np.zeros((n, n)), np.ones((n, n))])
    rows, cols = np.nonzero(np.repeat(~np.eye(n, dtype=bool), T, axis=1))  # every wave's dyads

    def stats(p):
        pc = (p[:, None] * T + np.arange(T)).ravel()
        return oracle_stats(side(Ys), [D, side(Xs)], scheme, statistic, p, pc, rows, cols)[1:]

    obs = stats(np.arange(n))
    null = np.array([stats(np.array(p)) for p in itertools.permutations(range(n))])
    # the Newton fits of engine and oracle each converge to their own rounding
    # (tests/test_logistic.py's tolerances)
    _check(res, obs, null, T, rtol=FIT_RTOL, atol=FIT_ATOL)


def test_calibrate_takes_a_panel(rng):
    # calibrate's panel checks are in tests/test_calibrate_waves.py; here: it runs, and
    # tests only the predictors (the wave intercepts are fixed terms)
    Ys, Xs = _panel(rng, waves=2)
    res = dp.calibrate(dp.Waves(Ys), {"a": dp.Waves(Xs[0])}, replicates=2, permutations=19)
    assert res.terms == ("a",) and res.n_nodes == N


def test_run_file_and_reports_of_a_panel(rng, tmp_path):
    Ys, Xs = _panel(rng, waves=2)
    out = tmp_path / "panel.h5"
    res = dp.regress(dp.Waves(Ys, names=["a", "b"]), {"x": dp.Waves(Xs[0], lag=1),
                                                      "z": dp.Waves(Xs[1])},
                     permutations=64, seed=4, out=out)
    again = dp.open_result(out)
    assert again.terms == res.terms == ("wave b", "x", "z")
    assert again.fixed_terms == res.fixed_terms == 1
    np.testing.assert_array_equal(np.asarray(again.null), np.asarray(res.null))
    np.testing.assert_array_equal(again.p, res.p)
    csv = report.csv_text(res).splitlines()
    assert csv[1].startswith("wave b,") and csv[2].startswith("x,")
    assert "wave b" in report.html_text(res)
    assert len(report.plot_images(res)) >= 2  # one figure per tested term at least


@pytest.mark.parametrize("scheme", SCHEMES)
def test_undirected_missing_reverse_and_derived_per_wave_equal_brute_force(rng, scheme):
    n, T = 5, 2

    def sym(M):
        U = np.triu(M, 1)
        return U + U.T

    Ys = [sym(rng.normal(size=(n, n))) for _ in range(T)]
    Xs = [sym(rng.normal(size=(n, n))) for _ in range(T)]
    Ys[0][1, 2] = Ys[0][2, 1] = np.nan
    res = dp.regress(dp.Waves(Ys), {"a": dp.Waves(Xs)}, scheme=scheme, exact=True)
    # source: brute force, undirected (each unordered pair once), a missing dyad
    obs, null = panel_exact_null(Ys, [Xs], np.triu(np.ones((n, n), bool), 1), scheme, "t")
    _check(res, obs, null, T)
    # directed: the response's own reverse at each wave, a derived predictor per wave
    # (one attribute vector per wave) and the reverse of a Waves
    Ys = [rng.normal(size=(n, n)) for _ in range(T)]
    a1, a2 = rng.normal(size=n), rng.normal(size=n)
    res = dp.regress(dp.Waves(Ys), {"rev": dp.reverse(None),
                                    "g": dp.Waves([dp.gap(a1), dp.gap(a2)]),
                                    "rx": dp.reverse(dp.Waves(Xs))}, scheme=scheme, exact=True)
    G = [np.abs(a[:, None] - a[None, :]) for a in (a1, a2)]
    obs, null = panel_exact_null(Ys, [[Y.T for Y in Ys], G, [X.T for X in Xs]],
                                 ~np.eye(n, dtype=bool), scheme, "t")
    _check(res, obs, null, T)


def test_panel_too_large_for_memory_is_refused_before_any_array(rng, monkeypatch):
    Ys, Xs = _panel(rng, waves=3)
    monkeypatch.setattr(dp.inputs.memory, "available_bytes", lambda: 1000)
    with pytest.raises(dp.InputError, match=r"waves: 5 nodes at 3 waves would need .* more "
                                            r"than the .* available"):
        dp.regress(dp.Waves(Ys), {"a": dp.Waves(Xs[0])})


def test_a_predictor_constant_within_each_wave_is_named(rng):
    Ys, Xs = _panel(rng, waves=2)
    level = [np.full((N, N), 1.0), np.full((N, N), 3.0)]  # differs between waves only
    with pytest.raises(dp.InputError, match=r"predictor 'level' is constant over the dyad set "
                                            r"within each wave"):
        dp.regress(dp.Waves(Ys), {"a": dp.Waves(Xs[0]), "level": dp.Waves(level)})
    # one intercept for every wave: the same predictor is a wave contrast, and fits
    res = dp.regress(dp.Waves(Ys), {"a": dp.Waves(Xs[0]), "level": dp.Waves(level)},
                     wave_effects=False, permutations=9, seed=1)
    assert res.terms == ("intercept", "a", "level")


@pytest.mark.parametrize("scheme", ["dsp", "freedman-lane"])
def test_interval_endpoints_against_brute_force(rng, scheme):
    Ys, Xs = _panel(rng, waves=2)
    res = dp.regress(dp.Waves(Ys), {"a": dp.Waves(Xs[0]), "b": dp.Waves(Xs[1])},
                     scheme=scheme, exact=True, ci=0.9)
    assert np.all(np.isnan(res.ci_low[:2]))
    for j in (0, 1):
        lo, hi = res.ci_low[2 + j], res.ci_high[2 + j]
        assert np.isfinite(lo) and np.isfinite(hi) and lo < res.coef[2 + j] < hi
        eps = 1e-6 * (hi - lo)
        for end, inward in ((lo, 1.0), (hi, -1.0)):
            # source: brute-force exact p-value of the test of beta_j = b on every wave's
            # y - b x_j (reference.panel_exact_null), all 120 relabellings
            def p_at(b):
                obs, null = panel_exact_null([Y - b * X for Y, X in zip(Ys, Xs[j])], Xs,
                                             _mask(N), scheme, "t")
                return counts(obs, null)[0][j] / null.shape[0]

            p_in, p_out = p_at(end + inward * eps), p_at(end - inward * eps)
            assert p_in > 0.1 >= p_out, (j, end, p_in, p_out)


def test_study_groups_follow_the_node_table_whatever_its_order(panel_folder):
    # the node table lists the nodes in reverse label order; groups come from its column
    folder, labels, Ys, Xs = panel_folder
    order = labels[::-1]
    side = {lab: ("east" if i % 2 else "west") for i, lab in enumerate(labels)}
    (folder / "nodes.csv").write_text("id,size,side\n" + "".join(
        f"{lab},{i / 7:.3f},{side[lab]}\n" for i, lab in enumerate(order)))
    res = dp.load_study(_panel_study(folder, extra='groups = "side"\n')).run()
    Yf = [pd.DataFrame(Y, index=labels, columns=labels) for Y in Ys]
    Yf[1] = Yf[1].drop(index="f3", columns="f3")
    sizes = pd.Series([i / 7 for i in range(7)], index=order).round(3)
    # source: the same panel through the Python API, groups as a Series aligned by label
    direct = dp.regress(dp.Waves(Yf, names=["2023", "2024", "2025"]),
                        {"kin": dp.Waves(Xs[0]), "road": Xs[1][0], "size_gap": dp.gap(sizes)},
                        scheme="dsp", permutations=99, seed=5,
                        groups=pd.Series(side))
    np.testing.assert_allclose(res.coef, direct.coef, rtol=1e-12)
    np.testing.assert_array_equal(np.asarray(res.null), np.asarray(direct.null))
    assert res.n_dyads == direct.n_dyads
