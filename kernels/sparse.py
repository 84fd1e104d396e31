"""Kernels of the sparse path: sums over a sparse response's edges, never over all dyads.

Predictor codes (``kinds``): 0 same (1[a_i == a_j]), 1 gap (|a_i - a_j|), 2 sender (a_i),
3 receiver (a_j), 4 pair_sum (a_i + a_j), 5 a sparse network read by row lookup.
Derived predictors read column ``cols[c]`` of the node attribute table ``attr`` (n, A),
row-major, so one node's attributes share a cache line.

Sparse network predictors are stored by rows (compressed sparse rows): network s holds
row i's column indices, sorted, in ``nidx[nptr[s, i]:nptr[s, i + 1]]`` and its values at
the same positions of ``nval``; undirected networks hold both orientations. The response's
edges are sorted by source, so one source's row is fetched once and searched in cache.
"""

import numpy as np
from numba import njit

from .options import KERNEL_OPTIONS

SAME, GAP, SENDER, RECEIVER, PAIR_SUM, NETWORK = 0, 1, 2, 3, 4, 5
# Edges handled together by each edge term in turn (their arrays stay in cache).
EDGE_BLOCK = 2048


@njit(**KERNEL_OPTIONS)
def row_lookup(nptr, nidx, nval, s, i, j):
    """Value of network ``s`` at (i, j): binary search of j in row i; 0.0 if absent."""
    lo = nptr[s, i]
    hi = nptr[s, i + 1]
    while lo < hi:
        mid = (lo + hi) >> 1
        v = nidx[mid]
        if v < j:
            lo = mid + 1
        elif v > j:
            hi = mid
        else:
            return nval[mid]
    return 0.0


@njit(**KERNEL_OPTIONS)
def sparse_cross(src, dst, w, strength, perms, kinds, cols, center, slots, attr, nptr,
                 nidx, nval, out, invert, n_edge_cols):
    """Centred cross products of a relabelled sparse network with each predictor.

    Parameters
    ----------
    src, dst : int64 (E,)
        Edge endpoints of the sparse network (src < dst for undirected data), sorted by src.
    w : float64 (E,)
        Edge values (zero elsewhere).
    strength : float64 (n, 2)
        Sum of w over each node's edges as src (column 0) and as dst (column 1).
    perms : int64 (B, n)
        Relabellings pi; the dyad (i, j) of the relabelled network holds the value at
        (pi(i), pi(j)).
    kinds, cols, slots : int64 (k,)
        Predictor code, attribute column (derived) and row table index (networks).
    center : float64 (k,)
        Mean of each predictor over the dyad set.
    attr : float64 (n, A)
        Node attributes of the derived predictors; the columns of ``same`` and ``gap``
        come first (0 .. n_edge_cols - 1).
    nptr : int64 (S, n + 1); nidx : int64 (nnz,); nval : float64 (nnz,)
        The network predictors by rows (module docstring).
    out : float64 (B, k)
        Written: out[b, c] = sum_e w_e (x_c(m(src_e), m(dst_e)) - center_c), where
        m = pi^-1 when ``invert`` (relabelling the sparse network itself) and m = pi
        otherwise (relabelling the predictors instead).
    invert : bool
    n_edge_cols : int
        Number of attribute columns read at both endpoints of each edge.

    Notes
    -----
    sender, receiver and pair_sum depend on one endpoint at a time, so their sums collapse
    to sums over nodes of the strengths: sum_e w_e a_m(src_e) = sum_v s_out(v) a_m(v),
    O(n) per relabelling, done in the same pass over the nodes that stores m and a
    relabelled copy of the ``same``/``gap`` columns (rel[v] = attr[m(v)]). The edge loop
    then reads rel at both endpoints, and networks look up (m(src), m(dst)).
    """
    n_perm, n = perms.shape
    n_edges = src.shape[0]
    k = kinds.shape[0]
    node = np.empty(n, dtype=np.int64)
    rel = np.empty((n, max(n_edge_cols, 1)))
    acc = np.empty(k)
    node_terms = np.empty(k, dtype=np.int64)
    edge_terms = np.empty(k, dtype=np.int64)
    n_node = 0
    n_edge = 0
    for c in range(k):
        if kinds[c] == SENDER or kinds[c] == RECEIVER or kinds[c] == PAIR_SUM:
            node_terms[n_node] = c
            n_node += 1
        else:
            edge_terms[n_edge] = c
            n_edge += 1
    for b in range(n_perm):
        for c in range(k):
            acc[c] = 0.0
        for t in range(n):
            # invert: v = pi(t), so m(v) = pi^-1(v) = t; else v = t and m(v) = pi(t)
            if invert:
                v = perms[b, t]
                u = t
            else:
                v = t
                u = perms[b, t]
            node[v] = u
            for q in range(n_edge_cols):
                rel[v, q] = attr[u, q]
            for r in range(n_node):
                c = node_terms[r]
                kind = kinds[c]
                a = attr[u, cols[c]]
                # sum_e w_e (a_m(src_e) - center) = sum_v s_out(v) (a_m(v) - center)
                if kind == SENDER:
                    acc[c] += strength[v, 0] * (a - center[c])
                elif kind == RECEIVER:
                    acc[c] += strength[v, 1] * (a - center[c])
                else:
                    acc[c] += (strength[v, 0] + strength[v, 1]) * (a - 0.5 * center[c])
        # edges in blocks that stay in cache while each edge term runs a tight loop over
        # them; each term still sums its edges in order, so the block size does not
        # change any result
        for e0 in range(0, n_edges, EDGE_BLOCK):
            e1 = min(e0 + EDGE_BLOCK, n_edges)
            for r in range(n_edge):
                c = edge_terms[r]
                kind = kinds[c]
                col = cols[c]
                mc = center[c]
                s = acc[c]
                if kind == SAME:
                    for e in range(e0, e1):
                        x = 1.0 if rel[src[e], col] == rel[dst[e], col] else 0.0
                        # acc[c] += w_e * (x_c at the relabelled endpoints - mean of x_c)
                        s += w[e] * (x - mc)
                elif kind == GAP:
                    for e in range(e0, e1):
                        s += w[e] * (abs(rel[src[e], col] - rel[dst[e], col]) - mc)
                else:
                    net = slots[c]
                    for e in range(e0, e1):
                        x = row_lookup(nptr, nidx, nval, net, node[src[e]], node[dst[e]])
                        s += w[e] * (x - mc)
                acc[c] = s
        for c in range(k):
            out[b, c] = acc[c]


