"""Logistic regression by Newton's method (IRLS) over dyad vectors, and per-relabelling drivers.

A logistic fit reads the design columns ``cols`` of ``[XT; ext]`` (``XT`` (P, N) holds one
column of dyad values per row; column index P means the vector ``ext`` (N,), the drivers'
relabelled column), the sums ``xy`` = X'y of the 0/1 response over the fit's dyads, and a
row filter ``valid`` (N,): the dyads of the fit. Newton's method for the canonical (logit)
link is iteratively reweighted least squares (McCullagh & Nelder 1989, Generalized Linear
Models, 2nd ed., section 2.5 [memory]):

    eta = X b,  mu = 1 / (1 + exp(-eta)),  w = mu (1 - mu)
    g = X'y - X'mu,  H = X'WX,  b <- b + s H^-1 g.

The response enters only through X'y (the canonical link's sufficient statistic), so a pass
over the dyads reads the design alone: X'mu and X'WX at the current coefficients.

Rounding. A pass sums in three levels: each sum is kept in ACC_LANES vector lanes over the
blocks of ``BLOCK`` dyads of a super-block (at most 2048 terms per lane), the lanes are
added pairwise at the end of the super-block, and super-blocks into the total. The
rounding error of a sum is then a few thousand units in the last place of the sum of the
absolute terms at worst, whatever N (a plain running sum over 10^8 dyads can lose 10^8
units); the order is fixed by the dyad order, so a fit's bits depend only on its inputs.

Step acceptance without the deviance. Along a Newton direction d, the deviance
phi(s) = D(b + s d) has phi'(0) = -2 lam2 (lam2 = d'g, the squared Newton decrement) and
phi''(0) = 2 lam2, and since |d log w / d eta| = |1 - 2 mu| <= 1, every weight changes by a
factor within exp(+-|x_d'd| s): phi''(u) <= exp(u M) phi''(0) with M >= max_d |x_d'd|
(the self-concordance property of the logistic loss; Bach 2010, Electron. J. Statist.
4:384-414 [memory]). Integrating twice,

    phi(s) - phi(0) <= -2 lam2 s (1 - s h(s M)),   h(u) = (e^u - 1 - u) / u^2,

so a step with s h(s M) < 1 lowers the deviance: it is accepted without evaluating the
deviance (every step near the optimum, where M is tiny). A longer step is accepted after
its pass when the curvature there proves a decrease: phi''(u) >= exp(-(s - u) M) phi''(s)
gives phi(0) - phi(s) >= -phi'(s) + phi''(s) k(s M) with k(u) = (u - 1 + e^-u) / u^2;
otherwise it is halved. No test compares two deviances, whose difference near the optimum
is below their rounding at 10^6 dyads and more (what made the previous rule halve a good
step thirty times and give up). M is bounded by sum_c |d_c| xmax_c, xmax_c = max |x_c|
over the fit's dyads.

Convergence: the next Newton step moves no dyad's linear predictor by more than ``tol``
(M <= tol, a criterion free of the predictors' units and of N), or no coefficient by more
than DECREMENT_TOL standard errors (the Newton decrement); that step is taken without
another pass, and the Wald covariance is H^-1 where it started (every weight within a
factor exp(+-M) of the estimate's). Under separation (Albert & Anderson 1984, Biometrika
71:1-10) the coefficients diverge and the fit fails: no convergence in ``max_iter`` steps,
an information matrix that underflows to singular, or, when a small fit's gradient has
vanished into its rounding and the step looks converged, the test of SATURATED_WEIGHT (the
dyads that inform some combination of the coefficients all have fitted probabilities of 0
or 1). A separated fit is never reported as converged.

The drivers loop over the relabellings of one chunk: they gather the relabelled layer
(``value = layer[row_perm[rows[d]], col_perm[cols[d]]]``; no n x n array is built) while
summing what the fit needs (X'y_pi, or the relabelled column and its sums), refit or take a
score statistic, and write one row of statistics per relabelling, and the number of passes
over the dyads it took. Every relabelling starts from the same warm start, so a statistic
depends only on its relabelling, never on the chunk it was computed in.
"""

import numpy as np
from numba import config, njit, types
from numba.core import cgutils
from numba.extending import intrinsic

from .gather import prefetch
from .options import FIT_PIVOT_SQUARED, KERNEL_OPTIONS

# Return codes of the fits (a converged fit returns its Newton step count >= 1).
FAIL_ITERATIONS = -1  # no convergence in max_iter steps (diverging coefficients: separation?)
FAIL_SINGULAR = -2  # the weighted information X'WX is singular
FAIL_STEP = -3  # no acceptable step (non-finite sums)
FAIL_DYADS = -4  # no more valid dyads than coefficients
FAIL_SATURATED = -5  # converged in appearance only: the fitted probabilities of the dyads
#                      that inform some combination of the coefficients are 0 or 1
#                      (separation; see SATURATED_WEIGHT)

# Diagnostics of a fit, written to ``info``: passes over the dyads, the last Newton step's
# bound on the largest change of a linear predictor (M), the design column (position in
# ``cols``) whose coefficient moved the linear predictors most in that step, and the Newton
# steps taken.
INFO_PASSES = 0
INFO_MOVE = 1
INFO_TERM = 2
INFO_STEPS = 3
INFO_SIZE = 4

# Permutations that share one pass over the fixed rows in ``score_rows``.
SCORE_BLOCK = 16
# Bytes of one cache line, the unit of prefetching.
CACHE_LINE = 64

# A Cholesky pivot^2 at most this fraction of its diagonal entry marks a singular information:
# the one rule of whether a fit is possible (``kernels.options``).
SINGULAR_PIVOT = FIT_PIVOT_SQUARED
# A fit that looks converged with some |linear predictor| possibly beyond ETA_SUSPECT (by
# the bound sum_c |b_c| xmax_c) takes one more pass for the unweighted information
# G = X'X, and fails as FAIL_SATURATED when some combination v of its coefficients has
# v'X'WX v < SATURATED_WEIGHT v'X'X v: a mean weight w = mu (1 - mu), over the dyads that
# inform v, of a fitted probability within 1e-11 of 0 or 1. Along a separation (Albert &
# Anderson 1984) gradient and information both shrink like exp(-|eta|), so the Newton
# steps stay of size 1 and a fit can look converged only once the gradient has vanished
# into its rounding, with weights near exp(-30) and below; ordinary fits, rare events and
# nearly collinear predictors included, keep mean weights of 1e-6 and more.
ETA_SUSPECT = 25.0
SATURATED_WEIGHT = 1e-11
# A fit has also converged when the Newton decrement sqrt(d'H d) is at most DECREMENT_TOL:
# no coefficient moves by more than that many standard errors (|d_c| <= se_c sqrt(d'H d)).
# With nearly collinear predictors M, a bound that ignores how the coefficients' moves
# cancel in the linear predictors, can stall at the gradient's rounding while the
# decrement is far below this.
DECREMENT_TOL = 1e-9
# Halvings of a Newton step tried before giving up (a step of length 2^-30 with M below
# about 10^9 is always certified, so only non-finite sums exhaust them).
MAX_HALVINGS = 30

# Dyads per block of a pass (a multiple of ACC_LANES), lanes of a vector register, and
# blocks per super-block: the levels of every sum over the dyads.
BLOCK = 256
LANES = 8
SUPER = 256

# exp(x) for x <= 0 (Cody & Waite 1980 range reduction [memory]): x = k ln2 + r with
# |r| <= ln2 / 2, ln2 split in a high part exact in 32 bits and the rest; exp(r) by its
# Taylor polynomial of degree 13 (truncation below 4e-18 relative); 2^k built in the
# exponent bits. Below EXP_FLOOR the result is exp(EXP_FLOOR), about 3e-308: a fitted
# probability of 0 to double precision either way.
LN2_HI = 6.93147180369123816490e-01
LN2_LO = 1.90821492927058770002e-10
INV_LN2 = 1.44269504088896338700e+00
EXP_FLOOR = -708.0


# --- vector dot product of one block -------------------------------------------------------
def _vdot_python(a, b, n):
    """Pure-Python twin of ``vdot`` (kernels run as Python code with numba's JIT off)."""
    acc = np.zeros(2 * LANES)
    for i in range(0, n, 2 * LANES):
        for t in range(2 * LANES):
            acc[t] += a[i + t] * b[i + t]
    v = acc[:LANES] + acc[LANES:]
    while v.shape[0] > 1:
        h = v.shape[0] // 2
        v = v[:h] + v[h:]
    return float(v[0])


