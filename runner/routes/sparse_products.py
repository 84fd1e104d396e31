"""Fixed products, the y-scheme statistics and the observed fit of the sparse path.

Everything in a sparse problem's Gram matrix that no relabelling changes comes from
closed forms over the dyad set (``fixed_products``): the predictors' means over D and
their centred cross products X~'X~ (sums over groups of equal values for ``same``; sorted
prefix sums for ``gap``; a Fenwick tree for ``gap`` x ``gap``; separable sums for
``sender``, ``receiver`` and ``pair_sum``; sums over a sparse predictor's edges), and the
response's sum and sum of squares. One-mode problems only; two-mode problems take their
fixed products from the relabelled-by-fixed sums at the identity
(``sparse_schemes.pair_moments``).

The Y-permutation statistics of one-mode problems (``SparsePlan``, ``build_sparse_plan``)
relabel the response over its edges (``kernels.sparse.sparse_cross``); see
``dyadperm.routes.sparse`` for the method. The observed fit (``observed_fit_sparse``) is
solved from the standardised X'X and X'y of any of the route's plans by the normal
equations.

Both ``routes.sparse`` (the route) and ``routes.sparse_schemes`` (dsp and Freedman–Lane)
build on this module.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np

from ..errors import InputError
from ..inputs.design import ObservedFit, check_design, check_response, warn_condition
from ..inputs.sparse import Edges, SparsePrepared, Term
from ..kernels.options import FIT_PIVOT
from ..kernels.sparse import (GAP, NETWORK, PAIR_SUM, RECEIVER, SAME, SENDER, gap_gap_sum,
                              sparse_cross)
from ..kernels.stats import NO_ROWS, correlation_stats, fill_gram, regression_stats



# --- closed forms over the dyad set ----------------------------------------------------------
def _form(term: Term | None, s: int, e: int):
    """A derived predictor on nodes s..e-1 as ('sep', [(f, g)...]), ('same', codes) or
    ('gap', a); x(i, j) = sum of f(i) g(j) for 'sep'. ``None`` is the constant 1."""
    one = np.ones(e - s)
    if term is None:
        return ("sep", [(one, one)])
    a = term.attr[s:e]
    if term.kind == SAME:
        return ("same", a.astype(np.int64))
    if term.kind == GAP:
        return ("gap", a)
    if term.kind == SENDER:
        return ("sep", [(a, one)])
    if term.kind == RECEIVER:
        return ("sep", [(one, a)])
    return ("sep", [(a, one), (one, a)])  # pair_sum


def _gap_weighted(a: np.ndarray, g: np.ndarray) -> np.ndarray:
    """h_i = sum_j |a_i - a_j| g_j, by sorting a and prefix sums (ties contribute 0)."""
    n = a.shape[0]
    o = np.argsort(a, kind="stable")
    a_s, g_s = a[o], g[o]
    pg = np.concatenate([[0.0], np.cumsum(g_s)])
    pag = np.concatenate([[0.0], np.cumsum(a_s * g_s)])
    r = np.arange(n)
    below_g, above_g = pg[r], pg[n] - pg[r + 1]
    below_ag, above_ag = pag[r], pag[n] - pag[r + 1]
    h = np.empty(n)
    # sum_{j below} (a_i - a_j) g_j + sum_{j above} (a_j - a_i) g_j
    h[o] = a_s * (below_g - above_g) - (below_ag - above_ag)
    return h


def _gap_within(a: np.ndarray, codes: np.ndarray) -> float:
    """sum over ordered pairs i != j with equal codes of |a_i - a_j|."""
    o = np.lexsort((a, codes))
    a_s, c_s = a[o], codes[o]
    starts = np.concatenate([[0], np.flatnonzero(np.diff(c_s)) + 1])
    first = np.repeat(starts, np.diff(np.concatenate([starts, [a_s.shape[0]]])))
    csum = np.concatenate([[0.0], np.cumsum(a_s)])
    idx = np.arange(a_s.shape[0])
    before = idx - first  # nodes of the same group earlier in sorted order
    # sum over earlier j in the group of (a_i - a_j)
    return 2.0 * float((a_s * before - (csum[idx] - csum[first])).sum())


def _pair_total(p, q) -> float:
    """sum over ordered pairs i != j of p(i, j) q(i, j) for two forms of ``_form``."""
    rank = {"same": 0, "gap": 1, "sep": 2}
    if rank[p[0]] > rank[q[0]]:
        p, q = q, p
    kp, kq = p[0], q[0]
    if kp == "sep":
        # sum_{i != j} f1 g1 f2 g2 = (sum f1 f2)(sum g1 g2) - sum f1 f2 g1 g2
        return float(sum((f1 * f2).sum() * (g1 * g2).sum() - (f1 * f2 * g1 * g2).sum()
                         for f1, g1 in p[1] for f2, g2 in q[1]))
    if kp == "same" and kq == "sep":
        c = p[1]
        size = int(c.max()) + 1 if c.size else 0
        # sum_groups (sum f)(sum g) - sum_i f_i g_i
        return float(sum((np.bincount(c, f, size) * np.bincount(c, g, size)).sum()
                         - (f * g).sum() for f, g in q[1]))
    if kp == "same" and kq == "same":
        c1, c2 = p[1], q[1]
        joint = c1 * (int(c2.max()) + 1 if c2.size else 1) + c2
        cnt = np.unique(joint, return_counts=True)[1].astype(np.float64)
        return float((cnt * cnt).sum() - c1.shape[0])  # sum over joint groups c (c - 1)
    if kp == "same" and kq == "gap":
        return _gap_within(q[1], p[1])
    if kp == "gap" and kq == "sep":
        return float(sum((f * _gap_weighted(p[1], g)).sum() for f, g in q[1]))
    return 2.0 * float(gap_gap_sum(p[1], q[1]))  # gap x gap


def eval_derived(term: Term, i: np.ndarray, j: np.ndarray) -> np.ndarray:
    """Values of a derived predictor (internal units) at dyads (i, j)."""
    a = term.attr
    if term.kind == SAME:
        return (a[i] == a[j]).astype(np.float64)
    if term.kind == GAP:
        return np.abs(a[i] - a[j])
    if term.kind == SENDER:
        return a[i].copy()
    if term.kind == RECEIVER:
        return a[j].copy()
    return a[i] + a[j]


def _edge_keys(ed: Edges, n: int) -> np.ndarray:
    return ed.src * n + ed.dst


def _cross_sum(prep: SparsePrepared, s: Term | None, t: Term | None) -> float:
    """sum over D of s * t (None: the constant 1), by closed forms or sums over edges."""
    nets = [u for u in (s, t) if u is not None and u.kind == NETWORK]
    if len(nets) == 2:
        ka, kb = _edge_keys(s.edges, prep.n), _edge_keys(t.edges, prep.n)
        _, ia, ib = np.intersect1d(ka, kb, assume_unique=True, return_indices=True)
        return float((s.edges.w[ia] * t.edges.w[ib]).sum())
    if len(nets) == 1:
        net = nets[0]
        other = t if net is s else s
        if other is None:
            return float(net.edges.w.sum())
        return float((net.edges.w * eval_derived(other, net.edges.src, net.edges.dst)).sum())
    total = sum(_pair_total(_form(s, a, b), _form(t, a, b)) for a, b in prep.ranges)
    return total if prep.directed else total / 2.0  # symmetric: each pair i < j counted twice


@dataclass(frozen=True)
class Moments:
    """Means over D (internal units), centred cross products X~'X~ and y's sums."""

    mean: np.ndarray  # (k,)
    cross: np.ndarray  # (k, k)
    y_sum: float
    y_sq: float


def fixed_products(prep: SparsePrepared, y: Edges | None = None) -> Moments:
    """Everything in the Gram matrix that no relabelling changes."""
    y = prep.y if y is None else y
    k = prep.k
    N = prep.n_dyads
    mean = np.array([_cross_sum(prep, t, None) for t in prep.terms]) / N
    cross = np.empty((k, k))
    for c in range(k):
        for d in range(c + 1):
            # centred: sum (x_c - m_c)(x_d - m_d) = sum x_c x_d - N m_c m_d
            v = _cross_sum(prep, prep.terms[c], prep.terms[d]) - N * mean[c] * mean[d]
            cross[c, d] = cross[d, c] = v
    return Moments(mean, cross, float(y.w.sum()), float((y.w * y.w).sum()))


# --- the plan the engine runs ---------------------------------------------------------------
def _row_tables(terms: Sequence[Term], n: int, undirected: bool):
    """The network predictors by rows: (nptr (S, n + 1), nidx, nval), see kernels.sparse."""
    nets = [t for t in terms if t.kind == NETWORK]
    nptr = np.zeros((max(len(nets), 1), n + 1), dtype=np.int64)
    idx, val = [], []
    offset = 0
    for s, t in enumerate(nets):
        i, j, w = t.edges.src, t.edges.dst, t.edges.w
        if undirected:  # both orientations, so a row holds every neighbour
            i, j, w = np.concatenate([i, j]), np.concatenate([j, i]), np.concatenate([w, w])
        o = np.lexsort((j, i))
        nptr[s, 1:] = offset + np.cumsum(np.bincount(i, minlength=n))
        nptr[s, 0] = offset
        idx.append(j[o])
        val.append(w[o])
        offset += i.shape[0]
    nidx = np.concatenate(idx) if idx else np.zeros(1, dtype=np.int64)
    nval = np.concatenate(val) if val else np.zeros(1)
    return nptr, np.ascontiguousarray(nidx, dtype=np.int64), np.ascontiguousarray(nval)


@dataclass(frozen=True, eq=False)
class SparsePlan:
    """The kernel side of the y scheme's ``routes.plan.Plan``: ``statistics`` and ``k``."""

    edges: Edges
    strength: np.ndarray  # (n, 2) sums of edge values by source node and by target node
    n_edge_cols: int  # attribute columns of same/gap (first in ``attr``)
    kinds: np.ndarray
    cols: np.ndarray
    center: np.ndarray
    slots: np.ndarray
    attr: np.ndarray
    nptr: np.ndarray
    nidx: np.ndarray
    nval: np.ndarray
    invert: bool
    inv_scale: np.ndarray  # (k,) 1 / (sd_y sd_x_c): raw centred cross -> standardised
    gram0: np.ndarray  # (d, d) standardised Gram without the relabelled-by-fixed block
    transforms: np.ndarray
    scale: np.ndarray  # (k,) 1 for t; sd_y / sd_x_c takes a coefficient to user units
    use_t: bool
    correlation: bool
    k: int
    n_dyads: int

    def cross(self, perms: np.ndarray) -> np.ndarray:
        """Centred cross products (B, k) of the relabelled network with each predictor."""
        out = np.empty((perms.shape[0], self.kinds.shape[0]))
        sparse_cross(self.edges.src, self.edges.dst, self.edges.w, self.strength, perms,
                     self.kinds, self.cols, self.center, self.slots, self.attr, self.nptr,
                     self.nidx, self.nval, out, self.invert, self.n_edge_cols)
        return out

    def observed_products(self) -> tuple[np.ndarray, np.ndarray]:
        """Standardised X'X (k, k) and X'y (k,) of the observed data (the identity)."""
        ident = np.arange(self.strength.shape[0], dtype=np.int64)[None, :]
        return self.gram0[2:, 2:], self.cross(ident)[0] * self.inv_scale

    def statistics(self, row_perms: np.ndarray, col_perms: np.ndarray) -> np.ndarray:
        """Statistics (B, k) of the relabellings (one-mode: ``col_perms`` is ``row_perms``)."""
        n_perm = row_perms.shape[0]
        cross = self.cross(row_perms) * self.inv_scale
        d = self.gram0.shape[0]
        gram = np.empty((n_perm, d, d))
        fill_gram(cross.reshape(n_perm, 1, -1), self.gram0, gram)
        if self.correlation:
            r = np.empty(n_perm)
            correlation_stats(gram, r)
            return r[:, None]
        out = np.empty((n_perm, self.k))
        regression_stats(gram, self.transforms, self.scale, self.use_t, out, NO_ROWS)
        return out


