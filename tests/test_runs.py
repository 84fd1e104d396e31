"""Durable runs: run files, resume after kill -9, extend, shards and merge, Dask, jobs.

The reference for every check is an uninterrupted in-memory run with the same seed: the
engine promises bit-identical null statistics whatever the chunking, workers, shard split
or resume point (design.md).
"""

import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import h5py
import numpy as np
import pytest

import dyadperm as dp
from dyadperm.pipeline import store

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "configs" / "demo.toml"


def _data(n=25, seed=0):
    rng = np.random.default_rng(seed)
    xs = [rng.normal(size=(n, n)) for _ in range(2)]
    y = xs[0] + rng.normal(size=(n, n))
    return y, xs


def test_run_file_round_trip_and_chunking_invariance(tmp_path):
    y, xs = _data()
    ref = dp.regress(y, xs, permutations=230, seed=5, chunk_size=1000)
    res = dp.regress(y, xs, permutations=230, seed=5, chunk_size=17, out=tmp_path / "r.h5",
                     jobs=2)
    assert np.array_equal(np.asarray(res.null), ref.null)
    back = dp.open_result(tmp_path / "r.h5")
    assert isinstance(back.null, np.memmap)  # not loaded whole
    for field in ("coef", "se", "stat", "p", "p_greater", "p_less", "p_se"):
        np.testing.assert_array_equal(getattr(back, field), getattr(ref, field))
    assert back.seed == 5 and back.permutations == 230 and back.terms == ref.terms


def test_extend_reproduces_the_first_m_exactly(tmp_path):
    y, xs = _data()
    out = tmp_path / "r.h5"
    dp.regress(y, xs, permutations=100, seed=9, chunk_size=30, out=out)
    grown = dp.regress(y, xs, permutations=250, seed=9, out=out)
    full = dp.regress(y, xs, permutations=250, seed=9)
    assert np.array_equal(np.asarray(grown.null), full.null)
    assert grown.chunk_size == 30  # the stored chunk size is kept


def test_file_of_other_inputs_or_seed_is_refused(tmp_path):
    y, xs = _data()
    out = tmp_path / "r.h5"
    dp.regress(y, xs, permutations=50, seed=1, out=out)
    other = xs[1].copy()
    other[0, 1] += 1.0
    with pytest.raises(dp.RunFileError, match="belongs to another run: input x2 differs"):
        dp.regress(y, [xs[0], other], permutations=60, seed=1, out=out)
    with pytest.raises(dp.RunFileError, match="belongs to another run: seed differs"):
        dp.regress(y, xs, permutations=60, seed=2, out=out)
    with pytest.raises(dp.RunFileError, match="scheme differs"):
        dp.regress(y, xs, permutations=60, seed=1, out=out, scheme="y")


def test_shards_merge_to_the_single_run(tmp_path):
    y, xs = _data()
    kw = dict(permutations=200, seed=4, chunk_size=23)
    shards = []
    for i in (1, 2, 3):
        path = tmp_path / f"s{i}.h5"
        assert dp.regress(y, xs, out=path, shard=f"{i}/3", **kw) is None
        shards.append(path)
    with pytest.raises(dp.RunFileError, match="run is incomplete"):
        dp.open_result(shards[0])
    with pytest.raises(dp.RunFileError, match="do not cover the run: 3 chunks missing"):
        store.merge(tmp_path / "partial.h5", shards[:2])
    store.merge(tmp_path / "all.h5", shards)
    merged = dp.open_result(tmp_path / "all.h5")
    assert np.array_equal(np.asarray(merged.null), dp.regress(y, xs, **kw).null)


