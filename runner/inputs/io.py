"""Readers for node tables and network files, and placement of networks on a node order.

This module knows files, not statistics: it turns text and arrays on disk into plain
numpy arrays with node labels, and :func:`align` places them on the node order of a node
table. Nothing here knows about the engine.

File rules (all readers)
------------------------
* CSV files are read with the :mod:`csv` module (comma delimiter, ``"`` quoting as written
  by :func:`csv.writer`), as UTF-8 (a leading byte-order mark is skipped). A label or id may
  therefore hold any character, commas and quotes included, when the field is quoted.
  Surrounding whitespace of every field is stripped; labels must not be empty. Blank lines
  are skipped; line numbers in messages are the file's own line numbers (1-based).
* A number cell holds a number as Python's ``float`` reads it. An empty cell, the text
  ``nan`` (any case) or the extra marker given as ``missing`` is a missing value (NaN).
  An infinite value is an error (NaN means missing; infinity is not data). Any other text
  in a number cell is an error naming the file, line, column and the text found.
* ``.npy`` files are read with ``allow_pickle=False``: an input file never executes code.
* An HDF5 dataset is named ``file.h5:/path/in/file`` (also ``.hdf5``, ``.he5``).

Network files
-------------
Edge list CSV
    Header ``source,target`` or ``source,target,weight`` (these exact names, any case).
    One row per tie; without a weight column every tie has weight 1.0. An empty weight is
    a missing dyad value. Dyads not listed are "no tie" (0.0).
Matrix CSV
    Header row: the id-column name (may be empty), then the column node labels. Each row:
    the row node label, then the values. Square one-mode or rectangular two-mode.
``.npy`` / HDF5
    A 2-d numeric array without labels, taken in node-table order.
"""

from __future__ import annotations

import csv
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Iterable, Iterator, Sequence

import numpy as np

from ..errors import InputError
from ..kernels.stats import place_rows

__all__ = ["NodeTable", "RawNetwork", "RowReader", "read_node_table", "read_network", "align",
           "float64_rows", "collect_labels", "split_h5_path", "FORMATS"]

#: Accepted values of ``fmt`` in :func:`read_network`.
FORMATS = ("auto", "edges", "matrix")

_EDGE_HEADERS = (("source", "target"), ("source", "target", "weight"))
_H5_RE = re.compile(r"^(?P<file>.*\.(?:h5|hdf5|he5))(?::(?P<dataset>.*))?$", re.IGNORECASE)
# How many labels or lines a note or message lists before it says "...".
_LIST_AT_MOST = 5


# --------------------------------------------------------------------------- data classes

@dataclass(frozen=True, eq=False)
class NodeTable:
    """A node table: one row per node, an id column and attribute columns.

    Attributes
    ----------
    path : Path
        The file read.
    id_column : str
        Name of the id column (not repeated in ``columns``).
    ids : tuple of str
        Node ids in file order.
    columns : dict of str to ndarray
        Every other column, in file order. A column whose non-empty cells are all numbers is
        float64 with NaN for empty cells; any other column is a str array with ``""`` for
        empty cells.
    lines : tuple of int
        File line number of each node's row (for messages).
    """

    path: Path
    id_column: str
    ids: tuple[str, ...]
    columns: dict[str, np.ndarray]
    lines: tuple[int, ...]

    def __len__(self) -> int:
        return len(self.ids)


@dataclass(frozen=True, eq=False)
class RawNetwork:
    """A network file as read, before it is placed on a node order.

    Exactly one of two layouts is filled in, told apart by ``kind``.

    Attributes
    ----------
    path : str
        The file as named to the reader (used in messages); ``file.h5:/dataset`` for HDF5.
    kind : {"edges", "dense"}
        Edge list or dense block.
    sources, targets : ndarray of str, shape (e,)
        Edge list only: tie endpoints as written.
    weights : ndarray of float64, shape (e,)
        Edge list only: tie values (1.0 when the file has no weight column; NaN = missing).
    lines : ndarray of int64, shape (e,)
        Edge list only: file line number of each tie.
    weighted : bool
        Edge list only: whether the file has a weight column.
    values : ndarray of float64, shape (n, m)
        Dense only: the block of values (NaN = missing).
    row_labels, col_labels : tuple of str or None
        Dense only: labels from a matrix CSV; None when the file carries no labels (.npy, HDF5).
    row_lines : ndarray of int64 or None
        Matrix CSV only: file line number of each row.
    header_line : int
        CSV only: line number of the header row.
    """

    path: str
    kind: str
    sources: np.ndarray | None = None
    targets: np.ndarray | None = None
    weights: np.ndarray | None = None
    lines: np.ndarray | None = None
    weighted: bool = False
    values: np.ndarray | None = None
    row_labels: tuple[str, ...] | None = None
    col_labels: tuple[str, ...] | None = None
    row_lines: np.ndarray | None = None
    header_line: int = 1

    @property
    def is_edges(self) -> bool:
        """True for an edge list."""
        return self.kind == "edges"

    @property
    def labelled(self) -> bool:
        """True when the file names its nodes (edge lists and matrix CSV files)."""
        return self.is_edges or self.row_labels is not None

    @property
    def name(self) -> str:
        """Short file name for messages (``water.csv``, ``data.h5:/water``)."""
        h5 = split_h5_path(self.path)
        if h5 is not None:
            return f"{Path(h5[0]).name}:{h5[1]}"
        return Path(self.path).name


