"""A battery of bad inputs through the command line and the Python API.

Every case must end with exit code 2, a single line on stderr naming what is wrong (the
file, row/column or setting), and no traceback; through the API the same input raises a
typed dyadperm error. Each case changes one thing in a small valid study.
"""

from pathlib import Path

import numpy as np
import pytest

import dyadperm as dp
from dyadperm import cli

NODES = ["A", "B", "C", "D", "E", "F", "G"]


def _matrix_csv(path: Path, labels, values) -> None:
    rows = ["id," + ",".join(labels)]
    for lab, row in zip(labels, values):
        rows.append(lab + "," + ",".join(f"{v:g}" for v in row))
    path.write_text("\n".join(rows) + "\n")


@pytest.fixture
def study(tmp_path):
    """A valid study; returns a function writing it with edits applied."""
    rng = np.random.default_rng(1)
    n = len(NODES)
    (tmp_path / "nodes.csv").write_text(
        "id,team,age,city\n" + "".join(f"{lab},{i % 2},{30 + 3 * i},c{i % 3}\n"
                                       for i, lab in enumerate(NODES)))
    _matrix_csv(tmp_path / "x.csv", NODES, rng.integers(0, 5, size=(n, n)))
    edges = [(a, b, int(rng.integers(1, 9))) for i, a in enumerate(NODES)
             for j, b in enumerate(NODES) if i != j and rng.random() < 0.5]
    (tmp_path / "y.csv").write_text("source,target,weight\n" +
                                    "".join(f"{a},{b},{w}\n" for a, b, w in edges))
    base = {
        "study": 'title = "bad input battery"\nnodes = "nodes.csv"\nid_column = "id"',
        "response": 'file = "y.csv"',
        "predictor": 'name = "x"\nfile = "x.csv"',
        "predictor2": 'name = "age_gap"\ngap = "age"',
        "test": 'scheme = "dsp"\npermutations = 20\nseed = 1',
    }

    def write(**edits):
        parts = {**base, **edits}
        text = ""
        for key, body in parts.items():
            if body is None:
                continue
            head = "[[predictor]]" if key.startswith("predictor") else f"[{key}]"
            text += f"{head}\n{body}\n\n"
        path = tmp_path / "study.toml"
        path.write_text(text)
        return path

    write.dir = tmp_path
    return write


def _run_cli(args, capsys):
    """Exit code and stderr of `dyadperm ARGS` run in this process (0 on a normal return)."""
    import sys
    old = sys.argv
    sys.argv = ["dyadperm", *map(str, args)]
    code = 0
    try:
        cli.main()
    except SystemExit as exc:
        code = exc.code
    finally:
        sys.argv = old
    err = capsys.readouterr().err
    return code, err


def _check_bad(args, capsys, match):
    code, err = _run_cli(args, capsys)
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert code == 2, err
    assert "Traceback" not in err
    assert len(lines) == 1, err
    assert lines[0].startswith("dyadperm: error: ")
    import re
    assert re.search(match, lines[0]), lines[0]


def test_valid_study_runs(study, capsys):
    path = study()
    import sys
    old = sys.argv
    sys.argv = ["dyadperm", "run", str(path), "--quiet"]
    try:
        cli.main()  # returns normally on success
    finally:
        sys.argv = old
    assert "age_gap" in capsys.readouterr().out


def _file_case(name, content):
    def make(study):
        (study.dir / name).write_text(content)
        return study()
    return make


