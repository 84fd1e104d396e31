"""Reports: terminal table, CSV, JSON, PNG plots and the self-contained HTML page.

Sources named beside each check:
- the PNG file signature (PNG specification, ISO/IEC 15948, section 5.2: the 8 bytes
  137 80 78 71 13 10 26 10) and its IHDR chunk for the image size;
- Python's csv, json, base64 and html.parser modules read back what was written;
- scipy.stats.binomtest (Clopper-Pearson) for the convergence band.
"""

from __future__ import annotations

import base64
import csv
import io
import json
import struct
import textwrap
from html.parser import HTMLParser

import numpy as np
import pytest
import scipy.stats as st

import dyadperm as dp
from dyadperm.output import report
from dyadperm.errors import InputError
from reference import INTERVAL_RTOL
from cli_run import run_cli as _cli

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # source: PNG specification, section 5.2


def _png_size(data: bytes) -> tuple[int, int]:
    """Width and height from the IHDR chunk, which must follow the signature (PNG spec 11.2.2)."""
    assert data[:8] == PNG_SIGNATURE
    assert data[12:16] == b"IHDR"
    return struct.unpack(">II", data[16:24])


@pytest.fixture
def regression(rng):
    n = 20
    kin = rng.normal(size=(n, n))
    crop = rng.normal(size=(n, n))
    y = 0.4 * kin + rng.normal(size=(n, n))
    return dp.regress(y, {"kinship": kin, "same_crop": crop}, permutations=299, seed=3)


@pytest.fixture
def layers(rng):
    nets = {"water": rng.normal(size=(14, 14)), "kinship": rng.normal(size=(14, 14))}
    nets["help"] = nets["water"] + rng.normal(size=(14, 14))
    return dp.correlate(nets, permutations=199, seed=5)


def _study_file(folder, title='Invented study <script>alert("x")</script> & co'):
    rng = np.random.default_rng(7)
    n = 14
    y = rng.normal(size=(n, n))
    np.save(folder / "y.npy", y)
    np.save(folder / "x.npy", y + rng.normal(size=(n, n)))
    np.save(folder / "z.npy", rng.normal(size=(n, n)))
    text = textwrap.dedent(f"""\
        # a comment with markup: <b>bold</b> </pre>
        [study]
        title = '{title}'

        [response]
        name = "water"
        file = "y.npy"

        [[predictor]]
        name = "kinship"
        file = "x.npy"

        [[predictor]]
        name = "same_crop"
        file = "z.npy"

        [test]
        permutations = 400
        seed = 12
        chunk_size = 50
        stop = "gandy"

        [output]
        file = "run.h5"
        """)
    path = folder / "study.toml"
    path.write_text(text)
    return path


# --------------------------------------------------------------------------- table

def test_table_shows_estimates_p_intervals_and_adjusted(regression):
    text = regression.table()
    lines = text.splitlines()
    head = next(line for line in lines if line.startswith("term"))
    for col in ("estimate", "std.error", "t", "p", "MC s.e.", "p 95% range", "adjusted p"):
        assert col in head
    row = next(line for line in lines if line.startswith("kinship"))
    lo, hi = regression.p_interval[1]
    assert f"{regression.p[1]:.4f}" in row and f"{hi:.4f}" in row
    assert row.rstrip().endswith("*")  # adjusted p <= 0.05 for the planted effect
    assert "Westfall & Young 1993" in text and "R squared" in text
    assert "seed 3" in text and "299 random relabellings" in text


def test_table_of_a_single_correlation_has_no_adjusted_column(rng):
    a = rng.normal(size=(12, 12))
    res = dp.correlate(a, a + rng.normal(size=(12, 12)), permutations=99, seed=1)
    text = res.table()
    assert "adjusted p" not in text and "* marks p <= 0.05" in text
    assert text.splitlines()[0].startswith("QAP correlation of")


def test_table_of_layers_has_the_matrix(layers):
    text = report.format_table(layers, alpha=0.01)
    assert "correlation matrix (* adjusted p <= 0.01)" in text
    assert "water & help" in text and "adjusted p" in text


def test_table_says_what_the_stop_rule_did(rng):
    y = rng.normal(size=(18, 18))
    res = dp.regress(y, {"null": rng.normal(size=(18, 18))}, permutations=2000, seed=2,
                     chunk_size=50, stop="besag-clifford")
    text = res.table()
    assert res.stopped_by == "besag-clifford"
    assert (f"stopped the run after {res.permutations:,} of 2,000 planned relabellings"
            in text)
    assert f"p = 10/{int(res.stop_at[1]):,}" in text


