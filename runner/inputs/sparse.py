"""Sparse inputs: networks given by their edges, on the engine's internal node order.

A :class:`SparseNetwork` (or a scipy.sparse matrix) holds a network of very many nodes in
O(edges) memory. :func:`prepare_sparse` puts a sparse response, sparse predictors and
predictors derived from node attributes on one node order (groups contiguous), decides
directedness and the dyad set as ``design.prepare`` does for dense inputs, and keeps
everything as edge lists and attribute vectors: no n x n array is ever built. The sparse
route (``dyadperm.routes.sparse``) computes on these.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Mapping

import numpy as np
import scipy.sparse as sp

from ..errors import InputError
from ..kernels.sparse import GAP, NETWORK, PAIR_SUM, RECEIVER, SAME, SENDER  # noqa: F401
from . import memory
from .blocks import Blocks
from .design import _group_order, _reorder, decide_directed, decide_dyads, name_predictors, \
    node_groups
from .dyadic import NodeDerived, Reverse, _node_vector, _series_values, network_name
from .labels import as_labels, sorted_labels
from .optional import is_frame, is_series, loaded_pandas

KIND_CODES = {"same": SAME, "gap": GAP, "sender": SENDER, "receiver": RECEIVER,
              "pair_sum": PAIR_SUM}
# A scipy.sparse response with scheme dsp or freedman-lane whose dense layers fit in this
# many bytes is densified and runs on the dense path (as before the sparse path had those
# schemes); above it, it stays sparse.
DENSIFY_LIMIT = 2 * 1024 ** 3


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
            per_layer = memory.gib(8 * n * n)
            raise InputError(f"{what}: edge {e} ({labels[rows[e]]!r}, {labels[cols[e]]!r}) has "
                             f"value {w[e]}; the sparse path takes no missing or infinite "
                             "values (give dense arrays with NaN for missing dyads: "
                             f"{per_layer} per network of {n:,} nodes)")
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

    True when the response is sparse and every predictor is sparse or derived from node
    attributes, for every linear scheme. One exception keeps earlier results: a small
    scipy.sparse response (dense layers within ``DENSIFY_LIMIT``) with scheme dsp or
    freedman-lane is densified and runs on the dense path, as before the sparse path had
    those schemes (the two paths agree to about 1e-13, not bit for bit; a
    :class:`SparseNetwork` always takes the sparse path). A :class:`SparseNetwork` response
    with a dense predictor is an error (it has no dense form to fall back on).
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
                                 "derived from node attributes; "
                                 + _dense_advice(y.shape, len(items)))
            return False
    if scheme != "y" and sp.issparse(y):
        n = y.shape[0] * y.shape[1]
        if 8 * n * (len(items) + 2) <= DENSIFY_LIMIT:
            return False
    return True


def _dense_advice(shape: tuple[int, int], k: int) -> str:
    """What the dense route would need for ``k`` predictors, for refusals."""
    n, m = shape
    need = memory.dense_route_bytes(n, m, k)
    avail = memory.available_bytes()
    have = "" if avail is None else f" ({memory.gib(avail)} available)"
    return (f"the dense route would need {memory.gib(need)} of memory for {n:,} x {m:,} "
            f"dyads{have}; densify every network (.toarray()) if it fits")


def refuse_edges(y: Any, predictors: Any, *, reason: str) -> None:
    """InputError when a SparseNetwork reaches a route that has no sparse form.

    ``reason`` says why the dense route runs (the model, a dense response); the message
    names the network and what the dense route would need.
    """
    try:
        items = _predictor_objects(predictors)
    except InputError:
        return  # the route reports it in its own words
    named = [("response", network_name(y) or "response", y)] + [
        ("predictor", name, obj.network if isinstance(obj, Reverse) else obj)
        for name, obj in items]
    for role, name, obj in named:
        if isinstance(obj, SparseNetwork):
            shape = getattr(y, "shape", obj.shape)
            raise InputError(f"{role} {name!r} is a SparseNetwork (edge list), but {reason}; "
                             + _dense_advice(tuple(shape), len(items)))


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
                                 "sparse path takes no missing values; "
                                 + _dense_advice((n, n), len(items)))
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
