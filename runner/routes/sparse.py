"""Sparse path: networks of very many nodes, O(nodes + edges) memory, O(edges) per relabelling.

When the response is sparse (a scipy.sparse matrix or a :class:`SparseNetwork`; zeros
implied) and every predictor is either a sparse network or derived from node attributes
(``dyadperm.same``, ``gap``, ``sender``, ``receiver``, ``pair_sum``; ``reverse`` of a sparse
network), :func:`dyadperm.regress` and :func:`dyadperm.correlate` take this path by
themselves and say so in the result's ``notes``. No n x n array is ever built: a network
of 100,000 nodes would need 80 GB per layer.

Method
------
The dyad set D is every off-diagonal pair (directed) or every pair i < j (undirected),
restricted to pairs inside a group when ``groups`` is given with ``dyads="within"``; for
two-mode data (a :class:`SparseNetwork` with column labels, a rectangular scipy.sparse
matrix) every cell of n x m, rows and columns relabelled independently. There are no
missing values on this path (a NaN edge value or attribute is an error).

Y-permutation (Krackhardt 1988, Social Networks 10:359–381) relabels the response:
y'[i, j] = y[pi(i), pi(j)]. With predictors centred over D (x~ = x - mean), the only
quantity that changes per relabelling is

    g_c = sum_D y'[i, j] x~_c[i, j] = sum over response edges (a, b, w) of
          w * x~_c(pi^-1(a), pi^-1(b)),

a sum over the response's E edges (substitute a = pi(i), b = pi(j); relabelling maps D
onto itself). Derived predictors are evaluated from the attribute vectors at the two
endpoints; sparse predictors by a binary search in their rows (sorted column indices; the
response's edges are sorted by source, so a row is fetched once per source). ``sender``,
``receiver`` and ``pair_sum`` read one endpoint at a time, so their g_c are sums over
nodes of the response's out- and in-strengths: O(n) per relabelling.

Everything else in the Gram matrix of v = [1, y, x_1..x_k] is fixed: N, sum y and y'y are
sums over the edges; the predictors' means and centred cross products X~'X~ come from
closed forms over the attribute vectors (sums over groups of equal values for ``same``;
sorted prefix sums for ``gap``; a Fenwick tree for ``gap`` x ``gap``; separable sums for
``sender``, ``receiver`` and ``pair_sum``), or from sums over a sparse predictor's edges.
The per-permutation Gram (standardised like the dense path's) goes through the same
finishing kernels as the dense engine (``kernels.stats.regression_stats`` with the
y-scheme map, and ``correlation_stats``). QAP correlation (Mantel 1967; Hubert & Schultz
1976) relabels the second network as the dense path does: the sum runs over the first
network's edges with the second read at (pi(a), pi(b)).

The observed fit (coefficients, standard errors, t, R squared) is solved from the same
closed-form Gram by the normal equations (a Cholesky factor of the standardised
predictors' cross products), not by the QR of the dense path. The normal equations lose
digits as the square of the condition number: a condition number of the standardised
predictors above 1e6 gives a warning, as on the dense path, and the design must pass the
one rule of every route (``dyadperm.inputs.design.check_design``) with the relative pivot of
fits from Gram matrices, ``kernels.options.FIT_PIVOT`` (1e-5): the observed fit and the
kernels' fits of every relabelling then read the design the same way.

Spearman correlation: the ranks of a mostly-zero network have a closed form (all zero
dyads share one average rank), so the response and sparse predictors keep their sparsity;
``same``, ``sender`` and ``receiver`` have closed-form ranks too. ``gap`` and ``pair_sum``
would need the ranks of all n^2 dyad values and are refused.

Schemes
-------
Every linear scheme runs on this path. Double semi-partialling (Dekker, Krackhardt &
Snijders 2007) relabels the residual of a predictor on the other terms, and Freedman &
Lane (1983) the residual of the response on the reduced model; those residual matrices
are dense even when y and x are sparse, but they relabel as the same linear combinations
of relabelled layers, so every relabelling needs only the sums of relabelled layers times
fixed layers, each an edge pass or a closed form (``routes.sparse_schemes``,
``kernels.sparse_pairs``). One-mode scheme y and correlation keep the plan above
(``sparse_products.SparsePlan``); two-mode data take every statistic, and their fixed
products, from the pair sums.

Which inputs take this path is decided by ``inputs.sparse.takes``: a :class:`SparseNetwork`
response always; a scipy.sparse response for scheme y, and for dsp and freedman-lane when
its dense layers would pass ``DENSIFY_LIMIT`` (smaller ones run on the dense path, as they
did before this path had those schemes: the two agree to about 1e-13, not bit for bit).
"""