def _vdot_codegen(context, builder, signature, args):
    """LLVM IR: two <LANES x double> accumulators over a[i] b[i], i < n (n a multiple of
    2 * LANES): lanes i mod 2 LANES < LANES in the first, the others in the second, one
    fused multiply-add per term; then the two added lane by lane and the lanes halved
    pairwise ((0..3) + (4..7), then (0, 1) + (2, 3), then 0 + 1)."""
    from llvmlite import ir
    av, bv, nv = args
    ap = context.make_array(signature.args[0])(context, builder, av).data
    bp = context.make_array(signature.args[1])(context, builder, bv).data
    i32, i64, dbl = ir.IntType(32), ir.IntType(64), ir.DoubleType()
    vec = ir.VectorType(dbl, LANES)
    fma = cgutils.get_or_insert_function(
        builder.module, ir.FunctionType(vec, [vec, vec, vec]), f"llvm.fma.v{LANES}f64")
    zero = ir.Constant(vec, [0.0] * LANES)
    entry = builder.block
    head = builder.append_basic_block("vdot.head")
    body = builder.append_basic_block("vdot.body")
    done = builder.append_basic_block("vdot.done")
    builder.branch(head)
    builder.position_at_end(head)
    i = builder.phi(i64)
    i.add_incoming(ir.Constant(i64, 0), entry)
    s0 = builder.phi(vec)
    s0.add_incoming(zero, entry)
    s1 = builder.phi(vec)
    s1.add_incoming(zero, entry)
    builder.cbranch(builder.icmp_signed("<", i, nv), body, done)
    builder.position_at_end(body)

    def load(ptr, at):
        return builder.load(builder.bitcast(builder.gep(ptr, [at]), vec.as_pointer()), align=8)

    i2 = builder.add(i, ir.Constant(i64, LANES))
    n0 = builder.call(fma, [load(ap, i), load(bp, i), s0])
    n1 = builder.call(fma, [load(ap, i2), load(bp, i2), s1])
    i.add_incoming(builder.add(i, ir.Constant(i64, 2 * LANES)), body)
    s0.add_incoming(n0, body)
    s1.add_incoming(n1, body)
    builder.branch(head)
    builder.position_at_end(done)
    v = builder.fadd(s0, s1)
    width = LANES
    while width > 1:
        h = width // 2
        lo = builder.shuffle_vector(v, v, ir.Constant(ir.VectorType(i32, h), list(range(h))))
        hi = builder.shuffle_vector(v, v, ir.Constant(ir.VectorType(i32, h),
                                                      list(range(h, width))))
        v = builder.fadd(lo, hi)
        width = h
    return builder.extract_element(v, ir.Constant(i32, 0))


if config.DISABLE_JIT:
    def vdot(a, b, n):
        """Pure-Python twin of the vector dot product."""
        return _vdot_python(a, b, n)
else:
    @intrinsic
    def vdot(typingctx, a, b, n):
        """sum_{i < n} a[i] b[i] for 1-D float64 arrays, n a multiple of 2 * LANES, in
        vector lanes (see ``_vdot_codegen``); the order is fixed, so are the bits."""
        if not all(isinstance(x, types.Array) and x.ndim == 1 and x.layout == "C"
                   and x.dtype == types.float64 for x in (a, b)):
            return None
        return types.float64(a, b, types.intp), _vdot_codegen


# Lanes of the running accumulators of ``vdot_acc``: four vectors of LANES.
ACC_LANES = 4 * LANES


def _vdot_acc_python(a, b, n, acc, at):
    """Pure-Python twin of ``vdot_acc``."""
    for i in range(0, n, ACC_LANES):
        for t in range(ACC_LANES):
            acc[at + t] += a[i + t] * b[i + t]


def _vdot_acc_codegen(context, builder, signature, args):
    """LLVM IR: acc[at + t] += sum_j a[j ACC_LANES + t] b[j ACC_LANES + t] for t <
    ACC_LANES, j < n / ACC_LANES (n a multiple of ACC_LANES): four <LANES x double>
    accumulators loaded from ``acc``, one fused multiply-add per term, stored back. No
    horizontal sum per call: the lanes are summed when a super-block is flushed."""
    from llvmlite import ir
    av, bv, nv, accv, atv = args
    ap = context.make_array(signature.args[0])(context, builder, av).data
    bp = context.make_array(signature.args[1])(context, builder, bv).data
    cp = context.make_array(signature.args[3])(context, builder, accv).data
    i64, dbl = ir.IntType(64), ir.DoubleType()
    vec = ir.VectorType(dbl, LANES)
    fma = cgutils.get_or_insert_function(
        builder.module, ir.FunctionType(vec, [vec, vec, vec]), f"llvm.fma.v{LANES}f64")

    def vptr(ptr, at):
        return builder.bitcast(builder.gep(ptr, [at]), vec.as_pointer())

    starts = [builder.load(vptr(cp, builder.add(atv, ir.Constant(i64, LANES * u))), align=8)
              for u in range(4)]
    entry = builder.block
    head = builder.append_basic_block("vdotacc.head")
    body = builder.append_basic_block("vdotacc.body")
    done = builder.append_basic_block("vdotacc.done")
    builder.branch(head)
    builder.position_at_end(head)
    i = builder.phi(i64)
    i.add_incoming(ir.Constant(i64, 0), entry)
    sums = []
    for u in range(4):
        ph = builder.phi(vec)
        ph.add_incoming(starts[u], entry)
        sums.append(ph)
    builder.cbranch(builder.icmp_signed("<", i, nv), body, done)
    builder.position_at_end(body)
    new = []
    for u in range(4):
        at = builder.add(i, ir.Constant(i64, LANES * u))
        new.append(builder.call(fma, [builder.load(vptr(ap, at), align=8),
                                      builder.load(vptr(bp, at), align=8), sums[u]]))
    i.add_incoming(builder.add(i, ir.Constant(i64, ACC_LANES)), body)
    for u in range(4):
        sums[u].add_incoming(new[u], body)
    builder.branch(head)
    builder.position_at_end(done)
    for u in range(4):
        builder.store(sums[u], vptr(cp, builder.add(atv, ir.Constant(i64, LANES * u))),
                      align=8)
    return context.get_dummy_value()


if config.DISABLE_JIT:
    def vdot_acc(a, b, n, acc, at):
        """Pure-Python twin of the lane-accumulating dot product."""
        _vdot_acc_python(a, b, n, acc, at)
else:
    @intrinsic
    def vdot_acc(typingctx, a, b, n, acc, at):
        """acc[at:at + ACC_LANES] += the lanes of a[i] b[i], i < n (n a multiple of
        ACC_LANES; 1-D float64 C arrays): see ``_vdot_acc_codegen``."""
        if not all(isinstance(x, types.Array) and x.ndim == 1 and x.layout == "C"
                   and x.dtype == types.float64 for x in (a, b, acc)):
            return None
        return types.void(a, b, types.intp, acc, types.intp), _vdot_acc_codegen


@njit(**KERNEL_OPTIONS)
def _lane_sum(acc, at):
    """Sum of acc[at:at + ACC_LANES] in a fixed pairwise order, and the lanes zeroed."""
    width = ACC_LANES
    while width > 1:
        half = width // 2
        for t in range(half):
            acc[at + t] += acc[at + half + t]
        width = half
    total = acc[at]
    for t in range(ACC_LANES):
        acc[at + t] = 0.0
    return total


# --- one pass over the dyads ---------------------------------------------------------------
@njit(**KERNEL_OPTIONS)
def _h_bound(u):
    """h(u) = (e^u - 1 - u) / u^2 (u >= 0): the deviance bound's curvature factor."""
    if u < 1e-4:
        return 0.5 + u / 6.0 + u * u / 24.0
    if u > 700.0:  # past exp's range: no step that long is certified
        return np.inf
    return (np.expm1(u) - u) / (u * u)


@njit(**KERNEL_OPTIONS)
def _k_bound(u):
    """k(u) = (u - 1 + e^-u) / u^2 (u >= 0): the backward bound's curvature factor."""
    if u < 1e-4:
        return 0.5 - u / 6.0 + u * u / 24.0
    return (u + np.expm1(-u)) / (u * u)


@njit(**KERNEL_OPTIONS)
def _column(XT, ext, cc):
    """Design column ``cc``: row cc of XT, or ``ext`` when cc = XT.shape[0]."""
    return XT[cc] if cc < XT.shape[0] else ext