def y_transforms(k: int) -> np.ndarray:
    """The y-scheme map of ``schemes.build_plan``: v = [1, y, x_1..x_k] -> for term j the
    columns [1, other x's, x_j, y]."""
    transforms = np.zeros((k, k + 2, k + 2))
    for j in range(k):
        cols = [0] + [2 + c for c in range(k) if c != j] + [2 + j, 1]
        for col, row in enumerate(cols):
            transforms[j, row, col] = 1.0
    return transforms


def _response_sd(name: str, N: int, y_sum: float, y_sq: float) -> tuple[float, float]:
    mean = y_sum / N
    var = y_sq / N - mean * mean
    if not var > 0.0:
        raise InputError(f"response {name!r} has no variation over the dyad set")
    return mean, float(np.sqrt(var))


def _check_collinear(prep: SparsePrepared, mom: Moments) -> tuple[float, np.ndarray]:
    """The one rule of every route (``design.check_design``) on the closed-form cross
    products; returns the condition number of the standardised predictors and the factor.

    The factor F'F = X~'X~ comes from the eigen decomposition of the centred cross products
    (which never fails, so a singular design is named, not a failed factorisation); the
    norms before centring from the predictors' means.
    """
    C = mom.cross
    w, V = np.linalg.eigh(C)
    factor = np.sqrt(np.clip(w, 0.0, None))[:, None] * V.T
    user_mean = mom.mean + np.array([t.shift for t in prep.terms])
    raw = np.sqrt(np.clip(np.diag(C), 0.0, None) + prep.n_dyads * user_mean ** 2)
    return check_design(factor, prep.names, pivot=FIT_PIVOT, raw_norms=raw), factor


