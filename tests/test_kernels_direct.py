"""The two kernels the dispatchers hide, called directly against plain-numpy twins.

``cross_rows`` (behind ``gather_cross``) on flattened layers, and ``sparse_cross`` (behind
the sparse path) for every attribute-derived predictor. Sources of truth: the twin
``reference.gather_cross_ref`` and, for the sparse kernel, the sum over edges written
below from its definition.
"""

import os

import numpy as np
import pytest

from dyadperm.kernels.gather import (GRAM_COLUMNS, add_chunks, chunk_slots, cross_rows, gather_cross,
                                     gram_chunks, gram_from_sums, identity_gram)
from dyadperm.kernels.sparse import GAP, PAIR_SUM, RECEIVER, SAME, SENDER, sparse_cross
from reference import KERNEL_ATOL, KERNEL_RTOL, gather_cross_ref


@pytest.mark.parametrize("n,m,block", [(2, 2, 1), (3, 3, 8), (7, 5, 3), (9, 9, 16)])
def test_cross_rows_equals_twin(n, m, block):
    rng = np.random.default_rng(n * 100 + m)
    rel = rng.normal(size=(n, m, 3))
    fix = rng.normal(size=(n, m, 2))
    rel_idx = np.array([0, 2], dtype=np.int64)
    fix_idx = np.array([1, 0], dtype=np.int64)
    B = 5
    rows = np.array([rng.permutation(n) for _ in range(B)], dtype=np.int64)
    cols = np.array([rng.permutation(m) for _ in range(B)], dtype=np.int64)
    start = np.zeros(n, dtype=np.int64)
    stop = np.full(n, m, dtype=np.int64)
    out = np.empty((B, 2, 2))
    cross_rows(rel.reshape(-1), 3, rel_idx, fix.reshape(-1), 2, fix_idx, rows, cols, start,
               stop, block, np.empty((block, m), dtype=np.int32), np.empty((block, 2, 2)), out)
    ref = gather_cross_ref(rel, rel_idx, fix, fix_idx, rows, cols, start, stop)
    np.testing.assert_allclose(out, ref, rtol=KERNEL_RTOL, atol=KERNEL_ATOL)


def _edge_sum(src, dst, w, attr, kinds, cols, center, node_map):
    """out[c] = sum_e w_e (x_c(m(src_e), m(dst_e)) - center_c), x from its definition."""
    out = np.zeros(len(kinds))
    for c, (kind, col) in enumerate(zip(kinds, cols)):
        a = attr[:, col]
        i, j = node_map[src], node_map[dst]
        x = {SAME: (a[i] == a[j]).astype(float), GAP: np.abs(a[i] - a[j]), SENDER: a[i],
             RECEIVER: a[j], PAIR_SUM: a[i] + a[j]}[kind]
        out[c] = np.sum(w * (x - center[c]))
    return out


@pytest.mark.parametrize("invert", [False, True])
@pytest.mark.parametrize("n", [3, 6, 40])
def test_sparse_cross_equals_edge_sum(n, invert):
    rng = np.random.default_rng(n)
    pairs = [(a, b) for a in range(n) for b in range(n) if a != b and rng.random() < 0.4]
    if not pairs:
        pairs = [(0, 1)]
    src = np.array([a for a, _ in pairs], dtype=np.int64)
    dst = np.array([b for _, b in pairs], dtype=np.int64)
    w = rng.integers(1, 5, size=src.size).astype(float)
    strength = np.zeros((n, 2))
    np.add.at(strength[:, 0], src, w)
    np.add.at(strength[:, 1], dst, w)
    # attribute columns: the same/gap ones first (n_edge_cols = 2), then node-only ones
    attr = np.column_stack([rng.integers(0, 3, n), rng.normal(size=n), rng.normal(size=n)])
    kinds = np.array([SAME, GAP, SENDER, RECEIVER, PAIR_SUM], dtype=np.int64)
    cols = np.array([0, 1, 2, 2, 1], dtype=np.int64)
    center = rng.normal(size=5)
    B = 4
    perms = np.array([rng.permutation(n) for _ in range(B)], dtype=np.int64)
    out = np.empty((B, 5))
    no_net = np.zeros((0, n + 1), dtype=np.int64)
    sparse_cross(src, dst, w, strength, perms, kinds, cols, center, np.zeros(5, np.int64),
                 attr, no_net, np.zeros(0, np.int64), np.zeros(0), out, invert, 2)
    for b in range(B):
        node_map = np.argsort(perms[b]) if invert else perms[b]
        ref = _edge_sum(src, dst, w, attr, kinds, cols, center, node_map)
        np.testing.assert_allclose(out[b], ref, rtol=1e-10, atol=1e-9)


