"""The invented demo data and the second example: determinism, committed copies, planted effects.

External references: statsmodels OLS (planted signs on the vectorised dyads), the standard
library's ``csv`` and ``tomllib`` (reading back what the writers wrote).
"""

from __future__ import annotations

import csv
import tomllib
from pathlib import Path

import numpy as np
import pytest
import statsmodels.api as sm

import dyadperm as dp
from dyadperm import InputError
from dyadperm.demo import (
    CROPS,
    DEMO_DIR,
    DEMO_EFFECTS,
    DEMO_SEED,
    DEPARTMENTS,
    INSTITUTE_DIR,
    INSTITUTE_EFFECTS,
    INSTITUTE_SEED,
    make_demo,
    make_institute,
    write_demo,
    write_example_institute,
)

CONFIGS = Path(__file__).resolve().parent.parent / "configs"

# A planted non-null effect must show in naive OLS with |t| above this; the naive t is
# too optimistic under dyadic dependence, but its sign is what is checked here.
MIN_ABS_T = 3.0

DEMO_FIELDS = ("crop", "canal_km", "upstream_rank", "family", "kinship", "canal_distance",
               "same_crop", "giver_rank", "volume")
INSTITUTE_FIELDS = ("department", "office", "years", "shared_office", "same_department",
                    "combined_years", "papers")


@pytest.fixture(scope="module")
def demo():
    return make_demo()


@pytest.fixture(scope="module")
def institute():
    return make_institute()


# --------------------------------------------------------------------------- determinism

def test_make_demo_same_seed_gives_identical_arrays(demo):
    again = make_demo(DEMO_SEED)
    assert again.farm_ids == demo.farm_ids
    for field in DEMO_FIELDS:
        a, b = getattr(demo, field), getattr(again, field)
        assert a.dtype == b.dtype and np.array_equal(a, b), field
    assert again.effects == demo.effects and again.seed == demo.seed == DEMO_SEED


def test_make_demo_other_seed_differs(demo):
    other = make_demo(DEMO_SEED + 1)
    assert not np.array_equal(other.volume, demo.volume)
    assert not np.array_equal(other.canal_km, demo.canal_km)
    assert other.effects == demo.effects  # the planted effects do not depend on the seed


def test_make_institute_same_seed_same_arrays_other_seed_differs(institute):
    again = make_institute(INSTITUTE_SEED)
    for field in INSTITUTE_FIELDS:
        assert np.array_equal(getattr(institute, field), getattr(again, field)), field
    assert not np.array_equal(make_institute(INSTITUTE_SEED + 1).papers, institute.papers)


def test_generators_do_not_touch_the_global_rng():
    before = np.random.get_state()
    make_demo(1, n_farms=20)
    make_institute(1, n_researchers=15)
    after = np.random.get_state()
    assert before[0] == after[0] and np.array_equal(before[1], after[1])
    assert before[2:] == after[2:]


def test_demo_arrays_are_read_only(demo):
    with pytest.raises(ValueError, match="read-only"):
        demo.volume[0, 1] = 1.0
    with pytest.raises(ValueError, match="read-only"):
        demo.canal_km[0] = 0.0


# --------------------------------------------------------------------------- shape of the data

def test_demo_data_have_the_described_form(demo):
    n = demo.n_farms
    assert n == 90
    assert demo.farm_ids[0] == "F01" and demo.farm_ids[-1] == "F90"
    assert set(demo.crop.tolist()) <= set(CROPS)
    assert np.all((demo.canal_km > 0) & (demo.canal_km < 24))
    # upstream_rank orders the farms by canal_km, 1 = nearest the headgate
    assert sorted(demo.upstream_rank.tolist()) == list(range(1, n + 1))
    assert np.all(np.diff(demo.canal_km[np.argsort(demo.upstream_rank)]) >= 0)
    assert np.array_equal(demo.kinship, demo.kinship.T)
    assert np.all(np.diag(demo.kinship) == 0) and np.all(np.diag(demo.volume) == 0)
    assert set(np.unique(demo.kinship).tolist()) <= {0.0, 0.0625, 0.125, 0.25, 0.5}
    v = demo.volume[~np.eye(n, dtype=bool)]
    assert np.all(v >= 0) and np.all(v % 10 == 0)
    density = np.mean(v > 0)
    assert 0.03 < density < 0.2  # "many zeros", yet hundreds of ties
    assert not np.array_equal(demo.volume, demo.volume.T)  # directed


