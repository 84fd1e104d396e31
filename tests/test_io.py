"""Tests of dyadperm.io: node tables, network files and their placement on a node order.

Files are written with writers from outside the project (the standard library's csv
module, numpy's np.save, h5py) and read back; networkx's bundled data sets give the
expected adjacency matrices for real networks. Label rule under test (decided in
runner/io.py): labels may hold any character, commas and quotes included, when the field is
quoted as csv.writer does; surrounding whitespace is stripped; labels must not be empty.
"""

from __future__ import annotations

import csv
import re
import tempfile
from pathlib import Path

import h5py
import networkx as nx
import numpy as np
import pytest
from hypothesis import HealthCheck, example, given, settings
from hypothesis import strategies as st

import dyadperm as dp
from dyadperm.inputs.io import (NodeTable, RawNetwork, align, collect_labels, read_network,
                         read_node_table, split_h5_path)


# --------------------------------------------------------------------------- writers

def write_rows(path: Path, rows) -> Path:
    """Write rows with the standard library's csv.writer (the external CSV reference)."""
    with open(path, "w", newline="", encoding="utf-8") as fh:
        csv.writer(fh).writerows(rows)
    return path


def write_text(path: Path, text: str) -> Path:
    path.write_text(text, encoding="utf-8")
    return path


def cell(x: float, missing: str | None = None) -> str:
    """A number as text: repr round-trips a float exactly (Python float repr, common practice)."""
    if np.isnan(x):
        return missing if missing is not None else ""
    return repr(float(x))


def write_matrix(path: Path, values: np.ndarray, rows, cols, *, missing=None) -> Path:
    body = [["id", *cols]]
    body += [[r, *(cell(v, missing) for v in values[k])] for k, r in enumerate(rows)]
    return write_rows(path, body)


def write_edges(path: Path, values: np.ndarray, rows, cols, *, skip_zero=True, missing=None,
                order=None) -> Path:
    body = [["source", "target", "weight"]]
    cells = [(i, j) for i in range(values.shape[0]) for j in range(values.shape[1])]
    if order is not None:
        cells = [cells[k] for k in order]
    for i, j in cells:
        v = values[i, j]
        if skip_zero and v == 0.0:
            continue
        body.append([rows[i], cols[j], cell(v, missing)])
    return write_rows(path, body)


def assert_same(a: np.ndarray, b: np.ndarray) -> None:
    """Equal values and equal NaN positions."""
    assert a.shape == b.shape
    np.testing.assert_array_equal(np.isnan(a), np.isnan(b))
    np.testing.assert_array_equal(a, b)


# --------------------------------------------------------------------------- node tables

def test_node_table_columns_types_and_order(tmp_path):
    p = write_text(tmp_path / "farms.csv",
                   "\ufefffarm, crop ,age,code\n"
                   "F-2 ,wheat,3.5,007\n"
                   "F-1,rice,,A1\n"
                   "\n"
                   "F-3, wheat ,-1e2,9\n")
    t = read_node_table(p, "farm")
    assert isinstance(t, NodeTable)
    assert t.ids == ("F-2", "F-1", "F-3")          # file order, whitespace stripped
    assert t.lines == (2, 3, 5)                    # blank line 4 skipped, counted
    assert list(t.columns) == ["crop", "age", "code"]   # id column not repeated
    np.testing.assert_array_equal(t.columns["crop"], ["wheat", "rice", "wheat"])
    assert t.columns["age"].dtype == np.float64
    assert_same(t.columns["age"], np.array([3.5, np.nan, -100.0]))
    assert t.columns["code"].dtype.kind == "U"     # one non-number makes a text column
    np.testing.assert_array_equal(t.columns["code"], ["007", "A1", "9"])
    assert len(t) == 3


def test_node_table_missing_marker_and_quoted_ids(tmp_path):
    p = write_rows(tmp_path / "n.csv", [["id", "x", "c"], ["a,1", "NA", "NA"],
                                        ['b "2"', "2", "u"]])
    t = read_node_table(p, "id", missing="NA")
    assert t.ids == ("a,1", 'b "2"')
    assert_same(t.columns["x"], np.array([np.nan, 2.0]))
    np.testing.assert_array_equal(t.columns["c"], ["", "u"])


