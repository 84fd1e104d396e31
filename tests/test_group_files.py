"""Several separate networks, one file per group, give the same run as one big file.

Source of truth: the same study written as one matrix of all nodes (whose between-group
cells never enter with dyads = "within"), run through the same engine; and an exact
enumeration of the within-group relabellings is covered in tests/test_groups_missing.py.
"""

import numpy as np
import pytest

import dyadperm as dp

GROUPS = {"north": ["a1", "a2", "a3", "a4", "a5"], "south": ["b1", "b2", "b3", "b4"]}


def _matrix_csv(path, labels, values):
    path.write_text("id," + ",".join(labels) + "\n" + "".join(
        lab + "," + ",".join(f"{v:.3f}" for v in row) + "\n" for lab, row in zip(labels, values)))


@pytest.fixture
def folder(tmp_path):
    rng = np.random.default_rng(8)
    nodes = [lab for labs in GROUPS.values() for lab in labs]
    village = {lab: g for g, labs in GROUPS.items() for lab in labs}
    (tmp_path / "nodes.csv").write_text(
        "id,village,age\n" + "".join(f"{lab},{village[lab]},{20 + 3 * i}\n"
                                    for i, lab in enumerate(nodes)))
    n = len(nodes)
    big = rng.normal(size=(n, n))
    _matrix_csv(tmp_path / "all.csv", nodes, big)
    start = 0
    for g, labs in GROUPS.items():
        k = len(labs)
        _matrix_csv(tmp_path / f"{g}.csv", labs, big[start:start + k, start:start + k])
        start += k
    return tmp_path


def _study(folder, response_file, dyads=""):
    path = folder / "s.toml"
    path.write_text('[study]\ntitle = "villages"\nnodes = "nodes.csv"\nid_column = "id"\n'
                    f'[response]\nname = "help"\nfile = {response_file}\n'
                    '[[predictor]]\nname = "age_gap"\ngap = "age"\n'
                    f'[test]\nscheme = "y"\ngroups = "village"\npermutations = 200\nseed = 3\n'
                    + dyads)
    return path


def test_one_file_per_group_equals_one_big_file(folder):
    per_group = dp.load_study(_study(folder, '{ north = "north.csv", south = "south.csv" }'))
    big = dp.load_study(_study(folder, '"all.csv"'))
    a, b = per_group.run(), big.run()
    assert a.n_dyads == b.n_dyads == 5 * 4 + 4 * 3
    np.testing.assert_array_equal(a.coef, b.coef)
    np.testing.assert_array_equal(np.asarray(a.null), np.asarray(b.null))


def test_group_files_errors(folder):
    with pytest.raises(dp.InputError, match=r"\[response\] file\.south: no file for this group"):
        dp.load_study(_study(folder, '{ north = "north.csv" }'))
    with pytest.raises(dp.InputError, match=r"dyads: one file per group gives the dyads within"):
        dp.load_study(_study(folder, '{ north = "north.csv", south = "south.csv" }',
                             'dyads = "all"\n'))
    with pytest.raises(dp.InputError, match=r"all\.csv line \d+: unknown node label 'b1' "
                                            r"\(not in group north of nodes\.csv\)"):
        dp.load_study(_study(folder, '{ north = "all.csv", south = "south.csv" }'))
