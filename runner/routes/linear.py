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
permutation's complete dyads, one pass per tested term: with few missing values the
complete-data kernel over layers that hold them as 0, less the incomplete dyads
(``_zero_missing``, ``gather.subtract_missing``), else the sum over the complete dyads one
by one (``gather_gram``).
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from typing import Any, Sequence

import numpy as np
from scipy.linalg import solve_triangular

from ..errors import InputError, NumericalError
from ..inputs import design as _design
from ..inputs import memory as _memory
from ..inputs.design import (MISSING_SHARE, STREAM_DYADS, ObservedFit, Prepared,
                             check_design, check_factor, check_response, dyads_phrase,
                             fit_from_factor, iter_dyad_rows, standardise)
from ..inputs.threads import halves, side_by_side
from ..kernels.options import FIT_PIVOT
from ..kernels.gather import (GRAM_COLUMNS, NO_RECORDS, add_chunks, chunk_slots, gather_cross,
                              gather_gram, gram_chunks, gram_from_sums, subtract_missing)
from ..kernels.tsqr import fold_factors, row_factors, stack_factors
from ..kernels.vector import RECORD_LANES
from ..kernels.stats import (INTERVAL_WIDTH as WIDTH, NO_ROWS, apply_upper, correlation_stats,
                             fill_gram, padded_upper, regression_stats, standardise_rows)
from ..settings import SCHEMES, STATISTICS, check_regression  # noqa: F401  (re-exported)
from .plan import (Plan, interval_reason, interval_summary, chunk_size_for, dense_identity, groups_fingerprint, input_fingerprints,
                   summary)

# The shared relabelling pass and a plan's own statistics add the same products in the same
# order; they must agree on the first relabelling's statistic to this relative tolerance.
SHARED_RTOL = 1e-9
# Condition number of the layers' first QR factor up to which one pass of orthonormalising
# is enough: the basis is then orthonormal to about 1e-16 x 1e4 = 1e-12, far below what a
# statistic needs (a second pass costs two reads of the stack and a QR fold).
REFINE_COND = 1e4
# Dyads of a row folded into its QR factor at once (``kernels.tsqr.fold_rows``): the block
# (5 x 256 float64 = 10 KB) stays in L1.
QR_WIDTH = 256
# Bytes of the rows' own sums the setup holds at once before adding them in row order:
# ``qr_layers``' row factors (p x p float64 a row: all rows at once up to 2**21 / p^2) and
# the invariant Gram's chunk sums (``_gram_on_threads``)
FACTOR_BYTES = 1 << 24


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
    #: missing values held as 0 (``_zero_missing``): (fix_cells, fix_keys, rel_cells, mask)
    #: of ``gather.subtract_missing``, which takes the incomplete dyads out of each Gram
    missing: tuple | None = None


@dataclass(frozen=True, eq=False)
class GramStatistics:
    """Statistics of relabellings read off Gram matrices: the dense linear schemes and
    correlations (the kernel side of their plans)."""

    passes: tuple[Pass, ...]
    k: int
    correlation: bool
    use_t: bool
    col_start: np.ndarray
    col_stop: np.ndarray
    n_dyads: int
    #: per tested term, the factor taking b from standardised units to the coefficient's
    #: when the transforms carry the interval column X (``intervals``), else None
    ci_scale: np.ndarray | None = None
    #: the classical fit read from the layers' QR factor (``design.fit_from_factor``) when
    #: ``build_statistics(classical=True)`` had complete data, else None
    fit: ObservedFit | None = None

    @property
    def extra(self) -> int:
        """Numbers per relabelling after the k statistics: the interval rows."""
        return 0 if self.ci_scale is None else WIDTH * self.k

    def statistics(self, row_perms: np.ndarray, col_perms: np.ndarray) -> np.ndarray:
        """Rows (B, k + extra) of the relabellings given as row/column permutations: the
        statistics, then (with intervals) each term's interval numbers."""
        n_perm = row_perms.shape[0]
        out = np.empty((n_perm, self.k + self.extra))
        crosses = self._crosses(row_perms, col_perms)
        for ps in self.passes:
            d = 1 + ps.rel_idx.shape[0] + ps.fix_idx.shape[0]
            gram = np.empty((n_perm, d, d))
            if ps.gram0 is not None:
                fill_gram(crosses[id(ps)], ps.gram0, gram)
                if ps.missing is not None:
                    subtract_missing(ps.rel, ps.rel_idx, ps.fix, ps.fix_idx, row_perms,
                                     col_perms, *ps.missing, gram)
            else:
                gather_gram(ps.rel, ps.rel_idx, ps.fix, ps.fix_idx, row_perms, col_perms,
                            self.col_start, self.col_stop, gram)
            if self.correlation:
                r = np.empty(n_perm)
                correlation_stats(gram, r)
                out[:, 0] = r
            else:
                stats = np.empty((n_perm, ps.terms.shape[0]))
                rows = NO_ROWS if self.ci_scale is None else \
                    np.empty((n_perm, ps.terms.shape[0], WIDTH))
                regression_stats(gram, ps.transforms, ps.scale, self.use_t, stats, rows)
                out[:, ps.terms] = stats
                for t, j in enumerate(ps.terms if self.ci_scale is not None else ()):
                    out[:, self.k + WIDTH * j:self.k + WIDTH * (j + 1)] = rows[:, t]
        return out

    def _crosses(self, row_perms: np.ndarray, col_perms: np.ndarray) -> dict[int, np.ndarray]:
        """The relabelled-by-fixed products of each pass with an invariant Gram, by the
        pass's id. Passes over the same two stacks (the corrected passes of missing data,
        one per tested term) share one kernel pass over the union of their layers; each
        pair's sum is the same whichever other layers a pass holds (``gather_cross``'s
        order depends on the tile shape only, and tiles of 3 x 4 and 4 x 3 sum alike)."""
        groups: dict[tuple[int, int], list[Pass]] = {}
        for ps in self.passes:
            if ps.gram0 is not None:
                groups.setdefault((id(ps.rel), id(ps.fix)), []).append(ps)
        crosses: dict[int, np.ndarray] = {}
        n_perm = row_perms.shape[0]
        for group in groups.values():
            first = group[0]
            if len(group) == 1:  # the pass's own layers, as they are
                cross = np.empty((n_perm, first.rel_idx.size, first.fix_idx.size))
                gather_cross(first.rel, first.rel_idx, first.fix, first.fix_idx, row_perms,
                             col_perms, self.col_start, self.col_stop, cross)
                crosses[id(first)] = cross
                continue
            rel_u = sorted(set().union(*(ps.rel_idx.tolist() for ps in group)))
            fix_u = sorted(set().union(*(ps.fix_idx.tolist() for ps in group)))
            every = np.empty((n_perm, len(rel_u), len(fix_u)))
            gather_cross(first.rel, np.asarray(rel_u, np.int64), first.fix,
                         np.asarray(fix_u, np.int64), row_perms, col_perms, self.col_start,
                         self.col_stop, every)
            for ps in group:
                ra = [rel_u.index(a) for a in ps.rel_idx.tolist()]
                fc = [fix_u.index(c) for c in ps.fix_idx.tolist()]
                crosses[id(ps)] = np.ascontiguousarray(every[:, ra][:, :, fc])
        return crosses

    def chunk_size(self) -> int:
        """Permutations per chunk: one chunk's kernel work (dyads x cross products) near
        ``plan.CHUNK_WORK``."""
        return chunk_size_for(self.n_dyads * sum((p.rel_idx.size + 1) * (p.fix_idx.size + 1)
                                                 for p in self.passes))


