"""Monte Carlo precision, planning, stopping rules, max-statistic adjustment, many networks.

Sources named beside each check:
- scipy.stats.binomtest(...).proportion_ci(method="exact") (Clopper-Pearson) and
  scipy.stats.binom (binomial tail probabilities);
- the planning formula of methods.md, m = ceil(alpha (1 - alpha) / d^2), worked by hand;
- Besag & Clifford (1991, Biometrika 78:301-304): p = h / l at the h-th exceedance;
- Gandy (2009, JASA 104:1504-1511): the definition of the boundaries and the uniform
  bound on the resampling risk, recomputed here by enumerating every 0/1 sequence;
- Westfall & Young (1993), single-step maxT, recomputed by brute force from the null;
- scipy.stats.pearsonr on relabelled matrices built with numpy fancy indexing.
"""

from __future__ import annotations

import itertools
import math
import textwrap
from fractions import Fraction

import numpy as np
import pytest
import scipy.stats as st

import dyadperm as dp
from dyadperm import planning, settings
from dyadperm.pipeline import adjustment, pvalues, stopping
from dyadperm.routes import correlation
from dyadperm.errors import InputError, RunFileError
from dyadperm.pipeline.permutations import Blocks, draw
from reference import INTERVAL_RTOL, P_ATOL, STAT_ATOL, STAT_RTOL, dyads, relabel, vec


def _data(rng, n=24, effect=0.4, k_null=1):
    """A response with one planted effect ("strong") and k_null true nulls ("null...")."""
    strong = rng.normal(size=(n, n))
    preds = {"strong": strong}
    for j in range(k_null):
        preds[f"null{j + 1}" if k_null > 1 else "null"] = rng.normal(size=(n, n))
    y = effect * strong + rng.normal(size=(n, n))
    return y, preds


def _exceed_counts(res):
    """b per tested column, counted by hand from the stored null (ties as methods.md)."""
    obs = np.asarray(res.stat)[np.isfinite(res.p)]
    null = np.asarray(res.null)
    return np.array([np.sum(np.abs(null[:, j]) >= np.abs(obs[j]) * (1 - 1e-9))
                     for j in range(null.shape[1])])


# --------------------------------------------------------------------------- p_se, p_interval

def test_p_se_and_interval_equal_scipy_clopper_pearson(rng):
    y, preds = _data(rng, k_null=2)
    res = dp.regress(y, preds, permutations=499, seed=4)
    b = _exceed_counts(res)
    m = res.permutations
    for col, j in enumerate(np.flatnonzero(np.isfinite(res.p))):
        # source: scipy.stats.binomtest, Clopper-Pearson for b + 1 successes in m + 1 trials
        ci = st.binomtest(int(b[col]) + 1, m + 1).proportion_ci(method="exact")
        np.testing.assert_allclose(res.p_interval[j], [ci.low, ci.high], rtol=INTERVAL_RTOL)
        # source: methods.md (Phipson & Smyth 2010) p = (b + 1) / (m + 1), se of a binomial
        p = (b[col] + 1) / (m + 1)
        assert res.p[j] == pytest.approx(p, abs=P_ATOL)
        assert res.p_se[j] == pytest.approx(math.sqrt(p * (1 - p) / (m + 1)), abs=P_ATOL)


def test_layer_p_interval_equal_scipy_clopper_pearson(rng):
    a, b, c = (rng.normal(size=(15, 15)) for _ in range(3))
    res = dp.correlate([a, b, a + c], permutations=199, seed=3)
    counts = _exceed_counts(res)
    for j in range(len(res.terms)):
        # source: scipy.stats.binomtest Clopper-Pearson interval
        ci = st.binomtest(int(counts[j]) + 1, 200).proportion_ci(method="exact")
        np.testing.assert_allclose(res.p_interval[j], [ci.low, ci.high], rtol=INTERVAL_RTOL)


