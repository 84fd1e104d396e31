"""Per-permutation regression and correlation statistics from Gram matrices.

Each permutation's fit is summarised by the Gram matrix G = V'V of the vector
v = [1, relabelled layers, fixed layers] over its dyad set. A scheme's regression is a
linear map T of v to [design columns, tested column last, response]; its statistic comes
from the Cholesky factor of T'GT (the R of a QR of the data), one permutation at a time.
"""

import numpy as np
from numba import literal_unroll, njit

from .options import EXACT_OPTIONS, FIT_PIVOT_SQUARED, KERNEL_OPTIONS
from .vector import RECORD_LANES, apply_records, masked_row_sum

#: Numbers per relabelling and term that ``regression_stats`` writes into ``rows``.
INTERVAL_WIDTH = 6
#: ``rows`` of ``regression_stats`` when no interval numbers are wanted.
NO_ROWS = np.zeros((0, 0, INTERVAL_WIDTH))


@njit(**KERNEL_OPTIONS)
def fill_gram(cross, gram0, out):
    """Gram matrices of complete-data permutations.

    Parameters
    ----------
    cross : float64 (B, R, Q)
        Relabelled-by-fixed cross products from ``gather_cross``.
    gram0 : float64 (d, d), d = 1 + R + Q
        The entries that no relabelling changes (sums, relabelled-by-relabelled and
        fixed-by-fixed products over an invariant dyad set).
    out : float64 (B, d, d)
        Written: gram0 with the cross block (rows 1..R, columns 1+R..) and its transpose.
    """
    n_perm, n_rel, n_fix = cross.shape
    for b in range(n_perm):
        out[b, :, :] = gram0
        for a in range(n_rel):
            for c in range(n_fix):
                out[b, 1 + a, 1 + n_rel + c] = cross[b, a, c]
                out[b, 1 + n_rel + c, 1 + a] = cross[b, a, c]