@njit(**KERNEL_OPTIONS)
def newton_pass(XT, ext, cols, q, valid, all_valid, beta, blk, kb, acc, H, f):
    """One pass over the dyads: f = X'mu and H = X'WX at ``beta``, over the valid dyads.

    Parameters
    ----------
    XT : float64 (P, N)
        Design columns, one per row; finite everywhere (0 where a dyad is not valid). Row 0
        is the intercept, 1 on every dyad: it is not read (passes are bound by their reads
        from memory at 10^6 dyads).
    ext : float64 (N,) or (0,)
        Column P of the design (finite).
    cols : int64 (qa,)
        Design columns in the sums; the first ``q`` carry the coefficients ``beta`` (q,),
        the others (columns added for a score statistic) have coefficient 0.
    valid : bool (N,)
        Dyads of the fit (read only when ``all_valid`` is False).
    blk : float64 workspace (2 qa + 3, BLOCK); kb : int64 workspace (BLOCK,);
    acc : float64 workspace ((qa + 1) qa ACC_LANES,): the lanes of each sum
    H : float64 (qa, qa); f : float64 (qa,)
        Written.

    Per block: x columns copied (zero past N), eta = X b, t = exp(-|eta|),
    mu = 1 / (1 + t) or t / (1 + t) by the sign of eta, w = t / (1 + t)^2 (0 off the valid
    dyads), then the block's sums by ``vdot``.
    """
    qa = cols.shape[0]
    n = valid.shape[0]
    xb = blk[0:qa]
    wxb = blk[qa:2 * qa]
    eta = blk[2 * qa]
    mu = blk[2 * qa + 1]
    t = blk[2 * qa + 2]
    kbf = kb.view(np.float64)
    for e in range(acc.shape[0]):
        acc[e] = 0.0
    for r in range(qa):
        f[r] = 0.0
        for c in range(qa):
            H[r, c] = 0.0
    n_blocks = 0
    for d0 in range(0, n, BLOCK):
        nb = min(BLOCK, n - d0)
        for i in range(BLOCK):
            eta[i] = 0.0
        for c in range(qa):
            xc = xb[c]
            if cols[c] == 0:  # the intercept: 1 on every dyad, not read
                bc = beta[c] if c < q else 0.0
                for i in range(nb):
                    xc[i] = 1.0
                    eta[i] += bc  # eta = X b
                for i in range(nb, BLOCK):
                    xc[i] = 0.0
                continue
            src = _column(XT, ext, cols[c])[d0:d0 + nb]
            if c < q:
                bc = beta[c]
                for i in range(nb):
                    v = src[i]
                    xc[i] = v
                    eta[i] += v * bc
            else:
                for i in range(nb):
                    xc[i] = src[i]
            for i in range(nb, BLOCK):
                xc[i] = 0.0
        for i in range(BLOCK):
            # t = exp(-|eta|) = 2^k exp(r)
            x = max(-abs(eta[i]), EXP_FLOOR)
            kf = np.floor(x * INV_LN2 + 0.5)
            r = x - kf * LN2_HI - kf * LN2_LO
            pp = 1.0 / 6227020800.0
            pp = pp * r + 1.0 / 479001600.0
            pp = pp * r + 1.0 / 39916800.0
            pp = pp * r + 1.0 / 3628800.0
            pp = pp * r + 1.0 / 362880.0
            pp = pp * r + 1.0 / 40320.0
            pp = pp * r + 1.0 / 5040.0
            pp = pp * r + 1.0 / 720.0
            pp = pp * r + 1.0 / 120.0
            pp = pp * r + 1.0 / 24.0
            pp = pp * r + 1.0 / 6.0
            pp = pp * r + 0.5
            pp = pp * r + 1.0
            pp = pp * r + 1.0
            t[i] = pp
            kb[i] = (np.int64(kf) + 1023) << 52
        for i in range(BLOCK):
            tt = t[i] * kbf[i]
            inv = 1.0 / (1.0 + tt)
            mu[i] = inv if eta[i] >= 0.0 else tt * inv
            t[i] = tt * inv * inv  # w = mu (1 - mu) = t / (1 + t)^2
        if not all_valid:
            vb = valid[d0:d0 + nb]
            for i in range(nb):
                if not vb[i]:
                    mu[i] = 0.0
                    t[i] = 0.0
        for i in range(nb, BLOCK):
            mu[i] = 0.0
            t[i] = 0.0
        for r in range(qa):
            xr = xb[r]
            wx = wxb[r]
            for i in range(BLOCK):
                wx[i] = t[i] * xr[i]
        for r in range(qa):
            vdot_acc(xb[r], mu, BLOCK, acc, (qa * qa + r) * ACC_LANES)  # f = X'mu
            for c in range(r + 1):
                vdot_acc(wxb[r], xb[c], BLOCK, acc, (r * qa + c) * ACC_LANES)  # H = X'WX
        n_blocks += 1
        if n_blocks == SUPER or d0 + BLOCK >= n:
            for r in range(qa):
                f[r] += _lane_sum(acc, (qa * qa + r) * ACC_LANES)
                for c in range(r + 1):
                    H[r, c] += _lane_sum(acc, (r * qa + c) * ACC_LANES)
            n_blocks = 0
    for r in range(qa):
        for c in range(r + 1, qa):
            H[r, c] = H[c, r]


@njit(**KERNEL_OPTIONS)
def gram_pass(XT, ext, cols, q, valid, all_valid, blk, acc, G):
    """G = X'X over the valid dyads, the first q columns of ``cols`` (the unweighted
    information; workspaces as in ``newton_pass``)."""
    n = valid.shape[0]
    xb = blk[0:q]
    for e in range(acc.shape[0]):
        acc[e] = 0.0
    for r in range(q):
        for c in range(q):
            G[r, c] = 0.0
    n_blocks = 0
    for d0 in range(0, n, BLOCK):
        nb = min(BLOCK, n - d0)
        for c in range(q):
            xc = xb[c]
            if cols[c] == 0:
                for i in range(nb):
                    xc[i] = 1.0
            else:
                src = _column(XT, ext, cols[c])[d0:d0 + nb]
                for i in range(nb):
                    xc[i] = src[i]
            if not all_valid:
                vb = valid[d0:d0 + nb]
                for i in range(nb):
                    if not vb[i]:
                        xc[i] = 0.0
            for i in range(nb, BLOCK):
                xc[i] = 0.0
        for r in range(q):
            for c in range(r + 1):
                vdot_acc(xb[r], xb[c], BLOCK, acc, (r * q + c) * ACC_LANES)  # G = X'X
        n_blocks += 1
        if n_blocks == SUPER or d0 + BLOCK >= n:
            for r in range(q):
                for c in range(r + 1):
                    G[r, c] += _lane_sum(acc, (r * q + c) * ACC_LANES)
            n_blocks = 0
    for r in range(q):
        for c in range(r + 1, q):
            G[r, c] = G[c, r]


@njit(**KERNEL_OPTIONS)
def smallest_weight(H, G, q, work):
    """min over v of v'Hv / v'Gv (the least mean weight along any combination of the
    coefficients): the smallest eigenvalue of C^-1 H C^-T, C C' = G (leading q x q blocks;
    ``work`` (3, q, q) scratch); 0 when G is not positive definite."""
    C = work[0]
    A = work[1]
    M = work[2]
    if not _cholesky(G, C, q):
        return 0.0
    for c in range(q):  # A = C^-1 H
        for r in range(q):
            s = H[r, c]
            for e in range(r):
                s -= C[r, e] * A[e, c]
            A[r, c] = s / C[r, r]
    for r in range(q):  # M = A C^-T
        for c in range(q):
            s = A[r, c]
            for e in range(c):
                s -= M[r, e] * C[c, e]
            M[r, c] = s / C[c, c]
    Ms = np.empty((q, q))
    for r in range(q):
        for c in range(q):
            Ms[r, c] = 0.5 * (M[r, c] + M[c, r])
    return np.linalg.eigvalsh(Ms)[0]


# --- dense linear algebra on the leading q x q block ---------------------------------------
@njit(**KERNEL_OPTIONS)
def _cholesky(H, L, q):
    """Lower Cholesky factor L of H[:q, :q]; False when a pivot is not clearly positive."""
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
def _cholesky_solve(L, b, out, q):
    """out[:q] = (L L')^-1 b[:q] (L: the leading q x q block)."""
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
def _cholesky_inverse(L, col, out, q):
    """out[:q, :q] = (L L')^-1, column by column (``col`` is a q-vector of scratch)."""
    for c in range(q):
        for r in range(q):
            col[r] = 1.0 if r == c else 0.0
        _cholesky_solve(L, col, col, q)
        for r in range(q):
            out[r, c] = col[r]


# --- Newton's method -------------------------------------------------------------------------
def fit_workspace(qa):
    """Shapes of the workspaces of ``newton_fit`` for qa design columns:
    blk (2 qa + 3, BLOCK), kb (BLOCK,) int64, acc ((qa + 1) qa ACC_LANES,),
    state (3 qa + 7, qa)."""
    return (2 * qa + 3, BLOCK), (BLOCK,), ((qa + 1) * qa * ACC_LANES,), (3 * qa + 7, qa)


