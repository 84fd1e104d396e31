"""Kernels against their plain-numpy twins in tests/reference.py.

Source of truth for each check: the formula in the kernel's contract, evaluated by
``reference.gather_cross_ref`` with ``rel[np.ix_(rp, cp)]`` fancy indexing and a boolean
mask (the exact-arithmetic definition, no optimisation).
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from reference import KERNEL_ATOL, KERNEL_RTOL, gather_cross_ref

from dyadperm.kernels.gather import gather_cross


def _inputs(rng, n, m, Lr, Lf, B, *, two_mode, ranges, kind="normal"):
    """Seeded random inputs of gather_cross, C-contiguous, in the dtypes of the contract."""
    if kind == "normal":
        rel = rng.normal(size=(n, m, Lr))
        fix = rng.normal(size=(n, m, Lf))
    elif kind == "ties":
        # small integers: many exact ties and zeros
        rel = rng.integers(0, 3, size=(n, m, Lr)).astype(np.float64)
        fix = rng.integers(-1, 2, size=(n, m, Lf)).astype(np.float64)
    elif kind == "zeros":
        rel = np.zeros((n, m, Lr))
        fix = rng.normal(size=(n, m, Lf))
    elif kind == "nan":
        rel = rng.normal(size=(n, m, Lr))
        fix = rng.normal(size=(n, m, Lf))
        rel[rng.integers(n), rng.integers(m), 0] = np.nan
    else:
        raise ValueError(kind)
    rel = np.ascontiguousarray(rel)
    fix = np.ascontiguousarray(fix)
    rel_idx = rng.choice(Lr, size=min(Lr, 2), replace=False).astype(np.int64)
    fix_idx = np.arange(Lf, dtype=np.int64)[::-1].copy()
    row_perms = np.array([rng.permutation(n) for _ in range(B)], dtype=np.int64)
    if two_mode:
        col_perms = np.array([rng.permutation(m) for _ in range(B)], dtype=np.int64)
    else:
        col_perms = row_perms.copy()
    if ranges == "full":
        col_start = np.zeros(n, dtype=np.int64)
        col_stop = np.full(n, m, dtype=np.int64)
    elif ranges == "upper":  # triangle: row i uses j > i (last row: empty range)
        col_start = np.arange(1, n + 1, dtype=np.int64)
        col_stop = np.full(n, m, dtype=np.int64)
    elif ranges == "ragged":
        col_start = rng.integers(0, m + 1, size=n).astype(np.int64)
        col_stop = np.array([rng.integers(s, m + 1) for s in col_start], dtype=np.int64)
    else:
        raise ValueError(ranges)
    return rel, rel_idx, fix, fix_idx, row_perms, col_perms, col_start, col_stop


CASES = [
    # (n, m, Lr, Lf, B, two_mode, ranges, kind)
    (2, 2, 1, 1, 1, False, "full", "normal"),
    (2, 2, 2, 3, 7, False, "upper", "normal"),
    (3, 3, 3, 2, 7, False, "full", "ties"),
    (3, 3, 2, 2, 1, False, "upper", "zeros"),
    (3, 5, 2, 3, 7, True, "full", "normal"),
    (5, 3, 1, 4, 7, True, "ragged", "ties"),
    (7, 7, 4, 3, 7, False, "upper", "normal"),
    (11, 11, 3, 5, 1, False, "ragged", "normal"),
    (13, 9, 2, 2, 7, True, "full", "ties"),
    (6, 6, 2, 2, 7, False, "full", "nan"),
]


@pytest.mark.parametrize("n,m,Lr,Lf,B,two_mode,ranges,kind", CASES)
def test_gather_cross_matches_twin(rng, n, m, Lr, Lf, B, two_mode, ranges, kind):
    args = _inputs(rng, n, m, Lr, Lf, B, two_mode=two_mode, ranges=ranges, kind=kind)
    copies = [a.copy() for a in args]
    R, Q = len(args[1]), len(args[3])
    out = np.full((B, R, Q), 12345.0)  # garbage: the kernel must overwrite, not add
    gather_cross(*args, out)
    expected = gather_cross_ref(*args)
    # source: the contract's formula, evaluated by the numpy twin (tests/reference.py)
    np.testing.assert_allclose(out, expected, rtol=KERNEL_RTOL, atol=KERNEL_ATOL)
    if kind == "nan":
        assert np.isnan(expected).any(), "the NaN case must put a NaN in the twin's answer"
    for before, after in zip(copies, args):
        np.testing.assert_array_equal(before, after)  # inputs are read-only


@pytest.mark.parametrize("two_mode", [False, True])
def test_gather_cross_float32_layers_accumulate_in_float64(rng, two_mode):
    # the engine may store layers as float32 (storage="float32"); sums stay float64, so the
    # kernel must equal the twin evaluated in float64 on the same float32 values
    n, m = (9, 9) if not two_mode else (9, 5)
    args = list(_inputs(rng, n, m, 3, 3, 7, two_mode=two_mode,
                        ranges="full" if two_mode else "upper"))
    args[0] = args[0].astype(np.float32)
    args[2] = args[2].astype(np.float32)
    out = np.empty((7, len(args[1]), len(args[3])))
    gather_cross(*args, out)
    twin_args = list(args)
    twin_args[0] = args[0].astype(np.float64)
    twin_args[2] = args[2].astype(np.float64)
    expected = gather_cross_ref(*twin_args)
    np.testing.assert_allclose(out, expected, rtol=KERNEL_RTOL, atol=KERNEL_ATOL)


def test_gather_cross_empty_ranges_give_zero(rng):
    # every row's range empty: the sums are empty, so 0 (not the garbage left in out)
    n, m = 4, 4
    args = list(_inputs(rng, n, m, 2, 2, 3, two_mode=False, ranges="full"))
    args[6] = np.full(n, 2, dtype=np.int64)
    args[7] = np.full(n, 2, dtype=np.int64)
    out = np.full((3, 2, 2), np.nan)
    gather_cross(*args, out)
    np.testing.assert_array_equal(out, np.zeros((3, 2, 2)))


def test_gather_cross_identity_is_plain_dot(rng):
    # with identity permutations the result is the plain dot product over the mask:
    # a second, independent formula (einsum) — common practice
    n, m = 6, 4
    args = list(_inputs(rng, n, m, 3, 2, 1, two_mode=True, ranges="full"))
    args[4] = np.arange(n, dtype=np.int64)[None, :]
    args[5] = np.arange(m, dtype=np.int64)[None, :]
    rel, rel_idx, fix, fix_idx = args[0], args[1], args[2], args[3]
    out = np.empty((1, len(rel_idx), len(fix_idx)))
    gather_cross(*args, out)
    expected = np.einsum("ija,ijc->ac", rel[:, :, rel_idx], fix[:, :, fix_idx])
    np.testing.assert_allclose(out[0], expected, rtol=KERNEL_RTOL, atol=KERNEL_ATOL)


@pytest.mark.skipif(os.environ.get("NUMBA_DISABLE_JIT") == "1",
                    reason="already running without the JIT (this is the inner run)")
def test_kernels_without_jit():
    """Run this file once more with NUMBA_DISABLE_JIT=1 (style.md: coverage and readable
    tracebacks of the pure-Python kernel bodies)."""
    here = Path(__file__).resolve()
    env = dict(os.environ, NUMBA_DISABLE_JIT="1")
    proc = subprocess.run(
        [sys.executable, "-m", "pytest", "-q", "-p", "no:cacheprovider", str(here)],
        cwd=here.parent.parent, env=env, capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stdout[-4000:] + proc.stderr[-2000:]
    assert " passed" in proc.stdout and " failed" not in proc.stdout, proc.stdout[-2000:]