@njit(**KERNEL_OPTIONS)
def regression_stats(gram, transforms, scale, use_t, out, rows):
    """t statistics (or coefficients) of each tested term from each permutation's Gram,
    and (when ``rows`` is not empty) the numbers that invert its test.

    Parameters
    ----------
    gram : float64 (B, d, d)
        Gram matrix of v = [1, ...] over the permutation's dyad set (gram[b, 0, 0] = N).
    transforms : float64 (K, d, p + 1), or (K, d, p + 2) with ``rows``
        For term k: columns 0..p-2 the other design columns, p-1 the tested column,
        p the response, each as a combination of v; with ``rows`` a last column X, what
        the response loses per unit of the tested coefficient (y - b x_k: Y - b X).
    scale : float64 (K,)
        Factor applied to the statistic: the sign of the tested column's direction (t),
        or the factor taking its coefficient back to the user's units (coef).
    use_t : bool
        True: t statistic; False: coefficient.
    out : float64 (B, K)
        Written; NaN where the permuted design cannot be fitted or has no residual df.
    rows : float64 (B, K, 6), or (0, 0, 0) for none
        Written when not empty: the entries of the Cholesky factor of [Z, A, Y, X] below
        Z, (l10, l11, l20, l21, l22, df) as ``pipeline.intervals`` reads them, where A is
        column p-1, Y column p and X column p+1 (t = sqrt(df) l10 / l11); NaN where
        ``out`` is NaN. The t statistic and coefficient do not depend on X (it comes last).

    A design can be fitted when every design column keeps, apart from the columns before
    it, at least ``options.FIT_PIVOT`` of its norm: the Cholesky pivot test
    pivot^2 > FIT_PIVOT_SQUARED * diagonal, the one rule of ``kernels.options``.
    """
    n_perm, d, _ = gram.shape
    n_terms, _, p1 = transforms.shape
    with_x = rows.shape[0] > 0
    p = p1 - 2 if with_x else p1 - 1
    g = np.empty((p1, p1))
    tmp = np.empty((d, p1))
    for b in range(n_perm):
        df = gram[b, 0, 0] - p
        for k in range(n_terms):
            # g = T' G T, in two steps
            for r in range(d):
                for c in range(p1):
                    s = 0.0
                    for e in range(d):
                        s += gram[b, r, e] * transforms[k, e, c]
                    tmp[r, c] = s
            for r in range(p1):
                for c in range(r + 1):
                    s = 0.0
                    for e in range(d):
                        s += transforms[k, e, r] * tmp[e, c]
                    g[r, c] = s
            # lower Cholesky factor in place: g = L L'
            ok = True
            for c in range(p1):
                s = g[c, c]
                for e in range(c):
                    s -= g[c, e] * g[c, e]
                if c < p:
                    if not (s > FIT_PIVOT_SQUARED * g[c, c]) or not (s > 0.0):
                        ok = False
                        break
                    g[c, c] = np.sqrt(s)
                else:
                    g[c, c] = np.sqrt(s) if s > 0.0 else 0.0
                for r in range(c + 1, p1):
                    s2 = g[r, c]
                    for e in range(c):
                        s2 -= g[r, e] * g[c, e]
                    g[r, c] = s2 / g[c, c]
            if not ok or df <= 0.0:
                out[b, k] = np.nan
                if with_x:
                    rows[b, k, :] = np.nan
                continue
            if with_x:
                # y - b x: t(b) = sqrt(df) (l10 - b l20) / sqrt((l11 - b l21)^2 + (b l22)^2)
                rows[b, k, 0] = g[p, p - 1]
                rows[b, k, 1] = g[p, p]
                rows[b, k, 2] = g[p + 1, p - 1]
                rows[b, k, 3] = g[p + 1, p]
                rows[b, k, 4] = g[p + 1, p + 1]
                rows[b, k, 5] = df
            w = g[p, p - 1]  # projection of the response on the tested column's new part
            if use_t:
                # t = beta / se = w / sqrt(RSS / df), RSS = L[p, p]^2
                out[b, k] = w / np.sqrt(g[p, p] * g[p, p] / df) * scale[k]
            else:
                out[b, k] = w / g[p - 1, p - 1] * scale[k]


@njit(**KERNEL_OPTIONS)
def correlation_stats(gram, out):
    """Pearson correlation of layers 1 and 2 of v = [1, a, b] from each Gram matrix.

    gram : float64 (B, 3, 3); out : float64 (B,), written (NaN at zero variance).
    r = (S_ab - S_a S_b / N) / sqrt((S_aa - S_a^2 / N)(S_bb - S_b^2 / N)).
    """
    for b in range(gram.shape[0]):
        n = gram[b, 0, 0]
        cov = gram[b, 1, 2] - gram[b, 0, 1] * gram[b, 0, 2] / n
        va = gram[b, 1, 1] - gram[b, 0, 1] * gram[b, 0, 1] / n
        vb = gram[b, 2, 2] - gram[b, 0, 2] * gram[b, 0, 2] / n
        if va > 0.0 and vb > 0.0:
            out[b] = cov / np.sqrt(va * vb)
        else:
            out[b] = np.nan


@njit(inline="always", **KERNEL_OPTIONS)
def _masked_row_sum(mat, mask, i, shift, square):
    """sum over the row's masked cells of (x - shift) (or its square), in four partial
    sums over the columns j mod 4, combined as (s0 + s1) + (s2 + s3): four independent
    chains instead of one (an unmasked cell adds 0.0, which changes no sum)."""
    m = mat.shape[1]
    s0 = 0.0
    s1 = 0.0
    s2 = 0.0
    s3 = 0.0
    m4 = m - m % 4
    for j in range(0, m4, 4):
        d0 = mat[i, j] - shift
        d1 = mat[i, j + 1] - shift
        d2 = mat[i, j + 2] - shift
        d3 = mat[i, j + 3] - shift
        if square:
            d0 *= d0
            d1 *= d1
            d2 *= d2
            d3 *= d3
        s0 += d0 if mask[i, j] else 0.0
        s1 += d1 if mask[i, j + 1] else 0.0
        s2 += d2 if mask[i, j + 2] else 0.0
        s3 += d3 if mask[i, j + 3] else 0.0
    for j in range(m4, m):
        d0 = mat[i, j] - shift
        if square:
            d0 *= d0
        s0 += d0 if mask[i, j] else 0.0
    return (s0 + s1) + (s2 + s3)


