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
restricted to pairs inside a group when ``groups`` is given with ``dyads="within"``. There
are no missing values on this path (a NaN edge value or attribute is an error).

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
predictors above 1e6 gives a warning, as on the dense path, and a predictor whose relative
pivot is below ``NORMAL_PIVOT`` (1e-7) counts as collinear (an error).

Spearman correlation: the ranks of a mostly-zero network have a closed form (all zero
dyads share one average rank), so the response and sparse predictors keep their sparsity;
``same``, ``sender`` and ``receiver`` have closed-form ranks too. ``gap`` and ``pair_sum``
would need the ranks of all n^2 dyad values and are refused.

Schemes
-------
Only scheme ``"y"`` (and QAP correlation) runs on this path. Double semi-partialling
(Dekker, Krackhardt & Snijders 2007) relabels the residual of a predictor on the other
terms, e = x_j - Z gamma, and Freedman & Lane (1983) relabel the residual of the response
on the reduced model, r = y - Z gamma. Those residual matrices are dense even when y and
x are sparse (every dyad gets -Z gamma), and their relabelled cross products with the
other layers are sums over all N dyads, not over E edges; with derived predictors the
relabelled design itself is dense. For them pass dense arrays (``network.toarray()``) on a
network that fits in memory, or use scheme ``"y"``. A small scipy.sparse input with those
schemes is densified and runs on the dense path as before; a :class:`SparseNetwork`, or
a scipy.sparse input whose dense layers would exceed ``DENSIFY_LIMIT`` bytes, is refused
with that advice.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable, Mapping, Sequence

import numpy as np
import scipy.sparse as sp
from scipy.stats import rankdata

from .design import (ObservedFit, _group_order, _reorder, _standardised_condition,
                     decide_directed, decide_dyads, name_predictors, node_groups)
from .dyadic import NodeDerived, Reverse, _node_vector, _series_values, network_name
from .engine import MAX_CHUNK, run_all
from .errors import InputError
from .kernels.sparse import (GAP, NETWORK, PAIR_SUM, RECEIVER, SAME, SENDER, gap_gap_sum,
                             sparse_cross)
from .kernels.stats import correlation_stats, fill_gram, regression_stats
from .labels import as_labels, sorted_labels
from .optional import is_frame, is_series, loaded_pandas
from .permutations import Blocks
from .result import CorrelationResult, RegressionResult
from .schemes import check_options

# Relative pivot below which a predictor counts as collinear on this path. The normal
# equations square the condition number, so pivots far below sqrt(machine epsilon) cannot be
# resolved (the dense path's QR goes down to design.COLLINEAR_PIVOT).
NORMAL_PIVOT = 1e-7
KIND_CODES = {"same": SAME, "gap": GAP, "sender": SENDER, "receiver": RECEIVER,
              "pair_sum": PAIR_SUM}
# Dense layers of a scipy.sparse input above this many bytes are never built: schemes that
# need them (dsp, freedman-lane) are refused instead.
DENSIFY_LIMIT = 2 * 1024 ** 3
# Edge-term products per chunk the default chunk size aims at (about a second of work).
CHUNK_EDGE_WORK = 2e8
NOTE = ("sparse path: {edges:,} response edges relabelled per permutation; fixed products "
        "by closed forms; observed fit by the normal equations; no n x n array built")


