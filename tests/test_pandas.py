"""pandas in and out: labelled DataFrames and Series as inputs, edge tables, ``to_frame``.

References: the CSV report read back by ``pandas.read_csv`` (to_frame), the same data as
ordered numpy arrays (labelled inputs in any order must give the same bits), and the
study-file edge-list reader (from_edges).
"""

import io
import sys

import numpy as np
import pandas as pd
import pytest

import dyadperm as dp
import dyadperm.inputs.study_file as study_mod
from dyadperm.output import report
from dyadperm.inputs.labels import sorted_labels

N = 11


@pytest.fixture
def data(rng):
    y = rng.normal(size=(N, N))
    y[2, 5] = np.nan  # a missing dyad moves with its nodes
    xs = {"a": rng.normal(size=(N, N)), "b": rng.poisson(1.0, size=(N, N)).astype(float)}
    attr = {"age": rng.integers(20, 60, N).astype(float), "club": rng.integers(0, 3, N)}
    return y, xs, attr


def _frame(values, labels, col_labels=None, rng=None):
    """``values`` labelled; rows and columns shuffled independently when ``rng`` is given."""
    cols = labels if col_labels is None else col_labels
    df = pd.DataFrame(values, index=labels, columns=cols)
    if rng is not None:
        df = df.iloc[rng.permutation(len(labels)), rng.permutation(len(cols))]
    return df


def _series(values, labels, rng):
    s = pd.Series(values, index=labels)
    return s.iloc[rng.permutation(len(labels))]


def _same_bits(a, b):
    assert a.terms == b.terms
    np.testing.assert_array_equal(np.asarray(a.null), np.asarray(b.null))
    np.testing.assert_array_equal(a.p, b.p)
    np.testing.assert_array_equal(a._estimates(), b._estimates())


# labels whose engine order is the arrays' order: text of one width, and whole numbers
# (numeric order, not text order: 7 before 12)
LABELS = {"text": [f"farm{k:02d}" for k in range(N)],
          "numbers": [int(v) for v in np.cumsum(np.arange(1, N + 1)) + 5]}


@pytest.mark.parametrize("kind", sorted(LABELS))
@pytest.mark.parametrize("scheme", ["dsp", "freedman-lane", "y"])
def test_shuffled_frames_equal_ordered_arrays(data, rng, kind, scheme):
    y, xs, attr = data
    lab = LABELS[kind]
    want = dp.regress(y, {"a": xs["a"], "b": xs["b"], "rev": dp.reverse(xs["a"]),
                          "age_gap": dp.gap(attr["age"]), "club": dp.same(attr["club"])},
                      scheme=scheme, permutations=120, seed=7)
    got = dp.regress(_frame(y, lab, rng=rng),
                     {"a": _frame(xs["a"], lab, rng=rng), "b": _frame(xs["b"], lab, rng=rng),
                      "rev": dp.reverse(_frame(xs["a"], lab, rng=rng)),
                      "age_gap": dp.gap(_series(attr["age"], lab, rng)),
                      "club": dp.same(_series(attr["club"], lab, rng))},
                     scheme=scheme, permutations=120, seed=7)
    _same_bits(got, want)


def test_shuffled_frames_correlate_logistic_and_groups(data, rng):
    y, xs, attr = data
    lab = LABELS["text"]
    _same_bits(dp.correlate(_frame(y, lab, rng=rng), _frame(xs["a"], lab, rng=rng),
                            permutations=150, seed=2),
               dp.correlate(y, xs["a"], permutations=150, seed=2))
    # layer correlations: every network a DataFrame in its own order
    _same_bits(dp.correlate({k: _frame(v, lab, rng=rng) for k, v in xs.items()},
                            permutations=80, seed=2),
               dp.correlate(dict(xs), permutations=80, seed=2))
    # logistic model on a 0/1 response
    yb = (np.nan_to_num(y) > 0.3).astype(float)
    _same_bits(dp.regress(_frame(yb, lab, rng=rng), {"a": _frame(xs["a"], lab, rng=rng)},
                          model="logistic", scheme="y", permutations=60, seed=3),
               dp.regress(yb, {"a": xs["a"]}, model="logistic", scheme="y", permutations=60,
                          seed=3))
    # groups as a Series indexed by label
    groups = np.array([0, 1, 2] * 4)[:N]
    _same_bits(dp.regress(_frame(y, lab, rng=rng), {"a": _frame(xs["a"], lab, rng=rng)},
                          groups=_series(groups, lab, rng), permutations=100, seed=4),
               dp.regress(y, {"a": xs["a"]}, groups=groups, permutations=100, seed=4))


