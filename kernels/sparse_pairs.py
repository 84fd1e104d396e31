"""Relabelled-by-fixed sums of sparse and attribute-derived layers, never over all dyads.

The schemes dsp and Freedman–Lane need, per relabelling, the sums

    C[a, c] = sum over the dyad set D of x_a[pr(i), pc(j)] * x_c[i, j]

of a relabelled layer x_a with a fixed layer x_c (one-mode data: pr = pc; two-mode data:
rows and columns relabelled independently). Every relabelling maps D onto itself, so the
substitution u = pr(i), v = pc(j) gives the same sum as

    sum over D of x_a[u, v] * x_c[pr^-1(u), pc^-1(v)],

and either side may be the one whose values are read at mapped endpoints. The kernels
here cover the pairs that are not separable (the runner reduces ``sender``, ``receiver``
and ``pair_sum`` to sums over nodes of row and column sums, ``node_pair_sums``):

- ``edge_pair_sums``: one pass over each edge list evaluates every layer it meets, read
  at the mapped endpoints of each edge (derived layers from relabelled attribute tables;
  networks from their mapped row, expanded once per source node for every edge list that
  reads that network). O(edges + n) per relabelling.
- ``same_same_sums``: nodes grouped by the fixed layer's category, a count of the
  relabelled categories in each group (a contingency table read one group at a time).
  O(nodes + categories).
- ``gap_same_sums``: nodes visited in increasing order of the gap attribute, running
  counts and sums per category. O(nodes + categories).
- ``gap_gap_sums``: nodes visited in increasing order of the fixed attribute, a Fenwick
  tree keyed by the rank of the relabelled attribute holds count, sum a, sum c and sum
  a*c of the nodes already visited (the fast algorithm for the univariate distance
  covariance, Huo & Székely 2016, Technometrics 58:435–447 [memory]). O(nodes log nodes).

Node sets. One-mode data: nodes 0 .. n-1; the dyad set is the ordered pairs i != j inside
one of the tiles (groups with dyads "within"; else one tile of all nodes); the closed
forms return ordered sums (undirected data: the runner halves them). Two-mode data: rows
0 .. n-1 and columns 0 .. m-1, every cell in one tile; sweep arrays hold row i as item i
and column j as item n + j.

Summation order: every output is accumulated in one fixed order per relabelling (edges in
stored order, items in their precomputed order), independent of the other relabellings of
the batch, so a relabelling gives the same bits alone or in any batch. ``fastmath`` leaves
out ``reassoc`` (kernels/options.py), so the compiler keeps this order.

``edge_pair_sums`` inlines ``prefetch`` from kernels/gather.py: after editing that helper,
clear numba's caches (DEVELOPERS.md, "Numba's cache").
"""

import numpy as np
from numba import njit

from .gather import prefetch
from .options import KERNEL_OPTIONS

# Predictor codes of the sparse path (kernels/sparse.py uses the same numbers).
SAME, GAP, SENDER, RECEIVER, PAIR_SUM, NETWORK = 0, 1, 2, 3, 4, 5
# Reader modes of ``edge_pair_sums``.
FORWARD, BACKWARD = 0, 1
# Edges handled together by each derived reader in turn (their arrays stay in cache).
EDGE_BLOCK = 2048
# Source nodes ahead whose mapped row pointer, and whose mapped row, are prefetched while a
# source's edges read its own row. Measured on the shared 2-core EPYC (100,000 nodes, two
# lists of 1,000,000 edges, ms of CPU per relabelling): no prefetch about 1.25x slower;
# 4/2 31-35, 8/4 30-32, 12/6 and 16/8 36-49 (the load of other jobs blurs closer choices).
PTR_AHEAD = 8
ROW_AHEAD = 4


