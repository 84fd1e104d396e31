"""``dyadperm.calibrate`` on panels: several waves of one node set, one relabelling.

External references, named beside each check:
- ``tests/reference.py``: ``panel_simulated_response`` (the null response written from
  the Freedman & Lane 1983 model: a numpy ``lstsq`` reduced fit with one indicator per
  wave on the stacked dyads, its residuals relabelled by the same permutation at every
  wave) and ``panel_scheme_stat`` (full ``lstsq`` refits of each scheme on the stacked
  dyads, every wave relabelled by the same permutation);
- statsmodels ``OLS`` with wave dummies on the stacked dyads (classical p-values, with
  the wave intercepts counted in the residual degrees of freedom);
- scipy.stats ``binom`` (the band a valid test's rejection count falls in; methods.md,
  null calibration fact: under a valid test the count of rejections over R independent
  data sets is Binomial(R, a)).

The seed contract the twin follows is the one calibrate's module notes state: replicate
r of term j draws its residual relabelling first from SeedSequence(seed, spawn_key=(j, r))
(one block, plain arrays: the engine's node order is the given one).

All data are simulated here (invented, no real network).
"""

from __future__ import annotations

import json
import sys

import numpy as np
import pytest
import statsmodels.api as sm
from scipy.stats import binom

import dyadperm as dp
from dyadperm.calibrate import OLS, calibrate_study, simulated_response
from reference import (SCHEMES, all_relabellings, counts, panel_scheme_stat,
                       panel_simulated_response, random_pvalues)
from test_waves import _matrix_csv, _panel, _panel_study

BAND_LEVEL = 0.99  # the tests' own band: wider than the 95% the tool reports
SIM_ATOL = 1e-12


def _mask(n, directed=True):
    m = ~np.eye(n, dtype=bool)
    return m if directed else np.triu(m, 1)


def _first_draw(seed, j, r, n):
    """The residual relabelling of replicate r of term j (calibrate's module notes)."""
    rng = np.random.Generator(np.random.PCG64(np.random.SeedSequence(seed, spawn_key=(j, r))))
    return rng.permutation(n)


def _with_missing(Ys, rng, count=4):
    Ys = [Y.copy() for Y in Ys]
    n = Ys[0].shape[0]
    for t, Y in enumerate(Ys):
        for _ in range(count):
            i, k = rng.choice(n, size=2, replace=False)
            Y[i, k] = np.nan
    Ys[-1][2, :] = np.nan  # node 2 absent from the last wave as a sender
    Ys[-1][:, 2] = np.nan
    return Ys


# --------------------------------------------------------------------------- (a) the response

@pytest.mark.parametrize("case", ["complete", "missing", "lag", "undirected", "one intercept"])
def test_simulated_response_equals_the_numpy_twin(case):
    rng = np.random.default_rng(1901)
    n = 12
    directed = case != "undirected"
    waves = 3 if case == "lag" else 2
    Ys, Xs = _panel(rng, n=n, waves=waves, directed=directed)
    if case in ("missing", "lag"):
        Ys = _with_missing(Ys, rng)
    wave_effects = case != "one intercept"
    if case == "lag":  # the response's first wave drops out; x at the previous wave
        preds = {"a": dp.Waves(Xs[0], lag=1), "b": dp.Waves(Xs[1])}
        Yt, Xt = Ys[1:], [Xs[0][:-1], Xs[1][1:]]
    else:
        preds = {"a": dp.Waves(Xs[0]), "b": dp.Waves(Xs[1])}
        Yt, Xt = Ys, Xs
    seed = 77
    for j, term in enumerate(("a", "b")):
        for r in (0, 5):
            got = simulated_response(dp.Waves(Ys), preds, term=term, replicate=r, seed=seed,
                                     permutations=19, wave_effects=wave_effects)
            perm = _first_draw(seed, j, r, n)
            # source: tests/reference.py panel_simulated_response (numpy lstsq twin)
            want = panel_simulated_response(Yt, Xt, _mask(n, directed), j, perm,
                                            wave_effects=wave_effects, directed=directed)
            assert got.response.shape == (len(Yt), n, n)
            np.testing.assert_array_equal(np.isnan(got.response), np.isnan(want))
            np.testing.assert_allclose(got.response, want, rtol=0, atol=SIM_ATOL)
            # the tests' relabellings: one relabelling of the nodes, for every wave
            assert got.rows.shape == (19, n) and got.cols is got.rows
            assert all(sorted(p) == list(range(n)) for p in got.rows)
    # the power response: y* + e sd(y) / sd(x_j) x_j over the fitted dyads of every wave
    eff = simulated_response(dp.Waves(Ys), preds, term="b", replicate=5, seed=seed,
                             permutations=19, effect=0.4, wave_effects=wave_effects)
    want = panel_simulated_response(Yt, Xt, _mask(n, directed), 1, _first_draw(seed, 1, 5, n),
                                    wave_effects=wave_effects, directed=directed, effect=0.4)
    np.testing.assert_allclose(eff.response, want, rtol=0, atol=SIM_ATOL)


