"""No input ends in an internal MemoryError: the dense routes check their need up front.

The machine's available memory is replaced by a small fake (``inputs.memory.available_bytes``
is the one place that reads it), so a few hundred nodes stand for a network too large for
the machine. Sources: the byte counts are the arrays the routes allocate (n x m float64
arrays, one layer per network, boolean masks); /proc/meminfo and os.sysconf for the
machine's own figures (common practice on Linux).
"""

from __future__ import annotations

import os

import numpy as np
import pytest

import dyadperm as dp
from dyadperm.inputs import memory

FAKE = 2 * 1024 ** 2  # "available": 2 MiB


@pytest.fixture
def small_machine(monkeypatch):
    monkeypatch.setattr(memory, "available_bytes", lambda: FAKE)


def test_available_memory_is_read_from_the_system():
    avail = memory.available_bytes()
    # source: the physical memory the system reports (os.sysconf, common practice)
    total = os.sysconf("SC_PHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")
    assert avail is not None and 0 < avail <= total


def test_dense_need_counts_the_arrays_the_route_builds():
    # 1,000 x 1,000 dyads: two built float64 arrays, three float32 layers, 3 bytes of masks
    assert memory.dense_bytes(1000, 1000, arrays=2, layers=3, itemsize=4) == 10 ** 6 * 31
    # a 100,000-node study of three predictors given as edge lists or derived: 4 networks
    # built, 4 layers, masks: 67 bytes per dyad, 1e10 dyads
    assert memory.dense_route_bytes(100_000, 100_000, 3) == 67 * 10 ** 10
    assert memory.gib(67 * 10 ** 10) == "624.0 GiB"
    assert memory.gib(5 * 1024 ** 2) == "5.0 MiB" and memory.gib(5000) == "5 KiB"


def test_dense_routes_refuse_before_any_work(rng, small_machine):
    n = 300
    y = rng.normal(size=(n, n))
    x = rng.normal(size=(n, n))
    # y and x used as given, one derived predictor built, 3 layers, masks: 35 bytes a dyad
    with pytest.raises(dp.InputError, match=r"^response 'response' \(300 nodes\): the dense "
                       r"linear route would need 3.0 MiB of memory for its n x n arrays, "
                       r"more than the 2.0 MiB available; give the response and predictors "
                       r"as edge lists"):
        dp.regress(y, {"x": x, "g": dp.gap(rng.normal(size=n))}, scheme="dsp",
                   permutations=10)
    # float32 layers take half: 23 bytes a dyad fit
    res = dp.regress(y, {"x": x, "g": dp.gap(rng.normal(size=n))}, scheme="dsp",
                     permutations=10, storage="float32")
    assert res.permutations == 10
    # Spearman: two layers and two ranked copies, 35 bytes a dyad
    with pytest.raises(dp.InputError, match=r"^network 'a' \(300 nodes\): the dense "
                       r"correlation route would need 3.0 MiB"):
        dp.correlate(y, x, method="spearman", permutations=10)
    yb = (y > 0.5).astype(float)
    with pytest.raises(dp.InputError, match=r"^response 'response' \(300 nodes\): the dense "
                       r"logistic route would need"):
        dp.regress(yb, {"x": x}, model="logistic", permutations=10)
    with pytest.raises(dp.InputError, match=r"the dense correlation route would need"):
        dp.correlate([y, x, x.T], permutations=10)


def test_two_mode_and_grouped_inputs_count_their_copies(rng, small_machine):
    # 300 x 200 two-mode: the response and predictor as given, 2 layers, masks: 19 bytes
    # a dyad, 1.1 MiB
    y = rng.normal(size=(300, 200))
    x = rng.normal(size=(300, 200))
    assert dp.regress(y, {"x": x}, scheme="y", permutations=5).two_mode
    # with groups every network is reordered into a copy: 35 bytes a dyad
    with pytest.raises(dp.InputError, match=r"\(400 nodes\): the dense linear route would "
                                            r"need 5.3 MiB"):
        n = 400
        dp.regress(rng.normal(size=(n, n)), {"x": rng.normal(size=(n, n))}, scheme="y",
                   groups=np.arange(n) % 4, permutations=5)