CASES = {
    # reader errors, each naming file and line/column
    "non-square matrix": (lambda s: _npy_case(s, np.ones((7, 6))), r"x\.npy.*7 x 6"),
    "unknown node label": (_file_case("y.csv", "source,target,weight\nA,B,1\nA,ZZ,2\n"),
                           r"y\.csv line 3: unknown node label 'ZZ'"),
    "text in a number cell": (_file_case("y.csv", "source,target,weight\nA,B,lots\n"),
                              r"y\.csv.*line 2.*'lots'"),
    "ragged rows": (_file_case("x.csv", "id,A,B,C\nA,1,2,3\nB,1,2\nC,1,2,3\n"),
                    r"x\.csv line 3: expected 4 fields \(as in the header\), found 3"),
    "empty file": (_file_case("y.csv", ""), r"y\.csv: file is empty \(expected a header row\)"),
    "infinite value": (_file_case("y.csv", "source,target,weight\nA,B,inf\n"),
                       r"y\.csv line 2 column 3 \(weight\): infinite value 'inf' is not data"),
    "duplicate edge": (_file_case("y.csv", "source,target,weight\nA,B,1\nC,D,1\nA,B,2\n"),
                       r"y\.csv: duplicate edge 'A' -> 'B' at lines 2 and 4"),
    "duplicate node id": (_file_case("nodes.csv", "id,team,age,city\nA,0,1,x\nA,1,2,y\n"),
                          r"nodes\.csv: duplicate node id 'A' at line 2 and line 3"),
    "node table without id column": (_file_case("nodes.csv", "name,team\nA,0\n"),
                                     r"nodes\.csv: no id column 'id'; columns found"),
    # study-file errors, each naming section and key
    "unknown study key": (lambda s: s(test='scheme = "dsp"\npermutations = 20\ncolour = 1'),
                          r"\[test\].*colour"),
    "unknown section": (lambda s: s(extra="a = 1"), r"study\.toml: unknown section \[extra\]"),
    "invalid TOML": (lambda s: s(test='scheme = "dsp'), r"study\.toml: not valid TOML"),
    "missing title": (lambda s: s(study='nodes = "nodes.csv"\nid_column = "id"'),
                      r"study\.toml \[study\] title: is required"),
    "missing network file": (lambda s: s(response='file = "nothere.csv"'),
                             r"\[response\] file: no such file .*nothere\.csv"),
    "unknown scheme": (lambda s: s(test='scheme = "dps"\npermutations = 20'),
                       r"\[test\] scheme: must be one of y, dsp, freedman-lane; got 'dps'"),
    "negative permutation count": (lambda s: s(test='permutations = -5'),
                                   r"\[test\] permutations: must be an integer >= 1; got -5"),
    "alpha out of range": (lambda s: s(test='alpha = 1.5'),
                           r"\[test\] alpha: must be a number with 0 < alpha < 1; got 1\.5"),
    "exact not a choice": (lambda s: s(test='exact = "sometimes"'),
                           r"\[test\] exact: must be \"auto\", true or false; got 'sometimes'"),
    "jobs zero": (lambda s: s(test='jobs = 0'),
                  r"\[test\] jobs: must be an integer >= 1 or -1; got 0"),
    "attribute column missing": (lambda s: s(predictor2='name = "g"\ngap = "height"'),
                                 r"#2 gap: no column 'height' in nodes\.csv"),
    "gap of a text column": (lambda s: s(predictor2='name = "g"\ngap = "city"'),
                             r"gap needs numbers; nodes\.csv column 'city' line 2 holds 'c0'"),
    "reverse of an unknown network": (lambda s: s(predictor2='name = "back"\nreverse = "nope"'),
                                      r"#2 reverse: must name the response or a network "
                                      r"predictor \(one of x, y\); got 'nope'"),
    "duplicate predictor names": (lambda s: s(predictor2='name = "x"\ngap = "age"'),
                                  r"#2 name: is already used by \[\[predictor\]\] #1; got 'x'"),
    "groups column missing": (lambda s: s(test='groups = "club"'),
                              r"\[test\] groups: no column 'club' in nodes\.csv"),
    "dyads without groups": (lambda s: s(test='dyads = "within"'),
                             r"\[test\] dyads: applies only with groups; got 'within'"),
    "two sources for a predictor": (lambda s: s(predictor2='name = "g"\ngap = "age"\nsame = "team"'),
                                    r"#2 \('g'\): needs exactly one of file, same, gap, "
                                    r"sender, receiver, pair_sum, reverse; got same, gap"),
    # data that cannot be modelled
    "constant predictor": (lambda s: _const_case(s),
                           r"predictor 'flat' is constant over the dyad set"),
    "perfectly collinear predictors": (lambda s: _collinear_case(s),
                                       r"predictor 'twice' is perfectly collinear with 'x' "
                                       r"over the dyad set: condition number"),
    "response with no variation": (_file_case("y.csv", "source,target,weight\n" + "".join(
        f"{a},{b},1\n" for a in NODES for b in NODES if a != b)),
        r"response 'y' has no variation over the dyad set"),
}


def _npy_case(s, arr):
    np.save(s.dir / "x.npy", arr)
    return s(predictor='name = "x"\nfile = "x.npy"')


def _const_case(s):
    _matrix_csv(s.dir / "flat.csv", NODES, np.full((7, 7), 3.0))
    return s(predictor2='name = "flat"\nfile = "flat.csv"')


def _collinear_case(s):
    text = (s.dir / "x.csv").read_text().splitlines()
    rows = [text[0]]
    for line in text[1:]:
        lab, *vals = line.split(",")
        rows.append(lab + "," + ",".join(str(2 * float(v)) for v in vals))
    (s.dir / "twice.csv").write_text("\n".join(rows) + "\n")
    return s(predictor2='name = "twice"\nfile = "twice.csv"')


@pytest.mark.parametrize("case", sorted(CASES))
def test_bad_study_through_cli_and_api(case, study, capsys):
    make, match = CASES[case]
    path = make(study)
    _check_bad(["run", path, "--quiet"], capsys, match)
    with pytest.raises(dp.DyadpermError, match=match):
        dp.load_study(path).run()


