"""Public entry points: :func:`regress` and :func:`correlate`."""

from __future__ import annotations

import json
import warnings
from pathlib import Path
from typing import Any, Callable

import numpy as np

from . import design as _design
from . import precision as _precision
from . import sparse as _sparse
from . import store as _store
from .dyadic import network_name
from .engine import Draws, default_chunk_size, iter_chunks, run_all
from .errors import DyadpermWarning, InputError
from .permutations import EXACT_LIMIT, Blocks
from .result import CorrelationResult, LayerCorrelationResult, RegressionResult
from .schemes import Plan, build_correlation_plan, build_plan, check_options

MODELS = ("linear", "logistic")
BACKENDS = ("threads", "processes", "dask")
# The permutation statistic of the identity relabelling must agree with the classical
# t statistic of the QR fit to this relative tolerance, else the Gram route lost precision.
AGREEMENT = 1e-6


def _check_common(*, permutations: Any, seed: Any, jobs: Any, exact: Any,
                  chunk_size: Any) -> None:
    if isinstance(permutations, bool) or not isinstance(permutations, (int, np.integer)) \
            or permutations < 1:
        raise InputError(f"permutations must be a whole number >= 1; got {permutations!r}")
    if seed is not None and not isinstance(seed, np.random.SeedSequence) and (
            isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0):
        raise InputError(f"seed must be a whole number >= 0, a numpy SeedSequence or None; "
                         f"got {seed!r}")
    if isinstance(jobs, bool) or not isinstance(jobs, (int, np.integer)) or jobs == 0 or jobs < -1:
        raise InputError(f"jobs must be a whole number >= 1, or -1 for all cores; got {jobs!r}")
    if exact not in ("auto", True, False):
        raise InputError(f"exact must be 'auto', True or False; got {exact!r}")
    if chunk_size is not None and (isinstance(chunk_size, bool)
                                   or not isinstance(chunk_size, (int, np.integer))
                                   or chunk_size < 1):
        raise InputError(f"chunk_size must be a whole number >= 1; got {chunk_size!r}")


def _entropy(seed: Any) -> int:
    if isinstance(seed, np.random.SeedSequence):
        if seed.spawn_key:
            raise InputError("seed: give a root SeedSequence (no spawn_key)")
        ent = seed.entropy
    elif seed is None:
        ent = np.random.SeedSequence().entropy
    else:
        ent = int(seed)
    if not isinstance(ent, int):
        raise InputError("seed: SeedSequence entropy must be a single integer")
    return ent


def _draws(blocks: Blocks, *, permutations: int, exact: Any, entropy: int,
           chunk_size: int) -> Draws:
    count = blocks.count()
    if exact is True:
        if count > EXACT_LIMIT:
            raise InputError(f"exact=True: {count:,} relabellings is more than the limit of "
                             f"{EXACT_LIMIT:,}; use random relabellings (exact='auto' or False)")
        use_exact = True
    else:
        use_exact = exact == "auto" and count <= permutations
    total = count if use_exact else int(permutations)
    return Draws(blocks, total, chunk_size, use_exact, entropy)


def input_fingerprints(prep) -> dict:
    """SHA-256 fingerprint of each input network (as prepared), keyed for the run file."""
    return {f"fingerprint:{name}": _store.fingerprint(mat)
            for name, mat in zip(prep.names + (prep.response_name,), prep.matrices)}


def _identity(prep, draws: Draws, settings: dict, fingerprints: dict | None) -> dict:
    """Everything that must agree for a run file to belong to this run.

    ``fingerprints``: the inputs' fingerprints taken before a plan overwrote them in place
    (``overwrite_inputs``); None: take them now.
    """
    ident = dict(settings)
    ident.update(seed=None if draws.exact else str(draws.entropy), exact=draws.exact,
                 chunk_size=draws.chunk_size, directed=prep.directed)
    ident["mask"] = _store.fingerprint(prep.mask)
    ident["relabelling blocks"] = json.dumps(prep.blocks.row_blocks)
    ident.update(input_fingerprints(prep) if fingerprints is None else fingerprints)
    return ident