def test_inverse_sampling_interval_solves_the_binomial_tail_equations():
    h = np.array([1, 3, 10, 10, 20])
    tau = np.array([7, 3, 13, 250, 4000])
    iv = stopping.inverse_sampling_interval(h, tau)
    for (lo, hi), hh, ll in zip(iv, h, tau):
        # source: scipy.stats.binom; P(tau <= l) = P(Bin(l, p) >= h) at the lower limit and
        # P(tau >= l) = P(Bin(l - 1, p) <= h - 1) at the upper one, each 2.5% (common practice)
        assert st.binom.sf(hh - 1, ll, lo) == pytest.approx(0.025, rel=1e-8)
        if ll > hh:
            assert st.binom.cdf(hh - 1, ll - 1, hi) == pytest.approx(0.025, rel=1e-8)
        else:
            assert hi == 1.0  # every relabelling exceeded: nothing bounds p from above
        assert lo < hh / ll <= hi


# --------------------------------------------------------------------------- planning

@pytest.mark.parametrize("d, alpha, expected", [
    (0.002, 0.05, 11_875),   # methods.md: 0.05 * 0.95 / 0.002^2 = 11,875 exactly
    (0.01, 0.05, 475),       # by hand: 0.0475 / 0.0001
    (0.001, 0.01, 9_900),    # by hand: 0.0099 / 0.000001
    (0.003, 0.05, 5_278),    # by hand: 0.0475 / 0.000009 = 5277.8 -> 5278
])
def test_permutations_needed(d, alpha, expected):
    assert planning.permutations_needed(d, alpha) == expected


@pytest.mark.parametrize("d, alpha", [(0.002, 0.05), (0.003, 0.05), (0.001, 0.01),
                                      (0.0123, 0.2)])
def test_planned_m_keeps_the_reported_error_within_the_precision(d, alpha):
    """planning's docstring: m = ceil(alpha (1 - alpha) / d^2) (methods.md) is the smallest m
    whose binomial standard error sqrt(alpha (1 - alpha) / m) is at most d; the error a run
    reports divides by m + 1 (pvalues.mc_standard_error), so at p = alpha it is at most d
    with the planned m, still at most d with m - 1, and above d with m - 2. Exact in
    rationals (fractions), then through the package's own formula in floating point."""
    m = planning.permutations_needed(d, alpha)
    a, dd = Fraction(repr(alpha)), Fraction(repr(d))
    var = a * (1 - a)
    assert var / m <= dd ** 2 < var / (m - 1)  # binomial error: m is the smallest
    assert var / (m + 1) < dd ** 2             # reported error with the planned m: below d
    assert var / m <= dd ** 2                  # with m - 1 (m outcomes): still within d
    assert var / (m - 1) > dd ** 2             # with m - 2: above d
    assert float(pvalues.mc_standard_error(alpha, m)) <= d
    assert float(pvalues.mc_standard_error(alpha, m - 2)) > d


def test_methods_example_reported_error():
    # methods.md: alpha 0.05, d 0.002 -> 11,875; 0.0475 / 0.002^2 = 11,875 exactly, so with
    # m - 1 = 11,874 relabellings the reported error sqrt(0.0475 / 11,875) is exactly d
    m = planning.permutations_needed(0.002, 0.05)
    assert m == 11_875
    assert Fraction(19, 400) / (m - 1 + 1) == Fraction(2, 1000) ** 2
    assert float(pvalues.mc_standard_error(0.05, m)) == pytest.approx(0.0019999158, rel=1e-8)


@pytest.mark.parametrize("args, match", [
    ((0.0, 0.05), r"`precision` must be a number with 0 < precision < 0\.5; got 0\.0"),
    ((0.002, 1.0), r"`alpha` must be a number with 0 < alpha < 1; got 1\.0"),
    (("0.1", 0.05), r"`precision` must be a number .*; got '0\.1'"),
])
def test_permutations_needed_errors(args, match):
    with pytest.raises(InputError, match=match):
        planning.permutations_needed(*args)


def _study(folder, n=12, extra_test="", k=2, seed=1):
    rng = np.random.default_rng(seed)
    y = rng.normal(size=(n, n))
    np.save(folder / "y.npy", y)
    preds = ""
    for j in range(k):
        np.save(folder / f"x{j}.npy", rng.normal(size=(n, n)) + (0.5 * y if j == 0 else 0))
        preds += f'[[predictor]]\nname = "x{j}"\nfile = "x{j}.npy"\n\n'
    text = textwrap.dedent("""\
        [study]
        title = "Invented test study"

        [response]
        file = "y.npy"

        """) + preds + "[test]\npermutations = 300\nseed = 8\n" + extra_test
    path = folder / "s.toml"
    path.write_text(text)
    return path