@njit(**KERNEL_OPTIONS)
def edge_pair_sums(src, dst, w, lrow, readers, segs, rcenter, attr_r, attr_c, nptr, nidx,
                   nvalz, row_perms, col_perms, out, one_mode):
    """Sums over edge lists of a layer read at the mapped endpoints of each edge.

    Parameters
    ----------
    src, dst : int64 (E,)
        Endpoints (row node, column node) of the edge lists, one after the other, each
        sorted by source.
    w : float64 (E,)
        Edge values.
    lrow : int64 (S, n + 1)
        Edges of list s with source i: lrow[s, i] .. lrow[s, i + 1] - 1.
    readers : int64 (T, 4)
        Per reader: edge list, mode (FORWARD: the other layer is read at (pr(i), pc(j));
        BACKWARD: at (pr^-1(i), pc^-1(j))), kind (SAME, GAP or NETWORK), and column of
        ``attr_r`` / ``attr_c`` (derived) or row table (NETWORK).
    segs : int64 (K, 2)
        Readers segs[k, 0] .. segs[k, 1] - 1 form segment k: derived readers of one list
        and mode (one pass over the list's edges serves them all), or network readers of
        one row table and mode (one sweep over source nodes: the mapped row is expanded
        once for the edges of every list).
    rcenter : float64 (T,)
        Mean of the layer each reader evaluates.
    attr_r : float64 (n, Q); attr_c : float64 (m, Q)
        Row and column attributes of the derived layers read on edges (``same``: category
        codes as numbers; ``gap``: values). One-mode: the same array twice.
    nptr : int64 (P, n + 1); nidx : int32 (nnz,); nvalz : float64 (nnz + 1,)
        Network layers by rows: row i of table s holds the sorted column indices
        nidx[nptr[s, i]:nptr[s, i + 1]], with values nvalz[1 + same positions]
        (nvalz[0] = 0: the value of an absent dyad). Undirected: both orientations.
    row_perms : int64 (B, n); col_perms : int64 (B, m)
        Relabellings (one-mode: the same array).
    out : float64 (B, T)
        Written: out[b, t] = sum over the edges e of the reader's list, in stored order, of
        w_e * (x_t(mapped endpoints of e) - rcenter[t]).
    one_mode : bool
        Rows and columns are one node set relabelled together.

    Notes
    -----
    A network reader expands the mapped row of its table into ``where`` (column ->
    1 + position of the value, 0 elsewhere) once per source node, so each edge reads its
    value without a search; the rows of later source nodes are prefetched.
    """
    n_perm = row_perms.shape[0]
    n = row_perms.shape[1]
    m = col_perms.shape[1]
    n_attr = attr_r.shape[1]
    n_read = readers.shape[0]
    need_fwd = False
    need_bwd = False
    for t in range(n_read):
        if readers[t, 1] == FORWARD:
            need_fwd = True
        else:
            need_bwd = True
    # int32 copies of the node maps: the random reads of a pass stay in a smaller cache
    fwd_r = np.empty(n, dtype=np.int32)
    fwd_c = fwd_r if one_mode else np.empty(m, dtype=np.int32)
    inv_r = np.empty(n, dtype=np.int32)
    inv_c = inv_r if one_mode else np.empty(m, dtype=np.int32)
    afwd_r = np.empty((n, n_attr))
    afwd_c = afwd_r if one_mode else np.empty((m, n_attr))
    abwd_r = np.empty((n, n_attr))
    abwd_c = abwd_r if one_mode else np.empty((m, n_attr))
    where = np.zeros(m, dtype=np.int32)
    acc = np.zeros(max(n_read, 1))
    for b in range(n_perm):
        for i in range(n):
            fwd_r[i] = row_perms[b, i]
        if not one_mode:
            for j in range(m):
                fwd_c[j] = col_perms[b, j]
        if need_bwd:
            for i in range(n):
                inv_r[fwd_r[i]] = i
            if not one_mode:
                for j in range(m):
                    inv_c[fwd_c[j]] = j
        if n_attr > 0:
            # relabelled copies of the attributes: afwd[v] = attr[p(v)], abwd[v] = attr[p^-1(v)]
            if need_fwd:
                for v in range(n):
                    for q in range(n_attr):
                        afwd_r[v, q] = attr_r[fwd_r[v], q]
                if not one_mode:
                    for v in range(m):
                        for q in range(n_attr):
                            afwd_c[v, q] = attr_c[fwd_c[v], q]
            if need_bwd:
                for v in range(n):
                    for q in range(n_attr):
                        abwd_r[v, q] = attr_r[inv_r[v], q]
                if not one_mode:
                    for v in range(m):
                        for q in range(n_attr):
                            abwd_c[v, q] = attr_c[inv_c[v], q]
        for t in range(n_read):
            acc[t] = 0.0
        for k in range(segs.shape[0]):
            t0 = segs[k, 0]
            t1 = segs[k, 1]
            if readers[t0, 1] == FORWARD:
                tr = afwd_r
                tc = afwd_c
                mr = fwd_r
                mcol = fwd_c
            else:
                tr = abwd_r
                tc = abwd_c
                mr = inv_r
                mcol = inv_c
            if readers[t0, 2] != NETWORK:
                # edges in blocks that stay in cache while each reader runs a tight loop
                # over them; each reader still sums its edges in order
                s = readers[t0, 0]
                for e0 in range(lrow[s, 0], lrow[s, n], EDGE_BLOCK):
                    e1 = min(e0 + EDGE_BLOCK, lrow[s, n])
                    for t in range(t0, t1):
                        col = readers[t, 3]
                        mc = rcenter[t]
                        acc_t = acc[t]
                        if readers[t, 2] == SAME:
                            for e in range(e0, e1):
                                x = 1.0 if tr[src[e], col] == tc[dst[e], col] else 0.0
                                # acc += w_e * (x at the mapped endpoints - mean of x)
                                acc_t += w[e] * (x - mc)
                        else:
                            for e in range(e0, e1):
                                acc_t += w[e] * (abs(tr[src[e], col] - tc[dst[e], col]) - mc)
                        acc[t] = acc_t
                continue
            ptr = nptr[readers[t0, 3]]
            for i in range(n):
                # prefetch the mapped rows of later sources: their pointers, then the rows
                if i + PTR_AHEAD < n:
                    prefetch(ptr, mr[i + PTR_AHEAD])
                if i + ROW_AHEAD < n:
                    q0 = ptr[mr[i + ROW_AHEAD]]
                    prefetch(nidx, q0)
                    prefetch(nvalz, q0 + 1)
                busy = False
                for t in range(t0, t1):
                    s = readers[t, 0]
                    if lrow[s, i + 1] > lrow[s, i]:
                        busy = True
                if not busy:
                    continue
                u = mr[i]
                for p in range(ptr[u], ptr[u + 1]):
                    where[nidx[p]] = p + 1
                for t in range(t0, t1):
                    s = readers[t, 0]
                    mc = rcenter[t]
                    acc_t = acc[t]
                    for e in range(lrow[s, i], lrow[s, i + 1]):
                        # acc += w_e * (x_net(m(i), m(j)) - mean of x_net)
                        acc_t += w[e] * (nvalz[where[mcol[dst[e]]]] - mc)
                    acc[t] = acc_t
                for p in range(ptr[u], ptr[u + 1]):
                    where[nidx[p]] = 0
        for t in range(n_read):
            out[b, t] = acc[t]


