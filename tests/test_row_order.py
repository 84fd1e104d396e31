"""The same data give the same bits whatever the row order of their files.

The engine orders nodes by label (groups contiguous), not by the order of a node table or
an edge list, so a study whose node table, edge lists and matrix files are re-exported in
another row order draws the same relabellings of the same nodes: ``null``, ``p`` and the
estimates are bit-identical for the same seed. Reference: the study in its original row
order (an invariance test, as for chunk sizes and jobs).
"""

import numpy as np
import pytest

import dyadperm as dp
import dyadperm.inputs.study_file as study_mod
from dyadperm.inputs import design
from dyadperm.inputs.labels import label_order, sorted_labels

N = 24


def _labels(rng, n):
    """Node labels of mixed kinds (integers of different lengths and text), shuffled."""
    ints = [str(v) for v in rng.choice(np.arange(-5, 300), n // 2, replace=False)]
    text = [f"{c}{k}" for c, k in zip("qbzaxm" * n, rng.choice(60, n - n // 2, replace=False))]
    labels = ints + text
    rng.shuffle(labels)
    return labels


class Data:
    """One invented data set: nodes with attributes, directed weighted ties, a matrix."""

    def __init__(self, seed, n=N, cols=None):
        rng = np.random.default_rng(seed)
        self.rows = _labels(rng, n)
        self.cols = None if cols is None else [f"e{k}" for k in rng.choice(90, cols, replace=False)]
        m = n if cols is None else cols
        self.club = rng.integers(0, 3, n)
        self.age = rng.integers(20, 60, n)
        self.grp = rng.integers(0, 3, n)
        self.col_kind = None if cols is None else rng.integers(0, 2, cols)
        self.col_size = None if cols is None else rng.integers(1, 9, cols)
        self.edges = [(a, b, int(rng.integers(1, 5))) for a in range(n) for b in range(m)
                      if (cols is not None or a != b) and rng.random() < 0.3]
        self.matrix = rng.normal(size=(n, m)).round(3)

    def write(self, folder, rng=None, *, node_table=True, groups=False, missing=False,
              extra="", scheme="dsp", model="linear", matrix=True):
        """Write the study into ``folder``; ``rng`` shuffles every file's rows (and the
        matrix file's columns) independently."""
        folder.mkdir(parents=True, exist_ok=True)
        n = len(self.rows)
        perm = (lambda k: rng.permutation(k)) if rng is not None else np.arange
        lines = ["id,club,age,grp"] + [f"{self.rows[i]},{self.club[i]},{self.age[i]},"
                                       f"g{self.grp[i]}" for i in perm(n)]
        (folder / "nodes.csv").write_text("\n".join(lines) + "\n")
        cols = self.rows if self.cols is None else self.cols
        if self.cols is not None:
            lines = ["id,kind,size"] + [f"{self.cols[j]},{self.col_kind[j]},{self.col_size[j]}"
                                        for j in perm(len(self.cols))]
            (folder / "cols.csv").write_text("\n".join(lines) + "\n")
        ties = ["source,target,weight"]
        for e in perm(len(self.edges)):
            a, b, w = self.edges[e]
            value = "" if missing and e % 17 == 3 else str(w)
            ties.append(f"{self.rows[a]},{cols[b]},{value}")
        (folder / "ties.csv").write_text("\n".join(ties) + "\n")
        ri, cj = perm(n), perm(len(cols))
        mat = [",".join(["id"] + [cols[j] for j in cj])]
        mat += [",".join([self.rows[i]] + [str(self.matrix[i, j]) for j in cj]) for i in ri]
        (folder / "matrix.csv").write_text("\n".join(mat) + "\n")
        study = ['[study]', 'title = "row order"']
        if node_table:
            study += ['nodes = "nodes.csv"', 'id_column = "id"']
        if self.cols is not None:
            study += ['col_nodes = "cols.csv"', 'col_id_column = "id"']
        study += ['[response]', 'name = "ties"', 'file = "ties.csv"', 'format = "edges"']
        if matrix:
            study += ['[[predictor]]', 'name = "matrix"', 'file = "matrix.csv"',
                      'format = "matrix"']
        if node_table and self.cols is None:
            study += ['[[predictor]]', 'name = "same_club"', 'same = "club"',
                      '[[predictor]]', 'name = "age_gap"', 'gap = "age"',
                      '[[predictor]]', 'name = "giver_age"', 'sender = "age"']
        if self.cols is not None:
            study += ['[[predictor]]', 'name = "row_age"', 'sender = "age"',
                      '[[predictor]]', 'name = "col_size"', 'receiver = "size"']
        study += ['[test]', f'scheme = "{scheme}"', f'model = "{model}"',
                  'permutations = 150', 'seed = 11']
        if groups:
            study.append('groups = "grp"')
        path = folder / "study.toml"
        path.write_text("\n".join(study) + "\n" + extra)
        return path


def _same_bits(a, b):
    assert a.terms == b.terms
    np.testing.assert_array_equal(np.asarray(a.null), np.asarray(b.null))
    np.testing.assert_array_equal(a.p, b.p)
    np.testing.assert_array_equal(a._estimates(), b._estimates())
    np.testing.assert_array_equal(a.se, b.se)


def _check(data, tmp_path, shuffles=2, **kw):
    base = data.write(tmp_path / "given", **kw)
    ref = dp.load_study(base).run()
    for s in range(shuffles):
        path = data.write(tmp_path / f"shuffled{s}", np.random.default_rng(100 + s), **kw)
        _same_bits(ref, dp.load_study(path).run())
    return ref


@pytest.mark.parametrize("scheme, model, missing", [
    ("dsp", "linear", False), ("freedman-lane", "linear", True), ("y", "logistic", False)])
def test_dense_study_any_row_order(tmp_path, scheme, model, missing):
    data = Data(1)
    if model == "logistic":
        data.edges = [(a, b, 1) for a, b, _ in data.edges]
    ref = _check(data, tmp_path, scheme=scheme, model=model, missing=missing)
    assert ref.terms == ("intercept", "matrix", "same_club", "age_gap", "giver_age")


def test_study_without_node_table_any_edge_order(tmp_path):
    # node ids come from the files in order of first appearance: that order changes too
    ref = _check(Data(2), tmp_path, node_table=False)
    assert ref.n_nodes == N


def test_sparse_study_any_row_order(tmp_path, monkeypatch):
    monkeypatch.setattr(study_mod, "SPARSE_ABOVE", 0)  # as if the network were huge
    data = Data(3)
    path = data.write(tmp_path / "probe", scheme="y", matrix=False)
    assert isinstance(dp.load_study(path).response, dp.SparseNetwork)
    ref = _check(data, tmp_path, scheme="y", matrix=False)
    assert any("sparse path" in note for note in ref.notes)


def test_grouped_study_any_row_order(tmp_path):
    ref = _check(Data(4), tmp_path, groups=True)
    assert ref.n_dyads < N * (N - 1)  # dyads within groups only


def test_two_mode_study_any_row_order(tmp_path):
    ref = _check(Data(5, n=9, cols=7), tmp_path, scheme="dsp")
    assert ref.two_mode and ref.terms == ("intercept", "matrix", "row_age", "col_size")


def test_sparse_api_any_node_order(rng):
    """SparseNetwork inputs with their nodes and edges listed in another order."""
    n = 30
    labels = [f"p{k}" for k in rng.permutation(n)]
    keep = (rng.random((n, n)) < 0.2) & ~np.eye(n, dtype=bool)
    r, c = np.nonzero(keep)
    w = rng.integers(1, 4, r.size).astype(float)
    age = rng.integers(20, 60, n)

    def run(node_perm, edge_perm):
        inv = np.argsort(node_perm)
        lab = [labels[k] for k in node_perm]
        net = dp.SparseNetwork(inv[r][edge_perm], inv[c][edge_perm], w[edge_perm], lab)
        return dp.regress(net, {"age_gap": dp.gap(age[node_perm])}, scheme="y",
                          permutations=120, seed=3)

    ref = run(np.arange(n), np.arange(r.size))
    _same_bits(ref, run(rng.permutation(n), rng.permutation(r.size)))


def test_label_order_rule():
    # integers first in numeric order (ties by text), then text in string order
    labels = ["b", "10", "a10", "-3", "9", "a9", "007", "7", "B"]
    assert sorted_labels(labels) == ("-3", "007", "7", "9", "10", "B", "a10", "a9", "b")
    # the positional labels of plain arrays keep their order
    np.testing.assert_array_equal(label_order([str(k) for k in range(12)]), np.arange(12))


def test_plain_arrays_keep_their_order(rng):
    """Arrays carry the labels "0" .. "n-1": the engine's order is the given order."""
    n = 12
    y, x = rng.normal(size=(n, n)), rng.normal(size=(n, n))
    prep = design.prepare(y, {"x": x})
    np.testing.assert_array_equal(prep.row_order, np.arange(n))
    assert prep.matrices[-1] is y  # used as given: no reordered copy


@pytest.mark.parametrize("scheme, two_mode", [("dsp", False), ("y", False), ("dsp", True)])
def test_layers_in_place_with_an_unsorted_node_table(tmp_path, rng, monkeypatch, scheme,
                                                     two_mode):
    """.npy files follow the node table's rows; when those are not in label order the
    study loads the layers in the engine's order, so they are still used without a copy.
    Reference: the same arrays through the API with the node table's labels."""
    from dyadperm.routes import linear

    n, m = 13, (9 if two_mode else 13)
    ids = [f"u{k}" for k in rng.permutation(n)]
    col_ids = [f"e{k}" for k in rng.permutation(m)] if two_mode else None
    y, x = rng.normal(size=(n, m)), rng.normal(size=(n, m))
    np.save(tmp_path / "y.npy", y)
    np.save(tmp_path / "x.npy", x)
    (tmp_path / "nodes.csv").write_text("id\n" + "".join(f"{i}\n" for i in ids))
    head = '[study]\ntitle = "t"\nnodes = "nodes.csv"\nid_column = "id"\n'
    if two_mode:
        (tmp_path / "cols.csv").write_text("id\n" + "".join(f"{i}\n" for i in col_ids))
        head += 'col_nodes = "cols.csv"\ncol_id_column = "id"\n'
    (tmp_path / "s.toml").write_text(
        head + '[response]\nname = "y"\nfile = "y.npy"\n'
        '[[predictor]]\nname = "x"\nfile = "x.npy"\n'
        f'[test]\nscheme = "{scheme}"\npermutations = 100\nseed = 4\n')
    study = dp.load_study(tmp_path / "s.toml")
    assert study.layers_in_place and study.node_ids == sorted_labels(ids)
    ro = label_order(ids)
    co = label_order(col_ids) if two_mode else ro
    np.testing.assert_array_equal(study.response.values, y[np.ix_(ro, co)])
    preps = []
    orig = linear.build_statistics
    monkeypatch.setattr(linear, "build_statistics",
                        lambda prep, **kw: preps.append(prep) or orig(prep, **kw))
    got = study.run()
    assert preps[0].matrices[-1].base is study._response.values.base  # no copy
    cols = None if col_ids is None else tuple(col_ids)
    want = dp.regress(dp.Dyadic(y, tuple(ids), cols, name="y"),
                      {"x": dp.Dyadic(x, tuple(ids), cols)},
                      scheme=scheme, permutations=100, seed=4)
    _same_bits(got, want)


@pytest.mark.parametrize("lazy", [False, True])
def test_align_places_an_unlabelled_block_by_its_node_order(tmp_path, rng, lazy):
    """Reference: numpy fancy indexing of the array as saved."""
    from dyadperm.inputs.io import align, read_network

    rows, cols = ["c", "a", "b", "d"], ["z", "x", "y"]
    block = rng.normal(size=(4, 3))
    np.save(tmp_path / "b.npy", block)
    raw = read_network(tmp_path / "b.npy", lazy=lazy)
    want_rows, want_cols = ["a", "b", "c", "d"], ["x", "y", "z"]
    out = np.empty((4, 3, 2))[:, :, 1] if lazy else None
    values, _ = align(raw, want_rows, want_cols, block_ids=(rows, cols), out=out)
    ri = [rows.index(r) for r in want_rows]
    ci = [cols.index(c) for c in want_cols]
    np.testing.assert_array_equal(values, block[np.ix_(ri, ci)])
    with pytest.raises(dp.InputError, match="unknown node label 'q'"):
        align(raw, ["a", "b", "c", "q"], want_cols, block_ids=(rows, cols))