STORAGE = {"float64": np.float64, "float32": np.float32}  # what ``storage`` names


def owned_base(prep: Prepared, layers: list[int], dtype) -> np.ndarray | None:
    """The (n, m, L) array whose layers p are exactly ``prep.matrices[layers[p]]``, or None.

    Such an array (C-ordered, writable, of the storage dtype) can serve as the layer stack
    itself when the caller allows its inputs to be overwritten.
    """
    mats = [prep.matrices[layer] for layer in layers]
    base = mats[0].base
    n, m = prep.mask.shape
    if (not isinstance(base, np.ndarray) or base.shape != (n, m, len(layers))
            or base.dtype != dtype or not base.flags.c_contiguous or not base.flags.writeable):
        return None
    start = base.__array_interface__["data"][0]
    for pos, mat in enumerate(mats):
        if (mat.base is not base or mat.shape != (n, m) or mat.strides != base.strides[:2]
                or mat.__array_interface__["data"][0] != start + pos * base.itemsize):
            return None
    return base


@dataclass(frozen=True)
class StackSource:
    """What a layer stack is written from: ``prep``'s matrices ``layers``, standardised
    with ``means`` and ``sds`` where ``holds``, ``fill`` elsewhere (``stats.
    standardise_rows``)."""

    layers: list[int]
    means: np.ndarray
    sds: np.ndarray
    holds: np.ndarray
    fill: float

    def mats(self, prep: Prepared, rows: slice) -> tuple:
        """The source layers' ``rows``, a tuple (what ``standardise_rows`` reads)."""
        return tuple(prep.matrices[layer][rows] for layer in self.layers)


def _stack_target(prep: Prepared, layers: list[int], mean: np.ndarray, sd: np.ndarray,
                  storage: str = "float64",
                  overwrite: bool = False) -> tuple[np.ndarray, StackSource]:
    """The (n, m, L) array of a layer stack, not written yet, and what to write it from.

    ``storage="float32"`` halves the memory and traffic of the layers; kernels still
    accumulate in float64. ``overwrite``: when the inputs are the layers of one array in
    this layout (``owned_base``), that array (standardised in place when written).
    """
    n, m = prep.mask.shape
    out = owned_base(prep, layers, STORAGE[storage]) if overwrite else None
    if out is None:
        out = np.empty((n, m, len(layers)), dtype=STORAGE[storage])
    # cells that hold dyad values: the dyad set, and for undirected data its mirror image
    # (relabelled reads land in either triangle)
    source = StackSource(list(layers), np.ascontiguousarray(mean[layers], dtype=np.float64),
                         np.ascontiguousarray(sd[layers], dtype=np.float64), prep.holds(),
                         0.0 if prep.complete else np.nan)
    return out, source


