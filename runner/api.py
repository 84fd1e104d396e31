"""Public entry points: :func:`regress` and :func:`correlate`."""

from __future__ import annotations

import warnings
from typing import Any, Callable

import numpy as np

from . import design as _design
from .engine import Draws, default_chunk_size, run_all
from .errors import DyadpermWarning, InputError
from .permutations import EXACT_LIMIT, Blocks
from .pvalues import pvalues
from .result import CorrelationResult, RegressionResult
from .schemes import SCHEMES, STATISTICS, Plan, build_correlation_plan, build_plan

MODELS = ("linear",)
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


def _run(prep, plan: Plan, *, permutations, seed, jobs, exact, chunk_size, progress,
         backend: str = "threads"):
    entropy = _entropy(seed)
    cs = int(chunk_size) if chunk_size is not None else default_chunk_size(plan)
    draws = _draws(prep.blocks, permutations=permutations, exact=exact, entropy=entropy,
                   chunk_size=cs)
    # the observed statistic goes through the same kernels as the permuted ones
    n, m = prep.mask.shape
    ident = np.arange(n, dtype=np.int64)[None, :], np.arange(m, dtype=np.int64)[None, :]
    observed = plan.statistics(*ident)[0]
    on_chunk = None
    if progress:
        done = [0]

        def on_chunk(c: int, stats: np.ndarray) -> None:
            done[0] += stats.shape[0]
            progress(done[0], draws.total) if callable(progress) else None
    null = run_all(plan, draws, jobs=jobs, backend=backend, on_chunk=on_chunk)
    return draws, observed, null