@pytest.mark.parametrize("text, match", [
    ("", r"n\.csv: file is empty"),
    ("\n\n", r"n\.csv: file is empty"),
    ("id,x\n", r"n\.csv: no data rows"),
    ("node,x\na,1\n", r"n\.csv: no id column 'id'; columns found: 'node', 'x'"),
    ("id,x\na,1\nb,2\na,3\n", r"n\.csv: duplicate node id 'a' at line 2 and line 4"),
    ("id,x\na,1\nb,2,3\n", r"n\.csv line 3: expected 2 fields \(as in the header\), found 3"),
    ("id,x\na\n", r"n\.csv line 2: expected 2 fields \(as in the header\), found 1"),
    ("id,x\n,1\n", r"n\.csv line 2: empty node id"),
    ("id,x,x\na,1,2\n", r"n\.csv: duplicate column name 'x' at line 1 column 2 and line 1 column 3"),
    ("id,x\na,1\nb,inf\n", r"n\.csv line 3 column 'x': infinite value 'inf' is not data"),
])
def test_node_table_errors(tmp_path, text, match):
    p = write_text(tmp_path / "n.csv", text)
    with pytest.raises(dp.InputError, match=match):
        read_node_table(p, "id")


def test_node_table_missing_file(tmp_path):
    with pytest.raises(dp.InputError, match=r"nope\.csv: no such file"):
        read_node_table(tmp_path / "nope.csv", "id")


def test_node_table_not_utf8(tmp_path):
    p = tmp_path / "n.csv"
    p.write_bytes(b"id,x\n\xff\xfe,1\n")
    with pytest.raises(dp.InputError, match=r"n\.csv: not UTF-8 text"):
        read_node_table(p, "id")


# --------------------------------------------------------------------------- edge lists

def test_edge_list_without_weight_column(tmp_path):
    p = write_text(tmp_path / "e.csv", " Source , TARGET \na,b\nb,c\n\nc,a\n")
    r = read_network(p)
    assert isinstance(r, RawNetwork) and r.is_edges and not r.weighted
    np.testing.assert_array_equal(r.sources, ["a", "b", "c"])
    np.testing.assert_array_equal(r.targets, ["b", "c", "a"])
    np.testing.assert_array_equal(r.weights, [1.0, 1.0, 1.0])
    np.testing.assert_array_equal(r.lines, [2, 3, 5])
    assert r.weights.dtype == np.float64


def test_edge_list_weights_missing_values(tmp_path):
    p = write_text(tmp_path / "e.csv",
                   "source,target,weight\na,b,2.5\nb,c,\nc,a,NA\na,c,NaN\nb,a,-3e-2\n")
    r = read_network(p, missing="NA")
    assert r.weighted
    assert_same(r.weights, np.array([2.5, np.nan, np.nan, np.nan, -0.03]))


@pytest.mark.parametrize("text, match", [
    ("source,target,weight\na,b,x1\n",
     r"e\.csv line 2 column 3 \(weight\): expected a number; found 'x1'"),
    ("source,target,weight\na,b,1\nb,c,NA\n",
     r"e\.csv line 3 column 3 \(weight\): expected a number; found 'NA'"),
    ("source,target,weight\na,b,-inf\n",
     r"e\.csv line 2 column 3 \(weight\): infinite value '-inf' is not data"),
    ("source,target,weight\na,b,1\nb,c\n",
     r"e\.csv line 3: expected 3 fields \(as in the header\), found 2"),
    ("source,target\na,b,1\n", r"e\.csv line 2: expected 2 fields \(as in the header\), found 3"),
    ("source,target\n,b\n", r"e\.csv line 2 column 1 \(source\): empty node label"),
    ("source,target\na, \n", r"e\.csv line 2 column 2 \(target\): empty node label"),
    ("source,target,weight\n", r"e\.csv: no data rows after the header \(line 1\)"),
    ("", r"e\.csv: file is empty"),
])
def test_edge_list_errors(tmp_path, text, match):
    p = write_text(tmp_path / "e.csv", text)
    with pytest.raises(dp.InputError, match=match):
        read_network(p)


def test_number_like_missing_marker(tmp_path):
    # a marker that reads as a number must still mean "missing", in matrices and edge lists
    m = write_text(tmp_path / "m.csv", "id,a,b\na,-99,1\nb,2,-99\n")
    assert_same(read_network(m, missing=" -99 ").values, np.array([[np.nan, 1], [2, np.nan]]))
    e = write_text(tmp_path / "e.csv", "source,target,weight\na,b,-99\nb,a,3\n")
    assert_same(read_network(e, missing="-99").weights, np.array([np.nan, 3.0]))
    n = write_text(tmp_path / "n.csv", "id,x\na,-99\nb,4\n")
    assert_same(read_node_table(n, "id", missing="-99").columns["x"], np.array([np.nan, 4.0]))
    with pytest.raises(dp.InputError, match=r"missing-value marker must be a string; got -99"):
        read_network(m, missing=-99)