@njit(**KERNEL_OPTIONS)
def node_pair_sums(values, weights, spec, perms, out):
    """Sums over nodes of a relabelled node vector times a fixed one.

    Parameters
    ----------
    values : float64 (n, P)
        Node vectors read at relabelled positions.
    weights : float64 (n, Q)
        Node vectors read in place.
    spec : int64 (T, 2)
        Per output: column of ``values``, column of ``weights``.
    perms : int64 (B, n)
    out : float64 (B, T)
        Written: out[b, t] = sum_i values[perms[b, i], spec[t, 0]] * weights[i, spec[t, 1]],
        summed in increasing i.
    """
    n_perm, n = perms.shape
    n_out = spec.shape[0]
    acc = np.empty(max(n_out, 1))
    for b in range(n_perm):
        for t in range(n_out):
            acc[t] = 0.0
        for i in range(n):
            u = perms[b, i]
            for t in range(n_out):
                acc[t] += values[u, spec[t, 0]] * weights[i, spec[t, 1]]
        for t in range(n_out):
            out[b, t] = acc[t]


@njit(**KERNEL_OPTIONS)
def same_same_sums(codes_r, codes_c, items, bounds, bptr, spec, row_perms, col_perms, out,
                   n_rows, n_cat, one_mode):
    """Dyads on which two ``same`` layers both hold 1, one relabelled, one fixed.

    Parameters
    ----------
    codes_r : int64 (n, A); codes_c : int64 (m, A)
        Category codes (0 .. n_cat - 1) of the relabelled layers, rows and columns.
    items : int64 (G, L)
        Per grouping (a fixed ``same`` layer), the items sorted by (tile, fixed category),
        rows before columns inside a category (two-mode).
    bounds : int64; bptr : int64 (G + 1,)
        Group starts of grouping g: bounds[bptr[g]] .. bounds[bptr[g + 1] - 1], the last
        being the end of the items; a group never spans two tiles.
    spec : int64 (T, 2)
        Per output: column of the relabelled codes, grouping.
    row_perms : int64 (B, n); col_perms : int64 (B, m)
    out : float64 (B, T)
        Written: one-mode, the number of ordered pairs i != j in one group with
        codes[pr(i)] == codes[pr(j)]; two-mode, the number of cells (i, j) with equal fixed
        categories and codes_r[pr(i)] == codes_c[pc(j)].
    n_rows : int
    n_cat : int
        Bound on the category codes.
    one_mode : bool
    """
    n_perm = row_perms.shape[0]
    cnt = np.zeros(max(n_cat, 1), dtype=np.int64)
    for b in range(n_perm):
        pr = row_perms[b]
        pc = pr if one_mode else col_perms[b]
        for t in range(spec.shape[0]):
            a = spec[t, 0]
            g = spec[t, 1]
            total = 0
            for h in range(bptr[g], bptr[g + 1] - 1):
                lo = bounds[h]
                hi = bounds[h + 1]
                if one_mode:
                    for p in range(lo, hi):
                        k = codes_r[pr[items[g, p]], a]
                        # pairs with the earlier members of the group in category k
                        total += cnt[k]
                        cnt[k] += 1
                else:
                    for p in range(lo, hi):
                        it = items[g, p]
                        if it < n_rows:
                            cnt[codes_r[pr[it], a]] += 1
                        else:
                            # cells (i, j) of the group with codes_r[pr(i)] == codes_c[pc(j)]
                            total += cnt[codes_c[pc[it - n_rows], a]]
                for p in range(lo, hi):
                    it = items[g, p]
                    if it < n_rows:
                        cnt[codes_r[pr[it], a]] = 0
            out[b, t] = 2.0 * total if one_mode else float(total)