def test_planted_tables_have_one_true_null_and_match_the_study_files():
    for effects, study in ((DEMO_EFFECTS, "demo.toml"), (INSTITUTE_EFFECTS, "institute.toml")):
        assert [c for _, c in effects].count(0.0) == 1
        doc = tomllib.loads((CONFIGS / study).read_text(encoding="utf-8"))
        assert [p["name"] for p in doc["predictor"]] == [name for name, _ in effects]


def test_demo_kin_live_near_each_other(demo):
    # Designed correlation between predictors: related families sit closer on the canal.
    off = ~np.eye(demo.n_farms, dtype=bool)
    kin = demo.kinship[off] > 0
    assert demo.canal_distance[off][kin].mean() < 0.5 * demo.canal_distance[off][~kin].mean()


def test_institute_data_have_the_described_form(institute):
    n = institute.n_researchers
    assert n == 40 and institute.researcher_ids[0] == "R01"
    assert set(institute.department.tolist()) <= set(DEPARTMENTS)
    for name in ("papers", "shared_office", "same_department", "combined_years"):
        m = getattr(institute, name)
        assert np.array_equal(m, m.T), name  # undirected
    assert np.all(np.diag(institute.papers) == 0)
    assert np.all(institute.papers >= 0) and np.all(institute.papers % 1 == 0)
    # offices mix departments only in the shared room
    for room in set(institute.office.tolist()) - {"E01"}:
        assert len(set(institute.department[institute.office == room].tolist())) == 1, room


def test_generators_reject_bad_arguments(tmp_path):
    with pytest.raises(InputError, match=r"`n_farms` must be an integer from 12 to 999; got 5"):
        make_demo(n_farms=5)
    with pytest.raises(InputError, match=r"`seed` of make_demo must be an integer >= 0; got -1"):
        make_demo(seed=-1)
    with pytest.raises(InputError, match=r"`n_researchers` must be an integer from 12 to 99; "
                                         r"got 2\.5"):
        make_institute(n_researchers=2.5)
    afile = tmp_path / "taken"
    afile.write_text("x")
    with pytest.raises(InputError, match=r"cannot write the example into .*taken: it exists "
                                         r"and is not a directory"):
        write_demo(afile)


# --------------------------------------------------------------------------- committed copies

def _files(root: Path, study: str, sub: str) -> dict[str, bytes]:
    paths = [root / study] + sorted((root / sub).iterdir())
    return {p.relative_to(root).as_posix(): p.read_bytes() for p in paths}


@pytest.mark.parametrize("writer, study, sub", [
    (write_demo, "demo.toml", DEMO_DIR),
    (write_example_institute, "institute.toml", INSTITUTE_DIR),
])
def test_committed_configs_equal_what_the_writer_writes_now(tmp_path, writer, study, sub):
    written = writer(tmp_path)
    assert written == tmp_path / study
    fresh = _files(tmp_path, study, sub)
    committed = _files(CONFIGS, study, sub)
    assert sorted(committed) == sorted(fresh)  # no file missing, none left over
    for name, data in fresh.items():
        assert committed[name] == data, (
            f"configs/{name} differs from the generator's output; if the generator changed "
            "on purpose, write the files again (see the dyadperm.demo docstring)")


def test_writing_twice_gives_the_same_bytes(tmp_path):
    write_demo(tmp_path / "a")
    write_demo(tmp_path / "a")  # overwrites in place
    write_demo(tmp_path / "b")
    assert _files(tmp_path / "a", "demo.toml", DEMO_DIR) == _files(tmp_path / "b", "demo.toml",
                                                                   DEMO_DIR)