def test_plan_study_times_the_study(tmp_path):
    path = _study(tmp_path, n=12)
    est = planning.plan_study(path, precision=0.002, alpha=0.05, jobs=2, budget=0.3)
    assert est.permutations == 11_875  # methods.md worked example
    assert est.workers == 2 and est.machine_cores >= 1
    assert not est.exact and est.relabellings == math.factorial(12)
    assert est.timed_permutations > 0 and est.rate > 0 and est.seconds > 0
    text = est.text()
    assert "11,875 random relabellings" in text and "2 worker(s)" in text
    assert ("reports the Monte Carlo s.e. sqrt(p (1 - p) / (m + 1)): 0.00199992 at p = alpha, "
            "within the precision asked") in text


def test_plan_study_says_when_enumeration_is_smaller(tmp_path):
    path = _study(tmp_path, n=5)
    est = planning.plan_study(path, precision=0.002, jobs=1, budget=0.2)
    # 5! = 120 relabellings < 11,875: the run enumerates them (methods.md, exact="auto")
    assert est.exact and est.relabellings == 120 and est.run_permutations == 120
    assert est.timed_permutations == 120  # the whole run fitted in the timing run
    assert "enumerates them all" in est.text()


def test_steady_rate_spans_one_round_of_bursting_chunks():
    # marks (seconds, relabellings done) as a 10,000-node dsp study's timing run reported
    # them: two workers finishing chunks of 16 together. Worked by hand: from (19.72, 32)
    # to (26.05, 64), 32 relabellings in 6.33 s; two marks of one burst (26.05, 48) and
    # (26.05, 64) span no time and gave the 175 relabellings/s a plan once printed.
    marks = [(19.71, 16), (19.72, 32), (26.05, 48), (26.05, 64)]
    assert planning.steady_rate(marks, 2) == pytest.approx(32 / 6.33)
    # staggered chunks of 8, one a second: 16 relabellings in the last 2 s
    stagger = [(float(t), 8 * t) for t in range(1, 6)]
    assert planning.steady_rate(stagger, 2) == pytest.approx(8.0)
    # fewer marks than a round: from the second mark (the first carries the setup) ...
    assert planning.steady_rate([(5.0, 10), (6.0, 20), (8.0, 30)], 4) == pytest.approx(5.0)
    # ... or from the first when there are only two
    assert planning.steady_rate([(5.0, 10), (7.0, 30)], 4) == pytest.approx(10.0)


def test_plan_times_the_study_as_run_runs_it(tmp_path, monkeypatch):
    # the timing run must run what `run` runs: the file's storage, its intervals and its
    # layers loaded in place (a float32 study once timed its run in float64, with twice
    # the memory)
    path = _study(tmp_path, n=12, extra_test='storage = "float32"\nci = 0.9\n')
    calls = []
    regress = dp.api.regress

    def spy(*args, **kwargs):
        calls.append({k: kwargs.get(k) for k in ("storage", "overwrite_inputs", "ci", "out")})
        return regress(*args, **kwargs)

    monkeypatch.setattr(dp.api, "regress", spy)
    planning.plan_study(path, precision=0.002, jobs=1, budget=0.2)
    study = dp.load_study(path)
    assert study.layers_in_place
    study.run(permutations=5)
    planned, run = calls[1], calls[-1]  # calls[0]: the plan's warm-up
    assert len(calls) == 3
    assert planned == dict(run, out=None) == {"storage": "float32", "overwrite_inputs": True,
                                              "ci": 0.9, "out": None}


# --------------------------------------------------------------------------- stop rules

def test_stop_rule_validation():
    assert settings.stop_rule("besag-clifford") == settings.StopRule("besag-clifford", 10,
                                                                         None, 0.05)
    assert settings.stop_rule("gandy", risk=0.01, alpha=0.01).risk == 0.01
    with pytest.raises(InputError, match=r"`stop` must be one of none, besag-clifford, gandy; "
                                         r"got 'bc'"):
        settings.stop_rule("bc")
    with pytest.raises(InputError, match=r"`stop_risk` applies to stop = gandy only \(stop is "
                                         r"besag-clifford\); got 0\.1"):
        settings.stop_rule("besag-clifford", risk=0.1)
    with pytest.raises(InputError, match=r"`stop_risk` must be a number with 0 < stop_risk "
                                         r"< 0\.5; got 0\.5"):
        settings.stop_rule("gandy", risk=0.5)
    with pytest.raises(InputError, match=r"`stop_exceedances` must be an integer >= 1; got 0"):
        settings.stop_rule("besag-clifford", exceedances=0)


