"""Planning a run: how many relabellings a precision needs, and how long they take here.

Precision d is the Monte Carlo standard error of the p-value at p = alpha, and
:func:`permutations_needed` gives m = ceil(alpha (1 - alpha) / d^2) relabellings
(methods.md; alpha 0.05, d 0.002 -> 11,875): the smallest m whose binomial standard error
sqrt(alpha (1 - alpha) / m) is at most d. The standard error a result reports,
sqrt(p (1 - p) / (m + 1)) (``dyadperm.pipeline.pvalues.mc_standard_error``: the p-value
(b + 1) / (m + 1) counts m + 1 outcomes), is smaller still, so at p = alpha it is at most d
(strictly below it). One relabelling fewer would also keep the reported error at most d
(at 11,874 it equals 0.002 exactly): the plan errs by one relabelling on the safe side.
:func:`plan_study` times a short run of the actual study on this machine and scales it up.
"""

from __future__ import annotations

import math
import time
import warnings
from dataclasses import dataclass
from fractions import Fraction
from typing import Any

import joblib
import numpy as np

from .errors import DyadpermWarning, InputError
from .pipeline.pvalues import mc_standard_error
from .pipeline.stopping import _CANCELLED
from .settings import check_level
from .study import Study, load_study


def _decimal(x: float) -> Fraction:
    """The decimal a user wrote (0.05, not the nearest binary float 0.05000000000000000277)."""
    return Fraction(repr(float(x)))


def permutations_needed(precision: float, alpha: float = 0.05) -> int:
    """Random relabellings for Monte Carlo standard error ``precision`` at p = ``alpha``.

    m = ceil(alpha (1 - alpha) / precision^2) (methods.md), so the Monte Carlo standard
    error a run of m relabellings reports at p = alpha, sqrt(alpha (1 - alpha) / (m + 1)),
    is at most ``precision`` (module docstring: m - 1 would still meet it, m - 2 not). The
    numbers are taken as the decimals written, so 0.05 and 0.002 give exactly 11,875.
    """
    d = check_level("precision", precision, 0.5)
    a = check_level("alpha", alpha)
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
        se = float(mc_standard_error(self.alpha, self.permutations))
        lines = [f"plan for {self.study}",
                 f"  Monte Carlo precision {self.precision:g} at alpha {self.alpha:g}: "
                 f"{self.permutations:,} random relabellings "
                 f"(ceil(alpha (1 - alpha) / precision^2))",
                 f"  a run of them reports the Monte Carlo s.e. sqrt(p (1 - p) / (m + 1)): "
                 f"{se:.6g} at p = alpha, within the precision asked"]
        if self.exact:
            lines.append(f"  only {self.relabellings:,} distinct relabellings exist: the run "
                         "enumerates them all (exact p-values, no Monte Carlo error)")
        lines.append(f"  timing run: {self.timed_permutations:,} relabellings in "
                     f"{self.timed_seconds:.2f} s with {self.workers} worker(s) "
                     f"({_rate(self.rate)} relabellings/s over its last round of chunks)")
        lines.append(f"  expected time for {self.run_permutations:,} relabellings: "
                     f"{_duration(self.seconds)} with {self.workers} worker(s) "
                     f"(this machine has {self.machine_cores} cores)")
        lines.append(f"  set it with: permutations = {self.run_permutations} in [test], or "
                     f"--permutations {self.run_permutations}")
        return "\n".join(lines)


def _rate(rate: float) -> str:
    """A rate with three significant figures (8.33, 175, 1,234)."""
    return f"{rate:,.0f}" if rate >= 100 else f"{rate:.3g}"


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
    The timing run is the study itself, as ``Study.run`` calls the engine (``Study.
    _engine``: the file's model, storage, intervals and layers loaded in place), with
    random relabellings, no run file and no stop rule: a one-chunk run first loads the
    compiled kernels, then a run with ``jobs`` workers is timed by its progress callback
    and ended once ``budget`` seconds have passed after its first chunk (or when it is
    done). Expected time = the timing run's time to its last finished chunk (reading the
    inputs, the observed fit and the first chunks included) + the remaining relabellings
    at the rate of its last round of chunks (``steady_rate``).
    """
    st = study if isinstance(study, Study) else load_study(study)
    t = st.spec["test"]
    a = t["alpha"] if alpha is None else check_level("alpha", alpha)
    need = permutations_needed(precision, a)
    if isinstance(jobs, bool) or not isinstance(jobs, (int, np.integer)) or jobs == 0 or jobs < -1:
        raise InputError(f"`jobs` must be an integer >= 1 or -1; got {jobs!r}")
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
    first_t = marks[0][0] - t0
    rate = steady_rate(marks, workers) if len(marks) > 1 else done / max(end - t0, 1e-9)
    if done >= run_perms:  # the whole run fitted in the budget: its time is the answer
        seconds = end - t0
    else:  # the time so far, then the rest at the steady rate
        seconds = marks[-1][0] - t0 + (run_perms - done) / rate
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


def steady_rate(marks: list[tuple[float, int]], workers: int) -> float:
    """Relabellings a second over the last ``workers`` chunks of a run's progress marks
    (time, relabellings done), never counting the first chunk (it carries the setup).

    Workers that started together finish their chunks together, so marks come in bursts
    of up to ``workers`` at nearly one instant; from one mark to the mark ``workers``
    later, each worker has finished one chunk whatever the burst, where two marks of one
    burst would span no time at all. With fewer marks than that, from the second mark
    (from the first when there are only two). ``marks``: at least two, in order.
    """
    last = len(marks) - 1
    k = max(last - workers, min(1, last - 1))  # with few marks: from the second (or first)
    (ta, da), (tb, db) = marks[k], marks[-1]
    return (db - da) / max(tb - ta, 1e-9)


def _run_study_quietly(st: Any, *, permutations: int, jobs: int, progress: Any) -> Any:
    """The study's own engine call (``Study._engine``, what ``Study.run`` calls: the same
    model, storage, intervals and in-place layers) without a run file or stop rule."""
    t = st.spec["test"]
    common = dict(permutations=permutations, seed=0, jobs=jobs,
                  directed=st.spec["study"]["directed"], groups=st.groups, dyads=t["dyads"],
                  exact=False, chunk_size=t["chunk_size"], out=None, progress=progress)
    with warnings.catch_warnings():
        # the study's own warnings (collinearity ...) belong to its run, not to its timing
        warnings.simplefilter("ignore", category=DyadpermWarning)
        return st._engine(common)
