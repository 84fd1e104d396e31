"""The relabelling structure of a problem: which nodes may trade places.

Relabellings permute nodes within blocks (groups are contiguous ranges of the engine's
internal node order; one block when there are no groups). Two-mode data have separate row
and column blocks. How relabellings are drawn or enumerated is the pipeline's business
(``dyadperm.pipeline.permutations``).
"""

from __future__ import annotations

import math
from dataclasses import dataclass


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