@njit(**KERNEL_OPTIONS)
def gap_same_sums(vals_r, vals_c, codes_r, codes_c, items, tile_ptr, spec, row_perms,
                  col_perms, out, n_rows, n_cat, one_mode):
    """Sum of a ``gap`` layer over the dyads where a ``same`` layer holds 1.

    The gap layer's values stay in place and the ``same`` codes are read through a node
    map: the relabelling (gap fixed, same relabelled) or its inverse (gap relabelled, same
    fixed; the substitution u = pr(i), v = pc(j) of the module docstring).

    Parameters
    ----------
    vals_r : float64 (n, V); vals_c : float64 (m, V)
        Gap attribute values, rows and columns.
    codes_r : int64 (n, A); codes_c : int64 (m, A)
        Category codes (0 .. n_cat - 1) of the ``same`` layers.
    items : int64 (G, L)
        Per sweep, the items sorted by (tile, gap value).
    tile_ptr : int64 (tiles + 1,)
        Item offsets of the tiles (the same for every sweep).
    spec : int64 (T, 4)
        Per output: sweep, value column, code column, 1 to map nodes by the inverse
        relabelling (else by the relabelling).
    row_perms : int64 (B, n); col_perms : int64 (B, m)
    out : float64 (B, T)
        Written: one-mode, sum over ordered pairs i != j in one tile of |v_i - v_j| *
        1[codes[map(i)] == codes[map(j)]]; two-mode, sum over cells of
        |vr_i - vc_j| * 1[codes_r[map_r(i)] == codes_c[map_c(j)]].
    n_rows, n_cat : int
    one_mode : bool
    """
    n_perm = row_perms.shape[0]
    n = row_perms.shape[1]
    m = col_perms.shape[1]
    need_inv = False
    for t in range(spec.shape[0]):
        if spec[t, 3] != 0:
            need_inv = True
    inv_r = np.empty(n, dtype=np.int64)
    inv_c = inv_r if one_mode else np.empty(m, dtype=np.int64)
    k_cat = max(n_cat, 1)
    cnt_r = np.zeros(k_cat)
    sum_r = np.zeros(k_cat)
    cnt_c = cnt_r if one_mode else np.zeros(k_cat)
    sum_c = sum_r if one_mode else np.zeros(k_cat)
    for b in range(n_perm):
        pr = row_perms[b]
        pc = pr if one_mode else col_perms[b]
        if need_inv:
            for i in range(n):
                inv_r[pr[i]] = i
            if not one_mode:
                for j in range(m):
                    inv_c[pc[j]] = j
        for t in range(spec.shape[0]):
            g = spec[t, 0]
            vc = spec[t, 1]
            cc = spec[t, 2]
            if spec[t, 3] != 0:
                mr = inv_r
                mcol = inv_c
            else:
                mr = pr
                mcol = pc
            total = 0.0
            for tile in range(tile_ptr.shape[0] - 1):
                lo = tile_ptr[tile]
                hi = tile_ptr[tile + 1]
                if one_mode:
                    for p in range(lo, hi):
                        i = items[g, p]
                        v = vals_r[i, vc]
                        k = codes_r[mr[i], cc]
                        # earlier nodes j of category k (v_j <= v): sum (v - v_j)
                        total += v * cnt_r[k] - sum_r[k]
                        cnt_r[k] += 1.0
                        sum_r[k] += v
                else:
                    for p in range(lo, hi):
                        it = items[g, p]
                        if it < n_rows:
                            v = vals_r[it, vc]
                            k = codes_r[mr[it], cc]
                            total += v * cnt_c[k] - sum_c[k]
                            cnt_r[k] += 1.0
                            sum_r[k] += v
                        else:
                            j = it - n_rows
                            v = vals_c[j, vc]
                            k = codes_c[mcol[j], cc]
                            total += v * cnt_r[k] - sum_r[k]
                            cnt_c[k] += 1.0
                            sum_c[k] += v
                for p in range(lo, hi):
                    it = items[g, p]
                    if it < n_rows:
                        k = codes_r[mr[it], cc]
                        cnt_r[k] = 0.0
                        sum_r[k] = 0.0
                    else:
                        k = codes_c[mcol[it - n_rows], cc]
                        cnt_c[k] = 0.0
                        sum_c[k] = 0.0
            out[b, t] = 2.0 * total if one_mode else total