def regress(y: Any, predictors: Any, *, model: str = "linear", scheme: str = "dsp",
            statistic: str = "t", permutations: int = 10_000, seed: Any = None,
            jobs: int = 1, directed: bool | None = None, groups: Any = None,
            dyads: str | None = None, exact: Any = "auto", chunk_size: int | None = None,
            out: Any = None, progress: bool | Callable[[int, int], None] = False,
            storage: str = "float64", provenance: dict | None = None) -> RegressionResult:
    """Multiple regression of one network on others with permutation p-values (MRQAP).

    Parameters
    ----------
    y : array (n, n) or (n, m), scipy.sparse, networkx graph or Dyadic
        The response network. NaN marks a missing dyad value.
    predictors : dict name -> network, or list
        Networks or derived predictors (``dyadperm.same`` ...), in model order.
    model : {"linear"}
        Least squares.
    scheme : {"y", "dsp", "freedman-lane"}
        How the null is built (see Notes).
    statistic : {"t", "coef"}
        Pivotal t (default) or the raw coefficient.
    permutations : int
        Random relabellings (or the cap for exact enumeration under ``exact="auto"``).
    seed : int, SeedSequence or None
        Entropy of the run; the entropy used is returned as ``result.seed``.
    jobs : int
        Worker threads (-1: all cores). Results do not depend on it.
    directed : bool or None
        None: undirected when every input is symmetric.
    groups : array of one label per node, optional
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
    _check_common(permutations=permutations, seed=seed, jobs=jobs, exact=exact,
                  chunk_size=chunk_size)
    if model not in MODELS:
        raise InputError(f"model must be one of {', '.join(MODELS)}; got {model!r}")
    if scheme not in SCHEMES:
        raise InputError(f"scheme must be one of {', '.join(SCHEMES)}; got {scheme!r}")
    if statistic not in STATISTICS:
        raise InputError(f"statistic must be one of {', '.join(STATISTICS)}; got {statistic!r}")
    prep = _design.prepare(y, predictors, directed=directed, groups=groups, dyads=dyads)
    fit = _design.observed_fit(prep)
    plan = build_plan(prep, scheme=scheme, statistic=statistic, storage=storage)
    draws, observed, null = _run(prep, plan, permutations=permutations, seed=seed, jobs=jobs,
                                 exact=exact, chunk_size=chunk_size, progress=progress)
    if statistic == "t":
        _check_agreement(observed, fit.t[1:], prep.names)
    pv = pvalues(null, observed, exact=draws.exact)
    k = prep.k
    nan1 = np.full(1, np.nan)
    stat_obs = fit.t if statistic == "t" else fit.coef
    res = RegressionResult(
        terms=("intercept",) + prep.names,
        se=fit.se, stat=stat_obs,
        p=np.concatenate([nan1, pv.p]), p_greater=np.concatenate([nan1, pv.p_greater]),
        p_less=np.concatenate([nan1, pv.p_less]), p_se=np.concatenate([nan1, pv.p_se]),
        p_interval=np.concatenate([np.full((1, 2), np.nan), pv.p_interval]),
        null=null, permutations=draws.total, exact=draws.exact,
        n_nodes=prep.mask.shape[0] if not prep.two_mode else prep.mask.shape[0] + prep.mask.shape[1],
        n_dyads=fit.n_dyads, scheme=scheme, model=model, statistic=statistic,
        seed=None if draws.exact else draws.entropy, directed=prep.directed,
        two_mode=prep.two_mode, response=prep.response_name, exceed=pv.exceed,
        failed=pv.failed, chunk_size=draws.chunk_size, notes=(),
        coef=fit.coef, r2=fit.r2, deviance=float("nan"))
    assert k == null.shape[1]
    return res


def _check_agreement(kernel_t: np.ndarray, qr_t: np.ndarray, names) -> None:
    with np.errstate(invalid="ignore"):
        gap = np.abs(kernel_t - qr_t) / np.maximum(1.0, np.abs(qr_t))
    if np.any(~(gap <= AGREEMENT)):
        j = int(np.nanargmax(np.where(np.isnan(gap), np.inf, gap)))
        warnings.warn(f"permutation statistics lose precision for {names[j]!r}: its t is "
                      f"{qr_t[j]:.10g} by QR but {kernel_t[j]:.10g} through the permutation "
                      "kernels (near-collinear predictors); treat its p-value with caution",
                      DyadpermWarning, stacklevel=3)


def correlate(a: Any, b: Any, *, method: str = "pearson", permutations: int = 10_000,
              seed: Any = None, jobs: int = 1, directed: bool | None = None,
              groups: Any = None, dyads: str | None = None, exact: Any = "auto",
              chunk_size: int | None = None, out: Any = None,
              progress: bool | Callable[[int, int], None] = False,
              storage: str = "float64", provenance: dict | None = None) -> CorrelationResult:
    """QAP correlation of two networks (the Mantel test for matrices).

    Pearson r (or Spearman's, on average ranks of the dyad values) over the dyad set, with
    p-values from relabelling ``b`` (Mantel 1967, Cancer Research 27:209–220; Hubert &
    Schultz 1976; Krackhardt 1987). Only the cross product changes per relabelling.
    Other parameters as in :func:`regress`. Caution: partial Mantel tests are not offered;
    see the README on when they fail.
    """
    _check_common(permutations=permutations, seed=seed, jobs=jobs, exact=exact,
                  chunk_size=chunk_size)
    bname = getattr(b, "name", None) or "b"
    prep = _design.prepare(a, {bname: b}, directed=directed, groups=groups, dyads=dyads,
                           response_name=getattr(a, "name", None) or "a")
    plan = build_correlation_plan(prep, method=method, storage=storage)
    draws, observed, null = _run(prep, plan, permutations=permutations, seed=seed, jobs=jobs,
                                 exact=exact, chunk_size=chunk_size, progress=progress)
    pv = pvalues(null, observed, exact=draws.exact)
    r = observed
    n_dy = prep.n_dyads if prep.complete else int(_count_complete(prep))
    with np.errstate(divide="ignore", invalid="ignore"):
        se = np.sqrt((1 - r ** 2) / (n_dy - 2))
    return CorrelationResult(
        terms=(prep.names[0],), se=se, stat=r.copy(), p=pv.p, p_greater=pv.p_greater,
        p_less=pv.p_less, p_se=pv.p_se, p_interval=pv.p_interval, null=null,
        permutations=draws.total, exact=draws.exact,
        n_nodes=prep.mask.shape[0] if not prep.two_mode else sum(prep.mask.shape),
        n_dyads=n_dy, scheme="y", model="correlation", statistic="r",
        seed=None if draws.exact else draws.entropy, directed=prep.directed,
        two_mode=prep.two_mode, response=prep.response_name, exceed=pv.exceed,
        failed=pv.failed, chunk_size=draws.chunk_size, notes=(), r=r, method=method)


def _count_complete(prep) -> int:
    total = 0
    for block in _design.iter_dyad_rows(prep, prep.matrices):
        total += int((~np.isnan(block).any(axis=1)).sum())
    return total