@njit(**KERNEL_OPTIONS)
def masked_moments(mat, mask, out):
    """Count, mean and sum of squared deviations of ``mat`` over the cells of ``mask``.

    Parameters
    ----------
    mat : float64 (n, m), any strides
    mask : bool (n, m)
    out : float64 (3,)
        Written: [N, mean, sum over the mask of (x - mean)^2]. Two passes (mean first), each
        summing row by row (``_masked_row_sum``) and then the row sums, so rounding grows
        with n + m, not n * m.
    """
    n, m = mat.shape
    # rows of contiguous values: the row sums in vector registers (vector.masked_row_sum,
    # the same order)
    vec = mat.strides[1] == mat.itemsize
    count = 0
    total = 0.0
    for i in range(n):
        for j in range(m):
            count += mask[i, j]
        # sum_j x_ij over the row's dyads
        if vec:
            total += masked_row_sum(mat, mask, np.int64(i), 0.0, False)
        else:
            total += _masked_row_sum(mat, mask, i, 0.0, False)
    mean = total / max(count, 1)
    m2 = 0.0
    for i in range(n):
        # sum_j (x_ij - mean)^2
        if vec:
            m2 += masked_row_sum(mat, mask, np.int64(i), mean, True)
        else:
            m2 += _masked_row_sum(mat, mask, i, mean, True)
    out[0] = count
    out[1] = mean
    out[2] = m2


@njit(**KERNEL_OPTIONS)
def column_summary(block, observed, nonzero, total, low, high):
    """Fold the values of ``block`` (N, L), row by row, into each column's summary.

    For each column c, over its values that are not NaN: observed[c] and nonzero[c]
    (int64) count them and those that are not 0, total[c] adds them in row order, low[c]
    and high[c] keep the least and the greatest (float64; start them at +inf and -inf).
    What ``dyadperm check`` prints of each network, one pass over a block of dyads.
    """
    for r in range(block.shape[0]):
        for c in range(block.shape[1]):
            x = block[r, c]
            if x == x:  # not NaN
                observed[c] += 1
                if x != 0.0:
                    nonzero[c] += 1
                total[c] += x
                if x < low[c]:
                    low[c] = x
                if x > high[c]:
                    high[c] = x


@njit(**KERNEL_OPTIONS)
def masked_values(mat, mask, out):
    """Copy the cells of ``mat`` where ``mask`` holds, in row-major order, into ``out``.

    What ``mat[mask]`` gives, written into an existing 1-d array of any stride (a column
    of a design matrix) without the boolean-index temporary.

    Parameters
    ----------
    mat : float64 or float32 (n, m), any strides
    mask : bool (n, m)
    out : float64 (count of mask,), any stride
        Written.
    """
    n, m = mat.shape
    k = 0
    for i in range(n):
        for j in range(m):
            if mask[i, j]:
                out[k] = mat[i, j]
                k += 1


# Columns of a row ``standardise_rows`` computes at once into its workspace (4 KB).
STANDARDISE_COLUMNS = 512


