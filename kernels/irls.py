"""Logistic regression by Newton's method (IRLS) over dyad vectors, and per-relabelling drivers.

A logistic fit reads a design ``X`` (N, P) of dyad values, a subset ``cols`` of its columns,
a 0/1 response ``y`` (N,) and a row filter ``valid`` (N,): the dyads of the fit. Newton's
method for the canonical (logit) link is iteratively reweighted least squares
(McCullagh & Nelder 1989, Generalized Linear Models, 2nd ed., section 2.5 [memory]):

    eta = X b,  mu = 1 / (1 + exp(-eta)),  w = mu (1 - mu)
    g = X'(y - mu),  H = X'WX,  b <- b + H^-1 g.

A step that raises the deviance 2 sum[log(1 + e^eta) - y eta] is halved (common practice).
The fit has converged when the next Newton step would move no coefficient by more than
``tol`` * (1 + |b_c|); under separation (Albert & Anderson 1984, Biometrika 71:1-10) the
coefficients diverge, the steps stay near a constant size and the fit is reported as
failed, never as converged. Each Newton step costs one pass over the dyads (the
deviance, gradient and information at the new coefficients), plus one per halving.

The drivers loop over the relabellings of one chunk: they gather the relabelled layer into
a preallocated dyad vector (``value = layer[row_perm[rows[d]], col_perm[cols[d]]]``; no
n x n array is built), refit or take a score statistic, and write one row of statistics
per relabelling. Every relabelling starts from the same warm start, so a statistic depends
only on its relabelling, never on the chunk it was computed in.
"""

import numpy as np
from numba import njit

from .gather import prefetch
from .options import FIT_PIVOT_SQUARED, KERNEL_OPTIONS

# Return codes of ``irls_logistic`` (a converged fit returns its iteration count >= 1).
FAIL_ITERATIONS = -1  # no convergence in max_iter steps (divergence: separation)
FAIL_SINGULAR = -2  # the weighted information X'WX is singular
FAIL_STEP = -3  # no step length lowers the deviance
FAIL_DYADS = -4  # no more valid dyads than coefficients

# Permutations that share one pass over the fixed rows in ``score_rows``.
SCORE_BLOCK = 8
# Bytes of one cache line, the unit of prefetching.
CACHE_LINE = 64

# A Cholesky pivot^2 at most this fraction of its diagonal entry marks a singular information:
# the one rule of whether a fit is possible (``kernels.options``).
SINGULAR_PIVOT = FIT_PIVOT_SQUARED
# Halvings of a Newton step tried while the deviance rises.
MAX_HALVINGS = 30
# A rise of the deviance below this relative size is rounding, not a worse fit.
DEVIANCE_SLACK = 1e-12