# --------------------------------------------------------------------------- cells

def _parse_number(cell: str, missing: str | None, where: str) -> float:
    """One number cell -> float (NaN for missing); ``where`` prefixes error messages."""
    if cell == "" or (missing is not None and cell == missing):
        return np.nan
    try:
        x = float(cell)
    except ValueError:
        raise InputError(f"{where}: expected a number; found {cell!r}"
                         + ("" if missing is None else f" (missing-value marker is {missing!r})")
                         ) from None
    if np.isinf(x):
        raise InputError(f"{where}: infinite value {cell!r} is not data "
                         "(leave the cell empty for a missing value)")
    return x


def _check_marker(missing: str | None) -> str | None:
    """The extra missing-value marker, stripped like every cell."""
    if missing is None:
        return None
    if not isinstance(missing, str):
        raise InputError(f"missing-value marker must be a string; got {missing!r}")
    return missing.strip()


def _parse_row(cells: Sequence[str], missing: str | None, where_of) -> np.ndarray:
    """A row of number cells -> float64 array. ``where_of(k)`` names cell k in messages."""
    if missing is None or missing not in cells:
        try:  # fast path: every cell a plain number
            row = np.asarray(cells, dtype=np.float64)
        except ValueError:
            row = None
        if row is not None and not np.isinf(row).any():
            return row
    return np.array([_parse_number(c, missing, where_of(k)) for k, c in enumerate(cells)],
                    dtype=np.float64)


# --------------------------------------------------------------------------- CSV rows

def _open_text(path: Path, shown: str):
    if not path.exists():
        raise InputError(f"{shown}: no such file")
    if path.is_dir():
        raise InputError(f"{shown}: is a directory, not a file")
    return open(path, newline="", encoding="utf-8-sig")


def _csv_rows(path: Path, shown: str) -> Iterator[tuple[int, list[str]]]:
    """Yield (line number, stripped fields) for every non-blank CSV row."""
    with _open_text(path, shown) as fh:
        reader = csv.reader(fh)
        start = 1
        try:
            for fields in reader:
                line = start
                start = reader.line_num + 1
                if not fields or (len(fields) == 1 and not fields[0].strip()):
                    continue
                yield line, [f.strip() for f in fields]
        except UnicodeDecodeError as exc:
            raise InputError(f"{shown}: not UTF-8 text ({exc.reason} at byte {exc.start})") from None
        except csv.Error as exc:
            raise InputError(f"{shown} line {reader.line_num}: unreadable CSV ({exc})") from None


def _check_width(shown: str, line: int, fields: list[str], width: int) -> None:
    if len(fields) != width:
        raise InputError(f"{shown} line {line}: expected {width} fields (as in the header), "
                         f"found {len(fields)}")


def _check_labels(shown: str, items: Iterable[tuple[str, str]], what: str) -> None:
    """Labels must be non-empty and unique; ``items`` are (label, place) pairs."""
    seen: dict[str, str] = {}
    for label, place in items:
        if label == "":
            raise InputError(f"{shown} {place}: empty {what}")
        if label in seen:
            raise InputError(f"{shown}: duplicate {what} {label!r} at {seen[label]} and {place}")
        seen[label] = place


# --------------------------------------------------------------------------- node table

def read_node_table(path: str | Path, id_column: str, *, missing: str | None = None) -> NodeTable:
    """Read a node table (CSV with a header row, one row per node).

    Parameters
    ----------
    path : str or Path
        The CSV file.
    id_column : str
        Name of the column holding node ids (matched after stripping whitespace).
    missing : str, optional
        An extra marker of a missing attribute value, besides the empty cell.

    Returns
    -------
    NodeTable
        Ids in file order; numeric columns as float64 (NaN for missing), other columns as
        str arrays (``""`` for empty cells).

    Raises
    ------
    InputError
        Missing or empty file, ``id_column`` absent (the columns found are listed), an empty
        or duplicate id (both rows named), a row with the wrong number of fields, or an
        infinite value in a numeric column.
    """
    path = Path(path)
    shown = str(path)
    missing = _check_marker(missing)
    rows = _csv_rows(path, shown)
    try:
        header_line, header = next(rows)
    except StopIteration:
        raise InputError(f"{shown}: file is empty (expected a header row)") from None
    _check_labels(shown, ((h, f"line {header_line} column {k + 1}") for k, h in enumerate(header)),
                  "column name")
    if id_column not in header:
        raise InputError(f"{shown}: no id column {id_column!r}; columns found: "
                         + ", ".join(repr(h) for h in header))
    width = len(header)
    body = []
    for line, fields in rows:
        _check_width(shown, line, fields, width)
        body.append((line, fields))
    if not body:
        raise InputError(f"{shown}: no data rows after the header")
    id_at = header.index(id_column)
    ids = [f[id_at] for _, f in body]
    lines = [line for line, _ in body]
    _check_labels(shown, ((i, f"line {line}") for i, line in zip(ids, lines)), "node id")

    columns: dict[str, np.ndarray] = {}
    for k, name in enumerate(header):
        if k == id_at:
            continue
        cells = [f[k] for _, f in body]
        columns[name] = _node_column(cells, lines, missing, f"{shown}", name)
    return NodeTable(path=path, id_column=id_column, ids=tuple(ids), columns=columns,
                     lines=tuple(lines))