@njit(**EXACT_OPTIONS)
def standardise_rows(mats, means, sds, holds, fill, out, r0, r1):
    """out[:, :, p] = (mats[p] - means[p]) / sds[p] where ``holds``, else ``fill``: the
    layers of a stack, row by row (every layer of a row while the row's records stay in
    cache). The bits of numpy's ``np.subtract(mat, mean, out=layer); layer /= sd;
    layer[~holds] = fill``: the difference is rounded to ``out``'s type, then the quotient
    (in float64) rounded again. A row's values are computed STANDARDISE_COLUMNS at a time
    into a contiguous workspace, then stored into the records.

    mats : tuple of (n, m) float64 or float32 arrays, any strides (the layers; they may
    be ``out``'s own layers: each cell is read before it is written); means, sds : float64
    (L,); holds : bool (n, m); fill : float; out : float64 or float32 (n, m, L);
    r0, r1 : the rows [r0, r1) written.
    """
    m = holds.shape[1]
    buf = np.empty(STANDARDISE_COLUMNS)
    for i in range(r0, r1):
        pos = 0
        for mat in literal_unroll(mats):
            mean = means[pos]
            sd = sds[pos]
            for j0 in range(0, m, STANDARDISE_COLUMNS):
                w = min(STANDARDISE_COLUMNS, m - j0)
                src = mat[i, j0:j0 + w]
                keep = holds[i, j0:j0 + w]
                for t in range(w):
                    d = out.dtype.type(src[t] - mean)
                    buf[t] = np.float64(d) / sd if keep[t] else fill
                dst = out[i, j0:j0 + w, pos]
                for t in range(w):
                    dst[t] = buf[t]
            pos += 1


# Records handled at once by ``apply_upper`` (L x 512 float64 workspaces stay in L1).
APPLY_CHUNK = 512


@njit(**KERNEL_OPTIONS)
def padded_upper(rinv):
    """The upper triangle of ``rinv`` (L, L), L <= RECORD_LANES, in the top left corner of
    a (RECORD_LANES, RECORD_LANES) float64 array of zeros: ``vector.apply_records``' R."""
    L = rinv.shape[0]
    rpad = np.zeros((RECORD_LANES, RECORD_LANES))
    for e in range(L):
        for c in range(e, L):
            rpad[e, c] = rinv[e, c]
    return rpad


@njit(**KERNEL_OPTIONS)
def apply_upper(flat, n_layers, rinv):
    """Each record v of ``flat`` (n_cells x L values, C order) becomes v @ rinv, in place
    (rinv upper triangular (L, L) float64): new_c = sum_{e <= c} v_e rinv[e, c], summed in
    increasing e in float64 (one fused multiply-add a term), stored in the stack's type.
    Records go through layer-major workspaces ``APPLY_CHUNK`` at a time, so the sums run
    across records in vector registers (each record's own sum keeps its order).

    Records of up to ``vector.RECORD_LANES`` values go through ``vector.apply_records``
    instead (each record's sums in vector registers, the same order).

    flat : float64 or float32 (n_cells * L,), a C-ordered (n, m, L) stack flattened.
    """
    L = n_layers
    n_cells = flat.shape[0] // L
    if L <= RECORD_LANES:
        apply_records(flat, np.int64(n_cells), np.int64(L), padded_upper(rinv))
        return
    buf = np.empty((L, APPLY_CHUNK))
    acc = np.empty(APPLY_CHUNK)
    for q0 in range(0, n_cells, APPLY_CHUNK):
        w = min(APPLY_CHUNK, n_cells - q0)
        base = q0 * L
        for e in range(L):
            row = buf[e]
            for t in range(w):
                row[t] = flat[base + t * L + e]
        for c in range(L):
            for t in range(w):
                acc[t] = 0.0
            for e in range(c + 1):
                row = buf[e]
                rc = rinv[e, c]
                for t in range(w):
                    acc[t] += row[t] * rc
            for t in range(w):
                flat[base + t * L + c] = acc[t]


# Side of the square tiles ``is_symmetric`` compares with their mirror images (two 64 x 64
# float64 tiles stay in the first-level cache while one is read across its columns).
SYM_TILE = 64


