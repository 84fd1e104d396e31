"""What ``dyadperm check`` says of each network: counts, extremes, mean and symmetry.

The summary is taken a block of rows at a time (no temporary the size of a matrix); the
reference is plain numpy over the whole matrix: the off-diagonal cells (the dyad set of a
one-mode network without self-loops), their NaN count, ``np.count_nonzero``, min, max and
mean of the observed values, and ``np.array_equal(a, a.T)`` with missing values read as 0.
"""

import numpy as np
import pytest

from dyadperm.inputs import describe
from dyadperm.inputs.describe import describe_study
from dyadperm.kernels.stats import column_summary
from reference import KERNEL_ATOL, KERNEL_RTOL, column_summary_ref

N = 23


def _networks(rng):
    """Invented networks: a directed response with missing values, a symmetric predictor
    (stored in full, so it stays in a directed study), and a sparse directed one that is
    mostly missing."""
    y = rng.normal(size=(N, N))
    y[rng.random((N, N)) < 0.1] = np.nan
    s = np.triu(rng.integers(0, 3, size=(N, N)).astype(float), 1)
    sym = s + s.T
    sparse = np.where(rng.random((N, N)) < 0.2, rng.normal(size=(N, N)), 0.0)
    sparse[rng.random((N, N)) < 0.6] = np.nan
    return {"y": y, "sym": sym, "sparse": sparse}


def _study(folder, nets, storage):
    for name, arr in nets.items():
        np.save(folder / f"{name}.npy", arr)
    preds = "".join(f'[[predictor]]\nname = "{p}"\nfile = "{p}.npy"\n' for p in ("sym", "sparse"))
    (folder / "s.toml").write_text(
        '[study]\ntitle = "invented check"\ndirected = true\n'
        '[response]\nname = "y"\nfile = "y.npy"\n' + preds
        + f'[test]\npermutations = 9\nstorage = "{storage}"\n')
    return folder / "s.toml"


@pytest.mark.parametrize("storage", ["float64", "float32"])
@pytest.mark.parametrize("block", [None, 3 * N])  # one block; blocks of three rows
def test_network_summaries_match_numpy(tmp_path, rng, monkeypatch, storage, block):
    if block is not None:
        monkeypatch.setattr(describe, "STREAM_DYADS", block)
        monkeypatch.setattr("dyadperm.inputs.design.STREAM_DYADS", block)
    nets = _networks(rng)
    summary = describe_study(_study(tmp_path, nets, storage))
    off = ~np.eye(N, dtype=bool)
    got = {s.name: s for s in summary.networks}
    assert set(got) == set(nets)
    for name, arr in nets.items():
        vals = arr[off]
        fin = vals[~np.isnan(vals)]
        s = got[name]
        assert (s.observed, s.missing) == (fin.size, vals.size - fin.size)
        assert s.nonzero == np.count_nonzero(fin)
        # float32 layers: the summary reads the float64 values the files hold
        assert (s.minimum, s.maximum) == (fin.min(), fin.max())
        assert s.mean == pytest.approx(fin.mean(), rel=1e-12, abs=1e-15)
        filled = np.where(np.isnan(arr), 0.0, arr)
        assert s.symmetric == np.array_equal(filled, filled.T)
    assert got["sym"].symmetric and not got["y"].symmetric
    assert got["y"].role == "response" and got["sym"].role == "predictor"
    missing = got["sparse"].missing
    assert f"'sparse' is mostly missing ({missing:,} of {N * (N - 1):,} dyads)" in summary.notes
    assert not any("'y' is mostly missing" in note for note in summary.notes)


def test_missing_dyads_are_said_to_take_the_slower_path(tmp_path, rng):
    # one missing value among the dyads switches every relabelling to sums over its own
    # complete dyads (README, "Missing dyads"); complete data get no such note
    nets = {"y": rng.normal(size=(N, N)), "sym": rng.normal(size=(N, N)),
            "sparse": rng.normal(size=(N, N))}
    notes = describe_study(_study(tmp_path, nets, "float64")).notes
    assert not any("are missing" in note for note in notes)
    nets["y"][3, 4] = np.nan
    notes = describe_study(_study(tmp_path, nets, "float64")).notes
    want = f"1 of {N * (N - 1):,} dyads are missing in some network: every relabelling"
    assert any(note.startswith(want) and "`dyadperm plan` times a run" in note
               for note in notes)


@pytest.mark.parametrize("dtype", [np.float64, np.float32])
def test_column_summary_kernel_against_its_twin(rng, dtype):
    # blocks folded one after another, as check folds its row blocks; the last column is
    # all missing, one column has no zero and one only zeros and NaN
    blocks = []
    for _ in range(3):
        b = rng.normal(size=(40, 5)).astype(dtype)
        b[rng.random((40, 5)) < 0.2] = 0.0
        b[rng.random((40, 5)) < 0.15] = np.nan
        b[:, 1] = np.where(np.isnan(b[:, 1]), 1.5, b[:, 1] + 10.0)
        b[:, 3] = np.where(rng.random(40) < 0.5, np.nan, 0.0)
        b[:, 4] = np.nan
        blocks.append(b)
    observed = np.zeros(5, np.int64)
    nonzero = np.zeros(5, np.int64)
    total = np.zeros(5)
    low, high = np.full(5, np.inf), np.full(5, -np.inf)
    for b in blocks:
        column_summary(b, observed, nonzero, total, low, high)
    want = column_summary_ref(np.concatenate(blocks))
    for c, (count, nz, sm, lo, hi) in enumerate(want):
        assert (observed[c], nonzero[c], low[c], high[c]) == (count, nz, lo, hi)
        assert total[c] == pytest.approx(sm, rel=KERNEL_RTOL, abs=KERNEL_ATOL)
    assert observed[4] == 0 and low[4] == np.inf and nonzero[3] == 0
