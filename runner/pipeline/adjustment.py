"""Many tests at once: familywise adjusted p-values.

Single-step max-statistic method of Westfall & Young (1993, Resampling-Based Multiple
Testing, Wiley): p_j = (1 + #{pi: max_i |T_i,pi| >= |T_j,obs|}) / (m + 1).
"""

from __future__ import annotations

import numpy as np

from .pvalues import TIE_TOLERANCE


def maxt_adjusted(null: np.ndarray, observed: np.ndarray, *, exact: bool) -> np.ndarray:
    """Single-step max-statistic adjusted p-values (Westfall & Young 1993, Algorithm 2.5).

    p_j = (1 + #{pi: max_i |T_i,pi| >= |T_j,obs|}) / (m + 1) for random relabellings,
    #{...} / m for an exact enumeration (the identity among them). Ties and failed (NaN)
    permuted statistics follow ``pvalues``; a term whose observed statistic is NaN gets NaN.
    """
    null = np.asarray(null, dtype=np.float64)
    obs = np.abs(np.asarray(observed, dtype=np.float64))
    m = null.shape[0]
    if null.shape[1] == 0:
        return np.zeros(0)
    worst = np.where(np.isnan(null), np.inf, np.abs(null)).max(axis=1)
    count = np.empty(obs.shape[0])
    for j, o in enumerate(obs):
        count[j] = np.count_nonzero(worst >= o - TIE_TOLERANCE * o) if np.isfinite(o) else np.nan
    return count / m if exact else (count + 1) / (m + 1)