def test_non_number_message_names_the_marker(tmp_path):
    p = write_text(tmp_path / "e.csv", "source,target,weight\na,b,n/a\n")
    with pytest.raises(dp.InputError, match=r"found 'n/a' \(missing-value marker is 'NA'\)"):
        read_network(p, missing="NA")


def test_forced_formats(tmp_path):
    edges = write_text(tmp_path / "e.csv", "source,target\na,7\n")
    assert read_network(edges).is_edges                  # auto: the header decides
    as_matrix = read_network(edges, fmt="matrix")       # header read as id column + one label
    assert not as_matrix.is_edges and as_matrix.col_labels == ("target",)
    assert as_matrix.row_labels == ("a",)
    np.testing.assert_array_equal(as_matrix.values, [[7.0]])
    with pytest.raises(dp.InputError, match=r"x\.csv line 2 column 2 \('target'\): expected a "
                                            r"number; found 'b'"):
        read_network(write_text(tmp_path / "x.csv", "id,target\na,b\n"))
    mat = write_text(tmp_path / "m.csv", "from,to\na,1\n")
    with pytest.raises(dp.InputError, match=r"m\.csv line 1: an edge list needs the header "
                                            r"source,target or source,target,weight; found 'from,to'"):
        read_network(mat, fmt="edges")
    with pytest.raises(dp.InputError, match=r"format must be one of auto, edges, matrix; got 'tsv'"):
        read_network(mat, fmt="tsv")


# --------------------------------------------------------------------------- matrix CSV

def test_matrix_square_and_rectangular(tmp_path):
    p = write_text(tmp_path / "m.csv", ",b,a,c\na,1,,3\nc,4,NA,nan\n")
    r = read_network(p, missing="NA")
    assert not r.is_edges and r.labelled
    assert r.row_labels == ("a", "c") and r.col_labels == ("b", "a", "c")
    assert_same(r.values, np.array([[1.0, np.nan, 3.0], [4.0, np.nan, np.nan]]))
    np.testing.assert_array_equal(r.row_lines, [2, 3])


@pytest.mark.parametrize("text, match", [
    ("id,a,b\na,1,x\nb,2,3\n", r"m\.csv line 2 column 3 \('b'\): expected a number; found 'x'"),
    ("id,a,b\na,1,2\nb,Inf,3\n", r"m\.csv line 3 column 2 \('a'\): infinite value 'Inf' is not data"),
    ("id,a,b\na,1,2\nb,3\n", r"m\.csv line 3: expected 3 fields \(as in the header\), found 2"),
    ("id,a,b\na,1,2\na,3,4\n", r"m\.csv: duplicate row label 'a' at line 2 and line 3"),
    ("id,a,a\na,1,2\n", r"m\.csv: duplicate column label 'a' at line 1 column 2 and line 1 column 3"),
    ("id,a,\na,1,2\n", r"m\.csv line 1 column 3: empty column label"),
    ("id,a\n,1\n", r"m\.csv line 2: empty row label"),
    ("id\na\n", r"m\.csv line 1: a matrix header needs the id-column name and at least one"),
    ("id,a,b\n", r"m\.csv: no data rows after the header \(line 1\)"),
])
def test_matrix_errors(tmp_path, text, match):
    p = write_text(tmp_path / "m.csv", text)
    with pytest.raises(dp.InputError, match=match):
        read_network(p)


def test_missing_network_file(tmp_path):
    with pytest.raises(dp.InputError, match=r"gone\.csv: no such file"):
        read_network(tmp_path / "gone.csv")
    with pytest.raises(dp.InputError, match=r"gone\.npy: no such file"):
        read_network(tmp_path / "gone.npy")
    with pytest.raises(dp.InputError, match=r"gone\.h5:/w: no such file"):
        read_network(f"{tmp_path / 'gone.h5'}:/w")


