"""The one orchestrator between a plan and a result.

Every route hands :func:`run` a :class:`dyadperm.routes.plan.Plan`; everything that makes
a run a run happens here, the same way for every route:

- the relabellings: random draws with one stream per permutation, or the full enumeration
  (``permutations``), cut into chunks;
- the workers: threads, processes or a Dask cluster (``engine``);
- the run file: created with the run's identity, streamed to chunk by chunk, resumed after
  a kill, grown to more permutations, computed in shards and merged (``store``);
- the stop rule, read on the finished prefix of chunks (``stopping``);
- the observed statistic, through the plan's own kernels (the identity relabelling),
  checked against the route's fit;
- p-values, their Monte Carlo error and interval, the familywise adjustment, and the
  result object (``dyadperm.output.result``); :func:`open_result` builds the same result
  from a run file.
"""

from __future__ import annotations

import dataclasses
import warnings
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import DyadpermWarning, InputError
from ..output.result import (CorrelationResult, LayerCorrelationResult, RegressionResult,
                             statistic_label)
from ..settings import EXACT_LIMIT, RunOptions, StopRule, entropy_of
from ..routes.plan import LazyIdentity
from . import intervals, store
from .engine import Draws, iter_chunks, run_all, workers_used
from .stopping import (assess, closing, finish_progress, run_until, sequential_for,
                       usable_rows)

# The permutation statistic of the identity relabelling must agree with the route's own
# observed statistic (the classical t of the QR fit, the logistic fit's z) to this
# relative tolerance, else the permutation kernels lost precision (near-collinearity).
AGREEMENT = 1e-6


def draws_for(plan: Any, opts: RunOptions, *, entropy: int, chunk_size: int) -> Draws:
    """Which relabellings a run uses: all of them when there are few enough (``exact``)."""
    count = plan.blocks.count()
    if opts.exact is True:
        if count > EXACT_LIMIT:
            raise InputError(f"exact=True: {count:,} relabellings is more than the limit of "
                             f"{EXACT_LIMIT:,}; use random relabellings (exact='auto' or False)")
        use_exact = True
    else:
        use_exact = opts.exact == "auto" and count <= opts.permutations
    total = count if use_exact else int(opts.permutations)
    return Draws(plan.blocks, total, chunk_size, use_exact, entropy)


def identity(plan: Any, draws: Draws) -> dict:
    """Everything that must agree for a run file to belong to this run."""
    ident = dict(plan.identity)
    ident.update(seed=None if draws.exact else str(draws.entropy), exact=draws.exact,
                 chunk_size=draws.chunk_size)
    return ident


def _ticker(progress: Any, total: int):
    if not progress or not callable(progress):
        return None
    done = [0]

    def tick(rows: int) -> None:
        done[0] += rows
        progress(done[0], total)
    return tick


