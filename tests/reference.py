"""Slow, plain-numpy twins of the kernels and brute-force oracles of the schemes.

Everything here is written for obviousness, not speed: relabelled matrices are built with
``M[np.ix_(p, q)]``, every fit is a full ``np.linalg.lstsq`` refit, exact p-values loop over
all relabellings with ``itertools.permutations``. The formulas are those of
``shared/methods.md`` (Krackhardt 1988 for the Y-permutation; Dekker, Krackhardt & Snijders
2007 for DSP; Freedman & Lane 1983), written here from the text, not from the engine.

Tolerances used across the tests live here, as named constants, in one place.
"""

from __future__ import annotations

import itertools
from typing import Iterator, Sequence

import numpy as np

# --- tolerances (one place) -------------------------------------------------------------
#: kernel vs its numpy twin: same sums in another order (numba fastmath may reassociate).
KERNEL_RTOL = 1e-10
KERNEL_ATOL = 1e-10
#: engine statistics (dot-product updates) vs full lstsq refits / statsmodels.
STAT_RTOL = 1e-8
STAT_ATOL = 1e-10
#: two statistics closer than this (relative) count as tied: the rule of methods.md.
TIE_RTOL = 1e-9
#: p-values are counts over a known total; compare them to this absolute tolerance.
P_ATOL = 1e-12
#: Clopper-Pearson end points: scipy's binomtest finds them by root finding (about 1e-10
#: relative), a beta quantile gives them directly; both are the same interval.
INTERVAL_RTOL = 1e-8
#: The rule of whether a design can be fitted, as the kernels test it on a Gram matrix
#: (design.md, kernels/options.py): each design column's squared residual on the columns
#: before it must exceed this fraction of its sum of squares (a relative pivot of 1e-5).
FIT_PIVOT_SQUARED = 1e-10

SCHEMES = ("y", "dsp", "freedman-lane")


# --- kernel twin --------------------------------------------------------------------------

def fold_rows_ref(layers, mask, col_start, col_stop, intercept, skip_nan):
    """R factor of D = [1, z_1 .. z_L] (without the 1 unless ``intercept``) over the cells
    (r, j), col_start[r] <= j < col_stop[r], where ``mask`` holds (and, with ``skip_nan``,
    no layer is NaN): one ``np.linalg.qr`` of the whole D, rows in row-major order. Rows
    of R are made to have a nonnegative diagonal (R is unique up to those signs); also
    returns the number of dyads."""
    n, m = mask.shape
    cols = np.arange(m)
    inside = mask & (cols[None, :] >= col_start[:, None]) & (cols[None, :] < col_stop[:, None])
    Z = np.stack([np.asarray(a, dtype=np.float64) for a in layers], axis=-1)[inside]
    if skip_nan:
        Z = Z[~np.isnan(Z).any(axis=1)]
    D = np.column_stack([np.ones(Z.shape[0]), Z]) if intercept else Z
    p = D.shape[1]
    R = np.linalg.qr(np.vstack([D, np.zeros((p, p))]), mode="r")[:p]
    return sign_rows(R), Z.shape[0]


def sign_rows(R: np.ndarray) -> np.ndarray:
    """R with each row's sign flipped so its diagonal is nonnegative."""
    s = np.where(np.diag(R) < 0, -1.0, 1.0)
    return R * s[:, None]

def gather_cross_ref(rel, rel_idx, fix, fix_idx, row_perms, col_perms, col_start, col_stop,
                     out=None):
    """Twin of ``kernels.gather.gather_cross``.

    out[b, a, c] = sum_i sum_{col_start[i] <= j < col_stop[i]}
                   rel[row_perms[b, i], col_perms[b, j], rel_idx[a]] * fix[i, j, fix_idx[c]]
    """
    m = fix.shape[1]
    B = row_perms.shape[0]
    R, Q = len(rel_idx), len(fix_idx)
    jj = np.arange(m)[None, :]
    mask = (jj >= np.asarray(col_start)[:, None]) & (jj < np.asarray(col_stop)[:, None])
    res = np.empty((B, R, Q))
    for b in range(B):
        moved = rel[np.ix_(row_perms[b], col_perms[b])]          # (n, m, Lr)
        for a in range(R):
            for c in range(Q):
                prod = moved[:, :, rel_idx[a]] * fix[:, :, fix_idx[c]]
                res[b, a, c] = np.sum(prod[mask])
    if out is not None:
        out[...] = res
        return out
    return res