@njit(**KERNEL_OPTIONS)
def gap_gap_sum(a, c):
    """sum over unordered pairs i < j of |a_i - a_j| * |c_i - c_j|, in O(n log n).

    a, c : float64 (n,). Nodes are visited in increasing a; a Fenwick tree keyed by the
    rank of c holds count, sum a, sum c and sum a*c of the nodes already visited, so each
    node's sum over earlier nodes splits into those with smaller and larger c.
    """
    n = a.shape[0]
    order = np.argsort(a, kind="mergesort")
    corder = np.argsort(c, kind="mergesort")
    rank = np.empty(n, dtype=np.int64)
    for t in range(n):
        rank[corder[t]] = t
    tree = np.zeros((n + 1, 4))
    tot = np.zeros(4)
    q = np.empty(4)
    total = 0.0
    for t in range(n):
        i = order[t]
        ai = a[i]
        ci = c[i]
        r = rank[i]
        q[:] = 0.0
        pos = r  # prefix over ranks 0 .. r - 1 (Fenwick index r)
        while pos > 0:
            for f in range(4):
                q[f] += tree[pos, f]
            pos -= pos & (-pos)
        # earlier nodes j (a_j <= a_i): (a_i - a_j)(c_i - c_j) if c_j < c_i, minus it if above
        lo = ai * ci * q[0] - ai * q[2] - ci * q[1] + q[3]
        hi = ai * ci * (tot[0] - q[0]) - ai * (tot[2] - q[2]) - ci * (tot[1] - q[1]) \
            + (tot[3] - q[3])
        total += lo - hi
        pos = r + 1
        while pos <= n:
            tree[pos, 0] += 1.0
            tree[pos, 1] += ai
            tree[pos, 2] += ci
            tree[pos, 3] += ai * ci
            pos += pos & (-pos)
        tot[0] += 1.0
        tot[1] += ai
        tot[2] += ci
        tot[3] += ai * ci
    return total
