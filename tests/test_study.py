"""Tests of dyadperm.study: validation of study files, loading their inputs, Study.run.

Data files are written with the standard library's csv module, numpy and h5py; expected
matrices are written out by hand from those files, or built with numpy fancy indexing.
The end-to-end check compares the engine's observed fit with statsmodels OLS on the
vectorised dyads (the external reference named in methods.md).
"""

from __future__ import annotations

import csv
from pathlib import Path

import h5py
import numpy as np
import pytest

import dyadperm as dp
from dyadperm.inputs.dyadic import Dyadic, NodeDerived, Reverse
from dyadperm.study import Study, load_study

FARMS = [["farm", "crop", "age", "district", "note"],
         ["F1", "wheat", "30", "north", "x"],
         ["F2", "rice", "", "north", ""],
         ["F3", "wheat", "52", "south", "y"],
         ["F4", "olives", "41", "south", "z"]]
WATER = "source,target,weight\nF1,F2,5\nF2,F1,2\nF3,F3,9\nF4,F1,\nF2,F3,1\n"
KIN = "farm,F1,F2,F3,F4\nF1,0,1,0,2\nF2,1,0,3,0\nF3,0,3,0,0\nF4,2,0,0,0\n"

BASE = {
    "study": 'title = "Water between farms"\nnodes = "farms.csv"\nid_column = "farm"',
    "response": 'file = "water.csv"',
    "predictor": ['name = "kinship"\nfile = "kin.csv"', 'name = "crop"\nsame = "crop"'],
    "test": None,
    "output": None,
}


def write_rows(path: Path, rows) -> Path:
    with open(path, "w", newline="", encoding="utf-8") as fh:
        csv.writer(fh).writerows(rows)
    return path


def study_text(**sections) -> str:
    """A study file from BASE with some sections replaced (None leaves a section out)."""
    parts = []
    for name, body in {**BASE, **sections}.items():
        if body is None:
            continue
        if name == "predictor":
            parts += [f"[[predictor]]\n{b}\n" for b in body]
        else:
            parts.append(f"[{name}]\n{body}\n")
    return "\n".join(parts)


@pytest.fixture
def folder(tmp_path) -> Path:
    write_rows(tmp_path / "farms.csv", FARMS)
    (tmp_path / "water.csv").write_text(WATER)
    (tmp_path / "kin.csv").write_text(KIN)
    return tmp_path


def load(folder: Path, text: str | None = None, **sections) -> Study:
    p = folder / "demo.toml"
    p.write_text(study_text(**sections) if text is None else text, encoding="utf-8")
    return load_study(p)


# --------------------------------------------------------------------------- loading

