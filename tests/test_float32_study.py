"""Study files with float32 layers (``[test] storage = "float32"``, ``--storage float32``).

The networks of such a study (.npy, HDF5) load in row blocks straight into a float32 layer
stack; the observed fit reads the files again in float64, so the classical fit is not
rounded. References: statsmodels OLS for the observed fit; the float64 run of the same study
for the relabelling statistics, within the float32 tolerance of tests/test_kernels_blocks.py
(1e-5 (1 + |t|): each stored value carries a relative rounding of at most 2**-24, IEEE 754
binary32 -- common practice -- and the kernels sum in float64); numpy's ``np.load`` and
h5py for the values a file holds; hashlib's SHA-256 of the whole C-ordered bytes for the
run file's fingerprints.
"""

import hashlib

import h5py
import numpy as np
import pytest
import statsmodels.api as sm

import dyadperm as dp
from dyadperm.errors import InputError, RunFileError
from dyadperm.inputs.io import RowReader, read_network
from dyadperm.routes import linear as schemes
from dyadperm.routes.plan import fingerprint
from cli_run import run_cli as _cli

N = 31
SCHEMES = ("dsp", "y", "freedman-lane")
# float32 against float64 (tests/test_kernels_blocks.py module docstring)
T32_RTOL = 1e-5
T32_ATOL = 1e-5
# the observed fit against statsmodels (both float64 QR/least squares fits of the same data)
OLS_RTOL = 1e-9
# two float64 fits of the same data by two QRs (of the inputs; of the standardised layers)
FIT_RTOL = 1e-12
ALPHA = 0.05


def _write(tmp_path, rng, *, scheme, missing=False, nodes=False, permutations=199):
    """y.npy on a (x0.npy), b (layers.h5:/x1) and c (x2.npy): a is a clear effect, b none,
    c a weak one. With ``nodes`` a node table lists the nodes out of label order (so the
    files are placed in another order as they load)."""
    xs = [rng.standard_normal((N, N)) for _ in range(3)]
    xs[2] += 0.5 * xs[0]  # correlated predictors
    y = 0.6 * xs[0] + 0.15 * xs[2] + rng.standard_normal((N, N))
    if missing:
        y[2, 5] = np.nan
        xs[1][7, 3] = np.nan
    np.save(tmp_path / "x0.npy", xs[0])
    with h5py.File(tmp_path / "layers.h5", "w") as fh:
        fh["x1"] = xs[1]
    np.save(tmp_path / "x2.npy", xs[2])
    np.save(tmp_path / "y.npy", y)
    head = "directed = true"
    if nodes:
        ids = [str(v) for v in rng.permutation(N)]
        (tmp_path / "nodes.csv").write_text("id\n" + "\n".join(ids) + "\n")
        head += '\nnodes = "nodes.csv"\nid_column = "id"'
    (tmp_path / "s.toml").write_text(f"""[study]
title = "float32 layers"
{head}
[response]
name = "y"
file = "y.npy"
[[predictor]]
name = "a"
file = "x0.npy"
[[predictor]]
name = "b"
file = "layers.h5:/x1"
[[predictor]]
name = "c"
file = "x2.npy"
[test]
scheme = "{scheme}"
permutations = {permutations}
seed = 17
jobs = 1
""")
    return y, xs


def _spy_plans(monkeypatch):
    plans = []
    orig = schemes.build_statistics

    def spy(prep, **kw):
        plans.append((kw.get("storage"), kw.get("overwrite"), orig(prep, **kw)))
        return plans[-1][2]

    monkeypatch.setattr(schemes, "build_statistics", spy)
    return plans


def _ols(y, xs):
    """statsmodels OLS over the off-diagonal dyads where every network is observed."""
    off = ~np.eye(N, dtype=bool)
    cols = [x[off] for x in xs]
    ok = ~np.isnan(y[off]) & np.all([~np.isnan(c) for c in cols], axis=0)
    X = sm.add_constant(np.column_stack([c[ok] for c in cols]))
    return sm.OLS(y[off][ok], X).fit()