def _execute(prep, plan: Plan, *, permutations, seed, jobs, exact, chunk_size, progress,
             out, settings: dict, summary: dict, observed_fit: dict, provenance: dict | None,
             shard: str = "", backend: str = "threads", scheduler: str | None = None,
             fingerprints: dict | None = None):
    """Run every missing chunk; return (draws, observed statistic, null or None for a shard).

    With ``out`` the chunks stream to a run file; an existing file of the same run is
    resumed (and grown when more permutations are asked for); one of another run is refused.
    """
    entropy = _entropy(seed)
    cs = int(chunk_size) if chunk_size is not None else default_chunk_size(plan)
    if shard:
        _store.parse_shard(shard)
        if out is None:
            raise InputError("shard: needs out= (each shard writes its own run file)")
    if backend not in BACKENDS:
        raise InputError(f"backend must be one of {', '.join(BACKENDS)}; got {backend!r}")
    if (backend == "dask") != (scheduler is not None):
        raise InputError("backend 'dask' and a scheduler address go together")
    if shard and _precision.StopRule.from_dict(summary.get("stop")).active:
        raise InputError("stop: a stop rule reads the chunks in order; it cannot be combined "
                         f"with shard (got shard {shard!r})")
    n, m = prep.blocks.n_rows, prep.blocks.n_cols
    # the observed statistic goes through the same kernels as the permuted ones
    ident_perm = np.arange(n, dtype=np.int64)[None, :], np.arange(m, dtype=np.int64)[None, :]
    observed = plan.statistics(*ident_perm)[0]
    out = Path(out) if out is not None else None
    if out is not None and out.exists():
        hdr = _store.read_header(out)
        if seed is None and hdr.identity.get("seed") is not None:
            entropy = int(hdr.identity["seed"])  # resuming a run that drew its own seed
        if chunk_size is None:
            cs = hdr.chunk_size
        draws = _draws(prep.blocks, permutations=permutations, exact=exact, entropy=entropy,
                       chunk_size=cs)
        _store.check_same_run(out, hdr, _identity(prep, draws, settings, fingerprints))
        if _precision.StopRule.from_dict(hdr.summary.get("stop")) \
                != _precision.StopRule.from_dict(summary.get("stop")):
            # the stop rule says how the stored statistics are read: keep the file's in step
            _store.replace_summary(out, {**hdr.summary, "stop": summary.get("stop")})
        if draws.total > hdr.permutations:
            _store.grow(out, draws.total)
        elif draws.total < hdr.permutations:
            draws = Draws(draws.blocks, hdr.permutations, cs, draws.exact, draws.entropy)
    else:
        draws = _draws(prep.blocks, permutations=permutations, exact=exact, entropy=entropy,
                       chunk_size=cs)
        if out is not None:
            prov = provenance or {}
            _store.create(out, _store.RunHeader(
                identity=_identity(prep, draws, settings, fingerprints), terms=tuple(summary["terms"]),
                tested=tuple(summary["tested"]), permutations=draws.total,
                chunk_size=draws.chunk_size, exact=draws.exact, shard=shard,
                study_text=prov.get("study_text", ""), study_path=prov.get("study_path", ""),
                summary=summary, observed={**observed_fit, "kernel_stat": observed}))
    tick = _ticker(progress, draws.total)
    # a stop rule (dyadperm.precision) reads the finished prefix at chunk boundaries
    seq = _precision.sequential_for(summary.get("stop"), observed, exact=draws.exact,
                                    chunk_size=draws.chunk_size, total=draws.total)
    if out is None:
        if seq is not None:
            return draws, observed, _precision.run_until(
                seq, plan, draws, jobs=jobs, backend=backend, scheduler=scheduler, tick=tick,
                progress=progress)
        null = run_all(plan, draws, jobs=jobs, backend=backend, scheduler=scheduler,
                       on_chunk=None if tick is None else (lambda c, st: tick(st.shape[0])))
        return draws, observed, null
    if seq is not None:
        _, prior, prior_done = _store.load(out, require_complete=False)
        seq.start_from(prior, prior_done)
        del prior
    with _store.Writer(out) as w:
        done = w.done_chunks()
        todo = _store.missing_chunks(done, shard)
        if seq is not None and seq.stop_rows is not None:
            todo = []
        if tick is not None:
            tick(sum(draws.chunk_rows(c)[1] for c in np.flatnonzero(done)))
        with _precision.closing(iter_chunks(plan, draws, todo, jobs=jobs, backend=backend,
                                            scheduler=scheduler)) as chunks:
            for c, stats in chunks:
                w.write_chunk(c, draws.chunk_rows(c)[0], stats)
                if tick is not None:
                    tick(stats.shape[0])
                if seq is not None and seq.feed(c, stats):
                    _precision.finish_progress(progress, seq)
                    break
    if shard:
        return draws, observed, None
    if seq is None:
        _, null, _ = _store.load(out)
        return draws, observed, null
    _, null, done = _store.load(out, require_complete=False)
    rows = _precision.usable_rows(summary.get("stop"), null, done, observed, exact=draws.exact,
                                  chunk_size=draws.chunk_size, total=draws.total, where=out)
    return draws, observed, null[:rows]


