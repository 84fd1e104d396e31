"""The blocked, prefetching ``gather_cross``: every pass structure and block size.

Source of truth for each value: ``reference.gather_cross_ref`` (tests/reference.py), the
contract's formula evaluated with ``rel[np.ix_(rp, cp)]`` fancy indexing and a boolean
mask, written from the formula, not from the kernel. Invariance checks follow the
contract of shared/design.md ("results are bit-identical for any jobs, chunk size ...").

float32 storage (``storage="float32"``): every stored layer value carries a relative
rounding error of at most 2**-24 (about 6e-8; IEEE 754 binary32, round to nearest —
common practice); the kernels multiply and add in float64, so the only error is that of
the stored values. In the runs below the t statistics of float32 and float64 storage
differ by about 2e-7 at most (measured for n = 20 .. 150, all three schemes): the
rounding errors of single dyads average out in the sums rather than add up. The tests
allow ``T32_ATOL + T32_RTOL * |t|`` = 1e-5 (1 + |t|), fifty times the measured gap; a
nearly collinear design amplifies the error by its condition number, so that case is
not covered by this figure.
"""

from __future__ import annotations

import numpy as np
import pytest

from reference import KERNEL_ATOL, KERNEL_RTOL, gather_cross_ref

import dyadperm as dp
from dyadperm.kernels.gather import MAX_BLOCK, choose_tile, gather_cross

# float32 storage against float64 (see the module docstring for where these come from)
T32_RTOL = 1e-5
T32_ATOL = 1e-5

BLOCKS = (1, 2, 3, 8, MAX_BLOCK)


def _inputs(rng, n, m, Lr, Lf, R, Q, B, *, two_mode, ranges, dtype=np.float64):
    """Random layers, layer choices, relabellings and column ranges of one call."""
    rel = rng.normal(size=(n, m, Lr)).astype(dtype)
    fix = rng.normal(size=(n, m, Lf)).astype(dtype)
    # a layer choice in scrambled order, so no kernel may assume 0..R-1
    rel_idx = rng.permutation(Lr)[:R].astype(np.int64)
    fix_idx = rng.permutation(Lf)[:Q].astype(np.int64)
    row_perms = np.array([rng.permutation(n) for _ in range(B)], dtype=np.int64)
    col_perms = (np.array([rng.permutation(m) for _ in range(B)], dtype=np.int64)
                 if two_mode else row_perms)
    if ranges == "full":
        start = np.zeros(n, dtype=np.int64)
        stop = np.full(n, m, dtype=np.int64)
    elif ranges == "upper":  # one triangle (undirected): row i uses j > i
        start = np.minimum(np.arange(1, n + 1), m).astype(np.int64)
        stop = np.full(n, m, dtype=np.int64)
    elif ranges == "blocks":  # groups with dyads="within": two diagonal blocks
        cut = n // 2
        start = np.where(np.arange(n) < cut, 0, cut).astype(np.int64)
        stop = np.where(np.arange(n) < cut, cut, n).astype(np.int64)
    elif ranges == "ragged":
        start = rng.integers(0, m + 1, size=n).astype(np.int64)
        stop = np.array([rng.integers(s, m + 1) for s in start], dtype=np.int64)
    else:
        raise ValueError(ranges)
    return rel, rel_idx, fix, fix_idx, row_perms, col_perms, start, stop


# (n, m, Lr, Lf, R, Q, B, two_mode, ranges, path): path is what choose_tile must pick,
# so each case is known to run the pass structure it is listed for
CASES = [
    (2, 2, 1, 1, 1, 1, 5, False, "full", 0),          # n = 2, one fixed layer
    (3, 3, 1, 2, 1, 2, 7, False, "upper", 0),         # n = 3, 2 fixed layers, triangle
    (5, 5, 2, 3, 1, 3, 9, False, "full", 0),          # 3 fixed layers (scheme y, 3 predictors)
    (7, 7, 1, 4, 1, 4, 17, False, "upper", 0),        # 4 fixed layers
    (9, 9, 1, 9, 1, 9, 8, False, "ragged", 0),        # 4 + 4 + 1 fixed layers
    (6, 6, 2, 6, 1, 6, 3, False, "blocks", 0),        # 4 + 2, within-group ranges
    (11, 11, 3, 2, 2, 1, 10, False, "full", 0),       # R = 2, Q = 1: padding too costly
    (13, 13, 4, 4, 3, 4, 9, False, "upper", 34),      # dsp with 3 predictors
    (3, 3, 4, 4, 3, 4, 4, False, "full", 34),         # ... at n = 3
    (10, 10, 4, 4, 2, 4, 6, False, "ragged", 34),     # a padded tile row
    (8, 8, 7, 9, 6, 8, 3, False, "full", 34),         # 2 x 2 tiles
    (12, 12, 4, 4, 4, 3, 9, False, "upper", 43),      # freedman-lane with 3 predictors
    (2, 2, 4, 3, 4, 3, 3, False, "full", 43),         # ... at n = 2
    (9, 9, 5, 6, 4, 6, 5, False, "full", 43),         # 4 x 3 twice over the fixed layers
    (5, 7, 4, 4, 3, 4, 9, True, "full", 34),          # two-mode, odd sizes
    (7, 3, 1, 3, 1, 3, 9, True, "full", 0),           # two-mode, more rows than columns
    (4, 9, 4, 3, 4, 3, 6, True, "ragged", 43),        # two-mode, ragged ranges
    (2, 5, 1, 1, 1, 1, 2, True, "full", 0),           # two-mode 2 x 5
]


