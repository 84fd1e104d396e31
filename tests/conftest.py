"""Shared fixtures: a seeded random generator and small random networks.

Tolerances are named constants in ``tests/reference.py`` (one place).
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest

# Make ``import reference`` work whatever pytest's import mode or package layout of tests/.
_HERE = str(Path(__file__).resolve().parent)
if _HERE not in sys.path:
    sys.path.insert(0, _HERE)


@pytest.fixture
def rng() -> np.random.Generator:
    """A fresh generator with a fixed seed, so every test is reproducible on its own."""
    return np.random.default_rng(20240611)


def random_network(rng: np.random.Generator, n: int, m: int | None = None, *,
                   directed: bool = True, kind: str = "normal") -> np.ndarray:
    """A random n x m network (m = n for one-mode).

    kind "normal": continuous values (no ties); "counts": small integers with many zeros
    and ties; "binary": 0/1. Undirected one-mode networks are symmetric. The diagonal of a
    one-mode network is filled with noise on purpose: it must never enter a fit.
    """
    m = n if m is None else m
    if kind == "normal":
        M = rng.normal(size=(n, m))
    elif kind == "counts":
        M = rng.poisson(0.8, size=(n, m)).astype(np.float64)
    elif kind == "binary":
        M = (rng.random((n, m)) < 0.4).astype(np.float64)
    else:
        raise ValueError(f"kind must be normal, counts or binary; got {kind!r}")
    if not directed and n == m:
        M = np.triu(M, 1)
        M = M + M.T
        M[np.diag_indices(n)] = rng.normal(size=n) * 100.0
    return M


@pytest.fixture
def make_network(rng):
    """Factory fixture: ``make_network(n, m=None, directed=True, kind="normal")``."""
    def make(n, m=None, *, directed=True, kind="normal"):
        return random_network(rng, n, m, directed=directed, kind=kind)
    return make