from __future__ import annotations

import json
from dataclasses import replace
from typing import Any

import numpy as np
from scipy.stats import rankdata

from ..errors import InputError
from ..inputs.dyadic import network_name
from ..inputs.sparse import Edges, SparsePrepared, Term, prepare_sparse
from ..kernels.sparse import GAP, NETWORK, PAIR_SUM, RECEIVER, SENDER
from ..settings import check_correlation, check_regression
from .plan import (Plan, chunk_size_for, fingerprint, groups_fingerprint, interval_reason,
                   interval_summary)
from .sparse_products import (_check_collinear, _response_sd, build_sparse_plan,
                              observed_fit_sparse)
from .sparse_schemes import build_sparse_correlation_plan, build_sparse_scheme_plan, moments_of

# Edge-term products per chunk the default chunk size aims at (about a second of work).
CHUNK_EDGE_WORK = 2e8
NOTE = ("sparse path: {edges:,} response edges relabelled per permutation; fixed products "
        "by closed forms; observed fit by the normal equations; no n x n array built")
NOTE_SCHEME = ("sparse path: {scheme} relabels {what} by sums over {edges:,} edges and "
               "closed forms over the {nodes:,} nodes{fit}; no n x n array built")


def sparse_identity(prep: SparsePrepared, settings: dict) -> dict:
    """The identity of a sparse run: settings, directedness, dyad set, relabelling blocks and
    the fingerprint of every input (edge lists; attribute vectors of derived predictors)."""
    ident = dict(settings)
    ident["directed"] = prep.directed
    ident["n_nodes"] = prep.n
    ident["dyad ranges"] = json.dumps([list(r) for r in prep.ranges])
    ident["relabelling blocks"] = json.dumps(prep.blocks.row_blocks)
    ident[f"fingerprint:{prep.response_name}"] = _edges_fingerprint(prep.y)
    for t in prep.terms:
        if t.kind == NETWORK:
            ident[f"fingerprint:{t.name}"] = _edges_fingerprint(t.edges)
        elif prep.two_mode:
            both = [a for a in (t.attr, t.col_attr) if a is not None]
            ident[f"fingerprint:{t.name}"] = f"{t.kind}:" + fingerprint(np.concatenate(both))
        else:
            ident[f"fingerprint:{t.name}"] = f"{t.kind}:" + fingerprint(t.attr)
    if prep.two_mode:
        ident["n_cols"] = prep.m
        ident["relabelling column blocks"] = json.dumps(prep.blocks.col_blocks)
    return ident


def _edges_fingerprint(ed: Edges) -> str:
    return fingerprint(np.concatenate([ed.src.astype(np.float64), ed.dst.astype(np.float64),
                                       ed.w]))


def chunk_size(prep: SparsePrepared) -> int:
    """Permutations per chunk: one chunk's edge-term products near ``CHUNK_EDGE_WORK``."""
    return chunk_size_for(prep.y.size * (prep.k + 1) + prep.n, budget=CHUNK_EDGE_WORK, least=1)


def _summary(prep: SparsePrepared, *, kind, model, scheme, statistic, method, terms,
             note: str) -> dict:
    return dict(kind=kind, model=model, scheme=scheme, statistic=statistic, method=method,
                terms=list(terms), tested=list(prep.names), response=prep.response_name,
                n_nodes=prep.n + prep.m if prep.two_mode else prep.n, n_dyads=prep.n_dyads,
                directed=prep.directed, two_mode=prep.two_mode, notes=[note])


