"""Precision you can state: planning, sequential stopping, many tests at once.

A p-value from random relabellings is an estimate. This module holds what lets a user say
how precise it is and spend no more computing than the question needs:

- **Planning** (:func:`permutations_needed`, :func:`plan_study`): precision d is the Monte
  Carlo standard error of the p-value at p = alpha, so m = ceil(alpha (1 - alpha) / d^2)
  relabellings (methods.md; alpha 0.05, d 0.002 -> 11,875). :func:`plan_study` times a
  short run of the actual study on this machine and scales it up.
- **Sequential stopping** (:class:`StopRule`, :class:`Sequential`): the rule is applied to
  the statistics of the *contiguous finished prefix* of the run in permutation order, and
  only at chunk boundaries, so where a run stops depends only on the seed and the chunk
  size, never on ``jobs`` or the order in which chunks finish. Chunks that finished beyond
  the stopping point are kept in the run file but not used.

  ``besag-clifford`` (Besag & Clifford 1991, Biometrika 78:301-304): a term is done at its
  h-th exceedance (|T_pi| >= |T_obs|); stopped there after l relabellings its p-value is
  h / l, the sequential p-value of that paper. A term that never reaches h exceedances
  keeps (b + 1) / (m + 1) over all m relabellings (the paper's truncated rule). Each term's
  p-value uses its own stopping point, whatever the other terms do.

  ``gandy`` (Gandy 2009, JASA 104:1504-1511): boundaries U_n, L_n on the running count
  S_n of exceedances are chosen so that the chance that the decision "p <= alpha" differs
  from the one an infinite run would give is at most ``risk`` for every true p. A term
  is decided when S_n >= U_n (p > alpha) or S_n <= L_n (p <= alpha); its p-value is
  (S_tau + 1) / (tau + 1) at that point.

  The run stops at the first chunk boundary where every tested term is done.
- **Many tests at once** (:func:`maxt_adjusted`, :func:`correlate_layers`): familywise
  adjusted p-values by the single-step max-statistic method of Westfall & Young (1993,
  Resampling-Based Multiple Testing, Wiley), p_j = (1 + #{pi: max_i |T_i,pi| >=
  |T_j,obs|}) / (m + 1), and the matrix of pairwise QAP correlations of several networks
  from shared relabellings (see :func:`correlate_layers` for what is relabelled).
"""

from __future__ import annotations

import functools
import json
import math
import time
import warnings
from contextlib import contextmanager
from dataclasses import dataclass, field, replace
from fractions import Fraction
from typing import Any, Callable, Iterator, Mapping, Sequence

import numpy as np
from scipy.stats import beta as _beta

from .dyadic import network_name
from .errors import InputError, RunFileError
from .permutations import Blocks
from .pvalues import INTERVAL_LEVEL, TIE_TOLERANCE, PValues, clopper_pearson, pvalues

STOP_RULES = ("none", "besag-clifford", "gandy")
#: h of Besag & Clifford (1991); they discuss h of 10 or 20 [memory].
DEFAULT_EXCEEDANCES = 10
#: Gandy's (2009) examples bound the resampling risk at 0.001 [memory].
DEFAULT_RISK = 0.001
#: Gandy's spending sequence eps_n = eps * n / (n + k) with k = 1000 [memory: the paper's
#: suggested default; any nondecreasing eps_n -> eps below eps keeps the bound].
GANDY_SPENDING = 1000
#: Warning joblib gives when a run is stopped with chunks still in flight; those chunks
#: are discarded on purpose, so this one warning is silenced where the run stops.
_CANCELLED = r".*tasks which were still being processed by the workers have been cancelled"


# --------------------------------------------------------------------------- planning

def _decimal(x: float) -> Fraction:
    """The decimal a user wrote (0.05, not the nearest binary float 0.05000000000000000277)."""
    return Fraction(repr(float(x)))


def _check_level(name: str, value: Any, upper: float = 1.0) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)) \
            or not math.isfinite(float(value)) or not 0 < float(value) < upper:
        raise InputError(f"`{name}` must be a number with 0 < {name} < {upper:g}; got {value!r}")
    return float(value)


