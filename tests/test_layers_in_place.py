"""Studies whose networks load straight into the engine's layer stack (held once, not twice).

References: the ordinary array path of ``dyadperm.regress`` (itself checked against
statsmodels and brute force elsewhere) must give the same bits; statsmodels OLS gives the
observed t statistics; numpy's own ``np.load`` gives the values a lazily read file holds.
"""

import gc
import weakref

import h5py
import numpy as np
import pytest
import statsmodels.api as sm

import dyadperm as dp
from dyadperm.routes import correlation as correlation_route
from dyadperm.routes import linear as schemes
from dyadperm.errors import InputError
from dyadperm.inputs.io import align, read_network
from dyadperm.pipeline.store import read_header

N = 14
SCHEMES = ("dsp", "y", "freedman-lane")


def _write(tmp_path, rng, *, scheme, missing=False):
    xs = [rng.standard_normal((N, N)) for _ in range(2)]
    y = 0.4 * xs[0] + rng.standard_normal((N, N))
    if missing:
        y[2, 5] = np.nan
        xs[1][7, 3] = np.nan
    np.save(tmp_path / "x0.npy", xs[0])
    with h5py.File(tmp_path / "layers.h5", "w") as fh:
        fh["x1"] = xs[1]
    np.save(tmp_path / "y.npy", y)
    _study_file(tmp_path, "directed = true", "layers.h5:/x1", scheme, 150, 11)
    return y, xs


def _study_file(tmp_path, head, b_file, scheme, permutations, seed):
    """s.toml: response y.npy on predictors a (x0.npy) and b (``b_file``)."""
    (tmp_path / "s.toml").write_text(f"""[study]
title = "in place"
{head}
[response]
name = "y"
file = "y.npy"
[[predictor]]
name = "a"
file = "x0.npy"
[[predictor]]
name = "b"
file = "{b_file}"
[test]
scheme = "{scheme}"
permutations = {permutations}
seed = {seed}
""")


def _spy_plans(monkeypatch):
    plans = []
    orig = schemes.build_statistics

    def spy(prep, **kw):
        plans.append((kw.get("overwrite"), orig(prep, **kw)))
        return plans[-1][1]

    monkeypatch.setattr(schemes, "build_statistics", spy)
    return plans


@pytest.mark.parametrize("missing", [False, True])
@pytest.mark.parametrize("scheme", SCHEMES)
def test_study_in_place_matches_array_path(tmp_path, rng, monkeypatch, scheme, missing):
    y, xs = _write(tmp_path, rng, scheme=scheme, missing=missing)
    study = dp.load_study(tmp_path / "s.toml")
    assert study.layers_in_place
    base = study.response.values.base
    pred_base = study.predictors["a"].values.base
    # the engine's layout: [predictors..., response] or, for y, [response] and [predictors]
    assert base.shape == ((N, N, 1) if scheme == "y" else (N, N, 3))
    plans = _spy_plans(monkeypatch)
    got = study.run()
    overwrite, plan = plans[-1]
    assert overwrite is True
    # no copy: the plan's stacks are the arrays the files were loaded into
    stacks = {id(ps.rel) for ps in plan.passes} | {id(ps.fix) for ps in plan.passes}
    assert id(base) in stacks
    assert id(pred_base) in stacks
    want = dp.regress(y, {"a": xs[0], "b": xs[1]}, scheme=scheme, permutations=150, seed=11,
                      directed=True)
    np.testing.assert_array_equal(got.null, want.null)  # same bits as the array path
    np.testing.assert_array_equal(got.p, want.p)
    # observed t against statsmodels OLS over the complete off-diagonal dyads
    off = ~np.eye(N, dtype=bool)
    cols = np.column_stack([np.ones(off.sum()), xs[0][off], xs[1][off]])
    ok = np.isfinite(cols).all(axis=1) & np.isfinite(y[off])
    ols = sm.OLS(y[off][ok], cols[ok]).fit()
    np.testing.assert_allclose(got.stat, ols.tvalues, rtol=1e-10)
    # the run overwrote the loaded layers; whoever reads the networks next (a report, a
    # calibration) gets them from the files again, equal to what was saved
    assert not np.array_equal(base[:, :, -1], y, equal_nan=True)
    np.testing.assert_array_equal(study.response.values, y)
    np.testing.assert_array_equal(study.predictors["a"].values, xs[0])
    # and so does a second run, which agrees with the first
    again = study.run()
    np.testing.assert_array_equal(again.null, got.null)