def gather_gram_ref(rel, rel_idx, fix, fix_idx, row_perms, col_perms, col_start, col_stop):
    """Twin of ``kernels.gather.gather_gram``: sum of v v' over dyads where every entry of
    v = [1, relabelled layers, fixed layers] is finite."""
    n, m = fix.shape[0], fix.shape[1]
    jj = np.arange(m)[None, :]
    mask = (jj >= np.asarray(col_start)[:, None]) & (jj < np.asarray(col_stop)[:, None])
    B = row_perms.shape[0]
    d = 1 + len(rel_idx) + len(fix_idx)
    res = np.empty((B, d, d))
    for b in range(B):
        moved = rel[np.ix_(row_perms[b], col_perms[b])]
        cols = [np.ones((n, m))] + [moved[:, :, a] for a in rel_idx] + [fix[:, :, c] for c in fix_idx]
        V = np.stack([c[mask] for c in cols], axis=1)
        V = V[np.isfinite(V).all(axis=1)]
        res[b] = V.T @ V
    return res


def fill_gram_ref(cross, gram0):
    """Twin of ``kernels.stats.fill_gram``."""
    B, R, Q = cross.shape
    out = np.repeat(gram0[None], B, axis=0)
    out[:, 1:1 + R, 1 + R:] = cross
    out[:, 1 + R:, 1:1 + R] = np.transpose(cross, (0, 2, 1))
    return out


def fittable_ref(xtx: np.ndarray) -> bool:
    """The fit rule on a design's Gram matrix, by Schur complements: column c's squared
    residual on columns 0..c-1, xtx[c, c] - xtx[c, :c] xtx[:c, :c]^-1 xtx[:c, c], must exceed
    FIT_PIVOT_SQUARED * xtx[c, c]."""
    for c in range(xtx.shape[0]):
        s = xtx[c, c]
        if c:
            s -= xtx[c, :c] @ np.linalg.solve(xtx[:c, :c], xtx[:c, c])
        if not (s > FIT_PIVOT_SQUARED * xtx[c, c]) or not s > 0:
            return False
    return True


def regression_stats_ref(gram, transforms, scale, use_t):
    """Twin of ``kernels.stats.regression_stats``: OLS of the last column of T'GT on the
    others (the tested one last) by explicit inverses of the normal equations; NaN when the
    design breaks the fit rule (``fittable_ref``) or has no residual df."""
    B = gram.shape[0]
    K, _, p1 = transforms.shape
    p = p1 - 1
    out = np.empty((B, K))
    for b in range(B):
        for k in range(K):
            g = transforms[k].T @ gram[b] @ transforms[k]
            xtx, xty, yty = g[:p, :p], g[:p, p], g[p, p]
            if not fittable_ref(xtx) or gram[b, 0, 0] - p <= 0:
                out[b, k] = np.nan
                continue
            inv = np.linalg.inv(xtx)
            beta = inv @ xty
            rss = yty - xty @ beta
            df = gram[b, 0, 0] - p
            if use_t:
                out[b, k] = beta[-1] / np.sqrt(rss / df * inv[-1, -1]) * scale[k]
            else:
                out[b, k] = beta[-1] * scale[k]
    return out


def correlation_stats_ref(gram):
    """Twin of ``kernels.stats.correlation_stats``: Pearson r from sums."""
    n = gram[:, 0, 0]
    cov = gram[:, 1, 2] - gram[:, 0, 1] * gram[:, 0, 2] / n
    va = gram[:, 1, 1] - gram[:, 0, 1] ** 2 / n
    vb = gram[:, 2, 2] - gram[:, 0, 2] ** 2 / n
    return cov / np.sqrt(va * vb)



def column_summary_ref(block):
    """Twin of ``kernels.stats.column_summary`` from zero: per column, over the values that
    are not NaN, (count, count of nonzero ones, sum, min, max); min and max are +inf and
    -inf for a column with none."""
    out = []
    for col in np.asarray(block, dtype=np.float64).T:
        fin = col[~np.isnan(col)]
        out.append((fin.size, np.count_nonzero(fin), fin.sum(),
                    fin.min() if fin.size else np.inf, fin.max() if fin.size else -np.inf))
    return out

