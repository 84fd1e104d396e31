"""Sparse inputs: networks given by their edges, on the engine's internal node order.

A :class:`SparseNetwork` (or a scipy.sparse matrix) holds a network of very many nodes in
O(edges) memory, one-mode or two-mode (row nodes x column nodes). :func:`prepare_sparse`
puts a sparse response, sparse predictors and predictors derived from node attributes on
one node order (groups contiguous; two-mode rows and columns each by label), decides
directedness and the dyad set as ``design.prepare`` does for dense inputs, and keeps
everything as edge lists and attribute vectors: no n x n array is ever built. The sparse
route (``dyadperm.routes.sparse``) computes on these; :func:`takes` says whether an input
goes there, :func:`refuse_edges` refuses a SparseNetwork where no sparse form exists.
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
from .labels import as_labels, label_order, sorted_labels
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
    """A network given by its edges; every other dyad holds 0.

    One-mode (one node set, ``col_labels`` None) or two-mode (row nodes x column nodes,
    ``col_labels`` given; rows and columns are relabelled independently).

    Parameters
    ----------
    rows, cols : sequence of int, length E
        Edge endpoints as node positions: row 0 .. n - 1 (the source for directed data)
        and column 0 .. m - 1 (the target; one-mode: 0 .. n - 1).
    weights : sequence of float, length E, or None
        Edge values (None: every edge has value 1). No NaN: the sparse path has no
        missing values. Zero values are allowed and mean no tie.
    labels : sequence of str, or int
        The n node labels (row nodes for two-mode data; isolated nodes included), or n
        for labels "0" .. "n-1".
    directed : bool or None
        One-mode only. None: undirected when the edges are symmetric (and every other
        input too). False: each pair may be listed once, in either orientation (or in
        both with the same value).
    name : str or None
        Name used in messages and result tables.
    col_labels : sequence of str, or int, or None
        Two-mode data: the m column node labels, or m for labels "0" .. "m-1".

    Self-loops of one-mode data are allowed and ignored (the diagonal never enters a
    fit); in two-mode data (i, i) is an ordinary cell. The same (row, col) pair given
    twice is an error.
    """

    rows: Any
    cols: Any
    weights: Any = None
    labels: Any = None
    directed: bool | None = None
    name: str | None = None
    col_labels: Any = None

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
        if self.labels is None:
            raise InputError(f"{what}: give labels (the node labels, or the number of nodes)")
        labels = _label_tuple(self.labels, what, "node")
        two_mode = self.col_labels is not None
        col_labels = _label_tuple(self.col_labels, what, "column node") if two_mode else labels
        if two_mode and self.directed is False:
            raise InputError(f"{what}: directed=False applies to one-mode data only (this "
                             "network has col_labels: two-mode)")
        n, m = len(labels), len(col_labels)
        for pos, size, kind in ((rows, n, "row" if two_mode else "node"),
                                (cols, m, "column" if two_mode else "node")):
            if not pos.size:
                continue
            lo, hi = int(pos.min()), int(pos.max())
            if not two_mode:  # one node set: report the first bad position of either
                lo = min(int(rows.min()), int(cols.min()))
                hi = max(int(rows.max()), int(cols.max()))
            if lo < 0 or hi >= size:
                bad = lo if lo < 0 else hi
                raise InputError(f"{what}: {kind} position {bad} is outside 0 .. {size - 1} "
                                 f"({size} labels)")
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
            size = f"{n:,} nodes" if not two_mode else f"{n:,} x {m:,} nodes"
            raise InputError(f"{what}: edge {e} ({labels[rows[e]]!r}, {col_labels[cols[e]]!r}) "
                             f"has value {w[e]}; the sparse path takes no missing or infinite "
                             "values (give dense arrays with NaN for missing dyads: "
                             f"{memory.gib(8 * n * m)} per network of {size})")
        rows = rows.astype(np.int64)
        cols = cols.astype(np.int64)
        keys = rows * max(m, 1) + cols
        uniq, first, counts = np.unique(keys, return_index=True, return_counts=True)
        if uniq.size < keys.size:
            e = int(first[np.argmax(counts > 1)])
            raise InputError(f"{what}: the dyad ({labels[rows[e]]!r}, "
                             f"{col_labels[cols[e]]!r}) is given more than once")
        if self.directed is False:
            rows, cols, w = _undirected_edges(rows, cols, w, labels, what)
        object.__setattr__(self, "rows", rows)
        object.__setattr__(self, "cols", cols)
        object.__setattr__(self, "weights", w)
        object.__setattr__(self, "labels", labels)
        object.__setattr__(self, "col_labels", col_labels if two_mode else None)

    @property
    def n(self) -> int:
        """Number of (row) nodes."""
        return len(self.labels)

    @property
    def m(self) -> int:
        """Number of column nodes (one-mode: n)."""
        return len(self.col_node_labels)

    @property
    def two_mode(self) -> bool:
        return self.col_labels is not None

    @property
    def col_node_labels(self) -> tuple[str, ...]:
        return self.labels if self.col_labels is None else self.col_labels

    @property
    def shape(self) -> tuple[int, int]:
        return (self.n, self.m)

    def toarray(self) -> np.ndarray:
        """The dense n x m float64 array (for networks that fit in memory)."""
        out = np.zeros((self.n, self.m))
        out[self.rows, self.cols] = self.weights
        return out

    @classmethod
    def from_scipy(cls, matrix: Any, *, labels: Any = None, directed: bool | None = None,
                   name: str | None = None, col_labels: Any = None) -> "SparseNetwork":
        """A SparseNetwork from a scipy.sparse matrix (duplicates summed).

        A square matrix is one-mode unless ``col_labels`` is given; a rectangular one is
        two-mode (rows and columns labelled "0" .. unless ``labels``/``col_labels``).
        """
        coo = sp.coo_array(matrix)
        coo.sum_duplicates()
        n, m = coo.shape
        if col_labels is None and n != m:
            col_labels = m
        return cls(coo.row, coo.col, coo.data, n if labels is None else labels, directed, name,
                   col_labels)

    @classmethod
    def from_edges(cls, table: Any, *, source: Any, target: Any, weight: Any = None,
                   nodes: Any = None, directed: bool | None = None,
                   name: str | None = None, col_nodes: Any = None,
                   two_mode: bool = False) -> "SparseNetwork":
        """A network from a table of labelled edges, one row per tie.

        Parameters
        ----------
        table : pandas DataFrame, or a mapping column name -> sequence
            The edge table (a dict of lists or numpy arrays needs no pandas).
        source, target : column names
            The tie's endpoints, as node labels (compared as text: ``str`` of each value);
            two-mode data: the row node and the column node.
        weight : column name or None
            The tie's value (numbers, no missing values: the sparse path has none); None:
            every listed tie has value 1.
        nodes : sequence of labels, optional
            The node set and its order, isolated nodes included (two-mode: the row nodes).
            Default: every label seen in ``source`` and ``target`` (two-mode: in
            ``source``), in the engine's label order (:func:`dyadperm.labels.label_order`).
        directed, name
            As for :class:`SparseNetwork`.
        col_nodes : sequence of labels, optional
            Two-mode data: the column nodes (default: every label seen in ``target``).
        two_mode : bool
            Rows and columns are different node sets (implied by ``col_nodes``).

        A label not in ``nodes`` (``col_nodes``), a missing label, and the same tie
        (source, target) listed twice are errors naming the table row (counted from 0), as
        in study files' edge lists. One-mode self-loops are allowed and ignored.
        """
        shown = name or "edge table"
        two_mode = bool(two_mode or col_nodes is not None)
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
            labels = sorted_labels(dict.fromkeys(src if two_mode else src + dst))
            where = ""
        else:
            labels = as_labels(_column_values(nodes), f"{shown}: nodes")
            where = " (not in nodes)"
        col_labels, col_where = labels, where
        if two_mode and col_nodes is None:
            col_labels, col_where = sorted_labels(dict.fromkeys(dst)), ""
        elif two_mode:
            col_labels = as_labels(_column_values(col_nodes), f"{shown}: col_nodes")
            col_where = " (not in col_nodes)"
        rows = _positions(src, labels, shown, where)
        cols = _positions(dst, col_labels, shown, col_where)
        key = rows * max(len(col_labels), 1) + cols
        order = np.argsort(key, kind="stable")
        dup = np.flatnonzero(key[order][1:] == key[order][:-1])
        if dup.size:
            a, b = sorted((int(order[dup[0]]), int(order[dup[0] + 1])))
            raise InputError(f"{shown}: duplicate edge {src[a]!r} -> {dst[a]!r} at rows {a} "
                             f"and {b} (aggregate repeated ties first)")
        return cls(rows, cols, w, labels, directed, name, col_labels if two_mode else None)


def _label_tuple(labels: Any, what: str, kind: str) -> tuple[str, ...]:
    """Labels as text ("0" .. "n-1" for a count n), checked distinct."""
    if isinstance(labels, (int, np.integer)) and not isinstance(labels, bool):
        out = tuple(str(i) for i in range(int(labels)))
    else:
        out = tuple(str(v) for v in labels)
    if len(set(out)) != len(out):
        raise InputError(f"{what}: {kind} labels must be distinct")
    return out


def _positions(column: list[str], labels: tuple[str, ...], shown: str, where: str) -> np.ndarray:
    """Positions in ``labels`` of an edge table's labels; an unknown one names its row."""
    pos = {lab: k for k, lab in enumerate(labels)}
    idx = np.empty(len(column), dtype=np.int64)
    for e, lab in enumerate(column):
        at = pos.get(lab)
        if at is None:
            raise InputError(f"{shown} row {e}: unknown node label {lab!r}{where}")
        idx[e] = at
    return idx


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
    shift: float  # the predictor's value in the user's units minus its value here
    edges: Edges | None
    # two-mode: the column nodes' attribute (``attr`` holds the row nodes'; None for a
    # sender, whose ``col_attr`` is None too; a receiver has only ``col_attr``)
    col_attr: np.ndarray | None = None


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
    col_labels: tuple[str, ...] | None = None  # two-mode: the column nodes
    col_order: np.ndarray | None = None  # two-mode: internal column -> user's column

    @property
    def k(self) -> int:
        return len(self.terms)

    @property
    def two_mode(self) -> bool:
        return self.col_labels is not None

    @property
    def m(self) -> int:
        """Column nodes (one-mode: n)."""
        return self.n if self.col_labels is None else len(self.col_labels)