def test_shard_of_another_seed_or_inputs_is_refused(tmp_path):
    y, xs = _data()
    dp.regress(y, xs, permutations=60, seed=4, chunk_size=20, out=tmp_path / "a.h5", shard="1/2")
    dp.regress(y, xs, permutations=60, seed=5, chunk_size=20, out=tmp_path / "b.h5", shard="2/2")
    with pytest.raises(dp.RunFileError, match="seed differs"):
        store.merge(tmp_path / "m.h5", [tmp_path / "a.h5", tmp_path / "b.h5"])
    y2 = y.copy()
    y2[2, 3] = 0.0
    dp.regress(y2, xs, permutations=60, seed=4, chunk_size=20, out=tmp_path / "c.h5", shard="2/2")
    with pytest.raises(dp.RunFileError, match="input response differs"):
        store.merge(tmp_path / "m.h5", [tmp_path / "a.h5", tmp_path / "c.h5"])


def test_truncated_and_corrupted_files_give_clear_errors(tmp_path):
    y, xs = _data()
    out = tmp_path / "r.h5"
    dp.regress(y, xs, permutations=120, seed=3, chunk_size=40, out=out)
    raw = out.read_bytes()
    cut = tmp_path / "cut.h5"
    cut.write_bytes(raw[: len(raw) // 2])
    with pytest.raises(dp.RunFileError, match="cut.h5"):
        dp.open_result(cut)
    # flip one byte inside the stored statistics: the chunk checksum catches it
    with h5py.File(out, "r") as f:
        offset = f["null"].id.get_offset()
    bad = bytearray(raw)
    bad[offset + 8 * 5 + 3] ^= 0x40
    flipped = tmp_path / "flipped.h5"
    flipped.write_bytes(bytes(bad))
    with pytest.raises(dp.RunFileError, match="chunk 0 .* fails its checksum"):
        dp.open_result(flipped)
    junk = tmp_path / "junk.h5"
    junk.write_bytes(b"not hdf5 at all" * 10)
    with pytest.raises(dp.RunFileError, match="not a readable run file"):
        dp.open_result(junk)


def test_two_writers_are_refused(tmp_path):
    y, xs = _data()
    out = tmp_path / "r.h5"
    dp.regress(y, xs, permutations=40, seed=3, out=out)
    with store.Writer(out):
        with pytest.raises(dp.RunFileError, match="another process is writing"):
            store.Writer(out)


def _cli(*args, **kw):
    return subprocess.run([sys.executable, "-m", "dyadperm.cli", *map(str, args)],
                          capture_output=True, text=True, **kw)


PERMS = 12_000


def test_kill_nine_then_extend_is_bit_identical(tmp_path):
    """kill -9 a running `dyadperm run` at random moments, then `extend` (3 trials)."""
    _kill_and_resume(tmp_path, trials=3)


@pytest.mark.slow
def test_kill_nine_at_twenty_instants(tmp_path):
    """The same at 20 random instants (run on request: about 4 minutes)."""
    _kill_and_resume(tmp_path, trials=20)


def _kill_and_resume(tmp_path, trials):
    study = tmp_path / "demo.toml"
    shutil.copytree(DEMO.parent / "demo", tmp_path / "demo")
    shutil.copy(DEMO, study)
    ref = tmp_path / "ref.h5"
    done = _cli("run", study, "--permutations", PERMS, "--chunk-size", 40, "--out", ref,
                "--quiet", "--jobs", 2)
    assert done.returncode == 0, done.stderr
    ref_null = np.asarray(dp.open_result(ref).null)
    rng = np.random.default_rng(20261202)
    resumed = interrupted = 0
    for trial in range(trials):
        out = tmp_path / f"killed{trial}.h5"
        proc = subprocess.Popen([sys.executable, "-m", "dyadperm.cli", "run", str(study),
                                 "--permutations", str(PERMS), "--chunk-size", "40", "--out",
                                 str(out), "--quiet", "--jobs", "2"],
                                stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        deadline = time.monotonic() + 60
        while not out.exists() and proc.poll() is None and time.monotonic() < deadline:
            time.sleep(0.01)
        time.sleep(float(rng.uniform(0.0, 1.5)))  # a random instant of the run
        proc.send_signal(signal.SIGKILL)
        proc.wait()
        if not out.exists():
            continue  # killed before the file was made: nothing to resume
        resumed += 1
        partial, _, done = store.load(out, require_complete=False)
        assert partial.permutations == PERMS
        interrupted += int(not done.all())
        ext = _cli("extend", out, "--quiet")
        assert ext.returncode == 0, ext.stderr
        assert np.array_equal(np.asarray(dp.open_result(out).null), ref_null)
    assert resumed >= 1 and interrupted >= 1  # at least one kill landed mid-run


def test_jobs_and_backends_give_identical_nulls():
    y, xs = _data(n=20)
    kw = dict(permutations=90, seed=8, chunk_size=11)
    one = dp.regress(y, xs, jobs=1, **kw).null
    assert np.array_equal(dp.regress(y, xs, jobs=2, **kw).null, one)
    assert np.array_equal(dp.regress(y, xs, jobs=2, backend="processes", **kw).null, one)


def test_dask_local_cluster_equals_local_run():
    distributed = pytest.importorskip("distributed")
    y, xs = _data(n=20)
    kw = dict(permutations=80, seed=8, chunk_size=20)
    local = dp.regress(y, xs, **kw)
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                                  protocol="tcp", host="127.0.0.1",
                                  dashboard_address=None) as cluster:
        res = dp.regress(y, xs, backend="dask", scheduler=cluster.scheduler_address, **kw)
    assert np.array_equal(res.null, local.null)
    np.testing.assert_array_equal(res.p, local.p)


def test_inputs_are_hashed_only_for_a_run_file(tmp_path, monkeypatch):
    """A run held in memory never reads its identity, so it never hashes its inputs; a run
    with a run file hashes each network once and stores the same fingerprints an eager
    identity has (SHA-256 of the bytes, as ``routes.plan.fingerprint`` documents)."""
    from dyadperm.routes import plan as plan_mod

    rng = np.random.default_rng(3)
    x = rng.normal(size=(12, 12))
    y = 0.5 * x + rng.normal(size=(12, 12))
    calls = []
    real = plan_mod.fingerprint
    monkeypatch.setattr(plan_mod, "fingerprint", lambda a: calls.append(a.shape) or real(a))
    dp.regress(y, {"x": x}, permutations=20, seed=1)
    assert calls == []
    out = tmp_path / "run.h5"
    dp.regress(y, {"x": x}, permutations=20, seed=1, out=out)
    assert len(calls) == 3  # the mask, the predictor and the response, once each
    ident = store.read_header(out).identity
    assert ident["fingerprint:x"] == real(x)
    assert ident["fingerprint:response"] == real(y)


def test_workers_of_a_run_in_memory_get_no_inputs_for_the_identity(monkeypatch):
    """A plan's identity is made from the prepared inputs when first read (a closure over
    them). A run without a run file never reads it, so the plan its workers get -- pickled
    for processes and Dask -- carries a plain, empty identity, not that closure; the
    caller's plan keeps its own and can still make a run file afterwards."""
    from dyadperm.pipeline import engine
    from dyadperm.pipeline import run as run_mod
    from dyadperm.routes import linear
    from dyadperm.routes.plan import LazyIdentity, fingerprint
    from dyadperm.settings import RunOptions

    rng = np.random.default_rng(4)
    x = rng.normal(size=(10, 10))
    y = x + rng.normal(size=(10, 10))
    plan = linear.plan(y, {"x": x}, scheme="dsp", statistic="t")
    assert isinstance(plan.identity, LazyIdentity)
    seen = []
    real = engine.compute_chunk
    monkeypatch.setattr(engine, "compute_chunk",
                        lambda p, d, c: seen.append(p.identity) or real(p, d, c))
    run_mod.execute(plan, RunOptions(permutations=10, seed=1, chunk_size=5))
    assert seen and all(ident == {} and not isinstance(ident, LazyIdentity) for ident in seen)
    assert dict(plan.identity)["fingerprint:x"] == fingerprint(x)
