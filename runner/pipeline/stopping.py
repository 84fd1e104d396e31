"""Sequential stopping: spend no more relabellings than the decisions need.

The rule (:class:`dyadperm.settings.StopRule`) is applied to the statistics of the
*contiguous finished prefix* of the run in permutation order, and only at chunk
boundaries, so where a run stops depends only on the seed and the chunk size, never on
``jobs`` or the order in which chunks finish. Chunks that finished beyond the stopping
point are kept in the run file but not used.

``besag-clifford`` (Besag & Clifford 1991, Biometrika 78:301-304): a term is done at its
h-th exceedance (|T_pi| >= |T_obs|); stopped there after l relabellings its p-value is
h / l, the sequential p-value of that paper. A term that never reaches h exceedances keeps
(b + 1) / (m + 1) over all m relabellings (the paper's truncated rule). Each term's p-value
uses its own stopping point, whatever the other terms do.

``gandy`` (Gandy 2009, JASA 104:1504-1511): boundaries U_n, L_n on the running count S_n of
exceedances are chosen so that the chance that the decision "p <= alpha" differs from the
one an infinite run would give is at most ``risk`` for every true p. A term is decided when
S_n >= U_n (p > alpha) or S_n <= L_n (p <= alpha); its p-value is (S_tau + 1) / (tau + 1)
at that point.

The run stops at the first chunk boundary where every tested term is done. A term whose
observed statistic is not finite has no p-value (``pvalues``) and is never waited for.
:func:`assess` gives a run's p-values under its rule, with the familywise adjustment of
``dyadperm.pipeline.adjustment``.
"""

from __future__ import annotations

import functools
import warnings
from contextlib import contextmanager
from dataclasses import dataclass, field, replace
from typing import Any, Callable, Iterator

import numpy as np
from scipy.stats import beta as _beta

from ..errors import RunFileError
from ..settings import StopRule
from .adjustment import maxt_adjusted
from .engine import iter_chunks, row_width
from .pvalues import (INTERVAL_LEVEL, TIE_TOLERANCE, PValues, clopper_pearson, has_statistic,
                      pvalues)

#: Gandy's spending sequence eps_n = eps * n / (n + k) with k = 1000 [memory: the paper's
#: suggested default; any nondecreasing eps_n -> eps below eps keeps the bound].
GANDY_SPENDING = 1000
#: Warning joblib gives when a run is stopped with chunks still in flight; those chunks
#: are discarded on purpose, so this one warning is silenced where the run stops.
_CANCELLED = r".*tasks which were still being processed by the workers have been cancelled"


def exceedances(null: np.ndarray, observed: np.ndarray) -> np.ndarray:
    """(m, k) bool: relabelling i at least as extreme as the observed statistic of term j.

    Two-sided, |T_pi| >= |T_obs| with ties within a relative ``TIE_TOLERANCE``, and a
    failed (NaN) permuted statistic counts as extreme: the rule of ``pvalues``. A term
    with no finite observed statistic has none.
    """
    obs = np.asarray(observed, dtype=np.float64)
    # a row holds the statistics first, then any extra numbers of the route
    null = np.asarray(null, dtype=np.float64)[:, :obs.shape[0]]
    ok = has_statistic(obs)
    obs = np.where(ok, obs, 0.0)
    tol = TIE_TOLERANCE * np.abs(obs)
    with np.errstate(invalid="ignore"):
        return ((np.abs(null) >= np.abs(obs) - tol) | np.isnan(null)) & ok


