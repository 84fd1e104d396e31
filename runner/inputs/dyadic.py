"""Networks as the engine sees them, and predictors derived from node attributes.

A network is an n x n (one-mode) or n x m (two-mode) array of dyad values with node
labels. NaN marks a missing dyad value; ``excluded`` marks dyads that cannot exist by
design (they are fixed and never enter a fit). The diagonal of one-mode data never enters.

Derived predictors (``same``, ``gap``, ``sender``, ``receiver``, ``pair_sum``) hold one
value per node and are turned into dyad values only when the engine needs them;
``reverse`` holds another network and stands for its transpose (reciprocity).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Sequence

import numpy as np

from ..errors import InputError
from ..kernels.stats import HAS_INF, HAS_NAN, nonfinite_kinds
from .labels import as_labels, some_labels
from .optional import is_frame, is_series, loaded_pandas
from .threads import halves, side_by_side

DERIVED_KINDS = ("same", "gap", "sender", "receiver", "pair_sum")


@dataclass(frozen=True, eq=False)
class Dyadic:
    """One network over labelled nodes.

    Parameters
    ----------
    values : ndarray, shape (n, m), float64
        Dyad values; NaN marks a missing value. One-mode when ``col_labels`` is None.
    labels : tuple of str, length n
        Row node labels (all node labels for one-mode data).
    col_labels : tuple of str or None
        Column node labels for two-mode data; None for one-mode.
    directed : bool or None
        None means: infer from symmetry of the values.
    excluded : ndarray of bool, shape (n, m), or None
        Structurally excluded dyads (fixed, never enter the dyad set).
    name : str or None
        Name used in messages and result tables.
    source : object or None
        Where the float64 values can be read again, a block of rows at a time
        (``source[i0:i1]``, e.g. ``io.RowReader``), when ``values`` holds them in float32:
        a study file's layers loaded with ``storage = "float32"``. The observed fit reads
        the source, so it is not rounded to the layers' precision. Only then may
        ``values`` be float32.
    """

    values: np.ndarray
    labels: tuple[str, ...]
    col_labels: tuple[str, ...] | None = None
    directed: bool | None = None
    excluded: np.ndarray | None = None
    name: str | None = None
    source: Any = None
    #: whether ``values`` held a NaN when the network was made (read then, with the check
    #: for infinite values)
    has_nan: bool = field(init=False, default=False, repr=False)

    def __post_init__(self) -> None:
        what = self.name or "network"
        v = self.values
        if not isinstance(v, np.ndarray) or v.ndim != 2:
            raise InputError(f"{what} must be a 2-d array; got {type(v).__name__} "
                             f"with shape {getattr(v, 'shape', '?')}")
        if v.dtype != np.float64 and not (v.dtype == np.float32 and self.source is not None):
            raise InputError(f"{what} must hold float64 values; got dtype {v.dtype}")
        if self.source is not None and tuple(self.source.shape) != v.shape:
            raise InputError(f"{what}: its source has shape {tuple(self.source.shape)}; the "
                             f"values have {v.shape}")
        n, m = v.shape
        if len(self.labels) != n:
            raise InputError(f"{what} has {n} rows but {len(self.labels)} row labels")
        if self.col_labels is None:
            if n != m:
                raise InputError(f"{what} must be square for one-mode data; got {n} x {m}"
                                 " (give col_labels for two-mode data)")
        elif len(self.col_labels) != m:
            raise InputError(f"{what} has {m} columns but {len(self.col_labels)} column labels")
        # one pass on two threads (halves of the rows), no temporary
        kinds = 0
        for part in side_by_side(nonfinite_kinds, [v[rows] for rows in halves(0, n)], n * m):
            kinds |= part
        object.__setattr__(self, "has_nan", bool(kinds & HAS_NAN))
        if kinds & HAS_INF:
            i, j = np.argwhere(np.isinf(v))[0]
            raise InputError(f"{what} has an infinite value at row {self.labels[i]!r}, column "
                             f"{self.col_node_labels[j]!r}; use NaN for a missing value")
        if self.excluded is not None:
            ex = self.excluded
            if not isinstance(ex, np.ndarray) or ex.shape != v.shape or ex.dtype != bool:
                raise InputError(f"{what}: excluded must be a boolean array of shape {v.shape}")

    @property
    def two_mode(self) -> bool:
        return self.col_labels is not None

    @property
    def col_node_labels(self) -> tuple[str, ...]:
        return self.labels if self.col_labels is None else self.col_labels

    @property
    def shape(self) -> tuple[int, int]:
        return self.values.shape

    def is_symmetric(self) -> bool:
        """True when one-mode and equal to its transpose off the diagonal (NaN equal NaN)."""
        if self.two_mode:
            return False
        v = self.values.copy()
        np.fill_diagonal(v, 0.0)
        return bool(np.array_equal(v, v.T, equal_nan=True))


@dataclass(frozen=True, eq=False)
class NodeDerived:
    """A predictor computed from one value per node (see the module docstring).

    ``values`` holds the row nodes' attribute (all nodes for one-mode data), in node order,
    as a mapping label -> value or as a pandas Series indexed by label (both aligned by
    label); ``col_values`` the column nodes' for two-mode data.
    """

    kind: str
    values: Any
    col_values: Any = None
    name: str | None = None

    def __post_init__(self) -> None:
        if self.kind not in DERIVED_KINDS:
            raise InputError(f"derived predictor kind must be one of {', '.join(DERIVED_KINDS)};"
                             f" got {self.kind!r}")

    def dense(self, row_labels: Sequence[str], col_labels: Sequence[str] | None = None) -> np.ndarray:
        """Dyad values as an (n, m) float64 array (diagonal left as computed)."""
        two_mode = col_labels is not None
        cols = col_labels if two_mode else row_labels
        what = self.name or self.kind
        a = None if self.kind == "receiver" else _node_vector(self.values, row_labels, what)
        b = None
        if self.kind != "sender":
            cv = self.col_values
            if cv is None and not two_mode:
                cv = self.values
            if cv is None:
                raise InputError(f"{what}: two-mode data need col_values "
                                 "(the column nodes' attribute)")
            b = _node_vector(cv, cols, what)
        return derived_values(self.kind, a, b, len(row_labels), len(cols))


def derived_values(kind: str, a: np.ndarray | None, b: np.ndarray | None, n: int,
                   m: int) -> np.ndarray:
    """Dyad values of a derived predictor from row attribute ``a`` and column attribute ``b``.

    same: 1[a_i == b_j]; gap: |a_i - b_j|; sender: a_i; receiver: b_j; pair_sum: a_i + b_j.
    ``a`` is unused (None) for receiver, ``b`` for sender.
    """
    if kind == "sender":
        return np.repeat(a.astype(np.float64)[:, None], m, axis=1)
    if kind == "receiver":
        return np.repeat(b.astype(np.float64)[None, :], n, axis=0)
    if kind == "same":
        return (a[:, None] == b[None, :]).astype(np.float64)
    if a.dtype.kind not in "fiub" or b.dtype.kind not in "fiub":
        raise InputError(f"derived predictor '{kind}' needs a numeric attribute; got text values")
    # a value beyond float64 becomes infinite, which the design's check names (no numpy
    # warning on the way)
    with np.errstate(over="ignore"):
        if kind == "gap":
            return np.abs(a[:, None].astype(np.float64) - b[None, :].astype(np.float64))
        if kind == "pair_sum":
            return a[:, None].astype(np.float64) + b[None, :].astype(np.float64)
    raise InputError(f"unknown derived predictor kind {kind!r}")


def _node_vector(values: Any, labels: Sequence[str], what: str) -> np.ndarray:
    """One value per node, in the order of ``labels``.

    ``values``: a sequence in node order, a dict label -> value, or a pandas Series
    indexed by label (aligned by label; labels it has beyond ``labels`` are not used).
    """
    if is_series(values):
        index = as_labels(values.index, f"{what} (the Series index)")
        pos = {lab: k for k, lab in enumerate(index)}
        _no_value(what, [lab for lab in labels if lab not in pos])
        values = _series_values(values, what)[np.array([pos[lab] for lab in labels],
                                                       dtype=np.int64)]
    elif isinstance(values, dict):
        _no_value(what, [lab for lab in labels if lab not in values])
        values = [values[lab] for lab in labels]
    arr = np.asarray(values)
    if arr.ndim != 1 or arr.shape[0] != len(labels):
        raise InputError(f"{what}: need one attribute value per node ({len(labels)}); "
                         f"got shape {arr.shape}")
    if arr.dtype.kind == "f" and np.isinf(arr).any():
        raise InputError(f"{what}: attribute has an infinite value; use NaN for missing")
    if arr.dtype.kind == "O":
        arr = arr.astype(str)
    return arr


def _no_value(what: str, missing: list[str]) -> None:
    if missing:
        raise InputError(f"{what}: no attribute value for node{'s' * (len(missing) > 1)} "
                         f"{some_labels(missing)}")


def _series_values(series: Any, what: str) -> np.ndarray:
    """A Series' values as a numpy array: numbers as float64 with NaN for missing ones
    (nullable pandas dtypes too), anything else as objects."""
    types = loaded_pandas().api.types
    if types.is_numeric_dtype(series.dtype) and not types.is_bool_dtype(series.dtype):
        if isinstance(series.dtype, np.dtype):
            return series.to_numpy()
        return series.to_numpy(dtype=np.float64, na_value=np.nan)
    return series.to_numpy(dtype=object)


@dataclass(frozen=True, eq=False)
class Reverse:
    """The transpose of a network: the value at (i, j) is the network's value at (j, i)."""

    network: Any
    name: str | None = None


