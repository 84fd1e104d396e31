"""Tall-skinny QR of layers over the dyad set: the setup of the dense linear route.

Before any relabelling the dense linear route needs the R factor of D = [1, z_1 .. z_L]
over the dyad set for the classical fit (the predictors and the response as given) and
the one fit rule, and that of D = [z_1 .. z_L] for the orthonormal basis of the
standardised layers the relabelling kernels read. ``fold_rows`` gets it in one streaming pass that reads every dyad once:

- the dyads of each row, in blocks of up to ``bt.shape[1]``, are folded into the row's own
  triangular factor by
  Householder reflections whose upper part is the factor so far (a tall-skinny QR with
  blocks of dyads as leaves: Demmel, Grigori, Hoemmen & Langou 2012, SIAM J. Sci. Comput.
  34:A206-A239 [memory]); each row's factor is then folded into the running one in row
  order. A row's factor depends on that row alone, so the result does not depend on how
  the rows are split into calls, and the two halves of the work can run apart:
  ``row_factors`` makes the rows' own factors (rows of a call on threads of their own)
  and ``fold_factors`` folds them in row order, the bits of ``fold_rows``.

Rounding: the Householder sums (squared norms, dot products over a block of dyads) run
in sixteen chains in an order the source fixes (``vector.dot_chains16``), so the compiled code
cannot change it: a plan is the same for any chunk size, number of jobs or threads, and
whichever kernel or process compiled the code. (They were reassociated by the compiler
until a test found two kernels sharing this one rounding it differently, depending on
which was compiled first.)

``stacks`` is a tuple of 3-d float64 or float32 arrays (all of one type), each (rows, m,
L_s): the layers are those of the first stack, then the second's, ..., L in all; row r of
every layer is row r of the call (``mask`` and the column ranges are given for the same
rows). Dyads are the cells (r, j) with col_start[r] <= j <
col_stop[r] where ``mask`` holds.
"""

import numpy as np
from numba import njit

from .options import KERNEL_OPTIONS
from .stats import standardise_rows
from .vector import RECORD_LANES, dot_chains16, records_to_rows


@njit(inline="always", **KERNEL_OPTIONS)
def _load_block(stacks, r, j0, nb, intercept, bt):
    """bt[:, w] = [1, z_1 .. z_L] (without the 1 unless ``intercept``) of cells
    (r, j0 + w), w < nb, in float64: the layers of each stack in turn.

    bt : float64 (L + intercept, width), written in columns 0 .. nb - 1. (Inner loops run
    over 1-d views with indices from 0, so they compile to vector loads and stores.)
    """
    e = 0
    if intercept:
        dst = bt[0]
        for w in range(nb):
            dst[w] = 1.0
        e = 1
    for part in stacks:
        m, L = part.shape[1], part.shape[2]
        if L <= RECORD_LANES:  # the records' layers to rows, four records at a time
            records_to_rows(part.reshape(-1), np.int64((r * m + j0) * L), np.int64(L),
                            np.int64(nb), bt, np.int64(e))
            e += L
            continue
        for c in range(L):
            dst = bt[e]
            seg = part[r, j0:j0 + nb, c]
            for w in range(nb):
                dst[w] = seg[w]
            e += 1


@njit(**KERNEL_OPTIONS)
def _fold_block(bt, nb, fac):
    """Fold the nb rows of bt' (bt is (p, width), one column per row) into the upper
    triangular ``fac`` (p, p): afterwards fac' fac gains bt' bt. bt is overwritten with the
    Householder vectors. Squared norms and dot products over the block sum in sixteen
    chains (``vector.dot_chains16``)."""
    p = fac.shape[0]
    for c in range(p):
        x = bt[c]
        s = dot_chains16(x, x, nb)
        if s == 0.0:
            continue
        alpha = fac[c, c]
        norm = np.sqrt(alpha * alpha + s)
        beta = -norm if alpha >= 0.0 else norm
        tau = (beta - alpha) / beta
        scale = 1.0 / (alpha - beta)
        for w in range(nb):
            x[w] *= scale  # v = [1; x / (alpha - beta)]
        fac[c, c] = beta
        for c2 in range(c + 1, p):
            y = bt[c2]
            g = (fac[c, c2] + dot_chains16(x, y, nb)) * tau  # tau (v' y)
            fac[c, c2] -= g
            for w in range(nb):
                y[w] -= g * x[w]  # y - tau (v' y) v