def test_numpy_savetxt_nan_is_missing(tmp_path):
    # np.savetxt (numpy, outside the project) writes NaN as "nan": read as missing.
    v = np.array([[0.0, np.nan], [2.5, 0.0]])
    p = tmp_path / "m.csv"
    with open(p, "w") as fh:
        fh.write("id,a,b\n")
        for lab, row in zip("ab", v):
            fh.write(lab + ",")
            np.savetxt(fh, row[None, :], delimiter=",", fmt="%.17g")
    assert_same(read_network(p).values, v)


# --------------------------------------------------------------------------- .npy / HDF5

def test_npy_round_trip_and_dtype(tmp_path, rng):
    v = rng.normal(size=(4, 4))
    v[1, 2] = np.nan
    np.save(tmp_path / "w.npy", v)                          # numpy's own writer
    r = read_network(tmp_path / "w.npy")
    assert not r.labelled and r.row_labels is None and r.col_labels is None
    assert_same(r.values, v)
    np.save(tmp_path / "i.npy", np.arange(6, dtype=np.int32).reshape(2, 3))
    r = read_network(tmp_path / "i.npy")
    assert r.values.dtype == np.float64
    np.testing.assert_array_equal(r.values, [[0, 1, 2], [3, 4, 5]])


def test_npy_never_unpickles(tmp_path):
    # An object array can only be stored as a pickle; reading it must be refused.
    arr = np.empty((2, 2), dtype=object)
    np.save(tmp_path / "o.npy", arr, allow_pickle=True)
    with pytest.raises(dp.InputError, match=r"o\.npy: cannot read as a \.npy array without pickles"):
        read_network(tmp_path / "o.npy")


@pytest.mark.parametrize("arr, match", [
    (np.zeros(3), r"a\.npy: a network must be a 2-d array; got 1 dimension\(s\) with shape \(3,\)"),
    (np.zeros((2, 2, 2)), r"a\.npy: a network must be a 2-d array; got 3 dimension"),
    (np.array([["a", "b"]]), r"a\.npy: a network must hold numbers; got dtype <U1"),
    (np.zeros((0, 3)), r"a\.npy: empty array of shape \(0, 3\)"),
    (np.array([[0.0, 1.0], [np.inf, 0.0]]),
     r"a\.npy: infinite value at row 1, column 0 \(0-based\) is not data"),
])
def test_npy_errors(tmp_path, arr, match):
    np.save(tmp_path / "a.npy", arr)
    with pytest.raises(dp.InputError, match=match):
        read_network(tmp_path / "a.npy")


def test_npy_corrupt_and_format(tmp_path):
    (tmp_path / "c.npy").write_bytes(b"not an npy file")
    with pytest.raises(dp.InputError, match=r"c\.npy: cannot read"):
        read_network(tmp_path / "c.npy")
    np.save(tmp_path / "a.npy", np.zeros((2, 2)))
    with pytest.raises(dp.InputError, match=r"a\.npy: format 'edges' applies to CSV files only"):
        read_network(tmp_path / "a.npy", fmt="edges")


def test_h5_round_trip(tmp_path, rng):
    v = rng.normal(size=(3, 5))
    v[0, 4] = np.nan
    with h5py.File(tmp_path / "d.h5", "w") as fh:            # h5py's own writer
        fh.create_dataset("nets/water", data=v)
        fh.create_dataset("labels", data=np.array([b"a", b"b"]))
        fh.create_dataset("flat", data=np.zeros(3))
    r = read_network(f"{tmp_path / 'd.h5'}:/nets/water")
    assert not r.labelled
    assert_same(r.values, v)
    assert r.name == "d.h5:/nets/water"


@pytest.mark.parametrize("dataset, match", [
    ("/nets/gone", r"d\.h5:/nets/gone: no dataset '/nets/gone' in .*d\.h5; datasets found: "
                   r"/flat, /labels, /nets/water"),
    ("/nets", r"not a dataset: '/nets'"),
    ("/labels", r"d\.h5:/labels: a network must hold numbers; got dtype \|S1"),
    ("/flat", r"d\.h5:/flat: a network must be a 2-d array; got 1 dimension"),
    ("", r"d\.h5: name the dataset as .*d\.h5:/path/in/file"),
])
def test_h5_errors(tmp_path, dataset, match):
    with h5py.File(tmp_path / "d.h5", "w") as fh:
        fh.create_dataset("nets/water", data=np.zeros((2, 2)))
        fh.create_dataset("labels", data=np.array([b"a", b"b"]))
        fh.create_dataset("flat", data=np.zeros(3))
    where = f"{tmp_path / 'd.h5'}" + (f":{dataset}" if dataset else "")
    with pytest.raises(dp.InputError, match=match):
        read_network(where)


