"""Chunks of relabellings -> kernels -> statistics, spread over workers.

A chunk is a fixed-size run of consecutive permutation indices; it is the unit of
parallel work, of storage and of resume. Chunk ``c`` holds permutations
``c * chunk_size`` .. ``(c + 1) * chunk_size - 1`` (the last chunk may be shorter), each
drawn from its own stream (see ``permutations``), so a chunk's statistics depend only on
the seed and its index. Only this module knows about workers.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable, Iterable, Iterator

import numpy as np

from ..errors import InputError
from .permutations import Blocks, draw, enumerate_exact

# A plan is anything with ``k`` and ``statistics(row_perms, col_perms)`` (see
# dyadperm.routes.plan); this module needs nothing else of it.
Plan = Any


def row_width(plan: Plan) -> int:
    """Numbers per relabelling a plan returns: its ``width`` (statistics, then a route's
    extra numbers), or ``k`` for a plan of statistics only."""
    return int(getattr(plan, "width", plan.k))


@dataclass(frozen=True)
class Draws:
    """Which relabellings a run uses: random (by seed entropy) or the full enumeration."""

    blocks: Blocks
    total: int
    chunk_size: int
    exact: bool
    entropy: int

    @property
    def n_chunks(self) -> int:
        return -(-self.total // self.chunk_size)

    def chunk_rows(self, c: int) -> tuple[int, int]:
        """(first permutation index, number of permutations) of chunk ``c``."""
        first = c * self.chunk_size
        return first, min(self.chunk_size, self.total - first)

    def permutations(self, c: int) -> tuple[np.ndarray, np.ndarray]:
        first, count = self.chunk_rows(c)
        if self.exact:
            return enumerate_exact(self.blocks, first, count)
        return draw(self.blocks, self.entropy, first, count)


def workers_used(jobs: int, backend: str, n_chunks: int) -> int | None:
    """Workers that compute a run's chunks: ``jobs`` (-1: every core), at most one per
    chunk; None for a Dask cluster (its scheduler decides)."""
    if backend == "dask":
        return None
    import joblib

    wanted = int(joblib.cpu_count()) if jobs == -1 else int(jobs)
    return max(1, min(wanted, n_chunks))


def compute_chunk(plan: Plan, draws: Draws, c: int) -> tuple[int, np.ndarray]:
    """Statistics (count, k) of chunk ``c``."""
    rows, cols = draws.permutations(c)
    return c, plan.statistics(rows, cols)


def iter_chunks(plan: Plan, draws: Draws, chunk_ids: Iterable[int], *, jobs: int = 1,
                backend: str = "threads", scheduler: str | None = None
                ) -> Iterator[tuple[int, np.ndarray]]:
    """Yield (chunk index, statistics) as chunks finish, in any order.

    ``jobs`` = 1 runs in this thread; otherwise joblib spreads chunks over ``jobs``
    workers (-1: all cores). ``backend``: "threads" (default; kernels release the GIL,
    inputs are shared, not copied), "processes" (loky), or "dask": chunks go to the
    Dask distributed scheduler at ``scheduler`` through joblib's Dask backend, with the
    plan (the input layers) scattered to the workers once.
    """
    chunk_ids = list(chunk_ids)
    if backend == "dask":
        yield from _iter_dask(plan, draws, chunk_ids, scheduler)
        return
    if jobs == 1 or len(chunk_ids) <= 1:
        for c in chunk_ids:
            yield compute_chunk(plan, draws, c)
        return
    from joblib import Parallel, delayed

    prefer = {"threads": "threading", "processes": "loky"}[backend]
    parallel = Parallel(n_jobs=jobs, backend=prefer, return_as="generator_unordered")
    yield from parallel(delayed(compute_chunk)(plan, draws, c) for c in chunk_ids)


def _iter_dask(plan: Plan, draws: Draws, chunk_ids: list[int], scheduler: str | None):
    try:
        from distributed import Client
    except ImportError:
        raise InputError("backend 'dask' needs the dask extra: pip install 'dyadperm[dask]'") from None
    import joblib
    from joblib import Parallel, delayed

    with Client(scheduler, set_as_default=False) as client:
        with joblib.parallel_config(backend="dask", client=client, scatter=[plan]):
            parallel = Parallel(n_jobs=-1, return_as="generator_unordered")
            yield from parallel(delayed(compute_chunk)(plan, draws, c) for c in chunk_ids)


def run_all(plan: Plan, draws: Draws, *, jobs: int = 1, backend: str = "threads",
            scheduler: str | None = None,
            on_chunk: Callable[[int, np.ndarray], None] | None = None) -> np.ndarray:
    """Every chunk's statistics assembled in permutation order (total, k)."""
    null = np.empty((draws.total, row_width(plan)))
    for c, stats in iter_chunks(plan, draws, range(draws.n_chunks), jobs=jobs, backend=backend,
                                scheduler=scheduler):
        first, count = draws.chunk_rows(c)
        null[first:first + count] = stats
        if on_chunk is not None:
            on_chunk(c, stats)
    return null


def parallel_map(fn: Callable, tasks: list, jobs: int) -> Iterator:
    """Yield fn(*task) for every task, in any order; threads when ``jobs`` is not 1."""
    if jobs == 1 or len(tasks) <= 1:
        for task in tasks:
            yield fn(*task)
        return
    from joblib import Parallel, delayed

    parallel = Parallel(n_jobs=jobs, backend="threading", return_as="generator_unordered")
    yield from parallel(delayed(fn)(*task) for task in tasks)
