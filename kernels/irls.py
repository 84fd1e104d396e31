"""Logistic regression by Newton's method (IRLS) over dyad vectors, and per-relabelling drivers.

A logistic fit reads a design ``X`` (N, P) of dyad values, a subset ``cols`` of its columns,
a 0/1 response ``y`` (N,) and a row filter ``valid`` (N,): the dyads of the fit. Newton's
method for the canonical (logit) link is iteratively reweighted least squares
(McCullagh & Nelder 1989, Generalized Linear Models, 2nd ed., section 2.5 [memory]):

    eta = X b,  mu = 1 / (1 + exp(-eta)),  w = mu (1 - mu)
    g = X'(y - mu),  H = X'WX,  b <- b + H^-1 g.

A step that raises the deviance 2 sum[log(1 + e^eta) - y eta] is halved (common practice).
The fit has converged when no coefficient moves by more than ``tol`` * (1 + |b_c|); under
separation (Albert & Anderson 1984, Biometrika 71:1-10) the coefficients diverge, the steps
stay near a constant size and the fit is reported as failed, never as converged.

The drivers loop over the relabellings of one chunk: they gather the relabelled layer into
a preallocated dyad vector (``value = layer[row_perm[rows[d]], col_perm[cols[d]]]``; no
n x n array is built), refit or take a score statistic, and write one row of statistics
per relabelling. Every relabelling starts from the same warm start, so a statistic depends
only on its relabelling, never on the chunk it was computed in.
"""

import numpy as np
from numba import njit

from .options import KERNEL_OPTIONS

# Return codes of ``irls_logistic`` (a converged fit returns its iteration count >= 1).
FAIL_ITERATIONS = -1  # no convergence in max_iter steps (divergence: separation)
FAIL_SINGULAR = -2  # the weighted information X'WX is singular
FAIL_STEP = -3  # no step length lowers the deviance
FAIL_DYADS = -4  # no more valid dyads than coefficients

# A Cholesky pivot this small relative to its diagonal entry marks a singular information.
SINGULAR_PIVOT = 1e-12
# Halvings of a Newton step tried while the deviance rises.
MAX_HALVINGS = 30
# A rise of the deviance below this relative size is rounding, not a worse fit.
DEVIANCE_SLACK = 1e-12


@njit(**KERNEL_OPTIONS)
def _logit_parts(eta):
    """(mu, w, log(1 + e^eta)) of a linear predictor, without overflow."""
    t = np.exp(-abs(eta))
    inv = 1.0 / (1.0 + t)
    mu = inv if eta >= 0.0 else t * inv
    # w = mu (1 - mu) = t / (1 + t)^2
    return mu, t * inv * inv, max(eta, 0.0) + np.log1p(t)


@njit(**KERNEL_OPTIONS)
def _newton_pass(X, cols, y, valid, beta, xrow, H, g):
    """Deviance at ``beta``; writes H = X'WX and g = X'(y - mu) over the valid rows."""
    q = cols.shape[0]
    for r in range(q):
        g[r] = 0.0
        for c in range(q):
            H[r, c] = 0.0
    dev = 0.0
    for d in range(X.shape[0]):
        if not valid[d]:
            continue
        eta = 0.0
        for c in range(q):
            xrow[c] = X[d, cols[c]]
            eta += xrow[c] * beta[c]
        mu, w, log1pe = _logit_parts(eta)
        # deviance of a 0/1 response: 2 [log(1 + e^eta) - y eta]
        dev += 2.0 * (log1pe - y[d] * eta)
        res = y[d] - mu
        for r in range(q):
            g[r] += xrow[r] * res
            wx = w * xrow[r]
            for c in range(r + 1):
                H[r, c] += wx * xrow[c]
    for r in range(q):
        for c in range(r + 1, q):
            H[r, c] = H[c, r]
    return dev


@njit(**KERNEL_OPTIONS)
def _cholesky(H, L):
    """Lower Cholesky factor L of H (q, q); False when a pivot is not clearly positive."""
    q = H.shape[0]
    for c in range(q):
        s = H[c, c]
        for e in range(c):
            s -= L[c, e] * L[c, e]
        if not (s > SINGULAR_PIVOT * H[c, c]) or not (s > 0.0):
            return False
        L[c, c] = np.sqrt(s)
        for r in range(c + 1, q):
            s2 = H[r, c]
            for e in range(c):
                s2 -= L[r, e] * L[c, e]
            L[r, c] = s2 / L[c, c]
    return True