def _scheme_note(prep: SparsePrepared, scheme: str, what: str) -> str:
    """The result's note on how a plan of pair sums computes its statistics."""
    edges = prep.y.size + sum(t.edges.size for t in prep.terms if t.kind == NETWORK)
    nodes = prep.n + prep.m if prep.two_mode else prep.n
    fit = "" if scheme == "the correlation" else "; observed fit by the normal equations"
    return NOTE_SCHEME.format(scheme=scheme, what=what, edges=edges, nodes=nodes, fit=fit)


def plan(y: Any, predictors: Any, *, scheme: str = "y", statistic: str = "t",
         storage: str = "float64", directed: bool | None = None, groups: Any = None,
         dyads: str | None = None, ci: float | None = None) -> Plan:
    """The sparse linear route (module docstring), every scheme. ``storage`` has no effect
    here (no dyad layer is stored); ``ci``: the level of the coefficient intervals (dsp and
    Freedman-Lane with statistic t, as on the dense route), or None."""
    check_regression(model="linear", scheme=scheme, statistic=statistic, storage=storage)
    prep = prepare_sparse(y, predictors, directed=directed, groups=groups, dyads=dyads)
    mom = moments_of(prep)
    y_mean, y_sd = _response_sd(prep.response_name, prep.n_dyads, mom.y_sum, mom.y_sq)
    _check_collinear(prep, mom)
    if scheme == "y" and not prep.two_mode:
        stats = build_sparse_plan(prep, mom, y_sd, statistic=statistic)
        gram_xx, xy = stats.observed_products()
        chunk = chunk_size(prep)
        note = NOTE.format(edges=prep.y.size)
    else:
        interval = ci is not None and interval_reason(scheme, statistic) is None
        stats = build_sparse_scheme_plan(prep, scheme=scheme, statistic=statistic, moments=mom,
                                         interval=interval)
        gram_xx, xy = stats.gram_xx, stats.xy
        chunk = chunk_size_for(stats.pairs.work(), budget=CHUNK_EDGE_WORK, least=1)
        note = _scheme_note(prep, scheme, {"y": "the response", "dsp": "the predictors"}.get(
            scheme, "the response and the predictors"))
    fit = observed_fit_sparse(prep, mom, gram_xx, xy, y_mean, y_sd)
    info = _summary(prep, kind="regression", model="linear", scheme=scheme,
                    statistic=statistic, method=None, terms=("intercept",) + prep.names,
                    note=note)
    settings = dict(kind="regression", model="linear", scheme=scheme, statistic=statistic,
                    method=None, storage=storage, dyads=dyads, groups=groups_fingerprint(groups),
                    route="sparse")
    extra = getattr(stats, "extra", 0)
    if extra:
        settings["stored interval columns"] = extra
    if ci is not None:
        info["interval"] = interval_summary(ci, interval_reason(scheme, statistic),
                                            getattr(stats, "ci_scale", None))
    fit_arrays = dict(coef=fit.coef, se=fit.se, stat=fit.t if statistic == "t" else fit.coef,
                      fit=np.array([fit.r2, np.nan]))
    # dsp and Freedman–Lane: the kernels' identity relabelling is the full model's fit
    # (Frisch–Waugh–Lovell), from the same products as the fit
    expected = None if scheme == "y" else fit_arrays["stat"][1:]
    return Plan(kernel=stats, blocks=prep.blocks, chunk_size=chunk, fit=fit_arrays,
                summary=info, identity=sparse_identity(prep, settings), expected=expected,
                extra=extra)


def _rank_edges(ed: Edges, N: int) -> Edges:
    """Average ranks over all N dyad values (zeros off the edges), minus the zeros' rank.

    All N - E zero dyads share the rank (#negative values) + (N - E + 1) / 2; a nonzero
    value's rank is its rank among the nonzero values, plus N - E when positive. The
    zeros' rank is subtracted so the network stays sparse (correlation ignores shifts).
    """
    n_zero = N - ed.size
    neg = ed.w < 0
    ranks = rankdata(ed.w, method="average") if ed.size else np.zeros(0)
    ranks = ranks + np.where(neg, 0.0, n_zero)
    zero_rank = neg.sum() + (n_zero + 1) / 2.0
    return Edges(ed.src, ed.dst, ranks - zero_rank)


