"""Every run feature on every route: the pipeline owns them, so they must all work alike.

Routes: dense linear (y, dsp, freedman-lane; and panels: waves under one relabelling),
sparse linear (the same three), logistic (y
and dsp, with the Wald z and the score statistic), correlation (Pearson, Spearman; dense and
sparse) and the layer correlation matrix. Features: stop rules (Besag-Clifford, Gandy), a
run file, resume after a kill (chunks in flight lost), growth, shards and merge, the Dask
backend, two workers, threads vs processes, exact enumeration.

The reference of every working cell is one uninterrupted single-worker run with the same
seed (design.md: results are bit-identical for any jobs, backend, chunk completion order,
shard split or resume point; growing from m to M reproduces the first m). The one refused
cell, a stop rule with shards, is refused by one check for every route.
"""

from __future__ import annotations

import h5py
import numpy as np
import pytest
import scipy.sparse as sp

import dyadperm as dp

M = 96      # random relabellings of the reference runs
CHUNK = 16  # several chunks, so workers, shards and resume have something to share
SEED = 31


def _data():
    rng = np.random.default_rng(2)  # a seed where every route stops early under both rules
    n = 13
    x1 = rng.normal(size=(n, n))
    x2 = rng.normal(size=(n, n))
    # no effects: every term's p-value is middling, so the stop rules stop every route early
    y = rng.normal(size=(n, n))
    yb = (rng.random((n, n)) < 0.35).astype(float)
    cat = rng.integers(0, 3, n)
    big = 40
    ys = sp.random(big, big, density=0.1, random_state=5, format="csr")
    xs = sp.random(big, big, density=0.1, random_state=7, format="csr")
    return dict(x1=x1, x2=x2, y=y, yb=yb, cat=cat, ys=ys, xs=xs,
                battr=rng.normal(size=big))


D = _data()


def _dense(scheme):
    return lambda **kw: dp.regress(D["y"], {"x1": D["x1"], "x2": D["x2"]}, scheme=scheme, **kw)


def _logistic(scheme, statistic):
    return lambda **kw: dp.regress(D["yb"], {"x1": D["x1"], "kin": dp.same(D["cat"])},
                                   model="logistic", scheme=scheme, statistic=statistic, **kw)


def _sparse(scheme="y"):
    return lambda **kw: dp.regress(dp.SparseNetwork.from_scipy(D["ys"]),
                                   {"xs": D["xs"], "near": dp.gap(D["battr"])}, scheme=scheme,
                                   **kw)


ROUTES = {
    "dense-y": _dense("y"),
    "dense-dsp": _dense("dsp"),
    "dense-freedman-lane": _dense("freedman-lane"),
    "sparse-y": _sparse("y"),
    "sparse-dsp": _sparse("dsp"),
    "sparse-freedman-lane": _sparse("freedman-lane"),
    "logistic-y-z": _logistic("y", "t"),
    "logistic-y-score": _logistic("y", "score"),
    "logistic-dsp-z": _logistic("dsp", "t"),
    "logistic-dsp-score": _logistic("dsp", "score"),
    "correlation-pearson": lambda **kw: dp.correlate(D["y"], D["x1"], **kw),
    "correlation-spearman": lambda **kw: dp.correlate(D["y"], D["x1"], method="spearman", **kw),
    "correlation-sparse": lambda **kw: dp.correlate(dp.SparseNetwork.from_scipy(D["ys"]),
                                                    D["xs"], **kw),
    "layer-matrix": lambda **kw: dp.correlate([D["y"], D["x1"], D["x2"]], **kw),
    "waves-dsp": lambda **kw: dp.regress(
        dp.Waves([D["x2"].T, D["y"], D["y"].T]),
        {"x1": dp.Waves([D["x1"], D["x2"], D["x1"].T], lag=1), "x2": D["y"][::-1]},
        scheme="dsp", **kw),
    "waves-logistic-y": lambda **kw: dp.regress(
        dp.Waves([D["yb"], D["yb"].T]), {"x1": dp.Waves([D["x1"], D["x2"]])},
        model="logistic", scheme="y", **kw),
}

_REFERENCES: dict[str, np.ndarray] = {}


def reference(route: str) -> np.ndarray:
    """One uninterrupted single-worker run in memory, default chunking."""
    if route not in _REFERENCES:
        _REFERENCES[route] = np.asarray(ROUTES[route](permutations=M, seed=SEED, jobs=1).null)
    return _REFERENCES[route]


def same_bits(a, b) -> bool:
    a, b = np.asarray(a, dtype=np.float64), np.asarray(b, dtype=np.float64)
    return a.shape == b.shape and np.array_equal(a.view(np.uint64), b.view(np.uint64))


def run(route, **kw):
    kw.setdefault("permutations", M)
    kw.setdefault("seed", SEED)
    kw.setdefault("chunk_size", CHUNK)
    return ROUTES[route](**kw)


@pytest.fixture(scope="module")
def dask_cluster():
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                                  protocol="tcp", host="127.0.0.1",
                                  dashboard_address=None) as cluster:
        yield cluster.scheduler_address


@pytest.mark.parametrize("route", sorted(ROUTES))
def test_two_workers_and_processes(route):
    ref = reference(route)
    assert same_bits(run(route, jobs=2).null, ref)
    assert same_bits(run(route, jobs=2, backend="processes").null, ref)


@pytest.mark.parametrize("route", sorted(ROUTES))
def test_dask_backend(route, dask_cluster):
    assert same_bits(run(route, backend="dask", scheduler=dask_cluster).null, reference(route))


