"""Public entry points: :func:`regress`, :func:`correlate` and :func:`open_result`.

Each checks its settings once (``dyadperm.settings``), picks the route for the model and
the shape of the data (``dyadperm.routes``), and hands the route's plan to the pipeline
(``dyadperm.pipeline.run``), which owns every run feature alike for every route.
"""

from __future__ import annotations

from typing import Any, Callable

from .inputs.sparse import refuse_edges as _refuse_edges
from .inputs.sparse import takes as _sparse_takes
from .inputs.waves import refuse_waves as _refuse_waves
from .inputs.waves import uses_waves as _uses_waves
from .output.result import CorrelationResult, LayerCorrelationResult, RegressionResult
from .pipeline.run import open_result, run
from .routes import correlation as _correlation
from .routes import linear as _linear
from .routes import logistic as _logistic
from .routes import sparse as _sparse
from .routes import waves as _waves
from .settings import check_ci, check_regression, run_options

__all__ = ["correlate", "open_result", "regress"]


def regress(y: Any, predictors: Any, *, model: str = "linear", scheme: str = "dsp",
            statistic: str = "t", permutations: int = 10_000, seed: Any = None,
            jobs: int = 1, directed: bool | None = None, groups: Any = None,
            dyads: str | None = None, exact: Any = "auto", chunk_size: int | None = None,
            out: Any = None, progress: bool | Callable[[int, int], None] = False,
            storage: str = "float64", backend: str = "threads", scheduler: str | None = None,
            shard: str | None = None, provenance: dict | None = None,
            stop: Any = None, overwrite_inputs: bool = False,
            ci: Any = 0.95, wave_effects: bool = True) -> RegressionResult:
    """Multiple regression of one network on others with permutation p-values (MRQAP).

    Parameters
    ----------
    y : array (n, n) or (n, m), scipy.sparse, networkx graph, Dyadic, DataFrame or Waves
        The response network; ``dyadperm.Waves`` for a panel (several waves of one node
        set under one relabelling shared by every wave; see dyadperm.inputs.waves). NaN
        marks a missing dyad value. A DataFrame is labelled by its index (rows) and
        columns; square: one-mode (columns the same labels, any order).
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
    stop : {"none", "besag-clifford", "gandy"} or dyadperm.StopRule, optional
        Sequential stopping rule, applied at chunk boundaries to the finished prefix in
        permutation order (same seed and chunk size, same stopping point, whatever
        ``jobs``); a name takes the rule's defaults (see dyadperm.pipeline.stopping).
    ci : float or None
        Level of the interval of each coefficient (default 0.95; None: none): the values b
        that the scheme's own test of beta = b does not reject at 1 - ci, on the same
        relabellings (test inversion; dyadperm.pipeline.intervals). Linear model, schemes
        dsp and freedman-lane with statistic t; scheme y gets none (its null relabels the
        whole response, which is no null of beta = b alone), and a note says so.
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
    wave_effects : bool
        Panels (``y`` a Waves): one intercept per wave (default), reported as fixed terms
        and never tested; False: one intercept for every wave.

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
    opts = run_options(permutations=permutations, seed=seed, jobs=jobs, exact=exact,
                       chunk_size=chunk_size, out=out, progress=progress, backend=backend,
                       scheduler=scheduler, shard=shard, stop=stop, provenance=provenance)
    check_regression(model=model, scheme=scheme, statistic=statistic, storage=storage)
    level = check_ci(ci)
    where = dict(directed=directed, groups=groups, dyads=dyads)
    if _uses_waves(y, predictors):  # a panel: one relabelling shared by every wave
        _waves.refuse_options(overwrite_inputs=overwrite_inputs)
        plan = _waves.plan(y, predictors, model=model, scheme=scheme, statistic=statistic,
                           storage=storage, wave_effects=wave_effects, ci=level, **where)
    elif model == "logistic":  # binary response: Newton refits or score statistics
        _refuse_edges(y, predictors, reason="model='logistic' runs on dense arrays only")
        plan = _logistic.plan(y, predictors, scheme=scheme, statistic=statistic,
                              storage=storage, **where)
    elif _sparse_takes(y, predictors, scheme=scheme):  # sparse response, sparse/derived x
        plan = _sparse.plan(y, predictors, scheme=scheme, statistic=statistic,
                            storage=storage, ci=level, **where)
    else:
        _refuse_edges(y, predictors, reason="the response is not sparse, so the dense "
                      "route runs")
        plan = _linear.plan(y, predictors, scheme=scheme, statistic=statistic,
                            storage=storage, overwrite_inputs=overwrite_inputs, ci=level,
                            **where)
    return run(plan, opts)


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
    p-values (``p_adjusted``; see dyadperm.routes.correlation.layers_plan).
    """
    opts = run_options(permutations=permutations, seed=seed, jobs=jobs, exact=exact,
                       chunk_size=chunk_size, out=out, progress=progress, backend=backend,
                       scheduler=scheduler, shard=shard, stop=stop, provenance=provenance)
    where = dict(method=method, storage=storage, directed=directed, groups=groups, dyads=dyads)
    given = (list(a.values()) if isinstance(a, dict) else
             list(a) if isinstance(a, (list, tuple)) else [a]) + ([] if b is None else [b])
    _refuse_waves(None, given, reason="correlate does not take waves; use regress (one "
                  "intercept per wave)")
    if b is None:  # several networks: the matrix of pairwise correlations
        nets = list(a.values()) if isinstance(a, dict) else list(a)
        if nets:
            _refuse_edges(nets[0], nets[1:], reason="the layer correlation matrix runs on "
                          "dense arrays only")
        plan = _correlation.layers_plan(a, **where)
    elif _sparse_takes(a, b):  # sparse first network, sparse or derived second
        plan = _sparse.correlation_plan(a, b, **where)
    else:
        _refuse_edges(a, [b], reason="the first network is not sparse, so the dense route "
                      "runs")
        plan = _correlation.plan(a, b, overwrite_inputs=overwrite_inputs, **where)
    return run(plan, opts)
