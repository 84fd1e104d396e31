"""The setup's tall-skinny QR (``kernels.tsqr.fold_rows``) against its numpy twin
(``reference.fold_rows_ref``: one ``np.linalg.qr`` of the whole matrix of dyads), on seeded
random layers including n = 2 and 3, odd sizes, two-mode shapes, ties, NaN cells, holes in
the dyad set and the triangle ranges of undirected data; float64 and float32 layers; and
the same bits however the rows are split into calls.

Source of truth: R'R = D'D for any R factor of D, and the R factor of a full-rank matrix is
unique up to the signs of its rows (common practice), so at full rank both are also
compared with nonnegative diagonals (to the tolerance times the condition number, the
forward error of a QR -- common practice); the kernel sums in
another order (four-chain sums, TSQR blocks), hence ``KERNEL_RTOL`` relative to
the size of R.
"""

import numpy as np
import pytest

from dyadperm.kernels.tsqr import fold_rows
from reference import KERNEL_RTOL, fold_rows_ref, sign_rows


def _call(layers, mask, start, stop, intercept, skip_nan, width=8, splits=None):
    n = mask.shape[0]
    p = len(layers) + int(intercept)
    out = np.zeros((p, p))
    count = np.zeros(1, dtype=np.int64)
    bt, keep, fac = np.empty((p, width)), np.empty(width, dtype=bool), np.empty((p, p))
    stack = layers[0].base  # the (n, m, L) array the layers are views of (``_case``)
    assert stack is not None and stack.shape[2] == len(layers)
    cuts = [0] + list(splits or []) + [n]
    for a, b in zip(cuts[:-1], cuts[1:]):
        fold_rows((stack[a:b],), mask[a:b], start[a:b], stop[a:b], bt, keep, fac, out, count, intercept,
                  skip_nan)
    return out, int(count[0])


def _case(rng, n, m, n_layers, *, kind, nan, holes, triangle, dtype=np.float64):
    stack = rng.normal(size=(n, m, n_layers))
    if kind == "ties":
        stack = rng.integers(0, 3, size=(n, m, n_layers)).astype(float)
    if nan:
        stack[rng.random(stack.shape) < 0.15] = np.nan
    stack = stack.astype(dtype)
    mask = np.ones((n, m), dtype=bool)
    if n == m:
        np.fill_diagonal(mask, False)
    if holes:
        mask &= rng.random((n, m)) > 0.2
    start = np.zeros(n, dtype=np.int64)
    stop = np.full(n, m, dtype=np.int64)
    if triangle:
        start = np.minimum(np.arange(n, dtype=np.int64) + 1, m)
    # the kernel reads the layers of one (n, m, L) array, as the route's stack holds them
    return [stack[:, :, c] for c in range(n_layers)], mask, start, stop


@pytest.mark.parametrize("dtype", [np.float64, np.float32])
@pytest.mark.parametrize("n, m", [(2, 2), (3, 3), (3, 2), (7, 7), (9, 5), (13, 13)])
@pytest.mark.parametrize("intercept", [True, False])
def test_fold_rows_equals_one_qr(rng, n, m, intercept, dtype):
    for kind in ("normal", "ties"):
        for nan, holes, triangle in ((False, False, False), (True, True, False),
                                     (False, False, True), (True, False, True)):
            layers, mask, start, stop = _case(rng, n, m, 2, kind=kind, nan=nan, holes=holes,
                                               triangle=triangle, dtype=dtype)
            want, count_want = fold_rows_ref(layers, mask, start, stop, intercept, nan)
            got, count = _call(layers, mask, start, stop, intercept, nan, width=3)
            assert count == count_want
            assert np.allclose(np.tril(got, -1), 0.0)
            scale = max(1.0, float(np.abs(want).max()))
            # R'R = D'D always; R itself is unique (up to row signs) at full column rank
            np.testing.assert_allclose(got.T @ got, want.T @ want, rtol=0,
                                       atol=KERNEL_RTOL * scale ** 2)
            if np.linalg.matrix_rank(want) == want.shape[0] and \
                    np.linalg.cond(want) < 1e6:
                np.testing.assert_allclose(sign_rows(got), want, rtol=0,
                                           atol=KERNEL_RTOL * scale * np.linalg.cond(want))


def test_fold_rows_same_bits_for_any_split_and_a_wide_block(rng):
    layers, mask, start, stop = _case(rng, 23, 23, 3, kind="normal", nan=True, holes=True,
                                      triangle=False)
    whole, count = _call(layers, mask, start, stop, True, True, width=4)
    for splits in ([1], [5, 6, 17], list(range(1, 23))):
        part, c = _call(layers, mask, start, stop, True, True, width=4, splits=splits)
        assert c == count
        np.testing.assert_array_equal(part, whole)
    want, _ = fold_rows_ref(layers, mask, start, stop, True, True)
    wide, _ = _call(layers, mask, start, stop, True, True, width=64)
    np.testing.assert_allclose(sign_rows(wide), want, rtol=0,
                               atol=KERNEL_RTOL * float(np.abs(want).max()))


def test_fold_rows_of_no_dyads_is_zero(rng):
    layers, mask, start, stop = _case(rng, 3, 3, 2, kind="normal", nan=False, holes=False,
                                      triangle=False)
    got, count = _call(layers, np.zeros_like(mask), start, stop, True, False)
    assert count == 0 and not got.any()


def test_row_factors_folded_in_order_same_bits_as_fold_rows(rng):
    """``row_factors`` on disjoint halves of the rows (what ``routes.linear.qr_layers``
    runs on two threads) and ``fold_factors`` in row order give the bits of one
    ``fold_rows`` pass; the layers come from two stacks (predictors, then the response,
    as scheme y folds them), float64 and float32."""
    from dyadperm.kernels.tsqr import fold_factors, row_factors

    for dtype in (np.float64, np.float32):
        layers, mask, start, stop = _case(rng, 31, 29, 3, kind="normal", nan=False,
                                          holes=True, triangle=True, dtype=dtype)
        stack = layers[0].base
        resp = rng.normal(size=(31, 29, 1)).astype(dtype)
        p = 4
        whole = np.zeros((p, p))
        count = np.zeros(1, dtype=np.int64)
        fold_rows((stack, resp), mask, start, stop, np.empty((p, 5)), np.empty(5, bool),
                  np.empty((p, p)), whole, count, False, False)
        facs, counts = np.empty((31, p, p)), np.empty(31, dtype=np.int64)
        for a, b in ((0, 13), (13, 31)):
            row_factors((stack[a:b], resp[a:b]), mask[a:b], start[a:b], stop[a:b],
                        np.empty((p, 5)), np.empty(5, bool), facs[a:b], counts[a:b], False,
                        False)
        got = np.zeros((p, p))
        got_count = np.zeros(1, dtype=np.int64)
        fold_factors(facs, counts, np.empty((p, 5)), got, got_count)
        assert got_count[0] == count[0] == mask[np.arange(29)[None, :] >= start[:, None]].sum()
        np.testing.assert_array_equal(got, whole)