def test_load_full_study(folder):
    s = load(folder, predictor=['name = "kinship"\nfile = "kin.csv"',
                                'name = "crop"\nsame = "crop"',
                                'name = "age_gap"\ngap = "age"',
                                'name = "back"\nreverse = "water"',
                                'name = "old_giver"\nsender = "age"',
                                'name = "old_taker"\nreceiver = "age"',
                                'name = "ages"\npair_sum = "age"'],
             test='scheme = "freedman-lane"\ngroups = "district"\nseed = 7',
             output='file = "out/run.h5"')
    assert isinstance(s, Study)
    assert s.path == (folder / "demo.toml").resolve()
    assert s.text == (folder / "demo.toml").read_text()
    assert s.title == "Water between farms"
    assert s.node_ids == ("F1", "F2", "F3", "F4") and s.col_node_ids is None
    assert s.node_table is not None and s.node_table.ids == s.node_ids
    # expected response written out by hand from WATER: self-loop F3->F3 dropped, F4->F1 missing
    water = np.array([[0, 5, 0, 0], [2, 0, 1, 0], [0, 0, 0, 0], [np.nan, 0, 0, 0]])
    assert isinstance(s.response, Dyadic) and s.response.name == "water"
    np.testing.assert_array_equal(s.response.values, water)
    assert s.response.labels == s.node_ids and s.response.directed is None
    assert list(s.predictors) == ["kinship", "crop", "age_gap", "back", "old_giver",
                                  "old_taker", "ages"]
    kin = s.predictors["kinship"]
    assert isinstance(kin, Dyadic) and kin.name == "kinship"
    np.testing.assert_array_equal(kin.values, [[0, 1, 0, 2], [1, 0, 3, 0], [0, 3, 0, 0],
                                               [2, 0, 0, 0]])
    crop = s.predictors["crop"]
    assert isinstance(crop, NodeDerived) and crop.kind == "same" and crop.name == "crop"
    np.testing.assert_array_equal(crop.values, ["wheat", "rice", "wheat", "olives"])
    ages = np.array([30, np.nan, 52, 41])
    for name, kind in (("age_gap", "gap"), ("old_giver", "sender"), ("old_taker", "receiver"),
                       ("ages", "pair_sum")):
        d = s.predictors[name]
        assert isinstance(d, NodeDerived) and d.kind == kind and d.name == name
        # a receiver term holds the column nodes' attribute (all nodes, one-mode)
        np.testing.assert_array_equal(d.col_values if kind == "receiver" else d.values, ages)
    # dense dyad values by the published definitions (glossary): |a_i - a_j| etc.
    np.testing.assert_array_equal(s.predictors["age_gap"].dense(s.node_ids),
                                  np.abs(ages[:, None] - ages[None, :]))
    back = s.predictors["back"]
    assert isinstance(back, Reverse) and back.name == "back" and back.network is s.response
    np.testing.assert_array_equal(s.groups, ["north", "north", "south", "south"])
    assert s.notes == ["water.csv: 1 self-loop(s) ignored (line 4)"]
    assert s.output == folder / "out" / "run.h5"
    assert s.spec["test"] == {"kind": "regression", "model": "linear", "scheme": "freedman-lane",
                              "statistic": "t", "method": None, "permutations": 10_000,
                              "seed": 7, "alpha": 0.05, "exact": "auto", "groups": "district",
                              "dyads": "within", "jobs": None, "chunk_size": None,
                              "stop": "none", "stop_exceedances": None, "stop_risk": None,
                              "ci": 0.95, "storage": "float64"}
    assert s.spec["study"] == {"title": "Water between farms", "nodes": "farms.csv",
                               "id_column": "farm", "col_nodes": None, "col_id_column": None,
                               "two_mode": False, "directed": None, "inside_folder": False}
    assert s.spec["response"] == {"file": "water.csv", "format": "auto", "missing": None,
                                  "name": "water"}
    assert s.spec["predictor"][0] == {"name": "kinship", "file": "kin.csv", "format": "auto",
                                      "missing": None}
    assert s.spec["predictor"][1] == {"name": "crop", "same": "crop"}
    assert s.spec["output"] == {"file": "out/run.h5"}
    assert "Water between farms" in repr(s)


def test_undirected_edges_fill_both_cells_and_missing_marker(folder):
    (folder / "w.csv").write_text("source,target,weight\nF1,F2,5\nF3,F2,NA\n")
    s = load(folder, study=BASE["study"] + "\ndirected = false",
             response='name = "ties"\nfile = "w.csv"\nformat = "edges"\nmissing = "NA"')
    expected = np.array([[0, 5, 0, 0], [5, 0, np.nan, 0], [0, np.nan, 0, 0], [0, 0, 0, 0]])
    np.testing.assert_array_equal(s.response.values, expected)
    assert s.response.name == "ties" and s.response.directed is False
    assert s.spec["study"]["directed"] is False