def test_demo_files_read_back_to_the_generated_arrays(tmp_path, demo):
    # Reference reader: the standard library's csv and tomllib, not dyadperm's readers.
    study = write_demo(tmp_path)
    doc = tomllib.loads(study.read_text(encoding="utf-8"))
    assert doc["test"]["seed"] == DEMO_SEED and doc["test"]["scheme"] == "dsp"
    assert 2000 <= doc["test"]["permutations"] <= 5000
    assert "output" not in doc  # the run prints its table; no run file by default
    base = study.parent
    index = {f: k for k, f in enumerate(demo.farm_ids)}

    with open(base / doc["study"]["nodes"], newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert [r["farm"] for r in rows] == list(demo.farm_ids)
    assert [r["crop"] for r in rows] == demo.crop.tolist()
    assert np.array_equal([float(r["canal_km"]) for r in rows], demo.canal_km)
    assert np.array_equal([int(r["upstream_rank"]) for r in rows], demo.upstream_rank)

    with open(base / doc["response"]["file"], newline="") as fh:
        edges = list(csv.DictReader(fh))
    assert list(edges[0]) == ["source", "target", "weight"]
    volume = np.zeros_like(demo.volume)
    for e in edges:
        volume[index[e["source"]], index[e["target"]]] = float(e["weight"])
    assert len(edges) == np.count_nonzero(demo.volume)  # only nonzero volumes are listed
    assert np.array_equal(volume, demo.volume)

    kin_file = next(p["file"] for p in doc["predictor"] if p["name"] == "kinship")
    with open(base / kin_file, newline="") as fh:
        table = list(csv.reader(fh))
    assert table[0] == ["farm", *demo.farm_ids]
    assert [r[0] for r in table[1:]] == list(demo.farm_ids)
    assert np.array_equal(np.array([r[1:] for r in table[1:]], dtype=float), demo.kinship)


def test_institute_files_read_back_to_the_generated_arrays(tmp_path, institute):
    # Reference reader: the standard library's csv and tomllib.
    study = write_example_institute(tmp_path)
    doc = tomllib.loads(study.read_text(encoding="utf-8"))
    assert doc["study"]["directed"] is False
    base = study.parent
    with open(base / doc["study"]["nodes"], newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert [r["office"] for r in rows] == institute.office.tolist()
    assert np.array_equal([int(r["years"]) for r in rows], institute.years)
    with open(base / doc["response"]["file"], newline="") as fh:
        table = list(csv.reader(fh))
    assert table[0] == ["researcher", *institute.researcher_ids]
    assert np.array_equal(np.array([r[1:] for r in table[1:]], dtype=float), institute.papers)


# --------------------------------------------------------------------------- planted effects

def _ols(y: np.ndarray, predictors: dict[str, np.ndarray], dyads: np.ndarray):
    X = np.column_stack([m[dyads] for m in predictors.values()])
    return sm.OLS(y[dyads], sm.add_constant(X)).fit()


def test_demo_planted_signs_seen_by_statsmodels_ols(demo):
    # Source: statsmodels OLS on the n(n-1) ordered off-diagonal dyads (methods.md: directed
    # one-mode data use every ordered pair). Naive OLS ignores dyadic dependence, so only
    # the signs of the non-null planted effects are checked, with |t| > MIN_ABS_T.
    fit = _ols(demo.volume, demo.predictors(), ~np.eye(demo.n_farms, dtype=bool))
    for k, (name, coef) in enumerate(demo.effects, start=1):
        if coef != 0.0:
            assert np.sign(fit.params[k]) == np.sign(coef), name
            assert abs(fit.tvalues[k]) > MIN_ABS_T, name


def test_institute_planted_signs_seen_by_statsmodels_ols(institute):
    # Source: statsmodels OLS on the n(n-1)/2 pairs i < j (methods.md: undirected data use
    # one triangle).
    n = institute.n_researchers
    fit = _ols(institute.papers, institute.predictors(), np.triu(np.ones((n, n), bool), 1))
    for k, (name, coef) in enumerate(institute.effects, start=1):
        if coef != 0.0:
            assert np.sign(fit.params[k]) == np.sign(coef), name
            assert abs(fit.tvalues[k]) > MIN_ABS_T, name


# --------------------------------------------------------------------------- the studies run

# Few relabellings keep this fast; 400 still resolves p down to 1/401 < 0.05.
STUDY_PERMUTATIONS = 400


@pytest.mark.parametrize("study, effects", [
    ("demo.toml", DEMO_EFFECTS),
    ("institute.toml", INSTITUTE_EFFECTS),
])
def test_committed_study_recovers_planted_effects(study, effects):
    # The planted table is the reference: every non-null effect is found (p < 0.05, the
    # statistic's sign the planted sign) and the true null is not (p > 0.05) on the fixed
    # seed of the study file. Only the demo's outcome is checked here; the engine's
    # correctness is tested elsewhere.
    res = dp.load_study(CONFIGS / study).run(permutations=STUDY_PERMUTATIONS, jobs=1)
    assert res.terms == ("intercept", *(name for name, _ in effects))
    assert res.permutations == STUDY_PERMUTATIONS
    for k, (name, coef) in enumerate(effects, start=1):
        if coef == 0.0:
            assert res.p[k] > 0.05, name
        else:
            assert res.p[k] < 0.05, name
            assert np.sign(res.stat[k]) == np.sign(coef), name
