"""p-values from a null distribution, with their Monte Carlo error.

Random relabellings (Phipson & Smyth 2010): p = (b + 1) / (m + 1) where b counts the
relabellings at least as extreme as the observed statistic; it is never 0. Exact
enumeration (all relabellings, the identity among them): p = b / m. Ties within a
relative ``TIE_TOLERANCE`` count as at least as extreme. A permuted fit that failed
(NaN statistic: singular design) counts as at least as extreme (conservative).

A term whose observed statistic is not finite (its fit on the observed data failed in the
kernels, or is infinite) has nothing to compare the null with: every p-value of it, its
standard error and interval are NaN, never the smallest attainable p (``has_statistic``).

Monte Carlo standard error sqrt(p (1 - p) / (m + 1)) and the Clopper–Pearson interval
for b + 1 successes in m + 1 trials (Clopper & Pearson 1934, Biometrika 26:404–413).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.stats import beta

TIE_TOLERANCE = 1e-9
INTERVAL_LEVEL = 0.95


@dataclass(frozen=True)
class PValues:
    p: np.ndarray
    p_greater: np.ndarray
    p_less: np.ndarray
    p_se: np.ndarray
    p_interval: np.ndarray  # (k, 2)
    exceed: np.ndarray  # b of the two-sided test
    failed: np.ndarray  # NaN statistics per term


def has_statistic(observed: np.ndarray) -> np.ndarray:
    """(k,) bool: the terms whose observed statistic is finite, the ones that get p-values."""
    return np.isfinite(np.asarray(observed, dtype=np.float64))


def count_extreme(null: np.ndarray, observed: np.ndarray) -> tuple[np.ndarray, ...]:
    """Counts (two-sided, greater, less, failed) per column of ``null`` (m, k).

    Relabelling i counts for term j when |T_ij| >= |T_obs,j| - TIE_TOLERANCE |T_obs,j|
    (and alike one-sided), or when T_ij is NaN (a failed permuted fit). A term with no
    finite observed statistic counts 0 (its p-values are NaN: ``pvalues``).
    """
    observed = np.asarray(observed, dtype=np.float64)
    ok = has_statistic(observed)
    obs = np.where(ok, observed, 0.0)
    tol = TIE_TOLERANCE * np.abs(obs)
    bad = np.isnan(null)
    with np.errstate(invalid="ignore"):
        two = ((np.abs(null) >= np.abs(obs) - tol) | bad) & ok
        greater = ((null >= obs - tol) | bad) & ok
        less = ((null <= obs + tol) | bad) & ok
    return two.sum(axis=0), greater.sum(axis=0), less.sum(axis=0), bad.sum(axis=0)


def mc_standard_error(p: np.ndarray, m: int) -> np.ndarray:
    """Monte Carlo standard error sqrt(p (1 - p) / (m + 1)) of a p-value from m random
    relabellings (p = (b + 1) / (m + 1) counts m + 1 outcomes)."""
    p = np.asarray(p, dtype=np.float64)
    return np.sqrt(p * (1 - p) / (m + 1))


def clopper_pearson(successes: np.ndarray, trials: np.ndarray | int,
                    level: float = INTERVAL_LEVEL) -> np.ndarray:
    """Exact binomial interval (k, 2) for ``successes`` out of ``trials``."""
    x = np.asarray(successes, dtype=np.float64)
    n = np.broadcast_to(np.asarray(trials, dtype=np.float64), x.shape)
    a = (1.0 - level) / 2.0
    with np.errstate(invalid="ignore", divide="ignore"):
        lo = np.where(x > 0, beta.ppf(a, x, n - x + 1), 0.0)
        hi = np.where(x < n, beta.ppf(1 - a, x + 1, n - x), 1.0)
    return np.stack([lo, hi], axis=-1)


def pvalues(null: np.ndarray, observed: np.ndarray, *, exact: bool) -> PValues:
    """p-values of each column of ``null`` (m, k) against ``observed`` (k,)."""
    m = null.shape[0]
    two, greater, less, failed = count_extreme(null, observed)
    if exact:
        p, pg, pl = two / m, greater / m, less / m
        se = np.zeros_like(p)
        interval = np.stack([p, p], axis=-1)
    else:
        p, pg, pl = (two + 1) / (m + 1), (greater + 1) / (m + 1), (less + 1) / (m + 1)
        se = mc_standard_error(p, m)
        interval = clopper_pearson(two + 1, m + 1)
    none = ~has_statistic(observed)
    if none.any():
        p, pg, pl, se = (np.where(none, np.nan, a) for a in (p, pg, pl, se))
        interval = np.where(none[:, None], np.nan, interval)
    return PValues(p, pg, pl, se, interval, two, failed)