def test_without_node_table_ids_are_labels_in_order_of_first_appearance(folder):
    (folder / "k2.csv").write_text("id,F9,F1\nF1,2,0\nF9,0,0\n")
    s = load(folder, study='title = "t"',
             predictor=['name = "k2"\nfile = "k2.csv"'])
    # water.csv: F1, F2, F3 (line 4), F4; then k2.csv adds F9
    assert s.node_ids == ("F1", "F2", "F3", "F4", "F9")
    assert s.node_table is None and s.groups is None
    # rows/columns F1 (position 0) and F9 (position 4): only (F1, F9) = 2
    np.testing.assert_array_equal(s.predictors["k2"].values[np.ix_([0, 4], [0, 4])],
                                  [[0, 2], [0, 0]])


def test_unknown_label_names_file_line_and_node_table(folder):
    (folder / "w.csv").write_text("source,target\nF1,F2\nF2,F-77\n")
    with pytest.raises(dp.InputError,
                       match=r"^w\.csv line 3: unknown node label 'F-77' \(not in farms\.csv\)$"):
        load(folder, response='file = "w.csv"')


def test_unlabelled_files_without_node_table(folder, rng):
    v = rng.normal(size=(3, 3))
    np.save(folder / "w.npy", v)
    with h5py.File(folder / "d.h5", "w") as fh:
        fh["nets/k"] = v.T
    s = load(folder, study='title = "t"', response='file = "w.npy"',
             predictor=['name = "k"\nfile = "d.h5:/nets/k"'])
    assert s.node_ids == ("0", "1", "2") and s.response.name == "w"
    np.testing.assert_array_equal(s.response.values, v)
    np.testing.assert_array_equal(s.predictors["k"].values, v.T)
    with pytest.raises(dp.InputError, match=r"demo\.toml: w\.npy has no node labels and other "
                                            r"network files have; give \[study\] nodes"):
        load(folder, study='title = "t"', response='file = "w.npy"',
             predictor=['name = "k"\nfile = "kin.csv"'])


def test_unlabelled_file_with_node_table_must_match_its_size(folder, rng):
    np.save(folder / "w.npy", rng.normal(size=(3, 3)))
    with pytest.raises(dp.InputError, match=r"water\.npy|w\.npy: an unlabelled block must match "
                                            r"the node ids: expected 4 x 4 \(4 nodes\); got 3 x 3"):
        load(folder, response='file = "w.npy"')
    np.save(folder / "w.npy", np.arange(16.0).reshape(4, 4))
    s = load(folder, response='file = "w.npy"')
    np.testing.assert_array_equal(s.response.values, np.arange(16.0).reshape(4, 4))


def test_two_mode_with_column_table(folder):
    write_rows(folder / "events.csv", [["event", "age", "crop"], ["E1", "3", "rice"],
                                       ["E2", "7", "wheat"]])
    (folder / "att.csv").write_text("source,target\nF1,E2\nF3,E1\nF3,E2\n")
    s = load(folder,
             study=BASE["study"] + '\ncol_nodes = "events.csv"\ncol_id_column = "event"',
             response='file = "att.csv"',
             predictor=['name = "crop"\nsame = "crop"', 'name = "gap"\ngap = "age"',
                        'name = "giver"\nsender = "age"', 'name = "taker"\nreceiver = "age"',
                        'name = "sum"\npair_sum = "age"'])
    assert s.spec["study"]["two_mode"] is True
    assert s.node_ids == ("F1", "F2", "F3", "F4") and s.col_node_ids == ("E1", "E2")
    np.testing.assert_array_equal(s.response.values, [[0, 1], [0, 0], [1, 1], [0, 0]])
    assert s.response.col_labels == ("E1", "E2")
    rows, cols = s.node_ids, s.col_node_ids
    a, b = np.array([30, np.nan, 52, 41]), np.array([3.0, 7.0])
    # dyad values by the glossary's definitions, row attribute a_i and column attribute b_j
    expected = {"crop": (np.array(["wheat", "rice", "wheat", "olives"])[:, None]
                         == np.array(["rice", "wheat"])[None, :]).astype(float),
                "gap": np.abs(a[:, None] - b[None, :]),
                "giver": np.repeat(a[:, None], 2, axis=1),
                "taker": np.repeat(b[None, :], 4, axis=0),
                "sum": a[:, None] + b[None, :]}
    for name, want in expected.items():
        np.testing.assert_array_equal(s.predictors[name].dense(rows, cols), want)