def test_besag_clifford_p_is_h_over_l_at_the_hth_exceedance(rng):
    # a null of 60 relabellings of two terms, built by hand
    observed = np.array([1.0, 3.0])
    null = rng.normal(size=(60, 2)) * np.array([1.5, 1.0])
    rule = settings.StopRule("besag-clifford", 4, None, 0.05)
    a = stopping.assess(null, observed, exact=False, stop=rule.to_dict(), planned=100)
    for j in range(2):
        hits = np.flatnonzero(np.abs(null[:, j]) >= abs(observed[j]))
        if hits.size >= 4:
            l = hits[3] + 1
            # source: Besag & Clifford (1991): stopped at the h-th exceedance after l, p = h / l
            assert a.pv.p[j] == pytest.approx(4 / l) and a.stop_at[j] == l
        else:
            # the paper's truncated rule: fewer than h exceedances in all m: (g + 1) / (m + 1)
            assert a.pv.p[j] == pytest.approx((hits.size + 1) / 61) and np.isnan(a.stop_at[j])
    assert a.stopped_by is None or a.stopped_by == "besag-clifford"


def _enumerate_gandy(b: stopping.GandyBoundaries, n_max: int, p: float):
    """Every 0/1 sequence of length n_max with its probability under p: the step at which
    it stops at the upper / lower boundary (or never), straight from the definition."""
    U, L = b.arrays(1, n_max)
    out = []
    for seq in itertools.product((0, 1), repeat=n_max):
        s = np.cumsum(seq)
        prob = p ** s[-1] * (1 - p) ** (n_max - s[-1])
        hit_u = np.flatnonzero(s >= U)
        hit_l = np.flatnonzero(s <= L)
        first_u = hit_u[0] + 1 if hit_u.size else n_max + 1
        first_l = hit_l[0] + 1 if hit_l.size else n_max + 1
        out.append((prob, s, first_u, first_l))
    return U, L, out


def test_gandy_boundaries_meet_their_definition_by_enumeration():
    # a large alpha and risk and a short spending sequence make the boundaries bite early
    alpha, eps, k, n_max = 0.3, 0.1, 5, 14
    b = stopping.GandyBoundaries(alpha, eps, spending=k)
    U, L, paths = _enumerate_gandy(b, n_max, alpha)
    spent_u = spent_l = 0.0
    for n in range(1, n_max + 1):
        eps_n = eps * n / (n + k)  # [memory] Gandy's spending sequence
        running = [(pr, s) for pr, s, fu, fl in paths if min(fu, fl) >= n]

        def upper_mass(j):
            return sum(pr for pr, s in running if s[n - 1] >= j)

        def lower_mass(j):
            return sum(pr for pr, s in running if s[n - 1] <= j)

        # source: Gandy (2009) [memory], U_n = min{j: P(tau >= n, S_n >= j) + P(tau < n,
        # upper) <= eps_n}, L_n = max{j: P(tau >= n, S_n <= j) + P(tau < n, lower) <= eps_n}
        u = next(j for j in range(0, n + 2) if upper_mass(j) + spent_u <= eps_n + 1e-15)
        lo = max(j for j in range(-1, n + 1) if lower_mass(j) + spent_l <= eps_n + 1e-15)
        assert (U[n - 1], L[n - 1]) == (u, lo), n
        spent_u += upper_mass(u)
        spent_l += lower_mass(lo)
    assert spent_u <= eps and spent_l <= eps
    assert (L >= 0).any() and (U <= n_max).any()  # the test really exercised both sides