class GandyBoundaries:
    """Boundaries U_n, L_n of Gandy's (2009) sequential Monte Carlo test, grown on demand.

    S_n is the number of exceedances among the first n relabellings. Under p = alpha
    (the worst case for the resampling risk [memory: Gandy's Theorem 1 reduces the
    uniform bound to this p]), with eps_n = eps n / (n + k) [memory: the paper's spending
    sequence, k = 1000] and tau the first n with S_n >= U_n or S_n <= L_n [memory: the
    paper's recursive definitions, as written here]:

        U_n = min{ j : P(tau >= n, S_n >= j) + P(tau < n, S_tau >= U_tau) <= eps_n }
        L_n = max{ j : P(tau >= n, S_n <= j) + P(tau < n, S_tau <= L_tau) <= eps_n }

    The distribution of S_n on the paths not yet stopped is carried forward one
    relabelling at a time (a Bernoulli(alpha) step), so each boundary costs O(width of
    the continuation region), which grows like sqrt(n). ``upper[n]``, ``lower[n]`` hold
    U_n and L_n (index 0 unused).
    """

    def __init__(self, alpha: float, risk: float, spending: int = GANDY_SPENDING) -> None:
        self.alpha, self.risk, self.spending = float(alpha), float(risk), int(spending)
        self.upper: list[int] = [0]
        self.lower: list[int] = [0]
        self._dist = np.ones(1)  # P(tau > n, S_n = lo + i) for the paths still running
        self._lo = 0
        self._spent_u = 0.0  # P(tau <= n, stopped at the upper boundary)
        self._spent_l = 0.0
        self._eps = 0.0

    def extend(self, n_max: int) -> None:
        """Compute the boundaries up to n = ``n_max``."""
        a = self.alpha
        n = len(self.upper) - 1
        dist, lo = self._dist, self._lo
        while n < n_max:
            n += 1
            self._eps = max(self._eps, self.risk * n / (n + self.spending))
            if dist.size == 0:  # every path has stopped: nothing can reach a boundary
                self.upper.append(n + 1)
                self.lower.append(-1)
                continue
            new = np.zeros(dist.size + 1)
            new[:-1] = (1.0 - a) * dist  # no exceedance at relabelling n
            new[1:] += a * dist          # an exceedance
            # tail[i] = P(tau >= n, S_n >= lo + i), i = 0 .. size (the last is 0)
            tail = np.concatenate([np.cumsum(new[::-1])[::-1], [0.0]])
            # head[i] = P(tau >= n, S_n <= lo - 1 + i), i = 0 .. size + 1 (the first is 0)
            head = np.concatenate([[0.0], np.cumsum(new)])
            ok_u = tail + self._spent_u <= self._eps
            ok_l = head + self._spent_l <= self._eps
            iu = int(np.argmax(ok_u))                       # smallest j that qualifies
            il = int(ok_l.size - 1 - np.argmax(ok_l[::-1]))  # largest j that qualifies
            self._spent_u += tail[iu]
            self._spent_l += head[il]
            self.upper.append(lo + iu)
            self.lower.append(lo - 1 + il)
            dist = new[il:iu]  # S_n strictly between the boundaries keeps going
            lo = lo + il
        self._dist, self._lo = dist, lo

    def arrays(self, first: int, count: int) -> tuple[np.ndarray, np.ndarray]:
        """(U_n, L_n) for n = first .. first + count - 1."""
        self.extend(first + count - 1)
        return (np.asarray(self.upper[first:first + count], dtype=np.int64),
                np.asarray(self.lower[first:first + count], dtype=np.int64))


@functools.lru_cache(maxsize=16)
def gandy_boundaries(alpha: float, risk: float) -> GandyBoundaries:
    """The (cached, growing) boundaries for one alpha and risk."""
    return GandyBoundaries(alpha, risk)


