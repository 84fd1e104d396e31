"""DSP and Freedman–Lane on the sparse path: memory O(edges + n), time per relabelling
O(edges + n log n).

The dense engine reads every scheme off the Gram matrix of v = [1, relabelled layers,
fixed layers] through a linear map per tested term (``routes.linear``). With complete
data over a dyad set D that every relabelling maps onto itself, everything in that Gram
is invariant except the relabelled-by-fixed block

    C[a, c] = sum over D of x_a[pi(i), pi(j)] * x_c[i, j].

Double semi-partialling (Dekker, Krackhardt & Snijders 2007, Psychometrika 72:563–581)
relabels the predictors (fixed: predictors and response); Freedman & Lane (1983, J. Bus.
Econ. Stat. 1:292–298) relabel the response and the predictors (fixed: the predictors).
Their residuals relabel as the same linear combinations of relabelled layers, so C is all
a relabelling needs; the sparse path has no missing values, so one pass serves every
tested term. The standardised invariant Gram comes from the closed forms of
``sparse_products.fixed_products``; the transforms are those of ``linear._masked_passes``
(dsp: the residual of x_j on [1, other x] from the observed Gram; Freedman–Lane: the
reduced-model residual of y), in one pass.

Each C[a, c] has a cheap exact form (``kernels.sparse_pairs``):

- ``sender``, ``receiver`` and ``pair_sum`` with anything: x(i, j) = f(i) + g(j), so the sum
  is sum_i f(pi(i)) rowsum_c(i) + sum_j g(pi(j)) colsum_c(j) (or, with the separable layer
  fixed, the other layer's row and column sums read at relabelled nodes): O(n);
- a sparse network with anything else: one pass over an edge list, the other layer read
  at the mapped endpoints (by the substitution u = pi(i), v = pi(j) either side may be the
  one iterated). Network x network: dsp iterates the fixed network's edges and reads the
  relabelled one, Freedman–Lane the other way round, so the response is never looked up
  and every edge list that reads one network shares a sweep over its mapped rows;
- ``same`` x ``same``: a contingency table of (fixed category, relabelled category), one
  fixed category at a time: O(n + categories);
- ``gap`` x ``same``: nodes in increasing order of the gap attribute, running counts and
  sums per category: O(n + categories);
- ``gap`` x ``gap``: the univariate distance-covariance sum by a Fenwick tree, O(n log n)
  (Huo & Székely 2016, Technometrics 58:435–447 [memory]).

The diagonal never enters (one-mode sums run over i != j); undirected sums are half the
symmetric ordered sums (sums over the stored edges i < j are taken as they are).

Two-mode data (rows and columns relabelled independently, derived layers
x(i, j) = f(a_i, b_j): ``sender`` reads the row nodes' attribute, ``receiver`` the column
nodes', ``same``/``gap``/``pair_sum`` both) are covered by ``PairDyads`` and
``build_pair_sums``. For them the route takes every statistic from here: the fixed
products (``pair_moments``: the pair sums of the predictors at the identity), schemes y,
dsp and Freedman–Lane (``build_sparse_scheme_plan``) and QAP correlation
(``build_sparse_correlation_plan``).
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from ..errors import InputError
from ..inputs.sparse import Edges, SparsePrepared
from ..kernels.sparse_pairs import (BACKWARD, FORWARD, GAP, NETWORK, PAIR_SUM, RECEIVER, SAME,
                                   SENDER, edge_pair_sums, gap_gap_sums, gap_same_sums,
                                   node_pair_sums, same_same_sums)
from ..kernels.stats import (INTERVAL_WIDTH, NO_ROWS, correlation_stats, fill_gram,
                             regression_stats)
from ..settings import check_regression
from .linear import _transform
from .sparse_products import Moments, _check_collinear, _response_sd, fixed_products

SEPARABLE = (SENDER, RECEIVER, PAIR_SUM)
# Row tables hold int32 column indices and positions (kernels.sparse_pairs.edge_pair_sums).
INT32_LIMIT = 2 ** 31 - 1


# --- layers and dyad sets ---------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class PairLayer:
    """One layer in the units its sums are taken in.

    kind : SAME, GAP, SENDER, RECEIVER, PAIR_SUM or NETWORK (kernels.sparse_pairs).
    row, col : node attributes of the row and column nodes (one-mode: the same vector);
        ``same``: int64 category codes 0 .. K-1 shared by rows and columns; ``sender``
        has no ``col``, ``receiver`` no ``row``; x(i, j) = f(row_i, col_j).
    edges : a network's edges on the dyad set (undirected: i < j), else None.
    mean : the layer's mean over the dyad set.
    """

    kind: int
    row: np.ndarray | None
    col: np.ndarray | None
    edges: Edges | None
    mean: float


@dataclass(frozen=True, eq=False)
class PairDyads:
    """The dyad set: one-mode pairs i != j inside a tile (undirected: i < j), or two-mode
    every cell of n x m. Tiles are consecutive node ranges covering 0 .. n - 1."""

    n: int
    m: int
    tiles: tuple[tuple[int, int], ...]
    one_mode: bool
    directed: bool

    @property
    def n_ordered(self) -> int:
        """Ordered dyads (two-mode: cells): the count every ordered sum runs over."""
        if not self.one_mode:
            return self.n * self.m
        return int(sum((e - s) * (e - s - 1) for s, e in self.tiles))

    @property
    def n_dyads(self) -> int:
        return self.n_ordered if (self.directed or not self.one_mode) else self.n_ordered // 2


def _gap_row_sums(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """h_i = sum_j |a_i - b_j| for every i, by sorting b and prefix sums."""
    bs = np.sort(b)
    pre = np.concatenate([[0.0], np.cumsum(bs)])
    k = np.searchsorted(bs, a, side="right")  # b_j <= a_i for j < k
    return a * k - pre[k] + (pre[-1] - pre[k]) - a * (bs.size - k)


def node_sums(layer: PairLayer, dy: PairDyads) -> tuple[np.ndarray, np.ndarray]:
    """Row and column sums of a layer over the ordered dyad set (one-mode: j != i inside
    the tile; undirected networks: both orientations), shapes (n,) and (m,)."""
    n, m = dy.n, dy.m
    k = layer.kind
    if k == NETWORK:
        ed = layer.edges
        ro = np.bincount(ed.src, ed.w, n)
        ri = np.bincount(ed.dst, ed.w, m)
        if dy.one_mode and not dy.directed:
            ro = ri = ro + ri
        return ro, ri
    ro = np.zeros(n)
    ri = np.zeros(m)
    tiles = dy.tiles if dy.one_mode else (((0, n), (0, m)),)
    for tile in tiles:
        (rs, re), (cs, ce) = (tile, tile) if dy.one_mode else tile
        a = None if layer.row is None else layer.row[rs:re]
        b = None if layer.col is None else layer.col[cs:ce]
        diag = 1 if dy.one_mode else 0  # one-mode sums leave out j = i
        if k == SAME:
            K = int(max(a.max(initial=-1), b.max(initial=-1))) + 1
            cnt_b = np.bincount(b, minlength=K)
            cnt_a = np.bincount(a, minlength=K)
            ro[rs:re] = cnt_b[a] - diag
            ri[cs:ce] = cnt_a[b] - diag
        elif k == GAP:
            ro[rs:re] = _gap_row_sums(a, b)
            ri[cs:ce] = _gap_row_sums(b, a)
        else:
            if a is not None:  # f(i): row i holds it in each of its cells
                ro[rs:re] += a * (ce - cs - diag)
                ri[cs:ce] += a.sum() - (a if diag else 0.0)
            if b is not None:  # g(j)
                ro[rs:re] += b.sum() - (b if diag else 0.0)
                ri[cs:ce] += b * (re - rs - diag)
    return ro, ri


def _separable_parts(layer: PairLayer):
    """(f, alpha, g, beta): x(i, j) = f_i + g_j with alpha + beta = mean (None: absent)."""
    if layer.kind == SENDER:
        return layer.row, layer.mean, None, 0.0
    if layer.kind == RECEIVER:
        return None, 0.0, layer.col, layer.mean
    return layer.row, 0.5 * layer.mean, layer.col, 0.5 * layer.mean


def _row_tables(layers, which, n, undirected):
    """Network layers ``which`` by rows: (nptr (P, n + 1), nidx int32, nvalz), see
    ``kernels.sparse_pairs.edge_pair_sums`` (nvalz[0] = 0, the values from index 1)."""
    nptr = np.zeros((max(len(which), 1), n + 1), dtype=np.int64)
    idx, val = [], [np.zeros(1)]
    offset = 0
    for s, li in enumerate(which):
        ed = layers[li].edges
        i, j, w = ed.src, ed.dst, ed.w
        if undirected:  # both orientations, so a row holds every neighbour
            i, j, w = np.concatenate([i, j]), np.concatenate([j, i]), np.concatenate([w, w])
        o = np.lexsort((j, i))
        nptr[s, 0] = offset
        nptr[s, 1:] = offset + np.cumsum(np.bincount(i, minlength=n))
        idx.append(j[o])
        val.append(w[o])
        offset += i.shape[0]
    if offset >= INT32_LIMIT or n >= INT32_LIMIT:
        raise InputError(f"the sparse dsp and freedman-lane kernels index rows with 32-bit "
                         f"integers: at most {INT32_LIMIT - 1:,} nodes and stored entries; "
                         f"got {n:,} nodes and {offset:,} entries")
    nidx = np.concatenate(idx) if idx else np.zeros(1, dtype=np.int32)
    return (nptr, np.ascontiguousarray(nidx, dtype=np.int32),
            np.ascontiguousarray(np.concatenate(val)))


class _Columns:
    """Node tables built column by column: one column per (layer, what)."""

    def __init__(self, n: int, dtype=np.float64):
        self.n = n
        self.dtype = dtype
        self.cols: list[np.ndarray] = []
        self.keys: dict = {}

    def add(self, key, values: np.ndarray) -> int:
        if key not in self.keys:
            self.keys[key] = len(self.cols)
            self.cols.append(np.asarray(values, dtype=self.dtype))
        return self.keys[key]

    def array(self) -> np.ndarray:
        if not self.cols:
            return np.zeros((self.n, 1), dtype=self.dtype)
        return np.ascontiguousarray(np.stack(self.cols, axis=1))


def _sweep(dy: PairDyads, vr: np.ndarray, vc: np.ndarray) -> np.ndarray:
    """Items sorted by (tile, value): one-mode node ids, two-mode rows i and columns n + j."""
    if dy.one_mode:
        return np.concatenate([s + np.argsort(vr[s:e], kind="stable") for s, e in dy.tiles])
    vals = np.concatenate([vr, vc])
    return np.argsort(vals, kind="stable")


def _ranks(dy: PairDyads, vr: np.ndarray, vc: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Ordinal ranks within the tile (one-mode) or of rows and columns together."""
    if dy.one_mode:
        rank = np.empty(dy.n, dtype=np.int64)
        for s, e in dy.tiles:
            rank[s + np.argsort(vr[s:e], kind="stable")] = np.arange(e - s)
        return rank, rank
    order = np.argsort(np.concatenate([vr, vc]), kind="stable")
    rank = np.empty(dy.n + dy.m, dtype=np.int64)
    rank[order] = np.arange(dy.n + dy.m)
    return rank[:dy.n], rank[dy.n:]