# --- input ------------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class SparseNetwork:
    """A one-mode network given by its edges; every other dyad holds 0.

    Parameters
    ----------
    rows, cols : sequence of int, length E
        Edge endpoints as node positions 0 .. n - 1 (source, target for directed data).
    weights : sequence of float, length E, or None
        Edge values (None: every edge has value 1). No NaN: the sparse path has no
        missing values. Zero values are allowed and mean no tie.
    labels : sequence of str, or int
        The n node labels (isolated nodes included), or n for labels "0" .. "n-1".
    directed : bool or None
        None: undirected when the edges are symmetric (and every other input too).
        False: each pair may be listed once, in either orientation (or in both with
        the same value).
    name : str or None
        Name used in messages and result tables.

    Self-loops are allowed and ignored (the diagonal never enters a fit). The same
    (row, col) pair given twice is an error.
    """

    rows: Any
    cols: Any
    weights: Any = None
    labels: Any = None
    directed: bool | None = None
    name: str | None = None

    def __post_init__(self) -> None:
        what = self.name or "network"
        rows = np.asarray(self.rows)
        cols = np.asarray(self.cols)
        if rows.ndim != 1 or cols.ndim != 1 or rows.shape != cols.shape:
            raise InputError(f"{what}: rows and cols must be 1-d of one length; got shapes "
                             f"{rows.shape} and {cols.shape}")
        if rows.size and (rows.dtype.kind not in "iu" or cols.dtype.kind not in "iu"):
            raise InputError(f"{what}: rows and cols must be integer node positions; got "
                             f"dtypes {rows.dtype} and {cols.dtype}")
        labels = self.labels
        if labels is None:
            raise InputError(f"{what}: give labels (the node labels, or the number of nodes)")
        if isinstance(labels, (int, np.integer)) and not isinstance(labels, bool):
            labels = tuple(str(i) for i in range(int(labels)))
        else:
            labels = tuple(str(v) for v in labels)
        n = len(labels)
        if len(set(labels)) != n:
            raise InputError(f"{what}: node labels must be distinct")
        if rows.size:
            lo = min(int(rows.min()), int(cols.min()))
            hi = max(int(rows.max()), int(cols.max()))
            if lo < 0 or hi >= n:
                bad = lo if lo < 0 else hi
                raise InputError(f"{what}: node position {bad} is outside 0 .. {n - 1} "
                                 f"({n} labels)")
        if self.weights is None:
            w = np.ones(rows.shape[0])
        else:
            w = np.asarray(self.weights)
            if w.shape != rows.shape:
                raise InputError(f"{what}: need one weight per edge ({rows.shape[0]}); got "
                                 f"shape {w.shape}")
            if w.size and w.dtype.kind not in "fiub":
                raise InputError(f"{what}: weights must be numbers; got dtype {w.dtype}")
            w = w.astype(np.float64)
        bad = np.flatnonzero(~np.isfinite(w))
        if bad.size:
            e = int(bad[0])
            raise InputError(f"{what}: edge {e} ({labels[rows[e]]!r}, {labels[cols[e]]!r}) has "
                             f"value {w[e]}; the sparse path takes no missing or infinite "
                             "values (give dense arrays with NaN for missing dyads)")
        rows = rows.astype(np.int64)
        cols = cols.astype(np.int64)
        keys = rows * max(n, 1) + cols
        uniq, first, counts = np.unique(keys, return_index=True, return_counts=True)
        if uniq.size < keys.size:
            e = int(first[np.argmax(counts > 1)])
            raise InputError(f"{what}: the dyad ({labels[rows[e]]!r}, {labels[cols[e]]!r}) is "
                             "given more than once")
        if self.directed is False:
            rows, cols, w = _undirected_edges(rows, cols, w, labels, what)
        object.__setattr__(self, "rows", rows)
        object.__setattr__(self, "cols", cols)
        object.__setattr__(self, "weights", w)
        object.__setattr__(self, "labels", labels)

    @property
    def n(self) -> int:
        return len(self.labels)

    @property
    def shape(self) -> tuple[int, int]:
        return (self.n, self.n)

    def toarray(self) -> np.ndarray:
        """The dense n x n float64 array (for networks that fit in memory)."""
        out = np.zeros((self.n, self.n))
        out[self.rows, self.cols] = self.weights
        return out

    @classmethod
    def from_scipy(cls, matrix: Any, *, labels: Any = None, directed: bool | None = None,
                   name: str | None = None) -> "SparseNetwork":
        """A SparseNetwork from a square scipy.sparse matrix (duplicates summed)."""
        coo = sp.coo_array(matrix)
        coo.sum_duplicates()
        if coo.shape[0] != coo.shape[1]:
            raise InputError(f"{name or 'network'}: the sparse path takes one-mode (square) "
                             f"networks; got {coo.shape[0]} x {coo.shape[1]} (pass "
                             ".toarray() for two-mode data)")
        return cls(coo.row, coo.col, coo.data, coo.shape[0] if labels is None else labels,
                   directed, name)

    @classmethod
    def from_edges(cls, table: Any, *, source: Any, target: Any, weight: Any = None,
                   nodes: Any = None, directed: bool | None = None,
                   name: str | None = None) -> "SparseNetwork":
        """A network from a table of labelled edges, one row per tie.

        Parameters
        ----------
        table : pandas DataFrame, or a mapping column name -> sequence
            The edge table (a dict of lists or numpy arrays needs no pandas).
        source, target : column names
            The tie's endpoints, as node labels (compared as text: ``str`` of each value).
        weight : column name or None
            The tie's value (numbers, no missing values: the sparse path has none); None:
            every listed tie has value 1.
        nodes : sequence of labels, optional
            The node set and its order, isolated nodes included. Default: every label seen
            in ``source`` and ``target``, in the engine's label order
            (:func:`dyadperm.labels.label_order`).
        directed, name
            As for :class:`SparseNetwork`.

        A label not in ``nodes``, a missing label, and the same tie (source, target) listed
        twice are errors naming the table row (counted from 0), as in study files' edge
        lists. Self-loops are allowed and ignored.
        """
        shown = name or "edge table"
        src = _edge_labels(table, source, shown)
        dst = _edge_labels(table, target, shown)
        if len(src) != len(dst):
            raise InputError(f"{shown}: columns {source!r} and {target!r} differ in length "
                             f"({len(src)} and {len(dst)})")
        w = None if weight is None else _edge_numbers(table, weight, shown)
        if w is not None and w.shape[0] != len(src):
            raise InputError(f"{shown}: columns {source!r} and {weight!r} differ in length "
                             f"({len(src)} and {w.shape[0]})")
        if nodes is None:
            labels = sorted_labels(dict.fromkeys(src + dst))
            where = ""
        else:
            labels = as_labels(_column_values(nodes), f"{shown}: nodes")
            where = " (not in nodes)"
        pos = {lab: k for k, lab in enumerate(labels)}
        ends = []
        for column in (src, dst):
            idx = np.empty(len(column), dtype=np.int64)
            for e, lab in enumerate(column):
                at = pos.get(lab)
                if at is None:
                    raise InputError(f"{shown} row {e}: unknown node label {lab!r}{where}")
                idx[e] = at
            ends.append(idx)
        rows, cols = ends
        key = rows * max(len(labels), 1) + cols
        order = np.argsort(key, kind="stable")
        dup = np.flatnonzero(key[order][1:] == key[order][:-1])
        if dup.size:
            a, b = sorted((int(order[dup[0]]), int(order[dup[0] + 1])))
            raise InputError(f"{shown}: duplicate edge {src[a]!r} -> {dst[a]!r} at rows {a} "
                             f"and {b} (aggregate repeated ties first)")
        return cls(rows, cols, w, labels, directed, name)


def _column_values(values: Any) -> list:
    """The items of a column: a pandas Series or Index, a numpy array or a sequence."""
    pd = loaded_pandas()
    if pd is not None and isinstance(values, (pd.Series, pd.Index)):
        values = values.to_numpy(dtype=object)
    if isinstance(values, np.ndarray):
        return values.astype(object).ravel().tolist()
    return list(values)


def _missing_label(v: Any) -> bool:
    pd = loaded_pandas()
    if v is None or (pd is not None and v is pd.NA):
        return True
    if isinstance(v, (float, np.floating)):
        return bool(np.isnan(v))
    return isinstance(v, str) and not v.strip()


