"""What every route hands the pipeline: a :class:`Plan`.

A route (dense linear, sparse linear, logistic, correlation, the layer correlation matrix)
turns prepared inputs into a plan; the pipeline (``dyadperm.pipeline.run``) turns any plan
into a result, with every run feature (seed streams, exact enumeration, chunks, workers,
run files, resume, growth, shards, stop rules, p-values). A plan holds:

- ``statistics(row_perms, col_perms)``: the (B, k) statistics of B relabellings, through
  the route's kernels. The observed statistic is the identity relabelling through the same
  call. A statistic that cannot be computed for a relabelling (a permuted fit that breaks
  the fit rule of ``kernels.options``, or fails to converge) is NaN: the per-permutation
  failure flag, which the p-values count as at least as extreme. A route refuses a design
  that breaks the rule on the observed data before it builds a plan; an observed statistic
  that is nevertheless not finite leaves its term without p-values (``pipeline.pvalues``).
- ``blocks``: the relabelling structure (groups, two-mode rows and columns).
- ``chunk_size``: the route's default permutations per chunk, sized from its work per
  relabelling so one chunk is a fraction of a second of kernel time.
- ``fit``: the observed fit for the table (``coef``, ``se``, ``stat``, ``fit`` = [r2,
  deviance]) and ``expected``, the observed statistics the kernels must reproduce (a
  warning names a term where they do not: lost precision), or None.
- ``summary``: what the result reports (kind, model, scheme, statistic, terms, tested
  terms, response, nodes, dyads, directedness, notes).
- ``identity``: everything that must agree for a run file to belong to this run (settings
  and the SHA-256 fingerprint of every input); the pipeline adds the seed, exact
  enumeration and chunk size.
- ``extra``: numbers per relabelling that follow the k statistics in each row the kernels
  return (0 for most plans): what a route needs besides the statistics, stored with them
  in the run file (the interval rows of ``dyadperm.pipeline.intervals``, say).

The object whose ``statistics`` the workers call is ``kernel``; the plan itself is what is
sent to Dask workers or processes (its arrays are the inputs' layers, scattered once).
"""

from __future__ import annotations

import hashlib
import json
import os
from collections.abc import Callable, Iterator, Mapping
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from typing import Any, Protocol

import numpy as np

from ..inputs.blocks import Blocks

# Work per chunk (dyads x cross products) the default chunk size aims at: a few tenths of a
# second of kernel time, so progress, storage and resume stay fine-grained while the cost
# of storing a chunk (one flush) stays a few percent.
CHUNK_WORK = 1e9
MAX_CHUNK = 1000
# Kernels share each read of the fixed layers among the permutations of a chunk (up to a
# block of 8), so a chunk is never smaller than this.
MIN_CHUNK = 16


class Statistics(Protocol):
    """The kernel side of a plan: k statistics per relabelling."""

    k: int

    def statistics(self, row_perms: np.ndarray, col_perms: np.ndarray) -> np.ndarray: ...


@dataclass(frozen=True, eq=False)
class Plan:
    """A route's plan for the pipeline (module docstring)."""

    kernel: Statistics
    blocks: Blocks
    chunk_size: int
    fit: dict
    summary: dict
    identity: Mapping  # a dict, or a LazyIdentity (made when first read)
    expected: np.ndarray | None = None
    extra: int = 0

    @property
    def k(self) -> int:
        """Statistics per relabelling (one per tested term)."""
        return self.kernel.k

    @property
    def width(self) -> int:
        """Numbers per relabelling: the k statistics, then ``extra``."""
        return self.kernel.k + self.extra

    def statistics(self, row_perms: np.ndarray, col_perms: np.ndarray) -> np.ndarray:
        """Rows (B, width) of B relabellings given as row/column permutations: the
        statistics, then the extra numbers."""
        return self.kernel.statistics(row_perms, col_perms)

    def observed(self) -> np.ndarray:
        """The observed row: the identity relabelling through the same kernels."""
        ident_r = np.arange(self.blocks.n_rows, dtype=np.int64)[None, :]
        ident_c = np.arange(self.blocks.n_cols, dtype=np.int64)[None, :]
        return self.statistics(ident_r, ident_c)[0]