def build_sparse_plan(prep: SparsePrepared, mom: Moments, y_sd: float, *, statistic: str,
                      correlation: bool = False, edges: Edges | None = None) -> SparsePlan:
    """Kernel inputs, standardised invariant Gram and transforms of the sparse path."""
    k = prep.k
    N = float(prep.n_dyads)
    sx = np.sqrt(np.diag(mom.cross) / N)
    derived = [t for t in prep.terms if t.kind != NETWORK]
    attr = np.zeros((prep.n, max(len(derived), 1)))
    kinds = np.empty(k, dtype=np.int64)
    cols = np.zeros(k, dtype=np.int64)
    slots = np.zeros(k, dtype=np.int64)
    slot = 0
    # same/gap columns first: the kernel copies them relabelled for its edge loop
    on_edges = [c for c, t in enumerate(prep.terms) if t.kind in (SAME, GAP)]
    on_nodes = [c for c, t in enumerate(prep.terms) if t.kind in (SENDER, RECEIVER, PAIR_SUM)]
    for col, c in enumerate(on_edges + on_nodes):
        attr[:, col] = prep.terms[c].attr
        cols[c] = col
    for c, t in enumerate(prep.terms):
        kinds[c] = t.kind
        if t.kind == NETWORK:
            slots[c] = slot
            slot += 1
    nptr, nidx, nval = _row_tables(prep.terms, prep.n, not prep.directed)
    d = k + 2
    gram0 = np.zeros((d, d))
    gram0[0, 0] = N
    gram0[1, 1] = N  # sum of the standardised response's squares
    gram0[2:, 2:] = mom.cross / np.outer(sx, sx)
    edges = prep.y if edges is None else edges
    strength = np.stack([np.bincount(edges.src, edges.w, prep.n),
                         np.bincount(edges.dst, edges.w, prep.n)], axis=1)
    return SparsePlan(
        edges=edges, strength=strength, n_edge_cols=len(on_edges), kinds=kinds, cols=cols,
        center=np.ascontiguousarray(mom.mean), slots=slots, attr=attr, nptr=nptr, nidx=nidx,
        nval=nval, invert=not correlation,
        inv_scale=1.0 / (y_sd * sx), gram0=gram0, transforms=y_transforms(k),
        scale=np.ones(k) if statistic == "t" else y_sd / sx, use_t=statistic == "t",
        correlation=correlation, k=k, n_dyads=prep.n_dyads)