def _as_network(obj: Any, name: str, labels: tuple[str, ...] | None,
                col_labels: tuple[str, ...] | None = None) -> SparseNetwork:
    """A response (``labels`` None) or a predictor on the response's nodes (by label)."""
    two_mode = col_labels is not None
    if isinstance(obj, SparseNetwork):
        net = obj
    else:
        want = None if labels is None else (len(labels), len(col_labels or labels))
        if want is not None and tuple(obj.shape) != want:
            raise InputError(f"predictor {name!r} has shape {obj.shape[0]} x {obj.shape[1]}; "
                             f"the response has {want[0]} x {want[1]}")
        net = SparseNetwork.from_scipy(obj, labels=labels, name=name, col_labels=col_labels)
    if labels is None:
        return net
    if net.two_mode != two_mode:
        raise InputError(f"predictor {name!r} is {'two' if net.two_mode else 'one'}-mode but "
                         f"the response is {'two' if two_mode else 'one'}-mode")
    if net.labels == labels and net.col_labels == col_labels:
        return net
    at_r = _inverse(_reorder(name, net.labels, labels, "row" if two_mode else "node"))
    at_c = _inverse(_reorder(name, net.col_labels, col_labels, "column")) if two_mode else at_r
    return SparseNetwork(at_r[net.rows], at_c[net.cols], net.weights, labels, net.directed,
                         net.name, col_labels)