def permutations_needed(precision: float, alpha: float = 0.05) -> int:
    """Random relabellings for Monte Carlo standard error ``precision`` at p = ``alpha``.

    m = ceil(alpha (1 - alpha) / precision^2) (methods.md: the binomial standard error
    sqrt(p (1 - p) / m) at p = alpha equals the precision). The numbers are taken as the
    decimals written, so 0.05 and 0.002 give exactly 11,875.
    """
    d = _check_level("precision", precision, 0.5)
    a = _check_level("alpha", alpha)
    need = _decimal(a) * (1 - _decimal(a)) / _decimal(d) ** 2
    return max(1, math.ceil(need))


@dataclass(frozen=True)
class PlanEstimate:
    """What :func:`plan_study` found. Times are wall-clock seconds on this machine.

    ``permutations`` relabellings give Monte Carlo standard error ``precision`` at
    ``alpha``; ``seconds`` is the expected time of that run with ``workers`` workers (the
    cores assumed), from a timing run of ``timed_permutations`` relabellings of the study
    itself (after the numba kernels were loaded). ``relabellings`` is the number of
    distinct relabellings; when it is at most ``permutations`` and exact enumeration is
    allowed, the run enumerates them (``exact``) and its p-values have no Monte Carlo error.
    """

    study: str
    precision: float
    alpha: float
    permutations: int
    relabellings: int
    exact: bool
    workers: int
    machine_cores: int
    timed_permutations: int
    timed_seconds: float
    first_chunk_seconds: float
    rate: float
    seconds: float
    run_permutations: int

    def text(self) -> str:
        """A few lines for the terminal."""
        lines = [f"plan for {self.study}",
                 f"  Monte Carlo precision {self.precision:g} at alpha {self.alpha:g}: "
                 f"{self.permutations:,} random relabellings "
                 f"(ceil(alpha (1 - alpha) / precision^2))"]
        if self.exact:
            lines.append(f"  only {self.relabellings:,} distinct relabellings exist: the run "
                         "enumerates them all (exact p-values, no Monte Carlo error)")
        lines.append(f"  timing run: {self.timed_permutations:,} relabellings in "
                     f"{self.timed_seconds:.2f} s with {self.workers} worker(s) "
                     f"({self.rate:,.0f} relabellings/s after the first chunk)")
        lines.append(f"  expected time for {self.run_permutations:,} relabellings: "
                     f"{_duration(self.seconds)} with {self.workers} worker(s) "
                     f"(this machine has {self.machine_cores} cores)")
        lines.append(f"  set it with: permutations = {self.run_permutations} in [test], or "
                     f"--permutations {self.run_permutations}")
        return "\n".join(lines)


def _duration(seconds: float) -> str:
    if seconds < 90:
        return f"{seconds:.1f} s"
    if seconds < 5400:
        return f"{seconds / 60:.1f} min"
    return f"{seconds / 3600:.1f} h"


class _Enough(Exception):
    """Raised from the timing run's progress callback to end it early."""