def test_h5_not_hdf5(tmp_path):
    (tmp_path / "x.h5").write_bytes(b"plain text")
    with pytest.raises(dp.InputError, match=r"x\.h5:/w: cannot open as HDF5"):
        read_network(f"{tmp_path / 'x.h5'}:/w")


def test_split_h5_path():
    assert split_h5_path("dir/a.h5:/x/y") == ("dir/a.h5", "/x/y")
    assert split_h5_path("a.HDF5") == ("a.HDF5", "")
    assert split_h5_path("water.csv") is None
    assert split_h5_path("w.npy") is None


# --------------------------------------------------------------------------- align

def edges(tmp_path, text, name="water.csv"):
    return read_network(write_text(tmp_path / name, text))


def test_align_unknown_label_message(tmp_path):
    r = edges(tmp_path, "source,target\n" + "".join(
        f"F-{k},F-{k + 1}\n" for k in range(15)) + "F-1,F-77\n")
    ids = [f"F-{k}" for k in range(17)]
    with pytest.raises(dp.InputError,
                       match=r"^water\.csv line 17: unknown node label 'F-77' \(not in farms\.csv\)$"):
        align(r, ids, source="water.csv", row_ids_source="farms.csv")
    with pytest.raises(dp.InputError, match=r"unknown node label 'F-77' \(not among the node ids\)"):
        align(r, ids)


def test_align_matrix_unknown_labels(tmp_path):
    r = read_network(write_text(tmp_path / "k.csv", "id,a,zz\na,0,1\nb,1,0\n"))
    with pytest.raises(dp.InputError,
                       match=r"k\.csv line 1 column 3: unknown node label 'zz' \(not in farms\.csv\)"):
        align(r, ["a", "b"], row_ids_source="farms.csv")
    r = read_network(write_text(tmp_path / "k.csv", "id,a,b\na,0,1\nq,1,0\n"))
    with pytest.raises(dp.InputError, match=r"k\.csv line 3: unknown node label 'q'"):
        align(r, ["a", "b"])
    r = read_network(write_text(tmp_path / "t.csv", "id,x,y\na,0,1\n"))
    with pytest.raises(dp.InputError,
                       match=r"t\.csv line 1 column 3: unknown node label 'y' \(not in ev\.csv\)"):
        align(r, ["a"], ["x"], col_ids_source="ev.csv")


def test_align_edges_places_by_label_and_absent_nodes_are_no_tie(tmp_path):
    r = edges(tmp_path, "source,target,weight\nb,a,2\nc,b,\n")
    v, notes = align(r, ["a", "b", "c", "d"], directed=True)
    expected = np.zeros((4, 4))
    expected[1, 0], expected[2, 1] = 2.0, np.nan
    assert_same(v, expected)
    assert notes == []


def test_align_duplicate_edge_names_both_lines(tmp_path):
    r = edges(tmp_path, "source,target\na,b\nb,c\n\na,b\n")
    with pytest.raises(dp.InputError, match=r"water\.csv: duplicate edge 'a' -> 'b' at lines 2 and 5 "
                                            r"\(aggregate repeated ties before reading\)"):
        align(r, ["a", "b", "c"])


def test_align_undirected_fills_both_cells(tmp_path):
    r = edges(tmp_path, "source,target,weight\na,b,2\nc,b,\nb,a,2\n")
    v, notes = align(r, ["a", "b", "c"], directed=False)
    expected = np.array([[0, 2, 0], [2, 0, np.nan], [0, np.nan, 0]], dtype=float)
    assert_same(v, expected)
    assert notes == []


def test_align_undirected_conflict_names_both_lines(tmp_path):
    r = edges(tmp_path, "source,target,weight\na,b,2\nb,c,1\nb,a,3\n")
    with pytest.raises(dp.InputError, match=r"water\.csv: directed = false but 'a' -> 'b' has 2\.0 "
                                            r"\(line 2\) and 'b' -> 'a' has 3\.0 \(line 4\)"):
        align(r, ["a", "b", "c"], directed=False)
    r = edges(tmp_path, "source,target,weight\na,b,\nb,a,1\n")      # missing vs 1: differ
    with pytest.raises(dp.InputError, match=r"'a' -> 'b' has nan \(line 2\)"):
        align(r, ["a", "b"], directed=False)
    # the same tie listed both ways, directed: both cells, no error
    r = edges(tmp_path, "source,target,weight\na,b,2\nb,a,3\n")
    v, _ = align(r, ["a", "b"], directed=True)
    np.testing.assert_array_equal(v, [[0, 2], [3, 0]])


