"""Memory: what the dense routes would allocate, and what the machine has available.

The dense routes hold every network as an n x m float64 array: the inputs that are not
already such arrays (derived predictors, scipy.sparse or networkx inputs, reordered
copies), the engine's layer stack (one layer per predictor and the response, in the
storage dtype) and a few boolean masks of the dyad set. A network of 100,000 nodes takes
74.5 GiB per layer, so the routes check the need against the memory available before any
work and refuse with one line that names the network, instead of failing part way with a
MemoryError. The sparse route needs none of this (O(edges + nodes)).

``available_bytes`` reads MemAvailable from /proc/meminfo (Linux; the kernel's estimate
of what new allocations can use without swapping), else the free physical pages from
``os.sysconf``; when neither is known, nothing is refused. Tests replace it with a small
fake to exercise the refusals.
"""

from __future__ import annotations

import os
from typing import Any, Mapping

import numpy as np

from ..errors import InputError
from .dyadic import Dyadic, NodeDerived, Reverse, network_name

GIB = 1024 ** 3
# Bytes per dyad of the boolean masks the dense route holds beside its float64 arrays (the
# dyad set, its mirror image for undirected data, the cells off it).
MASK_BYTES = 3


def available_bytes() -> int | None:
    """Memory new allocations can use now, in bytes; None when the system does not say."""
    try:
        with open("/proc/meminfo", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024  # the file counts kB
    except (OSError, ValueError, IndexError):
        pass
    try:
        return int(os.sysconf("SC_AVPHYS_PAGES")) * int(os.sysconf("SC_PAGE_SIZE"))
    except (ValueError, OSError, AttributeError):
        return None


def gib(size: float) -> str:
    """A size in bytes for messages: GiB, MiB below one GiB, KiB below one MiB."""
    if size >= GIB:
        return f"{size / GIB:,.1f} GiB"
    if size >= 1024 ** 2:
        return f"{size / 1024 ** 2:,.1f} MiB"
    return f"{size / 1024:,.0f} KiB"


def dense_bytes(n: int, m: int, *, arrays: int, layers: int, itemsize: int = 8) -> int:
    """Bytes the dense route allocates for n x m dyads: ``arrays`` float64 arrays built
    from the inputs, a layer stack of ``layers`` layers of ``itemsize`` bytes, and the
    masks (``MASK_BYTES`` per dyad)."""
    return int(n) * int(m) * (8 * arrays + itemsize * layers + MASK_BYTES)


def dense_route_bytes(n: int, m: int, k: int) -> int:
    """The dense linear route's need for a study of ``k`` predictors given as edge lists
    or derived predictors: each of the k + 1 networks built as an n x m array, and the
    layer stack of k + 1 float64 layers."""
    return dense_bytes(n, m, arrays=k + 1, layers=k + 1)


def fits(need: int) -> tuple[bool, int | None]:
    """Whether ``need`` bytes fit in the memory available now, and that memory."""
    avail = available_bytes()
    return (avail is None or need <= avail), avail


def shape_of(obj: Any) -> tuple[int, int] | None:
    """(n, m) of a network as the user gave it, without building it; None if unknown."""
    if type(obj).__module__.startswith("networkx") and hasattr(obj, "number_of_nodes"):
        n = int(obj.number_of_nodes())
        return n, n
    shape = getattr(obj, "shape", None)
    if shape is None and isinstance(obj, (list, tuple)):
        shape = np.shape(obj)
    if shape is None or len(shape) != 2:
        return None
    return int(shape[0]), int(shape[1])


def _built(obj: Any) -> int:
    """n x m float64 arrays the dense route builds from one input: none for a float64 array
    or a Dyadic (used as given), one for anything converted or computed."""
    if isinstance(obj, Dyadic) or (isinstance(obj, np.ndarray) and obj.dtype == np.float64):
        return 0
    return 1


def _predictor_objects(predictors: Any) -> list:
    if isinstance(predictors, Mapping):
        return list(predictors.values())
    if isinstance(predictors, (list, tuple)):
        return list(predictors)
    return [predictors]


def check_dense_route(y: Any, predictors: Any, *, route: str, layers_per_term: int = 1,
                      extra_layers: int = 0, itemsize: int = 8, groups: Any = None,
                      in_place: bool = False) -> None:
    """Refuse, before any work, a dense problem whose arrays do not fit in memory.

    The need counts the n x m float64 arrays built from the inputs (``_built``; every
    input again when ``groups`` reorders them), the layer stack (``layers_per_term`` per
    predictor and response, plus ``extra_layers``, of ``itemsize`` bytes; none when
    ``in_place`` lets the stack be the inputs themselves) and the masks. The message
    names the response, its size, the need and the memory available.
    """
    shape = shape_of(y)
    if shape is None:
        return
    n, m = shape
    preds = _predictor_objects(predictors)
    arrays = _built(y) + sum(1 if isinstance(p, (NodeDerived, Reverse)) else _built(p)
                             for p in preds)
    if groups is not None:
        arrays += 1 + len(preds)  # reordered copies of every network
    layers = 0 if in_place else layers_per_term * (1 + len(preds)) + extra_layers
    need = dense_bytes(n, m, arrays=arrays, layers=layers, itemsize=itemsize)
    ok, avail = fits(need)
    if ok:
        return
    name = network_name(y) or ("response" if route != "correlation" else "a")
    role = "network" if route == "correlation" else "response"
    size = f"{n:,} nodes" if n == m else f"{n:,} x {m:,} nodes"
    hint = ("give the response and predictors as edge lists (dyadperm.SparseNetwork, "
            "scipy.sparse) or derived predictors, with no missing values, for the sparse "
            "route" if route == "linear" else "use a smaller network or a subsample")
    raise InputError(f"{role} {name!r} ({size}): the dense {route} route would need "
                     f"{gib(need)} of memory for its n x n arrays, more than the "
                     f"{gib(avail)} available; {hint}")