def _ticker(progress, total: int):
    if not progress or not callable(progress):
        return None
    done = [0]

    def tick(rows: int) -> None:
        done[0] += rows
        progress(done[0], total)
    return tick


def regress(y: Any, predictors: Any, *, model: str = "linear", scheme: str = "dsp",
            statistic: str = "t", permutations: int = 10_000, seed: Any = None,
            jobs: int = 1, directed: bool | None = None, groups: Any = None,
            dyads: str | None = None, exact: Any = "auto", chunk_size: int | None = None,
            out: Any = None, progress: bool | Callable[[int, int], None] = False,
            storage: str = "float64", backend: str = "threads", scheduler: str | None = None,
            shard: str | None = None, provenance: dict | None = None,
            stop: Any = None, overwrite_inputs: bool = False) -> RegressionResult:
    """Multiple regression of one network on others with permutation p-values (MRQAP).

    Parameters
    ----------
    y : array (n, n) or (n, m), scipy.sparse, networkx graph, Dyadic or pandas DataFrame
        The response network. NaN marks a missing dyad value. A DataFrame is labelled by
        its index (rows) and columns; square: one-mode (columns the same labels, any order).
    predictors : dict name -> network, or list
        Networks or derived predictors (``dyadperm.same`` ...), in model order. Labelled
        networks (DataFrame, Dyadic) are aligned to the response's nodes by label; plain
        arrays are taken in the response's node order.
    model : {"linear", "logistic"}
        Least squares, or logistic regression of a 0/1 response (see dyadperm.logistic).
    scheme : {"y", "dsp", "freedman-lane"}
        How the null is built (see Notes).
    statistic : {"t", "coef", "score"}
        Pivotal t (default; the Wald z for logistic) or the raw coefficient; "score"
        (logistic only): the signed score statistic under each term's reduced model.
    permutations : int
        Random relabellings (or the cap for exact enumeration under ``exact="auto"``).
    seed : int, SeedSequence or None
        Entropy of the run; the entropy used is returned as ``result.seed``.
    jobs : int
        Worker threads (-1: all cores). Results do not depend on it.
    directed : bool or None
        None: undirected when every input is symmetric.
    groups : array of one label per node, or a pandas Series indexed by node label, optional
        Relabelling stays within groups.
    dyads : {"within", "all"}
        With groups: keep only within-group dyads (default) or every dyad.
    exact : "auto", True or False
        Enumerate all relabellings when there are at most ``permutations`` of them
        ("auto"), always (True; at most 10 million), or never.
    chunk_size : int, optional
        Permutations per unit of work and storage (results do not depend on it).
    out : path, optional
        Run file to write (HDF5).
    progress : bool or callable(done, total)
        Progress callback.
    storage : {"float64", "float32"}
        Precision of the stored layers the kernels read (sums are always float64).
    backend : {"threads", "processes", "dask"}
        Where chunks run; "dask" sends them to the Dask cluster at ``scheduler``.
    shard : str "i/N", optional
        Compute only shard i of N of the chunks into ``out`` (join with merge); returns None.
    stop : {"none", "besag-clifford", "gandy"} or dyadperm.precision.StopRule, optional
        Sequential stopping rule, applied at chunk boundaries to the finished prefix in
        permutation order (same seed and chunk size, same stopping point, whatever
        ``jobs``); a name takes the rule's defaults (see dyadperm.precision).
    overwrite_inputs : bool
        Allow the engine to standardise the input arrays in place instead of copying them
        into its layer stack, which halves the memory of a large dense study. Used only
        when the networks are the layers of one C-ordered float64 array in the engine's
        layout -- ``(n, m, k + 1)`` holding the predictors then the response for dsp and
        freedman-lane, or ``(n, m, 1)`` for the response and ``(n, m, k)`` for the
        predictors for y -- with complete or missing data, linear model, float64 storage
        and no reordering for groups; otherwise the inputs are copied as usual. After the
        run those arrays hold the engine's layers, not the data. Study files whose networks
        are all dense files load into such an array (``dyadperm.study``).

    Returns
    -------
    RegressionResult

    Notes
    -----
    Schemes: Y-permutation (Krackhardt 1988, Social Networks 10:359–381), double
    semi-partialling (Dekker, Krackhardt & Snijders 2007, Psychometrika 72:563–581) and
    Freedman & Lane (1983, J. Bus. Econ. Stat. 1:292–298). p-values follow Phipson &
    Smyth (2010): (b + 1) / (m + 1) for random relabellings.
    """
    rule = _precision.stop_rule(stop)
    if model == "logistic":  # binary response: Newton refits or score statistics
        from . import logistic as _logistic
        _no_stop_rule(rule, "model 'logistic'")
        return _logistic.regress(
            y, predictors, scheme=scheme, statistic=statistic, permutations=permutations,
            seed=seed, jobs=jobs, directed=directed, groups=groups, dyads=dyads, exact=exact,
            chunk_size=chunk_size, out=out, progress=progress, storage=storage,
            backend=backend, scheduler=scheduler, shard=shard, provenance=provenance)
    if _sparse.takes(y, predictors, scheme=scheme):  # sparse response, sparse/derived predictors
        _no_stop_rule(rule, "the sparse path")
        return _sparse.regress(y, predictors, **_sparse_args(locals()))
    _check_common(permutations=permutations, seed=seed, jobs=jobs, exact=exact,
                  chunk_size=chunk_size)
    if model not in MODELS:
        raise InputError(f"model must be one of {', '.join(MODELS)}; got {model!r}")
    check_options(scheme=scheme, statistic=statistic, storage=storage)
    prep = _design.prepare(y, predictors, directed=directed, groups=groups, dyads=dyads)
    fit = _design.observed_fit(prep)
    # a plan that overwrites the inputs needs their fingerprints first
    fingerprints = input_fingerprints(prep) if overwrite_inputs else None
    plan = build_plan(prep, scheme=scheme, statistic=statistic, storage=storage,
                      overwrite=bool(overwrite_inputs))
    settings = dict(kind="regression", model=model, scheme=scheme, statistic=statistic,
                    method=None, storage=storage, dyads=dyads,
                    groups=None if groups is None else _store.fingerprint(np.asarray(groups).astype(str)))
    summary = _summary(prep, kind="regression", model=model, scheme=scheme,
                       statistic=statistic, method=None, n_dyads=fit.n_dyads,
                       terms=("intercept",) + prep.names)
    summary["stop"] = rule.to_dict()
    fit_arrays = dict(coef=fit.coef, se=fit.se, stat=fit.t if statistic == "t" else fit.coef,
                      fit=np.array([fit.r2, np.nan]))
    return run_to_result(
        prep, plan, settings=settings, summary=summary, fit_arrays=fit_arrays,
        agree_with=fit.t[1:] if statistic == "t" else None, permutations=permutations,
        seed=seed, jobs=jobs, exact=exact, chunk_size=chunk_size, progress=progress, out=out,
        provenance=provenance, shard=shard, backend=backend, scheduler=scheduler,
        fingerprints=fingerprints)