def test_auto_block_fits_offsets_in_cache_and_changes_no_bit():
    """The automatic block keeps about BLOCK_BYTES of column offsets in cache (one int32
    row per permutation) and gives the same bits as any explicit block (common practice:
    blocking must not change a sum's order)."""
    from dyadperm.kernels.gather import BLOCK_BYTES, MAX_BLOCK, auto_block, gather_cross

    assert auto_block(np.empty((4, 2000, 4))) == MAX_BLOCK  # 8 KB of offsets each
    assert auto_block(np.empty((2, 10_000, 4), dtype=np.float32)) == BLOCK_BYTES // 40_000
    assert auto_block(np.empty((2, 100_000, 1))) == 1
    rng = np.random.default_rng(3)
    n = 11
    rel = rng.normal(size=(n, n, 2))
    rows = np.array([rng.permutation(n) for _ in range(9)], dtype=np.int64)
    args = (rel, np.array([0, 1]), rel, np.array([1, 0]), rows, rows,
            np.zeros(n, np.int64), np.full(n, n, np.int64))
    auto = gather_cross(*args, np.empty((9, 2, 2)))
    for block in (1, 3, 16):
        assert np.array_equal(gather_cross(*args, np.empty((9, 2, 2)), block=block), auto)


@pytest.mark.parametrize("n,m", [(2, 2), (3, 3), (7, 5), (40, 40)])
def test_masked_moments_equals_numpy(n, m):
    """``kernels.stats.masked_moments`` against numpy's mean and sum of squared deviations
    over the masked cells, on a C-ordered matrix and on a strided view (one layer of a 3-d
    array, as the in-place study path gives it)."""
    from dyadperm.kernels.stats import masked_moments

    rng = np.random.default_rng(n * 10 + m)
    stack = rng.normal(loc=50.0, scale=3.0, size=(n, m, 2))
    mask = rng.random((n, m)) < 0.7
    mask[0, 0] = True
    for mat in (np.ascontiguousarray(stack[:, :, 1]), stack[:, :, 1]):
        out = np.empty(3)
        masked_moments(mat, mask, out)
        vals = mat[mask]
        assert out[0] == vals.size
        np.testing.assert_allclose(out[1], vals.mean(), rtol=1e-14)
        np.testing.assert_allclose(out[2], ((vals - vals.mean()) ** 2).sum(), rtol=1e-12)


def _spread_and_ranges(rng, vals, n, B, ranges):
    """The layers of ``vals`` spread out to every other slot (so no two are consecutive:
    the scalar passes read them), B relabellings, and full or upper-triangle ranges."""
    spread = np.zeros(vals.shape[:2] + (2 * vals.shape[2],), dtype=vals.dtype)
    spread[:, :, ::2] = vals
    rows = np.array([rng.permutation(n) for _ in range(B)], dtype=np.int64)
    start = np.arange(1, n + 1, dtype=np.int64) if ranges == "triangle" else \
        np.zeros(n, dtype=np.int64)
    return spread, rows, start, np.full(n, n, dtype=np.int64)


@pytest.mark.parametrize("dtype", [np.float64, np.float32])
@pytest.mark.parametrize("n_rel,n_fix", [(3, 4), (4, 3), (6, 4), (3, 5)])
@pytest.mark.parametrize("block", [1, 3])
@pytest.mark.parametrize("n,ranges", [(11, "full"), (150, "full"), (150, "triangle")])
def test_vector_tiles_same_bits_as_scalar(dtype, n_rel, n_fix, block, n, ranges):
    """Tiles whose layers are consecutive in their records run in vector registers
    (``kernels.gather.tile_vec``); the same layers spread out (every other slot) run in
    scalar registers. Both must give the same bits -- one fused multiply-add per term in
    the same order, even and odd columns in two sums -- and match the plain-numpy twin.
    Rows of 150 columns span several vector calls (``VEC_COLUMNS``); the upper triangle
    gives rows of every length, odd and even, starting at odd and even columns."""
    rng = np.random.default_rng(n_rel * 10 + n_fix)
    B = 5
    L = max(n_rel, n_fix) + 1  # one spare layer: 4-wide reads stay inside each record
    vals = rng.normal(size=(n, n, L)).astype(dtype)
    spread, rows, start, stop = _spread_and_ranges(rng, vals, n, B, ranges)
    got = {}
    for name, arr, step in (("vector", vals, 1), ("scalar", spread, 2)):
        rel_idx = np.arange(n_rel, dtype=np.int64) * step
        fix_idx = np.arange(n_fix, dtype=np.int64) * step
        out = np.empty((B, n_rel, n_fix))
        gather_cross(arr, rel_idx, arr, fix_idx, rows, rows, start, stop, out, block=block)
        got[name] = out
    np.testing.assert_array_equal(got["vector"], got["scalar"])
    want = np.empty((B, n_rel, n_fix))
    gather_cross_ref(vals.astype(np.float64), np.arange(n_rel), vals.astype(np.float64),
                     np.arange(n_fix), rows, rows, start, stop, want)
    np.testing.assert_allclose(got["vector"], want, rtol=KERNEL_RTOL, atol=KERNEL_ATOL)