def _node_column(cells: list[str], lines: list[int], missing: str | None, shown: str,
                 name: str) -> np.ndarray:
    """Numeric (float64) when every non-missing cell is a number, else str."""
    values = np.empty(len(cells), dtype=np.float64)
    for r, cell in enumerate(cells):
        if cell == "" or (missing is not None and cell == missing):
            values[r] = np.nan
            continue
        try:
            values[r] = float(cell)
        except ValueError:
            return np.array(["" if (missing is not None and c == missing) else c for c in cells],
                            dtype=str)
    if np.isinf(values).any():
        r = int(np.flatnonzero(np.isinf(values))[0])
        raise InputError(f"{shown} line {lines[r]} column {name!r}: infinite value "
                         f"{cells[r]!r} is not data (leave the cell empty for a missing value)")
    return values


# --------------------------------------------------------------------------- networks

def split_h5_path(spec: str | Path) -> tuple[str, str] | None:
    """Split ``file.h5:/dataset`` into (file, dataset); None when not an HDF5 name.

    The dataset part is ``""`` when the name has no ``:``.
    """
    m = _H5_RE.match(str(spec))
    if m is None:
        return None
    return m.group("file"), m.group("dataset") or ""


def read_network(path: str | Path, *, fmt: str = "auto", missing: str | None = None,
                 lazy: bool = False) -> RawNetwork:
    """Read one network file.

    Parameters
    ----------
    path : str or Path
        A CSV file (edge list or matrix), a ``.npy`` file, or an HDF5 dataset written
        ``file.h5:/path/in/file``.
    fmt : {"auto", "edges", "matrix"}
        CSV layout. ``"auto"`` reads an edge list when the header is exactly
        ``source,target`` or ``source,target,weight`` (any case), else a matrix.
        Must be ``"auto"`` for ``.npy`` and HDF5 input.
    missing : str, optional
        An extra marker of a missing value in number cells (e.g. ``"NA"``), besides the
        empty cell and ``nan``.

    Returns
    -------
    RawNetwork
        An edge list or a dense block (see :class:`RawNetwork`).

    Raises
    ------
    InputError
        Missing or empty file, no data rows, ragged rows, a non-numeric or infinite value
        (file, line, column and text named), an empty or duplicate label in a matrix, an
        unreadable ``.npy``/HDF5 file, or an HDF5 dataset that is absent or not 2-d numeric.

    Notes
    -----
    ``lazy=True``: a ``.npy`` file (C order) or HDF5 dataset comes back with a
    :class:`LazyBlock` as ``values``; its numbers are read, and checked for infinite
    values, when :func:`align` places it.
    """
    if fmt not in FORMATS:
        raise InputError(f"format must be one of {', '.join(FORMATS)}; got {fmt!r}")
    missing = _check_marker(missing)
    text = str(path)
    h5 = split_h5_path(text)
    if h5 is not None or text.lower().endswith(".npy"):
        if fmt != "auto":
            raise InputError(f"{text}: format {fmt!r} applies to CSV files only; "
                             ".npy and HDF5 files hold an unlabelled block")
        return _read_h5(text, *h5, lazy=lazy) if h5 is not None else _read_npy(text, lazy)
    return _read_csv_network(Path(path), text, fmt, missing)


def _read_csv_network(path: Path, shown: str, fmt: str, missing: str | None) -> RawNetwork:
    rows = _csv_rows(path, shown)
    try:
        header_line, header = next(rows)
    except StopIteration:
        raise InputError(f"{shown}: file is empty (expected a header row)") from None
    is_edge_header = tuple(h.lower() for h in header) in _EDGE_HEADERS
    if fmt == "edges" and not is_edge_header:
        raise InputError(f"{shown} line {header_line}: an edge list needs the header "
                         f"source,target or source,target,weight; found {','.join(header)!r}")
    if fmt == "edges" or (fmt == "auto" and is_edge_header):
        return _read_edges(rows, shown, header_line, len(header), missing)
    return _read_matrix(rows, shown, header_line, header, missing)


def _read_edges(rows, shown: str, header_line: int, width: int, missing: str | None) -> RawNetwork:
    sources, targets, weights, lines = [], [], [], []
    weighted = width == 3
    for line, fields in rows:
        _check_width(shown, line, fields, width)
        for k, what in ((0, "source"), (1, "target")):
            if fields[k] == "":
                raise InputError(f"{shown} line {line} column {k + 1} ({what}): empty node label")
        sources.append(fields[0])
        targets.append(fields[1])
        lines.append(line)
        if weighted:
            weights.append(_parse_number(fields[2], missing, f"{shown} line {line} column 3 (weight)"))
    if not lines:
        raise InputError(f"{shown}: no data rows after the header (line {header_line})")
    w = np.asarray(weights, dtype=np.float64) if weighted else np.ones(len(lines))
    return RawNetwork(path=shown, kind="edges", sources=np.asarray(sources, dtype=str),
                      targets=np.asarray(targets, dtype=str), weights=w,
                      lines=np.asarray(lines, dtype=np.int64), weighted=weighted,
                      header_line=header_line)