def run_to_result(prep, plan: Plan, *, settings: dict, summary: dict, fit_arrays: dict,
                  agree_with: np.ndarray | None = None, shard: str | None = None, **run):
    """Run the relabellings of a prepared plan and build its result (None for a shard).

    ``agree_with``: the classical t statistics the kernels' observed statistics must match
    (a warning names the term where near-collinearity cost them precision).
    """
    draws, observed, null = _execute(prep, plan, settings=settings, summary=summary,
                                     observed_fit=fit_arrays, shard=shard or "", **run)
    if null is None:
        return None
    if agree_with is not None:
        _check_agreement(observed, agree_with, prep.names)
    return build_result(summary, {**fit_arrays, "kernel_stat": observed}, null,
                        exact=draws.exact, chunk_size=draws.chunk_size,
                        seed=None if draws.exact else draws.entropy, planned=draws.total)


def correlation_fit(plan: Plan, prep, n_dyads: Any) -> dict:
    """Observed correlations (through the kernels, as the identity relabelling) and their
    classical standard errors sqrt((1 - r^2) / (N - 2))."""
    ident = (np.arange(prep.blocks.n_rows, dtype=np.int64)[None, :],
             np.arange(prep.blocks.n_cols, dtype=np.int64)[None, :])
    r = plan.statistics(*ident)[0]
    with np.errstate(divide="ignore", invalid="ignore"):
        se = np.sqrt((1 - r ** 2) / (np.asarray(n_dyads, dtype=np.float64) - 2))
    return dict(coef=r, se=se, stat=r, fit=np.array([np.nan, np.nan]))