def test_shuffled_frames_two_mode(rng):
    n, m = 7, 5
    rows, cols = [f"r{k}" for k in range(n)], [f"c{k}" for k in range(m)]
    y, x = rng.normal(size=(n, m)), rng.normal(size=(n, m))
    size = rng.integers(1, 9, m).astype(float)
    want = dp.regress(y, {"x": x, "size": dp.receiver(size)}, permutations=100, seed=5)
    got = dp.regress(_frame(y, rows, cols, rng), {"x": _frame(x, rows, cols, rng),
                                                 "size": dp.receiver(_series(size, cols, rng))},
                     permutations=100, seed=5)
    _same_bits(got, want)
    assert got.two_mode


def test_shuffled_frames_calibrate(data, rng):
    y, xs, _ = data
    lab = LABELS["text"]
    kw = dict(schemes=("dsp",), replicates=6, permutations=19, seed=8, include_ols=False)
    want = dp.calibrate(y, {"a": xs["a"]}, **kw)
    got = dp.calibrate(_frame(y, lab, rng=rng), {"a": _frame(xs["a"], lab, rng=rng)}, **kw)
    np.testing.assert_array_equal(got.null_p, want.null_p)


def test_sparse_path_with_series_attributes(rng):
    n = 25
    lab = [f"s{k:02d}" for k in range(n)]
    keep = (rng.random((n, n)) < 0.2) & ~np.eye(n, dtype=bool)
    r, c = np.nonzero(keep)
    age, club, size = rng.integers(20, 60, n), rng.integers(0, 3, n), rng.normal(size=n)
    net = dp.SparseNetwork(r, c, None, lab)
    want = dp.regress(net, {"g": dp.gap(age), "s": dp.same(club), "p": dp.pair_sum(age),
                            "out": dp.sender(size), "in": dp.receiver(size)},
                      scheme="y", permutations=100, seed=6)
    got = dp.regress(net, {"g": dp.gap(_series(age, lab, rng)),
                           "s": dp.same(_series(club, lab, rng)),
                           "p": dp.pair_sum(_series(age, lab, rng)),
                           "out": dp.sender(_series(size, lab, rng)),
                           "in": dp.receiver(_series(size, lab, rng))},
                     scheme="y", permutations=100, seed=6)
    assert any("sparse path" in note for note in got.notes)
    _same_bits(got, want)


# --------------------------------------------------------------------------- bad labels

def test_labels_that_do_not_match_are_named(data):
    y, xs, attr = data
    lab = [f"n{k}" for k in range(N)]
    other = [f"m{k}" for k in range(N)]
    Y = _frame(y, lab)
    with pytest.raises(dp.InputError, match=r"predictor 'a': its node labels do not match the "
                       r"response's; not in the response: 'm0', 'm1', 'm2', 'm3', 'm4' and 6 "
                       r"more; missing: 'n0', 'n1'"):
        dp.regress(Y, {"a": _frame(xs["a"], other)}, permutations=9)
    with pytest.raises(dp.InputError, match=r"'a': its node labels .* missing: 'n9', 'n10'$"):
        dp.regress(Y, {"a": _frame(xs["a"][:9, :9], lab[:9])}, permutations=9)
    with pytest.raises(dp.InputError, match=r"columns not in the index: 'zz'"):
        dp.regress(Y.rename(columns={"n3": "zz"}), {"a": xs["a"]}, permutations=9)
    with pytest.raises(dp.InputError, match=r"given more than once: 'n1'"):
        dp.regress(Y.rename(index={"n2": "n1"}), {"a": xs["a"]}, permutations=9)
    with pytest.raises(dp.InputError, match=r"must hold numbers; the DataFrame's column 'n4'"):
        dp.regress(Y.astype({"n4": str}), {"a": xs["a"]}, permutations=9)
    with pytest.raises(dp.InputError, match=r"age: no attribute value for nodes 'n0', 'n1'"):
        dp.regress(Y, {"age": dp.gap(pd.Series(attr["age"][2:], index=lab[2:]))},
                   permutations=9)


