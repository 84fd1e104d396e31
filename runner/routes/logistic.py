"""Logistic regression of a binary network on others, with permutation p-values.

``dyadperm.regress(..., model="logistic")`` lands here. The response must hold 0/1 dyad
values (NaN: missing). Dyads, groups, two-mode data and missing values come from
:func:`dyadperm.design.prepare` exactly as for the linear model: every fit uses the dyads
that are complete in every matrix of that fit (methods.md).

Fit
---
Maximum likelihood by Newton's method (IRLS, ``kernels.irls``) on the dyad vectors, with
the predictors standardised over the observed complete dyads (the z statistics do not
depend on it; coefficients are reported in the user's units). The default statistic is
the Wald z = b_j / se_j with se from (X'WX)^-1 at the estimate; ``statistic="coef"`` takes
b_j; ``statistic="score"`` the signed score statistic below. ``deviance`` in the result is
-2 log L of the observed fit (a 0/1 response has a saturated log likelihood of 0); ``r2`` is
NaN.

Convergence (``kernels.irls``, module docstring): Newton steps are accepted by the
self-concordance bound of the logistic loss, never by comparing two deviances (whose
difference near the optimum is below their rounding at 10^6 dyads), and a fit has
converged when the next step moves no dyad's linear predictor by more than ``TOL``
(``TOL_OBSERVED`` for the fits the result reports) or no coefficient by more than 1e-9
standard errors; sums over the dyads run in three levels, so their rounding does not grow
with N. A fit that looks converged while the dyads informing some combination of its
coefficients all have fitted probabilities of 0 or 1 (a separated fit whose gradient has
vanished into its rounding) is not converged.

Separation (Albert & Anderson 1984, Biometrika 71:1-10): when some combination of the
predictors splits the 0s from the 1s, the likelihood has no maximum and Newton's
coefficients diverge. A failed observed (or reduced) fit is referred to a test of its own:
first the one-predictor check (max x among 0s <= min x among 1s, or the reverse), else the
linear programme "maximise sum_d s_d x_d'b subject to s_d x_d'b >= 0, -1 <= b <= 1",
s_d = 2 y_d - 1, whose optimum is positive exactly when the data are (quasi-)separated,
solved by cutting planes (``separating_predictors``). Only when it holds is the fit called
separated: :class:`NumericalError` names the predictors and suggests Firth's penalised
likelihood (Firth 1993, Biometrika 80:27-38; Heinze & Schemper 2002, Stat. Med.
21:2409-2419) or dropping or merging categories. Any other failure "did not converge after
N Newton steps", with the reason, the last step's size and the term that moved most. A
permuted fit that fails gives a NaN statistic, which the p-value counts as at least as
extreme (conservative); the number of such fits is reported as ``failed``.

Schemes
-------
Notation: X = [1, x_1 .. x_k]; for a tested term j, Z = X without x_j; reduced model
logit P(y = 1) = Z g with estimate g^, mu = expit(Z g^), W = diag(mu (1 - mu)).

- ``y`` — Y-permutation (Krackhardt 1988, Social Networks 10:359-381): relabel the
  response, refit the full model, take the z of term j.
- ``dsp`` — Potter (2005, Stat. Med. 24:693-708): residualise the focal predictor by least
  squares on the other terms, e = x_j - Z c (c from OLS over the observed complete dyads),
  put e back into a matrix, relabel it, and fit y on [Z, e_pi]; the statistic belongs to
  e_pi. This is the double semi-partialling idea (Dekker, Krackhardt & Snijders 2007) for
  logistic models. [memory] on the exact statistic Potter used; the scheme's behaviour is
  pinned by the brute-force enumeration in the tests. The observed statistic equals the
  full model's: [Z, e] spans the same columns as [Z, x_j] and the map between the two
  parametrisations leaves the coefficient of the last column and its variance unchanged
  (the logistic analogue of Frisch-Waugh-Lovell).
- ``freedman-lane`` is not offered for the logistic model. Freedman & Lane (1983) relabel
  the reduced-model residuals r = y - mu and refit on y* = mu + r_pi. For a 0/1 response y*
  is not 0/1 (it ranges over (-1, 2)), so the binomial likelihood of the refit is not
  defined, and the residuals are not even approximately exchangeable under the null since
  Var(r_d) = mu_d (1 - mu_d) differs from dyad to dyad. No variant keeps both a binary
  response and the dyadic dependence of the data, so the scheme is refused with a clear
  error rather than approximated.

Per-relabelling refits start from the observed fits: for ``dsp`` from the observed reduced
fit of term j with 0 for e_pi (the expected value of its coefficient under relabelling);
for ``y`` from the observed fit of the intercept alone, logit(mean y) and zero slopes (the
expected fit of a relabelled response; starting from the observed slopes costs more Newton
steps whenever the effects are large). With complete data the first Newton step from there
is free: at the start the fitted probabilities are the observed fit's, so the step needs
only sums over the relabelled column gathered anyway (X'y_pi for ``y``; e_pi'(y - mu),
Z'W e_pi and sum w e_pi^2 for ``dsp``, the pieces of the score statistic); the Newton
iterations proper start from that one-step estimate. A dsp refit then costs a gather of
the relabelled residual and about two passes over the dyads.

Scheme ``y`` with complete data needs no pass over the dyads at all beyond the gather of
X'y_pi (the linear engine's ``gather_cross``): a fit of the canonical link depends on y_pi
only through X'y_pi, and X'mu and X'WX at any coefficients near the intercept-only fit are
series in the moments of the design, computed once (``kernels.irls``, section "scheme y
with complete data"; ``_series_degree`` chooses the degree so the truncation is below the
rounding of a pass out to SERIES_SE standard errors on every slope). Each evaluation checks
its truncation bound; a relabelling beyond it (or the observed fit, far out when the
effects are large) is refitted by passes over the dyads instead, so a statistic never
rests on a truncated series. Refits and score statistics of scheme y then cost the linear
y scheme's gather.

Score statistic (``statistic="score"``)
---------------------------------------
Rao's score test (Rao 1948, Proc. Camb. Philos. Soc. 44:50-57) of H0: b_j = 0 needs only
the reduced fit: U = x'(y - mu), I = x'Wx - (Z'Wx)'(Z'WZ)^-1(Z'Wx) (the information of b_j
adjusted for the other terms), statistic U / sqrt(I), asymptotically N(0, 1) under H0 and
equivalent to the Wald z (Cox & Hinkley 1974, Theoretical Statistics, ch. 9 [memory]).
It needs no fit of the full model, so it exists where the full model is separated.
Which quantities stay fixed under relabelling:

- ``dsp``: the reduced model y ~ Z does not involve the relabelled column at all, so with
  complete data r = y - mu, w = mu (1 - mu) and (Z'WZ)^-1 are fixed, and per relabelling
  only sums of the relabelled residual e_pi against fixed layers change:
  U = sum e_pi r, Q = sum w e_pi^2, S_0 = sum w e_pi, S_c = sum w e_pi z_c (each
  non-constant column c of Z), statistic U / sqrt(Q - S'(Z'WZ)^-1 S) with S = (S_0, S_c..):
  p + 1 sums, no refit (``kernels.irls.score_rows``, row-wise like the linear engine's
  gathers). With missing dyads the dyad set of the fit changes with the relabelling, and
  the reduced model is refitted on each relabelling's dyads (warm-started from the
  observed one).
- ``y``: the reduced model is fitted to the relabelled response. For the canonical link
  its fit depends on y_pi only through Z'y_pi (the sufficient statistic). When Z is the
  intercept alone (one predictor) and no dyad is missing, Z'y_pi = sum y_pi = sum y for
  every relabelling: the reduced fit is the observed one, I is fixed, and the statistic is
  (x'y_pi - x'mu) / sqrt(I) — one product per relabelling, taken by the linear engine's
  ``gather_cross``, the cost of the linear y scheme. Otherwise Z'y_pi changes and the
  reduced model of each tested term is refitted for each relabelling: from X'y_pi and the
  moments of the design with complete data (above), else by passes over the dyads, the
  score taken from the fit's last pass (which sums term j's column too).

Its observed value equals the full model's score test of b_j (for ``dsp`` because
Z'(y - mu) = 0 at the reduced fit, so e and x_j have the same U and I).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Sequence

import numpy as np

from ..errors import InputError, NumericalError
from ..inputs import design as _design
from ..inputs.memory import check_dense_route
from ..kernels.gather import gather_cross
from ..kernels.irls import (FAIL_DYADS, FAIL_ITERATIONS, FAIL_SATURATED, FAIL_SINGULAR,
                            INFO_MOVE, INFO_PASSES, INFO_SIZE, INFO_STEPS, INFO_TERM,
                            SCORE_BLOCK, SERIES_REL, irls_logistic, monomial_tables, refit_dsp,
                            refit_y, score_dsp_refit, score_from_sums, score_logistic,
                            score_rows, score_y, series_moments, series_tail, series_y)
from ..kernels.options import FIT_PIVOT
from ..settings import LOGISTIC_SCHEMES as SCHEMES  # noqa: F401  (re-exported)
from ..settings import LOGISTIC_STATISTICS as STATISTICS  # noqa: F401  (re-exported)
from ..settings import check_regression
from .plan import Plan, chunk_size_for, dense_identity, groups_fingerprint, summary

# Newton steps allowed per fit; a converging fit from a warm start needs under ten.
MAX_ITER = 50
# Converged when the next Newton step changes no dyad's linear predictor by more than TOL
# (kernels.irls: the step is then taken, and the Wald covariance is within a relative TOL
# of the estimate's). TOL for the refits of relabellings; TOL_OBSERVED for the observed
# fits the result reports.
TOL = 1e-7
TOL_OBSERVED = 1e-10
# Passes over the dyads assumed per refit when sizing chunks.
STEPS_GUESS = 3
# Scheme y with complete data fits from moments of the design when a series of degree at
# most SERIES_MAX_DEGREE, over at most SERIES_MAX_MONOMIALS moments, is exact out to
# SERIES_SE standard errors on every slope (``_series_degree``).
SERIES_SE = 8.0
SERIES_MAX_DEGREE = 30
SERIES_MAX_MONOMIALS = 6000
# A separating direction found by the linear programme must leave no dyad on the wrong
# side by more than this (relative to its largest margin).
SEPARATION_SLACK = 1e-9
# Weight (of the largest) above which a predictor is named as part of a separating direction.
SEPARATION_SHARE = 1e-3
# The separation test's linear programme runs on a subset of about this many dyads, grown
# by the dyads a candidate direction leaves on the wrong side, for at most
# SEPARATION_ROUNDS rounds; an optimum below SEPARATION_ZERO times the largest |a_d| is 0.
SEPARATION_SAMPLE = 20_000
SEPARATION_ROUNDS = 30
SEPARATION_ZERO = 1e-9


# --- checks ---------------------------------------------------------------------------------
def check_binary(prep: _design.Prepared) -> None:
    """Raise InputError naming the first response value (user's order) that is not 0 or 1."""
    Y = prep.matrices[-1]
    bad = prep.mask & ~np.isnan(Y) & (Y != 0.0) & (Y != 1.0)
    if not bad.any():
        return
    ii, jj = np.nonzero(bad)
    jj = jj // prep.waves  # waves: column j * T + t is node j at wave t
    ui, uj = prep.row_order[ii], prep.col_order[jj]
    if not prep.directed and not prep.two_mode:
        ui, uj = np.minimum(ui, uj), np.maximum(ui, uj)
    first = np.lexsort((uj, ui))[0]
    col_labels = prep.col_labels if prep.two_mode else prep.labels
    raise InputError(f"model='logistic' needs a 0/1 response; {prep.response_name!r} has "
                     f"{float(Y[ii[first], jj[first]])!r} at row {prep.labels[ui[first]]!r}, "
                     f"column {col_labels[uj[first]]!r}")


# --- dyad vectors and the observed fit ------------------------------------------------------
@dataclass(frozen=True, eq=False)
class DyadData:
    """The dyad set as vectors: dyad d is (rows[d], cols[d]) of the internal node order.

    ``X`` (N, p) = [1, standardised x_1 .. x_k] (NaN where missing), ``y`` (N,),
    ``complete`` (N,) the dyads where every matrix is finite, ``mean``/``sd`` (k,) the
    standardisation of the predictors over the complete dyads.
    """

    rows: np.ndarray
    cols: np.ndarray
    X: np.ndarray
    y: np.ndarray
    complete: np.ndarray
    mean: np.ndarray
    sd: np.ndarray


def dyad_data(prep: _design.Prepared) -> DyadData:
    rows, cols = np.nonzero(prep.mask)
    rows = rows.astype(np.int64)
    cols = cols.astype(np.int64)
    k = prep.k
    raw = np.empty((rows.shape[0], k))
    for c in range(k):
        raw[:, c] = prep.matrices[c][rows, cols]
    y = np.ascontiguousarray(prep.matrices[k][rows, cols])
    complete = ~np.isnan(raw).any(axis=1) & ~np.isnan(y)
    mean = raw[complete].mean(axis=0)
    sd = raw[complete].std(axis=0)
    X = np.empty((rows.shape[0], k + 1))
    X[:, 0] = 1.0
    X[:, 1:] = (raw - mean) / sd
    return DyadData(rows, cols, X, y, complete, mean, sd)


@dataclass(frozen=True)
class LogisticFit:
    """Observed maximum-likelihood fit (intercept first, the user's units)."""

    coef: np.ndarray
    se: np.ndarray
    z: np.ndarray
    deviance: float
    n_dyads: int
    beta_std: np.ndarray  # estimate on the standardised predictors
    iterations: int
    cov: np.ndarray | None = None  # Wald covariance of ``coef``


@dataclass(frozen=True)
class KernelFit:
    """One fit through ``kernels.irls``: status (Newton steps, or a negative FAIL_* code),
    estimate and Wald covariance (standardised predictors; NaN when failed), and the
    diagnostics: passes over the dyads, Newton steps, the last step's largest change of a
    linear predictor (bound) and the position in ``cols`` of the column that moved most."""

    status: int
    beta: np.ndarray
    cov: np.ndarray
    passes: int
    steps: int
    move: float
    term: int


def design_columns(X: np.ndarray, cols: np.ndarray | None = None) -> np.ndarray:
    """(q, N) C-ordered columns of X (all, or ``cols``) with NaN replaced by 0: the
    kernels' layout (a dyad outside a fit is excluded by its ``valid`` flag)."""
    Xc = X if cols is None else X[:, cols]
    return np.ascontiguousarray(np.nan_to_num(Xc, nan=0.0).T)


def fit_logistic(X: np.ndarray, cols: np.ndarray, y: np.ndarray, valid: np.ndarray,
                 beta0: np.ndarray, *, tol: float = TOL_OBSERVED) -> KernelFit:
    """One fit of y on the columns ``cols`` of X (N, P) over the ``valid`` dyads; column
    cols[0] is the intercept (1 on every dyad: the kernels do not read it)."""
    cols = np.asarray(cols, dtype=np.int64)
    q = cols.shape[0]
    XT = design_columns(X, cols)
    if not np.all(XT[0] == 1.0):
        raise ValueError("fit_logistic: the first design column must be the intercept")
    valid = np.ascontiguousarray(valid, dtype=bool)
    yv = np.where(valid, np.nan_to_num(y, nan=0.0), 0.0)
    xy = (XT * yv).sum(axis=1)  # X'y over the valid dyads (numpy's pairwise sums)
    xmax = np.abs(XT[:, valid]).max(axis=1) if valid.any() else np.zeros(q)
    beta = np.full(q, np.nan)
    cov = np.full((q, q), np.nan)
    info = np.zeros(INFO_SIZE)
    status = irls_logistic(XT, np.empty(0), np.arange(q, dtype=np.int64), xy, valid, xmax,
                           np.ascontiguousarray(beta0, dtype=np.float64), beta, cov, info,
                           MAX_ITER, tol)
    return KernelFit(int(status), beta, cov, int(info[INFO_PASSES]), int(info[INFO_STEPS]),
                     float(info[INFO_MOVE]), int(info[INFO_TERM]))


def _null_start(y: np.ndarray, valid: np.ndarray, q: int) -> np.ndarray:
    """logit(mean y) and zeros: the fit of the intercept alone."""
    ybar = float(y[valid].mean())
    start = np.zeros(q)
    start[0] = math.log(ybar / (1.0 - ybar))
    return start


def observed_fit(prep: _design.Prepared, dd: DyadData) -> LogisticFit:
    """The observed fit; NumericalError on separation or failed convergence."""
    k = prep.k
    p = k + 1
    valid = dd.complete
    ybar = dd.y[valid].mean()
    if ybar in (0.0, 1.0):
        raise InputError(f"response {prep.response_name!r} has no variation over the dyad set "
                         f"(every value is {int(ybar)})")
    cols = np.arange(p)
    res = fit_logistic(dd.X, cols, dd.y, valid, _null_start(dd.y, valid, p))
    if res.status < 0:
        raise NumericalError(_failure_message(prep, dd, res, cols))
    beta, cov = res.beta, res.cov
    # back to the user's units: b_c = beta_c / sd_c, b_0 = beta_0 - sum beta_c mean_c / sd_c
    A = np.zeros((p, p))
    A[0, 0] = 1.0
    A[0, 1:] = -dd.mean / dd.sd
    A[1:, 1:] = np.diag(1.0 / dd.sd)
    coef = A @ beta
    cov_user = A @ cov @ A.T
    se = np.sqrt(np.diag(cov_user))
    eta = dd.X[valid] @ beta
    deviance = float(2.0 * np.sum(np.logaddexp(0.0, eta) - dd.y[valid] * eta))
    return LogisticFit(coef, se, coef / se, deviance, int(valid.sum()), beta, res.status,
                       cov_user)


def _failure_message(prep: _design.Prepared, dd: DyadData, res: KernelFit, cols: np.ndarray,
                     dropped: int | None = None) -> str:
    """Why the fit of the design columns ``cols`` failed (``dropped``: the term left out of
    a reduced model). Separation is named only when the linear programme of
    ``separating_predictors`` finds it; any other failure is a failed convergence, with the
    last Newton step's size and the term that moved most."""
    names = ("intercept",) + tuple(prep.names)
    resp = prep.response_name
    fit = (f"logistic fit of {resp!r}" if dropped is None else
           f"logistic fit of {resp!r} without {prep.names[dropped]!r} (the reduced model of "
           "its test)")
    advice = "" if dropped is None else "use statistic='t', or "
    valid = dd.complete
    Xv = dd.X[valid][:, cols]
    eta = Xv @ res.beta if np.all(np.isfinite(res.beta)) else None
    sep = separating_predictors(Xv[:, 1:], dd.y[valid], [names[c] for c in cols[1:]],
                                intercept=Xv[:, 0], eta=eta)
    if sep:
        who = f"predictor {sep[0]!r}" + (
            f" together with {', '.join(repr(n) for n in sep[1:])}" if len(sep) > 1 else "")
        return (f"{fit}: the 0s and 1s are separated by {who}, so the coefficients have no "
                f"finite maximum-likelihood value (Albert & Anderson 1984); {advice}use "
                f"Firth's penalised likelihood (Firth 1993; Heinze & Schemper 2002) or drop "
                f"or merge categories of {sep[0]!r}")
    if res.status == FAIL_DYADS:
        return f"{fit}: no more complete dyads than coefficients"
    term = names[cols[res.term]] if res.term >= 0 else "?"
    last = (f"last step: linear predictors moved by up to {res.move:.3g}, most through "
            f"{term!r}")
    if res.status == FAIL_SINGULAR:
        why = "the weighted information X'WX became singular"
    elif res.status == FAIL_ITERATIONS:
        why = "the step limit was reached"
    elif res.status == FAIL_SATURATED:
        why = ("the fitted probabilities of the dyads that inform some combination of the "
               "coefficients reached 0 or 1")
    else:
        why = "the sums over the dyads are not finite"
    return (f"{fit} did not converge after {res.steps} Newton steps ({why}; {last}), "
            "although no combination of the predictors separates the 0s from the 1s; check "
            "for nearly collinear predictors")


def separating_predictors(X: np.ndarray, y: np.ndarray, names: Sequence[str], *,
                          intercept: np.ndarray | None = None,
                          eta: np.ndarray | None = None) -> list[str]:
    """Predictors that separate the 0s from the 1s (Albert & Anderson 1984), or [].

    ``X`` (N, k) holds the predictors on the fit's dyads (an intercept is added). First a
    single predictor with the intercept: it separates when every x among the 0s is <= every
    x among the 1s, or the reverse. Otherwise the linear programme of the module docstring
    over the rows a_d = s_d [1, x_d], by cutting planes so that 10^6 dyads cost little:

    - on a subset S of the dyads (a systematic sample, the dyads with the largest |eta| of
      the failed fit ``eta`` — the ones a separation drives to 0 or 1 — and each
      predictor's extremes in each class; identical rows once, weighted by their count);
    - an optimum of 0 on S proves overlap there: some lambda > 0 has A_S'lambda = 0
      (Gordan's alternative), so if A_S has full column rank no b != 0 has A b >= 0 on all
      the dyads, and the data are not separated;
    - a positive optimum gives a direction b; if every dyad has a_d'b >= 0 (up to
      SEPARATION_SLACK of the largest margin) the data are separated along b, and the
      predictors carrying it are named, largest weight first; otherwise the most violated
      dyads join S and the programme runs again.
    """
    from scipy.optimize import linprog

    ones = y == 1.0
    for c, name in enumerate(names):
        x = X[:, c]
        if x[~ones].max() <= x[ones].min() or x[ones].max() <= x[~ones].min():
            return [name]
    n_dyads = X.shape[0]
    one = np.ones(n_dyads) if intercept is None else intercept
    A = np.where(ones, 1.0, -1.0)[:, None] * np.column_stack([one, X])
    pick = [np.arange(0, n_dyads, max(1, n_dyads // SEPARATION_SAMPLE))]
    if eta is not None:
        pick.append(np.argsort(-np.abs(eta), kind="stable")[:SEPARATION_SAMPLE // 10])
    for cls in (ones, ~ones):
        at = np.flatnonzero(cls)
        for c in range(X.shape[1]):
            pick += [at[[np.argmin(X[at, c]), np.argmax(X[at, c])]]]
    S = np.unique(np.concatenate(pick))
    for _ in range(SEPARATION_ROUNDS):
        rows, count = np.unique(A[S], axis=0, return_counts=True)
        res = linprog(-(count[:, None] * rows).sum(axis=0), A_ub=-rows,
                      b_ub=np.zeros(rows.shape[0]), bounds=[(-1.0, 1.0)] * A.shape[1],
                      method="highs")
        if res.status != 0:
            return []
        top = (rows @ res.x).max()
        if not top > SEPARATION_ZERO * np.abs(rows).max():
            if np.linalg.matrix_rank(rows) == A.shape[1]:
                return []  # overlap on a full-rank subset: not separated
            S = np.union1d(S, np.arange(1, n_dyads, max(1, n_dyads // SEPARATION_SAMPLE)))
            continue
        margins = A @ res.x
        if margins.min() >= -SEPARATION_SLACK * top:
            w = np.abs(res.x[1:])
            if not w.max() > 0.0:
                return []
            order = np.argsort(-w, kind="stable")
            return [names[c] for c in order if w[c] > SEPARATION_SHARE * w.max()]
        worst = np.argsort(margins, kind="stable")[:SEPARATION_SAMPLE // 10]
        S = np.union1d(S, worst[margins[worst] < 0.0])
    return []


# --- the plan -------------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class LogisticPlan:
    """Everything the engine needs to turn relabellings into logistic statistics.

    ``kind`` names the route (module docstring): "refit-y", "refit-dsp", "score-y",
    "score-dsp-refit" run the Newton drivers of ``kernels.irls`` on dyad vectors;
    "series-y" (scheme y, complete data, refits or score statistics) gathers X'y_pi with
    the linear engine's ``kernels.gather.gather_cross`` and fits from the moments of the
    design (``kernels.irls.series_y``); "score-y-products" needs one dot product of the
    relabelled response with a fixed layer (``gather_cross``) and "score-dsp-products" the
    sums of ``kernels.irls.score_rows``. ``arrays`` holds the route's inputs; ``scale``
    (k,) multiplies coefficients back into the user's units. ``statistics_and_passes``
    also returns the passes over the dyads each relabelling took (a gather of a
    relabelled layer counts as one).
    """

    kind: str
    arrays: dict
    k: int
    n_dyads: int
    use_z: bool
    scale: np.ndarray
    work_per_permutation: float
    col_start: np.ndarray
    col_stop: np.ndarray
    passes: tuple = ()

    def statistics(self, row_perms: np.ndarray, col_perms: np.ndarray) -> np.ndarray:
        """Statistics (B, k) of the relabellings given as row/column permutations."""
        return self.statistics_and_passes(row_perms, col_perms)[0]

    def statistics_and_passes(self, row_perms: np.ndarray, col_perms: np.ndarray
                              ) -> tuple[np.ndarray, np.ndarray]:
        """Statistics (B, k) and the passes over the dyads each relabelling took (B,)."""
        a = self.arrays
        n_perm = row_perms.shape[0]
        out = np.empty((n_perm, self.k))
        passes = np.ones(n_perm, dtype=np.int64)
        rp = np.ascontiguousarray(row_perms, dtype=np.int64)
        cp = rp if col_perms is row_perms else np.ascontiguousarray(col_perms, dtype=np.int64)
        if self.kind in ("score-y-products", "score-dsp-products"):
            self._products(rp, cp, out)  # one row-wise pass over the relabelled layers
            return out, passes
        if self.kind == "series-y":
            S = np.empty((n_perm, 1, a["XT"].shape[0]))
            gather_cross(a["rel"], a["rel_idx"], a["fix"], a["fix_idx"], rp, cp,
                         self.col_start, self.col_stop, S)  # X'y_pi
            series_y(S[:, 0, :], a["XT"], a["mom"], a["deg"], a["parent"], a["pvar"],
                     a["mult"], a["up1"], a["up2"], a["n_alpha"], a["degree"], a["xmax"],
                     a["beta0"], a["onestep"], a["zcols"], out, passes, MAX_ITER, TOL,
                     self.use_z)
            if not self.use_z:
                out *= self.scale
            return out, passes
        common = (a["rows"], a["cols"], rp, cp, a["XT"])
        if self.kind == "refit-y":
            refit_y(a["layer"], *common, a["fixed_ok"], a["xmax"], a["beta0"], a["onestep"],
                    out, passes, MAX_ITER, TOL, self.use_z)
        elif self.kind == "refit-dsp":
            refit_dsp(a["layer"], *common, a["y"], a["fixed_ok"], a["design"], a["xmax"],
                      a["emax"], a["beta0"], a["mu0"], a["ties"], a["cinv"], out, passes,
                      MAX_ITER, TOL, self.use_z)
        elif self.kind == "score-dsp-refit":
            score_dsp_refit(a["layer"], *common, a["y"], a["fixed_ok"], a["zcols"], a["xmax"],
                            a["gamma0"], out, passes, MAX_ITER, TOL)
        else:
            score_y(a["layer"], *common, a["fixed_ok"], a["xmax"], a["zcols"], a["gamma0"],
                    a["onestep"], out, passes, MAX_ITER, TOL)
        if not self.use_z:
            out *= self.scale
        return out, passes

    def _products(self, rp: np.ndarray, cp: np.ndarray, out: np.ndarray) -> None:
        a = self.arrays
        n_perm = rp.shape[0]
        if self.kind == "score-y-products":
            # U = x'y_pi - x'mu with the fixed intercept-only fit; I fixed
            prod = np.empty((n_perm, 1, 1))
            gather_cross(a["rel"], a["rel_idx"], a["fix"], a["fix_idx"], rp, cp,
                         self.col_start, self.col_stop, prod)
            out[:, 0] = (prod[:, 0, 0] - a["offset"]) / np.sqrt(a["info"])
            return
        m = cp.shape[1]
        block = max(1, min(SCORE_BLOCK, n_perm))
        sums = np.empty((n_perm, self.k, a["x_at"].shape[1] + 3))
        score_rows(a["rel"], self.k, a["fix"], a["n_fix"], a["resid_at"], a["weight_at"],
                   a["x_at"], rp, cp, self.col_start, self.col_stop,
                   np.empty((block, m), dtype=np.int32), np.empty((block,) + sums.shape[1:]),
                   sums)
        score_from_sums(sums, a["cinv"], out)

    def chunk_size(self) -> int:
        """Permutations per chunk, aiming at the engine's work per chunk."""
        return chunk_size_for(self.work_per_permutation, least=1)


def _reduced_columns(k: int) -> np.ndarray:
    """(k, k) columns of X in each term's reduced model: the intercept and the other terms."""
    return np.array([[0] + [c + 1 for c in range(k) if c != j] for j in range(k)], dtype=np.int64)


def _reduced_fits(prep, dd: DyadData, zcols: np.ndarray, valid: np.ndarray):
    """Observed reduced fits (estimate, (Z'WZ)^-1) of every term over ``valid``;
    NumericalError (``_failure_message``) when one fails."""
    k, q = zcols.shape
    gam = np.empty((k, q))
    cinv = np.empty((k, q, q))
    for j in range(k):
        res = fit_logistic(dd.X, zcols[j], dd.y, valid, _null_start(dd.y, valid, q))
        if res.status < 0:
            raise NumericalError(_failure_message(prep, dd, res, zcols[j], dropped=j))
        gam[j], cinv[j] = res.beta, res.cov
    return gam, cinv


def _series_degree(X: np.ndarray, xmax: np.ndarray, eta0: float, w0: float) -> int | None:
    """Degree of the moment series of scheme y (kernels.irls, section "scheme y with complete
    data"), or None when the series would not pay.

    Relabelled fits have slopes of a few standard errors of the intercept-only fit's
    information w0 X'X; the series must be exact (its truncation below the rounding of a
    pass) out to SERIES_SE of them on every predictor at once. None when that needs a
    degree above SERIES_MAX_DEGREE or more than SERIES_MAX_MONOMIALS moments.
    """
    k = X.shape[1] - 1
    se = np.sqrt(np.diag(np.linalg.inv(w0 * (X.T @ X))))
    U = SERIES_SE * float(se[1:] @ xmax[1:])
    for degree in range(2, SERIES_MAX_DEGREE + 1):
        if math.comb(degree + 2 + k, k) > SERIES_MAX_MONOMIALS:
            return None
        tail_mu, tail_w = series_tail(eta0, U, degree)
        if tail_mu <= SERIES_REL * w0 and tail_w <= SERIES_REL * w0:
            return degree
    return None


def _residual_layers(prep, dd: DyadData) -> np.ndarray:
    """(n, m, k): each standardised predictor's residual on the other terms, as a matrix.

    Coefficients by least squares over the observed complete dyads (Potter 2005); the
    matrix is NaN wherever the predictor or one of the others is missing, so missing
    values move with it under relabelling.
    """
    k = prep.k
    n, m = prep.mask.shape
    std = [(prep.matrices[c] - dd.mean[c]) / dd.sd[c] for c in range(k)]
    out = np.empty((n, m, k))
    Xc = dd.X[dd.complete]
    for j in range(k):
        others = [c for c in range(k) if c != j]
        Z = Xc[:, [0] + [c + 1 for c in others]]
        g, *_ = np.linalg.lstsq(Z, Xc[:, j + 1], rcond=None)
        E = std[j] - g[0]
        for c, gc in zip(others, g[1:]):
            E = E - gc * std[c]
        out[:, :, j] = E
    return out


def _layer(prep: _design.Prepared, dd: DyadData, values: np.ndarray) -> np.ndarray:
    """A dyad vector as an (n, m) matrix, 0 off the dyad set (for ``gather_cross``)."""
    M = np.zeros(prep.mask.shape)
    M[dd.rows, dd.cols] = values
    return M


def build_plan(prep: _design.Prepared, dd: DyadData, fit: LogisticFit, *, scheme: str,
               statistic: str) -> LogisticPlan:
    """Route and fixed inputs of a logistic scheme (see the module docstring)."""
    k = prep.k
    p = k + 1
    N = dd.rows.shape[0]
    X = np.ascontiguousarray(dd.X)
    XT = design_columns(X)  # (p, N), 0 where missing
    xmax = np.nan_to_num(np.nanmax(np.abs(X), axis=0))
    fixed_x = ~np.isnan(X).any(axis=1)
    zcols = _reduced_columns(k)
    common = dict(rows=dd.rows, cols=dd.cols, XT=XT, xmax=xmax)
    use_z = statistic != "coef"
    scale = 1.0 / dd.sd
    refit_work = STEPS_GUESS * N * p * p
    ranges = dict(col_start=prep.col_start, col_stop=prep.col_stop)

    def plan(kind, arrays, work, z=use_z):
        return LogisticPlan(kind, arrays, k, prep.n_dyads, z, scale, float(work), **ranges)

    ybar = float(dd.y[dd.complete].mean())
    w0 = ybar * (1.0 - ybar)
    if scheme == "y":
        layer = np.ascontiguousarray(prep.matrices[k])
        beta0 = _null_start(dd.y, dd.complete, p)
        score = statistic == "score"
        if score:
            gam, cinv = _reduced_fits(prep, dd, zcols, dd.complete)
        if score and prep.complete and k == 1:
            # the intercept-only fit is invariant (sum y_pi = sum y): one product per
            # relabelling, x'y_pi
            mu = 1.0 / (1.0 + np.exp(-gam[0, 0]))
            x = X[:, 1]
            info = mu * (1.0 - mu) * (x @ x - x.sum() ** 2 / N)
            arrays = dict(rel=np.nan_to_num(layer)[:, :, None], rel_idx=np.zeros(1, np.int64),
                          fix=_layer(prep, dd, x)[:, :, None], fix_idx=np.zeros(1, np.int64),
                          offset=mu * x.sum(), info=info)
            return plan("score-y-products", arrays, N, True)
        # the free first Newton step of a refit by passes from the intercept-only fit
        # (every fitted probability mean(y) there): it needs only X'y_pi
        if not score:
            onestep = np.zeros((0, p + 1))
            if prep.complete:
                onestep = np.empty((p, p + 1))
                onestep[:, :p] = np.linalg.inv(w0 * (X.T @ X))
                onestep[:, p] = ybar * X.sum(axis=0)
        else:
            onestep = np.zeros((0, k, k + 1))
            if prep.complete:
                onestep = np.empty((k, k, k + 1))
                for j in range(k):
                    Z = X[:, zcols[j]]
                    onestep[j, :, :k] = np.linalg.inv(w0 * (Z.T @ Z))
                    onestep[j, :, k] = ybar * Z.sum(axis=0)
        degree = _series_degree(X, xmax, beta0[0], w0) if prep.complete else None
        if degree is not None:
            # complete data: every fit from X'y_pi and the moments of the design
            tables = monomial_tables(k, degree + 2)
            mom = np.empty(tables["deg"].shape[0])
            series_moments(XT, tables["parent"], tables["pvar"], mom)
            fix = np.ascontiguousarray(np.stack([_layer(prep, dd, XT[c]) for c in range(p)],
                                                axis=2))
            arrays = dict(common, rel=np.nan_to_num(layer)[:, :, None],
                          rel_idx=np.zeros(1, np.int64), fix=fix,
                          fix_idx=np.arange(p, dtype=np.int64), mom=mom, degree=degree,
                          n_alpha=int((tables["deg"] <= degree).sum()), beta0=beta0,
                          onestep=onestep if score else onestep[None],
                          zcols=zcols if score else np.zeros((0, k), np.int64),
                          **{key: tables[key] for key in ("deg", "parent", "pvar", "mult",
                                                          "up1", "up2")})
            return plan("series-y", arrays, N * p, True if score else use_z)
        if not score:
            arrays = dict(common, layer=layer, fixed_ok=fixed_x, beta0=beta0, onestep=onestep)
            return plan("refit-y", arrays, refit_work)
        gamma0 = gam
        if prep.complete:  # each reduced refit starts at the intercept-only fit + a free step
            gamma0 = np.array([beta0[:k] for _ in range(k)])
        arrays = dict(common, layer=layer, fixed_ok=fixed_x, zcols=zcols, gamma0=gamma0,
                      onestep=onestep)
        return plan("score-y", arrays, k * refit_work, True)

    E = _residual_layers(prep, dd)
    gam, cinv = _reduced_fits(prep, dd, zcols, dd.complete)
    y = np.ascontiguousarray(dd.y)
    if statistic != "score":
        fixed_ok = _fixed_ok(dd, X, zcols)
        design = np.concatenate([zcols, np.full((k, 1), p, dtype=np.int64)], axis=1)
        beta0 = np.concatenate([gam, np.zeros((k, 1))], axis=1)
        mu0 = np.zeros((0, N))
        ties = np.zeros(0, dtype=np.int64)
        if prep.complete:  # the first Newton step from beta0 needs only sums over e_pi
            mu0 = np.empty((k, N))
            for j in range(k):
                mu0[j] = 1.0 / (1.0 + np.exp(-(X[:, zcols[j]] @ gam[j])))
            ties = np.flatnonzero(dd.y == 1.0).astype(np.int64)
        emax = np.array([np.abs(E[dd.rows, dd.cols, j]).max() for j in range(k)])
        arrays = dict(common, layer=np.ascontiguousarray(E.transpose(2, 0, 1)), y=y,
                      fixed_ok=fixed_ok, design=design, emax=np.nan_to_num(emax),
                      beta0=beta0, mu0=mu0, ties=ties, cinv=cinv)
        return plan("refit-dsp", arrays, k * refit_work)
    if not prep.complete:
        arrays = dict(common, layer=np.ascontiguousarray(E.transpose(2, 0, 1)), y=y,
                      fixed_ok=_fixed_ok(dd, X, zcols), zcols=zcols, gamma0=gam)
        return plan("score-dsp-refit", arrays, k * refit_work, True)
    # complete data: the reduced fit of each term is fixed; per relabelling only the sums
    # U, Q, S of the module docstring (kernels.irls.score_rows)
    layers = []
    for j in range(k):
        mu = 1.0 / (1.0 + np.exp(-(X[:, zcols[j]] @ gam[j])))
        layers.append((dd.y - mu, mu * (1.0 - mu)))
    fixed = [r for r, _ in layers] + [w for _, w in layers] + [X[:, c] for c in range(1, p)]
    # row-planar (n, L, m) layers: each layer's row contiguous (kernels.irls.score_rows)
    fix = np.ascontiguousarray(np.stack([_layer(prep, dd, v) for v in fixed], axis=1))
    rel = np.ascontiguousarray(np.nan_to_num(E).transpose(0, 2, 1))
    arrays = dict(rel=rel.reshape(-1), fix=fix.reshape(-1), n_fix=fix.shape[1],
                  resid_at=np.arange(k, dtype=np.int64),
                  weight_at=np.arange(k, 2 * k, dtype=np.int64),
                  x_at=np.ascontiguousarray(zcols[:, 1:] - 1 + 2 * k), cinv=cinv)
    return plan("score-dsp-products", arrays, N * k * (p + 2), True)


def _fixed_ok(dd: DyadData, X: np.ndarray, zcols: np.ndarray) -> np.ndarray:
    """(k, N): dyads where y and the other terms of each tested term are finite."""
    yok = ~np.isnan(dd.y)
    return np.array([yok & ~np.isnan(X[:, z]).any(axis=1) for z in zcols], dtype=bool)


def observed_score(dd: DyadData, prep: _design.Prepared) -> np.ndarray:
    """Full-model score statistic of each term, straight from its reduced fit (a check on
    the plan's fast paths)."""
    k = prep.k
    zcols = _reduced_columns(k)
    gam, cinv = _reduced_fits(prep, dd, zcols, dd.complete)
    out = np.empty(k)
    valid = np.ascontiguousarray(dd.complete)
    yv = np.where(valid, np.nan_to_num(dd.y), 0.0)
    info = np.zeros(INFO_SIZE)
    for j in range(k):
        cols = np.append(zcols[j], j + 1)
        XT = design_columns(dd.X, cols)
        xy = (XT * yv).sum(axis=1)
        xmax = np.abs(XT[:k, valid]).max(axis=1)
        # the reduced fit again from its estimate: one Newton step, then the score
        out[j] = score_logistic(XT, np.empty(0), np.arange(k, dtype=np.int64), k, xy, valid,
                                xmax, gam[j], info, MAX_ITER, TOL_OBSERVED)
    return out


# --- the route ------------------------------------------------------------------------------
def plan(y: Any, predictors: Any, *, scheme: str = "dsp", statistic: str = "t",
         storage: str = "float64", directed: bool | None = None, groups: Any = None,
         dyads: str | None = None) -> Plan:
    """The logistic route: ``dyadperm.regress(model="logistic")``.

    ``scheme`` is "y" or "dsp" and ``statistic`` is "t" (the Wald z, default), "coef" or
    "score" (the signed score statistic of each term under its reduced model). The
    result's ``coef``/``se`` are the Wald fit's, ``deviance`` is -2 log L, ``r2`` is NaN;
    with "score" its ``stat`` holds the score statistics (NaN for the intercept, which is
    not tested).
    """
    check_regression(model="logistic", scheme=scheme, statistic=statistic, storage=storage)
    # dyad table, design and residual layers: about three n x m arrays per network
    check_dense_route(y, predictors, route="logistic", layers_per_term=3, groups=groups)
    prep = _design.prepare(y, predictors, directed=directed, groups=groups, dyads=dyads)
    settings = dict(kind="regression", model="logistic", scheme=scheme, statistic=statistic,
                    method=None, storage=storage, dyads=dyads, groups=groups_fingerprint(groups))
    return plan_prepared(prep, scheme=scheme, statistic=statistic, settings=settings)[0]


def plan_prepared(prep: _design.Prepared, *, scheme: str, statistic: str,
                  settings: dict) -> tuple[Plan, LogisticFit]:
    """The logistic plan of prepared inputs (``plan``; panels: ``routes.waves``), and the
    observed fit."""
    check_binary(prep)
    # the shared checks (too few dyads, constant or collinear predictors) with the pivot of
    # fits from Gram matrices: the Newton steps solve with X'WX (kernels.options)
    _design.observed_fit(prep, pivot=FIT_PIVOT, response=False)
    dd = dyad_data(prep)
    fit = observed_fit(prep, dd)
    stats = build_plan(prep, dd, fit, scheme=scheme, statistic=statistic)
    if statistic == "score":
        direct = observed_score(dd, prep)
        stat = np.concatenate([[np.nan], direct])
        note = ("statistic 'score': signed score statistic of each term under its reduced "
                "model (Rao 1948); estimates and std.errors are the Wald fit's")
    else:
        direct = fit.z[1:] if statistic == "t" else fit.coef[1:]
        stat = fit.z if statistic == "t" else fit.coef
        note = ("model 'logistic': z is the Wald statistic b / se; estimates are log odds "
                "ratios")
    info = summary(prep, kind="regression", model="logistic", scheme=scheme,
                   statistic=statistic, method=None, n_dyads=fit.n_dyads,
                   terms=("intercept",) + prep.names)
    info["notes"] = [note]
    fit_arrays = dict(coef=fit.coef, se=fit.se, stat=stat, fit=np.array([np.nan, fit.deviance]))
    return Plan(kernel=stats, blocks=prep.blocks, chunk_size=stats.chunk_size(), fit=fit_arrays,
                summary=info, identity=dense_identity(prep, settings), expected=direct), fit