@njit(**KERNEL_OPTIONS)
def _cholesky_solve(L, b, out):
    """out = (L L')^-1 b."""
    q = L.shape[0]
    for r in range(q):
        s = b[r]
        for e in range(r):
            s -= L[r, e] * out[e]
        out[r] = s / L[r, r]
    for r in range(q - 1, -1, -1):
        s = out[r]
        for e in range(r + 1, q):
            s -= L[e, r] * out[e]
        out[r] = s / L[r, r]


@njit(**KERNEL_OPTIONS)
def _cholesky_inverse(L, col, out):
    """out = (L L')^-1, column by column (``col`` is a q-vector of scratch)."""
    q = L.shape[0]
    for c in range(q):
        for r in range(q):
            col[r] = 1.0 if r == c else 0.0
        _cholesky_solve(L, col, col)
        for r in range(q):
            out[r, c] = col[r]


@njit(**KERNEL_OPTIONS)
def irls_logistic(X, cols, y, valid, beta0, work, beta_out, cov_out, max_iter, tol):
    """Maximum-likelihood logistic regression by Newton's method (IRLS).

    Parameters
    ----------
    X : float64 (N, P)
        Dyad values of the candidate design columns.
    cols : int64 (q,)
        Columns of ``X`` in the model, in coefficient order.
    y : float64 (N,)
        0/1 response (read only where ``valid``).
    valid : bool (N,)
        The dyads of this fit.
    beta0 : float64 (q,)
        Starting coefficients (warm start).
    work : float64 (2q + 5, q)
        Workspace, overwritten.
    beta_out : float64 (q,)
        Written: the estimate (when converged).
    cov_out : float64 (q, q)
        Written: (X'WX)^-1 at the estimate, the Wald covariance (when converged).
    max_iter : int
        Newton steps allowed.
    tol : float
        Converged when every |step_c| <= tol * (1 + |b_c|).

    Returns
    -------
    int
        Newton steps taken (>= 1) when converged, else a negative FAIL_* code.
    """
    q = cols.shape[0]
    H = work[0:q]
    L = work[q:2 * q]
    beta = work[2 * q]
    trial = work[2 * q + 1]
    g = work[2 * q + 2]
    step = work[2 * q + 3]
    xrow = work[2 * q + 4]
    n_valid = 0
    for d in range(X.shape[0]):
        if valid[d]:
            n_valid += 1
    if n_valid <= q:
        return FAIL_DYADS
    for c in range(q):
        beta[c] = beta0[c]
    dev = _newton_pass(X, cols, y, valid, beta, xrow, H, g)
    for it in range(1, max_iter + 1):
        if not _cholesky(H, L):
            return FAIL_SINGULAR
        # Newton step: step = H^-1 g
        _cholesky_solve(L, g, step)
        scale = 1.0
        accepted = False
        for _ in range(MAX_HALVINGS + 1):
            for c in range(q):
                trial[c] = beta[c] + scale * step[c]
            dev_new = _newton_pass(X, cols, y, valid, trial, xrow, H, g)
            if dev_new <= dev + DEVIANCE_SLACK * (abs(dev) + 1.0):
                accepted = True
                break
            scale *= 0.5
        if not accepted:
            return FAIL_STEP
        done = True
        for c in range(q):
            if abs(scale * step[c]) > tol * (1.0 + abs(trial[c])):
                done = False
            beta[c] = trial[c]
        dev = dev_new
        if done:
            # H was accumulated at the accepted coefficients: the Wald covariance
            if not _cholesky(H, L):
                return FAIL_SINGULAR
            _cholesky_inverse(L, xrow, cov_out)
            for c in range(q):
                beta_out[c] = beta[c]
            return it
    return FAIL_ITERATIONS