def _rank_attribute(t: Term, prep: SparsePrepared) -> Term:
    """A sender/receiver attribute replaced by the average rank of its dyad values.

    Node i's value fills (size of its range - 1) dyads; a value's rank among all N dyad
    values is the number of dyads with smaller values plus (its own dyads + 1) / 2.
    """
    if prep.two_mode:  # a row's value fills its m cells, a column's its n cells
        attr = t.attr if t.kind == SENDER else t.col_attr
        mult = np.full(attr.shape[0], float(prep.m if t.kind == SENDER else prep.n))
    else:
        attr = t.attr
        mult = np.empty(prep.n)
        for s, e in prep.ranges:
            mult[s:e] = e - s - 1
    vals, inv = np.unique(attr, return_inverse=True)
    per_value = np.bincount(inv, mult, vals.size)
    below = np.concatenate([[0.0], np.cumsum(per_value)[:-1]])
    rank = (below + (per_value + 1) / 2.0)[inv]
    rank = rank - rank.mean()
    if prep.two_mode:
        return Term(t.name, t.kind, rank if t.kind == SENDER else None, 0.0, None,
                    None if t.kind == SENDER else rank)
    return Term(t.name, t.kind, rank, 0.0, None)


def correlation_plan(a: Any, b: Any, *, method: str = "pearson", storage: str = "float64",
                     directed: bool | None = None, groups: Any = None,
                     dyads: str | None = None) -> Plan:
    """QAP correlation on the sparse path: ``b`` is relabelled, as on the dense path, so the
    sum runs over ``a``'s edges with ``b`` read at (pi(i), pi(j))."""
    check_correlation(method=method, storage=storage)
    bname = network_name(b) or "b"
    prep = prepare_sparse(a, {bname: b}, directed=directed, groups=groups, dyads=dyads,
                          response_name=network_name(a) or "a")
    N = prep.n_dyads
    if method == "spearman":
        t = prep.terms[0]
        if t.kind == NETWORK:
            t = Term(t.name, t.kind, None, 0.0, _rank_edges(t.edges, N))
        elif t.kind in (SENDER, RECEIVER):
            t = _rank_attribute(t, prep)
        elif t.kind in (GAP, PAIR_SUM):
            kind = "gap" if t.kind == GAP else "pair_sum"
            raise InputError(f"method='spearman': {t.name!r} is a {kind} predictor, whose ranks "
                             "need every one of its n x n dyad values; use method='pearson' "
                             "or dense arrays")
        prep = replace(prep, y=_rank_edges(prep.y, N), terms=(t,))
    mom = moments_of(prep)
    _, a_sd = _response_sd(prep.response_name, N, mom.y_sum, mom.y_sq)
    if not mom.cross[0, 0] > 0.0:
        raise InputError(f"{prep.names[0]!r} has no variation over the dyad set")
    if prep.two_mode:
        stats = build_sparse_correlation_plan(prep, mom)
        chunk = chunk_size_for(stats.pairs.work(), budget=CHUNK_EDGE_WORK, least=1)
        note = _scheme_note(prep, "the correlation", "the second network")
    else:
        stats = build_sparse_plan(prep, mom, a_sd, statistic="t", correlation=True)
        chunk = chunk_size(prep)
        note = NOTE.format(edges=prep.y.size)
    r = stats.statistics(np.arange(prep.n, dtype=np.int64)[None, :],
                         np.arange(prep.m, dtype=np.int64)[None, :])[0]
    with np.errstate(divide="ignore", invalid="ignore"):
        se = np.sqrt((1 - r ** 2) / (N - 2))
    info = _summary(prep, kind="correlation", model="correlation", scheme="y",
                    statistic="r", method=method, terms=prep.names, note=note)
    settings = dict(kind="correlation", model="correlation", scheme="y", statistic="r",
                    method=method, storage=storage, dyads=dyads,
                    groups=groups_fingerprint(groups), route="sparse")
    return Plan(kernel=stats, blocks=prep.blocks, chunk_size=chunk,
                fit=dict(coef=r, se=se, stat=r, fit=np.array([np.nan, np.nan])), summary=info,
                identity=sparse_identity(prep, settings))