def test_bad_command_lines(study, capsys, tmp_path):
    path = study()
    _check_bad(["run", tmp_path / "nothere.toml"], capsys, r"nothere\.toml")
    _check_bad(["run", path, "--permutations", "0"], capsys, r"permutations")
    _check_bad(["run", path, "--shard", "3/2", "--out", tmp_path / "s.h5"], capsys, r"shard")
    _check_bad(["run", path, "--backend", "cloud"], capsys, r"backend")
    _check_bad(["report", tmp_path / "nothere.h5"], capsys, r"no such run file")
    (tmp_path / "fake.h5").write_bytes(b"\x89HDF\r\n\x1a\n" + b"\0" * 50)
    _check_bad(["report", tmp_path / "fake.h5"], capsys, r"fake\.h5.*not a readable run file")
    _check_bad(["extend", tmp_path / "nothere.h5"], capsys, r"no such run file")
    _check_bad(["nosuchcommand"], capsys, r"nosuchcommand")
    _check_bad(["run", path, "--no-such-option"], capsys, r"no-such-option")
    out = tmp_path / "r.h5"
    code, _ = _run_cli(["run", path, "--out", out, "--quiet"], capsys)
    assert code == 0 and out.exists()
    _check_bad(["run", path, "--out", out, "--quiet"], capsys, r"run file exists")
    # files to write in a folder that is not there: refused before any work, not when the
    # file is made (a run file after the whole setup, as an internal error)
    missing = tmp_path / "nofolder"
    _check_bad(["run", path, "--out", missing / "r.h5"], capsys,
               r"run file .*r\.h5: no such folder .*nofolder$")
    _check_bad(["report", out, "--csv", missing / "r.csv"], capsys,
               r"CSV file .*r\.csv: no such folder .*nofolder$")
    _check_bad(["report", out, "--html", tmp_path], capsys, r"HTML file .*: is a folder; name a file")
    _check_bad(["merge", missing / "m.h5", out], capsys, r"run file .*m\.h5: no such folder")
    assert not missing.exists()


def test_api_arguments_raise_input_error():
    y = np.random.default_rng(0).normal(size=(6, 6))
    x = np.random.default_rng(1).normal(size=(6, 6))
    for kwargs, match in [
            ({"scheme": "q"}, r"scheme must be one of y, dsp, freedman-lane; got 'q'"),
            ({"permutations": 0}, r"permutations must be a whole number >= 1; got 0"),
            ({"statistic": "z2"}, r"statistic must be one of t, coef; got 'z2'"),
            ({"model": "probit"}, r"model must be one of linear, logistic; got 'probit'"),
            ({"exact": "yes"}, r"exact must be 'auto', True or False; got 'yes'"),
            ({"jobs": 0}, r"jobs must be a whole number >= 1, or -1 for all cores; got 0"),
            ({"seed": -1}, r"seed must be a whole number >= 0, a numpy SeedSequence or None"),
            ({"chunk_size": 0}, r"chunk_size must be a whole number >= 1; got 0"),
            ({"storage": "float16"}, r"storage must be one of float64, float32; got 'float16'"),
            ({"out": "nofolder/r.h5"}, r"run file nofolder/r\.h5: no such folder nofolder"),
            ({"dyads": "within"}, r"dyads: 'within' and 'all' need groups")]:
        with pytest.raises(dp.InputError, match=match):
            dp.regress(y, [x], **kwargs)
    with pytest.raises(dp.InputError, match="'x1' has shape 4 x 4; the response has 4 x 5"):
        dp.regress(np.ones((4, 5)), [np.ones((4, 4))])
    with pytest.raises(dp.InputError, match=r"response has an infinite value at row '0', "
                                            r"column '1'; use NaN for a missing value"):
        dp.regress(np.where(np.eye(6) > 0, 0, np.inf) + y * 0 + 1, [x])
    # networks are checked when they are read, attributes when given; a predictor made
    # from finite attributes can still overflow (a gap of 2e308), caught when the design
    # is prepared
    attr = np.arange(6.0)
    attr[2], attr[4] = 1e308, -1e308
    with pytest.raises(dp.InputError, match=r"^'near' has an infinite value; use NaN for a "
                                            r"missing value$"):
        dp.regress(np.where(np.eye(6) > 0, 0, 1.0) + np.arange(36.0).reshape(6, 6),
                   {"near": dp.gap(attr)})
    with pytest.raises(dp.InputError, match=r"too few nodes: got 2 x 2; need at least 3 nodes"):
        dp.regress(np.ones((2, 2)), [np.ones((2, 2))])


def test_paths_outside_the_study_folder_refused_when_asked(study, capsys, tmp_path):
    """`[study] inside_folder = true` confines every path to the study file's folder."""
    outside = tmp_path.parent / f"{tmp_path.name}-outside.csv"
    outside.write_text((study.dir / "x.csv").read_text())
    path = study(predictor=f'name = "x"\nfile = "../{outside.name}"')
    assert dp.load_study(path).predictors["x"].values.shape == (7, 7)  # allowed by default
    path = study(study='title = "t"\nnodes = "nodes.csv"\nid_column = "id"\ninside_folder = true',
                 predictor=f'name = "x"\nfile = "../{outside.name}"')
    _check_bad(["check", path], capsys, r"\[\[predictor\]\].*outside the study file's folder")
    for link in ("../nodes.csv", "sub/../../nodes.csv"):
        bad = study(study=f'title = "t"\nnodes = "{link}"\nid_column = "id"\ninside_folder = true')
        with pytest.raises(dp.InputError, match="outside the study file's folder"):
            dp.load_study(bad)