def _read_matrix(rows, shown: str, header_line: int, header: list[str],
                 missing: str | None) -> RawNetwork:
    if len(header) < 2:
        raise InputError(f"{shown} line {header_line}: a matrix header needs the id-column "
                         f"name and at least one column label; found {len(header)} field")
    col_labels = header[1:]
    _check_labels(shown, ((lab, f"line {header_line} column {k + 2}")
                          for k, lab in enumerate(col_labels)), "column label")
    width = len(header)
    row_labels, row_lines, values = [], [], []
    for line, fields in rows:
        _check_width(shown, line, fields, width)
        row_labels.append(fields[0])
        row_lines.append(line)
        values.append(_parse_row(fields[1:], missing,
                                 lambda k, line=line: f"{shown} line {line} column {k + 2} "
                                                      f"({col_labels[k]!r})"))
    if not row_lines:
        raise InputError(f"{shown}: no data rows after the header (line {header_line})")
    _check_labels(shown, ((lab, f"line {line}") for lab, line in zip(row_labels, row_lines)),
                  "row label")
    return RawNetwork(path=shown, kind="dense", values=np.vstack(values),
                      row_labels=tuple(row_labels), col_labels=tuple(col_labels),
                      row_lines=np.asarray(row_lines, dtype=np.int64), header_line=header_line)


def _dense_block(arr: np.ndarray, shown: str) -> RawNetwork:
    _check_block_header(shown, arr.shape, arr.dtype)
    values = np.ascontiguousarray(arr, dtype=np.float64)
    _check_finite(values, shown)
    return RawNetwork(path=shown, kind="dense", values=values)


def _check_finite(block: np.ndarray, shown: str, first_row: int = 0) -> None:
    """InputError naming the first infinite cell of ``block`` (rows from ``first_row``)."""
    bad = np.isinf(block)
    if bad.any():
        i, j = np.argwhere(bad)[0]
        raise InputError(f"{shown}: infinite value at row {first_row + i}, column {j} "
                         "(0-based) is not data (use NaN for a missing value)")


# Bytes read at once when a lazy block is copied into place (a few row blocks of temporary).
READ_BYTES = 8 << 20


