"""Relabel-and-accumulate kernels: dot products of relabelled layers with fixed layers.

No relabelled matrix is ever built: the value of a relabelled layer at dyad (i, j) is read
from the stored layer at (row_perm[i], col_perm[j]).
"""

import numpy as np
from numba import njit

from .options import KERNEL_OPTIONS

# Permutations processed together per pass over the fixed layers: their gathers share
# each load of the fixed values. Each permutation's sum still runs over (i, j) in the
# same order, so results do not depend on this constant.
PERM_BLOCK = 8


@njit(**KERNEL_OPTIONS)
def gather_cross(rel, rel_idx, fix, fix_idx, row_perms, col_perms, col_start, col_stop, out):
    """Cross products of relabelled layers with fixed layers over a dyad set.

    Parameters
    ----------
    rel : float64 (n, m, Lr)
        Layers read through the relabelling.
    rel_idx : int64 (R,)
        Which layers of ``rel`` take part.
    fix : float64 (n, m, Lf)
        Layers read in place.
    fix_idx : int64 (Q,)
        Which layers of ``fix`` take part.
    row_perms : int64 (B, n)
        Row relabelling of each permutation.
    col_perms : int64 (B, m)
        Column relabelling (the same rows as ``row_perms`` for one-mode data).
    col_start, col_stop : int64 (n,)
        Row i uses the columns j in [col_start[i], col_stop[i]).
    out : float64 (B, R, Q)
        Written: out[b, a, c] = sum_ij rel[row_perms[b, i], col_perms[b, j], rel_idx[a]]
        * fix[i, j, fix_idx[c]].
    """
    n_perm = row_perms.shape[0]
    n_rows = fix.shape[0]
    n_rel = rel_idx.shape[0]
    n_fix = fix_idx.shape[0]
    fixed = np.empty(n_fix)
    out[:] = 0.0
    for b0 in range(0, n_perm, PERM_BLOCK):
        b1 = min(b0 + PERM_BLOCK, n_perm)
        for i in range(n_rows):
            for j in range(col_start[i], col_stop[i]):
                for c in range(n_fix):
                    fixed[c] = fix[i, j, fix_idx[c]]
                for b in range(b0, b1):
                    pi = row_perms[b, i]
                    pj = col_perms[b, j]
                    for a in range(n_rel):
                        v = rel[pi, pj, rel_idx[a]]
                        for c in range(n_fix):
                            # out[b, a, c] += R_pi[i, j, a] * F[i, j, c]
                            out[b, a, c] += v * fixed[c]


@njit(**KERNEL_OPTIONS)
def gather_gram(rel, rel_idx, fix, fix_idx, row_perms, col_perms, col_start, col_stop, out):
    """Full Gram matrix of v = [1, relabelled layers, fixed layers] over complete dyads.

    For data with missing values (NaN) the dyad set of each permutation is the set where
    every value of v is finite; this kernel sums v v' over exactly that set.

    Parameters are as in ``gather_cross``; ``out`` is float64 (B, d, d) with
    d = 1 + R + Q, written: out[b] = sum over complete dyads of v v' (out[b, 0, 0] = N).
    """
    n_perm = row_perms.shape[0]
    n_rows = fix.shape[0]
    n_rel = rel_idx.shape[0]
    n_fix = fix_idx.shape[0]
    d = 1 + n_rel + n_fix
    v = np.empty(d)
    v[0] = 1.0
    out[:] = 0.0
    for b in range(n_perm):
        for i in range(n_rows):
            pi = row_perms[b, i]
            for j in range(col_start[i], col_stop[i]):
                pj = col_perms[b, j]
                complete = True
                for c in range(n_fix):
                    x = fix[i, j, fix_idx[c]]
                    if np.isnan(x):
                        complete = False
                        break
                    v[1 + n_rel + c] = x
                if not complete:
                    continue
                for a in range(n_rel):
                    x = rel[pi, pj, rel_idx[a]]
                    if np.isnan(x):
                        complete = False
                        break
                    v[1 + a] = x
                if not complete:
                    continue
                for r in range(d):
                    for s in range(r + 1):
                        # G[r, s] += v_r v_s over complete dyads
                        out[b, r, s] += v[r] * v[s]
        for r in range(d):
            for s in range(r + 1, d):
                out[b, r, s] = out[b, s, r]