def test_align_self_loops_ignored_with_note(tmp_path):
    r = edges(tmp_path, "source,target,weight\na,a,5\na,b,1\nb,b,7\nb,a,1\n")
    v, notes = align(r, ["a", "b"])
    np.testing.assert_array_equal(v, [[0, 1], [1, 0]])
    assert notes == ["water.csv: 2 self-loop(s) ignored (line 2, 4)"]
    # two-mode: equal labels on both sides are different nodes, not a loop
    v, notes = align(r, ["a", "b"], ["a", "b"])
    np.testing.assert_array_equal(v, [[5, 1], [1, 7]])
    assert notes == []


def test_align_note_when_no_tie_is_reciprocated(tmp_path):
    r = edges(tmp_path, "source,target\na,b\nb,c\n")
    _, notes = align(r, ["a", "b", "c"])
    assert len(notes) == 1 and re.search(r"no tie appears in both directions.*directed = false",
                                         notes[0])
    _, notes = align(r, ["a", "b", "c"], directed=True)   # stated: nothing to say
    assert notes == []


def test_align_two_mode_edges_and_directed_false_refused(tmp_path):
    r = edges(tmp_path, "source,target\nw1,e2\nw2,e1\nw2,e2\n")
    v, _ = align(r, ["w1", "w2"], ["e1", "e2", "e3"])
    np.testing.assert_array_equal(v, [[0, 1, 0], [1, 1, 0]])
    with pytest.raises(dp.InputError, match=r"water\.csv: directed = false applies to one-mode "
                                            r"data only"):
        align(r, ["w1", "w2"], ["e1", "e2", "e3"], directed=False)


def test_align_matrix_shuffled_order_diagonal_and_notes(tmp_path, rng):
    v = rng.normal(size=(3, 3))
    write_matrix(tmp_path / "k.csv", v, ["a", "b", "c"], ["a", "b", "c"])
    r = read_network(tmp_path / "k.csv")
    order = ["c", "d", "a", "b"]
    out, notes = align(r, order)
    expected = np.zeros((4, 4))
    expected[np.ix_([2, 3, 0], [2, 3, 0])] = v    # a, b, c sit at positions 2, 3, 0
    np.testing.assert_array_equal(out, expected)
    assert out[2, 2] == v[0, 0]                    # diagonal left as read
    assert notes == ["k.csv: 1 node(s) have no row or column in the file and are taken as "
                     "no tie: 'd'"]


def test_align_matrix_header_differs_from_rows(tmp_path):
    # rows a, b; columns b, c: not an error at read time nor for one-mode alignment
    r = read_network(write_text(tmp_path / "k.csv", "id,b,c\na,1,2\nb,0,3\n"))
    out, notes = align(r, ["a", "b", "c"])
    np.testing.assert_array_equal(out, [[0, 1, 2], [0, 0, 3], [0, 0, 0]])
    assert notes == ["k.csv: 1 node(s) have no row in the file and are taken as no tie: 'c'",
                     "k.csv: 1 node(s) have no column in the file and are taken as no tie: 'a'"]


def test_align_dense_undirected_must_be_symmetric(tmp_path):
    r = read_network(write_text(tmp_path / "k.csv", "id,a,b,c\na,9,1,2\nb,1,8,3\nc,2,4,7\n"))
    with pytest.raises(dp.InputError, match=r"k\.csv: directed = false but the block is not "
                                            r"symmetric: value 3\.0 at \('b', 'c'\) and 4\.0 at "
                                            r"\('c', 'b'\)"):
        align(r, ["a", "b", "c"], directed=False)
    np.save(tmp_path / "k.npy", np.array([[0.0, 1.0], [np.nan, 0.0]]))
    with pytest.raises(dp.InputError, match=r"value 1\.0 at \(row 0, column 1\) and nan at "
                                            r"\(row 1, column 0\)"):
        align(read_network(tmp_path / "k.npy"), ["a", "b"], directed=False)
    # symmetric with a matching NaN pair and an odd diagonal: accepted as read
    np.save(tmp_path / "s.npy", np.array([[5.0, np.nan], [np.nan, 6.0]]))
    out, _ = align(read_network(tmp_path / "s.npy"), ["a", "b"], directed=False)
    assert_same(out, np.array([[5.0, np.nan], [np.nan, 6.0]]))