class Sequential:
    """A stopping rule applied to a run's contiguous finished prefix, in permutation order.

    Feed it chunks as they finish (any order); it advances over chunks only once every
    earlier chunk is in. ``stop_rows`` is None until every tested term is done; then it
    is the first chunk boundary at or after the last term's stopping point (at least one
    chunk). Terms with no finite observed statistic (``skip``) are never waited for.
    """

    def __init__(self, rule: StopRule, observed: np.ndarray, *, chunk_size: int,
                 total: int) -> None:
        self.rule = rule
        self.observed = np.asarray(observed, dtype=np.float64)
        self.chunk_size = int(chunk_size)
        self.total = int(total)
        k = self.observed.shape[0]
        self.rows = 0
        self.count = np.zeros(k, dtype=np.int64)    # S_n at n = rows
        self.tau = np.zeros(k, dtype=np.int64)      # stopping point of each term (0: not yet)
        self.at_tau = np.zeros(k, dtype=np.int64)   # S_tau
        self.side = np.zeros(k, dtype=np.int8)      # gandy: +1 above alpha, -1 below
        self.skip = ~has_statistic(self.observed)   # no statistic: nothing to decide
        self._pending: dict[int, np.ndarray] = {}
        self._next = 0
        self._stored: tuple[np.ndarray, np.ndarray] | None = None

    @property
    def stop_rows(self) -> int | None:
        if not self.tau.size or not ((self.tau > 0) | self.skip).all():
            return None
        cs = self.chunk_size
        rows = min(self.total, max(1, -(-int(self.tau.max()) // cs)) * cs)
        return rows if self.rows >= rows else None  # (only when no term is waited for)

    def advance(self, x: np.ndarray) -> None:
        """Take the exceedance indicators (rows, k) of the next rows in permutation order."""
        rows = x.shape[0]
        if rows == 0:
            return
        s = self.count + np.cumsum(x, axis=0, dtype=np.int64)
        n = self.rows + 1 + np.arange(rows, dtype=np.int64)
        if self.rule.rule == "besag-clifford":
            up = s >= self.rule.exceedances
            down = np.zeros_like(up)
        else:
            u, lo = gandy_boundaries(self.rule.alpha, self.rule.risk).arrays(self.rows + 1, rows)
            up = s >= u[:, None]
            down = s <= lo[:, None]
        hit = (up | down) & ((self.tau == 0) & ~self.skip)[None, :]
        for j in np.flatnonzero(hit.any(axis=0)):
            i = int(np.argmax(hit[:, j]))
            self.tau[j] = n[i]
            self.at_tau[j] = s[i, j]
            self.side[j] = 1 if up[i, j] else -1
        self.count = s[-1]
        self.rows += rows

    def feed(self, c: int, stats: np.ndarray) -> bool:
        """Chunk ``c``'s statistics; True once the rule is satisfied (stop the run)."""
        self._pending[c] = exceedances(stats, self.observed)
        self._catch_up()
        return self.stop_rows is not None

    def _catch_up(self) -> None:
        while self.stop_rows is None:
            c = self._next
            if c in self._pending:
                x = self._pending.pop(c)
            elif self._stored is not None and c < self._stored[1].size and self._stored[1][c]:
                first = c * self.chunk_size
                x = exceedances(np.asarray(self._stored[0][first:first + self.chunk_size]),
                                self.observed)
            else:
                return
            self.advance(x)
            self._next += 1

    def start_from(self, null: np.ndarray, done: np.ndarray) -> None:
        """Take the chunks a run file being resumed already holds (read when reached)."""
        self._stored = (null, np.asarray(done, dtype=bool))
        self._catch_up()


@contextmanager
def closing(chunks: Iterator) -> Iterator:
    """Close a generator of chunks when the loop over it ends, early or not.

    Stopping a run leaves chunks in flight; joblib cancels those not started and warns
    about it. They are discarded on purpose, so that one warning is silenced here.
    """
    try:
        yield chunks
    finally:
        with warnings.catch_warnings():
            warnings.filterwarnings("ignore", message=_CANCELLED, category=UserWarning)
            chunks.close()


def finish_progress(progress: Any, seq: Sequential) -> None:
    """Tell a progress callback the run is complete at its stopping point."""
    if callable(progress) and seq.stop_rows is not None:
        progress(seq.stop_rows, seq.stop_rows)


def run_until(seq: Sequential, plan: Any, draws: Any, *, jobs: int, backend: str,
              scheduler: str | None, tick: Callable[[int], None] | None,
              progress: Any) -> np.ndarray:
    """Chunks in order (several in flight with ``jobs`` > 1) until the stop rule is met;
    the null statistics of the used rows (no run file)."""
    null = np.empty((draws.total, row_width(plan)))
    with closing(iter_chunks(plan, draws, range(draws.n_chunks), jobs=jobs, backend=backend,
                             scheduler=scheduler)) as chunks:
        for c, stats in chunks:
            first, count = draws.chunk_rows(c)
            null[first:first + count] = stats
            if tick is not None:
                tick(count)
            if seq.feed(c, stats):
                finish_progress(progress, seq)
                break
    rows = seq.stop_rows
    return null if rows is None else null[:rows].copy()


def sequential_for(stop: Any, observed: np.ndarray, *, exact: bool, chunk_size: int,
                   total: int) -> Sequential | None:
    """The live stopper of a run, or None when no rule applies (none, or exact enumeration:
    relabellings in enumeration order are not a random sequence)."""
    rule = StopRule.from_dict(stop) if not isinstance(stop, StopRule) else stop
    if not rule.active or exact:
        return None
    return Sequential(rule, observed, chunk_size=chunk_size, total=total)


def usable_rows(stop: Any, null: np.ndarray, done: np.ndarray, observed: np.ndarray, *,
                exact: bool, chunk_size: int, total: int, where: Any = "run") -> int:
    """How many leading rows of a stored null a result uses.

    The first chunk boundary where the stop rule is satisfied, else every row once every
    chunk is done; RunFileError when the run is neither finished nor stopped.
    """
    done = np.asarray(done, dtype=bool)
    seq = sequential_for(stop, observed, exact=exact, chunk_size=chunk_size, total=total)
    if seq is not None:
        seq.start_from(null, done)
        if seq.stop_rows is not None:
            return seq.stop_rows
    if done.all():
        return total
    missing = np.flatnonzero(~done)
    raise RunFileError(f"{where}: run is incomplete: {missing.size} of {done.size} chunks "
                       f"missing (first: {missing[0]}) and its stop rule is not yet "
                       "satisfied; finish it with `dyadperm extend`")


def inverse_sampling_interval(h: np.ndarray, tau: np.ndarray,
                              level: float = INTERVAL_LEVEL) -> np.ndarray:
    """Exact interval for p after sampling until the h-th exceedance, reached at tau.

    P(tau <= l) = P(Bin(l, p) >= h) and P(tau >= l) = P(Bin(l - 1, p) <= h - 1), so the
    limits solve P_pL(Bin(l, pL) >= h) = (1 - level) / 2 and P_pU(Bin(l - 1, pU) <= h - 1)
    = (1 - level) / 2: Clopper-Pearson limits for h of l (lower) and h - 1 of l - 1
    (upper). Common practice for inverse binomial sampling.
    """
    h = np.asarray(h, dtype=np.float64)
    n = np.asarray(tau, dtype=np.float64)
    a = (1.0 - level) / 2.0
    with np.errstate(invalid="ignore", divide="ignore"):
        lo = _beta.ppf(a, h, n - h + 1)
        hi = np.where(n > h, _beta.ppf(1 - a, h, np.maximum(n - h, 1e-300)), 1.0)
    return np.stack([lo, hi], axis=-1)


@dataclass(frozen=True)
class Assessment:
    """p-values of a run under its stop rule, with the familywise adjustment."""

    pv: PValues
    p_adjusted: np.ndarray
    stop_at: np.ndarray        # relabellings after which each term's rule was met (NaN: not)
    verdict: tuple[str, ...]   # gandy: "p <= alpha" / "p > alpha" / "" (undecided)
    rule: StopRule
    stopped_by: str | None
    planned: int
    notes: tuple[str, ...] = field(default=())


def assess(null: np.ndarray, observed: np.ndarray, *, exact: bool, stop: Any = None,
           planned: int | None = None) -> Assessment:
    """p-values of the used rows of a null under the run's stop rule.

    Without a rule (or for an exact enumeration) these are ``pvalues``. Under
    besag-clifford a term stopped at its h-th exceedance after l relabellings gets p = h / l
    (Besag & Clifford 1991), Monte Carlo standard error p sqrt((1 - p) / h) (the delta
    method for inverse binomial sampling) and :func:`inverse_sampling_interval`. Under
    gandy a decided term gets p = (S_tau + 1) / (tau + 1) with the usual error and
    Clopper-Pearson interval over its first tau relabellings; the rule controls the
    decision at alpha, not these digits. One-sided p-values always use every row. The
    adjusted p-values use every row and are raised to at least the unadjusted ones.
    """
    null = np.asarray(null, dtype=np.float64)
    observed = np.asarray(observed, dtype=np.float64)
    rows, k = null.shape
    planned = rows if planned is None else int(planned)
    rule = stop if isinstance(stop, StopRule) else StopRule.from_dict(stop)
    pv = pvalues(null, observed, exact=exact)
    stop_at = np.full(k, np.nan)
    verdict = tuple("" for _ in range(k))
    notes: list[str] = []
    stopped_by = None
    if rule.active and exact:
        notes.append(f"stop rule {rule.rule} not applied: every relabelling was enumerated "
                     "(exact p-values)")
    elif rule.active:
        seq = Sequential(rule, observed, chunk_size=max(rows, 1), total=rows)
        seq.advance(exceedances(null, observed))
        p, se, interval = pv.p.copy(), pv.p_se.copy(), pv.p_interval.copy()
        hit = seq.tau > 0
        tau, s_tau = seq.tau[hit].astype(np.float64), seq.at_tau[hit].astype(np.float64)
        if rule.rule == "besag-clifford":
            h = float(rule.exceedances)
            p[hit] = h / tau
            se[hit] = p[hit] * np.sqrt((1 - p[hit]) / h)
            interval[hit] = inverse_sampling_interval(np.full(tau.shape, h), tau)
        else:
            p[hit] = (s_tau + 1) / (tau + 1)
            se[hit] = np.sqrt(p[hit] * (1 - p[hit]) / (tau + 1))
            interval[hit] = clopper_pearson(s_tau + 1, tau + 1)
            verdict = tuple("" if t == 0 else ("p > alpha" if s > 0 else "p <= alpha")
                            for t, s in zip(seq.tau, seq.side))
        stop_at[hit] = tau
        pv = replace(pv, p=p, p_se=se, p_interval=interval)
        if rows < planned and (hit | seq.skip).all():
            stopped_by = rule.rule
    adjusted = np.maximum(maxt_adjusted(null, observed, exact=exact), pv.p)
    return Assessment(pv, adjusted, stop_at, verdict, rule, stopped_by, planned, tuple(notes))