def test_the_residuals_move_together_across_waves():
    # a node's residual row travels to the same new position at every wave: with the
    # twin's relabelling, y*_t - fitted_t equals R_t[perm][:, perm] at each wave, and
    # relabelling wave 2 by another permutation would not match (source: the twin above)
    rng = np.random.default_rng(7)
    n = 10
    Ys, Xs = _panel(rng, n=n, waves=2)
    got = simulated_response(dp.Waves(Ys), {"a": dp.Waves(Xs[0]), "b": dp.Waves(Xs[1])},
                             term="a", replicate=2, seed=3).response
    perm = _first_draw(3, 0, 2, n)
    other = np.roll(perm, 1)
    want = panel_simulated_response(Ys, Xs, _mask(n), 0, perm)
    np.testing.assert_allclose(got, want, rtol=0, atol=SIM_ATOL)
    # the same construction with wave 2 relabelled apart differs at wave 2 only
    apart = panel_simulated_response(Ys, Xs, _mask(n), 0, other)
    assert not np.allclose(got[1][_mask(n)], apart[1][_mask(n)])


# --------------------------------------------------------------------------- (b) size

@pytest.mark.parametrize("missing", [False, True])
def test_small_calibration_of_a_panel_holds_its_size(missing):
    rng = np.random.default_rng(2024)
    n, R, M = 12, 40, 99
    Ys, Xs = _panel(rng, n=n, waves=2)  # a node propensity that persists across waves
    if missing:
        Ys = _with_missing(Ys, rng)
    preds = {"a": dp.Waves(Xs[0]), "b": dp.Waves(Xs[1])}
    res = dp.calibrate(dp.Waves(Ys), preds, schemes=SCHEMES, replicates=R, permutations=M,
                       seed=11)
    assert res.terms == ("a", "b")  # the wave intercepts are not calibrated
    assert res.methods == SCHEMES + (OLS,)
    assert res.n_nodes == n and res.permutations == M and not res.exact
    assert any("one relabelling of the nodes applied to every wave" in x for x in res.notes)
    assert not np.isnan(res.null_p).any()
    valid = np.floor(0.05 * (M + 1)) / (M + 1)
    lo, hi = binom.interval(BAND_LEVEL, R, valid)  # source: scipy.stats.binom
    for s in range(len(SCHEMES)):
        assert np.all((res.rejections[:, s] >= lo) & (res.rejections[:, s] <= hi)), \
            (SCHEMES[s], res.rejections)


@pytest.mark.parametrize("statistic", ["t", "coef"])
@pytest.mark.parametrize("missing", [False, True])
def test_replicate_pvalues_match_brute_force_and_statsmodels(missing, statistic):
    """Each scheme's p-value of a replicate equals the brute-force oracle's on the same
    relabellings (each applied to every wave), and the classical column equals statsmodels
    OLS with wave dummies on the stacked dyads: df = N - (T intercepts + k)."""
    rng = np.random.default_rng(515)
    n, R, M, seed = 9, 3, 29, 8
    Ys, Xs = _panel(rng, n=n, waves=2)
    if missing:
        Ys = _with_missing(Ys, rng, count=3)
    preds = {"a": dp.Waves(Xs[0]), "b": dp.Waves(Xs[1])}
    res = dp.calibrate(dp.Waves(Ys), preds, replicates=R, permutations=M, seed=seed,
                       statistic=statistic)
    mask = _mask(n)
    T = len(Ys)
    for j, term in enumerate(res.terms):
        for r in range(R):
            rep = simulated_response(dp.Waves(Ys), preds, term=term, replicate=r, seed=seed,
                                     permutations=M)
            ystar = list(rep.response)
            for s, scheme in enumerate(res.methods[:-1]):
                # source: tests/reference.py panel_scheme_stat (full lstsq refits)
                obs = panel_scheme_stat(ystar, Xs, mask, scheme, statistic, np.arange(n))[j]
                null = [panel_scheme_stat(ystar, Xs, mask, scheme, statistic, p)[j]
                        for p in rep.rows]
                p_ref = random_pvalues(np.array([obs]), np.array(null)[:, None])[0][0]
                assert res.null_p[j, s, r] == pytest.approx(p_ref, abs=1e-12), (scheme, r)
            # source: statsmodels OLS, wave dummies on the stacked dyads
            use = [mask & np.isfinite(ystar[t]) for t in range(T)]
            D = np.zeros((sum(int(u.sum()) for u in use), T))
            D[np.arange(D.shape[0]), np.repeat(np.arange(T), [int(u.sum()) for u in use])] = 1
            X = np.column_stack([D] + [np.concatenate([W[t][use[t]] for t in range(T)])
                                       for W in Xs])
            y = np.concatenate([ystar[t][use[t]] for t in range(T)])
            fit = sm.OLS(y, X).fit()
            assert fit.df_resid == y.size - T - 2
            assert res.null_p[j, -1, r] == pytest.approx(fit.pvalues[T + j], rel=1e-8)