def test_two_mode_flag_without_column_table(folder):
    (folder / "att.csv").write_text("source,target\nF1,E2\nF3,E1\nF3,E2\n")
    s = load(folder, study=BASE["study"] + "\ntwo_mode = true", response='file = "att.csv"',
             predictor=['name = "giver"\nsender = "age"'])
    assert s.col_node_ids == ("E2", "E1")          # first appearance among the targets
    np.testing.assert_array_equal(s.response.values, [[1, 0], [0, 0], [1, 1], [0, 0]])


# --------------------------------------------------------------------------- errors

@pytest.mark.parametrize("sections, match", [
    ({"test": 'scheme = "dps"'},
     r"^demo\.toml \[test\] scheme: must be one of y, dsp, freedman-lane; got 'dps'$"),
    ({"test": "permutaions = 10"},
     r"^demo\.toml \[test\] permutaions: unknown key; allowed keys: kind, model, scheme, "
     r"statistic, method, permutations, seed, alpha, exact, groups, dyads, jobs, chunk_size, "
     r"stop, stop_exceedances, stop_risk, ci, storage$"),
    ({"study": BASE["study"] + '\ncolour = "red"'},
     r"demo\.toml \[study\] colour: unknown key; allowed keys: title, nodes, id_column"),
    ({"response": 'file = "water.csv"\nweight = "w"'},
     r"demo\.toml \[response\] weight: unknown key; allowed keys: name, file, format, missing"),
    ({"predictor": ['name = "k"\nfile = "kin.csv"\ndelay = 1']},
     r"demo\.toml \[\[predictor\]\] #1 delay: unknown key; allowed keys: name, file, format"),
    ({"output": 'file = "a.h5"\nformat = "h5"'},
     r"demo\.toml \[output\] format: unknown key; allowed keys: file"),
    ({"study": 'nodes = "farms.csv"\nid_column = "farm"'},
     r"demo\.toml \[study\] title: is required"),
    ({"study": "title = 3"}, r"demo\.toml \[study\] title: must be a string; got 3"),
    ({"study": 'title = "  "'}, r"demo\.toml \[study\] title: must not be empty; got '  '"),
    ({"study": 'title = "t"\nnodes = "farms.csv"'},
     r"demo\.toml \[study\] id_column: is required when nodes is given"),
    ({"study": 'title = "t"\nid_column = "farm"'},
     r"demo\.toml \[study\] id_column: needs nodes \(a node table\); got 'farm'"),
    ({"study": 'title = "t"\ncol_nodes = "farms.csv"'},
     r"demo\.toml \[study\] col_id_column: is required when col_nodes is given"),
    ({"study": 'title = "t"\ncol_nodes = "farms.csv"\ncol_id_column = "farm"\ntwo_mode = false'},
     r"demo\.toml \[study\] two_mode: must be true when col_nodes is given; got False"),
    ({"study": 'title = "t"\ntwo_mode = true\ndirected = true'},
     r"demo\.toml \[study\] directed: applies to one-mode data only \(this study is "
     r"two-mode\); got True"),
    ({"study": BASE["study"] + '\ndirected = "yes"'},
     r"demo\.toml \[study\] directed: must be true or false; got 'yes'"),
    ({"response": 'name = "w"'}, r"demo\.toml \[response\] file: is required"),
    ({"response": 'file = "water.csv"\nformat = "tsv"'},
     r"demo\.toml \[response\] format: must be one of auto, edges, matrix; got 'tsv'"),
    ({"response": None}, r"demo\.toml: section \[response\] is required"),
    ({"study": None}, r"demo\.toml: section \[study\] is required"),
    ({"predictor": []}, r"demo\.toml: section \[\[predictor\]\] is required"),
    ({"predictor": ['file = "kin.csv"']}, r"demo\.toml \[\[predictor\]\] #1 name: is required"),
    ({"predictor": ['name = "k"']},
     r"demo\.toml \[\[predictor\]\] #1 \('k'\): needs exactly one of file, same, gap, sender, "
     r"receiver, pair_sum, reverse; got none"),
    ({"predictor": ['name = "k"\nfile = "kin.csv"', 'name = "c"\nsame = "crop"\ngap = "age"']},
     r"demo\.toml \[\[predictor\]\] #2 \('c'\): needs exactly one of .*; got same, gap"),
    ({"predictor": ['name = "c"\nsame = "crop"\nmissing = "NA"']},
     r"demo\.toml \[\[predictor\]\] #1 missing: applies to a network file only \(not to same\)"),
    ({"predictor": ['name = "water"\nsame = "crop"']},
     r"demo\.toml \[\[predictor\]\] #1 name: is already used by \[response\]; got 'water'"),
    ({"predictor": ['name = "c"\nsame = "crop"', 'name = "c"\ngap = "age"']},
     r"demo\.toml \[\[predictor\]\] #2 name: is already used by \[\[predictor\]\] #1; got 'c'"),
    ({"predictor": ['name = "intercept"\nsame = "crop"']},
     r"demo\.toml \[\[predictor\]\] #1 name: is reserved for the model's intercept term"),
    ({"predictor": ['name = "c"\nsame = "crop"', 'name = "r"\nreverse = "c"']},
     r"demo\.toml \[\[predictor\]\] #2 reverse: must name the response or a network predictor "
     r"\(one of water\); got 'c'"),
    ({"test": 'kind = "correlation"'},
     r"demo\.toml \[test\] kind: correlation needs exactly one \[\[predictor\]\] \(found 2\)"),
    ({"test": 'kind = "correlation"\nmodel = "linear"', "predictor": ['name = "c"\nsame = "crop"']},
     r"demo\.toml \[test\] model: applies to kind = regression only \(kind is correlation\)"),
    ({"test": 'method = "spearman"'},
     r"demo\.toml \[test\] method: applies to kind = correlation only \(kind is regression\)"),
    ({"test": 'model = "probit"'},
     r"demo\.toml \[test\] model: must be one of linear, logistic; got 'probit'"),
    ({"test": 'statistic = "z"'}, r"demo\.toml \[test\] statistic: must be one of t, coef"),
    ({"test": "permutations = 0"},
     r"demo\.toml \[test\] permutations: must be an integer >= 1; got 0"),
    ({"test": "permutations = 1.5"},
     r"demo\.toml \[test\] permutations: must be an integer >= 1; got 1\.5"),
    ({"test": "permutations = true"},
     r"demo\.toml \[test\] permutations: must be an integer >= 1; got True"),
    ({"test": "seed = -1"}, r"demo\.toml \[test\] seed: must be an integer >= 0; got -1"),
    ({"test": 'seed = "7"'}, r"demo\.toml \[test\] seed: must be an integer >= 0; got '7'"),
    ({"test": "alpha = 1"}, r"demo\.toml \[test\] alpha: must be a number with 0 < alpha < 1; "
                            r"got 1"),
    ({"test": "alpha = 0.0"}, r"demo\.toml \[test\] alpha: must be a number with 0 < alpha < 1"),
    ({"test": 'exact = "yes"'},
     r"demo\.toml \[test\] exact: must be \"auto\", true or false; got 'yes'"),
    ({"test": "jobs = 0"}, r"demo\.toml \[test\] jobs: must be an integer >= 1 or -1; got 0"),
    ({"test": "jobs = -2"}, r"demo\.toml \[test\] jobs: must be an integer >= 1 or -1; got -2"),
    ({"test": "chunk_size = 0"},
     r"demo\.toml \[test\] chunk_size: must be an integer >= 1; got 0"),
    ({"test": 'dyads = "all"'},
     r"demo\.toml \[test\] dyads: applies only with groups; got 'all'"),
    ({"test": 'groups = "district"\ndyads = "some"'},
     r"demo\.toml \[test\] dyads: must be one of within, all; got 'some'"),
    ({"study": 'title = "t"', "predictor": ['name = "k"\nfile = "kin.csv"'],
      "test": 'groups = "district"'},
     r"demo\.toml \[test\] groups: needs \[study\] nodes \(a node table\); got 'district'"),
    ({"study": 'title = "t"'},
     r"demo\.toml \[\[predictor\]\] #2 same: needs \[study\] nodes \(a node table\); got 'crop'"),
    ({"study": BASE["study"] + "\ntwo_mode = true"},
     r"demo\.toml \[\[predictor\]\] #2 same: needs \[study\] col_nodes \(the column node table\) "
     r"for two-mode data; got 'crop'"),
    ({"study": BASE["study"] + "\ntwo_mode = true",
      "predictor": ['name = "b"\nreverse = "water"']},
     r"demo\.toml \[\[predictor\]\] #1 reverse: applies to one-mode data only"),
    ({"output": "file = 5"}, r"demo\.toml \[output\] file: must be a string; got 5"),
])
def test_validation_errors(folder, sections, match):
    with pytest.raises(dp.InputError, match=match):
        load(folder, **sections)