@pytest.mark.parametrize("dtype", [np.float64, np.float32])
@pytest.mark.parametrize("n_layers,fix_idx", [(3, [0, 1, 2]), (3, [1, 2]), (2, [0, 1]),
                                              (4, [0, 1, 2, 3]), (6, [0, 1, 2, 3, 4]),
                                              (5, [2, 3, 4])])
@pytest.mark.parametrize("block", [1, 4])
@pytest.mark.parametrize("n,ranges", [(13, "full"), (150, "full"), (150, "triangle")])
def test_vector_one_layer_pass_same_bits_as_scalar(dtype, n_layers, fix_idx, block, n,
                                                   ranges):
    """One relabelled layer against consecutive fixed layers (scheme y, correlation) runs
    in vector registers (``kernels.gather.dot_vec``, 4-wide reads of the fixed records);
    the same layers spread out (every other slot) run in scalar passes of one layer each
    (``_dot1``). Both must give the same bits -- four chains over the columns (mod 4), one
    fused multiply-add per term -- and match the plain-numpy twin. The fixed stack has no
    spare layer, so the last columns' 4-wide reads would leave the array: those columns
    are summed in scalars (the case of scheme y's stack of 3 predictors). Rows of 150
    columns span several vector calls; the upper triangle gives rows of every length."""
    rng = np.random.default_rng(n_layers * 10 + len(fix_idx))
    B = 5
    fix = rng.normal(size=(n, n, n_layers)).astype(dtype)
    rel = rng.normal(size=(n, n, 2)).astype(dtype)
    spread, rows, start, stop = _spread_and_ranges(rng, fix, n, B, ranges)
    rel_idx = np.array([1], dtype=np.int64)
    got = {}
    for name, arr, step in (("vector", fix, 1), ("scalar", spread, 2)):
        out = np.empty((B, 1, len(fix_idx)))
        gather_cross(rel, rel_idx, arr, np.asarray(fix_idx, np.int64) * step, rows, rows,
                     start, stop, out, block=block)
        got[name] = out
    np.testing.assert_array_equal(got["vector"], got["scalar"])
    want = np.empty((B, 1, len(fix_idx)))
    gather_cross_ref(rel.astype(np.float64), rel_idx, fix.astype(np.float64),
                     np.asarray(fix_idx), rows, rows, start, stop, want)
    np.testing.assert_allclose(got["vector"], want, rtol=KERNEL_RTOL, atol=KERNEL_ATOL)


@pytest.mark.parametrize("dtype", [np.float64, np.float32])
@pytest.mark.parametrize("ranges", ["full", "triangle", "uneven"])
def test_identity_gram_against_numpy(dtype, ranges):
    """``identity_gram`` (the invariant Gram of complete-data plans) against the Gram of
    [1, layers] written out with numpy over the same cells (reference: numpy's matrix
    product in float64); rows longer than one workspace chunk (``GRAM_COLUMNS``), ranges
    of every length, rel and fix the same array or two, float32 layers read as float64."""
    rng = np.random.default_rng(7)
    n = GRAM_COLUMNS + 37
    stack = rng.normal(loc=0.3, size=(n, n, 4)).astype(dtype)
    resp = rng.normal(size=(n, n, 1)).astype(dtype)
    if ranges == "full":
        start, stop = np.zeros(n, np.int64), np.full(n, n, np.int64)
    elif ranges == "triangle":
        start, stop = np.arange(1, n + 1, dtype=np.int64), np.full(n, n, np.int64)
    else:
        start = rng.integers(0, n, n).astype(np.int64)
        stop = np.minimum(n, start + rng.integers(0, n, n)).astype(np.int64)
    for rel, rel_idx, fix, fix_idx in ((stack, [0, 1, 2], stack, [0, 1, 2, 3]),
                                       (resp, [0], stack, [1, 3])):
        cells = [np.concatenate([rel[i, start[i]:stop[i]][:, rel_idx],
                                 fix[i, start[i]:stop[i]][:, fix_idx]], axis=1)
                 for i in range(n)]
        z = np.concatenate(cells, axis=0).astype(np.float64)
        z = np.concatenate([np.ones((z.shape[0], 1)), z], axis=1)
        want = z.T @ z
        d = want.shape[0]
        got = np.empty((d, d))
        identity_gram(rel, np.asarray(rel_idx, np.int64), fix, np.asarray(fix_idx, np.int64),
                      start, stop, got)
        np.testing.assert_allclose(got, want, rtol=1e-12, atol=1e-9 * n)
        assert np.array_equal(got, got.T)
        again = np.empty((d, d))
        identity_gram(rel, np.asarray(rel_idx, np.int64), fix, np.asarray(fix_idx, np.int64),
                      start, stop, again)
        assert np.array_equal(got, again)  # one order of sums: the same bits every call