def same(values: Any, col_values: Any = None, *, name: str | None = None) -> NodeDerived:
    """Predictor 1 if the attribute of i equals that of j, else 0."""
    return NodeDerived("same", values, col_values, name)


def gap(values: Any, col_values: Any = None, *, name: str | None = None) -> NodeDerived:
    """Predictor |a_i - a_j|, the absolute difference of a numeric attribute."""
    return NodeDerived("gap", values, col_values, name)


def sender(values: Any, *, name: str | None = None) -> NodeDerived:
    """Predictor a_i: the attribute of the tie's source (row node)."""
    return NodeDerived("sender", values, None, name)


def receiver(values: Any, col_values: Any = None, *, name: str | None = None) -> NodeDerived:
    """Predictor a_j: the attribute of the tie's target (column node).

    For two-mode data pass the column nodes' attribute as ``values`` (or ``col_values``).
    """
    return NodeDerived("receiver", None, values if col_values is None else col_values, name)


def pair_sum(values: Any, col_values: Any = None, *, name: str | None = None) -> NodeDerived:
    """Predictor a_i + a_j."""
    return NodeDerived("pair_sum", values, col_values, name)


def reverse(network: Any, *, name: str | None = None) -> Reverse:
    """Predictor M[j, i] of a one-mode network M: reciprocity."""
    return Reverse(network, name)