def test_a_frame_named_name_is_still_a_network(data):
    """A node labelled "name" is a column, not the network's name."""
    y, xs, _ = data
    lab = ["name"] + [f"n{k}" for k in range(1, N)]
    res = dp.correlate(_frame(y, lab), _frame(xs["a"], lab), permutations=19, seed=1)
    assert res.response == "a" and res.terms == ("b",)


# --------------------------------------------------------------------------- to_frame

def _results(data):
    y, xs, _ = data
    yield dp.regress(y, {"a": xs["a"], "b": xs["b"]}, permutations=99, seed=1)
    yield dp.regress(y, {"a": xs["a"], "b": xs["b"]}, permutations=400, seed=1,
                     chunk_size=50, stop="gandy")  # stop verdicts: a text column
    yield dp.correlate(y, xs["a"], permutations=99, seed=1)
    yield dp.correlate({"y": y, **xs}, permutations=99, seed=1)


def test_to_frame_equals_the_csv_report(data):
    kinds = []
    for res in _results(data):
        frame = res.to_frame()
        pd.testing.assert_frame_equal(frame, pd.read_csv(io.StringIO(report.csv_text(res))))
        assert list(frame["term"]) == list(res.terms)
        np.testing.assert_array_equal(frame["p"], res.p)
        kinds.append(type(res).__name__)
    assert kinds == ["RegressionResult", "RegressionResult", "CorrelationResult",
                     "LayerCorrelationResult"]


def test_without_pandas(data, monkeypatch):
    """pandas absent: arrays work as before (nothing imports pandas), and to_frame says
    in one line what to install."""
    y, xs, _ = data
    monkeypatch.setitem(sys.modules, "pandas", None)  # `import pandas` now fails
    res = dp.regress(y, {"a": xs["a"], "g": dp.same(np.arange(N) % 2)}, permutations=19,
                     seed=1)
    net = dp.SparseNetwork.from_edges({"s": ["a", "b"], "t": ["b", "c"]}, source="s",
                                      target="t")
    assert net.labels == ("a", "b", "c")
    with pytest.raises(dp.InputError, match=r"^to_frame\(\) needs pandas, which is not "
                                            r"installed \(pip install 'dyadperm\[pandas\]'\)$"):
        res.to_frame()


# --------------------------------------------------------------------------- from_edges

def _edge_study(tmp_path, rng):
    n = 30
    ids = [f"u{k}" for k in rng.permutation(n)] + ["lonely"]  # an isolated node
    club = rng.integers(0, 3, n + 1)
    (tmp_path / "nodes.csv").write_text(
        "id,club\n" + "".join(f"{i},{c}\n" for i, c in zip(ids, club)))
    edges = [(ids[a], ids[b], int(rng.integers(1, 5))) for a in range(n) for b in range(n)
             if a != b and rng.random() < 0.15]
    rng.shuffle(edges)
    (tmp_path / "ties.csv").write_text(
        "source,target,weight\n" + "".join(f"{a},{b},{w}\n" for a, b, w in edges))
    (tmp_path / "links.csv").write_text(
        "source,target\n" + "".join(f"{b},{a}\n" for a, b, _ in edges[::3]))
    (tmp_path / "s.toml").write_text(
        '[study]\ntitle = "t"\nnodes = "nodes.csv"\nid_column = "id"\n'
        '[response]\nname = "ties"\nfile = "ties.csv"\n'
        '[[predictor]]\nname = "links"\nfile = "links.csv"\n'
        '[[predictor]]\nname = "club"\nsame = "club"\n'
        '[test]\nscheme = "y"\npermutations = 150\nseed = 9\n')
    return tmp_path / "s.toml", ids, club