@pytest.mark.parametrize("route", sorted(ROUTES))
def test_run_file_then_growth(route, tmp_path):
    out = tmp_path / "run.h5"
    first = run(route, permutations=M // 2, out=out)
    assert same_bits(first.null, reference(route)[:M // 2])
    grown = run(route, out=out, jobs=2)  # the same file, asked for M: grown, first half kept
    assert same_bits(grown.null, reference(route))
    assert same_bits(dp.open_result(out).null, reference(route))


@pytest.mark.parametrize("route", sorted(ROUTES))
def test_resume_after_losing_chunks_in_flight(route, tmp_path):
    """A kill at any instant leaves finished chunks marked done and the rest not (store.py);
    clearing the done flags of some chunks and scrambling their rows is what a kill with
    those chunks in flight leaves behind."""
    out = tmp_path / "run.h5"
    run(route, out=out)
    with h5py.File(out, "r+") as f:
        f["done"][1::2] = 0
        f["null"][CHUNK:2 * CHUNK] = 123.0
    with pytest.raises(dp.RunFileError, match="run is incomplete"):
        dp.open_result(out)
    resumed = run(route, out=out, jobs=2)
    assert same_bits(resumed.null, reference(route))


@pytest.mark.parametrize("route", sorted(ROUTES))
def test_shards_merged(route, tmp_path):
    shards = [tmp_path / f"s{i}.h5" for i in (1, 2)]
    for i, path in enumerate(shards, start=1):
        assert run(route, out=path, shard=f"{i}/2") is None
    merged = tmp_path / "merged.h5"
    dp.pipeline.store.merge(merged, shards)
    assert same_bits(dp.open_result(merged).null, reference(route))


@pytest.mark.parametrize("rule", ["besag-clifford", "gandy"])
@pytest.mark.parametrize("route", sorted(ROUTES))
def test_stop_rules(route, rule, tmp_path):
    """The rows a stopped run uses are the reference's first rows, whatever the workers;
    the stopping point follows the rule on them (or the run goes to its end)."""
    ref = reference(route)
    one = run(route, stop=rule)
    two = run(route, stop=rule, jobs=2, out=tmp_path / "r.h5")
    rows = one.null.shape[0]
    assert same_bits(one.null, ref[:rows]) and same_bits(two.null, one.null)
    assert rows % CHUNK == 0 or rows == M
    # no term has an effect here: every term is done well before M relabellings
    assert rows < M and one.stopped_by == rule
    if rule == "besag-clifford":
        # every term reached its 10th exceedance in the rows used, or the run went to M
        assert np.all((np.asarray(one.exceed) >= 10) | (rows == M))


def _observed(res) -> np.ndarray:
    """The observed statistics of the tested terms (the p-values compare the kernels' own,
    which agree with these to rounding)."""
    return np.asarray(res.stat[res.tested_index()], dtype=np.float64)


@pytest.mark.parametrize("route", sorted(ROUTES))
def test_stop_rule_with_shards_is_refused_in_one_place(route, tmp_path):
    with pytest.raises(dp.InputError, match=r"stop: a stop rule reads the chunks in order; "
                                            r"it cannot be combined with shard"):
        run(route, out=tmp_path / "s.h5", shard="1/2", stop="gandy")
    assert not (tmp_path / "s.h5").exists()  # refused before any work


EXACT_ROUTES = {
    "dense-dsp": lambda **kw: dp.regress(D["y"][:5, :5], {"x1": D["x1"][:5, :5]},
                                         scheme="dsp", **kw),
    "sparse-y": lambda **kw: dp.regress(
        dp.SparseNetwork.from_scipy(sp.csr_array(np.round(np.abs(D["y"][:6, :6]), 1))),
        {"near": dp.gap(D["battr"][:6])}, scheme="y", **kw),
    "sparse-freedman-lane": lambda **kw: dp.regress(
        dp.SparseNetwork.from_scipy(sp.csr_array(np.round(np.abs(D["y"][:6, :6]), 1))),
        {"near": dp.gap(D["battr"][:6]), "kin": dp.same(D["cat"][:6])},
        scheme="freedman-lane", **kw),
    "logistic-dsp-score": lambda **kw: dp.regress(
        D["yb"][:6, :6], {"x1": D["x1"][:6, :6]}, model="logistic", scheme="dsp",
        statistic="score", **kw),
    "correlation-pearson": lambda **kw: dp.correlate(D["y"][:5, :5], D["x1"][:5, :5], **kw),
    "layer-matrix": lambda **kw: dp.correlate([D["y"][:4, :4], D["x1"][:4, :4],
                                               D["x2"][:4, :4]], **kw),
    "waves-freedman-lane": lambda **kw: dp.regress(
        dp.Waves([D["y"][:5, :5], D["y"][5:10, 5:10]]),
        {"x1": dp.Waves([D["x1"][:5, :5], D["x2"][:5, :5]])}, scheme="freedman-lane", **kw),
}


@pytest.mark.parametrize("route", sorted(EXACT_ROUTES))
def test_exact_enumeration(route, tmp_path):
    make = EXACT_ROUTES[route]
    one = make(exact=True, permutations=1, jobs=1)
    assert one.exact and one.p_se[np.isfinite(one.p_se)].max(initial=0.0) == 0.0
    for kw in (dict(jobs=2, chunk_size=7), dict(chunk_size=10, out=tmp_path / "x.h5")):
        again = make(exact=True, permutations=1, **kw)
        assert same_bits(again.null, one.null)
    # the identity relabelling is enumerated first: its row is the observed statistic
    assert same_bits(one.null[0], one.observed)
    np.testing.assert_allclose(one.observed, _observed(one), rtol=1e-9)