@pytest.mark.parametrize("text, match", [
    ('[study]\ntitle = "t"\n[colour]\nx = 1\n',
     r"demo\.toml: unknown section \[colour\]; allowed sections: study, response, predictor, "
     r"test, output"),
    ('[study]\ntitle = "t"\n[response]\nfile = "water.csv"\n[predictor]\nname = "k"\n',
     r"demo\.toml \[predictor\]: write each predictor as \[\[predictor\]\]"),
    ('study = "t"\n[response]\nfile = "water.csv"\n[[predictor]]\nname = "c"\nsame = "x"\n',
     r"demo\.toml \[study\]: must be a table of keys; got str"),
    ('[study]\ntitle = "t"\nnodes = \n',
     r"demo\.toml: not valid TOML: .*\(at line 3, column 9\)"),
    ('[study]\ntitle = "t"\ntitle = "u"\n', r"demo\.toml: not valid TOML: .*line 3"),
])
def test_study_file_shape_errors(folder, text, match):
    with pytest.raises(dp.InputError, match=match):
        load(folder, text)


def test_missing_files_name_key_and_resolved_path(folder):
    with pytest.raises(dp.InputError, match=r"nope\.toml: no such study file"):
        load_study(folder / "nope.toml")
    resolved = str((folder / "data" / "w.csv").resolve())
    with pytest.raises(dp.InputError) as info:
        load(folder, response='file = "data/w.csv"')
    assert str(info.value) == (f"demo.toml [response] file: no such file {resolved}; "
                               "got 'data/w.csv'")
    with pytest.raises(dp.InputError, match=r"demo\.toml \[study\] nodes: no such file "
                                            r".*people\.csv; got 'people\.csv'"):
        load(folder, study='title = "t"\nnodes = "people.csv"\nid_column = "id"')
    with pytest.raises(dp.InputError, match=r"demo\.toml \[\[predictor\]\] #1 file: no such file "
                                            r".*k\.h5; got 'k\.h5:/a'"):
        load(folder, predictor=['name = "k"\nfile = "k.h5:/a"'])