def test_spent_layers_go_before_the_files_are_read_again(tmp_path, rng, monkeypatch):
    # a second run (or `plan`, whose timing run follows a warm-up run) reads the files
    # again; the layers the first run spent must be gone by then, or the networks are held
    # twice (a 10,000-node float32 study's `plan` peaked at 3.4 GB instead of 2.0)
    _write(tmp_path, rng, scheme="dsp", missing=False)
    study = dp.load_study(tmp_path / "s.toml")
    spent = weakref.ref(study.response.values.base)
    study.run()
    reload = study._reload
    gone = []

    def read_again():
        gc.collect()
        gone.append(spent() is None)
        return reload()

    monkeypatch.setattr(study, "_reload", read_again)
    assert study.response.values.base is not None
    assert gone == [True]


def test_run_files_agree_across_paths(tmp_path, rng):
    """The run file's identity (fingerprints of the inputs) is taken before the layers are
    overwritten, so an in-place run and an array run of the same data are the same run."""
    y, xs = _write(tmp_path, rng, scheme="dsp")
    dp.load_study(tmp_path / "s.toml").run(out=tmp_path / "a.h5")
    named = dp.Dyadic(y, tuple(str(i) for i in range(N)), None, True, None, "y")
    dp.regress(named, {"a": xs[0], "b": xs[1]}, permutations=150, seed=11, directed=True,
               out=tmp_path / "b.h5")
    ia, ib = read_header(tmp_path / "a.h5").identity, read_header(tmp_path / "b.h5").identity
    assert {k: v for k, v in ia.items() if k.startswith("fingerprint")} == \
        {k: v for k, v in ib.items() if k.startswith("fingerprint")}
    # and growing the array run's file from the study works (same run)
    dp.load_study(tmp_path / "s.toml").run(out=tmp_path / "b.h5", permutations=200)
    assert read_header(tmp_path / "b.h5").permutations == 200


def test_overwrite_inputs_api(rng):
    n, k = 12, 2
    base = rng.standard_normal((n, n, k + 1))
    keep = base.copy()
    names = {"a": base[:, :, 0], "b": base[:, :, 1]}
    want = dp.regress(keep[:, :, 2], {"a": keep[:, :, 0], "b": keep[:, :, 1]},
                      permutations=100, seed=3, directed=True)
    got = dp.regress(base[:, :, 2], names, permutations=100, seed=3, directed=True,
                     overwrite_inputs=True)
    np.testing.assert_array_equal(got.null, want.null)
    assert not np.array_equal(base, keep)  # used in place: the layers hold the engine's stack
    # not the engine's layout (response first): the inputs are copied and left alone
    other = keep.copy()
    again = dp.regress(other[:, :, 0], {"a": other[:, :, 1], "b": other[:, :, 2]},
                       permutations=100, seed=3, directed=True, overwrite_inputs=True)
    np.testing.assert_array_equal(other, keep)
    assert again.null.shape == want.null.shape


def test_csv_study_loads_as_usual(tmp_path, rng):
    _write(tmp_path, rng, scheme="dsp")
    text = (tmp_path / "s.toml").read_text()
    x0 = np.load(tmp_path / "x0.npy")
    (tmp_path / "x0.csv").write_text("source,target,weight\n" + "".join(
        f"{i},{j},{float(x0[i, j])!r}\n" for i in range(N) for j in range(N) if i != j))
    # an unlabelled CSV block beside unlabelled .npy blocks, on the nodes of a node table
    (tmp_path / "nodes.csv").write_text("id\n" + "".join(f"{i}\n" for i in range(N)))
    text = text.replace('directed = true', 'directed = true\nnodes = "nodes.csv"\nid_column = "id"')
    (tmp_path / "c.toml").write_text(text.replace('"x0.npy"', '"x0.csv"'))
    study = dp.load_study(tmp_path / "c.toml")
    assert not study.layers_in_place
    assert study.run().null.shape == (150, 2)  # one column per predictor


def test_lazy_block_reads_like_numpy(tmp_path, rng):
    a = rng.standard_normal((37, 29))
    np.save(tmp_path / "a.npy", a)
    np.save(tmp_path / "i.npy", (a * 10).astype(np.int32))
    np.save(tmp_path / "f.npy", np.asfortranarray(a))
    with h5py.File(tmp_path / "a.h5", "w") as fh:
        fh["g/a"] = a.astype(np.float32)
    rows = tuple(str(i) for i in range(37))
    cols = tuple(str(i) for i in range(29))
    for name, want in (("a.npy", a), ("i.npy", (a * 10).astype(np.int32)),
                       ("f.npy", a), ("a.h5:/g/a", a.astype(np.float32))):
        raw = read_network(str(tmp_path / name), lazy=True)
        out = np.full((37, 29, 2), -1.0)
        values, _ = align(raw, rows, cols, out=out[:, :, 1])
        assert values is not None
        np.testing.assert_array_equal(out[:, :, 1], want.astype(np.float64))
        assert (out[:, :, 0] == -1).all()