def _no_stop_rule(rule, where: str) -> None:
    if rule.active:
        raise InputError(f"stop: stop rules are not available on {where} yet; use "
                         f"stop='none' (got {rule.rule!r})")


def _summary(prep, *, kind, model, scheme, statistic, method, n_dyads, terms) -> dict:
    n, m = prep.mask.shape
    return dict(kind=kind, model=model, scheme=scheme, statistic=statistic, method=method,
                terms=list(terms), tested=list(prep.names), response=prep.response_name,
                n_nodes=n + m if prep.two_mode else n, n_dyads=int(n_dyads),
                directed=prep.directed, two_mode=prep.two_mode, notes=[])


def build_result(summary: dict, observed: dict, null: Any, *, exact: bool, chunk_size: int,
                 seed: int | None, planned: int | None = None):
    """The result object from what a run stores: used by live runs and by open_result.

    ``null`` holds the rows the run uses (a stopped run: up to its stopping point);
    ``planned`` is the total the run was planned with (default: those rows).
    """
    st = _precision.assess(np.asarray(null),
                           np.asarray(observed["kernel_stat"], dtype=np.float64),
                           exact=exact, stop=summary.get("stop"), planned=planned)
    pv = st.pv
    tested = dict(p_adjusted=st.p_adjusted, stop_at=st.stop_at, stop_verdict=st.verdict)
    common = dict(
        terms=tuple(summary["terms"]), se=np.asarray(observed["se"], dtype=np.float64),
        stat=np.asarray(observed["stat"], dtype=np.float64),
        null=null, permutations=int(np.shape(null)[0]), exact=bool(exact),
        n_nodes=int(summary["n_nodes"]), n_dyads=int(summary["n_dyads"]),
        scheme=summary["scheme"], model=summary["model"], statistic=summary["statistic"],
        seed=seed, directed=bool(summary["directed"]), two_mode=bool(summary["two_mode"]),
        response=summary["response"], exceed=pv.exceed, failed=pv.failed,
        chunk_size=int(chunk_size), notes=tuple(summary.get("notes", ())) + st.notes,
        alpha=st.rule.alpha, stop=st.rule.to_dict(), stopped_by=st.stopped_by,
        planned=st.planned)
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
    nan1 = np.full(1, np.nan)
    fitv = np.asarray(observed["fit"], dtype=np.float64)
    return RegressionResult(
        p_adjusted=np.concatenate([nan1, st.p_adjusted]),
        stop_at=np.concatenate([nan1, st.stop_at]), stop_verdict=("",) + st.verdict,
        p=np.concatenate([nan1, pv.p]), p_greater=np.concatenate([nan1, pv.p_greater]),
        p_less=np.concatenate([nan1, pv.p_less]), p_se=np.concatenate([nan1, pv.p_se]),
        p_interval=np.concatenate([np.full((1, 2), np.nan), pv.p_interval]),
        coef=np.asarray(observed["coef"], dtype=np.float64), r2=float(fitv[0]),
        deviance=float(fitv[1]), **common)


def open_result(path: Any):
    """Read a finished (or stopped) run file back into its result object (null
    memory-mapped)."""
    hdr, null, done = _store.load(path, require_complete=False)
    rows = _precision.usable_rows(hdr.summary.get("stop"), null, done,
                                  hdr.observed["kernel_stat"], exact=hdr.exact,
                                  chunk_size=hdr.chunk_size, total=hdr.permutations, where=path)
    ident = hdr.identity
    seed = None if hdr.exact or ident.get("seed") is None else int(ident["seed"])
    return build_result(hdr.summary, hdr.observed, null[:rows], exact=hdr.exact,
                        chunk_size=hdr.chunk_size, seed=seed, planned=hdr.permutations)


