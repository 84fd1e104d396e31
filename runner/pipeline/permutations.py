"""Which relabellings a run uses: random draws with their own streams, or all of them.

Permutation number ``i`` of a run is drawn from ``SeedSequence(entropy, spawn_key=(i,))``
(the i-th child of the run's seed sequence), so every relabelling is fixed by the seed
and its index alone: results do not depend on chunk size, jobs, completion order, shards
or resume points, and extending a run from m to M permutations reproduces the first m.

Relabellings permute nodes within blocks (groups are contiguous ranges of the engine's
internal node order; one block when there are no groups). Two-mode data have separate
row and column blocks and draw the row permutation first, then the column permutation.
Exact enumeration unranks index ``i`` in the mixed-radix system of the blocks' Lehmer
codes; index 0 is the identity.
"""

from __future__ import annotations

import math
import numpy as np

from ..inputs.blocks import Blocks
from ..settings import EXACT_LIMIT  # noqa: F401  (re-exported)


def draw(blocks: Blocks, entropy: int, first: int, count: int) -> tuple[np.ndarray, np.ndarray]:
    """Random relabellings number ``first`` .. ``first + count - 1`` of a run.

    Returns row permutations (count, n) and column permutations (count, m), int64.
    """
    rows = np.empty((count, blocks.n_rows), dtype=np.int64)
    cols = rows if blocks.col_blocks is None else np.empty((count, blocks.n_cols), dtype=np.int64)
    for b in range(count):
        rng = np.random.Generator(np.random.PCG64(
            np.random.SeedSequence(entropy, spawn_key=(first + b,))))
        _draw_one(rng, blocks.row_blocks, rows[b])
        if blocks.col_blocks is not None:
            _draw_one(rng, blocks.col_blocks, cols[b])
    return rows, (blocks.columns(rows) if blocks.col_blocks is None else cols)


def _draw_one(rng: np.random.Generator, ranges, out: np.ndarray) -> None:
    for s, e in ranges:
        out[s:e] = s + rng.permutation(e - s)


def enumerate_exact(blocks: Blocks, first: int, count: int) -> tuple[np.ndarray, np.ndarray]:
    """Relabellings number ``first`` .. ``first + count - 1`` of the full enumeration."""
    ranges = list(blocks.row_blocks) + list(blocks.col_blocks or ())
    sizes = [math.factorial(e - s) for s, e in ranges]
    rows = np.empty((count, blocks.n_rows), dtype=np.int64)
    cols = rows if blocks.col_blocks is None else np.empty((count, blocks.n_cols), dtype=np.int64)
    n_row_ranges = len(blocks.row_blocks)
    for b in range(count):
        index = first + b
        # mixed radix: the last range varies fastest
        digits = []
        for size in reversed(sizes):
            index, d = divmod(index, size)
            digits.append(d)
        digits.reverse()
        for r, ((s, e), d) in enumerate(zip(ranges, digits)):
            target = rows[b] if r < n_row_ranges else cols[b]
            target[s:e] = s + unrank(d, e - s)
    return rows, (blocks.columns(rows) if blocks.col_blocks is None else cols)


def unrank(index: int, n: int) -> np.ndarray:
    """The ``index``-th permutation of range(n) in lexicographic order (Lehmer code)."""
    pool = list(range(n))
    out = np.empty(n, dtype=np.int64)
    for pos in range(n):
        f = math.factorial(n - 1 - pos)
        k, index = divmod(index, f)
        out[pos] = pool.pop(k)
    return out


# --------------------------------------------------------------------------- from a generator
# Simulation studies (``dyadperm.calibrate``) draw the relabellings of a replicate from that
# replicate's own generator, in the order given here.

def draw_from(rng: np.random.Generator, blocks: Blocks) -> tuple[np.ndarray, np.ndarray]:
    """One relabelling within blocks from ``rng``: (n,), (m,) (the same array one-mode)."""
    rows = np.empty(blocks.n_rows, dtype=np.int64)
    for s, e in blocks.row_blocks:
        rows[s:e] = s + rng.permutation(e - s)
    if blocks.col_blocks is None:
        return rows, blocks.columns(rows)
    cols = np.empty(blocks.n_cols, dtype=np.int64)
    for s, e in blocks.col_blocks:
        cols[s:e] = s + rng.permutation(e - s)
    return rows, cols


def draw_many_from(rng: np.random.Generator, blocks: Blocks, count: int
                  ) -> tuple[np.ndarray, np.ndarray]:
    """``count`` random relabellings within blocks, drawn at once: (count, n), (count, m)."""
    def within(ranges, size):
        out = np.empty((count, size), dtype=np.int64)
        for s, e in ranges:
            out[:, s:e] = s + rng.permuted(np.tile(np.arange(e - s, dtype=np.int64),
                                                    (count, 1)), axis=1)
        return out

    rows = within(blocks.row_blocks, blocks.n_rows)
    cols = blocks.columns(rows) if blocks.col_blocks is None else within(blocks.col_blocks,
                                                                          blocks.n_cols)
    return rows, cols
