"""The relabelling structure of a problem: which nodes may trade places.

Relabellings permute nodes within blocks (groups are contiguous ranges of the engine's
internal node order; one block when there are no groups). Two-mode data have separate row
and column blocks. Waves of one node set (``dyadperm.inputs.waves``) stand as one
rectangular layer whose column ``j * waves + t`` is node j at wave t: their column
relabelling is derived from the row relabelling (``columns``), never drawn. How
relabellings are drawn or enumerated is the pipeline's business
(``dyadperm.pipeline.permutations``).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class Blocks:
    """Relabelling structure: row blocks and (two-mode) column blocks, as (start, stop)."""

    n_rows: int
    n_cols: int
    row_blocks: tuple[tuple[int, int], ...]
    col_blocks: tuple[tuple[int, int], ...] | None  # None: one-mode, columns follow rows
    #: one-mode waves interleaved in the columns (n_cols = n_rows * waves); 1: plain data
    waves: int = 1

    def count(self) -> int:
        """Number of distinct relabellings (n!, n!m!, or the product of block sizes' factorials)."""
        total = 1
        for s, e in self.row_blocks + (self.col_blocks or ()):
            total *= math.factorial(e - s)
        return total

    def columns(self, rows: np.ndarray) -> np.ndarray:
        """The column relabellings that follow row relabellings ``rows`` (..., n) of
        one-mode data: ``rows`` itself, or with waves pi(j) * waves + t at column
        j * waves + t (the same relabelling at every wave)."""
        if self.waves == 1:
            return rows
        t = np.arange(self.waves, dtype=np.int64)
        return (rows[..., :, None] * self.waves + t).reshape(rows.shape[:-1] + (-1,))