def plan_study(study: Any, *, precision: float, alpha: float | None = None, jobs: int = -1,
               budget: float = 2.0) -> PlanEstimate:
    """Permutations needed for a Monte Carlo precision, and the time they take here.

    Parameters
    ----------
    study : Study or path
        A study (``dyadperm.load_study``) or its file.
    precision : float
        Wanted Monte Carlo standard error of the p-value at p = alpha.
    alpha : float, optional
        Level (default: the study's ``alpha``).
    jobs : int
        Workers of the timing run and of the planned run (-1: every core).
    budget : float
        Seconds of steady computing the timing run aims at (after its first chunk).

    Notes
    -----
    The timing run is the study itself through ``dyadperm.regress``/``correlate`` with the
    study's settings, random relabellings and no run file: a one-chunk run first loads the
    compiled kernels, then a run with ``jobs`` workers is timed by its progress callback
    and ended once ``budget`` seconds have passed after its first chunk (or when it is
    done). Expected time = time to the first finished chunk (reading aside: preparing the
    inputs, the observed fit, the first chunks) + the remaining relabellings at the rate
    measured after the first round of chunks.
    """
    from .study import Study, load_study

    st = study if isinstance(study, Study) else load_study(study)
    t = st.spec["test"]
    a = t["alpha"] if alpha is None else _check_level("alpha", alpha)
    need = permutations_needed(precision, a)
    if isinstance(jobs, bool) or not isinstance(jobs, (int, np.integer)) or jobs == 0 or jobs < -1:
        raise InputError(f"`jobs` must be an integer >= 1 or -1; got {jobs!r}")
    import joblib

    cores = int(joblib.cpu_count())
    workers = cores if jobs == -1 else int(jobs)
    count = _relabelling_count(st)
    exact = t["exact"] is not False and count <= need
    run_perms = count if exact else need

    def call(permutations: int, n_jobs: int, progress: Any) -> None:
        _run_study_quietly(st, permutations=permutations, jobs=n_jobs, progress=progress)

    call(1, 1, False)  # loads (or compiles) the kernels; not timed
    marks: list[tuple[float, int]] = []
    t0 = time.perf_counter()

    def tick(done: int, total: int) -> None:
        now = time.perf_counter()
        marks.append((now, done))
        # a steady rate needs more than one round of chunks over the workers
        if len(marks) > workers + 1 and now - marks[0][0] >= budget and done < total:
            raise _Enough

    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=_CANCELLED, category=UserWarning)
        try:
            call(run_perms, jobs, tick)
        except _Enough:
            pass
    end = time.perf_counter()
    if not marks:  # pragma: no cover - every run reports at least one chunk
        raise InputError(f"{st.path.name}: the timing run reported no progress")
    done = marks[-1][1]
    first_t, first_done = marks[0][0] - t0, marks[0][1]
    if done >= run_perms:  # the whole run fitted in the budget: its time is the answer
        seconds = end - t0
        rate = (done - first_done) / max(marks[-1][0] - marks[0][0], 1e-9) \
            if len(marks) > 1 else done / max(seconds, 1e-9)
    else:
        k0 = min(workers, len(marks) - 2)  # skip the first round of chunks
        (ta, da), (tb, db) = marks[k0], marks[-1]
        rate = (db - da) / max(tb - ta, 1e-9)
        seconds = first_t + (run_perms - first_done) / rate
    return PlanEstimate(study=st.path.name, precision=float(precision), alpha=float(a),
                        permutations=need, relabellings=count, exact=exact, workers=workers,
                        machine_cores=cores, timed_permutations=int(done),
                        timed_seconds=end - t0, first_chunk_seconds=first_t, rate=rate,
                        seconds=seconds, run_permutations=run_perms)


def _relabelling_count(st: Any) -> int:
    """Distinct relabellings of a study: n!, n! m! (two-mode), or the product over groups."""
    if st.col_node_ids is not None:
        return math.factorial(len(st.node_ids)) * math.factorial(len(st.col_node_ids))
    if st.groups is None:
        return math.factorial(len(st.node_ids))
    _, sizes = np.unique(np.asarray(st.groups).astype(str), return_counts=True)
    return math.prod(math.factorial(int(s)) for s in sizes)


def _run_study_quietly(st: Any, *, permutations: int, jobs: int, progress: Any) -> Any:
    """The study's own engine call (as Study.run makes it) without a run file."""
    import dyadperm

    t = st.spec["test"]
    common = dict(permutations=permutations, seed=0, jobs=jobs,
                  directed=st.spec["study"]["directed"], groups=st.groups, dyads=t["dyads"],
                  exact=False, chunk_size=t["chunk_size"], out=None, progress=progress)
    from .errors import DyadpermWarning

    with warnings.catch_warnings():
        # the study's own warnings (collinearity ...) belong to its run, not to its timing
        warnings.simplefilter("ignore", category=DyadpermWarning)
        if t["kind"] == "correlation":
            (predictor,) = st.predictors.values()
            return dyadperm.correlate(st.response, predictor, method=t["method"], **common)
        return dyadperm.regress(st.response, dict(st.predictors), model=t["model"],
                                scheme=t["scheme"], statistic=t["statistic"], **common)


# --------------------------------------------------------------------------- stop rules

