"""kernels/sparse_pairs.py (through runner/sparse_schemes.build_pair_sums) against plain numpy.

Source of truth for every check: the O(n^2) plain-numpy twin written here, which builds each
layer as a dense n x m array, relabels it as methods.md says (M'[i, j] = M[pr(i), pc(j)],
``M[np.ix_(pr, pc)]``; one-mode pr = pc) and sums the centred products over the dyad set
(one-mode: i != j inside a group, undirected i < j; two-mode: every cell). Each kernel
(``edge_pair_sums`` for layers met along edges, ``node_pair_sums``, ``same_same_sums``,
``gap_same_sums`` and ``gap_gap_sums`` for derived layers against derived layers) is
reached by a choice of layer kinds and the test asserts that the kernel under test was the
route taken. Inputs are seeded and include n = 2 and 3, odd sizes, ties, categories that
are empty in a group or on one side of two-mode data, groups, directed, undirected and
two-mode data, and both edge-pass directions.
"""

from __future__ import annotations

import numpy as np
import pytest

from dyadperm.kernels.sparse_pairs import (GAP, NETWORK, PAIR_SUM, RECEIVER, SAME, SENDER,
                                           gap_gap_sums, node_pair_sums)
from dyadperm.inputs.sparse import Edges
from dyadperm.routes.sparse_schemes import PairDyads, PairLayer, build_pair_sums, node_sums
from reference import KERNEL_ATOL, KERNEL_RTOL


# --- the plain twin -----------------------------------------------------------------------
def dense_layer(layer: PairLayer, dy: PairDyads) -> np.ndarray:
    """The layer as a dense (n, m) array (undirected networks in both triangles)."""
    n, m = dy.n, dy.m
    if layer.kind == NETWORK:
        X = np.zeros((n, m))
        X[layer.edges.src, layer.edges.dst] = layer.edges.w
        if dy.one_mode and not dy.directed:
            X = X + X.T
        return X
    a = None if layer.row is None else np.asarray(layer.row, dtype=np.float64)[:, None]
    b = None if layer.col is None else np.asarray(layer.col, dtype=np.float64)[None, :]
    if layer.kind == SAME:
        return (a == b).astype(np.float64)
    if layer.kind == GAP:
        return np.abs(a - b)
    if layer.kind == SENDER:
        return np.repeat(a, m, axis=1)
    if layer.kind == RECEIVER:
        return np.repeat(b, n, axis=0)
    return a + b


def dyad_mask(dy: PairDyads) -> np.ndarray:
    """The dyad set of methods.md as a boolean (n, m) array."""
    if not dy.one_mode:
        return np.ones((dy.n, dy.m), dtype=bool)
    mask = np.zeros((dy.n, dy.n), dtype=bool)
    for s, e in dy.tiles:
        mask[s:e, s:e] = True
    np.fill_diagonal(mask, False)
    if not dy.directed:
        mask &= np.triu(np.ones((dy.n, dy.n), dtype=bool), 1)
    return mask


def twin_sums(layers, rel, fix, dy, row_perms, col_perms) -> np.ndarray:
    """sum over D of (X_a[np.ix_(pr, pc)] - mean_a) * (X_c - mean_c), (B, R, F)."""
    mask = dyad_mask(dy)
    dense = [dense_layer(lay, dy) for lay in layers]
    out = np.empty((row_perms.shape[0], len(rel), len(fix)))
    for b in range(row_perms.shape[0]):
        for r, a in enumerate(rel):
            moved = dense[a][np.ix_(row_perms[b], col_perms[b])]
            for f, c in enumerate(fix):
                out[b, r, f] = ((moved[mask] - layers[a].mean)
                                * (dense[c][mask] - layers[c].mean)).sum()
    return out


# --- random inputs --------------------------------------------------------------------------
def make_dyads(rng, n, *, mode):
    """mode: 'directed', 'undirected', 'groups' (directed, two groups), 'groups-undirected',
    'two-mode' (m drawn)."""
    if mode == "two-mode":
        return PairDyads(n, int(rng.integers(2, 7)), ((0, n),), False, True)
    tiles = ((0, n),)
    if mode.startswith("groups") and n >= 4:
        cut = int(rng.integers(2, n - 1))
        tiles = ((0, cut), (cut, n))
    return PairDyads(n, n, tiles, True, "undirected" not in mode)