@njit(**KERNEL_OPTIONS)
def score_logistic(X, zcols, xcol, y, valid, gamma, cinv, work):
    """Signed score statistic of column ``xcol`` added to a fitted reduced model.

    With the reduced fit mu = expit(Z gamma), W = diag(mu (1 - mu)) over the valid rows
    (Rao 1948, Proc. Camb. Philos. Soc. 44:50-57):
    U = x'(y - mu), I = x'Wx - (Z'Wx)' (Z'WZ)^-1 (Z'Wx), statistic U / sqrt(I).

    Parameters
    ----------
    X : float64 (N, P); zcols : int64 (q,) reduced-model columns; xcol : int the tested
        column; y : float64 (N,); valid : bool (N,)
    gamma : float64 (q,)
        Reduced-model estimate.
    cinv : float64 (q, q)
        (Z'WZ)^-1 at ``gamma``.
    work : float64 (2, q)
        Workspace, overwritten.

    Returns
    -------
    float
        U / sqrt(I); NaN when I is not clearly positive (x in the span of Z).
    """
    q = zcols.shape[0]
    a = work[0]
    zrow = work[1]
    for c in range(q):
        a[c] = 0.0
    u = 0.0
    qx = 0.0
    for d in range(X.shape[0]):
        if not valid[d]:
            continue
        eta = 0.0
        for c in range(q):
            zrow[c] = X[d, zcols[c]]
            eta += zrow[c] * gamma[c]
        mu, w, _ = _logit_parts(eta)
        x = X[d, xcol]
        u += x * (y[d] - mu)
        wx = w * x
        qx += wx * x
        for c in range(q):
            a[c] += wx * zrow[c]
    return _signed_score(u, qx, a, cinv)


@njit(**KERNEL_OPTIONS)
def _signed_score(u, qx, a, cinv):
    """U / sqrt(qx - a' cinv a), NaN when the efficient information is not positive."""
    q = a.shape[0]
    quad = 0.0
    for r in range(q):
        s = 0.0
        for c in range(q):
            s += cinv[r, c] * a[c]
        quad += a[r] * s
    info = qx - quad
    if not (info > SINGULAR_PIVOT * qx) or not (info > 0.0):
        return np.nan
    return u / np.sqrt(info)


@njit(**KERNEL_OPTIONS)
def refit_y(layer, rows, cols, row_perms, col_perms, X, fixed_ok, beta0, out, max_iter, tol,
            use_z):
    """Y-permutation refits: relabel the response, refit the full model.

    Parameters
    ----------
    layer : float64 (n, m)
        The response network (NaN: missing or off the dyad set).
    rows, cols : int64 (N,)
        The dyad set: dyad d is (rows[d], cols[d]).
    row_perms : int64 (B, n); col_perms : int64 (B, m)
        The relabellings.
    X : float64 (N, p)
        Fixed design [1, x_1 .. x_k] on the dyads.
    fixed_ok : bool (N,)
        Dyads where every column of ``X`` is finite.
    beta0 : float64 (p,)
        Warm start.
    out : float64 (B, p - 1)
        Written: Wald z (``use_z``) or coefficient of each predictor; NaN for a failed fit.
    max_iter, tol : see ``irls_logistic``.
    """
    n_dyads, p = X.shape
    design = np.arange(p)
    ybuf = np.empty(n_dyads)
    valid = np.empty(n_dyads, dtype=np.bool_)
    work = np.empty((2 * p + 5, p))
    beta = np.empty(p)
    cov = np.empty((p, p))
    for b in range(row_perms.shape[0]):
        rp = row_perms[b]
        cp = col_perms[b]
        for d in range(n_dyads):
            v = layer[rp[rows[d]], cp[cols[d]]]  # y_pi[d] = Y[pi(i), pi(j)]
            ybuf[d] = v
            valid[d] = fixed_ok[d] and not np.isnan(v)
        status = irls_logistic(X, design, ybuf, valid, beta0, work, beta, cov, max_iter, tol)
        for j in range(1, p):
            if status < 0:
                out[b, j - 1] = np.nan
            elif use_z:
                out[b, j - 1] = beta[j] / np.sqrt(cov[j, j])
            else:
                out[b, j - 1] = beta[j]