@pytest.mark.parametrize("dtype", [np.float64, np.float32])
def test_setup_kernels_against_numpy(dtype):
    """The setup's element-wise kernels against the numpy they replace (reference: numpy):
    ``standardise_rows`` gives the bits of subtract, divide and fill (the float32 stack
    rounded twice, as numpy's in-place float32 arithmetic rounds); ``masked_values`` the
    values of ``mat[mask]`` in the same order; ``apply_upper`` each record times an upper
    triangular matrix (numpy's matrix product, to rounding), for rows longer and shorter
    than one workspace chunk."""
    from dyadperm.kernels.stats import apply_upper, masked_values, standardise_rows

    rng = np.random.default_rng(11)
    n, m = 37, 29
    mat = rng.normal(loc=3.0, scale=2.0, size=(n, m))
    holds = rng.random((n, m)) < 0.8
    mean, sd = np.float64(2.9), np.float64(1.7)  # numpy scalars, as the route's _stack has
    want = np.empty((n, m, 2), dtype=dtype)[:, :, 1]
    np.subtract(mat, mean, out=want)
    want /= sd
    want[~holds] = np.nan
    stack = np.empty((n, m, 2), dtype=dtype)
    other = rng.normal(size=(m, n)).T  # a second layer, strided
    standardise_rows((other, mat), np.array([0.5, mean]), np.array([2.0, sd]), holds, np.nan,
                     stack, 0, n)
    np.testing.assert_array_equal(stack[:, :, 1], want)
    want0 = np.empty((n, m), dtype=dtype)
    np.subtract(other, 0.5, out=want0)
    want0 /= 2.0
    want0[~holds] = np.nan
    np.testing.assert_array_equal(stack[:, :, 0], want0)
    col = np.empty((int(holds.sum()), 3))
    masked_values(mat, holds, col[:, 2])
    np.testing.assert_array_equal(col[:, 2], mat[holds])
    for cells in (5, 1500):
        stack = rng.normal(size=(cells, 1, 4)).astype(dtype)
        rinv = np.triu(rng.normal(size=(4, 4)))
        want = (stack.astype(np.float64) @ rinv).astype(dtype)
        apply_upper(stack.reshape(-1), 4, rinv)
        np.testing.assert_allclose(stack, want, rtol=1e-12 if dtype == np.float64 else 1e-6,
                                   atol=1e-12 if dtype == np.float64 else 1e-5)


@pytest.mark.parametrize("dtype", [np.float64, np.float32, np.int64, np.bool_])
def test_symmetry_and_value_scans_against_numpy(dtype):
    """``is_symmetric`` and ``any_nonfinite`` (the checks of ``design.prepare``) against
    numpy's own (reference: numpy's comparisons, isnan and isinf): symmetric and not,
    the first difference in the last tile, NaN equal to NaN across the diagonal, a cell
    outside the mask, strided views, sizes that are not a multiple of the tile."""
    from dyadperm.kernels.stats import SYM_TILE, any_nonfinite, is_symmetric

    rng = np.random.default_rng(5)
    n = SYM_TILE * 2 + 7
    base = rng.integers(0, 3, size=(n, n))
    sym = (base + base.T).astype(dtype)
    assert is_symmetric(sym)
    assert is_symmetric(np.ascontiguousarray(np.stack([sym, sym], axis=2))[:, :, 1])
    off = sym.copy()
    off[n - 1, n - 3] = not off[n - 3, n - 1] if dtype == np.bool_ else off[n - 3, n - 1] + 1
    assert not is_symmetric(off)
    diag = sym.copy()
    diag[np.arange(n), np.arange(n)] = rng.integers(0, 2, n).astype(dtype)
    assert is_symmetric(diag)  # the diagonal never counts

    def numpy_symmetric(a):
        b = a.copy()
        np.fill_diagonal(b, 0)
        return bool(np.array_equal(b, b.T))
    for a in (sym, off, diag, base.astype(dtype)):
        assert is_symmetric(a) == numpy_symmetric(a)
    if np.dtype(dtype).kind == "f":
        nan = sym.copy()
        nan[3, n - 2] = nan[n - 2, 3] = np.nan
        assert is_symmetric(nan)
        nan[n - 2, 3] = 1.0
        assert not is_symmetric(nan)
        mask = np.ones((n, n), dtype=bool)
        none = np.zeros((0, 0), dtype=bool)
        assert not any_nonfinite(sym, none, True) and not any_nonfinite(sym, none, False)
        bad = sym.copy()
        bad[n - 1, n - 1] = np.inf
        assert any_nonfinite(bad, none, False) and not any_nonfinite(bad, none, True)
        bad[2, 5] = np.nan
        mask[2, 5] = False
        assert any_nonfinite(bad, none, True) == bool(np.isnan(bad).any())
        assert any_nonfinite(bad, mask, True) == bool((np.isnan(bad) & mask).any())



