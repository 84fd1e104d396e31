"""p-values from a null distribution, with their Monte Carlo error.

Random relabellings (Phipson & Smyth 2010): p = (b + 1) / (m + 1) where b counts the
relabellings at least as extreme as the observed statistic; it is never 0. Exact
enumeration (all relabellings, the identity among them): p = b / m. Ties within a
relative ``TIE_TOLERANCE`` count as at least as extreme. A permuted fit that failed
(NaN statistic: singular design) counts as at least as extreme (conservative).

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


def count_extreme(null: np.ndarray, observed: np.ndarray) -> tuple[np.ndarray, ...]:
    """Counts (two-sided, greater, less, failed) per column of ``null`` (m, k)."""
    tol = TIE_TOLERANCE * np.abs(observed)
    bad = np.isnan(null)
    with np.errstate(invalid="ignore"):
        two = (np.abs(null) >= np.abs(observed) - tol) | bad
        greater = (null >= observed - tol) | bad
        less = (null <= observed + tol) | bad
    return two.sum(axis=0), greater.sum(axis=0), less.sum(axis=0), bad.sum(axis=0)


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
        se = np.sqrt(p * (1 - p) / (m + 1))
        interval = clopper_pearson(two + 1, m + 1)
    return PValues(p, pg, pl, se, interval, two, failed)
