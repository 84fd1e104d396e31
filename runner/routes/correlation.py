"""QAP correlation (the Mantel test for networks) and the layer correlation matrix.

Pearson r between two networks over the dyad set, or Spearman's on average ranks of the
dyad values (Mantel 1967, Cancer Research 27:209-220; Hubert & Schultz 1976; Krackhardt
1987). Sums and sums of squares are invariant under relabelling, so only the cross product
changes per relabelling: the statistics are read off the same Gram kernels as the linear
schemes (``linear.GramStatistics``).

Several networks (layers of one multilayer network) give the matrix of pairwise
correlations from shared relabellings, one relabelling per network but the first
(:class:`LayerStatistics`), with familywise adjusted p-values from the pipeline.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, replace
from typing import Any, Mapping, Sequence

import numpy as np
from scipy.stats import rankdata

from ..errors import InputError
from ..inputs import design as _design
from ..inputs.blocks import Blocks
from ..inputs.design import Prepared, iter_dyad_rows, standardise
from ..inputs.dyadic import network_name
from ..inputs.memory import check_dense_route
from ..settings import check_correlation
from .linear import STORAGE, GramStatistics, Pass, _identity_gram, _stack
from .plan import (Plan, chunk_size_for, dense_identity, groups_fingerprint, input_fingerprints,
                   summary)


def build_correlation_statistics(prep: Prepared, *, method: str, storage: str = "float64",
                                 overwrite: bool = False) -> GramStatistics:
    """QAP correlation of the response with one predictor (Pearson or Spearman).

    ``overwrite``: as in ``linear.build_statistics`` (Spearman ranks into new arrays
    whatever it says).
    """
    check_correlation(method=method, storage=storage)
    if prep.k != 1:
        raise InputError(f"correlation takes exactly one predictor network; got {prep.k}")
    if method == "spearman":
        prep = _ranked(prep)
    mean, sd = standardise(prep)
    both = prep.n_dyads if prep.complete else sum(
        int((~np.isnan(block).any(axis=1)).sum()) for block in iter_dyad_rows(prep, prep.matrices))
    if both < 3:
        raise InputError(f"too few dyads for a correlation: {both} dyads where both "
                         f"{prep.response_name!r} and {prep.names[0]!r} are observed")
    for layer, name in ((0, prep.names[0]), (1, prep.response_name)):
        if not sd[layer] > 0:
            raise InputError(f"{name!r} has no variation over the dyad set")
    b = _stack(prep, [0], mean, sd, storage, overwrite)
    a = _stack(prep, [1], mean, sd, storage, overwrite)
    idx = np.zeros(1, np.int64)
    gram0 = _identity_gram(prep, b, idx, a, idx) if prep.complete else None
    ps = Pass(b, idx, a, idx, gram0, np.zeros((1, 3, 1)), np.zeros(1, np.int64), np.ones(1))
    return GramStatistics((ps,), 1, True, True, prep.col_start, prep.col_stop, prep.n_dyads)


def _ranked(prep: Prepared) -> Prepared:
    """Replace each matrix's dyad values by their average ranks (ties share a rank)."""
    mats = []
    for a in prep.matrices:
        r = np.full(a.shape, np.nan)
        vals = a[prep.mask]
        ok = ~np.isnan(vals)
        ranks = np.full(vals.shape, np.nan)
        ranks[ok] = rankdata(vals[ok], method="average")
        r[prep.mask] = ranks
        mats.append(prep.mirror(r))
    return replace(prep, matrices=tuple(mats), exact=None)


def pair_label(a: str, b: str) -> str:
    """The term name of the correlation of networks ``a`` and ``b``."""
    return f"{a} & {b}"


def copy_blocks(blocks: Blocks, copies: int) -> Blocks:
    """``copies`` independent relabellings as one relabelling of ``copies`` stacked node sets.

    Copy c holds positions c n .. (c + 1) n - 1; every block is repeated per copy, so a
    random draw (or the exact enumeration) of the stacked set gives each copy its own,
    independent relabelling within the same groups.
    """
    n, m = blocks.n_rows, blocks.n_cols
    rows = tuple((s + c * n, e + c * n) for c in range(copies) for s, e in blocks.row_blocks)
    if blocks.col_blocks is None:
        return Blocks(n * copies, n * copies, rows, None)
    cols = tuple((s + c * m, e + c * m) for c in range(copies) for s, e in blocks.col_blocks)
    return Blocks(n * copies, m * copies, rows, cols)


