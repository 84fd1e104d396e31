"""The setup's two threads: numba kernels let go of the interpreter, so a pass over large
matrices can run as two calls side by side (halves of the rows, or one call per layer).

The work each thread gets never changes a result: calls are over disjoint rows or
independent layers, and no sum is split between threads unless its parts are added in a
fixed order afterwards.
"""

from __future__ import annotations

import os
import threading
from concurrent.futures import ThreadPoolExecutor
from typing import Any, Sequence

# Threads the setup's kernels run on.
SETUP_THREADS = max(1, min(2, os.cpu_count() or 1))
# Matrix cells a pass must read before two threads pay for themselves.
THREAD_CELLS = 1 << 20


# Name of the pool's threads: a call from one of them runs its items in turn (the pool
# would otherwise wait on itself).
_PREFIX = "dyadperm-setup"
_pool: ThreadPoolExecutor | None = None
_pool_pid = -1
_pool_lock = threading.Lock()


def _setup_pool() -> ThreadPoolExecutor:
    """The process's pool of ``SETUP_THREADS`` threads, made on first use and kept: a setup
    calls ``side_by_side`` a dozen times, and starting two threads each time cost 1-2 ms
    a thread (33 ms of a 140 ms plan at n = 2,000). A process forked from this one makes a
    pool of its own (the parent's threads are not in it)."""
    global _pool, _pool_pid
    with _pool_lock:
        if _pool is None or _pool_pid != os.getpid():
            _pool = ThreadPoolExecutor(max_workers=SETUP_THREADS, thread_name_prefix=_PREFIX)
            _pool_pid = os.getpid()
        return _pool


def side_by_side(fn, items: Sequence[Any], cells: int) -> list:
    """[fn(item) for item in items], on ``SETUP_THREADS`` threads (in order) when the work
    is large enough to pay for them (``cells``: the matrix cells it reads, at least
    THREAD_CELLS)."""
    items = list(items)
    if (SETUP_THREADS < 2 or len(items) < 2 or cells < THREAD_CELLS
            or threading.current_thread().name.startswith(_PREFIX)):
        return [fn(item) for item in items]
    return list(_setup_pool().map(fn, items))


def halves(lo: int, hi: int) -> list[slice]:
    """Rows [lo, hi) as two slices (the first the longer by at most one), for the two
    threads of ``side_by_side``."""
    mid = (lo + hi + 1) // 2
    return [slice(lo, mid), slice(mid, hi)]