def _stack(prep: Prepared, layers: list[int], mean: np.ndarray, sd: np.ndarray,
           storage: str = "float64", overwrite: bool = False) -> np.ndarray:
    """(n, m, L) standardised layers; off the dyad set 0 (complete data) or NaN (masked);
    see ``_stack_target``."""
    out, src = _stack_target(prep, layers, mean, sd, storage, overwrite)
    n, m = prep.mask.shape

    # halves of the rows to two threads, every layer of a row at once (the layers of a
    # cell share its cache line)
    def rows(part: slice) -> None:
        standardise_rows(src.mats(prep, part), src.means, src.sds, src.holds[part], src.fill,
                         out[part], 0, part.stop - part.start)
    side_by_side(rows, halves(0, n), n * m)
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


def fit_pivot(prep: Prepared, storage: str = "float64") -> float:
    """The relative pivot this route's fits resolve (``design.fit_pivot``): ``QR_PIVOT`` when
    the kernels read an orthonormal float64 basis of the predictors (complete data), else
    ``FIT_PIVOT`` (standardised layers in Gram matrices: missing data, or float32 layers)."""
    return _design.fit_pivot(prep.complete, storage=storage)


def build_statistics(prep: Prepared, *, scheme: str, statistic: str, storage: str = "float64",
                     overwrite: bool = False, interval: bool = False,
                     absorbed: int = 0, classical: bool = False) -> GramStatistics:
    """Layers, invariant Gram blocks and transforms of a regression scheme.

    ``absorbed``: design columns the inputs were already centred on (wave intercepts of
    complete panel data, ``routes.waves``): each is orthogonal to every layer and every
    relabelled layer, so it changes no coefficient or residual, only the t statistic's
    residual degrees of freedom, N - p - absorbed. The leading ``prep.fixed`` predictors
    (wave intercepts of panel data with missing dyads) are in every design, never tested.

    ``interval``: also the numbers that invert each term's test (``pipeline.intervals``),
    for dsp and freedman-lane with statistic t on complete data (``interval_reason``).

    ``classical``: with complete data, also read the classical fit off the layers' QR
    factor (``GramStatistics.fit``; float64 layers: the route's table, no pass of its own).

    ``overwrite``: the layer stacks may be the inputs themselves, standardised in place
    (see ``owned_base``); ``prep.matrices`` then no longer hold the data. The design (and
    the response) must pass the one rule of ``design.check_design`` with ``fit_pivot``:
    an InputError says which predictors break it, before any layer is changed.
    """
    check_regression(model="linear", scheme=scheme, statistic=statistic, storage=storage)
    mean, sd = standardise(prep)
    _check_spread(prep, sd)
    if prep.fixed and prep.complete:
        raise ValueError("fixed layers (wave intercepts) are for missing dyads; complete "
                         "panels absorb them by centring (absorbed=...)")
    if interval and interval_reason(scheme, statistic, prep.complete) is not None:
        raise ValueError(interval_reason(scheme, statistic, prep.complete))
    fit = None
    if prep.complete:
        one, fit = _complete_pass(prep, scheme, statistic, storage, mean, sd, overwrite,
                                  interval, classical)
        passes = [one]
    else:
        passes = _masked_passes(prep, scheme, statistic, storage, mean, sd, overwrite)
    if absorbed and statistic == "t":
        # t = beta / sqrt(RSS / df): the kernels' df is N - p; the model's N - p - absorbed
        p = prep.k + 1
        factor = np.sqrt((prep.n_dyads - p - absorbed) / (prep.n_dyads - p))
        passes = [replace(ps, scale=ps.scale * factor) for ps in passes]
    ci_scale = sd[prep.k] / sd[:prep.k] if interval else None
    return GramStatistics(tuple(passes), prep.k - prep.fixed, False, statistic == "t",
                          prep.col_start, prep.col_stop, prep.n_dyads, ci_scale, fit)


def _check_spread(prep: Prepared, sd: np.ndarray) -> None:
    """Every layer must vary over the dyads it is standardised on (else the standardised
    layer would be 0 / 0): the constant case of the one rule, named."""
    where = ("over the dyad set" if prep.complete else "over the complete dyads (where the "
             "response and every predictor are observed)")
    for c, name in enumerate(prep.names):
        if not sd[c] > 0.0:
            raise InputError(f"predictor {name!r} is constant {where}")
    if not sd[prep.k] > 0.0:
        raise InputError(f"response {prep.response_name!r} has no variation {where}")


def _transform(cols: list[dict[int, float]], d: int) -> np.ndarray:
    """(d, len(cols)) matrix whose column c holds the v-coefficients ``cols[c]``."""
    t = np.zeros((d, len(cols)))
    for c, entries in enumerate(cols):
        for row, val in entries.items():
            t[row, c] += val
    return t