def _inverse(at: np.ndarray) -> np.ndarray:
    """The inverse of a permutation given as positions."""
    inv = np.empty_like(at)
    inv[at] = np.arange(at.shape[0], dtype=at.dtype)
    return inv


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
    if resp.two_mode:
        return _prepare_two_mode(resp, rname, _predictor_objects(predictors),
                                 directed=directed, groups=groups, dyads=dyads)
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


def _derived_vector(obj: NodeDerived, name: str, values: Any, labels: tuple[str, ...],
                    shape: tuple[int, int], k: int) -> np.ndarray:
    """One attribute of a derived predictor on ``labels``: numeric for every kind but
    ``same``, no missing value (the sparse path has none)."""
    vec = _node_vector(values, labels, name)
    if obj.kind != "same" and vec.dtype.kind not in "fiub":
        raise InputError(f"derived predictor '{obj.kind}' needs a numeric attribute; "
                         "got text values")
    if vec.dtype.kind == "f" and np.isnan(vec).any():
        node = labels[int(np.flatnonzero(np.isnan(vec))[0])]
        raise InputError(f"{name}: node {node!r} has no attribute value (NaN); the sparse "
                         "path takes no missing values; " + _dense_advice(shape, k))
    return vec


def _prepare_two_mode(resp: SparseNetwork, rname: str, items: list, *, directed: Any,
                      groups: Any, dyads: Any) -> SparsePrepared:
    """``prepare_sparse`` of two-mode data: every cell of n x m is a dyad; rows and columns
    are relabelled independently, each in label order (as ``design.prepare``)."""
    labels, col_labels = resp.labels, resp.col_labels
    n, m = resp.n, resp.m
    if n < 2 or m < 2:
        raise InputError(f"too few nodes: got {n} x {m}; need at least 3 nodes (2 x 2 "
                         "two-mode)")
    if directed is False:
        raise InputError("directed=False does not apply to two-mode (rectangular) data")
    if groups is not None:
        raise InputError("groups: supported for one-mode networks only")
    decide_dyads(dyads, None)
    row_order, col_order = label_order(labels), label_order(col_labels)
    pos_r, pos_c = _inverse(row_order), _inverse(col_order)

    def edges_of(net: SparseNetwork) -> Edges:
        keep = net.weights != 0.0
        i, j, w = pos_r[net.rows[keep]], pos_c[net.cols[keep]], net.weights[keep]
        o = np.lexsort((j, i))
        return Edges(np.ascontiguousarray(i[o]), np.ascontiguousarray(j[o]),
                     np.ascontiguousarray(w[o]))

    terms = []
    k = len(items)
    for name, obj in items:
        if isinstance(obj, Reverse):
            raise InputError(f"predictor {name!r}: reverse needs one-mode data")
        if not isinstance(obj, NodeDerived):
            net = _as_network(obj, name, labels, col_labels)
            terms.append(Term(name, NETWORK, None, 0.0, edges_of(net)))
            continue
        # as NodeDerived.dense: sender reads the rows' attribute, receiver the columns',
        # the others both (col_values: the column nodes' attribute)
        a = b = None
        if obj.kind != "receiver":
            a = _derived_vector(obj, name, obj.values, labels, (n, m), k)[row_order]
        if obj.kind != "sender":
            if obj.col_values is None:
                raise InputError(f"{name}: two-mode data need col_values (the column nodes' "
                                 "attribute)")
            b = _derived_vector(obj, name, obj.col_values, col_labels, (n, m), k)[col_order]
        if obj.kind == "same":
            _, codes = np.unique(np.concatenate([a, b]), return_inverse=True)
            codes = codes.astype(np.float64)
            terms.append(Term(name, SAME, codes[:n], 0.0, None, codes[n:]))
            continue
        a = None if a is None else a.astype(np.float64)
        b = None if b is None else b.astype(np.float64)
        if obj.kind == "gap":  # |a_i - b_j| keeps its values when both shift together
            mid = float(np.concatenate([a, b]).mean())
            terms.append(Term(name, GAP, a - mid, 0.0, None, b - mid))
            continue
        ma = 0.0 if a is None else float(a.mean())
        mb = 0.0 if b is None else float(b.mean())
        terms.append(Term(name, KIND_CODES[obj.kind], None if a is None else a - ma,
                          ma + mb, None, None if b is None else b - mb))
    names = tuple(name for name, _ in items)
    blocks = Blocks(n, m, ((0, n),), ((0, m),))
    return SparsePrepared(names, rname, n, n * m, True, labels, row_order.astype(np.int64),
                          blocks, ((0, n),), edges_of(resp), tuple(terms), col_labels,
                          col_order.astype(np.int64))