@njit(**KERNEL_OPTIONS)
def _fenwick_query(tree, r, q):
    """q[:] = sums of ``tree`` over ranks 0 .. r - 1."""
    for f in range(4):
        q[f] = 0.0
    pos = r
    while pos > 0:
        for f in range(4):
            q[f] += tree[pos, f]
        pos -= pos & (-pos)


@njit(**KERNEL_OPTIONS)
def _fenwick_add(tree, r, size, a, c):
    """Add (1, a, c, a*c) at rank r of a tree over ``size`` ranks."""
    ac = a * c
    pos = r + 1
    while pos <= size:
        tree[pos, 0] += 1.0
        tree[pos, 1] += a
        tree[pos, 2] += c
        tree[pos, 3] += ac
        pos += pos & (-pos)


@njit(**KERNEL_OPTIONS)
def _pairs_with_earlier(q, tot, a, c):
    """sum over earlier items j (c_j <= c) of (c - c_j) |a - a_j|, from the sums q over
    those with a smaller rank of a and the totals ``tot`` (count, sum a, sum c, sum ac)."""
    # (c - c_j)(a - a_j) = a c - c a_j - a c_j + a_j c_j, summed over each side
    lo = a * c * q[0] - c * q[1] - a * q[2] + q[3]
    hi = (a * c * (tot[0] - q[0]) - c * (tot[1] - q[1]) - a * (tot[2] - q[2])
          + (tot[3] - q[3]))
    return lo - hi