def execute(plan: Any, opts: RunOptions) -> tuple[Draws, np.ndarray, np.ndarray | None]:
    """Run every missing chunk; return (draws, observed row, null or None for a shard).

    With ``opts.out`` the chunks stream to a run file; an existing file of the same run is
    resumed (and grown when more permutations are asked for); one of another run is refused.
    """
    entropy = entropy_of(opts.seed)
    cs = opts.chunk_size if opts.chunk_size is not None else plan.chunk_size
    summary = {**plan.summary, "stop": opts.stop.to_dict()}
    # the observed statistic goes through the same kernels as the permuted ones
    row = plan.observed()
    observed = row[:plan.k]
    out = Path(opts.out) if opts.out is not None else None
    if out is not None and out.exists():
        hdr = store.read_header(out)
        if opts.seed is None and hdr.identity.get("seed") is not None:
            entropy = int(hdr.identity["seed"])  # resuming a run that drew its own seed
        if opts.chunk_size is None:
            cs = hdr.chunk_size
        draws = draws_for(plan, opts, entropy=entropy, chunk_size=cs)
        store.check_same_run(out, hdr, identity(plan, draws))
        if StopRule.from_dict(hdr.summary.get("stop")) != opts.stop:
            # the stop rule says how the stored statistics are read: keep the file's in step
            store.replace_summary(out, {**hdr.summary, "stop": summary["stop"]})
        if draws.total > hdr.permutations:
            store.grow(out, draws.total)
        elif draws.total < hdr.permutations:
            draws = Draws(draws.blocks, hdr.permutations, cs, draws.exact, draws.entropy)
    else:
        draws = draws_for(plan, opts, entropy=entropy, chunk_size=cs)
        if out is not None:
            prov = opts.provenance or {}
            store.create(out, store.RunHeader(
                identity=identity(plan, draws), terms=tuple(summary["terms"]),
                tested=tuple(summary["tested"]), permutations=draws.total,
                chunk_size=draws.chunk_size, exact=draws.exact, shard=opts.shard,
                study_text=prov.get("study_text", ""), study_path=prov.get("study_path", ""),
                summary=summary, observed=observed_arrays(plan, row), extra=plan.extra))
    if out is None and isinstance(plan.identity, LazyIdentity):
        # no run file: the identity is never read, and the plan the workers get (pickled
        # for processes and Dask) must not carry the inputs it would be made from
        plan = dataclasses.replace(plan, identity={})
    tick = _ticker(opts.progress, draws.total)
    where = dict(jobs=opts.jobs, backend=opts.backend, scheduler=opts.scheduler)
    # a stop rule reads the finished prefix at chunk boundaries
    seq = sequential_for(opts.stop, observed, exact=draws.exact, chunk_size=draws.chunk_size,
                         total=draws.total)
    if out is None:
        if seq is not None:
            return draws, row, run_until(seq, plan, draws, tick=tick,
                                              progress=opts.progress, **where)
        null = run_all(plan, draws, **where,
                       on_chunk=None if tick is None else (lambda c, st: tick(st.shape[0])))
        return draws, row, null
    if seq is not None:
        _, prior, prior_done = store.load(out, require_complete=False)
        seq.start_from(prior, prior_done)
        del prior
    with store.Writer(out) as w:
        done = w.done_chunks()
        todo = store.missing_chunks(done, opts.shard)
        if seq is not None and seq.stop_rows is not None:
            todo = []
        if tick is not None:
            tick(sum(draws.chunk_rows(c)[1] for c in np.flatnonzero(done)))
        with closing(iter_chunks(plan, draws, todo, **where)) as chunks:
            for c, stats in chunks:
                w.write_chunk(c, draws.chunk_rows(c)[0], stats)
                if tick is not None:
                    tick(stats.shape[0])
                if seq is not None and seq.feed(c, stats):
                    finish_progress(opts.progress, seq)
                    break
    if opts.shard:
        return draws, row, None
    if seq is None:
        _, null, _ = store.load(out)
        return draws, row, null
    _, null, done = store.load(out, require_complete=False)
    rows = usable_rows(opts.stop, null, done, observed, exact=draws.exact,
                       chunk_size=draws.chunk_size, total=draws.total, where=out)
    return draws, row, null[:rows]


def observed_arrays(plan: Any, row: np.ndarray) -> dict:
    """What a result (and a run file) keeps of the observed data: the route's fit, the
    kernels' observed statistics and, when the plan has them, its extra numbers."""
    out = {**plan.fit, "kernel_stat": row[:plan.k]}
    if plan.extra:
        out["kernel_extra"] = row[plan.k:]
    return out


def run(plan: Any, opts: RunOptions):
    """Run the relabellings of a plan and build its result (None for a shard)."""
    draws, row, null = execute(plan, opts)
    if null is None:
        return None
    if plan.expected is not None:
        check_agreement(row[:plan.k], plan.expected, plan.summary)
    summary = {**plan.summary, "stop": opts.stop.to_dict()}
    return build_result(summary, observed_arrays(plan, row), null,
                        exact=draws.exact, chunk_size=draws.chunk_size,
                        seed=None if draws.exact else draws.entropy, planned=draws.total,
                        workers=workers_used(opts.jobs, opts.backend, draws.n_chunks))


def check_agreement(kernel: np.ndarray, expected: np.ndarray, summary: dict) -> None:
    """Warn, naming the term, when the kernels' observed statistic is not the route's own.

    A term whose kernel statistic is not finite is left to ``missing_statistic_note``: it
    has no p-value at all, rather than one to treat with caution.
    """
    with np.errstate(invalid="ignore"):
        gap = np.abs(kernel - expected) / np.maximum(1.0, np.abs(expected))
    gap = np.where(np.isfinite(kernel), gap, 0.0)
    if np.any(~(gap <= AGREEMENT)):
        j = int(np.nanargmax(np.where(np.isnan(gap), np.inf, gap)))
        name = summary["tested"][j]
        label = statistic_label(summary["model"], summary["statistic"])
        warnings.warn(f"permutation statistics lose precision for {name!r}: its {label} is "
                      f"{expected[j]:.10g} from the fit but {kernel[j]:.10g} through the "
                      "permutation kernels (near-collinear predictors); treat its p-value "
                      "with caution", DyadpermWarning, stacklevel=4)


def missing_statistic_note(summary: dict, kernel: np.ndarray) -> tuple[str, ...]:
    """The note under the table for tested terms whose observed statistic is not finite."""
    bad = [(name, float(v)) for name, v in zip(summary["tested"], np.asarray(kernel))
           if not np.isfinite(v)]
    if not bad:
        return ()
    label = statistic_label(summary["model"], summary["statistic"])
    which = ", ".join(f"{name!r} ({v})" for name, v in bad)
    return (f"no p-value for {which}: its observed {label} through the permutation kernels "
            "is not finite (its fit on the observed data failed there, or is exact), so "
            "there is nothing to compare the relabellings with; the adjusted p-values of "
            "the other terms are over the terms that have a statistic",)