def _complete_pass(prep: Prepared, scheme: str, statistic: str, storage: str,
                   mean: np.ndarray, sd: np.ndarray, overwrite: bool = False,
                   interval: bool = False,
                   classical: bool = False) -> tuple[Pass, ObservedFit | None]:
    """Complete data: orthonormal layers, so every permutation's Gram is well conditioned.

    The standardised predictors (and, for dsp and Freedman–Lane, the response) are replaced
    by an orthonormal basis q of their span over the dyad set (a streaming QR, twice for
    ill-conditioned layers: ``_orthonormalise``), L = q S. For term j a small QR of S with column j last rotates the x-part of the
    basis into P, whose first k-1 columns span the other predictors and whose last column
    is the direction of x_j's residual on them (x_j = ... + Rs[k-1, k-1] P[k-1]). Every
    design then has orthonormal fixed columns, so even nearly collinear predictors keep
    their digits; the ill-conditioning stays in the scalar Rs[k-1, k-1].

    ``interval``: each term's transform gets one more column X, what y - b x_j takes away
    per unit of b in standardised units: for dsp x_j itself (fixed), for Freedman-Lane the
    relabelled residual of x_j on the other terms, Rs[k-1, k-1] P[k-1].
    """
    k = prep.k
    xs = list(range(k))
    pivot = fit_pivot(prep, storage)
    # the stack of the layers made orthonormal is written row by row as the first QR pass
    # folds its rows (``qr_layers`` with a source)
    if scheme == "y":
        rel = _stack(prep, [k], mean, sd, storage, overwrite)  # the standardised response
        fix, source = _stack_target(prep, xs, mean, sd, storage, overwrite)
        S, fit, pending = _orthonormalise(fix, prep, pivot, mean, sd, response=rel,
                                          classical=classical, source=source)
        rel_idx, fix_idx = [0], xs
    else:
        fix, source = _stack_target(prep, xs + [k], mean, sd, storage, overwrite)
        rel = fix
        S, fit, pending = _orthonormalise(fix, prep, pivot, mean, sd, classical=classical,
                                          source=source)
        rel_idx, fix_idx = (xs, xs + [k]) if scheme == "dsp" else (xs + [k], xs)
    R, Q = len(rel_idx), len(fix_idx)
    d = 1 + R + Q
    rpos = {layer: 1 + a for a, layer in enumerate(rel_idx)}
    fpos = {layer: 1 + R + c for c, layer in enumerate(fix_idx)}
    transforms = np.zeros((k, d, k + 2 + int(interval)))
    scale = np.empty(k)
    for j in xs:
        order = [c for c in xs if c != j] + [j]
        qs, rs = np.linalg.qr(S[:k, :k][:, order])

        def basis(a: int, pos: dict) -> dict:
            return {pos[e]: qs[e, a] for e in xs}

        cols = [{0: 1.0}] + [basis(a, fpos) for a in range(k - 1)]
        if scheme == "y":
            cols += [basis(k - 1, fpos), {rpos[0]: 1.0}]
        elif scheme == "dsp":
            y_fixed = {fpos[e]: S[e, k] for e in range(k + 1)}
            cols += [basis(k - 1, rpos), y_fixed]
        else:
            c = qs.T @ S[:k, k]  # the response in the rotated basis
            ystar: dict[int, float] = {rpos[k]: S[k, k]}
            for a in range(k - 1):
                for pos, val in basis(a, fpos).items():
                    ystar[pos] = ystar.get(pos, 0.0) + c[a] * val
            for pos, val in basis(k - 1, rpos).items():
                ystar[pos] = ystar.get(pos, 0.0) + c[k - 1] * val
            cols += [basis(k - 1, fpos), ystar]
        rkk = rs[k - 1, k - 1]
        if interval and scheme == "dsp":
            cols.append({fpos[e]: S[e, j] for e in range(j + 1)})  # x_j = sum_e q_e S[e, j]
        elif interval:
            cols.append({pos: rkk * val for pos, val in basis(k - 1, rpos).items()})
        transforms[j] = _transform(cols, d)
        scale[j] = np.sign(rkk) if statistic == "t" else sd[k] / (sd[j] * rkk)
    gram0 = _identity_gram(prep, rel, rel_idx, fix, fix_idx, pending)
    return Pass(rel, np.asarray(rel_idx, np.int64), fix, np.asarray(fix_idx, np.int64), gram0,
                transforms, np.arange(k, dtype=np.int64), scale), fit