@dataclass(frozen=True, eq=False)
class LayerStatistics:
    """Pairwise correlations of K networks, network 0 fixed and networks 1..K-1 each
    relabelled by its own permutation (the K - 1 stacked copies of ``copy_blocks``).

    The pair (i, j) compares pi_i(N_i) with pi_j(N_j) (pi_0 the identity); summing over
    the dyad set, which every relabelling maps onto itself, this equals the correlation of
    N_i with N_j relabelled by sigma = pi_j o pi_i^-1, which the pair's own correlation
    plan computes (N_j read through sigma, N_i in place).
    """

    pair_plans: tuple[GramStatistics, ...]
    pairs: tuple[tuple[int, int], ...]
    n: int
    m: int
    two_mode: bool

    @property
    def k(self) -> int:
        return len(self.pairs)

    @property
    def passes(self) -> tuple:
        return tuple(ps for plan in self.pair_plans for ps in plan.passes)

    @property
    def n_dyads(self) -> int:
        return self.pair_plans[0].n_dyads

    def chunk_size(self) -> int:
        """Permutations per chunk: every pair's kernel work counts (``plan.CHUNK_WORK``)."""
        return chunk_size_for(self.n_dyads * sum((p.rel_idx.size + 1) * (p.fix_idx.size + 1)
                                                 for p in self.passes))

    def _layer(self, perms: np.ndarray, layer: int, size: int) -> np.ndarray:
        if layer == 0:  # network 0 stays in place
            return np.broadcast_to(np.arange(size, dtype=np.int64), (perms.shape[0], size))
        s = (layer - 1) * size
        return perms[:, s:s + size] - s

    def statistics(self, row_perms: np.ndarray, col_perms: np.ndarray) -> np.ndarray:
        """Correlations (B, pairs) of B stacked relabellings."""
        out = np.empty((row_perms.shape[0], self.k))
        for p, ((i, j), plan) in enumerate(zip(self.pairs, self.pair_plans)):
            sig_r = self._compose(row_perms, i, j, self.n)
            sig_c = self._compose(col_perms, i, j, self.m) if self.two_mode else sig_r
            out[:, p] = plan.statistics(sig_r, sig_c)[:, 0]
        return out

    def _compose(self, perms: np.ndarray, i: int, j: int, size: int) -> np.ndarray:
        pj = self._layer(perms, j, size)
        if i == 0:
            return np.ascontiguousarray(pj, dtype=np.int64)
        inv_i = np.argsort(self._layer(perms, i, size), axis=1)
        # sigma(a) = pi_j(pi_i^-1(a))
        return np.ascontiguousarray(np.take_along_axis(pj, inv_i, axis=1), dtype=np.int64)


def _layer_items(networks: Any) -> list[tuple[str, Any]]:
    if isinstance(networks, Mapping):
        items = [(str(k), v) for k, v in networks.items()]
    elif isinstance(networks, (list, tuple)):
        items = [(network_name(v) or f"network{i + 1}", v)
                 for i, v in enumerate(networks)]
    else:
        raise InputError("correlate: give two networks (a, b), or a list or dict of networks; "
                         f"got one {type(networks).__name__}")
    if len(items) < 2:
        raise InputError(f"correlate: a list or dict needs at least 2 networks; got {len(items)}")
    names = [n for n, _ in items]
    dup = sorted({n for n in names if names.count(n) > 1})
    if dup:
        raise InputError(f"correlate: duplicate network name {dup[0]!r}")
    return items


def json_names(names: Sequence[str]) -> str:
    """Network names as one identity string (their order matters)."""
    return json.dumps(list(names))

def correlation_fit(stats: Any, blocks: Blocks, n_dyads: Any) -> dict:
    """Observed correlations (through the kernels, as the identity relabelling) and their
    classical standard errors sqrt((1 - r^2) / (N - 2))."""
    ident = (np.arange(blocks.n_rows, dtype=np.int64)[None, :],
             np.arange(blocks.n_cols, dtype=np.int64)[None, :])
    r = stats.statistics(*ident)[0]
    with np.errstate(divide="ignore", invalid="ignore"):
        se = np.sqrt((1 - r ** 2) / (np.asarray(n_dyads, dtype=np.float64) - 2))
    return dict(coef=r, se=se, stat=r, fit=np.array([np.nan, np.nan]))


def _count_complete(prep: Prepared) -> int:
    total = 0
    for block in _design.iter_dyad_rows(prep, prep.matrices):
        total += int((~np.isnan(block).any(axis=1)).sum())
    return total