# --- dyad sets, vectors, relabelling ------------------------------------------------------
def dyads(n: int, m: int | None = None, directed: bool = True, two_mode: bool = False):
    """Index arrays (rows, cols) of the dyad set (methods.md, "Dyads and relabelling").

    directed one-mode: all i != j; undirected: i < j; two-mode: every (i, j) of n x m.
    """
    if two_mode:
        rows, cols = np.meshgrid(np.arange(n), np.arange(m), indexing="ij")
        return rows.ravel(), cols.ravel()
    if m is not None and m != n:
        raise ValueError(f"one-mode data need n == m; got {n} x {m}")
    rows, cols = np.meshgrid(np.arange(n), np.arange(n), indexing="ij")
    keep = rows < cols if not directed else rows != cols
    return rows[keep], cols[keep]


def vec(M: np.ndarray, rows: np.ndarray, cols: np.ndarray) -> np.ndarray:
    """Dyad values of M over the dyad set, in the order of (rows, cols)."""
    return np.asarray(M, dtype=np.float64)[rows, cols]


def unvec(v: np.ndarray, rows, cols, shape, directed: bool, two_mode: bool) -> np.ndarray:
    """Matrix holding v on the dyad set and 0 elsewhere.

    For undirected data a dyad is an unordered pair {i, j}: its value goes in both cells,
    so relabelling can move it to either triangle without losing it.
    """
    E = np.zeros(shape)
    E[rows, cols] = v
    if not directed and not two_mode:
        E[cols, rows] = v
    return E


def relabel(M: np.ndarray, prow, pcol) -> np.ndarray:
    """M'[i, j] = M[prow[i], pcol[j]] (methods.md; one-mode uses prow == pcol)."""
    return np.asarray(M)[np.ix_(np.asarray(prow), np.asarray(pcol))]


# --- ordinary least squares -------------------------------------------------------------
def ols_t(X: np.ndarray, y: np.ndarray):
    """Classical OLS by ``np.linalg.lstsq``: (coefficients, standard errors, t statistics)."""
    beta, *_ = np.linalg.lstsq(X, y, rcond=None)
    resid = y - X @ beta
    N, p = X.shape
    sigma2 = resid @ resid / (N - p)
    se = np.sqrt(sigma2 * np.diag(np.linalg.inv(X.T @ X)))
    return beta, se, beta / se


def design(Xs: Sequence[np.ndarray], rows, cols) -> np.ndarray:
    """[1, x_1, ..., x_k] over the dyad set."""
    return np.column_stack([np.ones(len(rows))] + [vec(X, rows, cols) for X in Xs])


def residualise(v: np.ndarray, Z: np.ndarray) -> np.ndarray:
    """M_Z v = v - Z (Z'Z)^-1 Z'v, by lstsq."""
    g, *_ = np.linalg.lstsq(Z, v, rcond=None)
    return v - Z @ g


# --- the brute-force scheme oracle -------------------------------------------------------
def scheme_stat(Y, Xs, scheme: str, statistic: str, prow, pcol, directed: bool = True,
                two_mode: bool = False) -> np.ndarray:
    """The k permuted statistics for one relabelling (prow, pcol), by full refits.

    scheme "y": relabel Y, regress on X, take term j (Krackhardt 1988).
    scheme "dsp": for term j, e = M_Z x_j (Z = [1, other x]) back into a matrix E, relabel
        E, regress y on [Z, e_pi], take the e_pi term (Dekker et al. 2007).
    scheme "freedman-lane": r = M_Z y into a matrix R, relabel R, y* = Z g + r_pi, regress
        y* on the full X, take term j (Freedman & Lane 1983).
    statistic "t" takes the t statistic, "coef" the coefficient.
    """
    Y = np.asarray(Y, dtype=np.float64)
    n, m = Y.shape
    rows, cols = dyads(n, m, directed, two_mode)
    X = design(Xs, rows, cols)
    y = vec(Y, rows, cols)
    k = len(Xs)
    pick = 0 if statistic == "coef" else 2
    if statistic not in ("t", "coef"):
        raise ValueError(f"statistic must be 't' or 'coef'; got {statistic!r}")
    out = np.empty(k)
    if scheme == "y":
        y_pi = vec(relabel(Y, prow, pcol), rows, cols)
        out[:] = ols_t(X, y_pi)[pick][1:]
        return out
    for j in range(k):
        col = j + 1
        Z = np.delete(X, col, axis=1)
        if scheme == "dsp":
            e = residualise(X[:, col], Z)
            E = unvec(e, rows, cols, Y.shape, directed, two_mode)
            e_pi = vec(relabel(E, prow, pcol), rows, cols)
            fit = ols_t(np.column_stack([Z, e_pi]), y)
            out[j] = fit[pick][-1]
        elif scheme == "freedman-lane":
            g, *_ = np.linalg.lstsq(Z, y, rcond=None)
            r = y - Z @ g
            R = unvec(r, rows, cols, Y.shape, directed, two_mode)
            y_star = Z @ g + vec(relabel(R, prow, pcol), rows, cols)
            out[j] = ols_t(X, y_star)[pick][col]
        else:
            raise ValueError(f"scheme must be one of {SCHEMES}; got {scheme!r}")
    return out