def _grouping(dy: PairDyads, cr: np.ndarray, cc: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Items sorted by (tile, category), rows first within a category; group starts + end."""
    if dy.one_mode:
        items, starts = [], []
        for s, e in dy.tiles:
            o = s + np.argsort(cr[s:e], kind="stable")
            c = cr[o]
            starts.append(s + np.concatenate([[0], np.flatnonzero(np.diff(c)) + 1]))
            items.append(o)
        items_a = np.concatenate(items)
        bounds = np.concatenate(starts + [[dy.n]])
        return items_a, bounds
    codes = np.concatenate([cr, cc])
    side = np.concatenate([np.zeros(dy.n, np.int64), np.ones(dy.m, np.int64)])
    o = np.lexsort((side, codes))
    c = codes[o]
    bounds = np.concatenate([[0], np.flatnonzero(np.diff(c)) + 1, [dy.n + dy.m]])
    return o, bounds


# --- the relabelled-by-fixed sums ----------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class PairSums:
    """Kernel inputs of the sums C[a, c] for a list of (relabelled, fixed) layer pairs.

    ``sums(row_perms, col_perms)`` returns (B, R, F): sum over the dyad set of
    (x_rel[r] relabelled - its mean) * (x_fix[f] - its mean).
    """

    dyads: PairDyads
    R: int
    F: int
    # edge passes
    src: np.ndarray
    dst: np.ndarray
    w: np.ndarray
    lrow: np.ndarray
    readers: np.ndarray
    segs: np.ndarray
    rcenter: np.ndarray
    edge_attr_r: np.ndarray
    edge_attr_c: np.ndarray
    nptr: np.ndarray
    nidx: np.ndarray
    nvalz: np.ndarray
    edge_pos: np.ndarray
    # sums over nodes (rows, then columns)
    node_vals_r: np.ndarray
    node_wts_r: np.ndarray
    node_spec_r: np.ndarray
    node_pos_r: np.ndarray
    node_vals_c: np.ndarray
    node_wts_c: np.ndarray
    node_spec_c: np.ndarray
    node_pos_c: np.ndarray
    # closed forms of same and gap
    codes_r: np.ndarray
    codes_c: np.ndarray
    n_cat: int
    vals_r: np.ndarray
    vals_c: np.ndarray
    rank_r: np.ndarray
    rank_c: np.ndarray
    group_items: np.ndarray
    group_bounds: np.ndarray
    group_ptr: np.ndarray
    sweep_items: np.ndarray
    tile_ptr: np.ndarray
    ss_spec: np.ndarray
    ss_pos: np.ndarray
    ss_const: np.ndarray
    gs_spec: np.ndarray
    gs_pos: np.ndarray
    gs_const: np.ndarray
    gg_spec: np.ndarray
    gg_pos: np.ndarray
    gg_const: np.ndarray
    halve_pos: np.ndarray  # pairs summed over ordered dyads, halved when undirected

    def work(self) -> float:
        """Work per relabelling, in edge visits: every edge of each reader's list, a sweep
        over the source nodes per network segment, and n (n log n for ``gap`` x ``gap``)
        per sum over nodes and closed form. Sizes chunks (``routes.plan.chunk_size_for``)."""
        n, m = self.dyads.n, self.dyads.m
        edges = self.lrow[:, -1] - self.lrow[:, 0]
        total = float(edges[self.readers[:, 0]].sum()) if self.readers.size else 0.0
        total += n * (self.segs.shape[0] + self.ss_pos.size + self.gs_pos.size)
        total += n * self.node_pos_r.size + m * self.node_pos_c.size
        total += (n + m) * np.log2(max(n + m, 2)) * self.gg_pos.size
        return total

    def sums(self, row_perms: np.ndarray, col_perms: np.ndarray) -> np.ndarray:
        """(B, R, F) centred relabelled-by-fixed sums over the dyad set."""
        dy = self.dyads
        row_perms = np.ascontiguousarray(row_perms, dtype=np.int64)
        col_perms = (row_perms if dy.one_mode
                     else np.ascontiguousarray(col_perms, dtype=np.int64))
        B = row_perms.shape[0]
        out = np.zeros((B, self.R * self.F))
        if self.edge_pos.size:
            tmp = np.empty((B, self.edge_pos.size))
            edge_pair_sums(self.src, self.dst, self.w, self.lrow, self.readers, self.segs,
                           self.rcenter, self.edge_attr_r, self.edge_attr_c, self.nptr,
                           self.nidx, self.nvalz, row_perms, col_perms, tmp, dy.one_mode)
            out[:, self.edge_pos] += tmp
        for vals, wts, spec, pos, perms in (
                (self.node_vals_r, self.node_wts_r, self.node_spec_r, self.node_pos_r,
                 row_perms),
                (self.node_vals_c, self.node_wts_c, self.node_spec_c, self.node_pos_c,
                 col_perms)):
            if pos.size:
                tmp = np.empty((B, pos.size))
                node_pair_sums(vals, wts, spec, perms, tmp)
                out[:, pos] += tmp
        if self.ss_pos.size:
            tmp = np.empty((B, self.ss_pos.size))
            same_same_sums(self.codes_r, self.codes_c, self.group_items, self.group_bounds,
                           self.group_ptr, self.ss_spec, row_perms, col_perms, tmp, dy.n,
                           self.n_cat, dy.one_mode)
            out[:, self.ss_pos] += tmp - self.ss_const
        if self.gs_pos.size:
            tmp = np.empty((B, self.gs_pos.size))
            gap_same_sums(self.vals_r, self.vals_c, self.codes_r, self.codes_c,
                          self.sweep_items, self.tile_ptr, self.gs_spec, row_perms, col_perms,
                          tmp, dy.n, self.n_cat, dy.one_mode)
            out[:, self.gs_pos] += tmp - self.gs_const
        if self.gg_pos.size:
            tmp = np.empty((B, self.gg_pos.size))
            gap_gap_sums(self.vals_r, self.vals_c, self.vals_r, self.vals_c, self.rank_r,
                         self.rank_c, self.sweep_items, self.tile_ptr, self.gg_spec, row_perms,
                         col_perms, tmp, dy.n, dy.one_mode)
            out[:, self.gg_pos] += tmp - self.gg_const
        if self.halve_pos.size:
            out[:, self.halve_pos] *= 0.5
        return out.reshape(B, self.R, self.F)


def build_pair_sums(layers: list[PairLayer], rel: list[int], fix: list[int],
                    dyads: PairDyads, *, look_up: str = "relabelled") -> PairSums:
    """Kernel inputs of C[r, f] = sum over D of (x_rel[r] relabelled - mean) * (x_fix[f] - mean).

    Pairs are routed by kind (module docstring): separable layers to sums over nodes;
    networks to edge passes; ``same``/``gap`` pairs to their closed forms. ``look_up``:
    for a pair of two networks, ``"relabelled"`` iterates the fixed network's edges and
    looks the relabelled one up at (pi(i), pi(j)); ``"fixed"`` iterates the relabelled
    one's edges and looks the fixed one up at (pi^-1(u), pi^-1(v)). Lookups of one network
    share a sweep over source nodes, so the choice that looks up the fewest networks is
    the fastest (dsp: "relabelled"; Freedman–Lane: "fixed"; the response is then never
    looked up).
    """
    if look_up not in ("relabelled", "fixed"):
        raise ValueError(f"look_up must be 'relabelled' or 'fixed'; got {look_up!r}")
    dy = dyads
    n, m = dy.n, dy.m
    one_mode = dy.one_mode
    undirected = one_mode and not dy.directed
    R, F = len(rel), len(fix)
    n_ord = float(dy.n_ordered)
    sums = {li: node_sums(layers[li], dy) for li in set(rel) | set(fix)}

    # node tables (rows and columns) and their outputs
    node = {side: dict(vals=_Columns(size), wts=_Columns(size), spec=[], pos=[])
            for side, size in (("r", n), ("c", m))}

    def node_term(side, pos, vkey, vals, wkey, wts):
        t = node[side]
        t["spec"].append((t["vals"].add(vkey, vals), t["wts"].add(wkey, wts)))
        t["pos"].append(pos)

    # attribute tables
    edge_attr = _Columns(n), _Columns(m)
    codes = _Columns(n, np.int64), _Columns(m, np.int64)
    vals = _Columns(n), _Columns(m)
    ranked: set[int] = set()
    groupings: dict[int, int] = {}
    group_items, group_bounds = [], []
    sweeps: dict[int, int] = {}
    sweep_items = []

    def column(table, li, arr_r, arr_c):
        c = table[0].add(li, arr_r)
        table[1].add(li, arr_c)
        return c

    def layer_vals(li):
        lay = layers[li]
        return column(vals, li, lay.row, lay.col)

    def layer_codes(li):
        lay = layers[li]
        return column(codes, li, lay.row, lay.col)

    def sweep_of(li):
        if li not in sweeps:
            sweeps[li] = len(sweep_items)
            sweep_items.append(_sweep(dy, layers[li].row, layers[li].col))
        return sweeps[li]

    def grouping_of(li):
        if li not in groupings:
            groupings[li] = len(group_items)
            items, bounds = _grouping(dy, layers[li].row, layers[li].col)
            group_items.append(items)
            group_bounds.append(bounds)
        return groupings[li]

    # edge readers per edge list
    edge_lists: dict[int, list] = {}
    lookups: list[int] = []
    ss, gs, gg = [], [], []
    halve = []

    for r, a in enumerate(rel):
        for f, c in enumerate(fix):
            pos = r * F + f
            la, lc = layers[a], layers[c]
            ka, kc = la.kind, lc.kind
            if ka in SEPARABLE:
                fa, alpha, ga, beta = _separable_parts(la)
                ro, ri = sums[c]
                if fa is not None:
                    node_term("r", pos, ("sep", a), fa - alpha, ("ro", c), ro)
                if ga is not None:
                    node_term("c", pos, ("sepc", a), ga - beta, ("ri", c), ri)
                halve.append(pos)
            elif kc in SEPARABLE:
                fc, alpha, gc, beta = _separable_parts(lc)
                ro, ri = sums[a]
                if fc is not None:
                    node_term("r", pos, ("ro", a), ro, ("sep", c), fc - alpha)
                if gc is not None:
                    node_term("c", pos, ("ri", a), ri, ("sepc", c), gc - beta)
                halve.append(pos)
            elif ka == NETWORK or kc == NETWORK:
                if kc == NETWORK and (ka != NETWORK or look_up == "relabelled"):
                    # iterate the fixed layer's edges, read x_a at (pi(i), pi(j))
                    lst, mode, other = c, FORWARD, a
                else:
                    # iterate the relabelled layer's edges, read x_c at (pi^-1(u), pi^-1(v))
                    lst, mode, other = a, BACKWARD, c
                lo = layers[other]
                if lo.kind == NETWORK:
                    if other not in lookups:
                        lookups.append(other)
                    col = lookups.index(other)
                else:
                    col = column(edge_attr, other, lo.row, lo.col)
                edge_lists.setdefault(lst, []).append((mode, lo.kind, col, lo.mean, pos))
            else:
                const = n_ord * la.mean * lc.mean
                if ka == SAME and kc == SAME:
                    ss.append(((layer_codes(a), grouping_of(c)), pos, const))
                elif ka == SAME:  # gap fixed: its values in place, the codes relabelled
                    gs.append(((sweep_of(c), layer_vals(c), layer_codes(a), 0), pos, const))
                elif kc == SAME:  # gap relabelled: substitute, codes by the inverse
                    gs.append(((sweep_of(a), layer_vals(a), layer_codes(c), 1), pos, const))
                else:
                    ranked.add(a)
                    gg.append(((sweep_of(c), layer_vals(c), layer_vals(a)), pos, const))
                halve.append(pos)

    # ranks share the value columns (gap_gap_sums reads both by one index)
    n_vals = len(vals[0].cols)
    rank_r = np.zeros((n, max(n_vals, 1)), dtype=np.int64)
    rank_c = np.zeros((m, max(n_vals, 1)), dtype=np.int64)
    for li in ranked:
        col = vals[0].keys[li]
        rank_r[:, col], rank_c[:, col] = _ranks(dy, layers[li].row, layers[li].col)

    # edge lists in layer order; readers in segments: derived readers of one list and mode,
    # network readers of one row table and mode
    lists = sorted(edge_lists)
    src, dst, w = [], [], []
    lrow = np.zeros((max(len(lists), 1), n + 1), dtype=np.int64)
    offset = 0
    for s_, li in enumerate(lists):
        ed = layers[li].edges
        src.append(ed.src)
        dst.append(ed.dst)
        w.append(ed.w)
        lrow[s_, 1:] = np.cumsum(np.bincount(ed.src, minlength=n))
        lrow[s_] += offset
        offset += ed.size
    entries = [(s_, mode, kind, col, mean, pos) for s_, li in enumerate(lists)
               for mode, kind, col, mean, pos in edge_lists[li]]
    entries.sort(key=lambda e: (e[2] == NETWORK,) + ((e[3], e[1], e[0]) if e[2] == NETWORK
                                                      else (e[0], e[1], 0)))
    readers = [e[:4] for e in entries]
    rcenter = [e[4] for e in entries]
    epos = [e[5] for e in entries]

    def segment_key(e):
        return (e[3], e[1]) if e[2] == NETWORK else (e[0], e[1], -1)

    segs = []
    for t, e in enumerate(entries):
        if t == 0 or segment_key(e) != segment_key(entries[t - 1]):
            segs.append([t, t + 1])
        else:
            segs[-1][1] = t + 1
    nptr, nidx, nvalz = _row_tables(layers, lookups, n, undirected)

    def cat(parts, dtype):
        return np.ascontiguousarray(np.concatenate(parts) if parts else np.zeros(0, dtype),
                                    dtype=dtype)

    def spec(entries, width):
        arr = np.array([e[0] for e in entries], dtype=np.int64).reshape(-1, width)
        return (arr, np.array([e[1] for e in entries], dtype=np.int64),
                np.array([e[2] for e in entries], dtype=np.float64))

    L = n if one_mode else n + m
    gptr = np.concatenate([[0], np.cumsum([b.size for b in group_bounds])]).astype(np.int64)
    n_cat = 1
    for col in codes[0].cols + codes[1].cols:
        n_cat = max(n_cat, int(col.max(initial=-1)) + 1)
    if one_mode:
        tile_ptr = np.array([s for s, _ in dy.tiles] + [n], dtype=np.int64)
    else:
        tile_ptr = np.array([0, n + m], dtype=np.int64)
    ss_spec, ss_pos, ss_const = spec(ss, 2)
    gs_spec, gs_pos, gs_const = spec(gs, 4)
    gg_spec, gg_pos, gg_const = spec(gg, 3)
    nr, nc = node["r"], node["c"]
    return PairSums(
        dyads=dy, R=R, F=F,
        src=cat(src, np.int64), dst=cat(dst, np.int64), w=cat(w, np.float64), lrow=lrow,
        readers=np.array(readers, dtype=np.int64).reshape(-1, 4),
        segs=np.array(segs, dtype=np.int64).reshape(-1, 2),
        rcenter=np.array(rcenter, dtype=np.float64),
        edge_attr_r=edge_attr[0].array(), edge_attr_c=edge_attr[1].array(),
        nptr=nptr, nidx=nidx, nvalz=nvalz, edge_pos=np.array(epos, dtype=np.int64),
        node_vals_r=nr["vals"].array(), node_wts_r=nr["wts"].array(),
        node_spec_r=np.array(nr["spec"], dtype=np.int64).reshape(-1, 2),
        node_pos_r=np.array(nr["pos"], dtype=np.int64),
        node_vals_c=nc["vals"].array(), node_wts_c=nc["wts"].array(),
        node_spec_c=np.array(nc["spec"], dtype=np.int64).reshape(-1, 2),
        node_pos_c=np.array(nc["pos"], dtype=np.int64),
        codes_r=codes[0].array(), codes_c=codes[1].array(), n_cat=n_cat,
        vals_r=vals[0].array(), vals_c=vals[1].array(), rank_r=rank_r, rank_c=rank_c,
        group_items=(np.ascontiguousarray(np.stack(group_items)) if group_items
                     else np.zeros((1, L), dtype=np.int64)),
        group_bounds=cat(group_bounds, np.int64), group_ptr=gptr,
        sweep_items=(np.ascontiguousarray(np.stack(sweep_items)) if sweep_items
                     else np.zeros((1, L), dtype=np.int64)),
        tile_ptr=tile_ptr,
        ss_spec=ss_spec, ss_pos=ss_pos, ss_const=ss_const,
        gs_spec=gs_spec, gs_pos=gs_pos, gs_const=gs_const,
        gg_spec=gg_spec, gg_pos=gg_pos, gg_const=gg_const,
        halve_pos=(np.array(halve, dtype=np.int64) if undirected
                   else np.zeros(0, dtype=np.int64)))


# --- the plan of a scheme -------------------------------------------------------------------
def prepared_layers(prep: SparsePrepared, mom: Moments) -> tuple[list[PairLayer], PairDyads]:
    """The predictors (in order) and then the response as pair layers, internal units."""
    layers = []
    for c, t in enumerate(prep.terms):
        mean = float(mom.mean[c])
        if t.kind == NETWORK:
            layers.append(PairLayer(NETWORK, None, None, t.edges, mean))
            continue
        row, col = (t.attr, t.col_attr) if prep.two_mode else (t.attr, t.attr)
        if t.kind == SAME:
            layers.append(PairLayer(SAME, row.astype(np.int64), col.astype(np.int64), None,
                                    mean))
        else:
            layers.append(PairLayer(t.kind, None if t.kind == RECEIVER else row,
                                    None if t.kind == SENDER else col, None, mean))
    layers.append(PairLayer(NETWORK, None, None, prep.y, mom.y_sum / prep.n_dyads))
    if prep.two_mode:
        dyads = PairDyads(prep.n, prep.m, ((0, prep.n),), False, True)
    else:
        dyads = PairDyads(prep.n, prep.n, tuple(prep.ranges), True, prep.directed)
    return layers, dyads


def _identity(prep: SparsePrepared) -> tuple[np.ndarray, np.ndarray]:
    """The identity relabelling of rows and of columns, as one-permutation batches."""
    return (np.arange(prep.n, dtype=np.int64)[None, :],
            np.arange(prep.m, dtype=np.int64)[None, :])


def pair_moments(prep: SparsePrepared) -> Moments:
    """The fixed products (``sparse_products.Moments``) from the pair sums: each layer's
    mean from its row sums over the dyad set (``node_sums``), the centred cross products
    X~'X~ as the relabelled-by-fixed sums of the predictors at the identity.

    This is how two-mode problems get them (``sparse_products.fixed_products`` holds the
    one-mode closed forms); it works for one-mode problems too.
    """
    k = prep.k
    y_sum, y_sq = float(prep.y.w.sum()), float((prep.y.w * prep.y.w).sum())
    layers, dyads = prepared_layers(prep, Moments(np.zeros(k), np.zeros((k, k)), y_sum, y_sq))
    mean = np.array([node_sums(lay, dyads)[0].sum() / dyads.n_ordered
                     for lay in layers[:k]])
    layers = [replace(lay, mean=float(mu)) for lay, mu in zip(layers, mean)] + layers[k:]
    xs = list(range(k))
    sums = build_pair_sums(layers, xs, xs, dyads).sums(*_identity(prep))[0]
    return Moments(mean, 0.5 * (sums + sums.T), y_sum, y_sq)


def moments_of(prep: SparsePrepared) -> Moments:
    """The fixed products of a sparse problem: one-mode closed forms
    (``sparse_products.fixed_products``), two-mode pair sums (``pair_moments``)."""
    return pair_moments(prep) if prep.two_mode else fixed_products(prep)


@dataclass(frozen=True, eq=False)
class SparseSchemePlan:
    """dsp or Freedman–Lane on the sparse path, the kernel side of a ``routes.plan.Plan``.

    Fields the engine reads: ``k`` (tested terms, the predictors in order), ``n_dyads``,
    ``statistics(row_perms, col_perms) -> (B, k)``. The rest: the pair sums of the
    relabelled-by-fixed block (``pairs``; relabelled layers ``rel``, fixed layers ``fix``,
    layer k being the response), ``inv_scale`` (R, F) taking them to standardised units,
    the invariant standardised Gram ``gram0`` of v = [1, rel, fix], the per-term
    ``transforms`` and ``scale`` of ``kernels.stats.regression_stats``, and the observed
    standardised products ``gram_xx`` (k, k) and ``xy`` (k,).
    """

    scheme: str
    statistic: str
    k: int
    n_dyads: int
    rel: tuple[int, ...]
    fix: tuple[int, ...]
    pairs: PairSums
    inv_scale: np.ndarray
    gram0: np.ndarray
    transforms: np.ndarray
    scale: np.ndarray
    use_t: bool
    gram_xx: np.ndarray
    xy: np.ndarray
    correlation: bool = False
    #: with intervals (the transforms' last column X): per term, the factor taking b from
    #: standardised units to the coefficient's; else None
    ci_scale: np.ndarray | None = None

    @property
    def extra(self) -> int:
        """Numbers per relabelling after the k statistics: the interval rows."""
        return 0 if self.ci_scale is None else INTERVAL_WIDTH * self.k

    def cross(self, row_perms: np.ndarray, col_perms: np.ndarray) -> np.ndarray:
        """Standardised relabelled-by-fixed products (B, R, F)."""
        return self.pairs.sums(row_perms, col_perms) * self.inv_scale

    def statistics(self, row_perms: np.ndarray, col_perms: np.ndarray) -> np.ndarray:
        """Statistics (B, k) of the relabellings (one-mode: ``col_perms`` is ``row_perms``)."""
        cross = self.cross(row_perms, col_perms)
        n_perm = cross.shape[0]
        d = self.gram0.shape[0]
        gram = np.empty((n_perm, d, d))
        fill_gram(cross, self.gram0, gram)
        if self.correlation:
            r = np.empty(n_perm)
            correlation_stats(gram, r)
            return r[:, None]
        out = np.empty((n_perm, self.k + self.extra))
        stats = out[:, :self.k] if self.extra else out
        rows = NO_ROWS if self.ci_scale is None else \
            np.empty((n_perm, self.k, INTERVAL_WIDTH))
        regression_stats(gram, self.transforms, self.scale, self.use_t, stats, rows)
        if self.extra:
            out[:, self.k:] = rows.reshape(n_perm, -1)
        return out


def _regress_on(gram: np.ndarray, target: int, on: list[int]) -> np.ndarray:
    """Coefficients [g0, g_on...] of layer ``target`` on [1, layers ``on``] (as in
    ``linear._regress_on``: layer l sits at row/column 1 + l of ``gram``)."""
    idx = [0] + [1 + c for c in on]
    return np.linalg.solve(gram[np.ix_(idx, idx)], gram[idx, 1 + target])


def build_sparse_scheme_plan(prep: SparsePrepared, *, scheme: str, statistic: str,
                             moments: Moments | None = None,
                             interval: bool = False) -> SparseSchemePlan:
    """The plan of a scheme (statistic ``t`` or ``coef``) by pair sums: memory
    O(edges + nodes), nothing of size n x m. One-mode or two-mode.

    ``dsp`` and ``freedman-lane``; ``y`` too (the response relabelled, the predictors
    fixed), which the route uses for two-mode data (one-mode scheme y has its own kernel,
    ``sparse_products.SparsePlan``). ``moments``: ``moments_of(prep)`` when the caller has
    it already. Raises InputError when the response has no variation or a predictor is
    constant or collinear (the sparse path's rule, ``sparse_products._check_collinear``).
    ``interval`` (dsp, freedman-lane; statistic t): each transform gets a last column X
    for the intervals of ``pipeline.intervals``: x_j fixed for dsp, x_j's relabelled
    residual on [1, others] for Freedman-Lane (y - b x_j takes b X from the response).
    """
    check_regression(model="linear", scheme=scheme, statistic=statistic, storage="float64")
    mom = moments_of(prep) if moments is None else moments
    k = prep.k
    N = prep.n_dyads
    _, y_sd = _response_sd(prep.response_name, N, mom.y_sum, mom.y_sq)
    _check_collinear(prep, mom)
    layers, dyads = prepared_layers(prep, mom)
    sd = np.concatenate([np.sqrt(np.diag(mom.cross) / N), [y_sd]])
    xs = list(range(k))
    ylayer = k
    rel, fix = {"dsp": (xs, xs + [ylayer]), "freedman-lane": (xs + [ylayer], xs),
                "y": ([ylayer], xs)}[scheme]
    pairs = build_pair_sums(layers, rel, fix, dyads,
                            look_up="relabelled" if scheme == "dsp" else "fixed")
    inv_scale = 1.0 / np.outer(sd[rel], sd[fix])

    # observed Gram of [1, x_1..x_k, y] in standardised units (layer l at 1 + l)
    c0 = pairs.sums(*_identity(prep))[0] * inv_scale
    gram_xx = mom.cross / np.outer(sd[:k], sd[:k])
    if scheme == "dsp":
        xy = c0[:, k].copy()  # x_j relabelled by the identity, y fixed
    else:
        xy = c0[rel.index(ylayer), :].copy()  # y relabelled by the identity, x_j fixed
    gobs = np.zeros((k + 2, k + 2))
    gobs[0, 0] = N
    gobs[1:k + 1, 1:k + 1] = gram_xx
    gobs[1:k + 1, k + 1] = gobs[k + 1, 1:k + 1] = xy
    gobs[k + 1, k + 1] = N

    R, F = len(rel), len(fix)
    d = 1 + R + F
    rpos = {layer: 1 + a for a, layer in enumerate(rel)}
    fpos = {layer: 1 + R + c for c, layer in enumerate(fix)}
    gram0 = np.zeros((d, d))
    gram0[0, 0] = N
    for group, pos in ((rel, rpos), (fix, fpos)):
        for l1 in group:  # relabelled-by-relabelled and fixed-by-fixed: invariant
            for l2 in group:
                gram0[pos[l1], pos[l2]] = gobs[1 + l1, 1 + l2]
    transforms = np.zeros((k, d, k + 2 + int(interval)))
    for j in xs:
        others = [c for c in xs if c != j]
        cols = [{0: 1.0}] + [{fpos[c]: 1.0} for c in others]
        if scheme == "y":
            cols += [{fpos[j]: 1.0}, {rpos[ylayer]: 1.0}]
        elif scheme == "dsp":
            # e_pi = x_j,pi - g0 - sum_c g_c x_c,pi: x_j's residual on [1, others], relabelled
            g = _regress_on(gobs, j, others)
            e = {rpos[j]: 1.0, 0: -g[0]}
            for c, gc in zip(others, g[1:]):
                e[rpos[c]] = e.get(rpos[c], 0.0) - gc
            cols += [e, {fpos[ylayer]: 1.0}]
            if interval:
                cols.append({fpos[j]: 1.0})
        else:
            # y* = Z gamma + r_pi, r = y - Z gamma (the intercept cancels: D is invariant)
            g = _regress_on(gobs, ylayer, others)
            ystar = {rpos[ylayer]: 1.0}
            for c, gc in zip(others, g[1:]):
                ystar[fpos[c]] = ystar.get(fpos[c], 0.0) + gc
                ystar[rpos[c]] = ystar.get(rpos[c], 0.0) - gc
            cols += [{fpos[j]: 1.0}, ystar]
            if interval:
                gx = _regress_on(gobs, j, others)
                e = {rpos[j]: 1.0, 0: -gx[0]}
                for c, gc in zip(others, gx[1:]):
                    e[rpos[c]] = e.get(rpos[c], 0.0) - gc
                cols.append(e)
        transforms[j] = _transform(cols, d)
    scale = np.ones(k) if statistic == "t" else y_sd / sd[:k]
    return SparseSchemePlan(scheme, statistic, k, N, tuple(rel), tuple(fix), pairs,
                            np.ascontiguousarray(inv_scale), gram0, transforms,
                            np.ascontiguousarray(scale), statistic == "t", gram_xx, xy,
                            ci_scale=y_sd / sd[:k] if interval else None)


def build_sparse_correlation_plan(prep: SparsePrepared, mom: Moments) -> SparseSchemePlan:
    """QAP correlation by pair sums (what two-mode data use): the predictor, network
    ``b``, relabelled against the fixed response ``a``, as on the dense path; statistic r
    (``kernels.stats.correlation_stats`` on the Gram of v = [1, b relabelled, a])."""
    N = prep.n_dyads
    _, a_sd = _response_sd(prep.response_name, N, mom.y_sum, mom.y_sq)
    layers, dyads = prepared_layers(prep, mom)
    pairs = build_pair_sums(layers, [0], [1], dyads, look_up="relabelled")
    sd_b = float(np.sqrt(mom.cross[0, 0] / N))
    gram0 = np.diag([float(N)] * 3)  # centred, standardised layers
    inv_scale = np.full((1, 1), 1.0 / (sd_b * a_sd))
    xy = pairs.sums(*_identity(prep))[0, 0] * inv_scale[0]
    return SparseSchemePlan("y", "r", 1, N, (0,), (1,), pairs, inv_scale, gram0,
                            np.zeros((1, 3, 1)), np.ones(1), True,
                            np.full((1, 1), float(N)), xy, correlation=True)