def test_study_file_not_utf8(folder):
    (folder / "demo.toml").write_bytes(b'[study]\ntitle = "\xff"\n')
    with pytest.raises(dp.InputError, match=r"demo\.toml: not UTF-8 text"):
        load_study(folder / "demo.toml")


def test_node_table_columns_checked_for_their_use(folder):
    with pytest.raises(dp.InputError, match=r"demo\.toml \[\[predictor\]\] #1 same: no column "
                                            r"'colour' in farms\.csv; columns: crop, age, "
                                            r"district, note; got 'colour'"):
        load(folder, predictor=['name = "c"\nsame = "colour"'])
    with pytest.raises(dp.InputError, match=r"demo\.toml \[\[predictor\]\] #1 gap: gap needs "
                                            r"numbers; farms\.csv column 'crop' line 2 holds "
                                            r"'wheat'; got 'crop'"):
        load(folder, predictor=['name = "c"\ngap = "crop"'])
    with pytest.raises(dp.InputError, match=r"demo\.toml \[\[predictor\]\] #1 same: same needs a "
                                            r"value for every node; farms\.csv column 'note' "
                                            r"line 3 is empty"):
        load(folder, predictor=['name = "n"\nsame = "note"'])
    with pytest.raises(dp.InputError, match=r"demo\.toml \[test\] groups: groups needs a value "
                                            r"for every node; farms\.csv column 'age' line 3"):
        load(folder, test='groups = "age"')
    with pytest.raises(dp.InputError, match=r"farms\.csv: no id column 'id'; columns found: "
                                            r"'farm', 'crop'"):
        load(folder, study='title = "t"\nnodes = "farms.csv"\nid_column = "id"')