def test_exact_enumeration_of_a_small_panel():
    """n = 5: every test enumerates all 120 relabellings, each applied to every wave; its
    p-values equal the brute-force ones, p = b / 120 with the identity counted."""
    rng = np.random.default_rng(3)
    n, seed = 5, 2
    Ys, Xs = _panel(rng, n=n, waves=3)
    preds = {"a": dp.Waves(Xs[0]), "b": dp.Waves(Xs[1])}
    res = dp.calibrate(dp.Waves(Ys), preds, replicates=2, permutations=200, seed=seed,
                       include_ols=False)
    assert res.exact and res.permutations == 120
    # module notes: an enumerated valid test rejects floor(alpha m) / m of the time
    assert res.valid_rate == pytest.approx(np.floor(0.05 * 120) / 120)
    for j, term in enumerate(res.terms):
        for r in range(2):
            rep = simulated_response(dp.Waves(Ys), preds, term=term, replicate=r, seed=seed,
                                     permutations=200)
            assert rep.rows is None  # enumerated, not drawn
            for s, scheme in enumerate(res.methods):
                # source: tests/reference.py panel_scheme_stat over all_relabellings
                obs = panel_scheme_stat(list(rep.response), Xs, _mask(n), scheme, "t",
                                        np.arange(n))[j]
                null = [panel_scheme_stat(list(rep.response), Xs, _mask(n), scheme, "t", p)[j]
                        for p, _ in all_relabellings(n)]
                b2 = counts(np.array([obs]), np.array(null)[:, None])[0][0]
                assert res.null_p[j, s, r] == pytest.approx(b2 / 120, abs=1e-12)


def test_bad_wave_effects_is_named():
    rng = np.random.default_rng(4)
    Ys, Xs = _panel(rng, n=6, waves=2)
    with pytest.raises(dp.InputError, match=r"`wave_effects` must be True or False; got 'no'"):
        dp.calibrate(dp.Waves(Ys), {"a": dp.Waves(Xs[0])}, replicates=2, permutations=9,
                     wave_effects="no")
    with pytest.raises(dp.InputError, match=r"predictor 'a' has 3 waves; the response has 2"):
        dp.calibrate(dp.Waves(Ys), {"a": dp.Waves(Xs[0] + [Xs[1][0]])}, replicates=2,
                     permutations=9)


# --------------------------------------------------------------------------- (c) study files

@pytest.fixture
def panel_study(tmp_path):
    rng = np.random.default_rng(12)
    labels = [f"f{i}" for i in range(7)]
    Ys, Xs = _panel(rng, n=7, waves=3)
    for t, w in enumerate(["2023", "2024", "2025"]):
        keep = [i for i in range(7) if not (w == "2024" and i == 3)]  # f3 absent in 2024
        _matrix_csv(tmp_path / f"trade{w}.csv", [labels[i] for i in keep],
                    np.round(Ys[t], 4)[np.ix_(keep, keep)])
        _matrix_csv(tmp_path / f"kin{w}.csv", labels, np.round(Xs[0][t], 4))
    _matrix_csv(tmp_path / "road.csv", labels, np.round(Xs[1][0], 4))
    (tmp_path / "nodes.csv").write_text("id,size\n" + "".join(
        f"{lab},{v:.3f}\n" for lab, v in zip(labels, rng.normal(size=7))))
    return tmp_path


def test_calibrate_study_of_a_panel_with_a_lag(panel_study):
    study = dp.load_study(_panel_study(panel_study, lag="lag = 1\n"))
    res = calibrate_study(study, replicates=3, permutations=19, jobs=1)
    assert res.terms == ("kin", "road", "size_gap")
    assert res.seed == 5 and res.n_nodes == 7
    # f3 absent in 2024: waves 2024 and 2025 used (lag 1), 30 + 42 complete dyads
    assert res.n_dyads == 30 + 42
    assert any("wave(s) 2023 drop out" in x for x in res.notes)
    assert not np.isnan(res.null_p).any()


def test_cli_calibrate_on_a_panel_study(panel_study, monkeypatch, capsys):
    from dyadperm.cli import main

    path = _panel_study(panel_study)
    monkeypatch.setattr(sys, "argv", ["dyadperm", "calibrate", str(path), "--replicates", "3",
                                      "--permutations", "19", "--json", "--quiet"])
    code = 0
    try:
        main()
    except SystemExit as exc:
        code = exc.code
    out, err = capsys.readouterr()
    assert code in (0, None), err
    d = json.loads(out)
    assert d["terms"] == ["kin", "road", "size_gap"] and d["replicates"] == 3
    assert d["n_dyads"] == 42 + 30 + 42
    assert any("wave intercepts (wave 2023, wave 2024, wave 2025)" in x for x in d["notes"])
