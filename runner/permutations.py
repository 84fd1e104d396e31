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
from dataclasses import dataclass

import numpy as np

EXACT_LIMIT = 10_000_000


@dataclass(frozen=True)
class Blocks:
    """Relabelling structure: row blocks and (two-mode) column blocks, as (start, stop)."""

    n_rows: int
    n_cols: int
    row_blocks: tuple[tuple[int, int], ...]
    col_blocks: tuple[tuple[int, int], ...] | None  # None: one-mode, columns follow rows

    def count(self) -> int:
        """Number of distinct relabellings (n!, n!m!, or the product of block sizes' factorials)."""
        total = 1
        for s, e in self.row_blocks + (self.col_blocks or ()):
            total *= math.factorial(e - s)
        return total


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
    return rows, cols


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
    return rows, cols


def unrank(index: int, n: int) -> np.ndarray:
    """The ``index``-th permutation of range(n) in lexicographic order (Lehmer code)."""
    pool = list(range(n))
    out = np.empty(n, dtype=np.int64)
    for pos in range(n):
        f = math.factorial(n - 1 - pos)
        k, index = divmod(index, f)
        out[pos] = pool.pop(k)
    return out