def network_name(obj: Any) -> str | None:
    """The name a network object carries (``.name`` text, not empty), else None.

    A DataFrame has no name: ``frame.name`` would be its column labelled "name".
    """
    name = None if is_frame(obj) else getattr(obj, "name", None)
    return name if isinstance(name, str) and name else None


def as_dyadic(obj: Any, *, name: str, labels: Sequence[str] | None = None,
              col_labels: Sequence[str] | None = None) -> Dyadic:
    """Coerce a network given by the user into a :class:`Dyadic`.

    Accepts a Dyadic, a 2-d numpy array (square: one-mode; rectangular: two-mode), a
    scipy.sparse matrix (densified; the sparse engine path takes them without this), a
    networkx graph (edge attribute ``weight`` if present, else 1), or a pandas DataFrame
    labelled by its index (rows) and columns (see :func:`frame_dyadic`).

    ``labels``/``col_labels`` name the nodes of an unlabelled array; a DataFrame keeps its
    own labels, and is read as two-mode when ``col_labels`` is given (a two-mode response).
    """
    if is_frame(obj):
        return frame_dyadic(obj, name=name, two_mode=col_labels is not None)
    if isinstance(obj, Dyadic):
        if obj.name is None:
            return Dyadic(obj.values, obj.labels, obj.col_labels, obj.directed, obj.excluded, name,
                          obj.source)
        return obj
    directed = None
    try:
        import scipy.sparse as sp
        if sp.issparse(obj):
            obj = obj.toarray()
    except ImportError:  # pragma: no cover - scipy is a dependency
        pass
    if _is_networkx(obj):
        import networkx as nx
        nodes = list(obj.nodes())
        labels = [str(v) for v in nodes]
        weighted = any("weight" in d for _, _, d in obj.edges(data=True))
        obj = nx.to_numpy_array(obj, nodelist=nodes, weight="weight" if weighted else None,
                                dtype=np.float64)
    if isinstance(obj, (list, tuple)):
        obj = np.asarray(obj)
    if not isinstance(obj, np.ndarray):
        raise InputError(f"{name}: cannot use an object of type {type(obj).__name__} as a "
                         "network (give a numpy array, scipy.sparse matrix, networkx graph or "
                         "dyadperm.Dyadic)")
    if obj.ndim != 2:
        raise InputError(f"{name} must be a 2-d array; got {obj.ndim} dimensions")
    if obj.dtype.kind not in "fiub":
        raise InputError(f"{name} must hold numbers; got dtype {obj.dtype}")
    # a float64 array is used as given (a view stays a view: no copy of a large network)
    values = np.asarray(obj, dtype=np.float64)
    n, m = values.shape
    if labels is None:
        labels = [str(i) for i in range(n)]
    two_mode = col_labels is not None or n != m
    if two_mode and col_labels is None:
        col_labels = [str(j) for j in range(m)]
    return Dyadic(values, tuple(labels), tuple(col_labels) if two_mode else None,
                  directed, None, name)


