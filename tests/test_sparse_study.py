"""Study files whose networks are all edge lists reach the sparse path with no flag; what
the sparse path cannot take is refused, before any n x n array, when the dense route does
not fit in memory.

Reference: the same study on the dense path (itself checked against statsmodels and brute
force elsewhere); the two paths sum in different orders, so statistics agree to 1e-10
relative and p-values exactly (see tests/test_sparse.py for why not bit for bit).
"""

import sys

import numpy as np
import pytest

import dyadperm as dp
import dyadperm.inputs.study_file as study_mod
from dyadperm import cli
from dyadperm.calibrate import calibrate_study
from dyadperm.inputs import describe, memory
from dyadperm.output.report import make_report
from dyadperm.planning import plan_study


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


# --- every scheme, two-mode, groups; check, plan, calibrate, report ------------------------
def _write(path, text):
    path.write_text(text)
    return path


@pytest.mark.parametrize("scheme", ["dsp", "freedman-lane"])
def test_edge_list_study_every_scheme_matches_dense(edge_study, monkeypatch, scheme):
    text = edge_study.read_text().replace('scheme = "y"', f'scheme = "{scheme}"')
    path = _write(edge_study.parent / f"{scheme}.toml", text)
    res_dense = dp.load_study(path).run(jobs=1)
    monkeypatch.setattr(study_mod, "SPARSE_ABOVE", 0)
    study = dp.load_study(path)
    assert study.route.sparse and isinstance(study.response, dp.SparseNetwork)
    res = study.run(jobs=2)
    # the dense route on the same data and seed (module docstring)
    assert res.notes[0].startswith(f"sparse path: {scheme} relabels")
    np.testing.assert_allclose(res.stat, res_dense.stat, rtol=1e-10)
    np.testing.assert_allclose(np.asarray(res.null), np.asarray(res_dense.null), rtol=1e-10,
                               atol=1e-10)
    np.testing.assert_array_equal(res.exceed, res_dense.exceed)
    np.testing.assert_array_equal(res.p, res_dense.p)


def test_grouped_edge_list_study_matches_dense(edge_study, monkeypatch):
    text = edge_study.read_text().replace('[test]\nscheme = "y"',
                                          '[test]\nscheme = "dsp"\ngroups = "club"')
    path = _write(edge_study.parent / "groups.toml", text.replace(
        '[[predictor]]\nname = "same_club"\nsame = "club"\n', ''))
    res_dense = dp.load_study(path).run(jobs=1)
    monkeypatch.setattr(study_mod, "SPARSE_ABOVE", 0)
    res = dp.load_study(path).run(jobs=1)
    assert res.notes[0].startswith("sparse path: dsp") and res.n_dyads == res_dense.n_dyads
    np.testing.assert_allclose(np.asarray(res.null), np.asarray(res_dense.null), rtol=1e-10,
                               atol=1e-10)
    np.testing.assert_array_equal(res.p, res_dense.p)


@pytest.fixture
def two_mode_study(tmp_path):
    """Invented: volunteers (rows) and the weekly tasks they took on (columns)."""
    rng = np.random.default_rng(8)
    n, m = 30, 12
    area = rng.integers(0, 3, n)
    t_area = rng.integers(0, 3, m)
    (tmp_path / "people.csv").write_text(
        "id,area,years\n" + "".join(f"p{i},{area[i]},{1 + i % 9}\n" for i in range(n)))
    (tmp_path / "tasks.csv").write_text(
        "task,area,years,size\n" + "".join(f"t{j},{t_area[j]},{2 + j % 5},{3 + j % 4}\n"
                                           for j in range(m)))
    lines, other = ["source,target,weight"], ["source,target"]
    for i in range(n):
        for j in range(m):
            if rng.random() < (0.4 if area[i] == t_area[j] else 0.1):
                lines.append(f"p{i},t{j},{rng.integers(1, 5)}")
            if rng.random() < 0.15:
                other.append(f"p{i},t{j}")
    (tmp_path / "hours.csv").write_text("\n".join(lines) + "\n")
    (tmp_path / "asked.csv").write_text("\n".join(other) + "\n")
    return _write(tmp_path / "two.toml",
                  '[study]\ntitle = "volunteers"\nnodes = "people.csv"\nid_column = "id"\n'
                  'col_nodes = "tasks.csv"\ncol_id_column = "task"\n'
                  '[response]\nfile = "hours.csv"\n'
                  '[[predictor]]\nname = "asked"\nfile = "asked.csv"\n'
                  '[[predictor]]\nname = "same_area"\nsame = "area"\n'
                  '[[predictor]]\nname = "years_gap"\ngap = "years"\n'
                  '[[predictor]]\nname = "seniority"\nsender = "years"\n'
                  '[[predictor]]\nname = "task_size"\nreceiver = "size"\n'
                  '[test]\nscheme = "freedman-lane"\npermutations = 200\nseed = 3\n')


