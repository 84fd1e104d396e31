"""Node labels: the engine's node order, and messages that name labels.

Every route puts the nodes on one internal order before it draws relabellings, and that
order is decided by the labels alone (:func:`label_order`), never by the row order of a
file or table: the same data exported in any row order give the same relabellings of the
same nodes, and so the same bits, for the same seed.
"""

from __future__ import annotations

import re
from typing import Any, Sequence

import numpy as np

from ..errors import InputError

_INTEGER = re.compile(r"-?[0-9]+\Z")
# How many labels an error message lists before it says how many more there are.
LIST_AT_MOST = 5


def label_key(label: str) -> tuple:
    """Sort key of one label: integers (``-?[0-9]+``) first, by value, then text."""
    if _INTEGER.match(label):
        return (0, int(label), label)
    return (1, 0, label)


def label_order(labels: Sequence[str]) -> np.ndarray:
    """The engine's node order: positions of ``labels`` sorted by label.

    Labels that are integers written in decimal (an optional minus sign and the digits
    0-9: ``"7"``, ``"-2"``, ``"007"``) come first, in numeric order (equal values, such as
    ``"7"`` and ``"007"``, by their text); every other label follows, in the order of its
    text (Python string order, by code point). So the positional labels ``"0" .. "n-1"``
    of plain arrays keep their order, and labels such as ``"F01" .. "F90"`` sort as
    written.

    Returns
    -------
    ndarray of int64, shape (n,)
        ``order[k]`` is the position in ``labels`` of the k-th node of the engine's order.
    """
    n = len(labels)
    if all(lab == str(k) for k, lab in enumerate(labels)):
        return np.arange(n, dtype=np.int64)  # the positional labels of plain arrays
    return np.array(sorted(range(n), key=lambda k: label_key(labels[k])), dtype=np.int64)


def sorted_labels(labels: Any) -> tuple[str, ...]:
    """Distinct labels in the engine's order (see :func:`label_order`)."""
    labels = tuple(labels)
    return tuple(labels[k] for k in label_order(labels))


def some_labels(labels: Sequence[str]) -> str:
    """The first few labels for a message: ``'a', 'b', 'c' and 4 more``."""
    shown = ", ".join(repr(lab) for lab in labels[:LIST_AT_MOST])
    more = len(labels) - LIST_AT_MOST
    return shown + (f" and {more} more" if more > 0 else "")


def as_labels(values: Any, what: str) -> tuple[str, ...]:
    """Labels as text (``str`` of each value), checked distinct and present.

    ``values``: a sequence, numpy array or pandas Index of labels. A missing label
    (None, NaN, empty text) or a label given twice is an InputError naming it.
    """
    out = []
    for v in values:
        if v is None or (isinstance(v, (float, np.floating)) and np.isnan(v)):
            raise InputError(f"{what}: a node label is missing ({v!r})")
        lab = str(v)
        if not lab:
            raise InputError(f"{what}: a node label is empty")
        out.append(lab)
    labels = tuple(out)
    if len(set(labels)) != len(labels):
        seen: set[str] = set()
        dup = [lab for lab in labels if lab in seen or seen.add(lab)]
        raise InputError(f"{what}: node labels must be distinct; given more than once: "
                         f"{some_labels(list(dict.fromkeys(dup)))}")
    return labels