@njit(**KERNEL_OPTIONS)
def is_symmetric(mat):
    """Whether ``mat`` (n, n, any strides) equals its transpose off the diagonal, NaN
    equal to NaN. Tiles of SYM_TILE x SYM_TILE against their mirror tiles; stops at the
    first pair that differs (directed data: at once)."""
    n = mat.shape[0]
    for bi in range(0, n, SYM_TILE):
        for bj in range(bi, n, SYM_TILE):
            for i in range(bi, min(bi + SYM_TILE, n)):
                for j in range(max(bj, i + 1), min(bj + SYM_TILE, n)):
                    a = mat[i, j]
                    b = mat[j, i]
                    if not (a == b or (np.isnan(a) and np.isnan(b))):
                        return False
    return True


#: The ``mask`` of ``any_nonfinite`` that counts every cell.
NO_MASK = np.zeros((0, 0), dtype=np.bool_)


@njit(**KERNEL_OPTIONS)
def any_nonfinite(mat, mask, want_nan):
    """Whether some cell of ``mat`` (n, m, any strides) is NaN (``want_nan``) or infinite
    (else); with ``mask`` (bool (n, m), or a (0, 0) array for none) only cells where it
    holds count. Stops at the first."""
    n, m = mat.shape
    masked = mask.shape[0] > 0
    for i in range(n):
        for j in range(m):
            x = mat[i, j]
            hit = np.isnan(x) if want_nan else np.isinf(x)
            if hit and (not masked or mask[i, j]):
                return True
    return False


# What ``nonfinite_kinds`` reports, as bits.
HAS_NAN = 1
HAS_INF = 2
# The largest finite float64: |x| <= it fails exactly for NaN and the infinities.
_FINITE_MAX = 1.7976931348623157e308


@njit(**KERNEL_OPTIONS)
def nonfinite_kinds(mat):
    """HAS_NAN | HAS_INF: which kinds of non-finite value ``mat`` (n, m, float, any strides)
    holds. One pass: a row is tested at once (one comparison a cell, or-ed, which the
    compiler vectorises), and only a row with a hit is read again to tell NaN from
    infinity; stops once both are found."""
    n, m = mat.shape
    kinds = 0
    for i in range(n):
        bad = False
        for j in range(m):
            bad |= not (abs(mat[i, j]) <= _FINITE_MAX)
        if bad:
            for j in range(m):
                x = mat[i, j]
                if np.isnan(x):
                    kinds |= HAS_NAN
                elif np.isinf(x):
                    kinds |= HAS_INF
            if kinds == HAS_NAN | HAS_INF:
                break
    return kinds


@njit(**KERNEL_OPTIONS)
def place_rows(block, cols, out, out_rows, status):
    """out[out_rows[i], j] = block[i, cols[j]] cast to ``out``'s type, checking each value.

    The loading of a network file: one pass that checks, casts and places a block of rows
    (no temporaries). ``cols`` / ``out_rows`` of length 0 mean the identity. Stops at the
    first value that is infinite (status = [1, i, j]) or finite but beyond the range of
    ``out``'s type (status = [2, i, j]); status[0] = 0 when every value was placed.

    block : (r, m) any numeric type; out : float64 or float32 (n, m), any strides;
    cols, out_rows : int64; status : int64 (3,).
    """
    r, m = block.shape
    use_cols = cols.shape[0] > 0
    use_rows = out_rows.shape[0] > 0
    status[0] = 0
    for i in range(r):
        dst = out_rows[i] if use_rows else i
        for j in range(m):
            x = block[i, cols[j]] if use_cols else block[i, j]
            xf = np.float64(x)
            if np.isinf(xf):
                status[0], status[1], status[2] = 1, i, j
                return
            y = out.dtype.type(xf)
            if np.isinf(y):
                status[0], status[1], status[2] = 2, i, j
                return
            out[dst, j] = y