def test_lazy_block_errors_name_the_cell(tmp_path, rng):
    a = rng.standard_normal((6, 6))
    a[4, 2] = np.inf
    np.save(tmp_path / "bad.npy", a)
    raw = read_network(str(tmp_path / "bad.npy"), lazy=True)
    rows = tuple(str(i) for i in range(6))
    with pytest.raises(InputError, match=r"bad\.npy: infinite value at row 4, column 2"):
        align(raw, rows, out=np.empty((6, 6)))
    # a file cut short after its header was read
    np.save(tmp_path / "cut.npy", rng.standard_normal((6, 6)))
    raw = read_network(str(tmp_path / "cut.npy"), lazy=True)
    data = (tmp_path / "cut.npy").read_bytes()
    (tmp_path / "cut.npy").write_bytes(data[:-40])
    with pytest.raises(InputError, match=r"cut\.npy: the file ends before its 6 x 6 block"):
        align(raw, rows, out=np.empty((6, 6)))


def test_owned_base_needs_the_exact_layout(rng):
    from dyadperm.inputs.design import prepare
    base = rng.standard_normal((8, 8, 3))
    prep = prepare(base[:, :, 2], {"a": base[:, :, 0], "b": base[:, :, 1]}, directed=True)
    assert schemes.owned_base(prep, [0, 1, 2], np.float64) is base
    assert schemes.owned_base(prep, [1, 0, 2], np.float64) is None  # order differs
    assert schemes.owned_base(prep, [0, 1, 2], np.float32) is None  # storage differs
    assert schemes.owned_base(prep, [0, 1], np.float64) is None  # not every layer


def test_correlation_study_in_place(tmp_path, rng, monkeypatch):
    """A Pearson correlation study of two .npy networks: loaded as two (n, n, 1) layer
    arrays, standardised in place; same bits as dp.correlate on the arrays, and r equal
    to scipy's pearsonr over the off-diagonal dyads."""
    from scipy.stats import pearsonr

    x = rng.standard_normal((N, N))
    y = 0.3 * x + rng.standard_normal((N, N))
    np.save(tmp_path / "x.npy", x)
    np.save(tmp_path / "y.npy", y)
    (tmp_path / "c.toml").write_text("""[study]
title = "correlation in place"
directed = true
[response]
name = "y"
file = "y.npy"
[[predictor]]
name = "x"
file = "x.npy"
[test]
kind = "correlation"
permutations = 150
seed = 4
""")
    study = dp.load_study(tmp_path / "c.toml")
    assert study.layers_in_place
    bases = {id(study.response.values.base), id(study.predictors["x"].values.base)}
    seen = []
    orig = correlation_route.build_correlation_statistics

    def spy(prep, **kw):
        seen.append(orig(prep, **kw))
        return seen[-1]

    monkeypatch.setattr(correlation_route, "build_correlation_statistics", spy)
    got = study.run()
    ps = seen[-1].passes[0]
    assert {id(ps.rel), id(ps.fix)} == bases  # no copy
    want = dp.correlate(y, x, permutations=150, seed=4, directed=True)
    np.testing.assert_array_equal(got.null, want.null)
    off = ~np.eye(N, dtype=bool)
    np.testing.assert_allclose(got.stat, [pearsonr(x[off], y[off])[0]], rtol=1e-12)
    # Spearman ranks into new arrays: loaded as usual
    (tmp_path / "s.toml").write_text((tmp_path / "c.toml").read_text()
                                     .replace('kind = "correlation"',
                                              'kind = "correlation"\nmethod = "spearman"'))
    assert not dp.load_study(tmp_path / "s.toml").layers_in_place


@pytest.mark.parametrize("shape", ["undirected", "two-mode"])
@pytest.mark.parametrize("scheme", ["dsp", "y"])
def test_other_shapes_in_place(tmp_path, rng, shape, scheme):
    """Undirected (symmetric files, upper triangle) and two-mode (rectangular) studies
    through the in-place path: the same bits as dp.regress on the arrays."""
    m = N if shape == "undirected" else N + 5
    mats = [rng.standard_normal((N, m)) for _ in range(3)]
    if shape == "undirected":
        mats = [a + a.T for a in mats]
    for name, a in zip(("x0", "x1", "y"), mats):
        np.save(tmp_path / f"{name}.npy", a)
    head = ('directed = false' if shape == "undirected" else 'two_mode = true')
    _study_file(tmp_path, head, "x1.npy", scheme, 120, 9)
    study = dp.load_study(tmp_path / "s.toml")
    assert study.layers_in_place
    got = study.run()
    want = dp.regress(mats[2], {"a": mats[0], "b": mats[1]}, scheme=scheme, permutations=120,
                      seed=9, directed=False if shape == "undirected" else None)
    assert got.directed == want.directed and got.two_mode == (shape == "two-mode")
    np.testing.assert_array_equal(got.null, want.null)
    np.testing.assert_array_equal(got.p, want.p)