@pytest.mark.parametrize("p", [0.05, 0.15, 0.25, 0.3, 0.35, 0.5, 0.8])
def test_gandy_resampling_risk_is_bounded_for_every_p(p):
    # source: Gandy (2009), the resampling risk P_p(decision differs from p <= alpha) is at
    # most eps for every p [memory: the paper's uniform bound], here computed exactly by
    # enumerating all 2^14 sequences of a test with alpha 0.3, eps 0.1
    alpha, eps, n_max = 0.3, 0.1, 14
    b = stopping.GandyBoundaries(alpha, eps, spending=5)
    _, _, paths = _enumerate_gandy(b, n_max, p)
    wrong_upper = sum(pr for pr, s, fu, fl in paths if fu < fl)    # says p > alpha
    wrong_lower = sum(pr for pr, s, fu, fl in paths if fl < fu)    # says p <= alpha
    risk = wrong_upper if p <= alpha else wrong_lower
    assert risk <= eps


def test_sequential_stop_point_ignores_chunk_completion_order(rng):
    observed = np.array([2.5, 0.1])
    null = rng.normal(size=(400, 2))
    rule = settings.StopRule("gandy", None, 0.001, 0.05)
    chunks = [(c, null[c * 25:(c + 1) * 25]) for c in range(16)]
    stops = []
    for order in (range(16), rng.permutation(16), rng.permutation(16)):
        seq = stopping.Sequential(rule, observed, chunk_size=25, total=400)
        at = None
        for c in order:
            if seq.feed(int(c), chunks[int(c)][1]) and at is None:
                at = seq.stop_rows
        stops.append((seq.stop_rows, tuple(seq.tau)))
    assert stops[0] == stops[1] == stops[2]
    assert stops[0][0] is not None and stops[0][0] % 25 == 0


def test_stop_rules_stop_early_on_a_clear_null_and_a_clear_effect(rng):
    y, preds = _data(rng, n=24, effect=0.5)
    full = dp.regress(y, preds, permutations=2000, seed=11, chunk_size=50)
    g = dp.regress(y, preds, permutations=2000, seed=11, chunk_size=50, stop="gandy")
    # Gandy: both the strong term (decided p <= alpha) and the null one (p > alpha) decide
    assert g.stopped_by == "gandy" and g.permutations < 2000 and g.planned == 2000
    assert g.stop_verdict == ("", "p <= alpha", "p > alpha")
    assert full.p[1] <= 0.05 < full.p[2]  # the full run agrees
    # Besag-Clifford ends a term at h exceedances: the null term stops early on its own
    bc = dp.regress(y, {"null": preds["null"]}, permutations=2000, seed=11, chunk_size=50,
                    stop="besag-clifford")
    assert bc.stopped_by == "besag-clifford" and bc.permutations < 2000
    at = int(bc.stop_at[1])
    assert bc.p[1] == pytest.approx(10 / at)  # source: Besag & Clifford (1991), p = h / l
    # a clear effect never reaches h = 10 exceedances: the rule keeps the full run's p
    bc2 = dp.regress(y, {"strong": preds["strong"]}, permutations=2000, seed=11,
                     chunk_size=50, stop="besag-clifford")
    assert bc2.stopped_by is None and bc2.permutations == 2000
    assert np.isnan(bc2.stop_at[1]) and bc2.p[1] == full.p[1]


def test_stop_rules_agree_with_the_full_run_on_seeded_cases():
    agree = checked = 0
    for case, effect in enumerate([0.0, 0.0, 0.03, 0.06, 0.08, 0.1, 0.15, 0.3, 0.5, 0.0, 0.05,
                                   0.12]):
        rng = np.random.default_rng(1000 + case)
        y, preds = _data(rng, n=20, effect=effect)
        full = dp.regress(y, preds, permutations=1500, seed=case, chunk_size=100)
        runs = [dp.regress(y, preds, permutations=1500, seed=case, chunk_size=100, stop=rule)
                for rule in ("besag-clifford", "gandy")]
        for j in (1, 2):
            lo, hi = full.p_interval[j]
            if lo <= 0.05 <= hi:
                continue  # the full run itself cannot tell: no decision to agree with
            checked += 1
            want = full.p[j] <= 0.05
            for r in runs:
                if r.stop_verdict[j]:
                    decided = r.stop_verdict[j] == "p <= alpha"
                else:
                    decided = r.p[j] <= 0.05
                agree += decided == want
    assert checked >= 18
    assert agree == 2 * checked