@njit(**KERNEL_OPTIONS)
def refit_dsp(resid, rows, cols, row_perms, col_perms, X, y, fixed_ok, design, beta0, out,
              max_iter, tol, use_z):
    """DSP refits (Potter 2005): relabel the focal predictor's residual, refit.

    Parameters
    ----------
    resid : float64 (n, m, K)
        Residual matrix of each tested predictor on the other terms (NaN: missing).
    rows, cols, row_perms, col_perms : as in ``refit_y``.
    X : float64 (N, p)
        Fixed design [1, x_1 .. x_k]; the relabelled residual becomes column p.
    y : float64 (N,)
        The response.
    fixed_ok : bool (K, N)
        Dyads where y and the other terms of tested term a are finite.
    design : int64 (K, p)
        Columns of term a's fit: the other terms, then p (the relabelled residual).
    beta0 : float64 (K, p)
        Warm start of each term's fit.
    out : float64 (B, K)
        Written: Wald z (``use_z``) or coefficient of the relabelled residual; NaN for a
        failed fit.
    """
    n_dyads, p = X.shape
    n_terms = resid.shape[2]
    xbuf = np.empty((n_dyads, p + 1))
    for d in range(n_dyads):
        for c in range(p):
            xbuf[d, c] = X[d, c]
    valid = np.empty(n_dyads, dtype=np.bool_)
    work = np.empty((2 * p + 5, p))
    beta = np.empty(p)
    cov = np.empty((p, p))
    for b in range(row_perms.shape[0]):
        rp = row_perms[b]
        cp = col_perms[b]
        for a in range(n_terms):
            for d in range(n_dyads):
                v = resid[rp[rows[d]], cp[cols[d]], a]  # e_pi[d] = E[pi(i), pi(j)]
                xbuf[d, p] = v
                valid[d] = fixed_ok[a, d] and not np.isnan(v)
            status = irls_logistic(xbuf, design[a], y, valid, beta0[a], work, beta, cov,
                                   max_iter, tol)
            if status < 0:
                out[b, a] = np.nan
            elif use_z:
                out[b, a] = beta[p - 1] / np.sqrt(cov[p - 1, p - 1])
            else:
                out[b, a] = beta[p - 1]


@njit(**KERNEL_OPTIONS)
def score_dsp_fixed(resid, rows, cols, row_perms, col_perms, X, zcols, fit_resid, fit_weight,
                    cinv, out):
    """DSP score statistics on complete data: dot products only.

    The reduced model of term a (y on its other terms Z_a) does not involve the relabelled
    residual e_pi, so its fit is fixed: r = y - mu, w = mu (1 - mu), C^-1 = (Z'WZ)^-1.
    Per relabelling: U = e_pi'r, Q = sum w e_pi^2, s = Z'W e_pi, statistic
    U / sqrt(Q - s'C^-1 s) (Rao 1948).

    Parameters
    ----------
    resid : float64 (n, m, K)
        Residual matrices (no NaN on the dyad set).
    rows, cols, row_perms, col_perms : as in ``refit_y``.
    X : float64 (N, p)
        Fixed design [1, x_1 .. x_k].
    zcols : int64 (K, p - 1)
        Columns of ``X`` in term a's reduced model.
    fit_resid, fit_weight : float64 (N, K)
        y - mu and mu (1 - mu) of each reduced fit.
    cinv : float64 (K, p - 1, p - 1)
        (Z_a'W_a Z_a)^-1 of each reduced fit.
    out : float64 (B, K)
        Written: the signed score statistics.
    """
    n_dyads, p = X.shape
    n_terms = resid.shape[2]
    q = p - 1
    acc = np.empty((n_terms, q + 2))
    for b in range(row_perms.shape[0]):
        rp = row_perms[b]
        cp = col_perms[b]
        acc[:, :] = 0.0
        for d in range(n_dyads):
            pi = rp[rows[d]]
            pj = cp[cols[d]]
            for a in range(n_terms):
                e = resid[pi, pj, a]
                acc[a, 0] += e * fit_resid[d, a]  # U += e_pi r
                we = fit_weight[d, a] * e
                acc[a, 1] += we * e  # Q += w e_pi^2
                for c in range(q):
                    acc[a, 2 + c] += we * X[d, zcols[a, c]]  # s += Z'W e_pi
        for a in range(n_terms):
            out[b, a] = _signed_score(acc[a, 0], acc[a, 1], acc[a, 2:], cinv[a])