@njit(**KERNEL_OPTIONS)
def fold_rows(stacks, mask, col_start, col_stop, bt, keep, fac, out, count, intercept,
              skip_nan):
    """Fold the dyads of every row into the running R factor ``out``.

    Parameters
    ----------
    stacks : tuple of float64 or float32 (rows, m, L_s) arrays, all of one type (L in all)
    mask : bool (rows, m)
        The dyad set.
    col_start, col_stop : int64 (rows,)
        Columns of each row that may hold dyads.
    bt : float64 (p, width); keep : bool (width,); fac : float64 (p, p)
        Workspaces (width: dyads per block, at least p); p = L + 1 with ``intercept``,
        else L.
    out : float64 (p, p)
        Upper triangular factor R of D = [1, z] (or z alone) over the dyads folded so far
        (R'R = D'D), updated: each row's factor is folded in, in row order. Start from
        zeros.
    count : int64 (1,)
        Dyads folded, added to.
    intercept, skip_nan : bool
        D has the column of ones first; leave out dyads where some layer is NaN (missing
        data).
    """
    for r in range(mask.shape[0]):
        count[0] += _row_factor(stacks, mask, col_start, col_stop, r, bt, keep, fac,
                                intercept, skip_nan)
        _fold_factor(fac, bt, out)


@njit(inline="always", **KERNEL_OPTIONS)
def _row_factor(stacks, mask, col_start, col_stop, r, bt, keep, fac, intercept, skip_nan):
    """fac = the upper triangular factor of row r's dyads alone (blocks of up to
    ``bt.shape[1]`` dyads folded in column order); returns the row's dyad count."""
    p = fac.shape[0]
    width = bt.shape[1]
    fac[:, :] = 0.0
    kept_row = 0
    j = col_start[r]
    stop = col_stop[r]
    while j < stop:
        nb = min(width, stop - j)
        _load_block(stacks, r, j, nb, intercept, bt)
        kept = 0
        for w in range(nb):
            ok = mask[r, j + w]
            if skip_nan and ok:
                for c in range(p):
                    if np.isnan(bt[c, w]):
                        ok = False
            keep[w] = ok
            kept += ok
        if kept < nb:
            for c in range(p):
                for w in range(nb):
                    bt[c, w] = bt[c, w] if keep[w] else 0.0
        kept_row += kept
        _fold_block(bt, nb, fac)
        j += nb
    return kept_row


@njit(inline="always", **KERNEL_OPTIONS)
def _fold_factor(fac, bt, out):
    """A row's factor, as p more rows of data, into the running factor ``out``."""
    p = out.shape[0]
    for c in range(p):
        for w in range(p):
            bt[c, w] = fac[w, c]
    _fold_block(bt, p, out)


@njit(**KERNEL_OPTIONS)
def row_factors(stacks, mask, col_start, col_stop, bt, keep, facs, counts, intercept,
                skip_nan):
    """The first half of ``fold_rows`` on its own: facs[r] = row r's factor, counts[r] =
    its dyads (facs: float64 (rows, p, p); counts: int64 (rows,)). Rows are independent,
    so calls over disjoint rows (with workspaces of their own) may run side by side;
    ``fold_factors`` then folds them in row order: the bits of ``fold_rows``."""
    for r in range(mask.shape[0]):
        counts[r] = _row_factor(stacks, mask, col_start, col_stop, r, bt, keep, facs[r],
                                intercept, skip_nan)


@njit(**KERNEL_OPTIONS)
def stack_factors(mats, means, sds, holds, fill, out, more, mask, col_start, col_stop, bt,
                  keep, facs, counts):
    """``row_factors`` of the stacks (out,) + more, each row of ``out`` first written from
    ``mats`` (``stats.standardise_rows``: the layer stack's values, the same bits) and
    folded while it is in cache: one pass over the stack instead of two. ``more``: a
    tuple of stacks already written (possibly empty)."""
    for r in range(mask.shape[0]):
        standardise_rows(mats, means, sds, holds, fill, out, r, r + 1)
        counts[r] = _row_factor((out,) + more, mask, col_start, col_stop, r, bt, keep,
                                facs[r], False, False)


@njit(**KERNEL_OPTIONS)
def fold_factors(facs, counts, bt, out, count):
    """The second half of ``fold_rows``: fold the row factors ``facs`` (from
    ``row_factors``) into ``out`` in row order, adding their dyads to ``count``."""
    for r in range(facs.shape[0]):
        count[0] += counts[r]
        _fold_factor(facs[r], bt, out)