@pytest.mark.parametrize("n,m,Lr,Lf,R,Q,B,two_mode,ranges,path", CASES)
def test_every_pass_and_block_matches_the_twin(rng, n, m, Lr, Lf, R, Q, B, two_mode, ranges,
                                               path):
    assert choose_tile(R, Q) == path  # the case exercises the path it is listed for
    args = _inputs(rng, n, m, Lr, Lf, R, Q, B, two_mode=two_mode, ranges=ranges)
    # source: the contract's formula by fancy indexing (tests/reference.py)
    expected = gather_cross_ref(*args)
    results = []
    for block in BLOCKS:
        out = np.full((B, R, Q), np.nan)  # the kernel must overwrite every entry
        gather_cross(*args, out, block=block)
        np.testing.assert_allclose(out, expected, rtol=KERNEL_RTOL, atol=KERNEL_ATOL,
                                   err_msg=f"block={block}")
        results.append(out)
    # the design contract: the same bits whatever the block size
    for block, out in zip(BLOCKS[1:], results[1:]):
        np.testing.assert_array_equal(out, results[0], err_msg=f"block={block} vs block=1")


@pytest.mark.parametrize("R,Q,Lr,Lf", [(1, 3, 1, 3), (3, 4, 4, 4), (4, 3, 4, 4), (2, 5, 3, 5)])
def test_a_permutation_gives_the_same_bits_alone_or_in_any_batch(rng, R, Q, Lr, Lf):
    # design contract: a chunk's statistics depend only on its permutations, so each
    # permutation must come out the same whether it runs alone or inside a block of others
    n = 23
    args = list(_inputs(rng, n, n, Lr, Lf, R, Q, 13, two_mode=False, ranges="upper"))
    batch = np.empty((13, R, Q))
    gather_cross(*args, batch)
    for b in (0, 5, 12):
        alone = np.empty((1, R, Q))
        sub = list(args)
        sub[4] = args[4][b:b + 1]
        sub[5] = args[5][b:b + 1]
        gather_cross(*sub, alone)
        np.testing.assert_array_equal(alone[0], batch[b])


@pytest.mark.parametrize("R,Q", [(1, 3), (3, 4), (4, 3), (1, 1)])
@pytest.mark.parametrize("two_mode", [False, True])
def test_float32_layers_are_summed_in_float64(rng, R, Q, two_mode):
    # with float32 layers the products and sums are float64: the kernel equals the twin
    # applied to the same values upcast to float64 (exact conversion, IEEE 754), to the
    # kernel tolerance — not to float32 precision
    n, m = 15, (11 if two_mode else 15)
    args = list(_inputs(rng, n, m, 4, 4, R, Q, 9, two_mode=two_mode, ranges="full",
                        dtype=np.float32))
    args[0] = args[0] * np.float32(1e3)  # large values: float32 sums would lose digits
    out = np.empty((9, R, Q))
    gather_cross(*args, out)
    up = list(args)
    up[0] = args[0].astype(np.float64)
    up[2] = args[2].astype(np.float64)
    # source: the contract's formula in float64 (tests/reference.py)
    np.testing.assert_allclose(out, gather_cross_ref(*up), rtol=KERNEL_RTOL,
                               atol=KERNEL_ATOL * 1e3)


