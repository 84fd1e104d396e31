"""What a new user meets first: the quick start's commands, the default number of workers,
a short repr, and the logistic statistic named z."""

from __future__ import annotations

import re
from pathlib import Path

import joblib
import numpy as np
import pytest

import dyadperm as dp
from cli_run import run_cli as _cli

ROOT = Path(__file__).resolve().parent.parent


def _quick_start_commands() -> list[str]:
    """The non-empty lines of the code blocks of README.md's quick start (as .ci/run reads
    them)."""
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    section = re.search(r"^## Quick start\n(.*?)^## ", text, re.S | re.M).group(1)
    blocks = re.findall(r"^```[^\n]*\n(.*?)^```", section, re.S | re.M)
    return [line for block in blocks for line in block.splitlines() if line.strip()]


def test_readme_quick_start_is_the_two_commands_ci_runs():
    commands = _quick_start_commands()
    assert len(commands) == 2
    assert "dyadperm demo" in commands[0] and commands[0].startswith("pip install .")
    assert commands[1].endswith("python -m pytest")
    ci = (ROOT / ".ci" / "run").read_text()
    assert "## Quick start" in ci and "python3 -m venv .ci-venv" in ci



def _small_study(folder: Path, jobs_line: str = "") -> Path:
    rng = np.random.default_rng(7)
    n = 12
    np.save(folder / "y.npy", rng.normal(size=(n, n)))
    np.save(folder / "x.npy", rng.normal(size=(n, n)))
    path = folder / "s.toml"
    path.write_text(f"""[study]
title = "Invented workers check"

[response]
name = "y"
file = "y.npy"

[[predictor]]
name = "x"
file = "x.npy"

[test]
permutations = 64
chunk_size = 16
seed = 3
{jobs_line}
""")
    return path


@pytest.mark.parametrize("jobs_line, cli_args, expected", [
    ("", (), min(joblib.cpu_count(), 4)),             # neither file nor flag: every core
    ("jobs = 1", (), 1),                              # the file says
    ("jobs = 1", ("--jobs", "-1"), min(joblib.cpu_count(), 4)),  # the flag wins
])
def test_run_uses_every_core_unless_told(tmp_path, monkeypatch, capsys, jobs_line, cli_args,
                                         expected):
    path = _small_study(tmp_path, jobs_line)
    code, out, err = _cli(monkeypatch, capsys, "run", path, "--quiet", *cli_args)
    assert code == 0, err
    # 64 permutations in chunks of 16: at most 4 workers can share them
    word = "worker" if expected == 1 else "workers"
    assert f"(chunks of 16, {expected} {word})" in out


def test_extend_uses_every_core_by_default(tmp_path, monkeypatch, capsys):
    path = _small_study(tmp_path)
    code, _, err = _cli(monkeypatch, capsys, "run", path, "--quiet", "--jobs", "1",
                        "--out", tmp_path / "r.h5")
    assert code == 0, err
    # the study file sets no jobs: extend uses every core unless --jobs says otherwise
    code, out, err = _cli(monkeypatch, capsys, "extend", tmp_path / "r.h5", "--quiet",
                          "--permutations", "128")
    assert code == 0, err
    cores = min(joblib.cpu_count(), 8)
    assert f"(chunks of 16, {cores} worker{'s' * (cores != 1)})" in out


def test_repr_is_short_and_shows_the_header_and_terms(rng):
    y = rng.normal(size=(15, 15))
    res = dp.regress(y, {"kin": rng.normal(size=(15, 15)), "crop": dp.same(rng.integers(0, 3, 15))},
                     permutations=3000, seed=2)
    text = repr(res)
    assert text.splitlines()[0] == "<RegressionResult"
    assert "model linear | scheme dsp | statistic t" in text
    assert "terms: intercept, kin, crop" in text and "null (3,000 x 2)" in text
    assert len(text) < 600 and len(text.splitlines()) < 10
    # no statistic of the null distribution is printed
    assert f"{res.null[0, 0]:.4f}" not in text
    corr = dp.correlate(y, rng.normal(size=(15, 15)), permutations=200, seed=1)
    assert repr(corr).startswith("<CorrelationResult") and "terms: b" in repr(corr)


def test_logistic_statistic_is_named_z_in_every_output(rng, tmp_path):
    from dyadperm.output.report import csv_text, json_text

    n = 14
    x = rng.normal(size=(n, n))
    y = (rng.random((n, n)) < 1 / (1 + np.exp(-x))).astype(float)
    res = dp.regress(y, {"x": x}, model="logistic", scheme="y", permutations=100, seed=1)
    assert res.statistic == "z"
    assert "statistic z" in res.table() and " t " not in res.table().splitlines()[5]
    assert '"statistic": "z"' in json_text(res)
    assert csv_text(res).splitlines()[0].split(",")[3] == "statistic"
    # the plot's axis names the Wald z statistic
    from dyadperm.output import plots

    assert plots._stat_name(res).startswith("Wald z")