class LazyBlock:
    """A dense block on disk, read in row blocks when it is placed (``align(..., out=)``).

    Holds only the file name, shape and dtype, so a study can read every network's shape
    first and then copy each file straight into its layer of one array, never holding a
    whole file beside it. ``.npy`` files (C order) are read with plain reads (no memory
    map, whose pages would count as resident); HDF5 datasets by row slices.
    """

    def __init__(self, shown: str, shape: tuple[int, ...], dtype: np.dtype, *,
                 npy_offset: int | None = None, h5: tuple[str, str] | None = None) -> None:
        self.shown = shown
        self.shape = tuple(int(x) for x in shape)
        self.ndim = len(self.shape)
        self.dtype = np.dtype(dtype)
        self._npy_offset = npy_offset
        self._h5 = h5

    def row_blocks(self) -> Iterator[tuple[int, np.ndarray]]:
        """(first row, rows) blocks in order, as the file holds them (its dtype, unchecked:
        ``copy_to`` checks each value as it places it)."""
        n, m = self.shape
        step = max(1, READ_BYTES // max(1, m * self.dtype.itemsize))
        if self._npy_offset is not None:
            with open(self.shown, "rb") as fh:
                fh.seek(self._npy_offset)
                for r0 in range(0, n, step):
                    rows = min(step, n - r0)
                    buf = np.empty((rows, m), dtype=self.dtype)
                    if fh.readinto(memoryview(buf).cast("B")) != buf.nbytes:
                        raise InputError(f"{self.shown}: the file ends before its "
                                         f"{n} x {m} block does")
                    yield r0, buf
            return
        import h5py

        with h5py.File(self._h5[0], "r") as fh:
            ds = fh[self._h5[1]]
            for r0 in range(0, n, step):
                yield r0, np.asarray(ds[r0:r0 + step])

    def copy_to(self, out: np.ndarray, rows: np.ndarray | None = None,
                cols: np.ndarray | None = None) -> None:
        """Fill ``out`` (n, m), any strides, with the block.

        ``rows``/``cols`` (optional): out[i, j] = block[rows[i], cols[j]], the block's rows
        and columns put in another order as they are read (a row block at a time).
        """
        none = np.zeros(0, dtype=np.int64)
        dest = None
        if rows is not None:
            dest = np.empty(rows.shape[0], dtype=np.int64)
            dest[rows] = np.arange(rows.shape[0])
        take = none if cols is None else np.ascontiguousarray(cols, dtype=np.int64)
        status = np.zeros(3, dtype=np.int64)
        for r0, block in self.row_blocks():
            # check, cast and place in one pass (kernels.stats.place_rows)
            n_rows = block.shape[0]
            if dest is None:
                place_rows(block, take, out[r0:r0 + n_rows], none, status)
            else:
                place_rows(block, take, out, dest[r0:r0 + n_rows], status)
            if status[0]:
                # the file's own row and column
                i = r0 + int(status[1])
                j = int(status[2]) if cols is None else int(take[status[2]])
                if status[0] == 1:
                    raise InputError(f"{self.shown}: infinite value at row {i}, column {j} "
                                     "(0-based) is not data (use NaN for a missing value)")
                raise InputError(f"{self.shown}: value {float(block[i - r0, j])!r} at row {i}, "
                                 f"column {j} (0-based) is beyond the range of storage "
                                 f"{out.dtype.name}; use storage = \"float64\"")

    def copy(self) -> np.ndarray:
        out = np.empty(self.shape)
        self.copy_to(out)
        return out

    def read_rows(self, rows: np.ndarray) -> np.ndarray:
        """float64 rows ``rows`` (block positions, any order) read again from the file."""
        n, m = self.shape
        out = np.empty((rows.shape[0], m))
        if rows.shape[0] == 0:
            return out
        if self._npy_offset is not None:
            size = m * self.dtype.itemsize
            with open(self.shown, "rb") as fh:
                k = 0
                while k < rows.shape[0]:
                    # a run of consecutive rows is one read
                    e = k + 1
                    while e < rows.shape[0] and rows[e] == rows[e - 1] + 1:
                        e += 1
                    buf = np.empty((e - k, m), dtype=self.dtype)
                    fh.seek(self._npy_offset + int(rows[k]) * size)
                    if fh.readinto(memoryview(buf).cast("B")) != buf.nbytes:
                        raise InputError(f"{self.shown}: the file ends before its "
                                         f"{n} x {m} block does")
                    out[k:e] = buf
                    k = e
            return out
        import h5py

        order = np.argsort(rows, kind="stable")
        wanted = rows[order]  # increasing, as h5py's selections need
        with h5py.File(self._h5[0], "r") as fh:
            ds = fh[self._h5[1]]
            lo, hi = int(wanted[0]), int(wanted[-1]) + 1
            if hi - lo == wanted.shape[0]:
                block = np.asarray(ds[lo:hi])  # consecutive rows: one slice
            else:
                block = np.asarray(ds[wanted.tolist()])  # only the rows asked for
        out[order] = block
        return out


class RowReader:
    """The float64 values of a dense network file as placed on a node order, read from
    the file again, a block of rows at a time: ``reader[i0:i1]`` is rows i0 .. i1 - 1 of
    the placed network, (i1 - i0, m) float64.

    A study whose layers are stored in float32 (``storage = "float32"``) keeps no float64
    copy of its networks; its observed fit reads the files again through these, so the
    classical fit is not rounded to the layers' precision. ``rows``/``cols``: placed
    position i, j holds the file's row ``rows[i]``, column ``cols[j]`` (None: the same).
    """

    def __init__(self, values: "LazyBlock | np.ndarray", rows: np.ndarray | None = None,
                 cols: np.ndarray | None = None) -> None:
        self.values = values
        n, m = values.shape
        self.rows = np.arange(n, dtype=np.int64) if rows is None else np.asarray(rows, np.int64)
        self.cols = None if cols is None else np.asarray(cols, np.int64)
        self.shape = (self.rows.shape[0], m if cols is None else self.cols.shape[0])
        self.dtype = np.dtype(np.float64)

    def reordered(self, rows: np.ndarray, cols: np.ndarray) -> "RowReader":
        """The reader of the placed network put in another order: position i, j of the new
        one is position rows[i], cols[j] of this one."""
        cols_now = np.arange(self.shape[1], dtype=np.int64) if self.cols is None else self.cols
        return RowReader(self.values, self.rows[rows], cols_now[cols])

    def __getitem__(self, key: slice) -> np.ndarray:
        if not isinstance(key, slice) or key.step not in (None, 1):
            raise TypeError("a RowReader reads contiguous row slices only")
        i0, i1, _ = key.indices(self.shape[0])
        rows = self.rows[i0:i1]
        if isinstance(self.values, LazyBlock):
            block = self.values.read_rows(rows)
        else:
            block = np.asarray(self.values[rows], dtype=np.float64)
        return block if self.cols is None else block[:, self.cols]


def _check_narrowed(block: np.ndarray, narrow: np.ndarray, shown: str, r0: int = 0) -> None:
    """InputError for a finite value of ``block`` that its narrower copy ``narrow`` (float32
    layers) cannot hold: it would become infinite."""
    if np.isinf(narrow).any():
        i, j = np.argwhere(np.isinf(narrow) & np.isfinite(block))[0]
        raise InputError(f"{shown}: value {float(block[i, j])!r} at row {r0 + i}, column {j} "
                         f"(0-based) is beyond the range of storage {narrow.dtype.name}; use "
                         "storage = \"float64\"")


def _check_block_header(shown: str, shape: tuple[int, ...], dtype: np.dtype) -> None:
    """InputError unless a dense block of this shape and dtype can be a network."""
    if len(shape) != 2:
        raise InputError(f"{shown}: a network must be a 2-d array; got {len(shape)} "
                         f"dimension(s) with shape {tuple(shape)}")
    if dtype.kind not in "fiub":
        raise InputError(f"{shown}: a network must hold numbers; got dtype {dtype}")
    if 0 in shape:
        raise InputError(f"{shown}: empty array of shape {tuple(shape)}")


def _lazy_npy(shown: str) -> RawNetwork | None:
    """A LazyBlock raw for a C-ordered numeric .npy file, or None (read it whole)."""
    try:
        with open(shown, "rb") as fh:
            version = np.lib.format.read_magic(fh)
            if version == (1, 0):
                shape, fortran, dtype = np.lib.format.read_array_header_1_0(fh)
            elif version == (2, 0):
                shape, fortran, dtype = np.lib.format.read_array_header_2_0(fh)
            else:
                return None
            offset = fh.tell()
    except (OSError, ValueError):
        return None  # the eager reader names what is wrong
    if fortran or dtype.hasobject or not dtype.isnative:
        return None
    _check_block_header(shown, shape, dtype)
    return RawNetwork(path=shown, kind="dense",
                      values=LazyBlock(shown, shape, dtype, npy_offset=offset))


def _read_npy(shown: str, lazy: bool = False) -> RawNetwork:
    path = Path(shown)
    if not path.is_file():
        raise InputError(f"{shown}: no such file")
    if lazy:
        raw = _lazy_npy(shown)
        if raw is not None:
            return raw
    try:
        arr = np.load(path, allow_pickle=False)
    except ValueError as exc:
        raise InputError(f"{shown}: cannot read as a .npy array without pickles ({exc})") from None
    except (OSError, EOFError) as exc:
        raise InputError(f"{shown}: cannot read .npy file ({exc})") from None
    if not isinstance(arr, np.ndarray):
        raise InputError(f"{shown}: expected one array in .npy format; got {type(arr).__name__}")
    return _dense_block(arr, shown)


def _read_h5(shown: str, file: str, dataset: str, lazy: bool = False) -> RawNetwork:
    import h5py  # h5py is a dependency; imported here so CSV-only use stays light

    path = Path(file)
    if not path.is_file():
        raise InputError(f"{shown}: no such file {file}")
    if not dataset:
        raise InputError(f"{shown}: name the dataset as {file}:/path/in/file")
    try:
        fh = h5py.File(path, "r")
    except OSError as exc:
        raise InputError(f"{shown}: cannot open as HDF5 ({exc})") from None
    with fh:
        obj = fh.get(dataset)
        if not isinstance(obj, h5py.Dataset):
            names: list[str] = []
            fh.visititems(lambda n, o: names.append("/" + n) if isinstance(o, h5py.Dataset) else None)
            found = ", ".join(names[:_LIST_AT_MOST]) + (" ..." if len(names) > _LIST_AT_MOST else "")
            what = "no dataset" if obj is None else "not a dataset:"
            raise InputError(f"{shown}: {what} {dataset!r} in {file}; datasets found: "
                             f"{found or 'none'}")
        if obj.dtype.kind not in "fiub":
            raise InputError(f"{shown}: a network must hold numbers; got dtype {obj.dtype}")
        if lazy:
            _check_block_header(shown, obj.shape, obj.dtype)
            return RawNetwork(path=shown, kind="dense",
                              values=LazyBlock(shown, obj.shape, obj.dtype, h5=(file, dataset)))
        arr = obj[()]
    return _dense_block(np.asarray(arr), shown)


# --------------------------------------------------------------------------- labels

def collect_labels(raws: Iterable[RawNetwork], *, axis: str = "both") -> tuple[str, ...]:
    """Node labels over several network files, in order of first appearance.

    Parameters
    ----------
    raws : iterable of RawNetwork
        Files in order (response first). Files without labels (.npy, HDF5) add nothing.
    axis : {"both", "rows", "cols"}
        ``"both"`` (one-mode): sources and targets, row and column labels. ``"rows"`` /
        ``"cols"`` (two-mode): only sources / row labels, or only targets / column labels.
        Within an edge list, labels are taken line by line, source before target.

    Returns
    -------
    tuple of str
    """
    if axis not in ("both", "rows", "cols"):
        raise InputError(f"axis must be one of both, rows, cols; got {axis!r}")
    seen: dict[str, None] = {}
    for raw in raws:
        if raw.is_edges:
            if axis == "both":
                seq: Iterable[str] = (lab for pair in zip(raw.sources, raw.targets) for lab in pair)
            else:
                seq = raw.sources if axis == "rows" else raw.targets
        elif raw.row_labels is None:
            continue
        elif axis == "both":
            seq = (*raw.row_labels, *raw.col_labels)
        else:
            seq = raw.row_labels if axis == "rows" else raw.col_labels
        for lab in seq:
            seen.setdefault(str(lab), None)
    return tuple(seen)


def _index_of(ids: Sequence[str]) -> dict[str, int]:
    return {lab: k for k, lab in enumerate(ids)}


def _lines_text(lines: Sequence[int]) -> str:
    shown = ", ".join(str(x) for x in lines[:_LIST_AT_MOST])
    return shown + (", ..." if len(lines) > _LIST_AT_MOST else "")


# --------------------------------------------------------------------------- align

def align(raw: RawNetwork, row_ids: Sequence[str], col_ids: Sequence[str] | None = None, *,
          directed: bool | None = None, source: str | None = None,
          row_ids_source: str | None = None, col_ids_source: str | None = None,
          out: np.ndarray | None = None,
          block_ids: tuple[Sequence[str], Sequence[str] | None] | None = None
          ) -> tuple[np.ndarray, list[str]]:
    """Place a network on a node order.

    Parameters
    ----------
    raw : RawNetwork
        As returned by :func:`read_network`.
    row_ids : sequence of str
        Node order of the rows (all nodes for one-mode data).
    col_ids : sequence of str, optional
        Node order of the columns for two-mode data; None for one-mode.
    directed : bool or None
        ``False``: the ties are undirected; an edge (a, b) fills (a, b) and (b, a), and a
        dense block must be symmetric. ``True`` or ``None``: each edge fills (a, b) only.
        Only for one-mode data.
    source : str, optional
        File name used in messages (default: the file's name).
    row_ids_source, col_ids_source : str, optional
        Where the node ids came from, for messages (e.g. ``"farms.csv"``).
    out : ndarray of float64, shape (n, m), optional
        Where to place the values (any strides, e.g. one layer of a 3-d array); returned
        as ``values``. Default: a new array.
    block_ids : (row ids, column ids or None), optional
        The node order an unlabelled block (.npy, HDF5) is written in, when ``row_ids``
        (and ``col_ids``) list the same nodes in another order: the block's rows and
        columns are placed by these ids. Default: the block follows ``row_ids``/``col_ids``.

    Returns
    -------
    values : ndarray of float64, shape (n, m)
        Dyad values in node order; NaN = missing; 0.0 for dyads the file does not list.
    notes : list of str
        Things the user should know that are not errors (self-loops ignored, nodes absent).

    Raises
    ------
    InputError
        A label not among the node ids (file and line named); a duplicate edge (both lines
        named); for undirected data, (a, b) and (b, a) with different values; an unlabelled
        block whose shape differs from the number of nodes (both sizes named).

    Notes
    -----
    Duplicate edges are an error, not summed: summing would hide data-entry mistakes, so
    aggregate first. Self-loops (source == target) of one-mode edge lists are ignored with
    a note. The diagonal of dense blocks is left as read (the engine ignores it).
    """
    shown = source or raw.name
    two_mode = col_ids is not None
    if two_mode and directed is False:
        raise InputError(f"{shown}: directed = false applies to one-mode data only "
                         "(this network is two-mode)")
    rows = list(row_ids)
    cols = list(col_ids) if two_mode else rows
    row_from = f" (not in {row_ids_source})" if row_ids_source else " (not among the node ids)"
    col_from = (f" (not in {col_ids_source})" if col_ids_source else
                (" (not among the column node ids)" if two_mode else row_from))
    if raw.is_edges:
        values, notes = _align_edges(raw, rows, cols, two_mode, directed, shown, row_from,
                                     col_from)
    else:
        order = None
        if block_ids is not None and raw.row_labels is None:
            br = list(block_ids[0])
            bc = list(block_ids[1]) if two_mode else br
            order = (_lookup(rows, _index_of(br), lambda k: f"row {k}", shown, row_from),
                     _lookup(cols, _index_of(bc), lambda k: f"column {k}", shown, col_from))
        values, notes = _align_dense(raw, rows, cols, two_mode, directed, shown, row_from,
                                     col_from, out, order)
    if out is not None and values is not out:
        out[...] = values
        values = out
    return values, notes


def float64_rows(raw: RawNetwork, row_ids: Sequence[str], col_ids: Sequence[str] | None = None,
                 *, block_ids: tuple[Sequence[str], Sequence[str] | None] | None = None
                 ) -> RowReader:
    """A :class:`RowReader` of an unlabelled dense block (.npy, HDF5) placed as
    ``align(raw, row_ids, col_ids, block_ids=block_ids)`` places it (call ``align``
    first: it checks the labels and the shape)."""
    if raw.is_edges or raw.row_labels is not None:
        raise ValueError("float64_rows reads unlabelled dense blocks (.npy, HDF5) only")
    if block_ids is None:
        return RowReader(raw.values)
    rows = list(row_ids)
    cols = list(col_ids) if col_ids is not None else rows
    br = list(block_ids[0])
    bc = list(block_ids[1]) if col_ids is not None else br
    none = ""
    return RowReader(raw.values, _lookup(rows, _index_of(br), str, raw.name, none),
                     _lookup(cols, _index_of(bc), str, raw.name, none))


def _lookup(labels: Sequence[str], index: dict[str, int], place, shown: str,
            from_text: str) -> np.ndarray:
    """Positions of ``labels`` in the node order; ``place(k)`` names label k's place."""
    out = np.empty(len(labels), dtype=np.int64)
    for k, lab in enumerate(labels):
        at = index.get(lab)
        if at is None:
            raise InputError(f"{shown} {place(k)}: unknown node label {lab!r}{from_text}")
        out[k] = at
    return out


def _align_edges(raw, rows, cols, two_mode, directed, shown, row_from, col_from):
    n, m = len(rows), len(cols)
    notes: list[str] = []
    i = _lookup(raw.sources.tolist(), _index_of(rows), lambda k: f"line {raw.lines[k]}",
                shown, row_from)
    j = _lookup(raw.targets.tolist(), _index_of(cols), lambda k: f"line {raw.lines[k]}",
                shown, col_from)
    w, lines = raw.weights, raw.lines
    if not two_mode:
        loop = i == j
        if loop.any():
            notes.append(f"{shown}: {int(loop.sum())} self-loop(s) ignored (line "
                         f"{_lines_text(lines[loop].tolist())})")
            keep = ~loop
            i, j, w, lines = i[keep], j[keep], w[keep], lines[keep]
    key = i * m + j
    order = np.argsort(key, kind="stable")
    dup = np.flatnonzero(key[order][1:] == key[order][:-1])
    if dup.size:
        a, b = order[dup[0]], order[dup[0] + 1]
        raise InputError(f"{shown}: duplicate edge {rows[i[a]]!r} -> "
                         f"{cols[j[a]]!r} at lines {lines[a]} and {lines[b]} "
                         "(aggregate repeated ties before reading)")
    out = np.zeros((n, m), dtype=np.float64)
    out[i, j] = w
    if not two_mode:
        pos = {int(k): r for r, k in enumerate(key.tolist())}
        back = np.array([pos.get(int(jj * m + ii), -1) for ii, jj in zip(i, j)], dtype=np.int64)
        if directed is False:
            both = back >= 0
            for a in np.flatnonzero(both):
                b = back[a]
                wa, wb = float(w[a]), float(w[b])
                if not (wa == wb or (np.isnan(wa) and np.isnan(wb))):
                    raise InputError(
                        f"{shown}: directed = false but {rows[i[a]]!r} -> {rows[j[a]]!r} has "
                        f"{wa!r} (line {lines[a]}) and {rows[j[a]]!r} -> {rows[i[a]]!r} has "
                        f"{wb!r} (line {lines[b]})")
            out[j, i] = w
        elif directed is None and len(i) > 1 and not (back >= 0).any():
            notes.append(f"{shown}: no tie appears in both directions; if the ties are "
                         "undirected, set directed = false so each edge fills both cells")
    return out, notes


def _align_dense(raw, rows, cols, two_mode, directed, shown, row_from, col_from, out=None,
                 order=None):
    n, m = len(rows), len(cols)
    notes: list[str] = []
    values = raw.values
    if raw.row_labels is None:
        ri, ci = order if order is not None else (np.arange(n), np.arange(m))
        if values.shape != (n, m):
            want = f"{n} x {m}" if two_mode else f"{n} x {n}"
            raise InputError(f"{shown}: an unlabelled block must match the node ids: "
                             f"expected {want} ({n}{' row' if two_mode else ''} nodes"
                             + (f", {m} column nodes" if two_mode else "")
                             + f"); got {values.shape[0]} x {values.shape[1]}")
        if order is not None:  # the block's rows and columns in another node order
            if out is None:
                out = np.empty((n, m))
            if isinstance(values, LazyBlock):
                values.copy_to(out, ri, ci)
            else:
                with np.errstate(over="ignore"):  # a value beyond float32 is named below
                    out[...] = values[np.ix_(ri, ci)]
                if out.dtype != np.float64:
                    _check_narrowed(values[np.ix_(ri, ci)], out, shown)
        elif out is None:
            out = values.copy()
        elif isinstance(values, LazyBlock):
            values.copy_to(out)
        else:
            with np.errstate(over="ignore"):  # a value beyond float32 is named just below
                out[...] = values
            if out.dtype != np.float64:
                _check_narrowed(values, out, shown)
        row_names = [f"row {r}" for r in ri]
        col_names = [f"column {c}" for c in ci]
    else:
        ri = _lookup(raw.row_labels, _index_of(rows), lambda k: f"line {raw.row_lines[k]}",
                     shown, row_from)
        ci = _lookup(raw.col_labels, _index_of(cols),
                     lambda k: f"line {raw.header_line} column {k + 2}", shown, col_from)
        out = np.zeros((n, m), dtype=np.float64)
        out[np.ix_(ri, ci)] = values
        absent_r = sorted(set(range(n)) - set(ri.tolist()))
        absent_c = sorted(set(range(m)) - set(ci.tolist()))
        gaps = [(absent_r, rows, "row"), (absent_c, cols, "column")]
        if not two_mode and absent_r == absent_c:
            gaps = [(absent_r, rows, "row or column")]
        for absent, labels, what in gaps:
            if absent:
                names = ", ".join(repr(labels[k]) for k in absent[:_LIST_AT_MOST])
                notes.append(f"{shown}: {len(absent)} node(s) have no {what} in the file and "
                             f"are taken as no tie: {names}"
                             + (", ..." if len(absent) > _LIST_AT_MOST else ""))
        row_names = [repr(x) for x in rows]
        col_names = row_names  # one-mode: the check below runs only then
    if directed is False and not two_mode:
        off = ~np.eye(n, dtype=bool)
        diff = off & ~((out == out.T) | (np.isnan(out) & np.isnan(out.T)))
        if diff.any():
            a, b = np.argwhere(diff)[0]
            raise InputError(f"{shown}: directed = false but the block is not symmetric: "
                             f"value {float(out[a, b])!r} at ({row_names[a]}, {col_names[b]}) and "
                             f"{float(out[b, a])!r} at ({row_names[b]}, {col_names[a]})")
    return out, notes