def all_relabellings(n: int, m: int | None = None, two_mode: bool = False
                     ) -> Iterator[tuple[np.ndarray, np.ndarray]]:
    """Every relabelling, the identity included: n! (one-mode) or n! * m! (two-mode)."""
    if two_mode:
        for pr, pc in itertools.product(itertools.permutations(range(n)),
                                        itertools.permutations(range(m))):
            yield np.array(pr), np.array(pc)
    else:
        for p in itertools.permutations(range(n)):
            a = np.array(p)
            yield a, a


def exact_null(Y, Xs, scheme, statistic, directed=True, two_mode=False):
    """(observed statistics (k,), null (total x k)) over all relabellings."""
    Y = np.asarray(Y, dtype=np.float64)
    n, m = Y.shape
    ident_r, ident_c = np.arange(n), np.arange(m)
    obs = scheme_stat(Y, Xs, scheme, statistic, ident_r, ident_c, directed, two_mode)
    null = np.array([scheme_stat(Y, Xs, scheme, statistic, pr, pc, directed, two_mode)
                     for pr, pc in all_relabellings(n, m, two_mode)])
    return obs, null


def counts(obs: np.ndarray, null: np.ndarray):
    """(b_two_sided, b_greater, b_less) with the tie rule of methods.md (relative 1e-9); a
    failed permuted fit (NaN) counts as at least as extreme (methods.md, logistic model;
    the package's rule for every route)."""
    obs = np.asarray(obs, dtype=np.float64)
    null = np.asarray(null, dtype=np.float64)
    tol = TIE_RTOL * np.abs(obs)
    failed = np.isnan(null)
    with np.errstate(invalid="ignore"):
        b2 = np.sum((np.abs(null) >= np.abs(obs) - tol) | failed, axis=0)
        bg = np.sum((null >= obs - tol) | failed, axis=0)
        bl = np.sum((null <= obs + tol) | failed, axis=0)
    return b2, bg, bl


def exact_pvalues(Y, Xs, scheme, statistic, directed=True, two_mode=False):
    """Exact (two-sided, greater, less) p-values: p = b / total, the identity included."""
    obs, null = exact_null(Y, Xs, scheme, statistic, directed, two_mode)
    b2, bg, bl = counts(obs, null)
    total = null.shape[0]
    return b2 / total, bg / total, bl / total


def random_pvalues(obs, null):
    """(b+1)/(m+1) p-values for m random relabellings (Phipson & Smyth 2010)."""
    b2, bg, bl = counts(obs, null)
    m = null.shape[0]
    return (b2 + 1) / (m + 1), (bg + 1) / (m + 1), (bl + 1) / (m + 1)


# --- missing dyads and failed fits -------------------------------------------------------
def ols_stat_or_nan(A: np.ndarray, y: np.ndarray, col: int, statistic: str) -> float:
    """The t statistic (or coefficient) of column ``col`` of the OLS fit of y on A by lstsq;
    NaN when A cannot be fitted: fewer rows than columns plus one, or rank below its column
    count (``np.linalg.matrix_rank``'s own tolerance, numpy's default for exactly singular
    designs)."""
    N, p = A.shape
    if N <= p or np.linalg.matrix_rank(A) < p:
        return np.nan
    beta, *_ = np.linalg.lstsq(A, y, rcond=None)
    if statistic == "coef":
        return float(beta[col])
    resid = y - A @ beta
    sigma2 = resid @ resid / (N - p)
    return float(beta[col] / np.sqrt(sigma2 * np.linalg.inv(A.T @ A)[col, col]))