def plan(a: Any, b: Any, *, method: str = "pearson", storage: str = "float64",
         directed: bool | None = None, groups: Any = None, dyads: str | None = None,
         overwrite_inputs: bool = False) -> Plan:
    """The dense correlation route: network ``b`` relabelled against ``a``."""
    check_correlation(method=method, storage=storage)
    check_dense_route(a, [b], route="correlation", groups=groups,
                      extra_layers=2 if method == "spearman" else 0,
                      itemsize=np.dtype(STORAGE[storage]).itemsize, in_place=overwrite_inputs)
    bname = network_name(b) or "b"
    prep = _design.prepare(a, {bname: b}, directed=directed, groups=groups, dyads=dyads,
                           response_name=network_name(a) or "a")
    n_dy = prep.n_dyads if prep.complete else int(_count_complete(prep))
    # statistics that overwrite the inputs need their fingerprints first
    fingerprints = input_fingerprints(prep) if overwrite_inputs else None
    stats = build_correlation_statistics(prep, method=method, storage=storage,
                                         overwrite=bool(overwrite_inputs))
    settings = dict(kind="correlation", model="correlation", scheme="y", statistic="r",
                    method=method, storage=storage, dyads=dyads,
                    groups=groups_fingerprint(groups))
    info = summary(prep, kind="correlation", model="correlation", scheme="y",
                   statistic="r", method=method, n_dyads=n_dy, terms=prep.names)
    return Plan(kernel=stats, blocks=prep.blocks, chunk_size=stats.chunk_size(),
                fit=correlation_fit(stats, prep.blocks, n_dy), summary=info,
                identity=dense_identity(prep, settings, fingerprints))


def layers_plan(networks: Any, *, method: str = "pearson", storage: str = "float64",
                directed: bool | None = None, groups: Any = None,
                dyads: str | None = None) -> Plan:
    """Pairwise QAP correlations of several networks from shared relabellings.

    Permutation i draws one relabelling for each network but the first; every pair's
    correlation is computed from the same draws. Each pair's null is a valid QAP null (the
    relabelling of one network relative to the other is uniform over all relabellings),
    and together they reproduce the joint null of mutually independent networks, which
    the max-statistic adjustment (Westfall & Young 1993) needs; relabelling every network
    by one common permutation would leave every correlation unchanged, and relabelling
    only the second network of each pair by one common permutation would not reproduce
    that joint null.
    """
    check_correlation(method=method, storage=storage)
    items = _layer_items(networks)
    check_dense_route(items[0][1], [v for _, v in items[1:]], route="correlation",
                      groups=groups, extra_layers=len(items) if method == "spearman" else 0,
                      itemsize=np.dtype(STORAGE[storage]).itemsize)
    names = [n for n, _ in items]
    prep = _design.prepare(items[0][1], {n: v for n, v in items[1:]}, directed=directed,
                           groups=groups, dyads=dyads, response_name=names[0])
    K = len(items)
    mats = (prep.matrices[-1],) + tuple(prep.matrices[:-1])  # network order
    pairs = tuple((i, j) for i in range(K) for j in range(i + 1, K))
    pair_stats, n_pair = [], []
    for i, j in pairs:
        pp = replace(prep, names=(names[j],), response_name=names[i],
                     matrices=(mats[j], mats[i]), exact=None)
        pair_stats.append(build_correlation_statistics(pp, method=method, storage=storage))
        ok = prep.mask & ~np.isnan(mats[i]) & ~np.isnan(mats[j])
        n_pair.append(prep.n_dyads if prep.complete else int(np.count_nonzero(ok)))
    n, m = prep.mask.shape
    stats = LayerStatistics(tuple(pair_stats), pairs, n, m, prep.two_mode)
    run_prep = replace(prep, blocks=copy_blocks(prep.blocks, K - 1))
    labels = [pair_label(names[i], names[j]) for i, j in pairs]
    settings = dict(kind="layer correlations", model="correlation", scheme="y", statistic="r",
                    method=method, storage=storage, dyads=dyads, layers=json_names(names),
                    groups=groups_fingerprint(groups))
    info = summary(prep, kind="layer correlations", model="correlation", scheme="y",
                   statistic="r", method=method, n_dyads=prep.n_dyads, terms=labels)
    info.update(tested=labels, layers=names, pairs=[list(p) for p in pairs])
    return Plan(kernel=stats, blocks=run_prep.blocks, chunk_size=stats.chunk_size(),
                fit=correlation_fit(stats, run_prep.blocks, n_pair), summary=info,
                identity=dense_identity(run_prep, settings))