def _edge_column(table: Any, key: Any, shown: str) -> Any:
    if is_frame(table):
        names = list(table.columns)
    elif isinstance(table, Mapping):
        names = list(table.keys())
    else:
        raise InputError(f"{shown}: give the edges as a pandas DataFrame or a mapping "
                         f"column name -> values; got {type(table).__name__}")
    if key not in names:
        raise InputError(f"{shown}: no column {key!r}; its columns: "
                         + ", ".join(str(c) for c in names))
    return table[key]


def _edge_labels(table: Any, key: Any, shown: str) -> list[str]:
    out = []
    for e, v in enumerate(_column_values(_edge_column(table, key, shown))):
        if _missing_label(v):
            raise InputError(f"{shown} row {e}: column {key!r} has no node label")
        out.append(str(v))
    return out


def _edge_numbers(table: Any, key: Any, shown: str) -> np.ndarray:
    col = _edge_column(table, key, shown)
    if is_series(col):
        return _series_values(col, f"{shown} column {key!r}")
    return np.asarray(col)


def _undirected_edges(rows, cols, w, labels, what):
    """Edges of an undirected network in both orientations.

    Each pair may be given once (either orientation) or in both with the same value.
    """
    n = max(len(labels), 1)
    lo, hi = np.minimum(rows, cols), np.maximum(rows, cols)
    keys = lo * n + hi
    order = np.argsort(keys, kind="stable")
    k_s, w_s = keys[order], w[order]
    same_key = k_s[1:] == k_s[:-1]
    clash = same_key & (w_s[1:] != w_s[:-1])
    if clash.any():
        e = int(order[1:][clash][0])
        raise InputError(f"{what}: directed=False but the dyad ({labels[rows[e]]!r}, "
                         f"{labels[cols[e]]!r}) is given in both orientations with different "
                         "values")
    first = np.concatenate([[True], ~same_key]) if k_s.size else np.zeros(0, dtype=bool)
    lo, hi, w1 = lo[order][first], hi[order][first], w_s[first]
    loop = lo == hi
    return (np.concatenate([lo, hi[~loop]]), np.concatenate([hi, lo[~loop]]),
            np.concatenate([w1, w1[~loop]]))


def is_sparse(obj: Any) -> bool:
    """True for inputs the sparse path reads as edges: scipy.sparse or SparseNetwork."""
    return isinstance(obj, SparseNetwork) or sp.issparse(obj)


def _predictor_objects(predictors: Any) -> list[tuple[str, Any]]:
    return name_predictors(predictors, named=(SparseNetwork, NodeDerived, Reverse))


def _fits_sparse(obj: Any) -> bool:
    if isinstance(obj, NodeDerived) or is_sparse(obj):
        return True
    return isinstance(obj, Reverse) and (obj.network is None or is_sparse(obj.network))


def takes(y: Any, predictors: Any, *, scheme: str = "y") -> bool:
    """Whether :func:`dyadperm.regress` / ``correlate`` should run on the sparse path.

    True when the response is sparse and every predictor is sparse or derived, unless a
    small scipy.sparse input asks for a scheme that needs dense residual matrices (it is
    densified on the dense path, as before). A :class:`SparseNetwork` response with a dense
    predictor is an error (it has no dense form to fall back on).
    """
    if not is_sparse(y):
        return False
    try:
        items = _predictor_objects(predictors)
    except InputError:
        return False  # the dense path reports the same error in its own words
    for name, obj in items:
        if not _fits_sparse(obj):
            if isinstance(y, SparseNetwork):
                raise InputError(f"predictor {name!r} is a {type(obj).__name__}: with a "
                                 "SparseNetwork response every predictor must be sparse or "
                                 "derived from node attributes (or densify the response "
                                 "with .toarray())")
            return False
    if scheme != "y" and sp.issparse(y):
        n = y.shape[0] * y.shape[1]
        if 8 * n * (len(items) + 2) <= DENSIFY_LIMIT:
            return False
    return True


# --- preparation --------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class Edges:
    """Edges of one network on the dyad set, internal node order, sorted by (src, dst)."""

    src: np.ndarray
    dst: np.ndarray
    w: np.ndarray

    @property
    def size(self) -> int:
        return int(self.src.shape[0])


@dataclass(frozen=True, eq=False)
class Term:
    """One predictor: derived (kind code < NETWORK, node attribute) or a sparse network."""

    name: str
    kind: int
    attr: np.ndarray | None  # internal order; centred values, or group codes for same
    shift: float  # the predictor's mean in the user's units minus its mean here
    edges: Edges | None


@dataclass(frozen=True, eq=False)
class SparsePrepared:
    """Inputs of the sparse path on the engine's internal node order (see design.py)."""

    names: tuple[str, ...]
    response_name: str
    n: int
    n_dyads: int
    directed: bool
    labels: tuple[str, ...]
    row_order: np.ndarray
    blocks: Blocks
    ranges: tuple[tuple[int, int], ...]  # D = pairs inside one of these ranges
    y: Edges
    terms: tuple[Term, ...]

    @property
    def k(self) -> int:
        return len(self.terms)


def _as_network(obj: Any, name: str, labels: tuple[str, ...] | None) -> SparseNetwork:
    if isinstance(obj, SparseNetwork):
        net = obj
    else:
        if labels is not None and obj.shape != (len(labels), len(labels)):
            raise InputError(f"predictor {name!r} has shape {obj.shape[0]} x {obj.shape[1]}; "
                             f"the response has {len(labels)} x {len(labels)}")
        net = SparseNetwork.from_scipy(obj, labels=labels, name=name)
    if labels is not None and net.labels != labels:
        at = _reorder(name, net.labels, labels, "node")  # net's position of each node
        remap = np.empty_like(at)
        remap[at] = np.arange(at.shape[0], dtype=np.int64)
        net = SparseNetwork(remap[net.rows], remap[net.cols], net.weights, labels,
                            net.directed, net.name)
    return net