def test_stopped_runs_are_identical_for_any_jobs_and_when_reopened(rng, tmp_path):
    y, preds = _data(rng, n=22, effect=0.3, k_null=2)
    for rule in ("besag-clifford", "gandy"):
        one = dp.regress(y, preds, permutations=3000, seed=2, chunk_size=40, stop=rule)
        two = dp.regress(y, preds, permutations=3000, seed=2, chunk_size=40, stop=rule, jobs=2)
        path = tmp_path / f"{rule}.h5"
        filed = dp.regress(y, preds, permutations=3000, seed=2, chunk_size=40, stop=rule,
                           jobs=2, out=path)
        back = dp.open_result(path)
        for r in (two, filed, back):
            assert r.permutations == one.permutations and r.stopped_by == one.stopped_by
            np.testing.assert_array_equal(r.p, one.p)
            np.testing.assert_array_equal(r.p_adjusted, one.p_adjusted)
            np.testing.assert_array_equal(r.stop_at, one.stop_at)
            np.testing.assert_array_equal(np.asarray(r.null), np.asarray(one.null))


def test_extend_a_stopped_run_without_a_rule_finishes_it(rng, tmp_path):
    y, preds = _data(rng, n=20, effect=0.4)
    path = tmp_path / "run.h5"
    stopped = dp.regress(y, preds, permutations=1200, seed=5, chunk_size=50, stop="gandy",
                         out=path)
    assert stopped.stopped_by == "gandy"
    again = dp.regress(y, preds, permutations=1200, seed=5, chunk_size=50, stop="gandy",
                       out=path)  # the rule is already met: nothing more to compute
    np.testing.assert_array_equal(again.p, stopped.p)
    full = dp.regress(y, preds, permutations=1200, seed=5, chunk_size=50, out=path)
    fresh = dp.regress(y, preds, permutations=1200, seed=5, chunk_size=50)
    back = dp.open_result(path)  # the file now says: no rule
    for r in (full, back):
        assert r.permutations == 1200 and r.stopped_by is None and r.stop["rule"] == "none"
        np.testing.assert_array_equal(r.p, fresh.p)
        np.testing.assert_array_equal(np.asarray(r.null), np.asarray(fresh.null))


def test_incomplete_run_without_a_met_rule_is_refused(rng, tmp_path):
    y, preds = _data(rng, n=15, effect=0.0)
    path = tmp_path / "run.h5"
    dp.regress(y, preds, permutations=400, seed=5, chunk_size=50, out=path, shard="1/2")
    with pytest.raises(RunFileError, match=r"run is incomplete: 4 of 8 chunks missing"):
        dp.open_result(path)


def test_stop_rule_errors_where_it_cannot_apply(rng, tmp_path):
    y, preds = _data(rng, n=12)
    with pytest.raises(InputError, match=r"stop: a stop rule reads the chunks in order; it "
                                         r"cannot be combined with shard"):
        dp.regress(y, preds, permutations=50, seed=1, out=tmp_path / "a.h5", shard="1/2",
                   stop="gandy")
    with pytest.raises(InputError, match=r"`stop` must be one of"):
        dp.correlate(y, preds["strong"], permutations=50, stop="early")


def test_exact_enumeration_ignores_the_stop_rule(rng):
    y, preds = _data(rng, n=5)
    res = dp.regress(y, preds, permutations=1000, stop="besag-clifford")
    plain = dp.regress(y, preds, permutations=1000)
    assert res.exact and res.permutations == 120 and res.stopped_by is None
    np.testing.assert_array_equal(res.p, plain.p)
    assert any("not applied" in note for note in res.notes)


# --------------------------------------------------------------------------- max statistic

def _maxt_brute(null, observed, exact):
    m, k = null.shape
    out = []
    for j in range(k):
        count = 0
        for row in null:
            worst = max(np.inf if np.isnan(v) else abs(v) for v in row)
            count += worst >= abs(observed[j]) * (1 - 1e-9)
        out.append(count / m if exact else (count + 1) / (m + 1))
    return np.array(out)