def masked_scheme_stat(Y, Xs, mask, scheme: str, statistic: str, prow, pcol) -> np.ndarray:
    """The k statistics of one relabelling with missing values (NaN) and a structural dyad
    set ``mask``, by full refits (methods.md: each fit uses the dyads where every matrix of
    that fit, fixed or relabelled, is finite; missing values move with their matrix).

    ``Y`` and ``Xs`` are full matrices (undirected data: symmetric, ``mask`` one triangle).
    "y": relabel Y; fit [1, X] on Y_pi over the dyads where Y_pi and every X are finite.
    "dsp": residualise x_j on Z = [1, other x] over the observed complete dyads (every
    matrix finite), E = x_j - Z g as a matrix (NaN where x_j or another x is missing),
    relabel E, fit y on [Z, E_pi] where all are finite; the E_pi term.
    "freedman-lane": g from y on Z over the observed complete dyads, fitted = Z g and
    R = Y - fitted as matrices, y* = fitted + R_pi, fit [1, X] on y* where all are finite.
    ``statistic`` "t" or "coef" (the coefficient in the data's own units).
    """
    Y = np.asarray(Y, dtype=np.float64)
    Xs = [np.asarray(X, dtype=np.float64) for X in Xs]
    k = len(Xs)
    finite_x = np.all([np.isfinite(X) for X in Xs], axis=0)
    complete = mask & finite_x & np.isfinite(Y)
    out = np.empty(k)
    if scheme == "y":
        Yp = relabel(Y, prow, pcol)
        use = mask & finite_x & np.isfinite(Yp)
        A = np.column_stack([np.ones(use.sum())] + [X[use] for X in Xs])
        for j in range(k):
            out[j] = ols_stat_or_nan(A, Yp[use], 1 + j, statistic)
        return out
    for j in range(k):
        others = [Xs[c] for c in range(k) if c != j]
        Z = np.column_stack([np.ones(complete.sum())] + [X[complete] for X in others])
        target = Xs[j] if scheme == "dsp" else Y
        g, *_ = np.linalg.lstsq(Z, target[complete], rcond=None)
        fitted = g[0] + sum((gc * X for gc, X in zip(g[1:], others)), np.zeros_like(Y))
        if scheme == "dsp":
            Ep = relabel(Xs[j] - fitted, prow, pcol)
            ok_others = np.all([np.isfinite(X) for X in others], axis=0) if others \
                else np.ones_like(mask)
            use = mask & np.isfinite(Ep) & np.isfinite(Y) & ok_others
            A = np.column_stack([np.ones(use.sum())] + [X[use] for X in others] + [Ep[use]])
            out[j] = ols_stat_or_nan(A, Y[use], A.shape[1] - 1, statistic)
        elif scheme == "freedman-lane":
            ystar = fitted + relabel(Y - fitted, prow, pcol)
            use = mask & np.isfinite(ystar) & finite_x
            A = np.column_stack([np.ones(use.sum())] + [X[use] for X in Xs])
            out[j] = ols_stat_or_nan(A, ystar[use], 1 + j, statistic)
        else:
            raise ValueError(f"scheme must be one of {SCHEMES}; got {scheme!r}")
    return out


def masked_null(Y, Xs, mask, scheme, statistic, relabellings):
    """(observed (k,), null (len(relabellings), k)) of ``masked_scheme_stat``."""
    n, m = np.shape(Y)
    obs = masked_scheme_stat(Y, Xs, mask, scheme, statistic, np.arange(n), np.arange(m))
    null = np.array([masked_scheme_stat(Y, Xs, mask, scheme, statistic, pr, pc)
                     for pr, pc in relabellings])
    return obs, null


# --- correlation oracle ------------------------------------------------------------------
def dyad_corr(A, B, method="pearson", directed=True, two_mode=False) -> float:
    """Pearson r over the dyad set; Spearman = Pearson of average ranks (methods.md)."""
    from scipy.stats import rankdata

    A = np.asarray(A, dtype=np.float64)
    n, m = A.shape
    rows, cols = dyads(n, m, directed, two_mode)
    a, b = vec(A, rows, cols), vec(B, rows, cols)
    if method == "spearman":
        a, b = rankdata(a), rankdata(b)
    elif method != "pearson":
        raise ValueError(f"method must be 'pearson' or 'spearman'; got {method!r}")
    a = a - a.mean()
    b = b - b.mean()
    return float(a @ b / np.sqrt((a @ a) * (b @ b)))