def test_alpha_is_checked():
    with pytest.raises(InputError, match=r"`alpha` must be a number with 0 < alpha < 1; "
                                         r"got 2"):
        report._alpha(None, 2)


# --------------------------------------------------------------------------- CSV / JSON

def test_csv_round_trip(regression):
    rows = list(csv.DictReader(io.StringIO(report.csv_text(regression))))
    assert [r["term"] for r in rows] == list(regression.terms)
    assert tuple(rows[0]) == report.CSV_COLUMNS
    assert rows[0]["p"] == "" and rows[0]["p_adjusted"] == ""  # intercept: not tested
    for i in (1, 2):
        # source: Python's csv module reads back the exact float written
        assert float(rows[i]["p"]) == regression.p[i]
        assert float(rows[i]["p_adjusted"]) == regression.p_adjusted[i]
        assert float(rows[i]["p_low"]) == regression.p_interval[i, 0]
        assert int(rows[i]["exceedances"]) == regression.exceed[i - 1]


def test_csv_of_layers_names_both_networks(layers):
    rows = list(csv.DictReader(io.StringIO(report.csv_text(layers))))
    assert [(r["network_a"], r["network_b"]) for r in rows] == [
        ("water", "kinship"), ("water", "help"), ("kinship", "help")]


def test_json_has_result_and_provenance(tmp_path, rng):
    path = tmp_path / "run.h5"
    dp.regress(rng.normal(size=(10, 10)), {"x": rng.normal(size=(10, 10))}, permutations=50,
               seed=1, out=path)
    rep = report.make_report(path, as_json=True)
    d = json.loads(rep.text)  # source: Python's json module
    assert d["terms"] == ["intercept", "x"] and d["p"][0] is None
    prov = d["provenance"]
    assert prov["seed"] == "1" and prov["chunk_size"] > 0 and prov["package_version"]
    assert set(prov["fingerprints"]) == {"x", "response"}
    assert all(len(v) == 64 and int(v, 16) >= 0 for v in prov["fingerprints"].values())


# --------------------------------------------------------------------------- plots

def test_plots_are_png_files(regression, tmp_path):
    paths = report.write_plots(regression, tmp_path / "plots")
    names = sorted(p.name for p in paths)
    assert names == ["01_kinship_convergence.png", "01_kinship_null.png",
                     "02_same_crop_convergence.png", "02_same_crop_null.png"]
    for p in paths:
        w, h = _png_size(p.read_bytes())  # source: PNG specification signature and IHDR
        assert 800 <= w <= 1200 and 500 <= h <= 900


def test_layer_plots_include_the_heat_map(layers, tmp_path):
    paths = report.write_plots(layers, tmp_path)
    assert paths[0].name == "correlation_matrix.png"
    assert len(paths) == 1 + 2 * len(layers.terms)
    for p in paths:
        assert p.read_bytes()[:8] == PNG_SIGNATURE  # source: PNG specification 5.2


def test_exact_runs_have_no_convergence_plot(rng, tmp_path):
    res = dp.regress(rng.normal(size=(5, 5)), {"x": rng.normal(size=(5, 5))},
                     permutations=500)
    assert res.exact
    paths = report.write_plots(res, tmp_path)
    assert [p.name for p in paths] == ["01_x_null.png"]