@njit(**KERNEL_OPTIONS)
def newton_fit(XT, ext, cols, q, xy, valid, all_valid, xmax, beta0, blk, kb, acc, state,
               beta_out, cov_out, info, max_iter, tol):
    """Maximum-likelihood logistic regression by Newton's method (module docstring).

    Parameters
    ----------
    XT, ext, cols, q, valid, all_valid : as in ``newton_pass``; the model has the first
        ``q`` columns of ``cols``; any further ones are summed at every pass (for a score
        statistic, ``score_from_state``).
    xy : float64 (q,)
        X'y of the model's columns over the valid dyads.
    xmax : float64 (q,)
        max |x_c| over the valid dyads (an upper bound will do).
    beta0 : float64 (q,)
        Starting coefficients (warm start).
    blk, kb, acc, state : workspaces (``fit_workspace``), overwritten. On return ``state``
        holds, for the last coefficients b evaluated: H = X'WX (rows 0..qa-1), X'mu (row
        3 qa + 2) and the Newton step d from b (row 3 qa + 5); L, the Cholesky factor of
        H[:q, :q], in rows 2 qa .. 3 qa - 1.
    beta_out : float64 (q,)
        Written: the estimate b + d (when converged), else the last coefficients (for a
        separation test: under separation they point along the separating direction).
    cov_out : float64 (q, q)
        Written: H[:q, :q]^-1, the Wald covariance (when converged).
    info : float64 (INFO_SIZE,)
        Written: passes over the dyads, the last step's M, the column that moved most,
        Newton steps taken (``INFO_*``).
    max_iter : int
        Newton steps allowed.
    tol : float
        Converged when the next step moves no linear predictor by more than tol
        (sum_c |d_c| xmax_c <= tol), or than the gradient's rounding could; that step is
        taken without another pass.

    Returns
    -------
    int
        Newton steps taken (>= 1, the last one included) when converged, else a negative
        FAIL_* code (FAIL_SATURATED: converged in appearance only, see SATURATED_WEIGHT).
    """
    qa = cols.shape[0]
    H = state[0:qa]
    Ht = state[qa:2 * qa]
    L = state[2 * qa:3 * qa]
    beta = state[3 * qa]
    trial = state[3 * qa + 1]
    f = state[3 * qa + 2]
    ft = state[3 * qa + 3]
    g = state[3 * qa + 4]
    d = state[3 * qa + 5]
    tmp = state[3 * qa + 6]
    info[INFO_PASSES] = 0.0
    info[INFO_MOVE] = np.nan
    info[INFO_TERM] = -1.0
    info[INFO_STEPS] = 0.0
    n_valid = valid.shape[0]
    if not all_valid:
        n_valid = 0
        for i in range(valid.shape[0]):
            if valid[i]:
                n_valid += 1
    if n_valid <= q:
        return FAIL_DYADS
    for c in range(q):
        beta[c] = beta0[c]
    newton_pass(XT, ext, cols, q, valid, all_valid, beta, blk, kb, acc, H, f)
    passes = 1
    for it in range(1, max_iter + 1):
        info[INFO_PASSES] = passes
        info[INFO_STEPS] = it - 1
        for c in range(q):
            beta_out[c] = beta[c]  # the last coefficients, should the fit fail
        finite = True
        for c in range(q):
            g[c] = xy[c] - f[c]  # g = X'(y - mu)
            if not np.isfinite(g[c]):
                finite = False
        if not finite:
            return FAIL_STEP
        if not _cholesky(H, L, q):
            return FAIL_SINGULAR
        _cholesky_solve(L, g, d, q)  # Newton step d = H^-1 g
        move = 0.0
        top = 0.0
        for c in range(q):
            mc = abs(d[c]) * xmax[c]
            move += mc  # M >= max_d |x_d'd|
            if mc > top:
                top = mc
                info[INFO_TERM] = c
        info[INFO_MOVE] = move
        lam2 = 0.0
        for c in range(q):
            lam2 += d[c] * g[c]  # the squared Newton decrement d'H d
        if move <= tol or lam2 <= DECREMENT_TOL * DECREMENT_TOL:
            info[INFO_STEPS] = it
            for c in range(q):
                beta_out[c] = beta[c] + d[c]
            _cholesky_inverse(L, tmp, cov_out, q)
            bound = 0.0
            for c in range(q):
                bound += abs(beta[c]) * (1.0 if cols[c] == 0 else xmax[c])
            if bound > ETA_SUSPECT:  # could some fitted probability be at 0 or 1?
                gram_pass(XT, ext, cols, q, valid, all_valid, blk, acc, Ht)
                passes += 1
                info[INFO_PASSES] = passes
                scratch = blk.reshape(-1)[:3 * q * q].reshape((3, q, q))
                if not (smallest_weight(H, Ht, q, scratch) >= SATURATED_WEIGHT):
                    return FAIL_SATURATED
            return it
        s = 1.0
        accepted = False
        for _ in range(MAX_HALVINGS + 1):
            sm = s * move
            certified = s * _h_bound(sm) < 1.0  # the deviance falls (module docstring)
            for c in range(q):
                trial[c] = beta[c] + s * d[c]
            newton_pass(XT, ext, cols, q, valid, all_valid, trial, blk, kb, acc, Ht, ft)
            passes += 1
            if not certified:
                # D = s d: a decrease is proven when D'H_t D k(sM) + D'g_t > 0
                dhd = 0.0
                dg = 0.0
                for r in range(q):
                    dg += d[r] * (xy[r] - ft[r])
                    hr = 0.0
                    for c in range(q):
                        hr += Ht[r, c] * d[c]
                    dhd += d[r] * hr
                certified = s * dhd * _k_bound(sm) + dg > 0.0
            if certified:
                accepted = True
                break
            s *= 0.5
        info[INFO_PASSES] = passes
        if not accepted:
            return FAIL_STEP
        info[INFO_STEPS] = it
        for c in range(q):
            beta[c] = trial[c]
        for r in range(qa):
            f[r] = ft[r]
            for c in range(qa):
                H[r, c] = Ht[r, c]
    info[INFO_PASSES] = passes
    return FAIL_ITERATIONS


@njit(**KERNEL_OPTIONS)
def score_from_state(state, q, qa, xy_x):
    """Signed score statistic of design column q (position in ``cols``) after a converged
    ``newton_fit`` of the first q columns (Rao 1948, Proc. Camb. Philos. Soc. 44:50-57).

    With H = X'WX, X'mu and the last step d at the coefficients b the fit evaluated last
    (the estimate is b + d): U = x'y - x'mu - H_xZ d (x'(y - mu) at b + d to first order),
    I = H_xx - H_xZ H_ZZ^-1 H_Zx; statistic U / sqrt(I), NaN when I is not clearly
    positive (x in the span of Z). ``xy_x`` = x'y over the fit's dyads.
    """
    H = state[0:qa]
    L = state[2 * qa:3 * qa]
    f = state[3 * qa + 2]
    d = state[3 * qa + 5]
    a = state[3 * qa + 1]  # scratch (the trial row)
    tmp = state[3 * qa + 6]
    u = xy_x - f[q]
    for c in range(q):
        u -= H[q, c] * d[c]
        a[c] = H[q, c]
    _cholesky_solve(L, a, tmp, q)
    quad = 0.0
    for c in range(q):
        quad += a[c] * tmp[c]
    info = H[q, q] - quad
    if not (info > SINGULAR_PIVOT * H[q, q]) or not (info > 0.0):
        return np.nan
    return u / np.sqrt(info)


@njit(**KERNEL_OPTIONS)
def irls_logistic(XT, ext, cols, xy, valid, xmax, beta0, beta_out, cov_out, info, max_iter,
                  tol):
    """One logistic fit of the columns ``cols`` (all valid dyads given by ``valid``): the
    workspaces of ``newton_fit`` allocated here. Returns its status."""
    q = cols.shape[0]
    blk = np.empty((2 * q + 3, BLOCK))
    kb = np.empty(BLOCK, dtype=np.int64)
    acc = np.empty((q + 1) * q * ACC_LANES)
    state = np.empty((3 * q + 7, q))
    return newton_fit(XT, ext, cols, q, xy, valid, False, xmax, beta0, blk, kb, acc, state,
                      beta_out, cov_out, info, max_iter, tol)


@njit(**KERNEL_OPTIONS)
def score_logistic(XT, ext, zcols, xcol, xy, valid, xmax, gamma0, info, max_iter, tol):
    """Fit y ~ Z (columns ``zcols``) from ``gamma0`` and return the signed score statistic
    of column ``xcol`` (``score_from_state``), NaN when the reduced fit fails. ``xy`` (q + 1,)
    holds Z'y then x'y; ``xmax`` (q,) bounds |z_c|."""
    q = zcols.shape[0]
    qa = q + 1
    cols = np.empty(qa, dtype=np.int64)
    for c in range(q):
        cols[c] = zcols[c]
    cols[q] = xcol
    blk = np.empty((2 * qa + 3, BLOCK))
    kb = np.empty(BLOCK, dtype=np.int64)
    acc = np.empty((qa + 1) * qa * ACC_LANES)
    state = np.empty((3 * qa + 7, qa))
    gamma = np.empty(q)
    cinv = np.empty((q, q))
    status = newton_fit(XT, ext, cols, q, xy, valid, False, xmax, gamma0, blk, kb, acc, state,
                        gamma, cinv, info, max_iter, tol)
    if status < 0:
        return np.nan
    return score_from_state(state, q, qa, xy[q])


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


# --- drivers: one chunk of relabellings -----------------------------------------------------
@njit(**KERNEL_OPTIONS)
def _flush(part, total):
    """total += part; part = 0 (the block level of a driver's sums)."""
    for c in range(part.shape[0]):
        total[c] += part[c]
        part[c] = 0.0


@njit(**KERNEL_OPTIONS)
def _gather_response(layer, rows, cols, rp, cp, XT, fixed_ok, ybuf, valid, part, s):
    """valid[d] = fixed_ok[d] and y_pi[d] finite, and s = X'y_pi over the valid dyads, with
    y_pi[d] = layer[rp[rows[d]], cp[cols[d]]] (gathered into ``ybuf``); True when every
    dyad is valid."""
    p, n_dyads = XT.shape
    gather_rows(layer, rows, cols, rp, cp, ybuf)
    for c in range(p):
        part[c] = 0.0
        s[c] = 0.0
    complete = True
    for d in range(n_dyads):
        v = ybuf[d]  # y_pi[d] = Y[pi(i), pi(j)]
        ok = fixed_ok[d] and not np.isnan(v)
        valid[d] = ok
        if ok:
            for c in range(p):
                part[c] += XT[c, d] * v  # s = X'y_pi
        else:
            complete = False
        if (d + 1) % BLOCK == 0:
            _flush(part, s)
    _flush(part, s)
    return complete