def make_layer(rng, kind, dy):
    """A layer of ``kind`` with ties; its mean comes from the twin (it is an input here)."""
    n, m = dy.n, dy.m
    one = dy.one_mode
    if kind == NETWORK:
        X = (rng.random((n, m)) < 0.45) * rng.integers(1, 4, (n, m)).astype(np.float64)
        X *= rng.choice([-1.0, 1.0], (n, m))
        X[~dyad_mask(dy)] = 0.0
        i, j = np.nonzero(X)
        o = np.lexsort((j, i))
        lay = PairLayer(NETWORK, None, None, Edges(i[o].astype(np.int64), j[o].astype(np.int64),
                                                   X[i, j][o]), 0.0)
    elif kind == SAME:
        # 6 codes, only some used: categories empty in a group or on one side
        row = rng.choice([0, 2, 3, 5], n)
        col = row if one else rng.choice([1, 2, 3], m)
        lay = PairLayer(SAME, row.astype(np.int64), col.astype(np.int64), None, 0.0)
    else:
        row = rng.integers(0, 3, n).astype(np.float64)  # ties
        if rng.random() < 0.5:
            row = row + rng.normal(size=n).round(1)
        col = row if one else rng.integers(-1, 3, m).astype(np.float64)
        lay = PairLayer(kind, None if kind == RECEIVER else row,
                        None if kind == SENDER else col, None, 0.0)
    mean = float(dense_layer(lay, dy)[dyad_mask(dy)].mean())
    return PairLayer(lay.kind, lay.row, lay.col, lay.edges, mean)


def draw_perms(rng, dy, B):
    rows = np.array([np.concatenate([s + rng.permutation(e - s) for s, e in dy.tiles])
                     for _ in range(B)], dtype=np.int64)
    if dy.one_mode:
        return rows, rows
    cols = np.array([rng.permutation(dy.m) for _ in range(B)], dtype=np.int64)
    return rows, cols


def check(rng, kinds, dy, *, look_up="relabelled", B=5):
    layers = [make_layer(rng, k, dy) for k in kinds]
    rel = list(range(len(layers)))
    fix = list(range(len(layers)))[::-1]
    ps = build_pair_sums(layers, rel, fix, dy, look_up=look_up)
    rows, cols = draw_perms(rng, dy, B)
    rows[0] = np.arange(dy.n)  # the identity among them
    if not dy.one_mode:
        cols[0] = np.arange(dy.m)
    got = ps.sums(rows, cols)
    want = twin_sums(layers, rel, fix, dy, rows, cols)
    np.testing.assert_allclose(got, want, rtol=KERNEL_RTOL, atol=KERNEL_ATOL)
    return ps


MODES = ["directed", "undirected", "groups", "groups-undirected", "two-mode"]
SIZES = [2, 3, 7, 12]


def sizes_for(mode):
    return [n for n in SIZES if not (mode.startswith("groups") and n < 4)]


# --- each closed form and pass against the twin ------------------------------------------------
@pytest.mark.parametrize("mode", MODES)
def test_same_same_contingency_matches_twin(rng, mode):
    for n in sizes_for(mode):
        dy = make_dyads(rng, n, mode=mode)
        ps = check(rng, [SAME, SAME], dy)
        assert ps.ss_pos.size == 4  # every pair by same_same_sums


@pytest.mark.parametrize("mode", MODES)
def test_gap_same_sweep_matches_twin(rng, mode):
    for n in sizes_for(mode):
        dy = make_dyads(rng, n, mode=mode)
        ps = check(rng, [GAP, SAME], dy)
        # gap relabelled with same fixed (codes by the inverse), and the converse
        assert sorted(ps.gs_spec[:, 3].tolist()) == [0, 1]


@pytest.mark.parametrize("mode", MODES)
def test_gap_gap_fenwick_matches_twin(rng, mode):
    for n in sizes_for(mode):
        dy = make_dyads(rng, n, mode=mode)
        ps = check(rng, [GAP, GAP], dy)
        assert ps.gg_pos.size == 4


@pytest.mark.parametrize("look_up", ["relabelled", "fixed"])
@pytest.mark.parametrize("mode", MODES)
def test_edge_passes_match_twin(rng, mode, look_up):
    for n in sizes_for(mode):
        dy = make_dyads(rng, n, mode=mode)
        ps = check(rng, [NETWORK, SAME, GAP, NETWORK], dy, look_up=look_up)
        kinds = set(ps.readers[:, 2].tolist())
        assert {SAME, GAP, NETWORK} <= kinds
        # both directions: derived read forward on a network's edges, and backward
        assert set(ps.readers[:, 1].tolist()) == {0, 1}


@pytest.mark.parametrize("mode", MODES)
def test_separable_layers_sum_over_nodes(rng, mode):
    kinds = [PAIR_SUM, NETWORK, SAME, GAP]
    if mode in ("directed", "groups", "two-mode"):
        kinds += [SENDER, RECEIVER]
    for n in sizes_for(mode):
        dy = make_dyads(rng, n, mode=mode)
        ps = check(rng, kinds, dy)
        assert ps.node_pos_r.size and ps.node_pos_c.size