def test_maxt_adjusted_equals_brute_force_and_is_never_below_p(rng, tmp_path):
    y, preds = _data(rng, n=18, effect=0.15, k_null=3)
    path = tmp_path / "run.h5"
    res = dp.regress(y, preds, permutations=300, seed=9, out=path)
    obs = np.asarray(res.stat)[1:]
    # source: Westfall & Young (1993) single-step maxT, counted row by row from the null
    np.testing.assert_allclose(res.p_adjusted[1:], _maxt_brute(np.asarray(res.null), obs, False),
                               atol=P_ATOL)
    assert np.all(res.p_adjusted[1:] >= res.p[1:])
    assert np.isnan(res.p_adjusted[0])
    back = dp.open_result(path)
    np.testing.assert_array_equal(back.p_adjusted, res.p_adjusted)


def test_maxt_exact_and_with_failed_fits():
    null = np.array([[0.5, np.nan], [2.0, 0.1], [-3.0, 0.2], [0.1, 0.1]])
    obs = np.array([2.0, 0.15])
    # source: Westfall & Young (1993), brute force; a NaN counts as most extreme (methods.md)
    np.testing.assert_allclose(adjustment.maxt_adjusted(null, obs, exact=True),
                               _maxt_brute(null, obs, True))
    np.testing.assert_allclose(adjustment.maxt_adjusted(null, obs, exact=False),
                               _maxt_brute(null, obs, False))


def test_single_term_adjusted_equals_p(rng):
    y, preds = _data(rng, n=14)
    res = dp.correlate(y, preds["strong"], permutations=199, seed=1)
    np.testing.assert_array_equal(res.p_adjusted, res.p)


# --------------------------------------------------------------------------- many networks

def test_two_networks_as_a_list_equal_the_pair_call(rng):
    a, b = rng.normal(size=(16, 16)), rng.normal(size=(16, 16))
    one = dp.correlate(a, b, permutations=300, seed=6)
    many = dp.correlate({"a": a, "b": b}, permutations=300, seed=6)
    assert many.terms == ("a & b",) and many.layers == ("a", "b")
    np.testing.assert_array_equal(np.asarray(many.null), np.asarray(one.null))
    np.testing.assert_array_equal(many.p, one.p)


def test_layer_statistics_against_relabelled_matrices(rng):
    n = 9
    nets = [rng.normal(size=(n, n)) for _ in range(4)]
    res = dp.correlate(nets, permutations=50, seed=2)
    rows, cols = dyads(n, n, True)
    # observed: source scipy.stats.pearsonr on the vectorised dyads
    for (i, j), r in zip(res.pairs, res.r):
        assert r == pytest.approx(st.pearsonr(vec(nets[i], rows, cols),
                                              vec(nets[j], rows, cols))[0], rel=1e-10)
    # permuted: network 0 fixed, networks 1..3 each relabelled by its own permutation,
    # the permutations drawn as the engine draws them (copies of the node set)
    blocks = correlation.copy_blocks(Blocks(n, n, ((0, n),), None), 3)
    perms, _ = draw(blocks, res.seed, 0, 50)
    for b in range(50):
        own = [perms[b, (k - 1) * n:k * n] - (k - 1) * n for k in range(1, 4)]
        moved = [nets[0]] + [relabel(nets[k], own[k - 1], own[k - 1]) for k in range(1, 4)]
        for col, (i, j) in enumerate(res.pairs):
            # source: scipy.stats.pearsonr of M[ix(p, p)]-relabelled matrices
            want = st.pearsonr(vec(moved[i], rows, cols), vec(moved[j], rows, cols))[0]
            assert res.null[b, col] == pytest.approx(want, rel=STAT_RTOL, abs=STAT_ATOL)


def test_each_pair_is_an_exact_qap_test(rng):
    # n = 5, three networks: all 120^2 pairs of relabellings are enumerated; every pair's
    # exact p-value must be the two-network exact QAP p-value (relabelling one network of a
    # pair by sigma = pi_j pi_i^-1 runs over every relabelling equally often)
    n = 5
    nets = {"w": rng.normal(size=(n, n)), "k": rng.normal(size=(n, n))}
    nets["h"] = nets["w"] + rng.normal(size=(n, n))
    res = dp.correlate(nets, permutations=20_000)
    assert res.exact and res.permutations == 120 ** 2
    names = list(nets)
    for (i, j), p, pg in zip(res.pairs, res.p, res.p_greater):
        pair = dp.correlate(nets[names[i]], nets[names[j]], permutations=500)
        assert pair.exact and pair.permutations == 120  # exact enumeration (methods.md)
        assert p == pytest.approx(pair.p[0], abs=P_ATOL)
        assert pg == pytest.approx(pair.p_greater[0], abs=P_ATOL)
    # max statistic over the exact joint enumeration, brute force (Westfall & Young 1993)
    np.testing.assert_allclose(res.p_adjusted, _maxt_brute(np.asarray(res.null), res.r, True),
                               atol=P_ATOL)
    assert np.all(res.p_adjusted >= res.p)