def test_two_mode_edge_list_study_matches_dense(two_mode_study, monkeypatch):
    res_dense = dp.load_study(two_mode_study).run(jobs=1)
    monkeypatch.setattr(study_mod, "SPARSE_ABOVE", 0)
    study = dp.load_study(two_mode_study)
    assert study.response.two_mode and study.response.shape == (30, 12)
    res = study.run(jobs=1)
    assert res.two_mode and res.notes[0].startswith("sparse path: freedman-lane")
    assert res.terms == res_dense.terms and res.n_dyads == res_dense.n_dyads == 360
    np.testing.assert_allclose(res.stat, res_dense.stat, rtol=1e-10)
    np.testing.assert_allclose(np.asarray(res.null), np.asarray(res_dense.null), rtol=1e-10,
                               atol=1e-10)
    np.testing.assert_array_equal(res.p, res_dense.p)
    text = describe.describe_study(two_mode_study).text()
    assert "nodes: 30 x 12   dyads: 360 (two-mode)" in text
    assert "route: sparse (edge lists and node attributes, no n x n array): schemes y, dsp " \
           "and freedman-lane (linear model); the dense route would need" in text


def test_check_plan_report_and_calibrate_on_a_sparse_study(edge_study, monkeypatch,
                                                          tmp_path):
    monkeypatch.setattr(study_mod, "SPARSE_ABOVE", 0)
    text = describe.describe_study(edge_study).text()
    assert "route: sparse" in text and "the dense route would need" in text
    est = plan_study(edge_study, precision=0.01, jobs=1, budget=0.2)
    assert est.permutations == 475 and est.seconds > 0  # ceil(0.05 * 0.95 / 0.01^2)
    out = tmp_path / "run.h5"
    res = dp.load_study(edge_study).run(out=out, jobs=1)
    rep = make_report(out)
    assert "sparse path" in rep.text
    np.testing.assert_array_equal(np.asarray(dp.open_result(out).null), np.asarray(res.null))
    with pytest.raises(dp.InputError, match=r"s\.toml: calibrate does not run on the sparse "
                                            r"route: its simulated responses .* need the "
                                            r"dense route, which would need [0-9.]+ KiB"):
        calibrate_study(dp.load_study(edge_study), replicates=2, permutations=9)


def test_what_the_sparse_route_cannot_take_is_refused_by_memory(edge_study, monkeypatch,
                                                                capsys):
    """A study only the dense route can take, on a machine without the memory for it,
    is refused while reading, before any n x n array: one line naming what keeps it off
    the sparse route and the dense route's need (a fake small 'available memory')."""
    monkeypatch.setattr(memory, "available_bytes", lambda: 1000)
    folder = edge_study.parent
    np.save(folder / "dist.npy", np.abs(np.subtract.outer(np.arange(40.0), np.arange(40.0))))
    dense_x = edge_study.read_text().replace(
        "[test]", '[[predictor]]\nname = "dist"\nfile = "dist.npy"\n[test]')
    # 1,600 dyads: 4 networks built (2 files, 2 derived), 4 layers, masks: 67 bytes a dyad
    with pytest.raises(dp.InputError, match=r"^d\.toml: \[\[predictor\]\] #3 'dist' "
                                            r"\(dist\.npy\) is a dense matrix file; the sparse "
                                            r"route takes edge lists and derived predictors; "
                                            r"the dense "
                                            r"route would need 105 KiB of memory for 40 nodes "
                                            r"\(4 networks as n x n arrays\), more than the "
                                            r"1 KiB available"):
        dp.load_study(_write(folder / "d.toml", dense_x))
    ties = folder / "ties.csv"
    ties.write_text(ties.read_text().replace("\n", "\nv0,v39,\n", 1))  # a missing value
    with pytest.raises(dp.InputError, match=r"^s\.toml: \[response\] 'ties' \(ties\.csv\) has "
                                            r"a missing value at line 2; the sparse route "
                                            r"takes complete edge lists; the dense route "
                                            r"would need"):
        dp.load_study(edge_study)
    logistic = edge_study.read_text().replace('scheme = "y"', 'model = "logistic"')
    with pytest.raises(dp.InputError, match=r'^l\.toml: model = "logistic" runs on dense '
                                            r"arrays only; the dense route would need"):
        dp.load_study(_write(folder / "l.toml", logistic))
    # the CLI: one line on stderr, exit 2, no MemoryError
    monkeypatch.setattr(sys, "argv", ["dyadperm", "check", str(folder / "l.toml")])
    with pytest.raises(SystemExit) as exc:
        cli.main()
    assert exc.value.code == 2
    err = [ln for ln in capsys.readouterr().err.splitlines() if ln.strip()]
    assert len(err) == 1 and err[0].startswith('dyadperm: error: l.toml: model = "logistic"')