def frame_dyadic(frame: Any, *, name: str, two_mode: bool = False) -> Dyadic:
    """A labelled pandas DataFrame as a network.

    The index labels the rows and the columns label the columns (labels as text, each
    given once). A square DataFrame is one-mode: its columns must hold the index's labels,
    in any order, and are put in the index's order. A rectangular one (or any, with
    ``two_mode``) is two-mode: index = row nodes, columns = column nodes. Values must be
    numbers; NaN (or a missing value of a nullable dtype) marks a missing dyad value.
    """
    rows = as_labels(frame.index, f"{name} (the DataFrame's index)")
    cols = as_labels(frame.columns, f"{name} (the DataFrame's columns)")
    types = loaded_pandas().api.types
    for col, dtype in zip(cols, frame.dtypes):
        if not types.is_numeric_dtype(dtype):
            raise InputError(f"{name} must hold numbers; the DataFrame's column {col!r} has "
                             f"dtype {dtype}")
    values = frame.to_numpy(dtype=np.float64, na_value=np.nan)
    n, m = values.shape
    if two_mode or n != m:
        return Dyadic(values, rows, cols, None, None, name)
    pos = {lab: j for j, lab in enumerate(cols)}
    row_set = set(rows)
    unknown = [lab for lab in cols if lab not in row_set]
    if unknown:
        raise InputError(f"{name}: a square DataFrame is one network over the nodes of its "
                         "index, so its columns must hold the index's labels (in any order); "
                         f"columns not in the index: {some_labels(unknown)} (for two-mode "
                         "data give dyadperm.Dyadic(values, labels, col_labels))")
    if cols != rows:
        values = values[:, np.array([pos[lab] for lab in rows], dtype=np.int64)]
    return Dyadic(values, rows, None, None, None, name)


def _is_networkx(obj: Any) -> bool:
    mod = type(obj).__module__
    return mod.startswith("networkx") and hasattr(obj, "nodes") and hasattr(obj, "edges")