def exact_corr_null(A, B, method="pearson", directed=True, two_mode=False):
    """(observed r, null r over all relabellings of B)."""
    A = np.asarray(A, dtype=np.float64)
    n, m = A.shape
    obs = dyad_corr(A, B, method, directed, two_mode)
    null = np.array([dyad_corr(A, relabel(B, pr, pc), method, directed, two_mode)
                     for pr, pc in all_relabellings(n, m, two_mode)])
    return obs, null


# --- panels: several waves under one relabelling -----------------------------------------
def panel_scheme_stat(Ys, Xss, mask, scheme: str, statistic: str, perm,
                      wave_effects: bool = True) -> np.ndarray:
    """The k statistics of one relabelling ``perm`` of a panel, by full refits on the
    stacked dyads of every wave (each wave relabelled by the same ``perm``).

    ``Ys``: the response's T waves (n, n); ``Xss``: per predictor its T waves (a lagged
    predictor is given already shifted); ``mask``: the dyad set of one wave (n, n), the
    same at every wave. The design is [one indicator per wave, x's] (``wave_effects``) or
    [1, x's]; missing values (NaN) move with their matrix and each fit uses the dyads where
    every matrix of that fit is finite, as ``masked_scheme_stat`` does for one wave.
    "y": relabel every Y_t; "dsp": residualise x_j on Z = [wave indicators, other x] over
    the observed complete dyads, relabel each wave of E = x_j - Z g, fit y on [Z, E_pi];
    "freedman-lane": y* = Z g + relabel(Y - Z g) wave by wave, fit [Z, x_j] on y*.
    """
    T = len(Ys)
    k = len(Xss)
    Ys = [np.asarray(Y, dtype=np.float64) for Y in Ys]
    Xss = [[np.asarray(X, dtype=np.float64) for X in Xs] for Xs in Xss]
    perm = np.asarray(perm)

    def lead(use):
        if not wave_effects:
            return np.ones((sum(int(u.sum()) for u in use), 1))
        blocks = []
        for t, u in enumerate(use):
            d = np.zeros((int(u.sum()), T))
            d[:, t] = 1.0
            blocks.append(d)
        return np.concatenate(blocks, axis=0)

    def stack(mats, use):
        return np.concatenate([M[u] for M, u in zip(mats, use)])

    a = T if wave_effects else 1
    finite_x = [np.all([np.isfinite(Xs[t]) for Xs in Xss], axis=0) for t in range(T)]
    out = np.empty(k)
    if scheme == "y":
        Yp = [relabel(Y, perm, perm) for Y in Ys]
        use = [mask & finite_x[t] & np.isfinite(Yp[t]) for t in range(T)]
        A = np.column_stack([lead(use)] + [stack(Xs, use) for Xs in Xss])
        for j in range(k):
            out[j] = ols_stat_or_nan(A, stack(Yp, use), a + j, statistic)
        return out
    complete = [mask & finite_x[t] & np.isfinite(Ys[t]) for t in range(T)]
    for j in range(k):
        others = [Xss[c] for c in range(k) if c != j]
        Z = np.column_stack([lead(complete)] + [stack(Xs, complete) for Xs in others])
        target = Xss[j] if scheme == "dsp" else Ys
        g, *_ = np.linalg.lstsq(Z, stack(target, complete), rcond=None)
        fitted = []
        for t in range(T):
            f = np.full_like(Ys[t], g[t] if wave_effects else g[0])
            for gc, Xs in zip(g[a:], others):
                f = f + gc * Xs[t]
            fitted.append(f)
        ok_others = [np.all([np.isfinite(Xs[t]) for Xs in others], axis=0) if others
                     else np.ones_like(mask) for t in range(T)]
        if scheme == "dsp":
            Ep = [relabel(Xss[j][t] - fitted[t], perm, perm) for t in range(T)]
            use = [mask & np.isfinite(Ep[t]) & np.isfinite(Ys[t]) & ok_others[t]
                   for t in range(T)]
            A = np.column_stack([lead(use)] + [stack(Xs, use) for Xs in others]
                                + [stack(Ep, use)])
            out[j] = ols_stat_or_nan(A, stack(Ys, use), A.shape[1] - 1, statistic)
        elif scheme == "freedman-lane":
            ystar = [fitted[t] + relabel(Ys[t] - fitted[t], perm, perm) for t in range(T)]
            use = [mask & np.isfinite(ystar[t]) & finite_x[t] for t in range(T)]
            A = np.column_stack([lead(use)] + [stack(Xs, use) for Xs in Xss])
            out[j] = ols_stat_or_nan(A, stack(ystar, use), a + j, statistic)
        else:
            raise ValueError(f"scheme must be one of {SCHEMES}; got {scheme!r}")
    return out