def qr_layers(prep: Prepared, stack: np.ndarray, more: np.ndarray | None = None,
              source: StackSource | None = None) -> tuple[np.ndarray, int]:
    """The R factor (L, L) of the layers of ``stack`` (n, m, L) -- then those of ``more``,
    a stack of the same shape and type -- over the dyad set (R'R = Z'Z), and the number of
    dyads: the streaming QR of ``kernels.tsqr`` over blocks of rows (float32 layers are
    read as they are, in float64 arithmetic).

    Each row's own factor depends on that row alone, so the rows of a block are factored
    on two threads (``row_factors``, halves of the block) and the factors folded into the
    running one in row order (``fold_factors``): the bits of one ``fold_rows`` pass.

    With ``source``, ``stack`` is written first, each row just before it is folded
    (``tsqr.stack_factors``): the bits of ``_stack`` then this, in one pass.
    """
    parts = [stack] if more is None else [stack, more]
    n_layers = sum(part.shape[2] for part in parts)
    out = np.zeros((n_layers, n_layers))
    count = np.zeros(1, dtype=np.int64)
    # rows per call: all of them, unless their factors would pass FACTOR_BYTES
    step = max(1, FACTOR_BYTES // (8 * n_layers * n_layers))
    facs = np.empty((min(step, stack.shape[0]), n_layers, n_layers))
    counts = np.empty(facs.shape[0], dtype=np.int64)
    work = [(np.empty((n_layers, QR_WIDTH)), np.empty(QR_WIDTH, dtype=bool))
            for _ in range(2)]

    def factors(task) -> None:
        rows, (bt, keep) = task
        at = slice(rows.start - lo, rows.stop - lo)
        # a tuple of the stacks' rows, not a typed List of layers: getting an item of a
        # List counts a reference to the stack, and two threads counting on one stack
        # wait on each other (22-27 ms against 15 ms at n = 2,000)
        if source is None:
            row_factors(tuple(part[rows] for part in parts), prep.mask[rows],
                        prep.col_start[rows], prep.col_stop[rows], bt, keep, facs[at],
                        counts[at], False, False)
        else:
            stack_factors(source.mats(prep, rows), source.means, source.sds,
                          source.holds[rows], source.fill, stack[rows],
                          tuple(part[rows] for part in parts[1:]), prep.mask[rows],
                          prep.col_start[rows], prep.col_stop[rows], bt, keep, facs[at],
                          counts[at])

    for lo in range(0, stack.shape[0], step):
        hi = min(lo + step, stack.shape[0])
        side_by_side(factors, list(zip(halves(lo, hi), work)),
                     (hi - lo) * stack.shape[1] * n_layers)
        fold_factors(facs[:hi - lo], counts[:hi - lo], work[0][0], out, count)
    return out, int(count[0])


def _orthonormalise(stack: np.ndarray, prep: Prepared, pivot: float, mean: np.ndarray,
                    sd: np.ndarray, response: np.ndarray | None = None,
                    classical: bool = False, source: StackSource | None = None
                    ) -> tuple[np.ndarray, ObservedFit | None, np.ndarray | None]:
    """Make the layers of ``stack`` orthonormal over the dyad set, in place; return S
    with (old layers) = (new layers) @ S, (with ``classical``) the classical fit, else
    None, and the last map still to be made, or None. The last map of records v -> v
    R^-1 is left to the invariant Gram, which makes it row by row as it sums the rows
    (``gather.gram_chunks``: one pass over the stack instead of two), when the records
    are short enough for it (``RECORD_LANES``). With ``source``, the stack is not
    written yet: the first pass writes it as it folds it.

    One pass of a streaming QR, and a second one when the layers' condition number is
    above ``REFINE_COND``: it restores the orthogonality the first loses to rounding on
    ill-conditioned layers (q = Z R^-1 with R from a backward-stable QR is orthonormal to
    about machine epsilon times the condition number: common practice, "twice is
    enough").

    Each pass folds the layers (``qr_layers``). The layers are the standardised
    predictors (then the response; or the response is ``response``, a stack of its own,
    folded after them and left as it is): centred, so the first pass's R is a factor of
    their centred cross products, and the design (and the response's residual on it) must
    pass the one rule at ``pivot`` (``design.check_factor``) before it is inverted. The
    classical fit is read from the factor of [predictors, response]: the first pass's, or
    after a second pass the refined one, its R times the first's (``design.
    fit_from_factor``; on nearly collinear predictors the first pass alone loses digits).
    """
    n_layers = stack.shape[2]
    S = np.eye(n_layers)
    cond = 1.0
    full = None
    pending = None
    for first in (True, False):
        r, count = qr_layers(prep, stack, response, source if first else None)
        if count < n_layers:
            raise InputError(f"too few dyads for the model: {count} dyads for "
                             f"{n_layers} layers")
        if first:
            cond = check_factor(prep, r, mean, sd, pivot=pivot)
            full = r
        else:
            # [old layers, response] = [q, response] blockdiag(S, 1): R = r blockdiag(S, 1)
            full = r.copy()
            full[:, :n_layers] = r[:, :n_layers] @ S
        r = r[:n_layers, :n_layers]
        rinv = solve_triangular(np.triu(r), np.eye(n_layers))
        S = r @ S
        last = not first or np.linalg.cond(r) <= REFINE_COND
        if last and n_layers <= RECORD_LANES:
            pending = rinv  # the invariant Gram makes this map (``gram_chunks``)
            break
        # the stack is C-ordered (its flat view is a view); cells are independent, so the
        # halves of its rows go to two threads
        side_by_side(lambda rows: apply_upper(stack[rows].reshape(-1), n_layers, rinv),
                     halves(0, stack.shape[0]), stack.shape[0] * stack.shape[1])
        if last:
            break
    fit = fit_from_factor(prep, full, mean, sd, cond) if classical else None
    return S, fit, pending


def _masked_passes(prep: Prepared, scheme: str, statistic: str, storage: str,
                   mean: np.ndarray, sd: np.ndarray, overwrite: bool = False) -> list[Pass]:
    """Data with missing values: standardised layers, one pass per tested term (y: one).

    Each permutation's fit then uses exactly the dyads complete in its own matrices.
    """
    k = prep.k
    ylayer = k
    xs = list(range(k))
    gobs = _gram_observed(prep, mean, sd)
    _check_gram(gobs, prep)
    tested = xs[prep.fixed:]
    if scheme == "y":
        rel = _stack(prep, [ylayer], mean, sd, storage, overwrite)
        fix = _stack(prep, xs, mean, sd, storage, overwrite)
        specs = [(rel, [0], [ylayer], fix, xs, xs, tested)]
    else:
        W = _stack(prep, xs + [ylayer], mean, sd, storage, overwrite)
        specs = []
        for j in tested:
            others = [c for c in xs if c != j]
            if scheme == "dsp":
                specs.append((W, xs, xs, W, others + [ylayer], others + [ylayer], [j]))
            else:
                specs.append((W, others + [ylayer], others + [ylayer], W, xs, xs, [j]))
    passes = []
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
            transforms[t_i] = _transform(cols, d)
        scale = np.ones(len(terms)) if statistic == "t" else sd[ylayer] / sd[terms]
        passes.append(Pass(rel, np.asarray(rel_idx, np.int64), fix, np.asarray(fix_idx, np.int64),
                           None, transforms, np.asarray(terms, np.int64) - prep.fixed,
                           np.ascontiguousarray(scale)))
    return _zero_missing(prep, passes)


def _nan_cells(stack: np.ndarray, layer: int, where: np.ndarray) -> np.ndarray:
    """Sorted flat indices i m + j of the cells of ``where`` whose ``layer`` is NaN, found a
    block of rows at a time."""
    n, m = where.shape
    step = max(1, STREAM_DYADS // max(m, 1))
    found = [np.flatnonzero(np.isnan(stack[i0:i0 + step, :, layer]) & where[i0:i0 + step])
             + i0 * m for i0 in range(0, n, step)]
    return np.concatenate(found) if found else np.zeros(0, np.int64)


def _zero_missing(prep: Prepared, passes: list[Pass]) -> list[Pass]:
    """Masked passes as complete-data passes plus corrections, when few values are missing.

    Read with its missing values held as 0, a layer stack gives each relabelling's Gram
    over the whole dyad set from the complete-data kernel (``gather_cross``, and the
    invariant Gram once); ``gather.subtract_missing`` then takes out the dyads that are not
    complete under that relabelling: the same Gram as ``gather_gram`` sums dyad by dyad
    (the same products, added in another order), at the cost of the complete-data pass and
    of the missing cells. Used when the cells to correct, over every pass, are at most
    ``MISSING_SHARE`` of the dyads (all passes or none: they may share a stack); else the
    passes are returned as they are. The stacks' missing values are set to 0 in place.
    """
    mask = prep.mask
    holds = prep.holds()
    budget = MISSING_SHARE * prep.n_dyads
    found: dict[tuple[int, int, bool], np.ndarray] = {}

    def cells(stack: np.ndarray, layers: np.ndarray, in_set: bool) -> np.ndarray:
        keys = []
        for layer in layers.tolist():
            key = (id(stack), layer, in_set)
            if key not in found:
                found[key] = _nan_cells(stack, layer, mask if in_set else holds)
            keys.append(found[key])
        return np.unique(np.concatenate(keys)) if keys else np.zeros(0, np.int64)

    lists = []
    for ps in passes:
        fix_keys = cells(ps.fix, ps.fix_idx, True)  # dyads whose fixed value is missing
        rel_keys = cells(ps.rel, ps.rel_idx, False)  # stored cells a relabelling may read
        if fix_keys.size + rel_keys.size > budget:
            return passes
        lists.append((fix_keys, rel_keys))
    stacks = {id(a): a for ps in passes for a in (ps.rel, ps.fix)}
    for stack in stacks.values():
        step = max(1, STREAM_DYADS // max(stack.shape[1], 1))
        for i0 in range(0, stack.shape[0], step):
            block = stack[i0:i0 + step]
            block[np.isnan(block)] = 0.0
    out = []
    whole: dict[int, np.ndarray] = {}  # a stack's invariant Gram of all its layers, once
    for ps, (fix_keys, rel_keys) in zip(passes, lists):
        m_fix, m_rel = ps.fix.shape[1], ps.rel.shape[1]
        fix_cells = np.stack([fix_keys // m_fix, fix_keys % m_fix], axis=1).astype(np.int64)
        rel_cells = np.stack([rel_keys // m_rel, rel_keys % m_rel], axis=1).astype(np.int64)
        if ps.rel is ps.fix:  # dsp, freedman-lane: one stack, one pass over it for all
            every = list(range(ps.rel.shape[2]))
            if id(ps.rel) not in whole:
                whole[id(ps.rel)] = _gram_on_threads(prep, ps.rel, every, ps.rel, [])
            gram0 = _spread(whole[id(ps.rel)], every, ps.rel_idx, ps.fix_idx)
        else:
            gram0 = _identity_gram(prep, ps.rel, ps.rel_idx, ps.fix, ps.fix_idx)
        out.append(replace(ps, gram0=gram0, missing=(fix_cells, fix_keys, rel_cells, mask)))
    return out


def _check_gram(gobs: np.ndarray, prep: Prepared) -> None:
    """The one rule on the Gram of [1, standardised layers] over the observed complete
    dyads (what the masked passes solve with): the predictors' factor from the eigen
    decomposition of their centred cross products, then the response's residual."""
    k = prep.k
    n_obs = gobs[0, 0]
    if not n_obs > k + 1:
        raise InputError(f"too few dyads for the model: {int(n_obs)} complete dyads for "
                         f"{k + 1} terms")
    g1 = gobs[0, 1:]
    cross = gobs[1:, 1:] - np.outer(g1, g1) / n_obs  # centred cross products of x's and y
    w, V = np.linalg.eigh(cross[:k, :k])
    factor = np.sqrt(np.clip(w, 0.0, None))[:, None] * V.T
    where = dyads_phrase(prep, int(n_obs))
    check_design(factor, prep.names, pivot=FIT_PIVOT, where=where)
    coef = np.linalg.solve(cross[:k, :k], cross[:k, k])
    check_response(float(cross[k, k] - cross[:k, k] @ coef), float(cross[k, k]),
                   prep.response_name, where=where)


def _identity_gram(prep: Prepared, rel, rel_idx, fix, fix_idx,
                   rinv: np.ndarray | None = None) -> np.ndarray:
    """The invariant Gram of a complete-data plan (``kernels.gather.identity_gram``); with
    ``rinv``, the records of ``fix`` are first mapped in place, v -> v rinv, row by row
    as the rows are summed (``_orthonormalise``'s last map).

    When the relabelled and fixed layers are layers of one stack (dsp, Freedman-Lane),
    the Gram of the distinct layers is summed once and spread over both (each entry is the
    same sum of the same products either way: the same bits, a third of the work for dsp
    with three predictors)."""
    rel_idx = [int(a) for a in rel_idx]
    fix_idx = [int(c) for c in fix_idx]
    if rel is fix:
        layers = sorted(set(rel_idx) | set(fix_idx))
        return _spread(_gram_on_threads(prep, fix, layers, fix, [], rinv), layers, rel_idx,
                       fix_idx)
    return _gram_on_threads(prep, rel, rel_idx, fix, fix_idx, rinv)


def _spread(g: np.ndarray, layers: list[int], rel_idx, fix_idx) -> np.ndarray:
    """The Gram of v = [1, rel_idx layers, fix_idx layers] of one stack, from ``g``, the
    Gram of [1, ``layers``] (which holds every layer named)."""
    where = [0] + [1 + layers.index(int(e)) for e in list(rel_idx) + list(fix_idx)]
    return np.ascontiguousarray(g[np.ix_(where, where)])


def _gram_on_threads(prep: Prepared, rel, rel_idx: list[int], fix,
                     fix_idx: list[int], rinv: np.ndarray | None = None) -> np.ndarray:
    """``identity_gram`` with the chunks' sums (``gram_chunks``) made on two threads, halves
    of each block of rows, and added in chunk order (``add_chunks``): the same bits. Blocks
    of rows keep the chunks' sums under ``FACTOR_BYTES``. G[0, 0] counts the dyads: the
    column ranges may include cells off the dyad set (held as 0)."""
    n_lay = len(rel_idx) + len(fix_idx)
    ri, fi = np.asarray(rel_idx, np.int64), np.asarray(fix_idx, np.int64)
    first = chunk_slots(prep.col_start, prep.col_stop)
    width = n_lay + n_lay * (n_lay + 1) // 2
    n, m = prep.mask.shape
    step = max(2, FACTOR_BYTES // (8 * width * max(1, -(-m // GRAM_COLUMNS))))
    acc = np.zeros(width)
    rpad = NO_RECORDS if rinv is None else padded_upper(rinv)
    for lo in range(0, n, step):
        hi = min(lo + step, n)
        base = first[lo]
        parts = np.empty((first[hi] - base, width))

        def chunks(rows: slice) -> None:
            gram_chunks(rel[rows], ri, fix[rows], fi, prep.col_start[rows],
                        prep.col_stop[rows], first[rows] - base, parts, rpad)
        side_by_side(chunks, halves(lo, hi), (hi - lo) * m * n_lay)
        add_chunks(parts, acc)
    g = np.empty((1 + n_lay, 1 + n_lay))
    gram_from_sums(acc, prep.n_dyads, g)
    return g


def shared_statistics(plans: Sequence[GramStatistics], j: int, batch) -> list[np.ndarray]:
    """Statistic of term ``j`` under each plan, sharing relabelling passes between plans.

    Each plan's pass needs, per relabelling, the cross products of its relabelled layers
    with its fixed layers (``GramStatistics.statistics`` reads them with ``gather_cross``). Passes of
    different plans that hold equal layer arrays share their products: each pass gathers
    only the (relabelled, fixed) pairs that no earlier pass over the same layers gathered
    (``dsp`` needs X_pi'[X, y]; ``freedman-lane`` then only y_pi'X). Each Gram is then
    filled and read by the engine's own kernels (``fill_gram``, ``regression_stats``) with
    that pass's invariant Gram and transforms, exactly as ``GramStatistics.statistics`` does. The
    first relabelling's statistic is checked against ``GramStatistics.statistics``.
    """
    rows, cols = batch
    n_perm = rows.shape[0]
    col_start, col_stop = plans[0].col_start, plans[0].col_stop
    groups: list[tuple[np.ndarray, np.ndarray, dict]] = []  # rel, fix, {(a, c): products}
    out = [np.full(n_perm, np.nan) for _ in plans]
    for i, plan in enumerate(plans):
        for ps in plan.passes:
            for rel, fix, have in groups:
                if rel.dtype == ps.rel.dtype and fix.dtype == ps.fix.dtype \
                        and np.array_equal(rel, ps.rel) and np.array_equal(fix, ps.fix):
                    break
            else:
                rel, fix, have = ps.rel, ps.fix, {}
                groups.append((rel, fix, have))
            # gather the missing pairs, one call per set of relabelled layers that lack the
            # same fixed layers
            lacking: dict[tuple[int, ...], list[int]] = {}
            for a in ps.rel_idx.tolist():
                need = tuple(c for c in ps.fix_idx.tolist() if (a, c) not in have)
                if need:
                    lacking.setdefault(need, []).append(a)
            for need, rel_idx in lacking.items():
                part = np.empty((n_perm, len(rel_idx), len(need)))
                gather_cross(rel, np.asarray(rel_idx, np.int64), fix, np.asarray(need, np.int64),
                             rows, cols, col_start, col_stop, part)
                for x, a in enumerate(rel_idx):
                    for y, c in enumerate(need):
                        have[(a, c)] = part[:, x, y]
            cross = np.empty((n_perm, ps.rel_idx.size, ps.fix_idx.size))
            for x, a in enumerate(ps.rel_idx.tolist()):
                for y, c in enumerate(ps.fix_idx.tolist()):
                    cross[:, x, y] = have[(a, c)]
            d = ps.gram0.shape[0]
            gram = np.empty((n_perm, d, d))
            fill_gram(cross, ps.gram0, gram)
            if ps.missing is not None:
                subtract_missing(ps.rel, ps.rel_idx, ps.fix, ps.fix_idx, rows, cols,
                                 *ps.missing, gram)
            t = int(np.flatnonzero(ps.terms == j)[0])
            stats = np.empty((n_perm, 1))
            regression_stats(gram, np.ascontiguousarray(ps.transforms[t:t + 1]),
                             np.ascontiguousarray(ps.scale[t:t + 1]), plan.use_t, stats,
                             NO_ROWS)
            out[i] = stats[:, 0]
    for plan, st in zip(plans, out):
        ref = plan.statistics(rows[:1], cols[:1])[0, j]
        if not abs(st[0] - ref) <= SHARED_RTOL * max(1.0, abs(ref)):
            raise NumericalError(f"calibrate: the shared relabelling pass gives {float(st[0])!r} "
                                 f"for the first relabelling but the engine's plan gives "
                                 f"{float(ref)!r}")
    return out

def check_memory(y: Any, predictors: Any, *, storage: str, groups: Any, in_place: bool) -> None:
    """Refuse before any work a problem whose inputs, layer stack (one layer per network,
    in ``storage``) and masks would not fit in the memory available (``inputs.memory``)."""
    _memory.check_dense_route(y, predictors, route="linear", groups=groups,
                              itemsize=np.dtype(STORAGE[storage]).itemsize,
                              in_place=bool(in_place))


def plan(y: Any, predictors: Any, *, scheme: str, statistic: str, storage: str = "float64",
         directed: bool | None = None, groups: Any = None, dyads: str | None = None,
         overwrite_inputs: bool = False, ci: float | None = None) -> Plan:
    """The dense linear route: prepared inputs, the QR fit for the table, and the scheme's
    statistics (``build_statistics``) for the pipeline; with ``ci`` (a level) the numbers
    that give each coefficient's interval at that level, where the run can have them."""
    check_regression(model="linear", scheme=scheme, statistic=statistic, storage=storage)
    check_memory(y, predictors, storage=storage, groups=groups, in_place=overwrite_inputs)
    prep = _design.prepare(y, predictors, directed=directed, groups=groups, dyads=dyads)
    # complete float64 data: the fit comes from the QR the statistics make of their layers;
    # float32 layers or missing dyads: a QR of the float64 inputs of its own, first
    from_layers = prep.complete and storage == "float64" and prep.exact is None
    fit = None if from_layers else _design.observed_fit(prep, pivot=fit_pivot(prep, storage))
    # statistics that overwrite the inputs need their fingerprints first
    fingerprints = input_fingerprints(prep) if overwrite_inputs else None
    reason = None if ci is None else interval_reason(scheme, statistic, prep.complete)
    interval = ci is not None and reason is None
    stats = build_statistics(prep, scheme=scheme, statistic=statistic, storage=storage,
                             overwrite=bool(overwrite_inputs), interval=interval,
                             classical=from_layers)
    if fit is None:
        fit = stats.fit
    settings = dict(kind="regression", model="linear", scheme=scheme, statistic=statistic,
                    method=None, storage=storage, dyads=dyads,
                    groups=groups_fingerprint(groups))
    if interval:
        settings["stored interval columns"] = stats.extra
    info = summary(prep, kind="regression", model="linear", scheme=scheme,
                   statistic=statistic, method=None, n_dyads=fit.n_dyads,
                   terms=("intercept",) + prep.names)
    if ci is not None:
        info["interval"] = interval_summary(ci, reason, stats.ci_scale)
    fit_arrays = dict(coef=fit.coef, se=fit.se, stat=fit.t if statistic == "t" else fit.coef,
                      fit=np.array([fit.r2, np.nan]))
    return Plan(kernel=stats, blocks=prep.blocks, chunk_size=stats.chunk_size(),
                fit=fit_arrays, summary=info,
                identity=dense_identity(prep, settings, fingerprints),
                expected=fit.t[1:] if statistic == "t" else None, extra=stats.extra)