def test_from_edges_equals_the_study_reader(tmp_path, rng, monkeypatch):
    monkeypatch.setattr(study_mod, "SPARSE_ABOVE", 0)  # the study keeps its edges as edges
    path, ids, club = _edge_study(tmp_path, rng)
    study = dp.load_study(path)
    assert isinstance(study.response, dp.SparseNetwork)
    ties = pd.read_csv(tmp_path / "ties.csv", dtype={"source": str, "target": str})
    links = pd.read_csv(tmp_path / "links.csv", dtype=str)
    nodes = pd.read_csv(tmp_path / "nodes.csv", dtype={"id": str})
    y = dp.SparseNetwork.from_edges(ties, source="source", target="target", weight="weight",
                                    nodes=nodes["id"], name="ties")
    x = dp.SparseNetwork.from_edges(links, source="source", target="target",
                                    nodes=nodes["id"], name="links")
    for mine, theirs in ((y, study.response), (x, study.predictors["links"])):
        assert mine.labels == theirs.labels == tuple(ids)
        np.testing.assert_array_equal(mine.rows, theirs.rows)
        np.testing.assert_array_equal(mine.cols, theirs.cols)
        np.testing.assert_array_equal(mine.weights, theirs.weights)
    got = dp.regress(y, {"links": x, "club": dp.same(nodes.set_index("id")["club"])},
                     scheme="y", permutations=150, seed=9)
    _same_bits(got, study.run())
    # a dict of arrays, without nodes: the labels seen, in the engine's order
    plain = {k: ties[k].to_numpy() for k in ties.columns}
    z = dp.SparseNetwork.from_edges(plain, source="source", target="target",
                                    weight="weight")
    assert z.labels == sorted_labels(set(ids) - {"lonely"})
    np.testing.assert_array_equal(z.toarray(), y.toarray()[np.ix_(*[[ids.index(v) for v in
                                                                     z.labels]] * 2)])


def test_from_edges_errors(rng):
    t = pd.DataFrame({"giver": ["a", "b", "c", "a"], "taker": ["b", "c", "a", "b"],
                      "litres": [1.0, 2.0, 3.0, 4.0]})
    kw = dict(source="giver", target="taker")
    with pytest.raises(dp.InputError, match=r"^gifts row 2: unknown node label 'c' "
                                            r"\(not in nodes\)$"):
        dp.SparseNetwork.from_edges(t, nodes=["a", "b"], name="gifts", **kw)
    with pytest.raises(dp.InputError, match=r"^gifts: duplicate edge 'a' -> 'b' at rows 0 "
                                            r"and 3 \(aggregate repeated ties first\)$"):
        dp.SparseNetwork.from_edges(t, weight="litres", name="gifts", **kw)
    with pytest.raises(dp.InputError, match=r"^edge table: no column 'volume'; its columns: "
                                            r"giver, taker, litres$"):
        dp.SparseNetwork.from_edges(t, weight="volume", **kw)
    with pytest.raises(dp.InputError, match=r"^edge table row 1: column 'taker' has no node "
                                            r"label$"):
        gap = t.iloc[:3].copy()
        gap.loc[1, "taker"] = None
        dp.SparseNetwork.from_edges(gap, **kw)
    with pytest.raises(dp.InputError, match=r"nodes: node labels must be distinct; given "
                                            r"more than once: 'a'"):
        dp.SparseNetwork.from_edges(t.iloc[:3], nodes=["a", "b", "c", "a"], **kw)
