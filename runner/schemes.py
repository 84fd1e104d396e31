"""Per scheme: which layers are relabelled, which stay fixed, and how a fit is read off.

Every relabelled quantity a scheme needs is a cross product of relabelled layers with
fixed layers (methods.md). Layers are the standardised predictors x_1..x_k and response
y (centred and scaled over the observed dyad set). A fit is read from the Gram matrix of
v = [1, relabelled layers, fixed layers] through a linear map T per tested term:

- ``y`` (Krackhardt 1988): relabel y; design [1, X], response y_pi.
- ``dsp`` (Dekker, Krackhardt & Snijders 2007): relabel the x's; the tested column is
  e_pi = x_j,pi - g0 - sum_c g_c x_c,pi, the relabelled residual of x_j on Z = [1, other x];
  design [1, Z, e_pi], response y.
- ``freedman-lane`` (Freedman & Lane 1983): relabel y and the x's; the response is
  y* = Z gamma + r_pi with r = y - Z gamma the reduced-model residual; design [1, X].

Because relabelling is linear in each layer, residuals relabel as the same combination
of relabelled layers, so no residual matrix is ever stored. Complete data over a dyad set
that every relabelling maps onto itself need only the relabelled-by-fixed block per
permutation (``gather_cross``); data with missing values need the full Gram over each
permutation's complete dyads (``gather_gram``), one pass per tested term.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.stats import rankdata

from .design import Prepared, iter_dyad_rows, standardise
from .errors import InputError
from .kernels.gather import gather_cross, gather_gram
from .kernels.stats import correlation_stats, fill_gram, regression_stats

SCHEMES = ("y", "dsp", "freedman-lane")
STATISTICS = ("t", "coef")


@dataclass(frozen=True, eq=False)
class Pass:
    """One kernel pass per permutation: layers, and what to read off the Gram."""

    rel: np.ndarray
    rel_idx: np.ndarray
    fix: np.ndarray
    fix_idx: np.ndarray
    gram0: np.ndarray | None  # invariant Gram (complete data) or None (masked pass)
    transforms: np.ndarray  # (K, d, p + 1)
    terms: np.ndarray  # (K,) columns of the statistics this pass fills
    scale: np.ndarray  # (K,)


@dataclass(frozen=True, eq=False)
class Plan:
    """Everything the engine needs to turn relabellings into statistics."""

    passes: tuple[Pass, ...]
    k: int
    correlation: bool
    use_t: bool
    col_start: np.ndarray
    col_stop: np.ndarray
    n_dyads: int

    def statistics(self, row_perms: np.ndarray, col_perms: np.ndarray) -> np.ndarray:
        """Statistics (B, k) of the relabellings given as row/column permutations."""
        n_perm = row_perms.shape[0]
        out = np.empty((n_perm, self.k))
        for ps in self.passes:
            d = 1 + ps.rel_idx.shape[0] + ps.fix_idx.shape[0]
            gram = np.empty((n_perm, d, d))
            if ps.gram0 is not None:
                cross = np.empty((n_perm, ps.rel_idx.shape[0], ps.fix_idx.shape[0]))
                gather_cross(ps.rel, ps.rel_idx, ps.fix, ps.fix_idx, row_perms, col_perms,
                             self.col_start, self.col_stop, cross)
                fill_gram(cross, ps.gram0, gram)
            else:
                gather_gram(ps.rel, ps.rel_idx, ps.fix, ps.fix_idx, row_perms, col_perms,
                            self.col_start, self.col_stop, gram)
            if self.correlation:
                r = np.empty(n_perm)
                correlation_stats(gram, r)
                out[:, 0] = r
            else:
                stats = np.empty((n_perm, ps.terms.shape[0]))
                regression_stats(gram, ps.transforms, ps.scale, self.use_t, stats)
                out[:, ps.terms] = stats
        return out


STORAGE = {"float64": np.float64, "float32": np.float32}


def _stack(prep: Prepared, layers: list[int], mean: np.ndarray, sd: np.ndarray,
           storage: str = "float64") -> np.ndarray:
    """(n, m, L) standardised layers; off the dyad set 0 (complete data) or NaN (masked).

    ``storage="float32"`` halves the memory and traffic of the layers; kernels still
    accumulate in float64.
    """
    n, m = prep.mask.shape
    out = np.empty((n, m, len(layers)), dtype=STORAGE[storage])
    fill = 0.0 if prep.complete else np.nan
    for pos, layer in enumerate(layers):
        a = prep.matrices[layer]
        view = out[:, :, pos]
        np.subtract(a, mean[layer], out=view)
        view /= sd[layer]
        if prep.complete:
            np.nan_to_num(view, copy=False, nan=fill)
    return out


def _gram_observed(prep: Prepared, mean: np.ndarray, sd: np.ndarray) -> np.ndarray:
    """Gram of [1, standardised matrices] over the complete observed dyads."""
    L = len(prep.matrices)
    g = np.zeros((L + 1, L + 1))
    for block in iter_dyad_rows(prep, prep.matrices):
        block = block[~np.isnan(block).any(axis=1)]
        z = np.concatenate([np.ones((block.shape[0], 1)), (block - mean) / sd], axis=1)
        g += z.T @ z
    return g


def _regress_on(gram: np.ndarray, target: int, on: list[int]) -> np.ndarray:
    """Coefficients [g0, g_on...] of layer ``target`` on [1, layers ``on``] from the Gram."""
    idx = [0] + [1 + c for c in on]
    return np.linalg.solve(gram[np.ix_(idx, idx)], gram[idx, 1 + target])


def build_plan(prep: Prepared, *, scheme: str, statistic: str, storage: str = "float64") -> Plan:
    """Layers, invariant Gram blocks and transforms of a regression scheme."""
    if scheme not in SCHEMES:
        raise InputError(f"scheme must be one of {', '.join(SCHEMES)}; got {scheme!r}")
    if statistic not in STATISTICS:
        raise InputError(f"statistic must be one of {', '.join(STATISTICS)}; got {statistic!r}")
    if storage not in STORAGE:
        raise InputError(f"storage must be one of {', '.join(STORAGE)}; got {storage!r}")
    k = prep.k
    ylayer = k
    xs = list(range(k))
    mean, sd = standardise(prep)
    gobs = _gram_observed(prep, mean, sd)
    scale_all = sd[ylayer] / sd[:k]

    passes = []
    if scheme == "y":
        rel = _stack(prep, [ylayer], mean, sd, storage)
        fix = _stack(prep, xs, mean, sd, storage)
        specs = [(rel, [0], [ylayer], fix, list(range(k)), xs, list(range(k)))]
    else:
        W = _stack(prep, xs + [ylayer], mean, sd, storage)
        if prep.complete:
            if scheme == "dsp":
                specs = [(W, xs, xs, W, xs + [ylayer], xs + [ylayer], list(range(k)))]
            else:
                specs = [(W, xs + [ylayer], xs + [ylayer], W, xs, xs, list(range(k)))]
        else:  # one pass per term, so each fit uses exactly its own complete dyads
            specs = []
            for j in range(k):
                others = [c for c in xs if c != j]
                if scheme == "dsp":
                    specs.append((W, xs, xs, W, others + [ylayer], others + [ylayer], [j]))
                else:
                    specs.append((W, others + [ylayer], others + [ylayer], W, xs, xs, [j]))

    for rel, rel_idx, rel_layers, fix, fix_idx, fix_layers, terms in specs:
        R, Q = len(rel_layers), len(fix_layers)
        d = 1 + R + Q
        rpos = {layer: 1 + a for a, layer in enumerate(rel_layers)}
        fpos = {layer: 1 + R + c for c, layer in enumerate(fix_layers)}
        transforms = np.zeros((len(terms), d, k + 2))
        for t_i, j in enumerate(terms):
            others = [c for c in xs if c != j]
            cols = [{0: 1.0}] + [{fpos[c]: 1.0} for c in others]
            if scheme == "y":
                cols += [{fpos[j]: 1.0}, {rpos[ylayer]: 1.0}]
            elif scheme == "dsp":
                g = _regress_on(gobs, j, others)
                e = {rpos[j]: 1.0, 0: -g[0]}
                for c, gc in zip(others, g[1:]):
                    e[rpos[c]] = e.get(rpos[c], 0.0) - gc
                cols += [e, {fpos[ylayer]: 1.0}]
            else:
                g = _regress_on(gobs, ylayer, others)
                ystar = {rpos[ylayer]: 1.0}
                for c, gc in zip(others, g[1:]):
                    ystar[fpos[c]] = ystar.get(fpos[c], 0.0) + gc
                    ystar[rpos[c]] = ystar.get(rpos[c], 0.0) - gc
                cols += [{fpos[j]: 1.0}, ystar]
            for col, entries in enumerate(cols):
                for row, val in entries.items():
                    transforms[t_i, row, col] += val
        gram0 = None
        if prep.complete:
            gram0 = _identity_gram(prep, rel, rel_idx, fix, fix_idx)
        passes.append(Pass(rel, np.asarray(rel_idx, np.int64), fix, np.asarray(fix_idx, np.int64),
                           gram0, transforms, np.asarray(terms, np.int64),
                           np.ascontiguousarray(scale_all[terms])))
    return Plan(tuple(passes), k, False, statistic == "t", prep.col_start, prep.col_stop,
                prep.n_dyads)


def _identity_gram(prep: Prepared, rel, rel_idx, fix, fix_idx) -> np.ndarray:
    n, m = prep.mask.shape
    d = 1 + len(rel_idx) + len(fix_idx)
    ident_r = np.arange(n, dtype=np.int64)[None, :]
    ident_c = np.arange(m, dtype=np.int64)[None, :]
    g = np.empty((1, d, d))
    gather_gram(rel, np.asarray(rel_idx, np.int64), fix, np.asarray(fix_idx, np.int64),
                ident_r, ident_c, prep.col_start, prep.col_stop, g)
    g0 = g[0].copy()
    # the column ranges may include cells off the dyad set (held as 0): count only dyads
    g0[0, 0] = prep.n_dyads
    return g0


def build_correlation_plan(prep: Prepared, *, method: str, storage: str = "float64") -> Plan:
    """QAP correlation of the response with one predictor (Pearson or Spearman)."""
    if method not in ("pearson", "spearman"):
        raise InputError(f"method must be 'pearson' or 'spearman'; got {method!r}")
    if prep.k != 1:
        raise InputError(f"correlation takes exactly one predictor network; got {prep.k}")
    if method == "spearman":
        prep = _ranked(prep)
    mean, sd = standardise(prep)
    for layer, name in ((0, prep.names[0]), (1, prep.response_name)):
        if not sd[layer] > 0:
            raise InputError(f"{name!r} has no variation over the dyad set")
    if storage not in STORAGE:
        raise InputError(f"storage must be one of {', '.join(STORAGE)}; got {storage!r}")
    b = _stack(prep, [0], mean, sd, storage)
    a = _stack(prep, [1], mean, sd, storage)
    idx = np.zeros(1, np.int64)
    gram0 = _identity_gram(prep, b, idx, a, idx) if prep.complete else None
    ps = Pass(b, idx, a, idx, gram0, np.zeros((1, 3, 1)), np.zeros(1, np.int64), np.ones(1))
    return Plan((ps,), 1, True, True, prep.col_start, prep.col_stop, prep.n_dyads)


def _ranked(prep: Prepared) -> Prepared:
    """Replace each matrix's dyad values by their average ranks (ties share a rank)."""
    mats = []
    n = prep.mask.shape[0]
    for a in prep.matrices:
        r = np.full(a.shape, np.nan)
        vals = a[prep.mask]
        ok = ~np.isnan(vals)
        ranks = np.full(vals.shape, np.nan)
        ranks[ok] = rankdata(vals[ok], method="average")
        r[prep.mask] = ranks
        if not prep.directed and not prep.two_mode:
            lower = np.tril_indices(n, -1)
            r[lower] = r.T[lower]
        mats.append(r)
    from dataclasses import replace
    return replace(prep, matrices=tuple(mats))