@pytest.mark.parametrize("mode", MODES)
def test_every_kind_together(rng, mode):
    kinds = [SAME, GAP, NETWORK, PAIR_SUM, GAP, SAME, NETWORK]
    if mode in ("directed", "groups", "two-mode"):
        kinds += [SENDER, RECEIVER]
    for n in sizes_for(mode):
        for look_up in ("relabelled", "fixed"):
            check(rng, kinds, make_dyads(rng, n, mode=mode), look_up=look_up, B=3)


@pytest.mark.parametrize("mode", MODES)
def test_node_sums_match_twin(rng, mode):
    """Row and column sums over the ordered dyad set (one-mode: both triangles)."""
    for n in sizes_for(mode):
        dy = make_dyads(rng, n, mode=mode)
        full = PairDyads(dy.n, dy.m, dy.tiles, dy.one_mode, True)  # ordered dyads
        mask = dyad_mask(full)
        for kind in (SAME, GAP, SENDER, RECEIVER, PAIR_SUM, NETWORK):
            lay = make_layer(rng, kind, dy)
            X = np.where(mask, dense_layer(lay, dy), 0.0)
            ro, ri = node_sums(lay, dy)
            np.testing.assert_allclose(ro, X.sum(axis=1), rtol=KERNEL_RTOL, atol=KERNEL_ATOL)
            np.testing.assert_allclose(ri, X.sum(axis=0), rtol=KERNEL_RTOL, atol=KERNEL_ATOL)


# --- kernels called directly ---------------------------------------------------------------------
@pytest.mark.parametrize("n", [2, 3, 9, 40])
def test_gap_gap_sums_direct(rng, n):
    """One tile, one-mode: sum over ordered pairs of |a_pi(i) - a_pi(j)| |c_i - c_j|."""
    a = rng.integers(0, 4, n).astype(np.float64)  # ties
    c = rng.normal(size=n)
    c[: n // 2] = c[0]  # ties in the sweep coordinate too
    items = np.argsort(c, kind="stable")[None, :].astype(np.int64)
    rank = np.empty(n, dtype=np.int64)
    rank[np.argsort(a, kind="stable")] = np.arange(n)
    perms = np.array([rng.permutation(n) for _ in range(4)], dtype=np.int64)
    out = np.full((4, 1), np.nan)
    gap_gap_sums(c[:, None], c[:, None], a[:, None], a[:, None], rank[:, None], rank[:, None],
                 items, np.array([0, n]), np.zeros((1, 3), dtype=np.int64), perms, perms, out,
                 n, True)
    for b, p in enumerate(perms):
        ap = a[p]
        # twin: the O(n^2) double sum
        want = (np.abs(ap[:, None] - ap[None, :]) * np.abs(c[:, None] - c[None, :])).sum()
        assert out[b, 0] == pytest.approx(want, rel=KERNEL_RTOL, abs=KERNEL_ATOL)


def test_node_pair_sums_direct(rng):
    n = 11
    vals = rng.normal(size=(n, 3))
    wts = rng.normal(size=(n, 2))
    spec = np.array([[0, 1], [2, 0], [1, 1]], dtype=np.int64)
    perms = np.array([rng.permutation(n) for _ in range(3)], dtype=np.int64)
    out = np.empty((3, 3))
    node_pair_sums(vals, wts, spec, perms, out)
    for b, p in enumerate(perms):
        for t, (pc, qc) in enumerate(spec):
            # twin: sum_i values[p[i]] * weights[i]
            assert out[b, t] == pytest.approx(vals[p, pc] @ wts[:, qc], rel=KERNEL_RTOL)


# --- invariance -------------------------------------------------------------------------------
@pytest.mark.parametrize("mode", ["directed", "undirected", "two-mode"])
def test_sums_are_bit_identical_across_batch_splits(rng, mode):
    """A relabelling's sums do not depend on the batch that computes it (common practice:
    the engine's contract, design.md "Engine")."""
    dy = make_dyads(rng, 13, mode=mode)
    kinds = [SAME, GAP, NETWORK, PAIR_SUM, NETWORK, GAP]
    layers = [make_layer(rng, k, dy) for k in kinds]
    for look_up in ("relabelled", "fixed"):
        ps = build_pair_sums(layers, list(range(6)), [0, 2, 3, 5, 1], dy, look_up=look_up)
        rows, cols = draw_perms(rng, dy, 11)
        whole = ps.sums(rows, cols)
        for cuts in ([1, 2, 3], [5], [10], list(range(1, 11))):
            parts = [ps.sums(r, c) for r, c in zip(np.split(rows, cuts), np.split(cols, cuts))]
            np.testing.assert_array_equal(np.concatenate(parts), whole)
        alone = np.concatenate([ps.sums(rows[b:b + 1], cols[b:b + 1]) for b in range(11)][::-1])
        np.testing.assert_array_equal(alone[::-1], whole)