# --------------------------------------------------------------------------- run

class Capture:
    """Stands in for an engine entry point and records how it was called."""

    def __init__(self):
        self.calls = []

    def __call__(self, *args, **kwargs):
        self.calls.append((args, kwargs))
        return "result"


def test_run_passes_file_settings_to_regress(folder, monkeypatch):
    fake = Capture()
    monkeypatch.setattr(dp.api, "regress", fake)
    s = load(folder, test='scheme = "y"\nstatistic = "coef"\npermutations = 300\nseed = 11\n'
                          'jobs = -1\nchunk_size = 64\ngroups = "district"\ndyads = "all"\n'
                          'exact = false',
             output='file = "run.h5"')
    assert s.run() == "result"
    (args, kwargs), = fake.calls
    assert args[0] is s.response
    assert args[1] == s.predictors and list(args[1]) == list(s.predictors)
    groups = kwargs.pop("groups")
    np.testing.assert_array_equal(groups, ["north", "north", "south", "south"])
    expected = {"model": "linear", "scheme": "y", "statistic": "coef",
                "permutations": 300, "seed": 11, "jobs": -1, "directed": None,
                "dyads": "all", "exact": False, "chunk_size": 64,
                "out": folder / "run.h5", "progress": False,
                "provenance": {"study_text": s.text, "study_path": str(s.path)}}
    # every setting of the study file arrives; run() may pass further engine options
    # (where chunks run) that the study file does not hold
    assert {k: kwargs[k] for k in expected if k in kwargs} == expected


def test_run_overrides(folder, monkeypatch):
    fake = Capture()
    monkeypatch.setattr(dp.api, "regress", fake)
    s = load(folder, test="permutations = 300\nseed = 11")
    s.run(permutations=50, seed=0, jobs=2, out=str(folder / "o.h5"), progress=True,
          chunk_size=10)
    kwargs = fake.calls[0][1]
    assert (kwargs["permutations"], kwargs["seed"], kwargs["jobs"], kwargs["chunk_size"]) \
        == (50, 0, 2, 10)
    assert kwargs["out"] == folder / "o.h5" and kwargs["progress"] is True
    assert kwargs["groups"] is None and kwargs["dyads"] is None and kwargs["out"] is not None
    s.run()
    kwargs = fake.calls[1][1]
    assert (kwargs["permutations"], kwargs["seed"], kwargs["jobs"], kwargs["chunk_size"],
            kwargs["out"]) == (300, 11, -1, None, None)  # no jobs in the file: every core


@pytest.mark.parametrize("override, match", [
    ({"permutations": 0}, r"`permutations` must be an integer >= 1; got 0"),
    ({"seed": -3}, r"`seed` must be an integer >= 0; got -3"),
    ({"jobs": 0}, r"`jobs` must be an integer >= 1 or -1; got 0"),
    ({"chunk_size": 2.0}, r"`chunk_size` must be an integer >= 1; got 2\.0"),
])
def test_run_override_errors(folder, monkeypatch, override, match):
    fake = Capture()
    monkeypatch.setattr(dp.api, "regress", fake)
    s = load(folder)
    with pytest.raises(dp.InputError, match=match):
        s.run(**override)
    assert fake.calls == []


