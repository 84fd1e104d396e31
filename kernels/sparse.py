"""Kernels of the sparse path: sums over a sparse response's edges, never over all dyads.

Predictor codes (``kinds``): 0 same (1[a_i == a_j]), 1 gap (|a_i - a_j|), 2 sender (a_i),
3 receiver (a_j), 4 pair_sum (a_i + a_j), 5 a sparse network read from a hash table.
Derived predictors read column ``cols[c]`` of the node attribute table ``attr`` (n, A),
row-major, so one node's attributes share a cache line.

Sparse networks are stored in open-addressing hash tables (linear probing), one per
network, concatenated: table s occupies ``hkeys[hoff[s]:hoff[s + 1]]`` (a power of two
long), key = i * n + j (i < j for undirected data), empty slots hold -1.
"""

import numpy as np
from numba import njit

from .options import KERNEL_OPTIONS

SAME, GAP, SENDER, RECEIVER, PAIR_SUM, NETWORK = 0, 1, 2, 3, 4, 5
EMPTY = -1
# Fibonacci hashing multiplier (2^64 / golden ratio), common practice.
HASH_MULT = np.uint64(11400714819323198485)


@njit(**KERNEL_OPTIONS)
def hash_slot(key, mask):
    """First slot of ``key`` in a table of ``mask + 1`` slots (multiplicative hashing)."""
    x = np.uint64(key) * HASH_MULT
    x = x ^ (x >> np.uint64(29))
    return np.int64(x & np.uint64(mask))


@njit(**KERNEL_OPTIONS)
def build_hash(keys, vals, hkeys, hvals):
    """Insert distinct ``keys`` (int64, >= 0) with ``vals`` into one table.

    hkeys : int64 (size,), size a power of two > len(keys), written (EMPTY where unused);
    hvals : float64 (size,), written.
    """
    size = hkeys.shape[0]
    mask = size - 1
    hkeys[:] = EMPTY
    hvals[:] = 0.0
    for e in range(keys.shape[0]):
        s = hash_slot(keys[e], mask)
        while hkeys[s] != EMPTY:
            s = (s + 1) & mask
        hkeys[s] = keys[e]
        hvals[s] = vals[e]


@njit(**KERNEL_OPTIONS)
def hash_lookup(hkeys, hvals, start, size, key):
    """Value stored for ``key`` in the table at ``start`` (``size`` slots), 0.0 if absent."""
    mask = size - 1
    s = hash_slot(key, mask)
    while True:
        k = hkeys[start + s]
        if k == key:
            return hvals[start + s]
        if k == EMPTY:
            return 0.0
        s = (s + 1) & mask


@njit(**KERNEL_OPTIONS)
def sparse_cross(src, dst, w, perms, kinds, cols, center, slots, attr, hkeys, hvals, hoff,
                 out, invert, undirected):
    """Centred cross products of a relabelled sparse network with each predictor.

    Parameters
    ----------
    src, dst : int64 (E,)
        Edge endpoints of the sparse network (src < dst when ``undirected``).
    w : float64 (E,)
        Edge values (zero elsewhere).
    perms : int64 (B, n)
        Relabellings pi; the dyad (i, j) of the relabelled network holds the value at
        (pi(i), pi(j)).
    kinds, cols, slots : int64 (k,)
        Predictor code, attribute column (derived) and hash table index (networks).
    center : float64 (k,)
        Mean of each predictor over the dyad set.
    attr : float64 (n, A)
        Node attributes of the derived predictors.
    hkeys, hvals, hoff : the hash tables of the network predictors (module docstring).
    out : float64 (B, k)
        Written: out[b, c] = sum_e w_e (x_c(m(src_e), m(dst_e)) - center_c), where
        m = pi^-1 when ``invert`` (relabelling the sparse network itself) and m = pi
        otherwise (relabelling the predictors instead).
    invert : bool
    undirected : bool
        Network keys are stored as (min, max).
    """
    n_perm, n = perms.shape
    n_edges = src.shape[0]
    k = kinds.shape[0]
    node = np.empty(n, dtype=np.int64)
    acc = np.empty(k)
    for b in range(n_perm):
        if invert:
            for i in range(n):
                node[perms[b, i]] = i  # node = pi^-1
        else:
            for i in range(n):
                node[i] = perms[b, i]
        acc[:] = 0.0
        for e in range(n_edges):
            i = node[src[e]]
            j = node[dst[e]]
            we = w[e]
            for c in range(k):
                kind = kinds[c]
                col = cols[c]
                if kind == SAME:
                    x = 1.0 if attr[i, col] == attr[j, col] else 0.0
                elif kind == GAP:
                    x = abs(attr[i, col] - attr[j, col])
                elif kind == SENDER:
                    x = attr[i, col]
                elif kind == RECEIVER:
                    x = attr[j, col]
                elif kind == PAIR_SUM:
                    x = attr[i, col] + attr[j, col]
                else:
                    if undirected and i > j:
                        key = j * n + i
                    else:
                        key = i * n + j
                    s = slots[c]
                    x = hash_lookup(hkeys, hvals, hoff[s], hoff[s + 1] - hoff[s], key)
                # out[b, c] += w_e * (x_c at the relabelled endpoints - mean of x_c)
                acc[c] += we * (x - center[c])
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