@njit(**KERNEL_OPTIONS)
def _logit_parts(eta):
    """(mu, w, log(1 + e^eta)) of a linear predictor, without overflow.

    With t = exp(-|eta|) in (0, 1]: log(1 + e^eta) = max(eta, 0) + log(1 + t). ``log(1 + t)``
    rather than ``log1p(t)`` (a third of the cost): its absolute error, about 1e-16 per
    dyad, is far below what the deviance is used for (the step-halving test).
    """
    t = np.exp(-abs(eta))
    one_t = 1.0 + t
    inv = 1.0 / one_t
    mu = inv if eta >= 0.0 else t * inv
    # w = mu (1 - mu) = t / (1 + t)^2
    return mu, t * inv * inv, max(eta, 0.0) + np.log(one_t)


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
            g[r] += xrow[r] * res  # g = X'(y - mu)
            wx = w * xrow[r]
            for c in range(r + 1):
                H[r, c] += wx * xrow[c]  # H = X'WX
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
        Converged when the next Newton step has every |step_c| <= tol * (1 + |b_c|); that
        last step is taken without another pass over the dyads.

    Returns
    -------
    int
        Newton steps taken (>= 1, the last tiny one included) when converged, else a
        negative FAIL_* code.
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
        small = True
        for c in range(q):
            if abs(step[c]) > tol * (1.0 + abs(beta[c])):
                small = False
        if small:
            # converged: take the last, tiny step without another pass over the dyads;
            # the Wald covariance is H^-1 at the coefficients the step started from (it
            # moves by a relative amount of the order of ``tol``)
            _cholesky_inverse(L, xrow, cov_out)
            for c in range(q):
                beta_out[c] = beta[c] + step[c]
            return it
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
        for c in range(q):
            beta[c] = trial[c]
        dev = dev_new
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
def refit_y(layer, rows, cols, row_perms, col_perms, X, fixed_ok, beta0, onestep, out, max_iter,
            tol, use_z):
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
        Warm start: the fit of the intercept alone, (logit(mean y), 0, ..).
    onestep : float64 (p, p + 1), or (0, p + 1) when some dyad is missing
        [(w0 X'X)^-1 | mean(y) X'1] with w0 = mean(y)(1 - mean(y)). At ``beta0`` every
        fitted probability is mean(y), so the first Newton step needs only X'y_pi, summed
        while the relabelled response is gathered: beta0 + (w0 X'X)^-1 (X'y_pi - mean(y) X'1)
        is where the refit starts.
    out : float64 (B, p - 1)
        Written: Wald z (``use_z``) or coefficient of each predictor; NaN for a failed fit.
    max_iter, tol : see ``irls_logistic``.
    """
    n_dyads, p = X.shape
    first_step = onestep.shape[0] == p
    design = np.arange(p)
    ybuf = np.empty(n_dyads)
    valid = np.empty(n_dyads, dtype=np.bool_)
    work = np.empty((2 * p + 5, p))
    beta = np.empty(p)
    cov = np.empty((p, p))
    suff = np.empty(p)
    start = np.empty(p)
    for b in range(row_perms.shape[0]):
        rp = row_perms[b]
        cp = col_perms[b]
        suff[:] = 0.0
        for d in range(n_dyads):
            v = layer[rp[rows[d]], cp[cols[d]]]  # y_pi[d] = Y[pi(i), pi(j)]
            ybuf[d] = v
            valid[d] = fixed_ok[d] and not np.isnan(v)
            if first_step:
                for c in range(p):
                    suff[c] += X[d, c] * v  # X'y_pi
        for c in range(p):
            start[c] = beta0[c]
            if first_step:
                for e in range(p):
                    start[c] += onestep[c, e] * (suff[e] - onestep[e, p])
        status = irls_logistic(X, design, ybuf, valid, start, work, beta, cov, max_iter, tol)
        for j in range(1, p):
            if status < 0:
                out[b, j - 1] = np.nan
            elif use_z:
                out[b, j - 1] = beta[j] / np.sqrt(cov[j, j])
            else:
                out[b, j - 1] = beta[j]


@njit(**KERNEL_OPTIONS)
def refit_dsp(resid, rows, cols, row_perms, col_perms, X, y, fixed_ok, design, beta0, reduced,
              cinv, out, max_iter, tol, use_z):
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
        Columns of term a's fit: the other terms Z_a, then p (the relabelled residual).
    beta0 : float64 (K, p)
        Warm start of each term's fit: its observed reduced fit, and 0 for the residual.
    reduced : float64 (N, 2K), or (0, 2K) when some dyad is missing
        y - mu_a and w_a = mu_a (1 - mu_a) of each observed reduced fit. At ``beta0`` the
        gradient is (0, U) and the information [[Z'WZ, S], [S', Q]] with U = e_pi'(y - mu),
        S = Z'W e_pi, Q = sum w e_pi^2 (summed while e_pi is gathered), so the first Newton
        step is free: d_e = U / (Q - S'(Z'WZ)^-1 S), d_z = -(Z'WZ)^-1 S d_e.
    cinv : float64 (K, p - 1, p - 1)
        (Z_a'W_a Z_a)^-1 of each observed reduced fit (used with ``reduced``).
    out : float64 (B, K)
        Written: Wald z (``use_z``) or coefficient of the relabelled residual; NaN for a
        failed fit.
    """
    n_dyads, p = X.shape
    n_terms = resid.shape[2]
    q = p - 1
    first_step = reduced.shape[0] == n_dyads
    xbuf = np.empty((n_dyads, p + 1))
    for d in range(n_dyads):
        for c in range(p):
            xbuf[d, c] = X[d, c]
    valid = np.empty(n_dyads, dtype=np.bool_)
    work = np.empty((2 * p + 5, p))
    beta = np.empty(p)
    cov = np.empty((p, p))
    sums = np.empty(q)
    start = np.empty(p)
    for b in range(row_perms.shape[0]):
        rp = row_perms[b]
        cp = col_perms[b]
        for a in range(n_terms):
            u = 0.0
            qq = 0.0
            sums[:] = 0.0
            for d in range(n_dyads):
                v = resid[rp[rows[d]], cp[cols[d]], a]  # e_pi[d] = E[pi(i), pi(j)]
                xbuf[d, p] = v
                valid[d] = fixed_ok[a, d] and not np.isnan(v)
                if first_step:
                    u += v * reduced[d, a]  # U = e_pi'(y - mu)
                    wv = reduced[d, n_terms + a] * v
                    qq += wv * v  # Q = sum w e_pi^2
                    for c in range(q):
                        sums[c] += wv * X[d, design[a, c]]  # S = Z'W e_pi
            for c in range(p):
                start[c] = beta0[a, c]
            if first_step:
                info = qq
                for r in range(q):
                    for c in range(q):
                        info -= sums[r] * cinv[a, r, c] * sums[c]
                if info > 0.0:
                    step_e = u / info
                    start[q] += step_e
                    for r in range(q):
                        for c in range(q):
                            start[r] -= cinv[a, r, c] * sums[c] * step_e
            status = irls_logistic(xbuf, design[a], y, valid, start, work, beta, cov,
                                   max_iter, tol)
            if status < 0:
                out[b, a] = np.nan
            elif use_z:
                out[b, a] = beta[p - 1] / np.sqrt(cov[p - 1, p - 1])
            else:
                out[b, a] = beta[p - 1]


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
def score_y(layer, rows, cols, row_perms, col_perms, X, fixed_ok, zcols, gamma0, out,
            max_iter, tol):
    """Y-permutation score statistics: the reduced model of term a (y_pi on Z_a) is
    refitted on each relabelling (warm-started at ``gamma0[a]``), then scored.

    Parameters
    ----------
    layer, rows, cols, row_perms, col_perms, X, fixed_ok : as in ``refit_y``.
    zcols : int64 (K, p - 1)
        Columns of term a's reduced model; term a's own column is a + 1.
    gamma0 : float64 (K, p - 1)
        Warm starts (the observed reduced fits).
    out : float64 (B, K)
        Written: the signed score statistics (NaN: failed reduced fit).
    max_iter, tol : see ``irls_logistic``.
    """
    n_dyads, p = X.shape
    n_terms = zcols.shape[0]
    q = p - 1
    ybuf = np.empty(n_dyads)
    valid = np.empty(n_dyads, dtype=np.bool_)
    work = np.empty((2 * q + 5, q))
    gamma = np.empty(q)
    cinv = np.empty((q, q))
    for b in range(row_perms.shape[0]):
        rp = row_perms[b]
        cp = col_perms[b]
        for d in range(n_dyads):
            v = layer[rp[rows[d]], cp[cols[d]]]  # y_pi[d] = Y[pi(i), pi(j)]
            ybuf[d] = v
            valid[d] = fixed_ok[d] and not np.isnan(v)
        for a in range(n_terms):
            status = irls_logistic(X, zcols[a], ybuf, valid, gamma0[a], work, gamma, cinv,
                                   max_iter, tol)
            if status < 0:
                out[b, a] = np.nan
            else:
                out[b, a] = score_logistic(X, zcols[a], a + 1, ybuf, valid, gamma, cinv, work)


@njit(**KERNEL_OPTIONS)
def score_from_sums(sums, cinv, out):
    """Signed score statistics from the sums of ``score_rows``.

    Parameters
    ----------
    sums : float64 (B, K, q + 2)
        [U, Q, S_0 .. S_(q-1)] of each relabelling and term.
    cinv : float64 (K, q, q)
        (Z'WZ)^-1 of each term's reduced fit (columns: intercept, then the others).
    out : float64 (B, K)
        Written: U / sqrt(Q - S'(Z'WZ)^-1 S) (Rao 1948), NaN when not positive.
    """
    for b in range(sums.shape[0]):
        for a in range(sums.shape[1]):
            out[b, a] = _signed_score(sums[b, a, 0], sums[b, a, 1], sums[b, a, 2:], cinv[a])


@njit(inline="always", **KERNEL_OPTIONS)
def _row_main(relf, rb, co, fixf, rf, wf, xf0, xf1, n_x, js, je):
    """Over one row: U = sum e r, Q = sum w e^2, S0 = sum w e and, for the first
    ``n_x`` (0, 1 or 2) fixed columns at xf0, xf1, S_c = sum w e x_c.

    Each sum runs in two partial sums, over the columns at even and at odd offsets from
    ``js`` (in increasing order), added at the end: two chains of additions in flight.
    One loop per ``n_x`` keeps branches out of the loop body.
    """
    u = 0.0
    q = 0.0
    s = 0.0
    s0 = 0.0
    s1 = 0.0
    u2 = 0.0
    q2 = 0.0
    t2 = 0.0
    s02 = 0.0
    s12 = 0.0
    j = js
    if n_x == 0:
        while j + 1 < je:
            e = relf[np.uint64(rb + co[j])]
            f = relf[np.uint64(rb + co[j + 1])]
            u += e * fixf[np.uint64(rf + j)]  # U += e_pi r
            u2 += f * fixf[np.uint64(rf + j + 1)]
            we = fixf[np.uint64(wf + j)] * e
            wf_ = fixf[np.uint64(wf + j + 1)] * f
            s += we  # S0 += w e_pi
            t2 += wf_
            q += we * e  # Q += w e_pi^2
            q2 += wf_ * f
            j += 2
    elif n_x == 1:
        while j + 1 < je:
            e = relf[np.uint64(rb + co[j])]
            f = relf[np.uint64(rb + co[j + 1])]
            u += e * fixf[np.uint64(rf + j)]
            u2 += f * fixf[np.uint64(rf + j + 1)]
            we = fixf[np.uint64(wf + j)] * e
            wf_ = fixf[np.uint64(wf + j + 1)] * f
            s += we
            t2 += wf_
            q += we * e
            q2 += wf_ * f
            s0 += we * fixf[np.uint64(xf0 + j)]  # S_c += w e_pi x_c
            s02 += wf_ * fixf[np.uint64(xf0 + j + 1)]
            j += 2
    else:
        while j + 1 < je:
            e = relf[np.uint64(rb + co[j])]
            f = relf[np.uint64(rb + co[j + 1])]
            u += e * fixf[np.uint64(rf + j)]
            u2 += f * fixf[np.uint64(rf + j + 1)]
            we = fixf[np.uint64(wf + j)] * e
            wf_ = fixf[np.uint64(wf + j + 1)] * f
            s += we
            t2 += wf_
            q += we * e
            q2 += wf_ * f
            s0 += we * fixf[np.uint64(xf0 + j)]
            s02 += wf_ * fixf[np.uint64(xf0 + j + 1)]
            s1 += we * fixf[np.uint64(xf1 + j)]
            s12 += wf_ * fixf[np.uint64(xf1 + j + 1)]
            j += 2
    if j < je:
        e = relf[np.uint64(rb + co[j])]
        u += e * fixf[np.uint64(rf + j)]
        we = fixf[np.uint64(wf + j)] * e
        s += we
        q += we * e
        if n_x > 0:
            s0 += we * fixf[np.uint64(xf0 + j)]
        if n_x > 1:
            s1 += we * fixf[np.uint64(xf1 + j)]
    return u + u2, q + q2, s + t2, s0 + s02, s1 + s12


@njit(inline="always", **KERNEL_OPTIONS)
def _row_pair(relf, rb, co, fixf, wf, xf0, xf1, js, je):
    """Over one row: S_c = sum w e x_c for the two fixed columns at xf0, xf1 (even and
    odd partial sums as in ``_row_main``)."""
    s0 = 0.0
    s1 = 0.0
    s02 = 0.0
    s12 = 0.0
    j = js
    while j + 1 < je:
        we = fixf[np.uint64(wf + j)] * relf[np.uint64(rb + co[j])]
        wf_ = fixf[np.uint64(wf + j + 1)] * relf[np.uint64(rb + co[j + 1])]
        s0 += we * fixf[np.uint64(xf0 + j)]  # S_c += w e_pi x_c
        s02 += wf_ * fixf[np.uint64(xf0 + j + 1)]
        s1 += we * fixf[np.uint64(xf1 + j)]
        s12 += wf_ * fixf[np.uint64(xf1 + j + 1)]
        j += 2
    if j < je:
        we = fixf[np.uint64(wf + j)] * relf[np.uint64(rb + co[j])]
        s0 += we * fixf[np.uint64(xf0 + j)]
        s1 += we * fixf[np.uint64(xf1 + j)]
    return s0 + s02, s1 + s12


@njit(**KERNEL_OPTIONS)
def score_rows(relf, n_terms, fixf, n_fix, resid_at, weight_at, x_at, row_perms, col_perms,
               col_start, col_stop, coloff, tot, out):
    """Dot products of each term's relabelled residual with its reduced fit, row-wise.

    For term a with relabelled residual e and, fixed, the reduced fit's residual
    r = y - mu, weight w = mu (1 - mu) and the non-constant columns x_c of its reduced
    model:  U = e'r, Q = sum w e^2, S_0 = sum w e, S_c = sum w e x_c.
    Layers are stored row-planar, (n, L, m): one layer's row is contiguous, so a pass
    over a row streams only the layers it uses. For each row, term by term, the
    permutations of a block of ``coloff.shape[0]`` go through the term's fixed rows while
    they are in cache; while a permutation gathers a row segment, the segment its next row
    reads is prefetched (the approach of ``kernels.gather.cross_rows``). Sums of a row are
    kept in registers, in two partial sums (even and odd column offsets).

    Parameters
    ----------
    relf : float64 (n * K * m,)
        The residual layers, an (n, K, m) C-ordered array flattened; 0 off the dyad set.
    n_terms : int
        K.
    fixf : float64 (n * Lf * m,)
        The fixed layers, an (n, Lf, m) C-ordered array flattened; 0 off the dyad set.
    n_fix : int
        Lf.
    resid_at, weight_at : int64 (K,)
        Layer of r and of w for each term.
    x_at : int64 (K, c)
        Layers of the non-constant reduced-model columns of each term (c may be 0).
    row_perms : int64 (B, n); col_perms : int64 (B, m)
    col_start, col_stop : int64 (n,)
        Row i uses the columns [col_start[i], col_stop[i]).
    coloff : int32 workspace (block, m)
        Column permutations of the block.
    tot : float64 workspace (block, K, c + 3)
    out : float64 (B, K, c + 3)
        Written: [U, Q, S_0, S_1 .. S_c] of each relabelling and term. Per row the sums
        run in increasing column order, rows in increasing order, whatever the block.
    """
    n_perm = row_perms.shape[0]
    n_rows = row_perms.shape[1]
    m = col_perms.shape[1]
    block = coloff.shape[0]
    n_x = x_at.shape[1]
    rowlen = m * n_terms
    line = max(1, CACHE_LINE // relf.itemsize)
    seg_lines = (m + line - 1) // line
    for b0 in range(0, n_perm, block):
        nb = min(block, n_perm - b0)
        for q in range(nb):
            for j in range(m):
                coloff[q, j] = col_perms[b0 + q, j]
        tot[:] = 0.0
        for i in range(n_rows):
            js = col_start[i]
            je = col_stop[i]
            fb = i * n_fix * m
            # terms outside, permutations inside: a term's fixed rows stay in cache while
            # the block's permutations go through them
            for a in range(n_terms):
                wf = fb + weight_at[a] * m
                rf = fb + resid_at[a] * m
                first = min(n_x, 2)
                xf0 = fb + x_at[a, 0] * m if first > 0 else fb
                xf1 = fb + x_at[a, 1] * m if first > 1 else fb
                for q in range(nb):
                    b = b0 + q
                    rb = row_perms[b, i] * rowlen + a * m
                    if i + 1 < n_rows:
                        # the stored row segment the next row of this permutation reads
                        nxt = row_perms[b, i + 1] * rowlen + a * m
                        for t in range(seg_lines):
                            prefetch(relf, np.uint64(nxt + t * line))
                    co = coloff[q]
                    u, qq, s, s0, s1 = _row_main(relf, rb, co, fixf, rf, wf, xf0, xf1, first,
                                                 js, je)
                    tot[q, a, 0] += u
                    tot[q, a, 1] += qq
                    tot[q, a, 2] += s
                    if first > 0:
                        tot[q, a, 3] += s0
                    if first > 1:
                        tot[q, a, 4] += s1
                    c = first
                    while c < n_x:
                        x1 = x_at[a, c + 1] if c + 1 < n_x else x_at[a, c]
                        s0, s1 = _row_pair(relf, rb, co, fixf, wf, fb + x_at[a, c] * m,
                                           fb + x1 * m, js, je)
                        tot[q, a, 3 + c] += s0
                        if c + 1 < n_x:
                            tot[q, a, 4 + c] += s1
                        c += 2
        for q in range(nb):
            for a in range(n_terms):
                for c in range(n_x + 3):
                    out[b0 + q, a, c] = tot[q, a, c]