def _offdiag(net: SparseNetwork) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    keep = (net.rows != net.cols) & (net.weights != 0.0)
    return net.rows[keep], net.cols[keep], net.weights[keep]


def _symmetric_edges(net: SparseNetwork) -> bool:
    r, c, w = _offdiag(net)
    n = max(net.n, 1)
    a = np.argsort(r * n + c)
    b = np.argsort(c * n + r)
    return bool(np.array_equal((r * n + c)[a], (c * n + r)[b]) and np.array_equal(w[a], w[b]))


def prepare_sparse(y: Any, predictors: Any, *, directed: bool | None = None, groups: Any = None,
                   dyads: str | None = None, response_name: str = "response") -> SparsePrepared:
    """Edges, attribute vectors, dyad set and relabelling blocks of a sparse problem."""
    rname = network_name(y) or response_name
    resp = _as_network(y, rname, None)
    labels = resp.labels
    n = resp.n
    if n < 3:
        raise InputError(f"too few nodes: got {n} x {n}; need at least 3 nodes (2 x 2 two-mode)")
    items = _predictor_objects(predictors)

    # predictors in the user's node order
    raw: list[tuple[str, str, Any]] = []  # (name, kind, attribute vector or network)
    for name, obj in items:
        if isinstance(obj, NodeDerived):
            source = obj.values
            if obj.kind == "receiver" and obj.col_values is not None:
                source = obj.col_values  # receiver keeps the target's attribute here
            vec = _node_vector(source, labels, name)
            if obj.kind != "same" and vec.dtype.kind not in "fiub":
                raise InputError(f"derived predictor '{obj.kind}' needs a numeric attribute; "
                                 "got text values")
            if vec.dtype.kind == "f" and np.isnan(vec).any():
                node = labels[int(np.flatnonzero(np.isnan(vec))[0])]
                raise InputError(f"{name}: node {node!r} has no attribute value (NaN); the "
                                 "sparse path takes no missing values")
            raw.append((name, obj.kind, vec))
        elif isinstance(obj, Reverse):
            net = resp if obj.network is None else _as_network(obj.network, name, labels)
            net = SparseNetwork(net.cols, net.rows, net.weights, labels, net.directed, name)
            raw.append((name, "network", net))
        else:
            raw.append((name, "network", _as_network(obj, name, labels)))
    names = tuple(name for name, _, _ in raw)

    # directedness, as on the dense path
    asym = [] if _symmetric_edges(resp) else [rname]
    for name, kind, val in raw:
        if kind == "network":
            if not _symmetric_edges(val):
                asym.append(name)
        elif kind in ("sender", "receiver") and np.unique(val).size > 1:
            asym.append(name)
    explicit = [net.directed for net in [resp] + [v for _, k, v in raw if k == "network"]
                if net.directed is not None]
    is_directed = decide_directed(directed, asym, explicit)

    # groups: blocks of the relabelling and, with dyads="within", the dyad set
    groups = node_groups(groups, labels)
    row_order, row_blocks, _ = _group_order(groups, n, "groups", labels)
    dyads = decide_dyads(dyads, groups)
    blocks = Blocks(n, n, tuple(row_blocks), None)
    ranges = tuple(row_blocks) if dyads == "within" else ((0, n),)
    pos = np.empty(n, dtype=np.int64)
    pos[row_order] = np.arange(n, dtype=np.int64)
    block_of = np.empty(n, dtype=np.int64)
    for b, (s, e) in enumerate(ranges):
        block_of[s:e] = b

    def edges_of(net: SparseNetwork) -> Edges:
        r, c, w = _offdiag(net)
        i, j = pos[r], pos[c]
        keep = block_of[i] == block_of[j]
        if not is_directed:
            keep &= i < j
        i, j, w = i[keep], j[keep], w[keep]
        o = np.lexsort((j, i))
        return Edges(np.ascontiguousarray(i[o]), np.ascontiguousarray(j[o]),
                     np.ascontiguousarray(w[o]))

    terms = []
    for name, kind, val in raw:
        if kind == "network":
            terms.append(Term(name, NETWORK, None, 0.0, edges_of(val)))
            continue
        vec = val[row_order]
        if kind == "same":
            _, codes = np.unique(vec, return_inverse=True)
            terms.append(Term(name, SAME, codes.astype(np.float64), 0.0, None))
        else:
            a = vec.astype(np.float64)
            mid = float(a.mean())
            factor = {"gap": 0.0, "sender": 1.0, "receiver": 1.0, "pair_sum": 2.0}[kind]
            terms.append(Term(name, KIND_CODES[kind], a - mid, factor * mid, None))
    sizes = np.array([e - s for s, e in ranges], dtype=np.int64)
    n_dyads = int((sizes * (sizes - 1)).sum())
    if not is_directed:
        n_dyads //= 2
    return SparsePrepared(names, rname, n, n_dyads, is_directed, labels,
                          row_order.astype(np.int64), blocks, ranges, edges_of(resp),
                          tuple(terms))


# --- closed forms over the dyad set ----------------------------------------------------------
def _form(term: Term | None, s: int, e: int):
    """A derived predictor on nodes s..e-1 as ('sep', [(f, g)...]), ('same', codes) or
    ('gap', a); x(i, j) = sum of f(i) g(j) for 'sep'. ``None`` is the constant 1."""
    one = np.ones(e - s)
    if term is None:
        return ("sep", [(one, one)])
    a = term.attr[s:e]
    if term.kind == SAME:
        return ("same", a.astype(np.int64))
    if term.kind == GAP:
        return ("gap", a)
    if term.kind == SENDER:
        return ("sep", [(a, one)])
    if term.kind == RECEIVER:
        return ("sep", [(one, a)])
    return ("sep", [(a, one), (one, a)])  # pair_sum