@njit(**KERNEL_OPTIONS)
def score_dsp_refit(resid, rows, cols, row_perms, col_perms, X, y, fixed_ok, zcols, gamma0,
                    out, max_iter, tol):
    """DSP score statistics with missing dyads: the reduced model is refitted on each
    relabelling's dyad set (where y, Z_a and e_pi are finite), then scored.

    Parameters as in ``refit_dsp``; ``zcols`` (K, p - 1) the reduced-model columns,
    ``gamma0`` (K, p - 1) their warm start; ``out`` (B, K) written (NaN: failed fit).
    """
    n_dyads, p = X.shape
    n_terms = resid.shape[2]
    q = p - 1
    xbuf = np.empty((n_dyads, p + 1))
    for d in range(n_dyads):
        for c in range(p):
            xbuf[d, c] = X[d, c]
    valid = np.empty(n_dyads, dtype=np.bool_)
    work = np.empty((2 * q + 5, q))
    gamma = np.empty(q)
    cinv = np.empty((q, q))
    for b in range(row_perms.shape[0]):
        rp = row_perms[b]
        cp = col_perms[b]
        for a in range(n_terms):
            for d in range(n_dyads):
                v = resid[rp[rows[d]], cp[cols[d]], a]
                xbuf[d, p] = v
                valid[d] = fixed_ok[a, d] and not np.isnan(v)
            status = irls_logistic(xbuf, zcols[a], y, valid, gamma0[a], work, gamma, cinv,
                                   max_iter, tol)
            if status < 0:
                out[b, a] = np.nan
            else:
                out[b, a] = score_logistic(xbuf, zcols[a], p, y, valid, gamma, cinv, work)


@njit(**KERNEL_OPTIONS)
def score_y(layer, rows, cols, row_perms, col_perms, X, fixed_ok, zcols, gamma0, suff0,
            fixed_score, complete, out, max_iter, tol):
    """Y-permutation score statistics.

    The reduced model of term a (y_pi on Z_a) is refitted per relabelling, except when its
    sufficient statistic Z_a'y_pi equals the observed Z_a'y: the canonical link makes the
    fit a function of Z_a'y_pi alone, so the observed reduced fit is reused and the
    statistic is (x_a'y_pi - x_a'mu) / sqrt(I) with x_a'mu and I fixed. This always holds
    for an intercept-only reduced model on complete data (sum y_pi = sum y).

    Parameters
    ----------
    layer, rows, cols, row_perms, col_perms, X, fixed_ok : as in ``refit_y``.
    zcols : int64 (K, p - 1)
        Columns of term a's reduced model; term a's own column is a + 1.
    gamma0 : float64 (K, p - 1)
        Observed reduced fits (warm starts).
    suff0 : float64 (K, p - 1)
        Observed Z_a'y.
    fixed_score : float64 (K, 2)
        Observed x_a'mu and efficient information I of each reduced fit.
    complete : bool
        No dyad is missing (the reuse above is valid only then).
    out : float64 (B, K)
        Written: the signed score statistics (NaN: failed reduced fit).
    """
    n_dyads, p = X.shape
    n_terms = zcols.shape[0]
    q = p - 1
    ybuf = np.empty(n_dyads)
    valid = np.empty(n_dyads, dtype=np.bool_)
    suff = np.empty(p)
    work = np.empty((2 * q + 5, q))
    gamma = np.empty(q)
    cinv = np.empty((q, q))
    for b in range(row_perms.shape[0]):
        rp = row_perms[b]
        cp = col_perms[b]
        suff[:] = 0.0
        for d in range(n_dyads):
            v = layer[rp[rows[d]], cp[cols[d]]]
            ybuf[d] = v
            ok = fixed_ok[d] and not np.isnan(v)
            valid[d] = ok
            if ok:
                for c in range(p):
                    suff[c] += X[d, c] * v  # X'y_pi
        for a in range(n_terms):
            reuse = complete
            for c in range(q):
                if suff[zcols[a, c]] != suff0[a, c]:
                    reuse = False
            if reuse:
                # U = x_a'(y_pi - mu) with the observed reduced fit
                out[b, a] = (suff[a + 1] - fixed_score[a, 0]) / np.sqrt(fixed_score[a, 1])
                continue
            status = irls_logistic(X, zcols[a], ybuf, valid, gamma0[a], work, gamma, cinv,
                                   max_iter, tol)
            if status < 0:
                out[b, a] = np.nan
            else:
                out[b, a] = score_logistic(X, zcols[a], a + 1, ybuf, valid, gamma, cinv, work)
