"""Run files (HDF5 via h5py): provenance, observed fit, permuted statistics, done chunks.

Layout (format version 1):

- root attributes: ``format``, ``format_version``, ``package_version``, ``identity``
  (JSON: everything that must agree for two files to belong to the same run: kind,
  model, scheme, statistic, method, seed, chunk size, storage, settings and the SHA-256
  fingerprint of every input array), ``terms``/``tested`` (JSON), ``permutations`` (the
  planned total), ``exact``, ``shard`` ("i/N" or ""), ``study_text``, ``study_path``,
  ``summary`` (JSON: nodes, dyads, directed, two-mode, response name), and
  ``extra_columns`` when a row holds more than the statistics (absent: 0).
- ``observed/``: ``coef``, ``se``, ``stat`` (classical fit), ``kernel_stat`` (the observed
  statistic through the permutation kernels, which the p-values compare against),
  ``fit`` (r2, deviance), and ``kernel_extra`` (the observed row's extra numbers).
- ``null`` (permutations x (k + extra_columns), float64, contiguous): row i is permutation
  i: the statistics of the k tested terms, then the route's extra numbers (the interval
  rows of ``dyadperm.pipeline.intervals``).
- ``done`` (chunks, uint8) and ``crc`` (chunks, uint32, CRC-32 of the chunk's rows).

Every dataset is allocated when the file is made; afterwards a run only writes raw data
into place, never metadata, so a process killed at any instant leaves a readable file.
A chunk's rows are written and flushed before its ``done`` flag is set and flushed.
Growing a run (``extend``) writes a new file beside the old one and renames it over the
old one, which is atomic. Only the driver process writes; an exclusive lock on
``RUN.h5.lock`` keeps a second writer out. Nothing stored is ever executed or unpickled.
"""

from __future__ import annotations

import fcntl
import json
import os
import zlib
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Iterable

import h5py
import numpy as np

from .. import __version__
from ..errors import RunFileError
from ..settings import parse_shard

FORMAT = "dyadperm run file"
FORMAT_VERSION = 1