@dataclass(frozen=True)
class StopRule:
    """A sequential stopping rule and its settings.

    ``rule`` is "none", "besag-clifford" or "gandy"; ``exceedances`` is h of Besag &
    Clifford (1991); ``risk`` bounds the resampling risk of Gandy (2009); ``alpha`` is the
    level Gandy's decision is about (and the level the report marks results at).
    """

    rule: str = "none"
    exceedances: int | None = None
    risk: float | None = None
    alpha: float = 0.05

    @property
    def active(self) -> bool:
        return self.rule != "none"

    def to_dict(self) -> dict:
        return {"rule": self.rule, "exceedances": self.exceedances, "risk": self.risk,
                "alpha": self.alpha}

    @classmethod
    def from_dict(cls, d: Mapping | None) -> "StopRule":
        if not d:
            return cls()
        return cls(str(d.get("rule", "none")), d.get("exceedances"), d.get("risk"),
                   float(d.get("alpha", 0.05)))

    def describe(self) -> str:
        if self.rule == "besag-clifford":
            return f"besag-clifford (h = {self.exceedances})"
        if self.rule == "gandy":
            return f"gandy (risk {self.risk:g} at alpha {self.alpha:g})"
        return "none"


def stop_rule(stop: Any = None, *, exceedances: Any = None, risk: Any = None,
              alpha: Any = None) -> StopRule:
    """A validated :class:`StopRule` from a rule name (or a StopRule) and settings.

    Settings left as None take the rule's defaults (h = 10; risk 0.001; alpha 0.05);
    a setting that does not belong to the rule is an error.
    """
    if isinstance(stop, StopRule):
        base = stop
        rule = stop.rule
    else:
        rule = "none" if stop is None else stop
        base = StopRule(rule if isinstance(rule, str) else "none")
    if not isinstance(rule, str) or rule not in STOP_RULES:
        raise InputError(f"`stop` must be one of {', '.join(STOP_RULES)}; got {rule!r}")
    a = base.alpha if alpha is None else alpha
    a = _check_level("alpha", a)
    h = base.exceedances if exceedances is None else exceedances
    r = base.risk if risk is None else risk
    if rule != "besag-clifford" and exceedances is not None:
        raise InputError(f"`stop_exceedances` applies to stop = besag-clifford only "
                         f"(stop is {rule}); got {exceedances!r}")
    if rule != "gandy" and risk is not None:
        raise InputError(f"`stop_risk` applies to stop = gandy only (stop is {rule}); "
                         f"got {risk!r}")
    if rule == "besag-clifford":
        h = DEFAULT_EXCEEDANCES if h is None else h
        if isinstance(h, bool) or not isinstance(h, (int, np.integer)) or h < 1:
            raise InputError(f"`stop_exceedances` must be an integer >= 1; got {h!r}")
        return StopRule(rule, int(h), None, a)
    if rule == "gandy":
        r = DEFAULT_RISK if r is None else r
        # a bound of 1/2 or more is no bound: a coin flip decides with risk 1/2
        return StopRule(rule, None, _check_level("stop_risk", r, 0.5), a)
    return StopRule("none", None, None, a)