def _check_agreement(kernel_t: np.ndarray, qr_t: np.ndarray, names) -> None:
    with np.errstate(invalid="ignore"):
        gap = np.abs(kernel_t - qr_t) / np.maximum(1.0, np.abs(qr_t))
    if np.any(~(gap <= AGREEMENT)):
        j = int(np.nanargmax(np.where(np.isnan(gap), np.inf, gap)))
        warnings.warn(f"permutation statistics lose precision for {names[j]!r}: its t is "
                      f"{qr_t[j]:.10g} by QR but {kernel_t[j]:.10g} through the permutation "
                      "kernels (near-collinear predictors); treat its p-value with caution",
                      DyadpermWarning, stacklevel=3)


def correlate(a: Any, b: Any = None, *, method: str = "pearson", permutations: int = 10_000,
              seed: Any = None, jobs: int = 1, directed: bool | None = None,
              groups: Any = None, dyads: str | None = None, exact: Any = "auto",
              chunk_size: int | None = None, out: Any = None,
              progress: bool | Callable[[int, int], None] = False,
              storage: str = "float64", backend: str = "threads", scheduler: str | None = None,
            shard: str | None = None, provenance: dict | None = None,
            stop: Any = None, overwrite_inputs: bool = False) -> CorrelationResult:
    """QAP correlation of two networks (the Mantel test for matrices).

    Pearson r (or Spearman's, on average ranks of the dyad values) over the dyad set, with
    p-values from relabelling ``b`` (Mantel 1967, Cancer Research 27:209–220; Hubert &
    Schultz 1976; Krackhardt 1987). Only the cross product changes per relabelling.
    Other parameters as in :func:`regress` (``overwrite_inputs``: Pearson on two networks
    that are each the single layer of an ``(n, m, 1)`` float64 array). Caution: partial
    Mantel tests are not offered; see the README on when they fail.

    Given several networks instead (``correlate([a, b, c])`` or a dict name -> network),
    returns a LayerCorrelationResult: every pairwise correlation from shared
    relabellings, one relabelling per network but the first, with familywise adjusted
    p-values (``p_adjusted``; see dyadperm.precision.correlate_layers).
    """
    if b is None:  # several networks: the matrix of pairwise correlations
        return _precision.correlate_layers(
            a, **{k: v for k, v in locals().items() if k not in ("a", "b", "overwrite_inputs")})
    rule = _precision.stop_rule(stop)
    if _sparse.takes(a, b):  # sparse first network, sparse or derived second
        _no_stop_rule(rule, "the sparse path")
        return _sparse.correlate(a, b, **_sparse_args(locals()))
    _check_common(permutations=permutations, seed=seed, jobs=jobs, exact=exact,
                  chunk_size=chunk_size)
    bname = network_name(b) or "b"
    prep = _design.prepare(a, {bname: b}, directed=directed, groups=groups, dyads=dyads,
                           response_name=network_name(a) or "a")
    n_dy = prep.n_dyads if prep.complete else int(_count_complete(prep))
    # a plan that overwrites the inputs needs their fingerprints first
    fingerprints = input_fingerprints(prep) if overwrite_inputs else None
    plan = build_correlation_plan(prep, method=method, storage=storage,
                                  overwrite=bool(overwrite_inputs))
    settings = dict(kind="correlation", model="correlation", scheme="y", statistic="r",
                    method=method, storage=storage, dyads=dyads,
                    groups=None if groups is None else _store.fingerprint(np.asarray(groups).astype(str)))
    summary = _summary(prep, kind="correlation", model="correlation", scheme="y",
                       statistic="r", method=method, n_dyads=n_dy, terms=prep.names)
    summary["stop"] = rule.to_dict()
    return run_to_result(
        prep, plan, settings=settings, summary=summary,
        fit_arrays=correlation_fit(plan, prep, n_dy), permutations=permutations, seed=seed,
        jobs=jobs, exact=exact, chunk_size=chunk_size, progress=progress, out=out,
        provenance=provenance, shard=shard, backend=backend, scheduler=scheduler,
        fingerprints=fingerprints)


def _sparse_args(args: dict) -> dict:
    """The keyword arguments of regress/correlate, for the sparse path."""
    return {k: v for k, v in args.items()
            if k not in ("y", "predictors", "a", "b", "stop", "rule", "overwrite_inputs")}


def _count_complete(prep) -> int:
    total = 0
    for block in _design.iter_dyad_rows(prep, prep.matrices):
        total += int((~np.isnan(block).any(axis=1)).sum())
    return total
