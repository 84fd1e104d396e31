"""From user inputs to aligned arrays: dyad set, relabelling blocks, observed fit.

``prepare`` turns a response and predictors (arrays, Dyadic, networkx, scipy.sparse or
derived predictors) into float64 matrices on one node order, decides directedness, builds
the dyad set and the relabelling blocks, and checks the inputs. The internal node order
is decided by the labels (``_group_order``): groups are contiguous ranges, and nodes are
in label order inside them, so the row order the data came in never changes a result.
``observed_fit`` gives the classical coefficients and standard errors by a streaming QR
over the dyads (no N x p matrix is built at once).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from typing import Any, Mapping, Sequence

import numpy as np
from scipy.linalg import solve_triangular

from ..errors import DyadpermWarning, InputError
from ..kernels.options import FIT_PIVOT, QR_PIVOT
from ..kernels.stats import NO_MASK, any_nonfinite, is_symmetric, masked_moments, masked_values
from .blocks import Blocks
from .dyadic import Dyadic, NodeDerived, Reverse, _node_vector, as_dyadic, network_name
from .labels import label_order, some_labels
from .optional import is_frame, is_series
from .threads import side_by_side

# Rows of dyads handled at once by streaming passes (keeps temporaries small).
STREAM_DYADS = 1 << 20
# Missing dyad values up to which the dense linear route runs the complete-data kernel and
# corrects each relabelling's Gram at the incomplete dyads (``routes.linear._zero_missing``),
# as a share of the dyads (counted over every pass); above it every relabelling sums its
# complete dyads one by one (``gather_gram``). ``dyadperm check`` quotes it.
MISSING_SHARE = 0.05
# Rows folded into a streaming QR at once: small enough for the Householder passes over
# them to stay in cache (16384 x 6 float64 = 768 KB; measured 3x faster than 1M rows).
QR_ROWS = 1 << 14
# Condition number (of the standardised design) above which a warning is given.
COND_WARN = 1e6
# Share of a collinear set's smallest singular vector above which a predictor is named in it.
COLLINEAR_SHARE = 0.1


@dataclass(frozen=True, eq=False)
class Prepared:
    """Inputs on the engine's internal node order.

    ``matrices`` holds the predictors then the response, each (n, m) float64 in internal
    order, NaN where missing. Cells off the dyad set are unspecified (the user's own values
    when the inputs are used as given, NaN in reordered copies): read dyad values through
    ``mask``. ``mask`` marks the structural dyad
    set. ``row_order``/``col_order`` map internal positions to the user's node positions
    (the engine's order: groups contiguous, by label inside them; see ``_group_order``).
    """

    names: tuple[str, ...]
    response_name: str
    matrices: tuple[np.ndarray, ...]
    mask: np.ndarray
    blocks: Blocks
    col_start: np.ndarray
    col_stop: np.ndarray
    row_order: np.ndarray
    col_order: np.ndarray
    labels: tuple[str, ...]
    col_labels: tuple[str, ...] | None
    directed: bool
    complete: bool
    n_dyads: int
    #: waves of one node set interleaved in the columns (``dyadperm.inputs.waves``)
    waves: int = 1
    #: leading predictors that are fixed terms, never tested (wave intercepts)
    fixed: int = 0
    #: float64 values of ``matrices`` held in float32 (a study's float32 layers): per
    #: matrix, rows read again from its file (``Dyadic.source``) or the matrix itself;
    #: None when every matrix is float64. The observed fit reads these.
    exact: tuple | None = None

    @property
    def two_mode(self) -> bool:
        return self.col_labels is not None

    def holds(self) -> np.ndarray:
        """Cells that hold dyad values: the dyad set, and for undirected data its mirror
        image (relabelled reads land in either triangle; with waves, within each wave)."""
        if self.directed or self.two_mode:
            return self.mask
        if self.waves == 1:
            return self.mask | self.mask.T
        n, w = self.mask.shape[0], self.waves
        cube = self.mask.reshape(n, n, w)
        return (cube | cube.transpose(1, 0, 2)).reshape(n, n * w)

    def mirror(self, out: np.ndarray) -> np.ndarray:
        """Undirected one-mode data: the lower triangle of ``out`` (a matrix of this
        layout) from the upper one, in place, as ``prepare`` stores dyad values (with
        waves, within each wave). Returns ``out``."""
        if self.directed or self.two_mode:
            return out
        n = out.shape[0]
        lower = np.tril_indices(n, -1)
        if self.waves == 1:
            out[lower] = out.T[lower]
        else:
            cube = out.reshape(n, n, self.waves)  # a view of ``out``
            cube[lower] = cube.transpose(1, 0, 2)[lower]
        return out

    @property
    def k(self) -> int:
        return len(self.names)


def name_predictors(predictors: Any, named: tuple[type, ...] = (Dyadic, NodeDerived, Reverse)
                    ) -> list[tuple[str, Any]]:
    """Predictors as (name, object) pairs: dict keys, or names/x1, x2, ... for a list.

    In a list, objects of the ``named`` types keep their own ``name`` when they have one.
    """
    if isinstance(predictors, Mapping):
        items = [(str(k), v) for k, v in predictors.items()]
    elif isinstance(predictors, (list, tuple)):
        items = []
        for i, v in enumerate(predictors):
            name = network_name(v) if isinstance(v, named) else None
            items.append((name or f"x{i + 1}", v))
    else:
        items = [(network_name(predictors) or "x1", predictors)]
    if not items:
        raise InputError("predictors: give at least one predictor")
    names = [n for n, _ in items]
    dup = {n for n in names if names.count(n) > 1}
    if dup:
        raise InputError(f"predictors: duplicate name {sorted(dup)[0]!r}")
    if "intercept" in names:
        raise InputError("predictors: the name 'intercept' is reserved for the constant term")
    return items


def prepare(y: Any, predictors: Any, *, directed: bool | None = None, groups: Any = None,
            dyads: str | None = None, response_name: str = "response") -> Prepared:
    """Align the response and predictors, and build the dyad set and relabelling blocks."""
    resp = as_dyadic(y, name=network_name(y) or response_name)
    labels = resp.labels
    col_labels = resp.col_labels
    two_mode = resp.two_mode
    items = name_predictors(predictors)

    mats: list[np.ndarray] = []
    dyadics: list[tuple[str, Dyadic | None]] = []
    for name, obj in items:
        mat, dy = _predictor_matrix(name, obj, resp)
        mats.append(mat)
        dyadics.append((name, dy))
    mats.append(resp.values)
    dyadics.append((resp.name, resp))
    names = tuple(n for n, _ in items)
    for name, mat in zip(names + (resp.name,), mats):
        if mat.shape != resp.shape:
            raise InputError(f"predictor {name!r} has shape {mat.shape[0]} x {mat.shape[1]}; "
                             f"the response has {resp.shape[0]} x {resp.shape[1]}")
    # networks were checked for infinite values when their Dyadic was made; the
    # predictors made from node attributes are checked here
    made = [(name, mat) for name, mat, (_, dy) in zip(names + (resp.name,), mats, dyadics)
            if dy is None]
    infinite = side_by_side(lambda mat: _has_nonfinite(mat, nan=False),
                            [mat for _, mat in made], resp.shape[0] * resp.shape[1])
    for (name, _), inf in zip(made, infinite):
        if inf:
            raise InputError(f"{name!r} has an infinite value; use NaN for a missing value")

    n, m = resp.shape
    if (n < 2 or m < 2) if two_mode else n < 3:
        raise InputError(f"too few nodes: got {n} x {m}; need at least 3 nodes (2 x 2 two-mode)")

    # directedness
    if two_mode:
        if directed is False:
            raise InputError("directed=False does not apply to two-mode (rectangular) data")
        is_directed = True
    else:
        sym = side_by_side(_symmetric, mats, n * n)
        asym = [nm for nm, ok in zip(names + (resp.name,), sym) if not ok]
        explicit = [dy.directed for _, dy in dyadics if dy is not None and dy.directed is not None]
        is_directed = decide_directed(directed, asym, explicit)

    # groups and blocks
    groups = node_groups(groups, labels)
    row_order, row_blocks, codes = _group_order(groups, n, "groups", labels)
    if groups is not None and two_mode:
        raise InputError("groups: supported for one-mode networks only")
    dyads = decide_dyads(dyads, groups)
    if two_mode:
        col_order = label_order(col_labels)
        blocks = Blocks(n, m, ((0, n),), ((0, m),))
    else:
        col_order = row_order
        blocks = Blocks(n, n, row_blocks, None)

    # structural dyad set, internal order
    if two_mode:
        mask = np.ones((n, m), dtype=bool)
    else:
        mask = ~np.eye(n, dtype=bool)
        if not is_directed:
            mask &= np.triu(np.ones((n, n), dtype=bool), 1)
        if groups is not None and dyads == "within":
            c = codes[row_order]
            mask &= c[:, None] == c[None, :]
    excluded = None
    for _, dy in dyadics:
        if dy is not None and dy.excluded is not None:
            ex = dy.excluded[np.ix_(row_order, col_order)]
            excluded = ex if excluded is None else (excluded | ex)
    if excluded is not None:
        mask &= ~excluded

    col_start, col_stop = _column_ranges(mask, two_mode, is_directed, groups is not None and dyads == "within",
                                         row_blocks)
    internal = []
    identity = np.array_equal(row_order, np.arange(n)) and np.array_equal(col_order, np.arange(m))
    for mat in mats:
        if identity and excluded is None:
            # no copy: the inputs already stand in node order, and everything downstream
            # reads dyad values through `mask` (layers blank the cells off it)
            internal.append(mat)
            continue
        a = np.array(mat, copy=True) if identity else mat[np.ix_(row_order, col_order)]
        a[~mask] = np.nan
        if not is_directed:
            # dyad values live in the upper triangle; mirror so relabelled reads see them
            lower = np.tril_indices(n, -1)
            a[lower] = a.T[lower]
        internal.append(a)
    # a network without NaN (seen when its Dyadic was made) has none on the dyad set;
    # only the others are scanned
    unsure = [a for a, (_, dy) in zip(internal, dyadics) if dy is None or dy.has_nan]
    complete = excluded is None and not any(side_by_side(
        lambda a: _has_nonfinite(a, nan=True, mask=mask), unsure, mask.size))
    n_dyads = int(mask.sum())
    labels_out = tuple(labels)
    exact = None
    if any(a.dtype != np.float64 for a in internal):
        exact = tuple(_exact_values(a, mat, dy, row_order, col_order)
                      for a, mat, (_, dy) in zip(internal, mats, dyadics))
    return Prepared(names, resp.name, tuple(internal), mask, blocks, col_start, col_stop,
                    row_order, col_order, labels_out, tuple(col_labels) if two_mode else None,
                    is_directed, complete, n_dyads, exact=exact)


def _exact_values(a: np.ndarray, mat: np.ndarray, dy: Dyadic | None, row_order: np.ndarray,
                  col_order: np.ndarray) -> Any:
    """The float64 values of internal matrix ``a`` (made from input ``mat``): ``a`` itself
    when float64, else the rows its Dyadic's ``source`` reads, put in the internal order."""
    if a.dtype == np.float64 or dy is None or dy.source is None or mat is not dy.values:
        return a
    return dy.source if a is mat else dy.source.reordered(row_order, col_order)


def decide_directed(directed: bool | None, asymmetric: Sequence[str],
                    explicit: Sequence[bool]) -> bool:
    """Directedness of one-mode data: the argument, else the inputs' own flags, else
    directed exactly when some input is asymmetric; directed=False with an asymmetric
    input is an error naming it."""
    if directed is None and explicit:
        directed = any(explicit)
    if directed is False and asymmetric:
        raise InputError(f"directed=False but {asymmetric[0]!r} is not symmetric")
    return bool(asymmetric) if directed is None else bool(directed)


def decide_dyads(dyads: str | None, groups: Any) -> str:
    """'within' (default with groups) or 'all'; either needs groups."""
    if groups is None and dyads is not None:
        raise InputError("dyads: 'within' and 'all' need groups")
    dyads = dyads or ("within" if groups is not None else "all")
    if dyads not in ("within", "all"):
        raise InputError(f"dyads must be 'within' or 'all'; got {dyads!r}")
    return dyads


def _predictor_matrix(name: str, obj: Any, resp: Dyadic) -> tuple[np.ndarray, Dyadic | None]:
    labels, col_labels = resp.labels, resp.col_labels
    if isinstance(obj, NodeDerived):
        d = NodeDerived(obj.kind, obj.values, obj.col_values, obj.name or name)
        return d.dense(labels, col_labels), None
    if isinstance(obj, Reverse):
        if resp.two_mode:
            raise InputError(f"predictor {name!r}: reverse needs one-mode data")
        net = resp if obj.network is None else _align(name, obj.network, resp)
        return np.ascontiguousarray(net.values.T), net
    dy = _align(name, obj, resp)
    return dy.values, dy


def _align(name: str, obj: Any, resp: Dyadic) -> Dyadic:
    """A network on the response's node order (by label when both carry labels)."""
    if isinstance(obj, Dyadic) and obj is resp:
        return resp
    shape = getattr(obj, "shape", None)
    # a DataFrame is aligned by its labels: a wrong node set is named by the label check
    if not isinstance(obj, Dyadic) and not is_frame(obj) and shape is not None \
            and tuple(shape) != resp.shape:
        raise InputError(f"predictor {name!r} has shape {shape[0]} x {shape[1]}; the response "
                         f"has {resp.shape[0]} x {resp.shape[1]}")
    dy = as_dyadic(obj, name=name, labels=None if isinstance(obj, Dyadic) else resp.labels,
                   col_labels=None if isinstance(obj, Dyadic) else resp.col_labels)
    if dy.two_mode != resp.two_mode:
        raise InputError(f"predictor {name!r} is {'two' if dy.two_mode else 'one'}-mode but the "
                         f"response is {'two' if resp.two_mode else 'one'}-mode")
    if dy.labels == resp.labels and dy.col_node_labels == resp.col_node_labels:
        return dy
    rows = _reorder(name, dy.labels, resp.labels, "row" if resp.two_mode else "node")
    cols = _reorder(name, dy.col_node_labels, resp.col_node_labels, "column")
    ex = None if dy.excluded is None else dy.excluded[np.ix_(rows, cols)]
    src = None if dy.source is None else dy.source.reordered(rows, cols)
    return Dyadic(dy.values[np.ix_(rows, cols)], resp.labels, resp.col_labels, dy.directed, ex, name,
                  src)


def _reorder(name: str, have: Sequence[str], want: Sequence[str], what: str) -> np.ndarray:
    """Positions in ``have`` of the labels ``want``; one InputError naming the first few
    labels that do not match when the two are not the same node set."""
    pos = {lab: i for i, lab in enumerate(have)}
    wanted = set(want)
    extra = [lab for lab in have if lab not in wanted]
    missing = [lab for lab in want if lab not in pos]
    if extra or missing:
        parts = ([f"not in the response: {some_labels(extra)}"] if extra else []) \
            + ([f"missing: {some_labels(missing)}"] if missing else [])
        raise InputError(f"predictor {name!r}: its {what} labels do not match the "
                         "response's; " + "; ".join(parts))
    return np.array([pos[lab] for lab in want], dtype=np.int64)


def node_groups(groups: Any, labels: Sequence[str]) -> Any:
    """``groups`` as one label per node in the order of ``labels``: a pandas Series is
    aligned by its index (its labels beyond ``labels`` unused); anything else is taken in
    node order as given."""
    if is_series(groups):
        return _node_vector(groups, labels, "groups")
    return groups


def _has_nonfinite(mat: np.ndarray, *, nan: bool, mask: np.ndarray | None = None) -> bool:
    """Whether some cell of ``mat`` (on ``mask``) is NaN (``nan``) or infinite (else): one
    pass of ``kernels.stats.any_nonfinite`` (no temporary), stopping at the first."""
    arr = np.asarray(mat)
    if arr.dtype.kind != "f":
        return False  # integer and boolean cells are finite
    return bool(any_nonfinite(arr, NO_MASK if mask is None else mask, nan))


def _symmetric(mat: np.ndarray) -> bool:
    """Equal to its transpose off the diagonal (NaN equals NaN): ``kernels.stats.
    is_symmetric``, by tiles, stopping at the first difference."""
    return bool(is_symmetric(np.asarray(mat)))


def _group_order(groups: Any, n: int, what: str, labels: Sequence[str] | None = None):
    """The engine's node order: groups contiguous, and within a group by label.

    Groups follow the order of their values; inside each group (and everywhere without
    groups) nodes follow :func:`dyadperm.labels.label_order` of ``labels`` (None: node
    positions), so the order depends on the labels, never on the order the nodes were
    given in. Returns (order, blocks, group codes per node or None).
    """
    by_label = (np.arange(n, dtype=np.int64) if labels is None
                else label_order(labels))
    if groups is None:
        return by_label, ((0, n),), None
    g = np.asarray(groups)
    if g.ndim != 1 or g.shape[0] != n:
        raise InputError(f"{what}: need one label per node ({n}); got shape {g.shape}")
    if g.dtype.kind == "f" and np.isnan(g).any():
        raise InputError(f"{what}: node {int(np.flatnonzero(np.isnan(g))[0])} has no group (NaN)")
    _, codes = np.unique(g.astype(str) if g.dtype.kind == "O" else g, return_inverse=True)
    rank = np.empty(n, dtype=np.int64)
    rank[by_label] = np.arange(n, dtype=np.int64)
    order = np.lexsort((rank, codes)).astype(np.int64)
    sorted_codes = codes[order]
    cuts = np.flatnonzero(np.diff(sorted_codes)) + 1
    starts = np.concatenate([[0], cuts])
    stops = np.concatenate([cuts, [n]])
    blocks = tuple((int(s), int(e)) for s, e in zip(starts, stops))
    return order, blocks, codes


def _column_ranges(mask, two_mode, directed, within, row_blocks):
    n, m = mask.shape
    start = np.zeros(n, dtype=np.int64)
    stop = np.full(n, m, dtype=np.int64)
    if two_mode:
        return start, stop
    if within:
        for s, e in row_blocks:
            start[s:e] = s
            stop[s:e] = e
    if not directed:
        start = np.maximum(start, np.arange(n, dtype=np.int64) + 1)
        stop = np.maximum(stop, start)
    return start, stop


def iter_dyad_rows(prep: Prepared, arrays: Sequence[np.ndarray]):
    """Yield, block of rows by block, the values of ``arrays`` on the dyad set (N_block, L)."""
    n = prep.mask.shape[0]
    m = prep.mask.shape[1]
    step = max(1, STREAM_DYADS // max(m, 1))
    for i0 in range(0, n, step):
        sel = prep.mask[i0:i0 + step]
        yield np.stack([a[i0:i0 + step][sel] for a in arrays], axis=1)


def _design_rows(prep: Prepared, arrays: Sequence[Any]):
    """Yield, block of rows by block, [1, values of ``arrays``] on the dyad set (N_block,
    1 + L): the rows of the design matrix, written in place (no stacked copy to widen)."""
    n, m = prep.mask.shape
    step = max(1, STREAM_DYADS // max(m, 1))
    for i0 in range(0, n, step):
        sel = prep.mask[i0:i0 + step]
        z = np.empty((int(np.count_nonzero(sel)), 1 + len(arrays)))
        z[:, 0] = 1.0
        for c, a in enumerate(arrays):
            masked_values(np.asarray(a[i0:i0 + step]), sel, z[:, 1 + c])
        yield z


@dataclass(frozen=True)
class ObservedFit:
    """Classical least-squares fit on the observed dyads (intercept first)."""

    coef: np.ndarray
    se: np.ndarray
    t: np.ndarray
    r2: float
    n_dyads: int
    rss: float
    cond: float


def fold_rows(r: np.ndarray, rows: np.ndarray) -> np.ndarray:
    """The R factor of [r; rows] (a step of a tall-skinny QR), folding ``rows`` in pieces
    of ``QR_ROWS`` so each Householder pass runs in cache (3x faster than one QR of a
    million rows; as stable, being the same TSQR with more, smaller blocks)."""
    for s in range(0, rows.shape[0], QR_ROWS):
        r = np.linalg.qr(np.concatenate([r, rows[s:s + QR_ROWS]], axis=0), mode="r")
    return r


def observed_fit(prep: Prepared, *, pivot: float = FIT_PIVOT,
                 response: bool = True) -> ObservedFit:
    """OLS by a streaming QR of [1, X, y] over the complete observed dyads.

    Each block of dyads is stacked under the running R factor and re-factorised
    (tall-skinny QR), which is as stable as a QR of the whole N x (p + 1) matrix. Before
    anything is solved, the design must pass :func:`check_design` with the relative pivot
    ``pivot`` the route's own fits resolve (``kernels.options``: ``QR_PIVOT`` for the dense
    linear route on complete float64 data, else ``FIT_PIVOT``), and with ``response`` the
    response must keep residual variation (:func:`check_response`).
    """
    k = prep.k
    p = k + 1
    r_acc = np.zeros((0, p + 1))
    n_obs = 0
    ysum = 0.0
    values = prep.matrices if prep.exact is None else prep.exact  # float64 either way
    for block in _design_rows(prep, values):
        if not prep.complete:  # complete data: every dyad of the set is kept
            block = block[~np.isnan(block).any(axis=1)]
        if block.shape[0] == 0:
            continue
        n_obs += block.shape[0]
        ysum += float(block[:, p].sum())
        r_acc = fold_rows(r_acc, block)
    if n_obs <= p:
        raise InputError(f"too few dyads for the model: {n_obs} complete dyads for {p} terms")
    r = r_acc[:p + 1, :p + 1]
    rx = r[:p, :p]
    where = dyads_phrase(prep, n_obs)
    raw = np.sqrt((rx[:, 1:] * rx[:, 1:]).sum(axis=0))  # the predictors' norms before centring
    cond = check_design(rx[1:, 1:], prep.names, pivot=pivot, raw_norms=raw, where=where)
    y_piv = abs(r[p, p]) if r.shape[0] > p else 0.0
    ymean = ysum / n_obs
    tss = 0.0
    # complete data: the response alone (the same values, summed in the same order)
    for block in iter_dyad_rows(prep, values[-1:] if prep.complete else values):
        ok = ~np.isnan(block).any(axis=1) if not prep.complete else slice(None)
        tss += float(((block[ok, -1] - ymean) ** 2).sum())
    if tss <= 0.0:
        raise InputError(f"response {prep.response_name!r} has no variation over the dyad set")
    rss = float(y_piv ** 2)
    if response:
        check_response(rss, tss, prep.response_name, pivot=FIT_PIVOT, where=where)
    coef = solve_triangular(rx, r[:p, p])
    rinv = solve_triangular(rx, np.eye(p))
    sigma2 = rss / (n_obs - p)
    se = np.sqrt(sigma2 * (rinv * rinv).sum(axis=1))
    with np.errstate(divide="ignore", invalid="ignore"):
        t = coef / se
    warn_condition(rx[1:, 1:], cond, prep.names)
    return ObservedFit(coef, se, t, 1.0 - rss / tss, n_obs, rss, cond)


def check_factor(prep: Prepared, r: np.ndarray, mean: np.ndarray, sd: np.ndarray, *,
                 pivot: float) -> float:
    """The one rule on complete data from the R factor ``r`` (k + 1, k + 1) of their
    standardised layers [z_1 .. z_k, z_y] (see :func:`fit_from_factor`): the design by
    :func:`check_design` (the predictors' norms before centring come from their means and
    spreads) and the response's residual by :func:`check_response`. Returns the
    condition number of the standardised predictors."""
    k = prep.k
    n_obs = prep.n_dyads
    if n_obs <= k + 1:
        raise InputError(f"too few dyads for the model: {n_obs} dyads for {k + 1} terms")
    # |x_j| / sd_j: the raw norm in standardised units (the centred one is sqrt(N))
    raw = np.sqrt(n_obs * (mean[:k] / sd[:k]) ** 2 + n_obs)
    cond = check_design(r[:k, :k], prep.names, pivot=pivot, raw_norms=raw)
    check_response(float(r[k, k] ** 2), float((r[:, k] ** 2).sum()), prep.response_name,
                   pivot=FIT_PIVOT)
    return cond


def fit_from_factor(prep: Prepared, r: np.ndarray, mean: np.ndarray, sd: np.ndarray,
                    cond: float) -> ObservedFit:
    """OLS of the complete data from the R factor of their standardised layers.

    ``r`` (k + 1, k + 1) is an R factor (R'R = Z'Z) of Z = [z_1 .. z_k, z_y] over the dyad
    set, each z = (x - mean) / sd with the mean and spread (divisor N) of the layer over
    the dyad set -- what the dense linear route makes anyway for its orthonormal basis
    (``routes.linear._orthonormalise``), so the classical fit costs no pass of its own.
    It must have passed :func:`check_factor` (``cond``: the condition number it gave).
    Centred layers make the intercept's column orthogonal to the rest: the slopes are
    b = R_xx^-1 r_xy in standardised units, scaled by sd_y / sd_j; the intercept is
    mean_y - sum_j beta_j mean_j, with variance sigma^2 / N + mean' Cov(beta) mean; RSS =
    r_yy^2 sd_y^2 and TSS = N sd_y^2.
    """
    k = prep.k
    p = k + 1
    n_obs = prep.n_dyads
    rx = r[:k, :k]
    sx, sy = sd[:k], sd[k]
    rss_std = float(r[k, k] ** 2)
    b = solve_triangular(rx, r[:k, k])
    rinv = solve_triangular(rx, np.eye(k))
    var_std = rss_std / (n_obs - p)  # sigma^2 in units of sd_y^2
    slope_scale = sy / sx
    coef = np.empty(p)
    se = np.empty(p)
    coef[1:] = b * slope_scale
    se[1:] = np.sqrt(var_std * (rinv * rinv).sum(axis=1)) * slope_scale
    coef[0] = mean[k] - float(mean[:k] @ coef[1:])
    lead = (mean[:k] * slope_scale) @ rinv  # mean' D R^-1, D = diag(sd_y / sd_j)
    se[0] = np.sqrt(var_std * (sy * sy / n_obs + float(lead @ lead)))
    with np.errstate(divide="ignore", invalid="ignore"):
        t = coef / se
    warn_condition(rx, cond, prep.names)
    rss = rss_std * sy * sy
    tss = n_obs * sy * sy
    return ObservedFit(coef, se, t, 1.0 - rss / tss, n_obs, rss, cond)


def fit_pivot(complete: bool, *, storage: str = "float64", model: str = "linear") -> float:
    """The relative pivot a route's fits resolve (``kernels.options``): ``QR_PIVOT`` for the
    dense linear route on complete float64 data (its kernels read an orthonormal basis of
    the predictors), else ``FIT_PIVOT`` (standardised layers in Gram matrices: missing data,
    float32 layers, the logistic route's Newton steps)."""
    return QR_PIVOT if complete and storage == "float64" and model == "linear" else FIT_PIVOT


def dyads_phrase(prep: Prepared, n_obs: int) -> str:
    """Where a fit runs, for messages: the dyad set, or its complete dyads with missing data."""
    if prep.complete:
        return "over the dyad set"
    return (f"over the {n_obs:,} complete dyads (where the response and every predictor "
            "are observed)")


def check_design(factor: np.ndarray, names: Sequence[str], *, pivot: float,
                 raw_norms: np.ndarray | None = None, where: str = "over the dyad set") -> float:
    """The one rule of whether a design can be fitted (``kernels.options``).

    ``factor`` (k, k) is any F with F'F = X_c'X_c, the cross products of the k predictors
    centred over the fit's dyads (the lower-right block of the R factor of [1, X]; a
    Cholesky or eigen factor of the centred cross products). ``raw_norms`` (k,) are the
    predictors' norms before centring (None: the constant check reads ``factor`` alone).

    A predictor whose centred norm is at most ``pivot`` x its norm is (nearly) constant; a
    predictor whose residual on the others keeps less than ``pivot`` of its centred norm,
    sqrt(1 - R^2) < ``pivot`` (1 / sqrt of its variance inflation factor, from the SVD of
    the standardised F), is collinear with them. Either gives an InputError: the constant
    predictor, or the collinear set (those below ``pivot``, with those carrying the
    smallest singular vector) and the condition number of the standardised predictors.
    Returns that condition number.
    """
    k = len(names)
    if k == 0:
        return 1.0
    norms = np.sqrt((factor * factor).sum(axis=0))
    for j, name in enumerate(names):
        raw = norms[j] if raw_norms is None else raw_norms[j]
        if not norms[j] > pivot * raw or not norms[j] > 0.0:
            if not norms[j] > QR_PIVOT * raw:
                raise InputError(f"predictor {name!r} is constant {where}")
            raise InputError(f"predictor {name!r} is nearly constant {where}: its spread about "
                             f"its mean is {norms[j] / raw:.2g} of its size, below the "
                             f"{pivot:g} a fit resolves")
    fs = factor / norms
    _, sv, vt = np.linalg.svd(fs)
    scaled = vt / np.maximum(sv, np.finfo(np.float64).tiny)[:, None]
    with np.errstate(over="ignore"):
        vif = (scaled * scaled).sum(axis=0)
    apart = 1.0 / np.sqrt(vif)  # sqrt(1 - R^2) of each predictor on the others
    with np.errstate(divide="ignore"):
        cond = float(sv[0] / sv[-1]) if sv[-1] > 0.0 else float("inf")
    if not np.all(apart >= pivot):
        below = [j for j in range(k) if not apart[j] >= pivot]
        last = below[-1]  # named first: the last predictor (in model order) below the rule
        null = np.abs(vt[-1])  # the near-null combination of the standardised predictors
        partner = max((j for j in range(k) if j != last), key=lambda j: null[j])
        members = {j for j in below} | {partner} | {
            j for j in range(k) if null[j] >= COLLINEAR_SHARE * null.max()}
        others = [repr(names[j]) for j in sorted(members - {last})]
        with_ = others[0] if len(others) == 1 else ", ".join(others[:-1]) + " and " + others[-1]
        how = "perfectly" if apart.min() < QR_PIVOT else "nearly"
        raise InputError(f"predictor {names[last]!r} is {how} collinear with {with_} {where}: "
                         f"condition number {cond:.3g}; the part of {names[last]!r} apart from "
                         f"the other predictors is {apart[last]:.2g} of its spread, below the "
                         f"{pivot:g} a fit resolves; drop or combine them")
    return cond


def check_response(rss: float, tss: float, name: str, *, pivot: float = FIT_PIVOT,
                   where: str = "over the dyad set") -> None:
    """The same rule for the response: its residual on the design must keep at least
    ``pivot`` of its centred norm (sqrt(RSS / TSS) >= ``pivot``), or no t statistic (nor
    residual to relabel) can be computed from it."""
    if not rss > pivot * pivot * tss:
        frac = float(np.sqrt(max(rss, 0.0) / tss))
        raise InputError(f"response {name!r} is fitted exactly by the predictors {where}: "
                         f"its residuals keep {frac:.2g} of its spread, below the {pivot:g} "
                         "a test needs (no residual variation to compare)")


def standardised_condition(rc: np.ndarray) -> float:
    """Condition number of the centred, unit-length predictors from a factor ``rc`` of their
    centred cross products (as in :func:`check_design`)."""
    if rc.shape[0] < 2:
        return 1.0
    rs = rc / np.sqrt((rc * rc).sum(axis=0))
    sv = np.linalg.svd(rs, compute_uv=False)
    return float(sv[0] / sv[-1]) if sv[-1] > 0 else float("inf")


def warn_condition(rc: np.ndarray, cond: float, names: Sequence[str]) -> None:
    """Warn, naming the most correlated pair, when the condition number ``cond`` of the
    standardised predictors (factor ``rc`` of their centred cross products) is large."""
    if len(names) < 2 or not cond > COND_WARN:
        return
    rs = rc / np.sqrt((rc * rc).sum(axis=0))
    corr = rs.T @ rs
    np.fill_diagonal(corr, 0.0)
    a, b = np.unravel_index(np.argmax(np.abs(corr)), corr.shape)
    warnings.warn(f"predictors are nearly collinear (condition number {cond:.3g}; most "
                  f"correlated pair {names[a]!r} and {names[b]!r}, r = {corr[a, b]:.6f}): "
                  "estimates are unstable", DyadpermWarning, stacklevel=3)


def standardise(prep: Prepared) -> tuple[np.ndarray, np.ndarray]:
    """Mean and standard deviation of each matrix over the observed complete dyads."""
    if prep.complete:
        # every dyad is complete in every matrix: one kernel pass pair per matrix
        mom = np.empty((len(prep.matrices), 3))
        side_by_side(lambda c: masked_moments(prep.matrices[c], prep.mask, mom[c]),
                     range(len(prep.matrices)), prep.mask.size)
        return mom[:, 1].copy(), np.sqrt(mom[:, 2] / max(prep.n_dyads, 1))
    count = 0
    s1 = np.zeros(len(prep.matrices))
    for block in iter_dyad_rows(prep, prep.matrices):
        block = block[~np.isnan(block).any(axis=1)]
        count += block.shape[0]
        s1 += block.sum(axis=0)
    mean = s1 / max(count, 1)
    s2 = np.zeros_like(mean)
    for block in iter_dyad_rows(prep, prep.matrices):
        block = block[~np.isnan(block).any(axis=1)]
        s2 += ((block - mean) ** 2).sum(axis=0)
    sd = np.sqrt(s2 / max(count, 1))
    return mean, sd