@njit(**KERNEL_OPTIONS)
def refit_y(layer, rows, cols, row_perms, col_perms, XT, fixed_ok, xmax, beta0, onestep, out,
            passes, max_iter, tol, use_z):
    """Y-permutation refits: relabel the response, refit the full model.

    Parameters
    ----------
    layer : float64 (n, m)
        The response network (NaN: missing or off the dyad set).
    rows, cols : int64 (N,)
        The dyad set: dyad d is (rows[d], cols[d]).
    row_perms : int64 (B, n); col_perms : int64 (B, m)
        The relabellings.
    XT : float64 (p, N)
        Fixed design [1, x_1 .. x_k] on the dyads, one column per row (0 where missing).
    fixed_ok : bool (N,)
        Dyads where every column of the design is observed.
    xmax : float64 (p,)
        max |x_c| over the dyads of ``fixed_ok``.
    beta0 : float64 (p,)
        Warm start: the fit of the intercept alone, (logit(mean y), 0, ..).
    onestep : float64 (p, p + 1), or (0, p + 1) when some dyad is missing
        [(w0 X'X)^-1 | mean(y) X'1] with w0 = mean(y)(1 - mean(y)). At ``beta0`` every
        fitted probability is mean(y), so the first Newton step needs only X'y_pi, summed
        while the relabelled response is gathered: beta0 + (w0 X'X)^-1 (X'y_pi - mean(y) X'1)
        is where the refit starts.
    out : float64 (B, p - 1)
        Written: Wald z (``use_z``) or coefficient of each predictor; NaN for a failed fit.
    passes : int64 (B,)
        Written: passes over the dyads of each relabelling (the gather and the fit's).
    max_iter, tol : see ``newton_fit``.
    """
    p, n_dyads = XT.shape
    first_step = onestep.shape[0] == p
    design = np.arange(p)
    ext = np.empty(0)
    ybuf = np.empty(n_dyads)
    valid = np.empty(n_dyads, dtype=np.bool_)
    blk = np.empty((2 * p + 3, BLOCK))
    kb = np.empty(BLOCK, dtype=np.int64)
    acc = np.empty((p + 1) * p * ACC_LANES)
    state = np.empty((3 * p + 7, p))
    info = np.empty(INFO_SIZE)
    beta = np.empty(p)
    cov = np.empty((p, p))
    part = np.empty(p)
    s = np.empty(p)
    start = np.empty(p)
    for b in range(row_perms.shape[0]):
        complete = _gather_response(layer, rows, cols, row_perms[b], col_perms[b], XT,
                                    fixed_ok, ybuf, valid, part, s)
        for c in range(p):
            start[c] = beta0[c]
            if first_step:
                for e in range(p):
                    start[c] += onestep[c, e] * (s[e] - onestep[e, p])
        status = newton_fit(XT, ext, design, p, s, valid, complete, xmax, start, blk, kb, acc,
                            state, beta, cov, info, max_iter, tol)
        passes[b] = 1 + int(info[INFO_PASSES])
        for j in range(1, p):
            if status < 0:
                out[b, j - 1] = np.nan
            elif use_z:
                out[b, j - 1] = beta[j] / np.sqrt(cov[j, j])
            else:
                out[b, j - 1] = beta[j]