def test_layer_matrix_and_run_file(rng, tmp_path):
    nets = [rng.normal(size=(12, 12)) for _ in range(3)]
    nets[2] = nets[2] + nets[0]
    path = tmp_path / "layers.h5"
    res = dp.correlate(nets, permutations=199, seed=4, out=path, stop="gandy")
    m = res.matrix("r")
    np.testing.assert_array_equal(m, m.T)
    np.testing.assert_array_equal(np.diag(m), 1.0)
    assert m[0, 2] == res.r[1] and np.isnan(res.matrix("p")[1, 1])
    back = dp.open_result(path)
    assert type(back).__name__ == "LayerCorrelationResult" and back.layers == res.layers
    np.testing.assert_array_equal(back.p_adjusted, res.p_adjusted)
    np.testing.assert_array_equal(back.p, res.p)


def test_layer_input_errors(rng):
    a = rng.normal(size=(6, 6))
    with pytest.raises(InputError, match=r"correlate: a list or dict needs at least 2 "
                                         r"networks; got 1"):
        dp.correlate([a])
    with pytest.raises(InputError, match=r"correlate: give two networks \(a, b\), or a list "
                                         r"or dict of networks; got one ndarray"):
        dp.correlate(a)


# --------------------------------------------------------------------------- study file keys

def test_study_stop_keys(tmp_path):
    path = _study(tmp_path, extra_test='stop = "besag-clifford"\nstop_exceedances = 5\n')
    s = dp.load_study(path)
    assert (s.spec["test"]["stop"], s.spec["test"]["stop_exceedances"],
            s.spec["test"]["stop_risk"]) == ("besag-clifford", 5, None)
    res = s.run()
    assert res.stop == {"rule": "besag-clifford", "exceedances": 5, "risk": None,
                        "alpha": 0.05}
    res2 = s.run(stop="gandy", stop_risk=0.01)
    assert res2.stop["rule"] == "gandy" and res2.stop["risk"] == 0.01
    g = dp.load_study(_study(tmp_path, extra_test='stop = "gandy"\nalpha = 0.01\n'))
    assert g.spec["test"]["stop_risk"] == 0.001  # the default bound
    assert g.run().stop == {"rule": "gandy", "exceedances": None, "risk": 0.001,
                            "alpha": 0.01}


@pytest.mark.parametrize("extra, match", [
    ('stop = "early"', r"s\.toml \[test\] stop: must be one of none, besag-clifford, gandy; "
                       r"got 'early'"),
    ('stop = "gandy"\nstop_exceedances = 3', r"s\.toml \[test\] stop_exceedances: applies to "
                                              r"stop = besag-clifford only \(stop is gandy\); "
                                              r"got 3"),
    ("stop_risk = 0.01", r"s\.toml \[test\] stop_risk: applies to stop = gandy only \(stop is "
                         r"none\); got 0\.01"),
    ('stop = "gandy"\nstop_risk = 0.7', r"s\.toml \[test\] stop_risk: must be a number with "
                                         r"0 < stop_risk < 0\.5; got 0\.7"),
    ('stop = "besag-clifford"\nstop_exceedances = 0', r"s\.toml \[test\] stop_exceedances: "
                                                       r"must be an integer >= 1; got 0"),
])
def test_study_stop_key_errors(tmp_path, extra, match):
    with pytest.raises(InputError, match=match):
        dp.load_study(_study(tmp_path, extra_test=extra + "\n"))


def test_study_run_override_of_a_setting_of_another_rule(tmp_path):
    s = dp.load_study(_study(tmp_path))
    with pytest.raises(InputError, match=r"`stop_exceedances` applies to stop = besag-clifford "
                                         r"only \(stop is none\); got 4"):
        s.run(stop_exceedances=4)