@pytest.mark.parametrize("dtype", [np.float64, np.float32])
def test_nonfinite_kinds_against_numpy(dtype):
    """``nonfinite_kinds`` (a network's one scan when it is made) against numpy's isnan and
    isinf (reference: numpy): none, NaN only, infinity only (either sign), both in one row
    or in different rows, the last cell, strided and transposed views."""
    from dyadperm.kernels.stats import HAS_INF, HAS_NAN, nonfinite_kinds

    rng = np.random.default_rng(8)
    base = rng.normal(size=(23, 19)).astype(dtype)
    placements = [[], [(3, 4, np.nan)], [(22, 18, np.inf)], [(0, 0, -np.inf)],
                  [(5, 1, np.nan), (5, 7, np.inf)], [(1, 1, np.inf), (20, 2, np.nan)]]
    for cells in placements:
        a = base.copy()
        for i, j, val in cells:
            a[i, j] = val
        for view in (a, a.T, a[::2, ::3], a[1:, :-1]):
            want = (HAS_NAN if np.isnan(view).any() else 0) | \
                (HAS_INF if np.isinf(view).any() else 0)
            assert nonfinite_kinds(view) == want, (cells, view.shape)


def test_place_rows_against_numpy():
    """``place_rows`` (loading a network file: check, cast and place a block of rows)
    against numpy's fancy indexing and astype (reference: numpy): rows and columns put in
    another order, float32 targets, integer blocks; the first infinite value and the first
    value beyond float32 are reported by row and column, and nothing after them placed."""
    from dyadperm.kernels.stats import place_rows

    rng = np.random.default_rng(9)
    block = rng.normal(size=(6, 5)) * 1e3
    cols = rng.permutation(5).astype(np.int64)
    dest = rng.permutation(6).astype(np.int64)
    none = np.zeros(0, dtype=np.int64)
    status = np.zeros(3, dtype=np.int64)
    for dtype in (np.float64, np.float32):
        out = np.full((6, 5, 2), -1.0, dtype=dtype)[:, :, 0]
        place_rows(block, cols, out, dest, status)
        want = np.empty((6, 5), dtype=dtype)
        want[dest] = block[:, cols].astype(dtype)
        assert status[0] == 0
        np.testing.assert_array_equal(out, want)
    ints = rng.integers(-5, 5, size=(3, 4))
    out = np.empty((3, 4))
    place_rows(ints, none, out, none, status)
    np.testing.assert_array_equal(out, ints.astype(np.float64))
    bad = block.copy()
    bad[2, 3] = np.inf
    bad[4, 0] = 1e300
    out = np.zeros((6, 5))
    place_rows(bad, none, out, none, status)
    assert list(status) == [1, 2, 3]
    assert out[3].tolist() == [0.0] * 5  # stopped there
    bad[2, 3] = 1.0
    out32 = np.zeros((6, 5), dtype=np.float32)
    with np.errstate(over="ignore"):  # the pure-Python twin (no JIT) casts with numpy
        place_rows(bad, none, out32, none, status)
    assert list(status) == [2, 4, 0]
    place_rows(bad, none, np.zeros((6, 5)), none, status)
    assert status[0] == 0  # 1e300 is a float64