def test_running_p_and_band(regression):
    from dyadperm.output import plots

    ls, p, lo, hi = plots.running_p(regression, 0, points=50)
    null = np.abs(np.asarray(regression.null)[:, 0])
    obs = abs(regression.stat[1])
    for k in (0, len(ls) // 2, len(ls) - 1):
        l = int(ls[k])
        b = int(np.sum(null[:l] >= obs * (1 - 1e-9)))
        assert p[k] == pytest.approx((b + 1) / (l + 1))  # methods.md, first l relabellings
        ci = st.binomtest(b + 1, l + 1).proportion_ci(method="exact")  # source: scipy
        np.testing.assert_allclose([lo[k], hi[k]], [ci.low, ci.high], rtol=INTERVAL_RTOL)
    assert ls[-1] == regression.permutations and p[-1] == pytest.approx(regression.p[1])


def test_plots_folder_that_is_a_file(regression, tmp_path):
    f = tmp_path / "taken"
    f.write_text("x")
    with pytest.raises(InputError, match=r"--plots: .*taken is a file, not a folder"):
        report.write_plots(regression, f)


# --------------------------------------------------------------------------- HTML

class _Collect(HTMLParser):
    """Tags, image sources and text of an HTML page (Python's html.parser)."""

    def __init__(self):
        super().__init__()
        self.tags, self.images, self.text = [], [], []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        if tag == "img":
            self.images.append(dict(attrs)["src"])

    def handle_data(self, data):
        self.text.append(data)


def test_html_embeds_every_plot_and_escapes_the_study(tmp_path):
    path = _study_file(tmp_path)
    study = dp.load_study(path)
    res = study.run()
    html_path = tmp_path / "report.html"
    rep = report.make_report(tmp_path / "run.h5", html_file=html_path)
    assert rep.written == [html_path]
    page = html_path.read_text(encoding="utf-8")
    parsed = _Collect()
    parsed.feed(page)  # source: Python's html.parser
    names = [name for name, _, _ in report.plot_images(res)]
    assert len(parsed.images) == len(names) == 4
    for src in parsed.images:
        prefix = "data:image/png;base64,"
        assert src.startswith(prefix)
        # source: base64 decoding, then the PNG signature (PNG specification 5.2)
        assert base64.b64decode(src[len(prefix):])[:8] == PNG_SIGNATURE
    # the study text is data: shown, never markup or code
    assert "script" not in parsed.tags and "b" not in parsed.tags
    assert "<script>" not in page and "&lt;script&gt;" in page
    text = "".join(parsed.text)
    assert study.text in text  # the whole study file, verbatim after unescaping
    assert 'Invented study <script>alert("x")</script> & co' in text  # the title
    assert "SHA-256 of input kinship" in text and "package version" in text
    assert "stopped the run" in text or "ran all" in text



def test_cli_report_writes_every_file(tmp_path, monkeypatch, capsys):
    path = _study_file(tmp_path, title="Invented cli study")
    code, _, err = _cli(monkeypatch, capsys, "run", path, "--quiet")
    assert code == 0, err
    code, out, err = _cli(monkeypatch, capsys, "report", tmp_path / "run.h5", "--csv",
                          tmp_path / "r.csv", "--plots", tmp_path / "plots", "--html",
                          tmp_path / "r.html", "--alpha", "0.1")
    assert code == 0, err
    assert "adjusted p" in out and "* marks adjusted p <= 0.1" in out
    assert err.count("wrote ") == 1 + 4 + 1
    assert (tmp_path / "r.csv").read_text().startswith("term,estimate")
    assert (tmp_path / "r.html").read_text().count("data:image/png;base64,") == 4
    assert len(list((tmp_path / "plots").glob("*.png"))) == 4
    code, out, _ = _cli(monkeypatch, capsys, "report", tmp_path / "run.h5", "--json")
    assert code == 0 and json.loads(out)["stop"]["rule"] == "gandy"
    code, out, err = _cli(monkeypatch, capsys, "plan", path, "--precision", "0.002",
                          "--jobs", "1")
    assert code == 0, err
    assert "11,875 random relabellings" in out and "1 worker(s)" in out
    code, _, err = _cli(monkeypatch, capsys, "plan", path, "--precision", "0")
    assert code == 2
    assert err.strip() == ("dyadperm: error: `precision` must be a number with "
                           "0 < precision < 0.5; got 0.0")


def test_cli_run_and_extend_take_stop_options(tmp_path, monkeypatch, capsys):
    path = _study_file(tmp_path, title="Invented cli study")
    code, out, err = _cli(monkeypatch, capsys, "run", path, "--quiet", "--stop",
                          "besag-clifford", "--stop-exceedances", "5")
    assert code == 0, err
    assert "stop rule besag-clifford (h = 5)" in out
    code, out, err = _cli(monkeypatch, capsys, "extend", tmp_path / "run.h5", "--quiet",
                          "--stop", "none")
    assert code == 0, err
    assert "400 random relabellings" in out and "stop rule" not in out
    code, _, err = _cli(monkeypatch, capsys, "run", path, "--quiet", "--out",
                        tmp_path / "other.h5", "--stop-risk", "0.7")
    assert code == 2
    assert err.strip() == ("dyadperm: error: `stop_risk` must be a number with "
                           "0 < stop_risk < 0.5; got 0.7")