def test_layers_that_are_not_c_contiguous_are_read_correctly(rng):
    # a transposed view has other strides; the entry point must read it as the array it is
    n = 9
    base = rng.normal(size=(4, n, n))
    rel = np.moveaxis(base, 0, 2)  # (n, n, 4), not C-contiguous
    fix = np.ascontiguousarray(rng.normal(size=(n, n, 3)))
    perms = np.array([rng.permutation(n) for _ in range(5)], dtype=np.int64)
    start = np.zeros(n, dtype=np.int64)
    stop = np.full(n, n, dtype=np.int64)
    args = (rel, np.array([2, 0, 1], np.int64), fix, np.arange(3, dtype=np.int64), perms,
            perms, start, stop)
    assert not rel.flags.c_contiguous
    out = np.empty((5, 3, 3))
    gather_cross(*args, out)
    # source: tests/reference.py twin
    np.testing.assert_allclose(out, gather_cross_ref(*args), rtol=KERNEL_RTOL,
                               atol=KERNEL_ATOL)


def test_rows_too_long_for_int32_offsets_are_refused():
    # a zero-stride view fakes 2**30 columns x 2 layers without the memory
    rel = np.lib.stride_tricks.as_strided(np.zeros(1), shape=(2, 2**30, 2), strides=(0, 0, 0))
    fix = np.lib.stride_tricks.as_strided(np.zeros(1), shape=(2, 2**30, 1), strides=(0, 0, 0))
    perms = np.zeros((1, 2), np.int64)
    # kernels raise plain errors (they import nothing of the runner)
    with pytest.raises(ValueError, match=r"fewer than 2\*\*31 values .* got 1073741824 "
                                         r"columns x 2 layers"):
        gather_cross(rel, np.zeros(1, np.int64), fix, np.zeros(1, np.int64), perms,
                     np.zeros((1, 2**30), np.int64), np.zeros(2, np.int64),
                     np.zeros(2, np.int64), np.empty((1, 1, 1)))


# --- whole runs ---------------------------------------------------------------------------
def _study(rng, n, m=None, directed=True):
    m = n if m is None else m
    xs = [rng.normal(size=(n, m)) for _ in range(3)]
    xs[1] += 0.5 * xs[0]
    y = 0.4 * xs[0] - 0.3 * xs[2] + rng.normal(size=(n, m))
    if not directed:
        y = np.triu(y, 1) + np.triu(y, 1).T
        xs = [np.triu(x, 1) + np.triu(x, 1).T for x in xs]
    return y, xs


@pytest.mark.parametrize("scheme", ["y", "dsp", "freedman-lane"])
@pytest.mark.parametrize("shape", ["directed", "undirected", "two-mode"])
def test_null_is_bit_identical_for_any_chunk_size_and_jobs(rng, scheme, shape):
    # design contract (shared/design.md, Engine): bit-identical for any jobs or chunking
    if shape == "two-mode":
        y, xs = _study(rng, 17, 13)
    else:
        y, xs = _study(rng, 19, directed=shape == "directed")
    runs = {}
    for chunk_size in (1, 7, 64):
        for jobs in (1, 2):
            res = dp.regress(y, xs, scheme=scheme, permutations=70, seed=11, jobs=jobs,
                             chunk_size=chunk_size)
            runs[chunk_size, jobs] = res.null
    first = runs[1, 1]
    assert first.shape == (70, 3) and np.isfinite(first).all()
    for key, null in runs.items():
        np.testing.assert_array_equal(null, first, err_msg=f"chunk_size, jobs = {key}")


@pytest.mark.parametrize("scheme", ["y", "dsp", "freedman-lane"])
def test_float32_storage_agrees_with_float64(rng, scheme):
    # accuracy of float32 storage (module docstring): |t32 - t64| <= 1e-5 (1 + |t64|)
    y, xs = _study(rng, 40)
    r64 = dp.regress(y, xs, scheme=scheme, permutations=150, seed=5, storage="float64")
    r32 = dp.regress(y, xs, scheme=scheme, permutations=150, seed=5, storage="float32",
                     chunk_size=9, jobs=2)
    np.testing.assert_allclose(r32.null, r64.null, rtol=T32_RTOL, atol=T32_ATOL)
    # float32 is not float64: the stored values were rounded, so some statistic moves
    assert not np.array_equal(r32.null, r64.null)
    # the observed fit comes from the float64 data either way (float32: a QR of the
    # inputs; float64: the factor of the standardised layers), never the rounded layers
    np.testing.assert_allclose(r32.stat, r64.stat, rtol=1e-12)


def test_float32_null_is_bit_identical_for_any_chunk_size_and_jobs(rng):
    # design contract, float32 storage too
    y, xs = _study(rng, 21)
    nulls = [dp.regress(y, xs, scheme="dsp", permutations=40, seed=2, storage="float32",
                        chunk_size=cs, jobs=jobs).null for cs, jobs in ((1, 1), (7, 2), (64, 2))]
    for null in nulls[1:]:
        np.testing.assert_array_equal(null, nulls[0])