@pytest.mark.parametrize("directed", [True, False])
def test_identity_gram_on_threads_same_bits(monkeypatch, directed):
    """The plan's invariant Gram (``routes.linear._identity_gram``) makes the chunks' sums
    on two threads, halves of blocks of rows, and adds them in chunk order: the bits of
    the one-thread ``identity_gram``. The blocks are made small and the setup's threads
    start at any size (``design.STREAM_DYADS``), so several blocks of uneven halves run on
    two threads; undirected data use the upper triangle's ranges."""
    import dyadperm.inputs.design as design
    import dyadperm.routes.linear as linear

    rng = np.random.default_rng(11)
    n = 530
    mats = [rng.normal(size=(n, n)) for _ in range(4)]
    if not directed:
        mats = [(a + a.T) / 2 for a in mats]
    prep = design.prepare(mats[0], {f"x{i}": mats[i] for i in (1, 2, 3)})
    monkeypatch.setattr(design, "STREAM_DYADS", 1)
    stack = np.ascontiguousarray(np.stack(mats[1:] + mats[:1], axis=2))
    calls = []
    real = linear.side_by_side
    monkeypatch.setattr(linear, "side_by_side",
                        lambda fn, items, cells: calls.append(len(items)) or real(fn, items, cells))
    monkeypatch.setattr(linear, "FACTOR_BYTES", 8 * 14 * 3 * 97)  # blocks of 97 rows
    for rel_idx, fix_idx in (([0, 1, 2], [0, 1, 2, 3]), ([3], [0, 1, 2])):
        got = linear._identity_gram(prep, stack, rel_idx, stack if len(rel_idx) > 1 else
                                    stack.copy(), fix_idx)
        want = np.empty_like(got)
        identity_gram(stack, np.asarray(rel_idx, np.int64), stack, np.asarray(fix_idx, np.int64),
                      prep.col_start, prep.col_stop, want)
        want[0, 0] = prep.n_dyads
        np.testing.assert_array_equal(got, want)
    assert len(calls) >= 2 * 6 and set(calls) == {2}