@pytest.mark.parametrize("missing", [False, True])
@pytest.mark.parametrize("scheme", SCHEMES)
def test_float32_study_agrees_with_float64(tmp_path, rng, monkeypatch, scheme, missing):
    y, xs = _write(tmp_path, rng, scheme=scheme, missing=missing)
    plans = _spy_plans(monkeypatch)
    r64 = dp.load_study(tmp_path / "s.toml").run()
    st32 = dp.load_study(tmp_path / "s.toml", storage="float32")
    # the layers were loaded as float32, once: the engine used that very array as its stack
    assert st32.response.values.dtype == np.float32
    base = st32.response.values.base
    r32 = st32.run()
    storage, overwrite, stats = plans[-1]
    assert (storage, overwrite) == ("float32", True)
    assert any(ps.rel is base or ps.fix is base for ps in stats.passes)
    assert base.dtype == np.float32
    # the observed fit comes from the float64 files (a QR of the inputs read in blocks),
    # not the rounded layers: the float64 run's fit (read from its layers' QR factor) to
    # rounding
    np.testing.assert_allclose(r32.coef, r64.coef, rtol=FIT_RTOL, atol=1e-14)
    np.testing.assert_allclose(r32.se, r64.se, rtol=FIT_RTOL)
    np.testing.assert_allclose(r32.stat, r64.stat, rtol=FIT_RTOL, atol=1e-14)
    assert r32.r2 == pytest.approx(r64.r2, rel=FIT_RTOL)
    ols = _ols(y, xs)  # source: statsmodels OLS
    np.testing.assert_allclose(r32.coef, ols.params, rtol=OLS_RTOL, atol=1e-12)
    np.testing.assert_allclose(r32.se, ols.bse, rtol=OLS_RTOL)
    np.testing.assert_allclose(r32.stat, ols.tvalues, rtol=OLS_RTOL)
    # the relabellings: float32 t within 1e-5 (1 + |t|) of float64, the same decisions
    assert r32.null.shape == r64.null.shape
    assert np.all(np.abs(r32.null - r64.null) <= T32_ATOL + T32_RTOL * np.abs(r64.null))
    assert np.array_equal(r32.p[1:] <= ALPHA, r64.p[1:] <= ALPHA)
    assert r64.p[1] <= ALPHA and r64.p[2] > ALPHA  # the design has one of each decision


def test_float32_layers_placed_in_another_order(tmp_path, rng):
    # a node table out of label order: the files are placed row by row in the engine's
    # order as they load, and the float64 values are read back in that same order
    y, xs = _write(tmp_path, rng, scheme="dsp", nodes=True, permutations=99)
    r64 = dp.load_study(tmp_path / "s.toml").run()
    st32 = dp.load_study(tmp_path / "s.toml", storage="float32")
    assert st32.layers_in_place and st32.node_ids != tuple(
        (tmp_path / "nodes.csv").read_text().split()[1:])
    r32 = st32.run()
    np.testing.assert_allclose(r32.stat, r64.stat, rtol=FIT_RTOL, atol=1e-14)
    np.testing.assert_allclose(r32.stat, _ols(y, xs).tvalues, rtol=OLS_RTOL)
    assert np.all(np.abs(r32.null - r64.null) <= T32_ATOL + T32_RTOL * np.abs(r64.null))


def test_study_file_storage_key(tmp_path, rng):
    _write(tmp_path, rng, scheme="y")
    text = (tmp_path / "s.toml").read_text()
    (tmp_path / "s.toml").write_text(text + 'storage = "float32"\n')
    st = dp.load_study(tmp_path / "s.toml")
    assert st.spec["test"]["storage"] == "float32"
    assert st.response.values.dtype == np.float32
    assert dp.load_study(tmp_path / "s.toml", storage="float64").response.values.dtype \
        == np.float64
    (tmp_path / "s.toml").write_text(text + 'storage = "float16"\n')
    with pytest.raises(InputError, match=r"s.toml \[test\] storage: must be one of float64, "
                                         r"float32; got 'float16'"):
        dp.load_study(tmp_path / "s.toml")
    (tmp_path / "s.toml").write_text(text)
    with pytest.raises(InputError, match=r"storage must be one of float64, float32; got 'f4'"):
        dp.load_study(tmp_path / "s.toml", storage="f4")
    (tmp_path / "s.toml").write_text(text.replace('scheme = "y"', 'model = "logistic"')
                                     + 'storage = "float32"\n')
    with pytest.raises(InputError, match=r'\[test\] storage: must be "float64" for model = '
                                         r'"logistic"'):
        dp.load_study(tmp_path / "s.toml")


