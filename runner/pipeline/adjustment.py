"""Many tests at once: familywise adjusted p-values.

Single-step max-statistic method of Westfall & Young (1993, Resampling-Based Multiple
Testing, Wiley): p_j = (1 + #{pi: max_i |T_i,pi| >= |T_j,obs|}) / (m + 1).
"""

from __future__ import annotations

import numpy as np

from .pvalues import TIE_TOLERANCE, has_statistic


def maxt_adjusted(null: np.ndarray, observed: np.ndarray, *, exact: bool) -> np.ndarray:
    """Single-step max-statistic adjusted p-values (Westfall & Young 1993, Algorithm 2.5).

    p_j = (1 + #{pi: max_i |T_i,pi| >= |T_j,obs|}) / (m + 1) for random relabellings,
    #{...} / m for an exact enumeration (the identity among them). Ties and failed (NaN)
    permuted statistics follow ``pvalues``. A term whose observed statistic is not finite
    gets NaN and leaves the family: the maximum runs over the terms that have a statistic,
    so the others' adjusted p-values are still computed.
    """
    null = np.asarray(null, dtype=np.float64)
    observed = np.asarray(observed, dtype=np.float64)
    ok = has_statistic(observed)
    obs = np.abs(observed)
    m = null.shape[0]
    count = np.full(obs.shape[0], np.nan)
    if not ok.any() or m == 0:
        return count
    worst = np.where(np.isnan(null[:, ok]), np.inf, np.abs(null[:, ok])).max(axis=1)
    for j in np.flatnonzero(ok):
        o = obs[j]
        count[j] = np.count_nonzero(worst >= o - TIE_TOLERANCE * o)
    return count / m if exact else (count + 1) / (m + 1)