def exceedances(null: np.ndarray, observed: np.ndarray) -> np.ndarray:
    """(m, k) bool: relabelling i at least as extreme as the observed statistic of term j.

    Two-sided, |T_pi| >= |T_obs| with ties within a relative ``TIE_TOLERANCE``, and a
    failed (NaN) permuted statistic counts as extreme: the rule of ``pvalues``.
    """
    null = np.asarray(null, dtype=np.float64)
    obs = np.asarray(observed, dtype=np.float64)
    tol = TIE_TOLERANCE * np.abs(obs)
    with np.errstate(invalid="ignore"):
        return (np.abs(null) >= np.abs(obs) - tol) | np.isnan(null)


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
    is the first chunk boundary at or after the last term's stopping point.
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
        self._pending: dict[int, np.ndarray] = {}
        self._next = 0
        self._stored: tuple[np.ndarray, np.ndarray] | None = None

    @property
    def stop_rows(self) -> int | None:
        if not self.tau.size or not (self.tau > 0).all():
            return None
        cs = self.chunk_size
        return min(self.total, -(-int(self.tau.max()) // cs) * cs)

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
        hit = (up | down) & (self.tau == 0)[None, :]
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
    from .engine import iter_chunks

    null = np.empty((draws.total, plan.k))
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


# --------------------------------------------------------------------------- max statistic

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


# --------------------------------------------------------------------------- assessment

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
        if rows < planned and hit.all():
            stopped_by = rule.rule
    adjusted = np.maximum(maxt_adjusted(null, observed, exact=exact), pv.p)
    return Assessment(pv, adjusted, stop_at, verdict, rule, stopped_by, planned, tuple(notes))


# --------------------------------------------------------------------------- many networks

def pair_label(a: str, b: str) -> str:
    """The term name of the correlation of networks ``a`` and ``b``."""
    return f"{a} & {b}"


def copy_blocks(blocks: Blocks, copies: int) -> Blocks:
    """``copies`` independent relabellings as one relabelling of ``copies`` stacked node sets.

    Copy c holds positions c n .. (c + 1) n - 1; every block is repeated per copy, so a
    random draw (or the exact enumeration) of the stacked set gives each copy its own,
    independent relabelling within the same groups.
    """
    n, m = blocks.n_rows, blocks.n_cols
    rows = tuple((s + c * n, e + c * n) for c in range(copies) for s, e in blocks.row_blocks)
    if blocks.col_blocks is None:
        return Blocks(n * copies, n * copies, rows, None)
    cols = tuple((s + c * m, e + c * m) for c in range(copies) for s, e in blocks.col_blocks)
    return Blocks(n * copies, m * copies, rows, cols)


@dataclass(frozen=True, eq=False)
class LayerPlan:
    """Pairwise correlations of K networks, network 0 fixed and networks 1..K-1 each
    relabelled by its own permutation (the K - 1 stacked copies of ``copy_blocks``).

    The pair (i, j) compares pi_i(N_i) with pi_j(N_j) (pi_0 the identity); summing over
    the dyad set, which every relabelling maps onto itself, this equals the correlation of
    N_i with N_j relabelled by sigma = pi_j o pi_i^-1, which the pair's own correlation
    plan computes (N_j read through sigma, N_i in place).
    """

    pair_plans: tuple[Any, ...]
    pairs: tuple[tuple[int, int], ...]
    n: int
    m: int
    two_mode: bool

    @property
    def k(self) -> int:
        return len(self.pairs)

    @property
    def passes(self) -> tuple:
        return tuple(ps for plan in self.pair_plans for ps in plan.passes)

    @property
    def n_dyads(self) -> int:
        return self.pair_plans[0].n_dyads

    def _layer(self, perms: np.ndarray, layer: int, size: int) -> np.ndarray:
        if layer == 0:  # network 0 stays in place
            return np.broadcast_to(np.arange(size, dtype=np.int64), (perms.shape[0], size))
        s = (layer - 1) * size
        return perms[:, s:s + size] - s

    def statistics(self, row_perms: np.ndarray, col_perms: np.ndarray) -> np.ndarray:
        """Correlations (B, pairs) of B stacked relabellings."""
        out = np.empty((row_perms.shape[0], self.k))
        for p, ((i, j), plan) in enumerate(zip(self.pairs, self.pair_plans)):
            sig_r = self._compose(row_perms, i, j, self.n)
            sig_c = self._compose(col_perms, i, j, self.m) if self.two_mode else sig_r
            out[:, p] = plan.statistics(sig_r, sig_c)[:, 0]
        return out

    def _compose(self, perms: np.ndarray, i: int, j: int, size: int) -> np.ndarray:
        pj = self._layer(perms, j, size)
        if i == 0:
            return np.ascontiguousarray(pj, dtype=np.int64)
        inv_i = np.argsort(self._layer(perms, i, size), axis=1)
        # sigma(a) = pi_j(pi_i^-1(a))
        return np.ascontiguousarray(np.take_along_axis(pj, inv_i, axis=1), dtype=np.int64)


def _layer_items(networks: Any) -> list[tuple[str, Any]]:
    if isinstance(networks, Mapping):
        items = [(str(k), v) for k, v in networks.items()]
    elif isinstance(networks, (list, tuple)):
        items = [(network_name(v) or f"network{i + 1}", v)
                 for i, v in enumerate(networks)]
    else:
        raise InputError("correlate: give two networks (a, b), or a list or dict of networks; "
                         f"got one {type(networks).__name__}")
    if len(items) < 2:
        raise InputError(f"correlate: a list or dict needs at least 2 networks; got {len(items)}")
    names = [n for n, _ in items]
    dup = sorted({n for n in names if names.count(n) > 1})
    if dup:
        raise InputError(f"correlate: duplicate network name {dup[0]!r}")
    return items


def correlate_layers(networks: Any, *, method: str = "pearson", permutations: int = 10_000,
                     seed: Any = None, jobs: int = 1, directed: bool | None = None,
                     groups: Any = None, dyads: str | None = None, exact: Any = "auto",
                     chunk_size: int | None = None, out: Any = None,
                     progress: bool | Callable[[int, int], None] = False,
                     storage: str = "float64", backend: str = "threads",
                     scheduler: str | None = None, shard: str | None = None,
                     provenance: dict | None = None, stop: Any = None):
    """Pairwise QAP correlations of several networks, with max-statistic adjusted p-values.

    Called by ``dyadperm.correlate(networks)`` with a list or dict of networks (layers of
    one multilayer network on one node set). Permutation i draws one relabelling for each
    network but the first; every pair's correlation is computed from the same draws. Each
    pair's null is a valid QAP null (the relabelling of one network relative to the other
    is uniform over all relabellings), and together they reproduce the joint null of
    mutually independent networks, which the max-statistic adjustment (Westfall & Young
    1993) needs; relabelling every network by one common permutation would leave every
    correlation unchanged, and relabelling only the second network of each pair by one
    common permutation would not reproduce that joint null.
    """
    from . import api as _api
    from . import design as _design
    from . import store as _store
    from .schemes import build_correlation_plan

    _api._check_common(permutations=permutations, seed=seed, jobs=jobs, exact=exact,
                       chunk_size=chunk_size)
    items = _layer_items(networks)
    names = [n for n, _ in items]
    rule = stop_rule(stop)
    prep = _design.prepare(items[0][1], {n: v for n, v in items[1:]}, directed=directed,
                           groups=groups, dyads=dyads, response_name=names[0])
    K = len(items)
    mats = (prep.matrices[-1],) + tuple(prep.matrices[:-1])  # network order
    pairs = tuple((i, j) for i in range(K) for j in range(i + 1, K))
    plans, n_pair = [], []
    for i, j in pairs:
        pp = replace(prep, names=(names[j],), response_name=names[i],
                     matrices=(mats[j], mats[i]))
        plans.append(build_correlation_plan(pp, method=method, storage=storage))
        ok = prep.mask & ~np.isnan(mats[i]) & ~np.isnan(mats[j])
        n_pair.append(prep.n_dyads if prep.complete else int(np.count_nonzero(ok)))
    n, m = prep.mask.shape
    plan = LayerPlan(tuple(plans), pairs, n, m, prep.two_mode)
    run_prep = replace(prep, blocks=copy_blocks(prep.blocks, K - 1))
    labels = [pair_label(names[i], names[j]) for i, j in pairs]
    settings = dict(kind="layer correlations", model="correlation", scheme="y", statistic="r",
                    method=method, storage=storage, dyads=dyads, layers=json_names(names),
                    groups=None if groups is None else _store.fingerprint(
                        np.asarray(groups).astype(str)))
    summary = _api._summary(prep, kind="layer correlations", model="correlation", scheme="y",
                            statistic="r", method=method, n_dyads=prep.n_dyads, terms=labels)
    summary.update(tested=labels, layers=names, pairs=[list(p) for p in pairs],
                   stop=rule.to_dict())
    return _api.run_to_result(
        run_prep, plan, settings=settings, summary=summary,
        fit_arrays=_api.correlation_fit(plan, run_prep, n_pair), permutations=permutations,
        seed=seed, jobs=jobs, exact=exact, chunk_size=chunk_size, progress=progress, out=out,
        provenance=provenance, shard=shard, backend=backend, scheduler=scheduler)


def json_names(names: Sequence[str]) -> str:
    """Network names as one identity string (their order matters)."""
    return json.dumps(list(names))