def chunk_size_for(work: float, *, budget: float = CHUNK_WORK, least: int = MIN_CHUNK,
                   most: int = MAX_CHUNK) -> int:
    """Permutations per chunk that keep a chunk's work near ``budget`` (``work`` per
    relabelling, in the route's own units), between ``least`` and ``most``."""
    return int(np.clip(budget // max(work, 1), least, most))


# Bytes of an array hashed at once by ``fingerprint`` (a contiguous copy of that much at most).
FINGERPRINT_BYTES = 8 << 20


def fingerprint(arr: np.ndarray) -> str:
    """SHA-256 of an array's dtype, shape and bytes (in C order).

    The bytes are fed to the hash in blocks along the first axis, each made contiguous on
    its own, so a layer of a strided stack is never copied whole (the hash of the bytes in
    pieces is the hash of all of them)."""
    a = np.asarray(arr)
    a = a.reshape(1) if a.ndim == 0 else a  # as np.ascontiguousarray has it
    h = hashlib.sha256()
    h.update(f"{a.dtype.str}{a.shape}".encode())
    step = max(1, FINGERPRINT_BYTES // max(1, a[:1].nbytes))
    for i0 in range(0, a.shape[0], step):
        h.update(memoryview(np.ascontiguousarray(a[i0:i0 + step])))
    return h.hexdigest()


def groups_fingerprint(groups: Any) -> str | None:
    return None if groups is None else fingerprint(np.asarray(groups).astype(str))


def summary(prep: Any, *, kind: str, model: str, scheme: str, statistic: str, method: Any,
            n_dyads: Any, terms: Any) -> dict:
    """What a result reports about a dense (``design.Prepared``) problem."""
    n, m = prep.mask.shape
    return dict(kind=kind, model=model, scheme=scheme, statistic=statistic, method=method,
                terms=list(terms), tested=list(prep.names), response=prep.response_name,
                n_nodes=n + m if prep.two_mode else n, n_dyads=int(n_dyads),
                directed=prep.directed, two_mode=prep.two_mode, notes=[])


def input_fingerprints(prep: Any) -> dict:
    """SHA-256 fingerprint of each input network of a dense problem (as prepared), keyed
    for the run file's identity. The networks are hashed side by side, one thread per
    core (hashlib lets go of the interpreter while it hashes a block)."""
    names = prep.names + (prep.response_name,)
    with ThreadPoolExecutor(max_workers=max(1, min(len(names), os.cpu_count() or 1))) as pool:
        digests = list(pool.map(fingerprint, prep.matrices))
    return {f"fingerprint:{name}": digest for name, digest in zip(names, digests)}


class LazyIdentity(Mapping):
    """A run's identity, made when it is first read.

    Only runs with a run file read it (to create, resume or merge one), so a run held in
    memory never hashes its inputs: at n = 2,000 the fingerprints cost about 19 reads of
    the inputs (SHA-256 runs at 1-2 GB/s a core)."""

    def __init__(self, make: Callable[[], dict]):
        self._make: Callable[[], dict] | None = make
        self._value: dict | None = None

    def _get(self) -> dict:
        if self._value is None:
            assert self._make is not None
            self._value, self._make = self._make(), None
        return self._value

    def __getitem__(self, key: str) -> Any:
        return self._get()[key]

    def __iter__(self) -> Iterator[str]:
        return iter(self._get())

    def __len__(self) -> int:
        return len(self._get())


def dense_identity(prep: Any, settings: dict, fingerprints: dict | None = None) -> Mapping:
    """The identity of a dense problem's run: its settings, directedness, dyad set,
    relabelling blocks and inputs. ``fingerprints``: the inputs' fingerprints taken before
    statistics overwrote them in place; None: take them when the identity is first read
    (``LazyIdentity``; the inputs stay as they are until then)."""
    if fingerprints is None:
        return LazyIdentity(lambda: _dense_identity(prep, settings, None))
    return _dense_identity(prep, settings, fingerprints)


def _dense_identity(prep: Any, settings: dict, fingerprints: dict | None) -> dict:
    ident = dict(settings)
    ident["directed"] = prep.directed
    ident["mask"] = fingerprint(prep.mask)
    ident["relabelling blocks"] = json.dumps(prep.blocks.row_blocks)
    ident.update(input_fingerprints(prep) if fingerprints is None else fingerprints)
    return ident


def interval_reason(scheme: str, statistic: str, complete: bool = True) -> str | None:
    """Why a run gets no coefficient intervals (None: it gets them)."""
    if scheme == "y":
        return ("no intervals with scheme y: it relabels the whole response, so its null is "
                "no null of beta = b for one coefficient alone; use dsp or freedman-lane")
    if statistic != "t":
        return ("no intervals with statistic coef: the relabelled coefficient of y - b x "
                "can grow with b as fast as the observed one, so its test need not reject "
                "any b; use statistic t")
    if not complete:
        return ("no intervals with missing dyads: the test of beta = b needs x observed "
                "wherever y is, so its dyads at b != 0 are not those of the reported test")
    return None


def interval_summary(level: float | None, reason: str | None, scale: Any) -> dict:
    """What a run's summary says of its intervals (``pipeline.intervals.for_terms``)."""
    if reason is not None:
        return {"level": level, "reason": reason}
    return {"level": level, "scale": [float(v) for v in scale]}
