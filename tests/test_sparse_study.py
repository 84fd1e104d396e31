"""Study files whose networks are all edge lists reach the sparse path with no flag.

Reference: the same study on the dense path (itself checked against statsmodels and brute
force elsewhere); the two paths sum in different orders, so statistics agree to 1e-10
relative and p-values exactly (see tests/test_sparse.py for why not bit for bit).
"""

import numpy as np
import pytest

import dyadperm as dp
import dyadperm.inputs.study_file as study_mod
from dyadperm.inputs import describe


@pytest.fixture
def edge_study(tmp_path):
    rng = np.random.default_rng(4)
    n = 40
    club = rng.integers(0, 3, n)
    (tmp_path / "nodes.csv").write_text(
        "id,club,age\n" + "".join(f"v{i},{club[i]},{30 + i % 17}\n" for i in range(n)))
    lines = ["source,target,weight"]
    for a in range(n):
        for b in range(n):
            if a != b and rng.random() < (0.25 if club[a] == club[b] else 0.05):
                lines.append(f"v{a},v{b},{rng.integers(1, 4)}")
    (tmp_path / "ties.csv").write_text("\n".join(lines) + "\n")
    path = tmp_path / "s.toml"
    path.write_text('[study]\ntitle = "edges"\nnodes = "nodes.csv"\nid_column = "id"\n'
                    '[response]\nfile = "ties.csv"\n'
                    '[[predictor]]\nname = "same_club"\nsame = "club"\n'
                    '[[predictor]]\nname = "age_gap"\ngap = "age"\n'
                    '[test]\nscheme = "y"\npermutations = 300\nseed = 2\n')
    return path


def test_large_edge_list_study_runs_sparse_and_matches_dense(edge_study, monkeypatch):
    dense = dp.load_study(edge_study)
    assert isinstance(dense.response, dp.Dyadic)  # small: stays dense
    res_dense = dense.run()
    monkeypatch.setattr(study_mod, "SPARSE_ABOVE", 0)  # as if the network were huge
    sparse = dp.load_study(edge_study)
    assert isinstance(sparse.response, dp.SparseNetwork)
    res_sparse = sparse.run()
    assert any("sparse path" in note for note in res_sparse.notes)
    np.testing.assert_allclose(res_sparse.stat, res_dense.stat, rtol=1e-10)
    np.testing.assert_allclose(np.asarray(res_sparse.null), np.asarray(res_dense.null),
                               rtol=1e-10, atol=1e-10)
    np.testing.assert_array_equal(res_sparse.p, res_dense.p)
    text = describe.describe_study(edge_study).text()
    assert "sparse path" in text and "same_club, age_gap" in text


def test_unknown_label_in_sparse_edge_list(edge_study, monkeypatch):
    monkeypatch.setattr(study_mod, "SPARSE_ABOVE", 0)
    ties = edge_study.parent / "ties.csv"
    ties.write_text(ties.read_text() + "v1,stranger,2\n")
    with pytest.raises(dp.InputError, match=r"ties\.csv line \d+: unknown node label 'stranger'"):
        dp.load_study(edge_study)