def test_align_unlabelled_block_size(tmp_path):
    np.save(tmp_path / "w.npy", np.zeros((3, 3)))
    r = read_network(tmp_path / "w.npy")
    with pytest.raises(dp.InputError, match=r"w\.npy: an unlabelled block must match the node "
                                            r"ids: expected 4 x 4 \(4 nodes\); got 3 x 3"):
        align(r, list("abcd"))
    with pytest.raises(dp.InputError, match=r"expected 3 x 2 \(3 row nodes, 2 column nodes\); "
                                            r"got 3 x 3"):
        align(r, list("abc"), list("xy"))
    out, notes = align(r, list("abc"))
    assert out.shape == (3, 3) and notes == []


def test_collect_labels_first_appearance(tmp_path):
    e = edges(tmp_path, "source,target\nc,a\na,d\nb,c\n")
    m = read_network(write_text(tmp_path / "m.csv", "id,z,a\ny,1,2\nc,3,4\n"))
    np.save(tmp_path / "u.npy", np.zeros((2, 2)))
    u = read_network(tmp_path / "u.npy")
    assert collect_labels([e, u, m]) == ("c", "a", "d", "b", "y", "z")
    assert collect_labels([m, e]) == ("y", "c", "z", "a", "d", "b")
    assert collect_labels([e, m], axis="rows") == ("c", "a", "b", "y")
    assert collect_labels([e, m], axis="cols") == ("a", "d", "c", "z")
    assert collect_labels([u]) == ()
    with pytest.raises(dp.InputError, match=r"axis must be one of both, rows, cols; got 'x'"):
        collect_labels([e], axis="x")


# --------------------------------------------------------------------------- round trips

@pytest.mark.parametrize("n, m", [(1, 1), (2, 2), (5, 5), (4, 6), (1, 3)])
def test_round_trip_matrix_and_edge_list_in_shuffled_order(tmp_path, rng, n, m):
    v = rng.normal(size=(n, m))
    v[rng.random((n, m)) < 0.3] = np.nan
    v[rng.random((n, m)) < 0.3] = 0.0
    two_mode = n != m
    rows = [f"r{k}" for k in range(n)]
    cols = [f"c{k}" for k in range(m)] if two_mode else rows
    if not two_mode:
        np.fill_diagonal(v, 0.0)                 # edge lists drop self-loops
    write_matrix(tmp_path / "m.csv", v, rows, cols)
    write_edges(tmp_path / "e.csv", v, rows, cols, order=rng.permutation(n * m))
    pr, pc = rng.permutation(n), rng.permutation(m)
    ids_r = [rows[k] for k in pr]
    ids_c = [cols[k] for k in pc] if two_mode else None
    expected = v[np.ix_(pr, pc if two_mode else pr)]     # numpy fancy indexing as reference
    # a 1 x 1 one-mode network has no dyad, so its edge list would be empty (an error)
    for name in ("m.csv", "e.csv") if (n, m) != (1, 1) else ("m.csv",):
        out, _ = align(read_network(tmp_path / name), ids_r, ids_c)
        assert_same(out, expected)


def test_karate_club_edge_list_matches_networkx(tmp_path):
    # networkx's bundled karate_club_graph (34 nodes, 78 weighted undirected edges) and its
    # to_numpy_array are the reference.
    G = nx.karate_club_graph()
    write_rows(tmp_path / "k.csv", [["source", "target", "weight"]]
               + [[f"m{u}", f"m{v}", d["weight"]] for u, v, d in G.edges(data=True)])
    ids = [f"m{u}" for u in G.nodes()]
    out, notes = align(read_network(tmp_path / "k.csv"), ids, directed=False)
    np.testing.assert_array_equal(out, nx.to_numpy_array(G, nodelist=list(G.nodes()),
                                                         weight="weight"))
    assert notes == []
    assert collect_labels([read_network(tmp_path / "k.csv")]) == tuple(
        dict.fromkeys(f"m{x}" for e in G.edges() for x in e))


def test_davis_two_mode_edge_list_matches_networkx(tmp_path):
    # networkx's bundled davis_southern_women_graph (18 x 14 two-mode) and
    # bipartite.biadjacency_matrix are the reference.
    G = nx.davis_southern_women_graph()
    top, bottom = G.graph["top"], G.graph["bottom"]
    write_rows(tmp_path / "d.csv", [["Source", "Target"]]
               + [[u, v] if u in top else [v, u] for u, v in G.edges()])
    out, _ = align(read_network(tmp_path / "d.csv"), top, bottom)
    ref = nx.bipartite.biadjacency_matrix(G, row_order=top, column_order=bottom).toarray()
    np.testing.assert_array_equal(out, ref)