def _gap_weighted(a: np.ndarray, g: np.ndarray) -> np.ndarray:
    """h_i = sum_j |a_i - a_j| g_j, by sorting a and prefix sums (ties contribute 0)."""
    n = a.shape[0]
    o = np.argsort(a, kind="stable")
    a_s, g_s = a[o], g[o]
    pg = np.concatenate([[0.0], np.cumsum(g_s)])
    pag = np.concatenate([[0.0], np.cumsum(a_s * g_s)])
    r = np.arange(n)
    below_g, above_g = pg[r], pg[n] - pg[r + 1]
    below_ag, above_ag = pag[r], pag[n] - pag[r + 1]
    h = np.empty(n)
    # sum_{j below} (a_i - a_j) g_j + sum_{j above} (a_j - a_i) g_j
    h[o] = a_s * (below_g - above_g) - (below_ag - above_ag)
    return h


def _gap_within(a: np.ndarray, codes: np.ndarray) -> float:
    """sum over ordered pairs i != j with equal codes of |a_i - a_j|."""
    o = np.lexsort((a, codes))
    a_s, c_s = a[o], codes[o]
    starts = np.concatenate([[0], np.flatnonzero(np.diff(c_s)) + 1])
    first = np.repeat(starts, np.diff(np.concatenate([starts, [a_s.shape[0]]])))
    csum = np.concatenate([[0.0], np.cumsum(a_s)])
    idx = np.arange(a_s.shape[0])
    before = idx - first  # nodes of the same group earlier in sorted order
    # sum over earlier j in the group of (a_i - a_j)
    return 2.0 * float((a_s * before - (csum[idx] - csum[first])).sum())


def _pair_total(p, q) -> float:
    """sum over ordered pairs i != j of p(i, j) q(i, j) for two forms of ``_form``."""
    rank = {"same": 0, "gap": 1, "sep": 2}
    if rank[p[0]] > rank[q[0]]:
        p, q = q, p
    kp, kq = p[0], q[0]
    if kp == "sep":
        # sum_{i != j} f1 g1 f2 g2 = (sum f1 f2)(sum g1 g2) - sum f1 f2 g1 g2
        return float(sum((f1 * f2).sum() * (g1 * g2).sum() - (f1 * f2 * g1 * g2).sum()
                         for f1, g1 in p[1] for f2, g2 in q[1]))
    if kp == "same" and kq == "sep":
        c = p[1]
        size = int(c.max()) + 1 if c.size else 0
        # sum_groups (sum f)(sum g) - sum_i f_i g_i
        return float(sum((np.bincount(c, f, size) * np.bincount(c, g, size)).sum()
                         - (f * g).sum() for f, g in q[1]))
    if kp == "same" and kq == "same":
        c1, c2 = p[1], q[1]
        joint = c1 * (int(c2.max()) + 1 if c2.size else 1) + c2
        cnt = np.unique(joint, return_counts=True)[1].astype(np.float64)
        return float((cnt * cnt).sum() - c1.shape[0])  # sum over joint groups c (c - 1)
    if kp == "same" and kq == "gap":
        return _gap_within(q[1], p[1])
    if kp == "gap" and kq == "sep":
        return float(sum((f * _gap_weighted(p[1], g)).sum() for f, g in q[1]))
    return 2.0 * float(gap_gap_sum(p[1], q[1]))  # gap x gap


def eval_derived(term: Term, i: np.ndarray, j: np.ndarray) -> np.ndarray:
    """Values of a derived predictor (internal units) at dyads (i, j)."""
    a = term.attr
    if term.kind == SAME:
        return (a[i] == a[j]).astype(np.float64)
    if term.kind == GAP:
        return np.abs(a[i] - a[j])
    if term.kind == SENDER:
        return a[i].copy()
    if term.kind == RECEIVER:
        return a[j].copy()
    return a[i] + a[j]


def _edge_keys(ed: Edges, n: int) -> np.ndarray:
    return ed.src * n + ed.dst


def _cross_sum(prep: SparsePrepared, s: Term | None, t: Term | None) -> float:
    """sum over D of s * t (None: the constant 1), by closed forms or sums over edges."""
    nets = [u for u in (s, t) if u is not None and u.kind == NETWORK]
    if len(nets) == 2:
        ka, kb = _edge_keys(s.edges, prep.n), _edge_keys(t.edges, prep.n)
        _, ia, ib = np.intersect1d(ka, kb, assume_unique=True, return_indices=True)
        return float((s.edges.w[ia] * t.edges.w[ib]).sum())
    if len(nets) == 1:
        net = nets[0]
        other = t if net is s else s
        if other is None:
            return float(net.edges.w.sum())
        return float((net.edges.w * eval_derived(other, net.edges.src, net.edges.dst)).sum())
    total = sum(_pair_total(_form(s, a, b), _form(t, a, b)) for a, b in prep.ranges)
    return total if prep.directed else total / 2.0  # symmetric: each pair i < j counted twice


@dataclass(frozen=True)
class Moments:
    """Means over D (internal units), centred cross products X~'X~ and y's sums."""

    mean: np.ndarray  # (k,)
    cross: np.ndarray  # (k, k)
    y_sum: float
    y_sq: float


def fixed_products(prep: SparsePrepared, y: Edges | None = None) -> Moments:
    """Everything in the Gram matrix that no relabelling changes."""
    y = prep.y if y is None else y
    k = prep.k
    N = prep.n_dyads
    mean = np.array([_cross_sum(prep, t, None) for t in prep.terms]) / N
    cross = np.empty((k, k))
    for c in range(k):
        for d in range(c + 1):
            # centred: sum (x_c - m_c)(x_d - m_d) = sum x_c x_d - N m_c m_d
            v = _cross_sum(prep, prep.terms[c], prep.terms[d]) - N * mean[c] * mean[d]
            cross[c, d] = cross[d, c] = v
    return Moments(mean, cross, float(y.w.sum()), float((y.w * y.w).sum()))