@njit(**KERNEL_OPTIONS)
def gather_rows(layer, rows, cols, rp, cp, out):
    """out[d] = layer[rp[rows[d]], cp[cols[d]]]: a relabelled layer on the dyads (``rows``
    non-decreasing), row by row; while a row is gathered, the stored row the next one
    reads is prefetched (the approach of ``kernels.gather``)."""
    n_dyads = rows.shape[0]
    m = layer.shape[1]
    flat = layer.reshape(-1)
    line = max(1, CACHE_LINE // layer.itemsize)
    d = 0
    while d < n_dyads:
        i = rows[d]
        end = d
        while end < n_dyads and rows[end] == i:
            end += 1
        if end < n_dyads:
            nxt = rp[rows[end]] * m
            for t in range(0, m, line):
                prefetch(flat, np.uint64(nxt + t))
        src = layer[rp[i]]
        cc = cols[d:end]
        dst = out[d:end]
        for e in range(end - d):
            dst[e] = src[cp[cc[e]]]  # E_pi[i, j] = E[pi(i), pi(j)]
        d = end


@njit(**KERNEL_OPTIONS)
def _block_dots(vecs, ebuf, mu, ties, XT, zc, buf, out):
    """With e = ebuf (complete data) and the reduced fit's probabilities ``mu``: out =
    [e'y, e'(y - mu), sum w e^2, sum_c w e z_c (c < q)] with w = mu (1 - mu) and e'y the
    sum of e over the dyads of ``ties`` (where y = 1). Three-level sums (``vdot`` over
    blocks of BLOCK, super-blocks, total); ``vecs`` (3, BLOCK) and ``buf`` (q + 3,)
    scratch. Reads e, mu and the non-constant columns of Z once."""
    n = ebuf.shape[0]
    q = zc.shape[0]
    eb = vecs[0]
    wv = vecs[1]
    zb = vecs[2]
    for c in range(q + 3):
        out[c] = 0.0
        buf[c] = 0.0
    part = 0.0
    n_ties = ties.shape[0]
    for t0 in range(0, n_ties, BLOCK):
        s = 0.0
        for t in range(t0, min(t0 + BLOCK, n_ties)):
            s += ebuf[ties[t]]
        part += s
    n_blocks = 0
    for d0 in range(0, n, BLOCK):
        nb = min(BLOCK, n - d0)
        e_src = ebuf[d0:d0 + nb]
        m_src = mu[d0:d0 + nb]
        for i in range(nb):
            e = e_src[i]
            m = m_src[i]
            eb[i] = e
            zb[i] = m
            wv[i] = (m - m * m) * e  # w e, w = mu (1 - mu)
        for i in range(nb, BLOCK):
            eb[i] = 0.0
            zb[i] = 0.0
            wv[i] = 0.0
        buf[1] -= vdot(eb, zb, BLOCK)  # U = e'y - e'mu
        buf[2] += vdot(wv, eb, BLOCK)  # Q = sum w e^2
        for c in range(q):
            if zc[c] == 0:  # the intercept
                for i in range(BLOCK):
                    zb[i] = 1.0
            else:
                z_src = XT[zc[c], d0:d0 + nb]
                for i in range(nb):
                    zb[i] = z_src[i]
            buf[3 + c] += vdot(wv, zb, BLOCK)  # S_c = sum w e z_c
        n_blocks += 1
        if n_blocks == SUPER or d0 + BLOCK >= n:
            for c in range(q + 3):
                out[c] += buf[c]
                buf[c] = 0.0
            n_blocks = 0
    out[0] = part
    out[1] += part


@njit(**KERNEL_OPTIONS)
def _gather_residual(resid, rows, cols, rp, cp, XT, y, ok_a, zc, valid, ebuf, part, tot):
    """Relabelled residual e_pi (layer ``resid`` (n, m)) into ``ebuf`` (0 where not
    valid), ``valid`` = ``ok_a`` and e_pi finite; in ``tot``: [Z'y (q), e_pi'y] over the
    valid dyads (``zc`` the q columns of Z in XT). ``part`` is scratch of tot's size.
    Returns (every dyad valid, max |e_pi|)."""
    n_dyads = rows.shape[0]
    q = zc.shape[0]
    gather_rows(resid, rows, cols, rp, cp, ebuf)
    for c in range(tot.shape[0]):
        part[c] = 0.0
        tot[c] = 0.0
    complete = True
    emax = 0.0
    for d in range(n_dyads):
        v = ebuf[d]
        ok = ok_a[d] and not np.isnan(v)
        valid[d] = ok
        if ok:
            yd = y[d]
            part[q] += v * yd  # e_pi'y
            for c in range(q):
                part[c] += XT[zc[c], d] * yd  # Z'y
            emax = max(emax, abs(v))
        else:
            complete = False
            ebuf[d] = 0.0
        if (d + 1) % BLOCK == 0:
            _flush(part, tot)
    _flush(part, tot)
    return complete, emax


@njit(**KERNEL_OPTIONS)
def refit_dsp(resid, rows, cols, row_perms, col_perms, XT, y, fixed_ok, design, xmax, emax,
              beta0, mu0, ties, cinv, out, passes, max_iter, tol, use_z):
    """DSP refits (Potter 2005): relabel the focal predictor's residual, refit.

    Parameters
    ----------
    resid : float64 (K, n, m)
        Residual matrix of each tested predictor on the other terms (NaN: missing).
    rows, cols, row_perms, col_perms : as in ``refit_y``.
    XT : float64 (P, N)
        Fixed design [1, x_1 .. x_k], one column per row (0 where missing); the relabelled
        residual is design column P.
    y : float64 (N,)
        The response.
    fixed_ok : bool (K, N)
        Dyads where y and the other terms of tested term a are observed.
    design : int64 (K, p)
        Columns of term a's fit: the other terms Z_a, then P (the relabelled residual).
    xmax : float64 (P,)
        max |x_c| of each fixed column over its observed dyads.
    emax : float64 (K,)
        max |e| of each residual matrix over the dyad set (complete data).
    beta0 : float64 (K, p)
        Warm start of each term's fit: its observed reduced fit, and 0 for the residual.
    mu0 : float64 (K, N), or (0, N) when some dyad is missing
        mu_a, the fitted probabilities of each observed reduced fit. With these (complete
        data) every dyad is valid, and at ``beta0`` the gradient is (0, U) and the
        information [[Z'WZ, S], [S', Q]] with U = e_pi'(y - mu), S = Z'W e_pi,
        Q = sum w e_pi^2 (w = mu (1 - mu)), summed right after e_pi is gathered, so the
        first Newton step needs no pass of its own: d_e = U / (Q - S'(Z'WZ)^-1 S),
        d_z = -(Z'WZ)^-1 S d_e.
    ties : int64 (T,)
        The dyads where y = 1 (complete data: e_pi'y is a sum over them).
    cinv : float64 (K, p - 1, p - 1)
        (Z_a'W_a Z_a)^-1 of each observed reduced fit (used with ``mu0``).
    out : float64 (B, K)
        Written: Wald z (``use_z``) or coefficient of the relabelled residual; NaN for a
        failed fit.
    passes : int64 (B,)
        Written: passes over the dyads of each relabelling, summed over the terms (the
        gather with its sums counts as one).
    """
    n_fixed, n_dyads = XT.shape
    n_terms = resid.shape[0]
    p = design.shape[1]
    q = p - 1
    complete_data = mu0.shape[0] == n_terms
    ebuf = np.empty(n_dyads)
    valid = np.ones(n_dyads, dtype=np.bool_)
    blk = np.empty((2 * p + 3, BLOCK))
    kb = np.empty(BLOCK, dtype=np.int64)
    acc = np.empty((p + 1) * p * ACC_LANES)
    state = np.empty((3 * p + 7, p))
    info = np.empty(INFO_SIZE)
    beta = np.empty(p)
    cov = np.empty((p, p))
    part = np.empty(p)
    xy = np.empty(p)
    zy = np.zeros((n_terms, q))
    xm = np.empty(p)
    start = np.empty(p)
    vecs = np.empty((3, BLOCK))
    buf = np.empty(q + 3)
    sums = np.empty(q + 3)  # [e'y, U, Q, S_0 .. S_(q-1)]
    if complete_data:  # Z'y is the same for every relabelling
        for a in range(n_terms):
            for c in range(q):
                col = XT[design[a, c]]
                s = 0.0
                for d in range(n_dyads):
                    s += col[d] * y[d]
                zy[a, c] = s
    for b in range(row_perms.shape[0]):
        rp = row_perms[b]
        cp = col_perms[b]
        passes[b] = 0
        for a in range(n_terms):
            zc = design[a, :q]
            for c in range(q):
                xm[c] = xmax[zc[c]]
            for c in range(p):
                start[c] = beta0[a, c]
            if complete_data:
                gather_rows(resid[a], rows, cols, rp, cp, ebuf)
                _block_dots(vecs, ebuf, mu0[a], ties, XT, zc, buf, sums)
                complete = True
                xm[q] = emax[a]
                for c in range(q):
                    xy[c] = zy[a, c]
                xy[q] = sums[0]
                u, qq = sums[1], sums[2]
                info_e = qq
                for r in range(q):
                    for c in range(q):
                        info_e -= sums[3 + r] * cinv[a, r, c] * sums[3 + c]
                if info_e > 0.0:
                    step_e = u / info_e
                    start[q] += step_e
                    for r in range(q):
                        for c in range(q):
                            start[r] -= cinv[a, r, c] * sums[3 + c] * step_e
            else:
                complete, e_max = _gather_residual(resid[a], rows, cols, rp, cp, XT, y,
                                                   fixed_ok[a], zc, valid, ebuf, part, xy)
                xm[q] = e_max
            status = newton_fit(XT, ebuf, design[a], p, xy, valid, complete, xm, start,
                                blk, kb, acc, state, beta, cov, info, max_iter, tol)
            passes[b] += 1 + int(info[INFO_PASSES])
            if status < 0:
                out[b, a] = np.nan
            elif use_z:
                out[b, a] = beta[q] / np.sqrt(cov[q, q])
            else:
                out[b, a] = beta[q]


@njit(**KERNEL_OPTIONS)
def score_dsp_refit(resid, rows, cols, row_perms, col_perms, XT, y, fixed_ok, zcols, xmax,
                    gamma0, out, passes, max_iter, tol):
    """DSP score statistics with missing dyads: the reduced model is refitted on each
    relabelling's dyad set (where y, Z_a and e_pi are observed), then scored.

    Parameters as in ``refit_dsp`` (``resid`` (K, n, m)); ``zcols`` (K, q) the
    reduced-model columns of XT, ``gamma0`` (K, q) their warm start; ``out`` (B, K)
    written (NaN: failed fit); ``passes`` (B,) written. The score is taken from the
    reduced fit's last pass, which sums the relabelled column too (``score_from_state``).
    """
    n_fixed, n_dyads = XT.shape
    n_terms = resid.shape[0]
    q = zcols.shape[1]
    qa = q + 1
    ebuf = np.empty(n_dyads)
    valid = np.empty(n_dyads, dtype=np.bool_)
    blk = np.empty((2 * qa + 3, BLOCK))
    kb = np.empty(BLOCK, dtype=np.int64)
    acc = np.empty((qa + 1) * qa * ACC_LANES)
    state = np.empty((3 * qa + 7, qa))
    info = np.empty(INFO_SIZE)
    gamma = np.empty(q)
    cinv = np.empty((q, q))
    part = np.empty(qa)
    xy = np.empty(qa)
    xm = np.empty(q)
    cols_a = np.empty(qa, dtype=np.int64)
    for b in range(row_perms.shape[0]):
        rp = row_perms[b]
        cp = col_perms[b]
        passes[b] = 0
        for a in range(n_terms):
            zc = zcols[a]
            complete, _ = _gather_residual(resid[a], rows, cols, rp, cp, XT, y, fixed_ok[a],
                                           zc, valid, ebuf, part, xy)
            for c in range(q):
                cols_a[c] = zc[c]
                xm[c] = xmax[zc[c]]
            cols_a[q] = n_fixed
            status = newton_fit(XT, ebuf, cols_a, q, xy, valid, complete, xm, gamma0[a], blk,
                                kb, acc, state, gamma, cinv, info, max_iter, tol)
            passes[b] += 1 + int(info[INFO_PASSES])
            out[b, a] = np.nan if status < 0 else score_from_state(state, q, qa, xy[q])


@njit(**KERNEL_OPTIONS)
def score_y(layer, rows, cols, row_perms, col_perms, XT, fixed_ok, xmax, zcols, gamma0,
            onestep, out, passes, max_iter, tol):
    """Y-permutation score statistics: the reduced model of term a (y_pi on Z_a) is
    refitted on each relabelling, then scored (from the fit's last pass, which sums
    term a's column too: ``score_from_state``).

    Parameters
    ----------
    layer, rows, cols, row_perms, col_perms, XT, fixed_ok, xmax : as in ``refit_y``.
    zcols : int64 (K, q)
        Columns of term a's reduced model; term a's own column is a + 1.
    gamma0 : float64 (K, q)
        Warm starts: the fit of the intercept alone with ``onestep``, else the observed
        reduced fits.
    onestep : float64 (K, q, q + 1), or (0, q, q + 1) when some dyad is missing
        [(w0 Z_a'Z_a)^-1 | mean(y) Z_a'1] of each term: the free first Newton step from
        the intercept-only fit (as in ``refit_y``).
    out : float64 (B, K)
        Written: the signed score statistics (NaN: failed reduced fit).
    passes : int64 (B,)
        Written: passes over the dyads of each relabelling.
    """
    p, n_dyads = XT.shape
    n_terms = zcols.shape[0]
    q = zcols.shape[1]
    qa = q + 1
    first_step = onestep.shape[0] == n_terms
    ext = np.empty(0)
    ybuf = np.empty(n_dyads)
    valid = np.empty(n_dyads, dtype=np.bool_)
    blk = np.empty((2 * qa + 3, BLOCK))
    kb = np.empty(BLOCK, dtype=np.int64)
    acc = np.empty((qa + 1) * qa * ACC_LANES)
    state = np.empty((3 * qa + 7, qa))
    info = np.empty(INFO_SIZE)
    gamma = np.empty(q)
    cinv = np.empty((q, q))
    part = np.empty(p)
    s = np.empty(p)
    xy = np.empty(qa)
    xm = np.empty(q)
    start = np.empty(q)
    cols_a = np.empty(qa, dtype=np.int64)
    for b in range(row_perms.shape[0]):
        complete = _gather_response(layer, rows, cols, row_perms[b], col_perms[b], XT,
                                    fixed_ok, ybuf, valid, part, s)
        passes[b] = 1
        for a in range(n_terms):
            for c in range(q):
                cols_a[c] = zcols[a, c]
                xy[c] = s[zcols[a, c]]
                xm[c] = xmax[zcols[a, c]]
            cols_a[q] = a + 1
            xy[q] = s[a + 1]
            for c in range(q):
                start[c] = gamma0[a, c]
                if first_step:
                    for e in range(q):
                        start[c] += onestep[a, c, e] * (xy[e] - onestep[a, e, q])
            status = newton_fit(XT, ext, cols_a, q, xy, valid, complete, xm, start, blk, kb,
                                acc, state, gamma, cinv, info, max_iter, tol)
            passes[b] += int(info[INFO_PASSES])
            out[b, a] = np.nan if status < 0 else score_from_state(state, q, qa, xy[q])


# --- scheme y with complete data: the fits from moments of the design -----------------------
# With every dyad observed, a Y-permutation fit depends on the relabelled response only
# through S = X'y_pi (the canonical link's sufficient statistic); everything else is a
# function of the coefficients over the fixed design. Expanding the logistic function
# about the intercept b_0, with u_d = x~_d'b~ (x~ the k predictors, b~ their coefficients),
#
#     sum_d x_d sigma(b_0 + u_d) = sum_j a_j(b_0) sum_d x_d u_d^j,
#     sum_d x_d x_d' w(b_0 + u_d) = sum_j (j + 1) a_(j+1)(b_0) sum_d x_d x_d' u_d^j,
#
# a_j(eta) = sigma^(j)(eta) / j!, and sum_d x_d u_d^j is a contraction of the moments
# m_alpha = sum_d prod_c x~_dc^alpha_c of the design with b~: X'mu and X'WX cost a few
# thousand multiply-adds per Newton step instead of a pass over the dyads. sigma has poles
# at i pi (2m + 1), residue 1 (sigma - 1/2 = sum_m 2z / (z^2 + pi^2 (2m + 1)^2)), so
# |a_j(eta)| <= 2 sum_m rho_m^-(j+1), rho_m = |eta + i pi (2m + 1)|, and truncating the
# series after degree D leaves, per dyad, at most
#
#     tail_mu = 2 sum_m (U / rho_m)^(D+1) / (rho_m (1 - U / rho_m)),
#     tail_w  = 2 sum_m (U / rho_m)^(D+1) ((D + 2) - (D + 1) U / rho_m)
#                       / (rho_m^2 (1 - U / rho_m)^2),
#
# with U = sum_c |b~_c| xmax_c >= max_d |u_d|. Every evaluation checks that both are below
# SERIES_REL w(b_0) (the rounding of mu in a pass); if not, that relabelling is refitted by
# passes over the dyads (``newton_fit``), so a statistic never depends on a truncation.

# Poles of sigma summed in the tail bound (the rest adds less than 1e-30 when U < 100).
SERIES_POLES = 64
# Truncation allowed per dyad, relative to w(b_0).
SERIES_REL = 2.0 ** -52
# Dyads per block in ``series_moments``.
SERIES_BLOCK = 32
# Return code of ``series_fit``: a truncation bound failed; refit by passes over the dyads.
SERIES_FALLBACK = -6


def monomial_tables(k, degree):
    """Monomials of k variables of degree <= ``degree`` in graded order (degree, then
    lexicographic in the exponents, first variable highest), as arrays for the kernels:

    expo (n, k) exponents; deg (n,); parent (n,) and pvar (n,): monomial a is monomial
    parent[a] times variable pvar[a] (its first variable with a positive exponent; -1 for
    the constant); mult (n,) the multinomial coefficient |a|! / prod a_c!; up1 (n, k)
    position of a + e_c and up2 (n, k (k + 1) / 2) of a + e_c + e_c' (c <= c'), or -1
    past ``degree``.
    """
    import itertools
    import math

    expo = []
    for dg in range(degree + 1):
        level = [a for a in itertools.product(range(dg, -1, -1), repeat=k) if sum(a) == dg]
        expo.extend(sorted(level, reverse=True))
    index = {a: i for i, a in enumerate(expo)}
    n = len(expo)
    deg = np.array([sum(a) for a in expo], dtype=np.int64)
    parent = np.full(n, -1, dtype=np.int64)
    pvar = np.full(n, -1, dtype=np.int64)
    mult = np.empty(n)
    up1 = np.full((n, k), -1, dtype=np.int64)
    up2 = np.full((n, k * (k + 1) // 2), -1, dtype=np.int64)
    for i, a in enumerate(expo):
        mult[i] = math.factorial(sum(a)) / math.prod(math.factorial(e) for e in a)
        if i:
            c = next(c for c in range(k) if a[c] > 0)
            parent[i] = index[a[:c] + (a[c] - 1,) + a[c + 1:]]
            pvar[i] = c
        t = 0
        for c in range(k):
            b = a[:c] + (a[c] + 1,) + a[c + 1:]
            up1[i, c] = index.get(b, -1)
            for c2 in range(c, k):
                b2 = b[:c2] + (b[c2] + 1,) + b[c2 + 1:]
                up2[i, t] = index.get(b2, -1)
                t += 1
    return dict(expo=np.array(expo, dtype=np.int64).reshape(n, k), deg=deg, parent=parent,
                pvar=pvar, mult=mult, up1=up1, up2=up2)


@njit(**KERNEL_OPTIONS)
def series_moments(XT, parent, pvar, out):
    """Moments of the predictors: out[a] = sum_d prod_c x_dc^expo[a, c] over the dyads.

    Parameters
    ----------
    XT : float64 (k + 1, N)
        The design, intercept first (row 0 is not read); rows 1..k the predictors.
    parent, pvar : int64 (n,)
        ``monomial_tables``: monomial a = monomial parent[a] * x_(pvar[a]).
    out : float64 (n,)
        Written. Sums in three levels as in ``newton_pass`` (lanes of a block of
        SERIES_BLOCK dyads, super-blocks, the total).
    """
    n_mono = parent.shape[0]
    n = XT.shape[1]
    vals = np.empty((n_mono, SERIES_BLOCK))
    ones = np.ones(SERIES_BLOCK)
    acc = np.zeros(n_mono)
    for a in range(n_mono):
        out[a] = 0.0
    n_blocks = 0
    for d0 in range(0, n, SERIES_BLOCK):
        nb = min(SERIES_BLOCK, n - d0)
        v0 = vals[0]
        for i in range(SERIES_BLOCK):
            v0[i] = 1.0 if i < nb else 0.0
        for a in range(1, n_mono):
            src = vals[parent[a]]
            dst = vals[a]
            x = XT[1 + pvar[a], d0:d0 + nb]
            for i in range(nb):
                dst[i] = src[i] * x[i]  # x^a = x^parent * x_c
            for i in range(nb, SERIES_BLOCK):
                dst[i] = 0.0
        for a in range(n_mono):
            acc[a] += vdot(vals[a], ones, SERIES_BLOCK)
        n_blocks += 1
        if n_blocks == SUPER or d0 + SERIES_BLOCK >= n:
            for a in range(n_mono):
                out[a] += acc[a]
                acc[a] = 0.0
            n_blocks = 0


@njit(**KERNEL_OPTIONS)
def logistic_taylor(eta, out):
    """out[j] = sigma^(j)(eta) / j! for j < out.shape[0]: the Taylor coefficients of the
    logistic function at eta.

    For eta <= 0, with t = e^eta, sigma(eta + u) = E / (1 + E), E(u) = t e^u: the
    coefficients of E are t / j!, and sigma (1 + E) = E gives
    s_j = (t / j! - sum_(i=1..j) (t / i!) s_(j-i)) / (1 + t). For eta > 0,
    sigma(eta + u) = 1 - sigma(-eta - u).
    """
    n = out.shape[0]
    t = np.exp(-abs(eta))
    fact = 1.0
    for j in range(n):
        if j > 0:
            fact *= j
        s = t / fact
        ifact = 1.0
        for i in range(1, j + 1):
            ifact *= i
            s -= (t / ifact) * out[j - i]
        out[j] = s / (1.0 + t)
    if eta > 0.0:
        out[0] = 1.0 - out[0]
        for j in range(1, n):
            out[j] = -out[j] if j % 2 == 0 else out[j]


@njit(**KERNEL_OPTIONS)
def series_tail(eta, U, D):
    """(tail_mu, tail_w): bounds on the truncation of the series after degree D, per dyad,
    for |u_d| <= U (see the section comment); inf when U reaches the radius."""
    tg = 0.0
    th = 0.0
    for m in range(SERIES_POLES):
        im = np.pi * (2 * m + 1)
        rho = np.sqrt(eta * eta + im * im)
        r = U / rho
        if r >= 1.0:
            return np.inf, np.inf
        rd = r ** (D + 1)
        tg += 2.0 * rd / (rho * (1.0 - r))
        th += 2.0 * rd * ((D + 2) - (D + 1) * r) / (rho * rho * (1.0 - r) * (1.0 - r))
    return tg, th


@njit(**KERNEL_OPTIONS)
def series_sums(mom, deg, parent, pvar, mult, up1, up2, n_alpha, coef, b, pw, F, H):
    """X'mu and X'WX at the coefficients b (p = k + 1, intercept first) from the moments.

    With a_j = ``coef`` [sigma^(j)(b_0) / j!] and, for each monomial alpha of degree
    j <= D (the first ``n_alpha`` of the tables), c_alpha = mult_alpha b~^alpha:
    F_0 = sum a_j c_alpha m_alpha, F_c = sum a_j c_alpha m_(alpha + e_c),
    H_00 = sum (j + 1) a_(j+1) c_alpha m_alpha, H_0c and H_cc' alike with
    m_(alpha + e_c), m_(alpha + e_c + e_c'). ``pw`` (n_alpha,) scratch.
    """
    p = F.shape[0]
    k = p - 1
    for r in range(p):
        F[r] = 0.0
        for c in range(p):
            H[r, c] = 0.0
    for a in range(n_alpha):
        if a == 0:
            pw[0] = 1.0
        else:
            pw[a] = pw[parent[a]] * b[1 + pvar[a]]  # b~^alpha
        j = deg[a]
        base = mult[a] * pw[a]
        wg = coef[j] * base
        wh = (j + 1) * coef[j + 1] * base
        m0 = mom[a]
        F[0] += wg * m0
        H[0, 0] += wh * m0
        t = 0
        for c in range(k):
            m1 = mom[up1[a, c]]
            F[1 + c] += wg * m1
            H[0, 1 + c] += wh * m1
            for c2 in range(c, k):
                H[1 + c, 1 + c2] += wh * mom[up2[a, t]]
                t += 1
    for r in range(p):
        for c in range(r):
            H[r, c] = H[c, r]


@njit(**KERNEL_OPTIONS)
def _series_eval(mom, tables_deg, parent, pvar, mult, up1, up2, n_alpha, D, xmax, b, coef,
                 pw, F, H):
    """``series_sums`` at b after the tail check; False when the truncation bound fails."""
    U = 0.0
    for c in range(1, b.shape[0]):
        U += abs(b[c]) * xmax[c]
    eta = b[0]
    if not np.isfinite(U) or not np.isfinite(eta):
        return False
    tg, th = series_tail(eta, U, D)
    t = np.exp(-abs(eta))
    w0 = t / ((1.0 + t) * (1.0 + t))
    if not (tg <= SERIES_REL * w0) or not (th <= SERIES_REL * w0):
        return False
    logistic_taylor(eta, coef)
    series_sums(mom, tables_deg, parent, pvar, mult, up1, up2, n_alpha, coef, b, pw, F, H)
    return True


def series_workspace(p):
    """Shape of the ``state`` workspace of ``series_fit`` for p design columns."""
    return (4 * p + 6, p)


@njit(**KERNEL_OPTIONS)
def series_fit(S, cols, mom, deg, parent, pvar, mult, up1, up2, n_alpha, D, xmax, beta0,
               coefs, pw, state, max_iter, tol):
    """Newton's method for the model on the design columns ``cols`` (intercept first) of a
    complete-data Y-permutation fit, X'mu and X'WX from the moments (``series_sums``).

    Parameters
    ----------
    S : float64 (p,)
        X'y_pi of all p design columns.
    cols : int64 (q,)
        The model's columns (0 first); the other coefficients are 0.
    mom, deg, parent, pvar, mult, up1, up2 : ``series_moments`` and ``monomial_tables``
        (degree D + 2); n_alpha monomials of degree <= D.
    xmax : float64 (p,)
        max |x_c| over the dyads.
    beta0 : float64 (q,)
        Start.
    coefs : float64 (D + 2,); pw : float64 (n_alpha,); state : ``series_workspace(p)``
        Workspaces. On return (converged) ``state`` holds H = X'WX (rows 0..p-1) and
        F = X'mu (row 4p + 2) at the estimate (row 4p), and in rows 3p..4p-1 the Cholesky
        factor of H[cols][:, cols].

    The steps, their acceptance and convergence are those of ``newton_fit`` (module
    docstring); the estimate is b + d, where X'mu and X'WX are evaluated once more (so
    the Wald covariance and the score are exact there).

    Returns the Newton steps (>= 1), SERIES_FALLBACK when a truncation bound failed (the
    caller refits by passes), or a negative FAIL_* code.
    """
    p = S.shape[0]
    q = cols.shape[0]
    H = state[0:p]
    Ht = state[p:2 * p]
    Hq = state[2 * p:3 * p]
    L = state[3 * p:4 * p]
    b = state[4 * p]
    trial = state[4 * p + 1]
    F = state[4 * p + 2]
    Ft = state[4 * p + 3]
    g = state[4 * p + 4]
    d = state[4 * p + 5]
    for c in range(p):
        b[c] = 0.0
    for c in range(q):
        b[cols[c]] = beta0[c]
    if not _series_eval(mom, deg, parent, pvar, mult, up1, up2, n_alpha, D, xmax, b, coefs,
                        pw, F, H):
        return SERIES_FALLBACK
    for it in range(1, max_iter + 1):
        for r in range(q):
            g[r] = S[cols[r]] - F[cols[r]]  # g = X'(y - mu)
            for c in range(q):
                Hq[r, c] = H[cols[r], cols[c]]
        if not _cholesky(Hq, L, q):
            return FAIL_SINGULAR
        _cholesky_solve(L, g, d, q)
        move = 0.0
        for c in range(q):
            move += abs(d[c]) * xmax[cols[c]]
        if move <= tol:
            for c in range(q):
                b[cols[c]] += d[c]
            if not _series_eval(mom, deg, parent, pvar, mult, up1, up2, n_alpha, D, xmax, b,
                                coefs, pw, F, H):
                return SERIES_FALLBACK
            for r in range(q):
                for c in range(q):
                    Hq[r, c] = H[cols[r], cols[c]]
            if not _cholesky(Hq, L, q):
                return FAIL_SINGULAR
            return it
        s = 1.0
        accepted = False
        for _ in range(MAX_HALVINGS + 1):
            sm = s * move
            certified = s * _h_bound(sm) < 1.0
            for c in range(p):
                trial[c] = b[c]
            for c in range(q):
                trial[cols[c]] += s * d[c]
            if not _series_eval(mom, deg, parent, pvar, mult, up1, up2, n_alpha, D, xmax,
                                trial, coefs, pw, Ft, Ht):
                return SERIES_FALLBACK
            if not certified:
                dhd = 0.0
                dg = 0.0
                for r in range(q):
                    dg += d[r] * (S[cols[r]] - Ft[cols[r]])
                    hr = 0.0
                    for c in range(q):
                        hr += Ht[cols[r], cols[c]] * d[c]
                    dhd += d[r] * hr
                certified = s * dhd * _k_bound(sm) + dg > 0.0
            if certified:
                accepted = True
                break
            s *= 0.5
        if not accepted:
            return FAIL_STEP
        for r in range(p):
            b[r] = trial[r]
            F[r] = Ft[r]
            for c in range(p):
                H[r, c] = Ht[r, c]
    return FAIL_ITERATIONS


@njit(**KERNEL_OPTIONS)
def series_y(S, XT, mom, deg, parent, pvar, mult, up1, up2, n_alpha, D, xmax, beta0, onestep,
             zcols, out, passes, max_iter, tol, use_z):
    """Y-permutation statistics with complete data from X'y_pi (``series_fit``), with a
    refit by passes over the dyads (``newton_fit``) for a relabelling whose series bound
    fails.

    Parameters
    ----------
    S : float64 (B, p)
        X'y_pi of each relabelling (the linear engine's ``gather_cross``).
    XT : float64 (p, N)
        The design (for the refits by passes).
    mom .. D : see ``series_fit``.
    xmax : float64 (p,)
        max |x_c| over the dyads.
    beta0 : float64 (p,)
        The fit of the intercept alone, (logit(mean y), 0, ..): every fit starts there
        (reduced models at its first q entries).
    onestep : float64 (1, p, p + 1) or, with ``zcols``, (K, q, q + 1)
        The free first Newton step from beta0 of the refits by passes (as in ``refit_y``
        and ``score_y``), of the full model or of each reduced model.
    zcols : int64 (K, q), or (0, q) for the full model
        Score statistics: columns of term a's reduced model (term a's column is a + 1).
    out : float64 (B, p - 1) or (B, K)
        Written: Wald z (``use_z``) or coefficients of the full model's predictors, or the
        signed score statistics (Rao 1948) of the terms; NaN for a failed fit.
    passes : int64 (B,)
        Written: passes over the dyads (1, the gather, plus those of refits by passes).
    """
    n_perm, p = S.shape
    n_dyads = XT.shape[1]
    n_terms = zcols.shape[0]
    score = n_terms > 0
    q = zcols.shape[1] if score else p
    qa = q + 1 if score else p
    state = np.empty((4 * p + 6, p))
    coefs = np.empty(D + 2)
    pw = np.empty(n_alpha)
    cov = np.empty((q, q))
    tmp = np.empty(p)
    vec = np.empty(p)
    valid = np.ones(n_dyads, dtype=np.bool_)
    ext = np.empty(0)
    blk = np.empty((2 * qa + 3, BLOCK))
    kb = np.empty(BLOCK, dtype=np.int64)
    acc = np.empty((qa + 1) * qa * ACC_LANES)
    pstate = np.empty((3 * qa + 7, qa))
    info = np.empty(INFO_SIZE)
    beta = np.empty(q)
    start = np.empty(q)
    xy = np.empty(qa)
    xm = np.empty(q)
    cols = np.empty(qa, dtype=np.int64)
    L = state[3 * p:4 * p]
    H = state[0:p]
    F = state[4 * p + 2]
    est = state[4 * p]
    for b in range(n_perm):
        Sb = S[b]
        passes[b] = 1
        for a in range(max(n_terms, 1)):
            for c in range(q):
                cols[c] = zcols[a, c] if score else c
            if score:
                cols[q] = a + 1
            status = series_fit(Sb, cols[:q], mom, deg, parent, pvar, mult, up1, up2,
                                n_alpha, D, xmax, beta0[:q], coefs, pw, state, max_iter, tol)
            if status == SERIES_FALLBACK:
                # refit by passes over the dyads, from beta0 and its free first step
                for c in range(qa):
                    xy[c] = Sb[cols[c]]
                for c in range(q):
                    xm[c] = xmax[cols[c]]
                    start[c] = beta0[c]
                    for e in range(q):
                        start[c] += onestep[a, c, e] * (xy[e] - onestep[a, e, q])
                st = newton_fit(XT, ext, cols[:qa], q, xy, valid, True, xm, start, blk, kb,
                                acc, pstate, beta, cov, info, max_iter, tol)
                passes[b] += int(info[INFO_PASSES])
                if score:
                    out[b, a] = np.nan if st < 0 else score_from_state(pstate, q, qa, xy[q])
                else:
                    for j in range(1, p):
                        out[b, j - 1] = (np.nan if st < 0 else
                                         beta[j] / np.sqrt(cov[j, j]) if use_z else beta[j])
                continue
            if status < 0:
                if score:
                    out[b, a] = np.nan
                else:
                    for j in range(1, p):
                        out[b, j - 1] = np.nan
                continue
            if score:
                # U = x'(y - mu), I = x'Wx - x'WZ (Z'WZ)^-1 Z'Wx at the reduced estimate
                x = a + 1
                u = Sb[x] - F[x]
                for c in range(q):
                    vec[c] = H[x, cols[c]]
                _cholesky_solve(L, vec, tmp, q)
                quad = 0.0
                for c in range(q):
                    quad += vec[c] * tmp[c]
                info_x = H[x, x] - quad
                if not (info_x > SINGULAR_PIVOT * H[x, x]) or not (info_x > 0.0):
                    out[b, a] = np.nan
                else:
                    out[b, a] = u / np.sqrt(info_x)
            else:
                _cholesky_inverse(L, tmp, cov, q)
                for j in range(1, p):
                    out[b, j - 1] = est[j] / np.sqrt(cov[j, j]) if use_z else est[j]


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