@njit(**KERNEL_OPTIONS)
def gap_gap_sums(fix_r, fix_c, rel_r, rel_c, rank_r, rank_c, items, tile_ptr, spec,
                 row_perms, col_perms, out, n_rows, one_mode):
    """Sum over dyads of a relabelled ``gap`` layer times a fixed one.

    Parameters
    ----------
    fix_r : float64 (n, V); fix_c : float64 (m, V)
        Attribute values of the fixed gap layers, rows and columns.
    rel_r : float64 (n, V); rel_c : float64 (m, V)
        Attribute values of the relabelled gap layers.
    rank_r : int64 (n, V); rank_c : int64 (m, V)
        Ranks of ``rel_r`` (one-mode: among the nodes of the tile, 0 .. size - 1) or of
        ``rel_r`` and ``rel_c`` together (two-mode, 0 .. n + m - 1); ties in any order.
    items : int64 (G, L)
        Per sweep, the items sorted by (tile, fixed value).
    tile_ptr : int64 (tiles + 1,)
    spec : int64 (T, 3)
        Per output: sweep of the fixed layer, fixed value column, relabelled column (of
        ``rel_*`` and ``rank_*``).
    row_perms : int64 (B, n); col_perms : int64 (B, m)
    out : float64 (B, T)
        Written: one-mode, sum over ordered pairs i != j in one tile of
        |a_pr(i) - a_pr(j)| * |c_i - c_j|; two-mode, sum over cells of
        |ar_pr(i) - ac_pc(j)| * |cr_i - cc_j|.
    n_rows : int
    one_mode : bool

    Notes
    -----
    Items are visited in increasing fixed value c; each item's sum over the earlier items
    of the other side (one-mode: all earlier nodes, the total doubled for ordered pairs)
    splits by the rank of a into a lower and an upper part, read from a Fenwick tree of
    (count, sum a, sum c, sum a c) keyed by rank (``_pairs_with_earlier``).
    """
    n_perm = row_perms.shape[0]
    size = 0
    for tile in range(tile_ptr.shape[0] - 1):
        size = max(size, tile_ptr[tile + 1] - tile_ptr[tile])
    tree_r = np.zeros((size + 1, 4))
    tree_c = tree_r if one_mode else np.zeros((size + 1, 4))
    tot_r = np.zeros(4)
    tot_c = tot_r if one_mode else np.zeros(4)
    q = np.empty(4)
    for b in range(n_perm):
        pr = row_perms[b]
        pc = pr if one_mode else col_perms[b]
        for t in range(spec.shape[0]):
            g = spec[t, 0]
            fc = spec[t, 1]
            rc = spec[t, 2]
            total = 0.0
            for tile in range(tile_ptr.shape[0] - 1):
                lo = tile_ptr[tile]
                hi = tile_ptr[tile + 1]
                tsize = hi - lo
                for r in range(tsize + 1):
                    for f in range(4):
                        tree_r[r, f] = 0.0
                        tree_c[r, f] = 0.0
                for f in range(4):
                    tot_r[f] = 0.0
                    tot_c[f] = 0.0
                for p in range(lo, hi):
                    it = items[g, p]
                    if it < n_rows:
                        c = fix_r[it, fc]
                        u = pr[it]
                        a = rel_r[u, rc]
                        r = rank_r[u, rc]
                        # pairs with the earlier items of the other side (one-mode: all)
                        _fenwick_query(tree_c, r, q)
                        total += _pairs_with_earlier(q, tot_c, a, c)
                        _fenwick_add(tree_r, r, tsize, a, c)
                        tot_r[0] += 1.0
                        tot_r[1] += a
                        tot_r[2] += c
                        tot_r[3] += a * c
                    else:
                        j = it - n_rows
                        c = fix_c[j, fc]
                        u = pc[j]
                        a = rel_c[u, rc]
                        r = rank_c[u, rc]
                        _fenwick_query(tree_r, r, q)
                        total += _pairs_with_earlier(q, tot_r, a, c)
                        _fenwick_add(tree_c, r, tsize, a, c)
                        tot_c[0] += 1.0
                        tot_c[1] += a
                        tot_c[2] += c
                        tot_c[3] += a * c
            out[b, t] = 2.0 * total if one_mode else total