# --- the plan the engine runs ---------------------------------------------------------------
def _row_tables(terms: Sequence[Term], n: int, undirected: bool):
    """The network predictors by rows: (nptr (S, n + 1), nidx, nval), see kernels.sparse."""
    nets = [t for t in terms if t.kind == NETWORK]
    nptr = np.zeros((max(len(nets), 1), n + 1), dtype=np.int64)
    idx, val = [], []
    offset = 0
    for s, t in enumerate(nets):
        i, j, w = t.edges.src, t.edges.dst, t.edges.w
        if undirected:  # both orientations, so a row holds every neighbour
            i, j, w = np.concatenate([i, j]), np.concatenate([j, i]), np.concatenate([w, w])
        o = np.lexsort((j, i))
        nptr[s, 1:] = offset + np.cumsum(np.bincount(i, minlength=n))
        nptr[s, 0] = offset
        idx.append(j[o])
        val.append(w[o])
        offset += i.shape[0]
    nidx = np.concatenate(idx) if idx else np.zeros(1, dtype=np.int64)
    nval = np.concatenate(val) if val else np.zeros(1)
    return nptr, np.ascontiguousarray(nidx, dtype=np.int64), np.ascontiguousarray(nval)


@dataclass(frozen=True, eq=False)
class SparsePlan:
    """Duck-typed like ``schemes.Plan`` for the engine: ``statistics`` and ``k``."""

    edges: Edges
    strength: np.ndarray  # (n, 2) sums of edge values by source node and by target node
    n_edge_cols: int  # attribute columns of same/gap (first in ``attr``)
    kinds: np.ndarray
    cols: np.ndarray
    center: np.ndarray
    slots: np.ndarray
    attr: np.ndarray
    nptr: np.ndarray
    nidx: np.ndarray
    nval: np.ndarray
    invert: bool
    inv_scale: np.ndarray  # (k,) 1 / (sd_y sd_x_c): raw centred cross -> standardised
    gram0: np.ndarray  # (d, d) standardised Gram without the relabelled-by-fixed block
    transforms: np.ndarray
    scale: np.ndarray  # (k,) 1 for t; sd_y / sd_x_c takes a coefficient to user units
    use_t: bool
    correlation: bool
    k: int
    n_dyads: int

    def cross(self, perms: np.ndarray) -> np.ndarray:
        """Centred cross products (B, k) of the relabelled network with each predictor."""
        out = np.empty((perms.shape[0], self.kinds.shape[0]))
        sparse_cross(self.edges.src, self.edges.dst, self.edges.w, self.strength, perms,
                     self.kinds, self.cols, self.center, self.slots, self.attr, self.nptr,
                     self.nidx, self.nval, out, self.invert, self.n_edge_cols)
        return out

    def statistics(self, row_perms: np.ndarray, col_perms: np.ndarray) -> np.ndarray:
        """Statistics (B, k) of the relabellings (one-mode: ``col_perms`` is ``row_perms``)."""
        n_perm = row_perms.shape[0]
        cross = self.cross(row_perms) * self.inv_scale
        d = self.gram0.shape[0]
        gram = np.empty((n_perm, d, d))
        fill_gram(cross.reshape(n_perm, 1, -1), self.gram0, gram)
        if self.correlation:
            r = np.empty(n_perm)
            correlation_stats(gram, r)
            return r[:, None]
        out = np.empty((n_perm, self.k))
        regression_stats(gram, self.transforms, self.scale, self.use_t, out)
        return out


def y_transforms(k: int) -> np.ndarray:
    """The y-scheme map of ``schemes.build_plan``: v = [1, y, x_1..x_k] -> for term j the
    columns [1, other x's, x_j, y]."""
    transforms = np.zeros((k, k + 2, k + 2))
    for j in range(k):
        cols = [0] + [2 + c for c in range(k) if c != j] + [2 + j, 1]
        for col, row in enumerate(cols):
            transforms[j, row, col] = 1.0
    return transforms


def _response_sd(name: str, N: int, y_sum: float, y_sq: float) -> tuple[float, float]:
    mean = y_sum / N
    var = y_sq / N - mean * mean
    if not var > 0.0:
        raise InputError(f"response {name!r} has no variation over the dyad set")
    return mean, float(np.sqrt(var))


def _check_collinear(prep: SparsePrepared, mom: Moments) -> np.ndarray:
    """Lower Cholesky factor of X~'X~; error when a predictor is constant or collinear.

    The pivot test is the dense path's (the residual norm of x_j on the intercept and the
    earlier predictors, relative to the norm of x_j), with the larger ``NORMAL_PIVOT``:
    below it the normal equations have no correct digit left.
    """
    k = prep.k
    C = mom.cross
    N = prep.n_dyads
    user_mean = mom.mean + np.array([t.shift for t in prep.terms])
    L = np.zeros((k, k))
    for j in range(k):
        s = C[j, j] - (L[j, :j] ** 2).sum()
        norm = np.sqrt(max(C[j, j], 0.0) + N * user_mean[j] ** 2)
        if not (s > 0.0) or not (np.sqrt(s) >= NORMAL_PIVOT * norm):
            name = prep.names[j]
            others = ", ".join(prep.names[:j]) or "the intercept"
            raise InputError(f"predictor {name!r} is constant or perfectly collinear with "
                             f"{others} over the dyad set")
        L[j, j] = np.sqrt(s)
        for r in range(j + 1, k):
            L[r, j] = (C[r, j] - (L[r, :j] * L[j, :j]).sum()) / L[j, j]
    return L