def observed_fit_sparse(prep: SparsePrepared, mom: Moments, gram_xx: np.ndarray,
                        xy: np.ndarray, y_mean: float, y_sd: float) -> ObservedFit:
    """Least-squares fit on the dyad set from the standardised products (normal equations).

    ``gram_xx`` (k, k) = X~'X~ / (sd sd') and ``xy`` (k,) = X~'y~ / (sd sd_y) are the
    standardised products of the predictors with themselves and with the response, as the
    route's plan holds them (``SparsePlan``: its invariant Gram and its cross products at
    the identity; ``sparse_schemes.SparseSchemePlan``: ``gram_xx`` and ``xy``). With
    G = ``gram_xx`` and c = ``xy`` the standardised slopes are G^-1 c; RSS =
    sd_y^2 (N - c'G^-1 c); Var(b) = sigma^2 (X~'X~)^-1; the intercept is
    mean(y) - sum_j b_j mean(x_j), with variance sigma^2 (1/N + m'(X~'X~)^-1 m).
    """
    k = prep.k
    p = k + 1
    N = prep.n_dyads
    if N <= p:
        raise InputError(f"too few dyads for the model: {N} complete dyads for {p} terms")
    cond, factor = _check_collinear(prep, mom)
    sx = np.sqrt(np.diag(mom.cross) / N)
    c = xy
    Ginv = np.linalg.inv(gram_xx)
    beta = Ginv @ c
    rss_std = max(float(N - c @ beta), 0.0)
    check_response(rss_std, float(N), prep.response_name)
    slopes = beta * y_sd / sx
    user_mean = mom.mean + np.array([t.shift for t in prep.terms])
    coef = np.concatenate([[y_mean - slopes @ user_mean], slopes])
    rss = rss_std * y_sd * y_sd
    sigma2 = rss / (N - p)
    xinv = Ginv / np.outer(sx, sx)  # (X~'X~)^-1
    se = np.sqrt(sigma2 * np.concatenate([[1.0 / N + user_mean @ xinv @ user_mean],
                                           np.diag(xinv)]))
    with np.errstate(divide="ignore", invalid="ignore"):
        t = coef / se
    warn_condition(factor, cond, prep.names)
    return ObservedFit(coef, se, t, 1.0 - rss_std / N, N, rss, cond)