def test_value_beyond_float32_is_named(tmp_path, rng):
    _write(tmp_path, rng, scheme="dsp")
    x = np.load(tmp_path / "x0.npy")
    x[4, 9] = 1e300
    np.save(tmp_path / "x0.npy", x)
    with pytest.raises(InputError, match=r"x0.npy: value 1e\+300 at row 4, column 9 \(0-based\) "
                                         r"is beyond the range of storage float32"):
        dp.load_study(tmp_path / "s.toml", storage="float32")
    assert dp.load_study(tmp_path / "s.toml").response.values.dtype == np.float64


def test_run_file_records_storage_and_refuses_another(tmp_path, rng):
    _write(tmp_path, rng, scheme="dsp", permutations=60)
    out = tmp_path / "r.h5"
    dp.load_study(tmp_path / "s.toml", storage="float32").run(out=out, permutations=30)
    assert dp.open_result(out).permutations == 30
    with pytest.raises(RunFileError, match=r"belongs to another run: storage differs "
                                           r"\(file: float32, now: float64\)"):
        dp.load_study(tmp_path / "s.toml").run(out=out, permutations=60)



def test_cli_storage_run_extend_check(tmp_path, rng, monkeypatch, capsys):
    _write(tmp_path, rng, scheme="dsp", permutations=60)
    out = tmp_path / "r.h5"
    code, _, err = _cli(monkeypatch, capsys, "run", tmp_path / "s.toml", "--storage",
                        "float32", "--permutations", "30", "--out", out, "--quiet")
    assert code == 0, err
    # extend keeps the run file's storage: the first 30 relabellings, then 30 more
    code, _, err = _cli(monkeypatch, capsys, "extend", out, "--permutations", "60", "--quiet")
    assert code == 0, err
    whole = dp.load_study(tmp_path / "s.toml", storage="float32").run(permutations=60)
    np.testing.assert_array_equal(dp.open_result(out).null, whole.null)
    code, _, err = _cli(monkeypatch, capsys, "extend", out, "--permutations", "90",
                        "--storage", "float64", "--quiet")
    assert code == 2
    assert "storage differs (file: float32, now: float64)" in err
    assert len(err.strip().splitlines()) == 1
    code, _, err = _cli(monkeypatch, capsys, "run", tmp_path / "s.toml", "--storage",
                        "float16", "--quiet")
    assert code == 2
    assert "storage must be one of float64, float32; got 'float16'" in err
    code, text, err = _cli(monkeypatch, capsys, "check", tmp_path / "s.toml", "--storage",
                           "float32")
    assert code == 0, err
    assert "float32 layers" in text


@pytest.mark.parametrize("n, m", [(2, 2), (3, 3), (7, 5)])
def test_row_reader_reads_what_the_file_holds(tmp_path, rng, n, m):
    # source: np.load and h5py read the whole array; the reader reads rows on demand
    a = rng.standard_normal((n, m))
    np.save(tmp_path / "a.npy", a.astype(np.float32))  # any numeric dtype is read as float64
    with h5py.File(tmp_path / "a.h5", "w") as fh:
        fh["a"] = a
    for path, whole in ((tmp_path / "a.npy", np.load(tmp_path / "a.npy").astype(np.float64)),
                        (f"{tmp_path / 'a.h5'}:/a", a)):
        raw = read_network(path, lazy=True)
        rows, cols = rng.permutation(n), rng.permutation(m)
        reader = RowReader(raw.values, rows, cols)
        for i0 in range(n):
            for i1 in range(i0, n + 1):
                np.testing.assert_array_equal(reader[i0:i1], whole[rows[i0:i1]][:, cols])
        again = reader.reordered(np.arange(n)[::-1], np.arange(m))
        np.testing.assert_array_equal(again[0:n], whole[rows[::-1]][:, cols])


def test_fingerprint_of_a_strided_layer_is_sha256_of_its_bytes(rng):
    # source: hashlib's SHA-256 of the dtype, shape and the whole C-ordered bytes
    stack = rng.standard_normal((300, 301, 3))
    for a in (stack[:, :, 1], stack, stack[:, :, 2].astype(np.float32), np.array(2.5)):
        c = np.ascontiguousarray(a)
        want = hashlib.sha256(f"{c.dtype.str}{c.shape}".encode() + c.tobytes()).hexdigest()
        assert fingerprint(a) == want