def build_sparse_plan(prep: SparsePrepared, mom: Moments, y_sd: float, *, statistic: str,
                      correlation: bool = False, edges: Edges | None = None) -> SparsePlan:
    """Kernel inputs, standardised invariant Gram and transforms of the sparse path."""
    k = prep.k
    N = float(prep.n_dyads)
    sx = np.sqrt(np.diag(mom.cross) / N)
    derived = [t for t in prep.terms if t.kind != NETWORK]
    attr = np.zeros((prep.n, max(len(derived), 1)))
    kinds = np.empty(k, dtype=np.int64)
    cols = np.zeros(k, dtype=np.int64)
    slots = np.zeros(k, dtype=np.int64)
    slot = 0
    # same/gap columns first: the kernel copies them relabelled for its edge loop
    on_edges = [c for c, t in enumerate(prep.terms) if t.kind in (SAME, GAP)]
    on_nodes = [c for c, t in enumerate(prep.terms) if t.kind in (SENDER, RECEIVER, PAIR_SUM)]
    for col, c in enumerate(on_edges + on_nodes):
        attr[:, col] = prep.terms[c].attr
        cols[c] = col
    for c, t in enumerate(prep.terms):
        kinds[c] = t.kind
        if t.kind == NETWORK:
            slots[c] = slot
            slot += 1
    nptr, nidx, nval = _row_tables(prep.terms, prep.n, not prep.directed)
    d = k + 2
    gram0 = np.zeros((d, d))
    gram0[0, 0] = N
    gram0[1, 1] = N  # sum of the standardised response's squares
    gram0[2:, 2:] = mom.cross / np.outer(sx, sx)
    edges = prep.y if edges is None else edges
    strength = np.stack([np.bincount(edges.src, edges.w, prep.n),
                         np.bincount(edges.dst, edges.w, prep.n)], axis=1)
    return SparsePlan(
        edges=edges, strength=strength, n_edge_cols=len(on_edges), kinds=kinds, cols=cols,
        center=np.ascontiguousarray(mom.mean), slots=slots, attr=attr, nptr=nptr, nidx=nidx,
        nval=nval, invert=not correlation,
        inv_scale=1.0 / (y_sd * sx), gram0=gram0, transforms=y_transforms(k),
        scale=np.ones(k) if statistic == "t" else y_sd / sx, use_t=statistic == "t",
        correlation=correlation, k=k, n_dyads=prep.n_dyads)


def observed_fit_sparse(prep: SparsePrepared, mom: Moments, plan: SparsePlan, y_mean: float,
                        y_sd: float) -> ObservedFit:
    """Least-squares fit on the dyad set from the closed-form Gram (normal equations).

    In standardised units (G = X~'X~ / (sd sd'), c = X~'y~ / (sd_y sd)) the slopes are
    G^-1 c; RSS = sd_y^2 (N - c'G^-1 c); Var(b) = sigma^2 (X~'X~)^-1; the intercept is
    mean(y) - sum_j b_j mean(x_j), with variance sigma^2 (1/N + m'(X~'X~)^-1 m).
    """
    k = prep.k
    p = k + 1
    N = prep.n_dyads
    if N <= p:
        raise InputError(f"too few dyads for the model: {N} complete dyads for {p} terms")
    L = _check_collinear(prep, mom)
    sx = np.sqrt(np.diag(mom.cross) / N)
    ident = np.arange(prep.n, dtype=np.int64)[None, :]
    c = plan.cross(ident)[0] * plan.inv_scale
    G = plan.gram0[2:, 2:]
    Ginv = np.linalg.inv(G)
    beta = Ginv @ c
    rss_std = max(float(N - c @ beta), 0.0)
    slopes = beta * y_sd / sx
    user_mean = mom.mean + np.array([t.shift for t in prep.terms])
    coef = np.concatenate([[y_mean - slopes @ user_mean], slopes])
    rss = rss_std * y_sd * y_sd
    sigma2 = rss / (N - p)
    xinv = Ginv / np.outer(sx, sx)  # (X~'X~)^-1
    se = np.sqrt(sigma2 * np.concatenate([[1.0 / N + user_mean @ xinv @ user_mean],
                                           np.diag(xinv)]))
    with np.errstate(divide="ignore", invalid="ignore"):
        t = coef / se
    # R factor of [1, X] for the shared condition-number check (lower block: chol(X~'X~)')
    rx = np.zeros((p, p))
    rx[0, 0] = np.sqrt(N)
    rx[0, 1:] = np.sqrt(N) * user_mean
    rx[1:, 1:] = L.T
    cond = _standardised_condition(rx, k, prep.names)
    return ObservedFit(coef, se, t, 1.0 - rss_std / N, N, rss, cond)