def panel_exact_null(Ys, Xss, mask, scheme, statistic, wave_effects=True):
    """(observed (k,), null (n!, k)) of ``panel_scheme_stat`` over every relabelling."""
    n = np.shape(Ys[0])[0]
    obs = panel_scheme_stat(Ys, Xss, mask, scheme, statistic, np.arange(n), wave_effects)
    null = np.array([panel_scheme_stat(Ys, Xss, mask, scheme, statistic, p, wave_effects)
                     for p, _ in all_relabellings(n)])
    return obs, null


def panel_simulated_response(Ys, Xss, mask, j: int, perm, wave_effects: bool = True,
                             directed: bool = True, effect: float | None = None):
    """The null response of calibrate's simulation for term ``j`` of a panel, written
    from the text of methods (Freedman & Lane 1983 null model): the reduced model y on
    Z = [one indicator per wave (``wave_effects``) or 1, the other x's] fitted by lstsq on
    the stacked dyads of every wave (those in ``mask`` where y and every x are finite);
    y*_t = Z g at wave t + R_t relabelled, R_t = y_t - Z g (NaN off the fitted dyads),
    every wave relabelled by the same ``perm``: R_t'[a, b] = R_t[perm[a], perm[b]]. With
    ``effect`` e: y* + e sd(y) / sd(x_j) x_j, sds over the fitted dyads of every wave.

    ``Ys``: the response's T waves (n, n); ``Xss``: per predictor its T waves (a lagged
    predictor given already shifted); ``mask``: the dyad set of one wave (for undirected
    data i < j; the result is then mirrored). Returns (T, n, n), NaN off the dyad set.
    """
    T = len(Ys)
    k = len(Xss)
    Ys = [np.asarray(Y, dtype=np.float64) for Y in Ys]
    Xss = [[np.asarray(X, dtype=np.float64) for X in Xs] for Xs in Xss]
    use = [mask & np.isfinite(Ys[t]) & np.all([np.isfinite(Xs[t]) for Xs in Xss], axis=0)
           for t in range(T)]
    others = [c for c in range(k) if c != j]
    lead = []
    for t in range(T):
        d = np.zeros((int(use[t].sum()), T if wave_effects else 1))
        d[:, t if wave_effects else 0] = 1.0
        lead.append(d)
    Z = np.column_stack([np.concatenate(lead)]
                        + [np.concatenate([Xss[c][t][use[t]] for t in range(T)])
                           for c in others])
    y = np.concatenate([Ys[t][use[t]] for t in range(T)])
    g, *_ = np.linalg.lstsq(Z, y, rcond=None)
    a = T if wave_effects else 1
    out = np.empty((T,) + Ys[0].shape)
    for t in range(T):
        fitted = np.full_like(Ys[t], g[t] if wave_effects else g[0])
        for gc, c in zip(g[a:], others):
            fitted = fitted + gc * Xss[c][t]
        R = np.where(use[t], Ys[t] - fitted, np.nan)
        if not directed:
            R = np.where(use[t], R, R.T)  # the pair's value in both cells
        ystar = fitted + relabel(R, perm, perm)
        if effect is not None:
            xs = np.concatenate([Xss[j][s][use[s]] for s in range(T)])
            ystar = ystar + effect * np.std(y) / np.std(xs) * Xss[j][t]
        ystar = np.where(mask, ystar, np.nan)
        if not directed:
            ystar = np.where(mask, ystar, ystar.T)
        out[t] = ystar
    return out