def test_run_correlation_calls_correlate(folder, monkeypatch):
    fake = Capture()
    monkeypatch.setattr(dp.api, "correlate", fake)
    s = load(folder, predictor=['name = "kinship"\nfile = "kin.csv"'],
             test='kind = "correlation"\nmethod = "spearman"\npermutations = 20')
    assert s.spec["test"]["model"] is None and s.spec["test"]["method"] == "spearman"
    s.run(seed=3)
    (args, kwargs), = fake.calls
    assert args == (s.response, s.predictors["kinship"])
    assert kwargs["method"] == "spearman" and kwargs["permutations"] == 20
    assert kwargs["seed"] == 3 and "model" not in kwargs and "scheme" not in kwargs


def test_run_end_to_end_matches_statsmodels(tmp_path, rng):
    # The engine's observed fit on a loaded study against statsmodels OLS on the vectorised
    # off-diagonal dyads (the external reference methods.md names).
    sm = pytest.importorskip("statsmodels.api")
    n = 9
    ids = [f"N{k}" for k in range(n)]
    y = rng.normal(size=(n, n))
    x = rng.normal(size=(n, n))
    age = rng.normal(size=n)
    write_rows(tmp_path / "nodes.csv", [["id", "age"]] + [[i, repr(float(a))] for i, a in zip(ids, age)])
    write_rows(tmp_path / "y.csv", [["id", *ids]] + [[i, *(repr(float(v)) for v in r)] for i, r in zip(ids, y)])
    order = rng.permutation(n)        # the predictor file lists its nodes in another order
    write_rows(tmp_path / "x.csv", [["source", "target", "weight"]]
               + [[ids[i], ids[j], repr(float(x[i, j]))] for i in order for j in order if i != j])
    (tmp_path / "s.toml").write_text(
        '[study]\ntitle = "t"\nnodes = "nodes.csv"\nid_column = "id"\ndirected = true\n'
        '[response]\nfile = "y.csv"\n[[predictor]]\nname = "x"\nfile = "x.csv"\n'
        '[[predictor]]\nname = "age_gap"\ngap = "age"\n[test]\npermutations = 19\nseed = 5\n')
    res = load_study(tmp_path / "s.toml").run()
    off = ~np.eye(n, dtype=bool)
    X = sm.add_constant(np.column_stack([x[off], np.abs(age[:, None] - age[None, :])[off]]))
    ols = sm.OLS(y[off], X).fit()
    np.testing.assert_allclose(res.coef, ols.params, rtol=1e-9)
    np.testing.assert_allclose(res.stat, ols.tvalues, rtol=1e-9)
    assert res.terms == ("intercept", "x", "age_gap") and res.permutations == 19


def test_score_statistic_only_with_logistic(tmp_path):
    """statistic = "score" is the logistic model's score test; linear studies refuse it."""
    (tmp_path / "y.csv").write_text("source,target\nA,B\nB,C\nC,A\n")
    (tmp_path / "x.csv").write_text("source,target\nA,B\nC,B\n")
    body = ('[study]\ntitle = "t"\n[response]\nfile = "y.csv"\n[[predictor]]\nname = "x"\n'
            'file = "x.csv"\n[test]\nstatistic = "score"\n')
    (tmp_path / "s.toml").write_text(body)
    with pytest.raises(dp.InputError,
                       match=r'\[test\] statistic: score applies to model = "logistic"'):
        load_study(tmp_path / "s.toml")
    (tmp_path / "s.toml").write_text(body + 'model = "logistic"\n')
    assert load_study(tmp_path / "s.toml").spec["test"]["statistic"] == "score"