@dataclass(frozen=True)
class RunHeader:
    """What a run file says about itself (everything but the statistics)."""

    identity: dict
    terms: tuple[str, ...]
    tested: tuple[str, ...]
    permutations: int
    chunk_size: int
    exact: bool
    shard: str
    study_text: str
    study_path: str
    summary: dict
    observed: dict
    extra: int = 0  # numbers per row after the statistics (a route's extra numbers)

    @property
    def n_chunks(self) -> int:
        return -(-self.permutations // self.chunk_size)

    @property
    def width(self) -> int:
        """Numbers per row of ``null``: one statistic per tested term, then ``extra``."""
        return len(self.tested) + self.extra


def _lock(path: Path):
    lock_path = Path(str(path) + ".lock")
    fh = open(lock_path, "a+")
    try:
        fcntl.flock(fh.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
    except BlockingIOError:
        fh.close()
        raise RunFileError(f"{path}: another process is writing this run file "
                           f"(lock held on {lock_path})") from None
    return fh


def _open_h5(path: Path, mode: str) -> h5py.File:
    if not path.exists():
        raise RunFileError(f"{path}: no such run file")
    try:
        f = h5py.File(path, mode)
    except OSError as exc:
        msg = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise RunFileError(f"{path}: not a readable run file (truncated or corrupted?): "
                           f"{msg}") from None
    if f.attrs.get("format") != FORMAT:
        f.close()
        raise RunFileError(f"{path}: not a dyadperm run file")
    version = int(f.attrs.get("format_version", -1))
    if version != FORMAT_VERSION:
        f.close()
        raise RunFileError(f"{path}: run file format version {version}; this dyadperm reads "
                           f"version {FORMAT_VERSION}")
    return f


def read_header(path: str | Path) -> RunHeader:
    """The header of a run file; RunFileError if it is not a sound run file."""
    path = Path(path)
    with _open_h5(path, "r") as f:
        return _header(f, path)


def _header(f: h5py.File, path: Path) -> RunHeader:
    try:
        a = f.attrs
        obs = {name: np.asarray(f["observed"][name][()]) for name in f["observed"]}
        hdr = RunHeader(
            identity=json.loads(a["identity"]), terms=tuple(json.loads(a["terms"])),
            tested=tuple(json.loads(a["tested"])), permutations=int(a["permutations"]),
            chunk_size=int(a["chunk_size"]), exact=bool(a["exact"]), shard=str(a["shard"]),
            study_text=str(a["study_text"]), study_path=str(a["study_path"]),
            summary=json.loads(a["summary"]), observed=obs,
            extra=int(a.get("extra_columns", 0)))
        if f["null"].shape != (hdr.permutations, hdr.width) or f["done"].shape != (hdr.n_chunks,) \
                or f["crc"].shape != (hdr.n_chunks,):
            raise RunFileError(f"{path}: run file datasets do not match its header "
                               "(truncated or corrupted)")
    except (KeyError, ValueError, TypeError, OSError) as exc:
        raise RunFileError(f"{path}: run file is incomplete or corrupted ({exc})") from None
    return hdr


def create(path: str | Path, header: RunHeader) -> None:
    """Write a new run file with every dataset allocated; atomic (temp file + rename)."""
    path = Path(path)
    tmp = path.with_name(path.name + ".tmp")
    width = header.width
    with h5py.File(tmp, "w") as f:
        a = f.attrs
        a["format"] = FORMAT
        a["format_version"] = FORMAT_VERSION
        a["package_version"] = __version__
        a["identity"] = json.dumps(header.identity, sort_keys=True)
        a["terms"] = json.dumps(list(header.terms))
        a["tested"] = json.dumps(list(header.tested))
        a["permutations"] = header.permutations
        a["chunk_size"] = header.chunk_size
        a["exact"] = header.exact
        a["shard"] = header.shard
        a["study_text"] = header.study_text
        a["study_path"] = header.study_path
        a["summary"] = json.dumps(header.summary, sort_keys=True)
        g = f.create_group("observed")
        for name, value in header.observed.items():
            g.create_dataset(name, data=np.asarray(value))
        if header.extra:
            a["extra_columns"] = header.extra
        f.create_dataset("null", data=np.full((header.permutations, width), np.nan))
        f.create_dataset("done", data=np.zeros(header.n_chunks, dtype=np.uint8))
        f.create_dataset("crc", data=np.zeros(header.n_chunks, dtype=np.uint32))
    _fsync(tmp)
    os.replace(tmp, path)


def _fsync(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _crc(rows: np.ndarray) -> int:
    return zlib.crc32(np.ascontiguousarray(rows, dtype=np.float64).tobytes())


class Writer:
    """The driver's handle on a run file: writes chunks, then marks them done.

    Use as a context manager; holds the file's lock until closed.
    """

    def __init__(self, path: str | Path) -> None:
        self.path = Path(path)
        self._lock = _lock(self.path)
        try:
            self._f = _open_h5(self.path, "r+")
            self.header = _header(self._f, self.path)
        except BaseException:
            self._lock.close()
            raise
        self._null = self._f["null"]
        self._done = self._f["done"]
        self._crc = self._f["crc"]

    def done_chunks(self) -> np.ndarray:
        return np.asarray(self._done[()], dtype=bool)

    def write_chunk(self, c: int, first: int, stats: np.ndarray) -> None:
        """Write chunk ``c``'s rows (starting at permutation ``first``), flush, mark done.

        One flush per chunk: the flush that makes these rows durable also makes the done
        flag of the previous chunk durable (set after that chunk's own rows were flushed);
        the last flag is flushed on close. A kill in between costs at most that chunk.
        """
        self._null[first:first + stats.shape[0]] = stats
        self._crc[c] = _crc(stats)
        self._f.flush()
        self._done[c] = 1

    def close(self) -> None:
        try:
            self._f.flush()
            self._f.close()
        finally:
            self._lock.close()

    def __enter__(self) -> "Writer":
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()


def grow(path: str | Path, permutations: int) -> None:
    """Rewrite a run file for a larger total, keeping every finished chunk (atomic)."""
    path = Path(path)
    lock = _lock(path)
    try:
        with _open_h5(path, "r") as f:
            hdr = _header(f, path)
            if permutations <= hdr.permutations:
                return
            null_old = np.asarray(f["null"][()])
            done_old = np.asarray(f["done"][()])
            crc_old = np.asarray(f["crc"][()])
        new = RunHeader(**{**hdr.__dict__, "permutations": int(permutations)})
        create(path.with_name(path.name + ".grow"), new)
        grown = path.with_name(path.name + ".grow")
        with h5py.File(grown, "r+") as f:
            # the old last chunk may have been short: it is redone at its new length
            keep = done_old.copy()
            if hdr.permutations % hdr.chunk_size:
                keep[-1] = 0
            rows = min(hdr.permutations, (np.flatnonzero(keep).max() + 1) * hdr.chunk_size) \
                if keep.any() else 0
            f["null"][:rows] = null_old[:rows]
            f["done"][:keep.size] = keep
            f["crc"][:keep.size] = np.where(keep > 0, crc_old, 0)
        _fsync(grown)
        os.replace(grown, path)
    finally:
        lock.close()


def replace_summary(path: str | Path, summary: dict) -> None:
    """Rewrite a run file with a new ``summary`` (how its statistics are read, e.g. the
    stop rule of dyadperm.precision), keeping every chunk; atomic, like ``grow``."""
    path = Path(path)
    lock = _lock(path)
    try:
        with _open_h5(path, "r") as f:
            hdr = _header(f, path)
            null_old = np.asarray(f["null"][()])
            done_old = np.asarray(f["done"][()])
            crc_old = np.asarray(f["crc"][()])
        new = path.with_name(path.name + ".summary")
        create(new, RunHeader(**{**hdr.__dict__, "summary": summary}))
        with h5py.File(new, "r+") as f:
            f["null"][...] = null_old
            f["done"][...] = done_old
            f["crc"][...] = crc_old
        _fsync(new)
        os.replace(new, path)
    finally:
        lock.close()


def package_version(path: str | Path) -> str:
    """The dyadperm version that wrote a run file ("" when it does not say)."""
    with _open_h5(Path(path), "r") as f:
        return str(f.attrs.get("package_version", ""))


class NullView:
    """Read-only view of a run file's permuted statistics, memory-mapped from the file."""

    def __init__(self, path: Path) -> None:
        with _open_h5(path, "r") as f:
            ds = f["null"]
            offset = ds.id.get_offset()
            shape = ds.shape
        if offset is None:
            raise RunFileError(f"{path}: permuted statistics are not stored contiguously")
        self.array = np.memmap(path, dtype="<f8", mode="r", offset=offset, shape=shape)


def load(path: str | Path, *, require_complete: bool = True):
    """Header, memory-mapped null statistics and done flags of a run file.

    Checks every finished chunk against its CRC-32, so a flipped byte in the statistics
    is an error, never a wrong p-value.
    """
    path = Path(path)
    with _open_h5(path, "r") as f:
        hdr = _header(f, path)
        done = np.asarray(f["done"][()], dtype=bool)
        crc = np.asarray(f["crc"][()])
    try:
        null = NullView(path).array
    except (ValueError, OSError) as exc:
        raise RunFileError(f"{path}: run file is truncated ({exc})") from None
    for c in np.flatnonzero(done):
        first = c * hdr.chunk_size
        rows = null[first:first + hdr.chunk_size]
        if _crc(rows) != int(crc[c]):
            raise RunFileError(f"{path}: chunk {c} (permutations {first}..{first + rows.shape[0] - 1}) "
                               "fails its checksum: the file is corrupted")
    if require_complete and not done.all():
        missing = np.flatnonzero(~done)
        raise RunFileError(f"{path}: run is incomplete: {missing.size} of {done.size} chunks "
                           f"missing (first: {missing[0]}); finish it with `dyadperm extend`")
    return hdr, null, done


def missing_chunks(done: np.ndarray, shard: str = "") -> list[int]:
    """Chunks still to compute (of one shard, when ``shard`` is "i/N")."""
    todo = np.flatnonzero(~done.astype(bool))
    if shard:
        i, n = parse_shard(shard)
        todo = todo[todo % n == i - 1]
    return [int(c) for c in todo]


def check_same_run(path: Path, hdr: RunHeader, identity: dict) -> None:
    """RunFileError naming the first setting or input where a file differs from a run."""
    have = hdr.identity
    # settings first (storage, scheme, ...), then the inputs: a setting that differs also
    # changes what the inputs are stored as, and is the thing to name
    for key in sorted(set(have) | set(identity), key=lambda k: (k.startswith("fingerprint:"), k)):
        if have.get(key) != identity.get(key):
            what = key.replace("fingerprint:", "input ")
            raise RunFileError(f"{path}: belongs to another run: {what} differs "
                               f"(file: {_short(have.get(key))}, now: {_short(identity.get(key))})")


def _short(v: Any) -> str:
    s = json.dumps(v) if not isinstance(v, str) else v
    return s if len(s) <= 24 else s[:21] + "..."


def merge(out: str | Path, shards: Iterable[str | Path]) -> RunHeader:
    """Join shard files of one run into ``out``; RunFileError if they disagree or miss chunks."""
    shards = [Path(s) for s in shards]
    if not shards:
        raise RunFileError("merge: give at least one shard file")
    headers = [read_header(s) for s in shards]
    first = headers[0]
    for s, h in zip(shards[1:], headers[1:]):
        check_same_run(s, h, first.identity)
        if h.permutations != first.permutations:
            raise RunFileError(f"{s}: has {h.permutations} permutations; {shards[0]} has "
                               f"{first.permutations}")
    merged = RunHeader(**{**first.__dict__, "shard": ""})
    out = Path(out)
    tmp = out.with_name(out.name + ".merge")
    create(tmp, merged)
    done_all = np.zeros(first.n_chunks, dtype=bool)
    with h5py.File(tmp, "r+") as f:
        for s in shards:
            _, null, done = load(s, require_complete=False)
            with _open_h5(s, "r") as fs:
                crc = np.asarray(fs["crc"][()])
            for c in np.flatnonzero(done):
                lo = c * first.chunk_size
                hi = min(lo + first.chunk_size, first.permutations)
                f["null"][lo:hi] = null[lo:hi]
                f["crc"][c] = crc[c]
                f["done"][c] = 1
                done_all[c] = True
    if not done_all.all():
        tmp.unlink()
        missing = np.flatnonzero(~done_all)
        raise RunFileError(f"merge: the shards do not cover the run: {missing.size} chunks "
                           f"missing ({', '.join(str(c) for c in missing[:8])}"
                           f"{', ...' if missing.size > 8 else ''})")
    _fsync(tmp)
    os.replace(tmp, out)
    return merged