def test_gram_chunks_add_chunks_and_gram_from_sums_against_numpy():
    """The three pieces of the invariant Gram, each against numpy: ``gram_chunks`` writes
    each chunk's sums [sum v_r, sum v_r v_s (s <= r)] (reference: numpy sums over the
    chunk's cells, in float64); ``add_chunks`` adds the chunks in order (reference: the
    same additions written as a Python loop, bit for bit); ``gram_from_sums`` places them
    in the symmetric Gram of [1, layers] (reference: numpy's product over all cells)."""
    rng = np.random.default_rng(3)
    n = 2 * GRAM_COLUMNS + 9
    rel = rng.normal(size=(n, n, 2))
    fix = rng.normal(size=(n, n, 3))
    start = rng.integers(0, n, n).astype(np.int64)
    stop = np.minimum(n, start + rng.integers(0, n, n)).astype(np.int64)
    rel_idx, fix_idx = np.array([1], np.int64), np.array([2, 0], np.int64)
    first = chunk_slots(start, stop)
    n_lay = 3
    parts = np.full((first[-1], n_lay + n_lay * (n_lay + 1) // 2), np.nan)
    gram_chunks(rel, rel_idx, fix, fix_idx, start, stop, first[:-1], parts)
    slot = 0
    for i in range(n):
        for j0 in range(start[i], stop[i], GRAM_COLUMNS):
            j1 = min(j0 + GRAM_COLUMNS, stop[i])
            v = np.concatenate([rel[i, j0:j1][:, rel_idx], fix[i, j0:j1][:, fix_idx]], axis=1)
            want = []
            for r in range(n_lay):
                want.append(v[:, r].sum())
                want.extend(v[:, r] @ v[:, s] for s in range(r + 1))
            np.testing.assert_allclose(parts[slot], want, rtol=1e-12, atol=1e-9)
            slot += 1
    assert slot == first[-1]
    acc = np.zeros(parts.shape[1])
    add_chunks(parts, acc)
    loop = np.zeros(parts.shape[1])
    for row in parts:
        loop = loop + row
    np.testing.assert_array_equal(acc, loop)
    count = int(np.maximum(stop - start, 0).sum())
    g = np.empty((1 + n_lay, 1 + n_lay))
    gram_from_sums(acc, count, g)
    cells = np.concatenate([np.concatenate([rel[i, start[i]:stop[i]][:, rel_idx],
                                            fix[i, start[i]:stop[i]][:, fix_idx]], axis=1)
                            for i in range(n)])
    z = np.concatenate([np.ones((cells.shape[0], 1)), cells], axis=1)
    np.testing.assert_allclose(g, z.T @ z, rtol=1e-11, atol=1e-8)
    assert g[0, 0] == count == cells.shape[0]


def _fma(a, b, c):
    """a * b + c rounded once (exact rational arithmetic, then one rounding: the fused
    multiply-add of IEEE 754)."""
    from fractions import Fraction

    return float(Fraction(a) * Fraction(b) + Fraction(c))


@pytest.mark.parametrize("w", [0, 1, 3, 4, 7, 15, 16, 17, 35, 64])
def test_dot_chains_in_their_stated_order(w):
    """``kernels.vector.dot_chains`` and ``dot_chains16`` (vector registers in LLVM IR)
    against the order their docstrings state, written out with an exact fused multiply-add
    (bit for bit: the order is the source's, whatever the compiled code), and against
    numpy's dot product (to rounding); ``dot_chains2`` / ``dot_chains4`` against
    ``dot_chains`` of each pair."""
    from dyadperm.kernels.vector import dot_chains, dot_chains16

    rng = np.random.default_rng(w)
    x, y = rng.normal(size=w + 3), rng.normal(size=w + 3)  # entries past w are not read
    for fn, k in ((dot_chains, 4), (dot_chains16, 16)):
        s = [0.0] * k
        full = w - w % k
        for t in range(full):
            s[t % k] = _fma(x[t], y[t], s[t % k])
        for t in range(full, w):
            s[0] = _fma(x[t], y[t], s[0])
        if k == 4:
            want = (s[0] + s[1]) + (s[2] + s[3])
        else:
            def pair(a):
                return (s[a] + s[a + 8]) + (s[a + 4] + s[a + 12])
            want = (pair(0) + pair(2)) + (pair(1) + pair(3))
        got = fn(x, y, w)
        assert got == want, (fn.__name__, got, want)
        np.testing.assert_allclose(got, x[:w] @ y[:w], rtol=1e-13, atol=1e-13)
    # several sums in one loop: each with dot_chains' bits
    from dyadperm.kernels.vector import dot_chains2, dot_chains4

    xs, ys = rng.normal(size=(4, w + 3)), rng.normal(size=(4, w + 3))
    one = [dot_chains(xs[p], ys[p], w) for p in range(4)]
    assert dot_chains2(xs[0], ys[0], xs[1], ys[1], w) == tuple(one[:2])
    assert dot_chains4(xs[0], ys[0], xs[1], ys[1], xs[2], ys[2], xs[3], ys[3], w) == tuple(one)


@pytest.mark.skipif(os.environ.get("NUMBA_DISABLE_JIT") == "1",
                    reason="the scalar twin adds a product and a sum, not a fused multiply-add")
@pytest.mark.parametrize("dtype", [np.float64, np.float32])
def test_apply_upper_in_its_stated_order(dtype):
    """``kernels.stats.apply_upper`` -- records of 1-8 values in vector registers
    (``vector.apply_records``), longer ones through its layer-major workspaces -- against
    the order its docstring states, written out with an exact fused multiply-add: each new
    value sum_{e <= c} v_e R[e, c] from 0.0 in increasing e, then rounded to the stack's
    type (bit for bit). R has entries below its diagonal that must not be read."""
    from dyadperm.kernels.stats import apply_upper

    rng = np.random.default_rng(3)
    for L in range(1, 10):
        cells = 23
        stack = rng.normal(size=(cells, L)).astype(dtype)
        rinv = rng.normal(size=(L, L))  # the lower part is not read
        want = np.empty_like(stack)
        for q in range(cells):
            v = stack[q].astype(np.float64)
            for c in range(L):
                acc = 0.0
                for e in range(c + 1):
                    acc = _fma(float(v[e]), float(rinv[e, c]), acc)
                want[q, c] = acc
        apply_upper(stack.reshape(-1), L, rinv)
        np.testing.assert_array_equal(stack, want, err_msg=f"L = {L}")


@pytest.mark.parametrize("dtype", [np.float64, np.float32])
def test_masked_moments_vector_rows_same_bits(dtype):
    """``masked_moments`` sums rows of contiguous values in vector registers
    (``vector.masked_row_sum``) and other rows with the scalar chains: the same order, so
    the same bits (a C array against a strided copy of it: every row length mod 4, masked
    cells, a fenced square that must not fuse into the sum); and numpy's mean and sum of
    squared deviations to rounding (reference: numpy)."""
    from dyadperm.kernels.stats import masked_moments

    rng = np.random.default_rng(6)
    for n, m in ((11, 1), (11, 2), (11, 3), (11, 4), (11, 5), (11, 9), (11, 67), (301, 301)):
        a = (rng.normal(size=(n, m)) * 3.0 + 1.5).astype(dtype)
        mask = rng.random((n, m)) < 0.85
        strided = np.empty((n, 2 * m), dtype=dtype)[:, ::2]
        strided[:] = a
        vec, sca = np.empty(3), np.empty(3)
        masked_moments(a, mask, vec)
        masked_moments(strided, mask, sca)
        np.testing.assert_array_equal(vec, sca, err_msg=f"m = {m}")
        vals = a[mask].astype(np.float64)
        np.testing.assert_allclose(vec, [vals.size, vals.mean(), ((vals - vals.mean()) ** 2).sum()],
                                   rtol=1e-12)


@pytest.mark.parametrize("dtype", [np.float64, np.float32])
def test_records_to_rows_against_numpy(dtype):
    """``vector.records_to_rows`` (the layer-major blocks of the QR fold and the Gram)
    against numpy's transpose of the same records (reference: numpy): every record width
    it takes, counts that are and are not multiples of four, an offset start and target
    row; cells it must not write stay as they were."""
    from numba import njit

    from dyadperm.kernels.vector import RECORD_LANES, records_to_rows

    @njit
    def call(flat, start, L, nb, bt, row0):  # an intrinsic runs inside compiled code only
        records_to_rows(flat, np.int64(start), np.int64(L), np.int64(nb), bt, np.int64(row0))

    rng = np.random.default_rng(12)
    for L in range(1, RECORD_LANES + 1):
        for nb in (0, 1, 3, 4, 7, 21):
            flat = rng.normal(size=5 + L * (nb + 2)).astype(dtype)
            bt = np.full((L + 3, 24), -7.0)
            want = bt.copy()
            want[2:2 + L, :nb] = flat[5:5 + L * nb].reshape(nb, L).T
            call(flat, 5, L, nb, bt, 2)
            np.testing.assert_array_equal(bt, want, err_msg=f"L = {L}, nb = {nb}")


@pytest.mark.parametrize("dtype", [np.float64, np.float32])
def test_gram_chunks_with_the_map_same_bits(dtype):
    """``gram_chunks`` with ``rpad`` maps each row of ``fix`` (v -> v R) and then sums it:
    the bits of ``apply_upper`` over the whole stack followed by ``gram_chunks`` without a
    map (one stack as both arguments, as dsp has it; and a separate relabelled stack, as y
    has it), with column ranges that leave cells outside them (mapped all the same)."""
    from dyadperm.kernels.stats import apply_upper, padded_upper

    rng = np.random.default_rng(9)
    n = GRAM_COLUMNS + 13
    start = rng.integers(0, 5, n).astype(np.int64)
    stop = np.maximum(start, n - rng.integers(0, 5, n)).astype(np.int64)
    first = chunk_slots(start, stop)
    rinv = np.triu(rng.normal(size=(4, 4)))
    for same in (True, False):
        fix = rng.normal(size=(n, n, 4)).astype(dtype)
        rel = fix if same else rng.normal(size=(n, n, 1)).astype(dtype)
        rel_idx = np.arange(4 if same else 1, dtype=np.int64)
        fix_idx = np.arange(0 if same else 4, dtype=np.int64)
        n_lay = rel_idx.size + fix_idx.size
        width = n_lay + n_lay * (n_lay + 1) // 2
        fix2 = fix.copy()
        rel2 = fix2 if same else rel
        apply_upper(fix2.reshape(-1), 4, rinv)
        want = np.empty((first[-1], width))
        gram_chunks(rel2, rel_idx, fix2, fix_idx, start, stop, first[:-1], want)
        got = np.empty((first[-1], width))
        gram_chunks(rel, rel_idx, fix, fix_idx, start, stop, first[:-1], got,
                    padded_upper(rinv))
        np.testing.assert_array_equal(fix, fix2)
        np.testing.assert_array_equal(got, want)


@pytest.mark.parametrize("dtype", [np.float64, np.float32])
def test_stack_factors_writes_numpys_bits(dtype):
    """``tsqr.stack_factors`` writes each row of the layer stack (``stats.standardise_rows``,
    called from a fastmath kernel) and folds it: the stack has numpy's bits of (x - mean)
    / sd (reference: numpy; the division must not become a multiplication by the
    reciprocal, which the writer inherited from its caller until its options said
    ``fastmath=False``), and the row factors are ``row_factors``' of that stack."""
    from dyadperm.kernels.tsqr import row_factors, stack_factors

    rng = np.random.default_rng(14)
    n, m = 23, 37
    mats = tuple(rng.normal(loc=0.3, scale=1.7, size=(n, m)) for _ in range(3))
    means, sds = np.array([0.31, 0.29, 0.3]), np.array([1.7, 1.69, 1.71])
    holds = rng.random((n, m)) < 0.9
    mask = holds.copy()
    start, stop = np.zeros(n, np.int64), np.full(n, m, np.int64)
    out = np.empty((n, m, 3), dtype=dtype)
    bt, keep = np.empty((3, 16)), np.empty(16, dtype=bool)
    facs, counts = np.empty((n, 3, 3)), np.empty(n, np.int64)
    stack_factors(mats, means, sds, holds, 0.0, out, (), mask, start, stop, bt, keep, facs,
                  counts)
    for c in range(3):
        want = np.empty((n, m), dtype=dtype)
        np.subtract(mats[c], means[c], out=want)
        want /= sds[c]
        want[~holds] = 0.0
        np.testing.assert_array_equal(out[:, :, c], want)
    facs2, counts2 = np.empty_like(facs), np.empty_like(counts)
    row_factors((out,), mask, start, stop, bt, keep, facs2, counts2, False, False)
    np.testing.assert_array_equal(facs, facs2)
    np.testing.assert_array_equal(counts, counts2)
