"""The setup's two threads: numba kernels let go of the interpreter, so a pass over large
matrices can run as two calls side by side (halves of the rows, or one call per layer).

The work each thread gets never changes a result: calls are over disjoint rows or
independent layers, and no sum is split between threads unless its parts are added in a
fixed order afterwards.
"""

from __future__ import annotations

import os
from concurrent.futures import ThreadPoolExecutor
from typing import Any, Sequence

# Threads the setup's kernels run on.
SETUP_THREADS = max(1, min(2, os.cpu_count() or 1))
# Matrix cells a pass must read before two threads pay for themselves.
THREAD_CELLS = 1 << 20


def side_by_side(fn, items: Sequence[Any], cells: int) -> list:
    """[fn(item) for item in items], on ``SETUP_THREADS`` threads (in order) when the work
    is large enough to pay for them (``cells``: the matrix cells it reads, at least
    THREAD_CELLS)."""
    items = list(items)
    if SETUP_THREADS < 2 or len(items) < 2 or cells < THREAD_CELLS:
        return [fn(item) for item in items]
    with ThreadPoolExecutor(max_workers=SETUP_THREADS) as pool:
        return list(pool.map(fn, items))


def halves(lo: int, hi: int) -> list[slice]:
    """Rows [lo, hi) as two slices (the first the longer by at most one), for the two
    threads of ``side_by_side``."""
    mid = (lo + hi + 1) // 2
    return [slice(lo, mid), slice(mid, hi)]