def build_result(summary: dict, observed: dict, null: Any, *, exact: bool, chunk_size: int,
                 seed: int | None, planned: int | None = None, workers: int | None = None):
    """The result object from what a run stores: used by live runs and by open_result.

    ``null`` holds the rows the run uses (a stopped run: up to its stopping point), the
    statistics of the tested terms first, then any extra numbers of the route;
    ``planned`` is the total the run was planned with (default: those rows).
    """
    k = len(summary["tested"])
    rows, null = null, null[:, :k]
    kernel = np.asarray(observed["kernel_stat"], dtype=np.float64)
    st = assess(np.asarray(null), kernel, exact=exact, stop=summary.get("stop"),
                planned=planned)
    pv = st.pv
    tested = dict(p_adjusted=st.p_adjusted, stop_at=st.stop_at, stop_verdict=st.verdict)
    common = dict(
        terms=tuple(summary["terms"]), se=np.asarray(observed["se"], dtype=np.float64),
        stat=np.asarray(observed["stat"], dtype=np.float64),
        null=null, permutations=int(np.shape(null)[0]), exact=bool(exact),
        n_nodes=int(summary["n_nodes"]), n_dyads=int(summary["n_dyads"]),
        scheme=summary["scheme"], model=summary["model"],
        statistic=statistic_label(summary["model"], summary["statistic"]),
        seed=seed, directed=bool(summary["directed"]), two_mode=bool(summary["two_mode"]),
        response=summary["response"], exceed=pv.exceed, failed=pv.failed,
        chunk_size=int(chunk_size),
        notes=tuple(summary.get("notes", ())) + st.notes + missing_statistic_note(summary, kernel),
        alpha=st.rule.alpha, stop=st.rule.to_dict(), stopped_by=st.stopped_by,
        planned=st.planned, workers=workers, observed=kernel)
    if summary["kind"] == "correlation":
        return CorrelationResult(p=pv.p, p_greater=pv.p_greater, p_less=pv.p_less,
                                 p_se=pv.p_se, p_interval=pv.p_interval,
                                 r=np.asarray(observed["coef"], dtype=np.float64),
                                 method=summary["method"], **tested, **common)
    if summary["kind"] == "layer correlations":
        return LayerCorrelationResult(
            p=pv.p, p_greater=pv.p_greater, p_less=pv.p_less, p_se=pv.p_se,
            p_interval=pv.p_interval, r=np.asarray(observed["coef"], dtype=np.float64),
            method=summary["method"], layers=tuple(summary["layers"]),
            pairs=tuple((int(i), int(j)) for i, j in summary["pairs"]), **tested, **common)
    # the untested leading terms: the intercept (panels: one intercept per wave)
    nan1 = np.full(len(summary["terms"]) - k, np.nan)
    fitv = np.asarray(observed["fit"], dtype=np.float64)
    spec = summary.get("interval")
    ci = {}
    if spec:
        low, high, mc, ci_notes = intervals.for_terms(
            spec, np.asarray(rows)[:, k:], observed.get("kernel_extra"),
            list(summary["tested"]), exact=exact)
        ci = dict(ci_low=np.concatenate([nan1, low]), ci_high=np.concatenate([nan1, high]),
                  ci_mc_se=np.concatenate([np.full((nan1.size, 2), np.nan), mc]),
                  ci_level=float(spec["level"]))
        common["notes"] = common["notes"] + tuple(ci_notes)
    return RegressionResult(**ci,
        p_adjusted=np.concatenate([nan1, st.p_adjusted]),
        stop_at=np.concatenate([nan1, st.stop_at]), stop_verdict=("",) * nan1.size + st.verdict,
        p=np.concatenate([nan1, pv.p]), p_greater=np.concatenate([nan1, pv.p_greater]),
        p_less=np.concatenate([nan1, pv.p_less]), p_se=np.concatenate([nan1, pv.p_se]),
        p_interval=np.concatenate([np.full((nan1.size, 2), np.nan), pv.p_interval]),
        coef=np.asarray(observed["coef"], dtype=np.float64), r2=float(fitv[0]),
        deviance=float(fitv[1]), fixed_terms=int(nan1.size), **common)


def open_result(path: Any):
    """Read a finished (or stopped) run file back into its result object (null
    memory-mapped)."""
    hdr, null, done = store.load(path, require_complete=False)
    rows = usable_rows(hdr.summary.get("stop"), null, done, hdr.observed["kernel_stat"],
                       exact=hdr.exact, chunk_size=hdr.chunk_size, total=hdr.permutations,
                       where=path)
    ident = hdr.identity
    seed = None if hdr.exact or ident.get("seed") is None else int(ident["seed"])
    return build_result(hdr.summary, hdr.observed, null[:rows], exact=hdr.exact,
                        chunk_size=hdr.chunk_size, seed=seed, planned=hdr.permutations)