# --------------------------------------------------------------------------- properties

# Labels: any printable text (commas, quotes and spaces inside included) that is non-empty
# after stripping; control characters and lone surrogates are excluded (not label material).
labels_st = st.text(st.characters(blacklist_categories=("Cs", "Cc", "Zl", "Zp")),
                    min_size=1, max_size=8).map(str.strip).filter(bool)


@st.composite
def networks(draw, *, two_mode=None):
    n = draw(st.integers(1, 5))
    tm = draw(st.booleans()) if two_mode is None else two_mode
    m = draw(st.integers(1, 5)) if tm else n
    rows = draw(st.lists(labels_st, min_size=n, max_size=n, unique=True))
    cols = draw(st.lists(labels_st, min_size=m, max_size=m, unique=True)) if tm else rows
    finite = st.floats(allow_nan=False, allow_infinity=False, width=64)
    vals = draw(st.lists(finite, min_size=n * m, max_size=n * m))
    nan_mask = draw(st.lists(st.booleans(), min_size=n * m, max_size=n * m))
    v = np.array(vals, dtype=np.float64).reshape(n, m)
    v[np.array(nan_mask).reshape(n, m)] = np.nan
    marker = draw(st.sampled_from([None, "NA", "-", "missing"]))
    return v, rows, cols, tm, marker


_FAST = settings(max_examples=60, deadline=None,
                 suppress_health_check=[HealthCheck.too_slow])


@_FAST
@given(networks())
@example((np.array([[np.nan]]), ["a"], ["a"], False, None))                 # 1 x 1, missing
@example((np.array([[0.0, -1.5], [2.0, np.nan]]), ['x,"1"', "y"], ['x,"1"', "y"],
          False, "NA"))                                                      # 2 x 2, quoted
@example((np.array([[1.0, np.nan, 3.0]]), ["r"], ["r", "c 2", "c,3"], True, "-"))  # 1 x 3
def test_property_matrix_csv_round_trip(net):
    v, rows, cols, tm, marker = net
    with tempfile.TemporaryDirectory() as d:
        p = write_matrix(Path(d) / "m.csv", v, rows, cols, missing=marker)
        r = read_network(p, missing=marker, fmt="matrix")
        assert r.row_labels == tuple(rows) and r.col_labels == tuple(cols)
        assert_same(r.values, v)
        out, _ = align(r, rows, cols if tm else None)
        assert_same(out, v)


@_FAST
@given(networks(), st.randoms(use_true_random=False))
def test_property_edge_list_round_trip(net, rnd):
    v, rows, cols, tm, marker = net
    if not tm:
        np.fill_diagonal(v, 0.0)             # self-loops are ignored by design
    order = list(range(v.size))
    rnd.shuffle(order)
    with tempfile.TemporaryDirectory() as d:
        p = write_edges(Path(d) / "e.csv", v, rows, cols, missing=marker, order=order)
        text = p.read_text(encoding="utf-8")
        if text.count("\n") == 1:            # nothing but zeros: a header-only file
            with pytest.raises(dp.InputError, match=r"no data rows"):
                read_network(p, missing=marker)
            return
        r = read_network(p, missing=marker)
        assert r.is_edges
        shuffled_r = list(rows)
        rnd.shuffle(shuffled_r)
        shuffled_c = list(cols)
        rnd.shuffle(shuffled_c)
        out, _ = align(r, shuffled_r, shuffled_c if tm else None, directed=True)
        ri = [rows.index(x) for x in shuffled_r]
        ci = [cols.index(x) for x in shuffled_c] if tm else ri
        assert_same(out, v[np.ix_(ri, ci)])


@_FAST
@given(networks())
def test_property_npy_and_h5_round_trip(net):
    v = net[0]
    with tempfile.TemporaryDirectory() as d:
        np.save(Path(d) / "a.npy", v)
        assert_same(read_network(Path(d) / "a.npy").values, v)
        with h5py.File(Path(d) / "a.h5", "w") as fh:
            fh["g/v"] = v
        assert_same(read_network(f"{Path(d) / 'a.h5'}:/g/v").values, v)