def default_chunk_size(prep: SparsePrepared) -> int:
    per_perm = prep.y.size * (prep.k + 1) + prep.n
    return int(np.clip(CHUNK_EDGE_WORK // max(per_perm, 1), 1, MAX_CHUNK))


def _run(prep: SparsePrepared, plan: SparsePlan, *, permutations, seed, jobs, exact,
         chunk_size, progress, backend, scheduler):
    from . import api as _api  # lazily: api dispatches to this module

    if backend not in _api.BACKENDS:
        raise InputError(f"backend must be one of {', '.join(_api.BACKENDS)}; got {backend!r}")
    if (backend == "dask") != (scheduler is not None):
        raise InputError("backend 'dask' and a scheduler address go together")
    entropy = _api._entropy(seed)
    cs = int(chunk_size) if chunk_size is not None else default_chunk_size(prep)
    draws = _api._draws(prep.blocks, permutations=permutations, exact=exact,
                        entropy=entropy, chunk_size=cs)
    # the observed statistic goes through the same kernels as the permuted ones
    ident = np.arange(prep.n, dtype=np.int64)[None, :]
    observed = plan.statistics(ident, ident)[0]
    tick = _api._ticker(progress, draws.total)
    null = run_all(plan, draws, jobs=jobs, backend=backend, scheduler=scheduler,
                   on_chunk=None if tick is None else (lambda c, st: tick(st.shape[0])))
    return draws, observed, null


def _check_sparse_options(*, out: Any, shard: Any, storage: str) -> None:
    if out is not None or shard:
        raise InputError("out/shard: the sparse path does not write run files yet; leave "
                         f"out=None and shard=None (got out={out!r}, shard={shard!r})")
    if storage not in ("float64", "float32"):
        raise InputError(f"storage must be one of float64, float32; got {storage!r}")


def _summary(prep: SparsePrepared, *, kind, model, scheme, statistic, method, terms) -> dict:
    return dict(kind=kind, model=model, scheme=scheme, statistic=statistic, method=method,
                terms=list(terms), tested=list(prep.names), response=prep.response_name,
                n_nodes=prep.n, n_dyads=prep.n_dyads, directed=prep.directed, two_mode=False,
                notes=[NOTE.format(edges=prep.y.size)])


# --- entry points (called by dyadperm.regress / correlate) -------------------------------------
def regress(y: Any, predictors: Any, *, model: str = "linear", scheme: str = "y",
            statistic: str = "t", permutations: int = 10_000, seed: Any = None, jobs: int = 1,
            directed: bool | None = None, groups: Any = None, dyads: str | None = None,
            exact: Any = "auto", chunk_size: int | None = None, out: Any = None,
            progress: bool | Callable[[int, int], None] = False, storage: str = "float64",
            backend: str = "threads", scheduler: str | None = None, shard: str | None = None,
            provenance: dict | None = None) -> RegressionResult:
    """:func:`dyadperm.regress` on the sparse path (module docstring). ``storage`` has no
    effect here (no dyad layer is stored); run files (``out``, ``shard``) are not written."""
    from . import api as _api

    _api._check_common(permutations=permutations, seed=seed, jobs=jobs, exact=exact,
                       chunk_size=chunk_size)
    if model not in _api.MODELS:
        raise InputError(f"model must be one of {', '.join(_api.MODELS)}; got {model!r}")
    check_options(scheme=scheme, statistic=statistic)
    if scheme != "y":
        raise InputError(f"scheme {scheme!r} relabels dense residual matrices (every dyad "
                         "holds a residual), which a sparse response cannot avoid: use "
                         "scheme='y' on sparse input, or pass dense arrays (.toarray()) for "
                         "a network that fits in memory")
    _check_sparse_options(out=out, shard=shard, storage=storage)
    prep = prepare_sparse(y, predictors, directed=directed, groups=groups, dyads=dyads)
    mom = fixed_products(prep)
    y_mean, y_sd = _response_sd(prep.response_name, prep.n_dyads, mom.y_sum, mom.y_sq)
    _check_collinear(prep, mom)
    plan = build_sparse_plan(prep, mom, y_sd, statistic=statistic)
    fit = observed_fit_sparse(prep, mom, plan, y_mean, y_sd)
    draws, observed, null = _run(prep, plan, permutations=permutations, seed=seed, jobs=jobs,
                                 exact=exact, chunk_size=chunk_size, progress=progress,
                                 backend=backend, scheduler=scheduler)
    summary = _summary(prep, kind="regression", model=model, scheme=scheme,
                       statistic=statistic, method=None, terms=("intercept",) + prep.names)
    fit_arrays = dict(coef=fit.coef, se=fit.se, stat=fit.t if statistic == "t" else fit.coef,
                      fit=np.array([fit.r2, np.nan]), kernel_stat=observed)
    return _api.build_result(summary, fit_arrays, null, exact=draws.exact,
                             chunk_size=draws.chunk_size,
                             seed=None if draws.exact else draws.entropy)


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
    mult = np.empty(prep.n)
    for s, e in prep.ranges:
        mult[s:e] = e - s - 1
    vals, inv = np.unique(t.attr, return_inverse=True)
    per_value = np.bincount(inv, mult, vals.size)
    below = np.concatenate([[0.0], np.cumsum(per_value)[:-1]])
    rank = (below + (per_value + 1) / 2.0)[inv]
    return Term(t.name, t.kind, rank - rank.mean(), 0.0, None)


def correlate(a: Any, b: Any, *, method: str = "pearson", permutations: int = 10_000,
              seed: Any = None, jobs: int = 1, directed: bool | None = None, groups: Any = None,
              dyads: str | None = None, exact: Any = "auto", chunk_size: int | None = None,
              out: Any = None, progress: bool | Callable[[int, int], None] = False,
              storage: str = "float64", backend: str = "threads", scheduler: str | None = None,
              shard: str | None = None, provenance: dict | None = None) -> CorrelationResult:
    """:func:`dyadperm.correlate` on the sparse path: ``b`` is relabelled, as on the dense
    path, so the sum runs over ``a``'s edges with ``b`` read at (pi(i), pi(j))."""
    from dataclasses import replace

    from . import api as _api

    _api._check_common(permutations=permutations, seed=seed, jobs=jobs, exact=exact,
                       chunk_size=chunk_size)
    if method not in ("pearson", "spearman"):
        raise InputError(f"method must be 'pearson' or 'spearman'; got {method!r}")
    _check_sparse_options(out=out, shard=shard, storage=storage)
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
    mom = fixed_products(prep)
    _, a_sd = _response_sd(prep.response_name, N, mom.y_sum, mom.y_sq)
    if not mom.cross[0, 0] > 0.0:
        raise InputError(f"{prep.names[0]!r} has no variation over the dyad set")
    plan = build_sparse_plan(prep, mom, a_sd, statistic="t", correlation=True)
    draws, observed, null = _run(prep, plan, permutations=permutations, seed=seed, jobs=jobs,
                                 exact=exact, chunk_size=chunk_size, progress=progress,
                                 backend=backend, scheduler=scheduler)
    r = observed
    with np.errstate(divide="ignore", invalid="ignore"):
        se = np.sqrt((1 - r ** 2) / (N - 2))
    summary = _summary(prep, kind="correlation", model="correlation", scheme="y",
                       statistic="r", method=method, terms=prep.names)
    fit_arrays = dict(coef=r, se=se, stat=r, fit=np.array([np.nan, np.nan]), kernel_stat=r)
    return _api.build_result(summary, fit_arrays, null, exact=draws.exact,
                             chunk_size=draws.chunk_size,
                             seed=None if draws.exact else draws.entropy)
