"""Reports of a result: terminal table, CSV, JSON, PNG plots and a self-contained HTML page.

Everything here returns strings or bytes, or writes the files it is asked to write; only
the command line prints. The HTML page embeds its plots as base64 data URIs and shows the
study text and every name HTML-escaped: they are data, never markup or code.
"""

from __future__ import annotations

import base64
import csv
import html
import io
import json
import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import InputError
from ..pipeline import store
from ..pipeline.run import open_result
from ..settings import check_output_file
from . import plots
from .result import TERM_COLUMNS, _plain, term_rows
from .table import (NOTE_ADJUSTED, NOTE_CI, NOTE_INTERVAL, NOTE_ONE, NOTE_P, P_RANGE, _alpha,
                    _interval, _num, _pval, _stop_lines, ci_label, ci_text, format_table, header_lines,
                    matrix_lines)

# --------------------------------------------------------------------------- CSV / JSON

CSV_COLUMNS = TERM_COLUMNS  # the rows themselves: dyadperm.output.result.term_rows (to_frame too)


def csv_text(res: Any) -> str:
    """One row per term; empty cells where a value does not apply (the intercept's p)."""
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    columns, rows = term_rows(res)
    w.writerow(columns)
    for row in rows:
        w.writerow(["" if isinstance(v, float) and not np.isfinite(v) else
                    (repr(float(v)) if isinstance(v, (float, np.floating)) else v)
                    for v in row])
    return buf.getvalue()


def json_text(res: Any, provenance: dict | None = None) -> str:
    """The result's fields (``to_dict``) and, from a run file, its provenance."""
    d = res.to_dict()
    if provenance is not None:
        d["provenance"] = _plain(provenance)
    return json.dumps(d, indent=2)


def provenance(path: Any) -> dict:
    """Where a run file's result comes from: versions, seed, settings, input fingerprints."""
    hdr = store.read_header(path)
    ident = hdr.identity
    fingerprints = {k.split(":", 1)[1]: v for k, v in ident.items()
                    if k.startswith("fingerprint:")}
    settings = {k: v for k, v in ident.items() if not k.startswith("fingerprint:")}
    return {"run_file": str(path), "package_version": store.package_version(path),
            "format_version": store.FORMAT_VERSION, "seed": ident.get("seed"),
            "chunk_size": hdr.chunk_size, "permutations_planned": hdr.permutations,
            "exact": hdr.exact, "study_path": hdr.study_path, "study_text": hdr.study_text,
            "settings": settings, "fingerprints": fingerprints}


# --------------------------------------------------------------------------- plots / HTML

def _safe(name: str) -> str:
    return re.sub(r"[^A-Za-z0-9_.-]+", "_", name).strip("_") or "term"


def plot_images(res: Any, *, alpha: float | None = None) -> list[tuple[str, str, bytes]]:
    """Every plot of a result as (file name, caption, PNG bytes)."""
    a = _alpha(res, alpha)
    out = []
    if res.kind == "layers":
        out.append(("correlation_matrix.png",
                    "Correlation matrix of the networks; * marks familywise adjusted "
                    f"p <= {a:g}", plots.correlation_heatmap(res, alpha=a)))
    for col, i in enumerate(res.tested_index()):
        stem = f"{col + 1:02d}_{_safe(res.terms[i])}"
        out.append((f"{stem}_null.png", f"{res.terms[i]}: null distribution and the observed "
                    "statistic", plots.null_histogram(res, col, alpha=a)))
        if not res.exact and np.isfinite(res.p[i]):
            out.append((f"{stem}_convergence.png", f"{res.terms[i]}: p-value as "
                        "relabellings accumulate, with its 95% Clopper-Pearson band",
                        plots.convergence(res, col, alpha=a)))
    return out


def write_plots(res: Any, folder: Any, *, alpha: float | None = None) -> list[Path]:
    """Write every plot of a result as PNG into ``folder`` (made if needed)."""
    folder = Path(folder)
    if folder.exists() and not folder.is_dir():
        raise InputError(f"--plots: {folder} is a file, not a folder")
    folder.mkdir(parents=True, exist_ok=True)
    paths = []
    for name, _, png in plot_images(res, alpha=alpha):
        path = folder / name
        path.write_bytes(png)
        paths.append(path)
    return paths


_CSS = """
body { font-family: Georgia, 'Times New Roman', serif; max-width: 60rem; margin: 2rem auto;
       padding: 0 1rem; color: #111; line-height: 1.4; }
h1 { font-size: 1.5rem; } h2 { font-size: 1.2rem; margin-top: 2rem; border-bottom: 1px solid #999; }
table { border-collapse: collapse; margin: 0.5rem 0; font-size: 0.9rem; }
th, td { padding: 0.2rem 0.6rem; border-bottom: 1px solid #ccc; text-align: right; }
th:first-child, td:first-child { text-align: left; }
td.mark { color: #000; font-weight: bold; }
pre { background: #f4f4f4; padding: 0.8rem; overflow-x: auto; font-size: 0.85rem; }
figure { margin: 1rem 0; } figure img { max-width: 100%; border: 1px solid #ddd; }
figcaption { font-size: 0.85rem; color: #333; }
.small { font-size: 0.85rem; color: #333; }
"""


def _e(x: Any) -> str:
    return html.escape(str(x), quote=True)


def _cell(x: float) -> str:
    return "&ndash;" if x is None or not np.isfinite(x) else _e(_pval(x, 0).strip())


def _result_table_html(res: Any, alpha: float) -> str:
    kind = res.kind
    tested = res.tested_index()
    several = len(tested) > 1
    est_name = "estimate" if kind == "regression" else "r"
    label = ci_label(res)
    heads = ["term", est_name, "std.error"] + ([label] if label is not None else []) \
        + ([res.statistic] if kind == "regression" else []) \
        + ["p", "MC s.e.", P_RANGE, "p (stat &ge; obs)", "p (stat &le; obs)"] \
        + (["adjusted p"] if several else []) + [""]
    rows = ["<tr>" + "".join(f"<th>{h if '&' in h else _e(h)}</th>" for h in heads) + "</tr>"]
    est = res._estimates()
    for i, term in enumerate(res.terms):
        tested_i = np.isfinite(res.p[i])
        cells = [_e(term), _e(_num(est[i], 0).strip()), _e(_num(res.se[i], 0).strip())]
        if label is not None:
            cells.append(_e(ci_text(res, i)))
        if kind == "regression":
            cells.append(_e(_num(res.stat[i], 0, 3).strip()))
        se = "&ndash;" if res.exact or not tested_i else _cell(res.p_se[i])
        cells += [_cell(res.p[i]), se, _e(_interval(res, i)) if tested_i else "&ndash;",
                  _cell(res.p_greater[i]), _cell(res.p_less[i])]
        decisive = res.p_adjusted[i] if several else res.p[i]
        if several:
            cells.append(_cell(res.p_adjusted[i]))
        mark = "*" if tested_i and np.isfinite(decisive) and decisive <= alpha else ""
        cells.append(f'<span class="mark">{mark}</span>')
        rows.append("<tr>" + "".join(f"<td>{c}</td>" for c in cells) + "</tr>")
    return "<table>\n" + "\n".join(rows) + "\n</table>"


def html_text(res: Any, *, provenance: dict | None = None, alpha: float | None = None,
              title: str | None = None) -> str:
    """A self-contained HTML report: table, plots (embedded PNG), study text, provenance."""
    a = _alpha(res, alpha)
    prov = provenance or {}
    study_text = prov.get("study_text", "")
    if title is None:
        title = _study_title(study_text) or header_lines(res)[0]
    tested = res.tested_index()
    parts = ["<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
             f"<title>{_e(title)}</title>", f"<style>{_CSS}</style></head><body>",
             f"<h1>{_e(title)}</h1>",
             "<p>" + "<br>".join(_e(x) for x in header_lines(res) + _stop_lines(res)) + "</p>",
             "<h2>Results</h2>", _result_table_html(res, a), '<p class="small">',
             "<br>".join(_e(x) for x in [NOTE_P] + ([] if res.exact else [NOTE_INTERVAL])
                         + [NOTE_ADJUSTED.format(k=len(tested), alpha=a) if len(tested) > 1
                            else NOTE_ONE.format(alpha=a)]
                         + ([] if ci_label(res) is None else
                            [NOTE_CI.format(label=ci_label(res), alpha=1 - res.ci_level)])
                         + [f"note: {n}" for n in res.notes]), "</p>"]
    if res.kind == "layers":
        parts.append("<pre>" + _e("\n".join(matrix_lines(res, alpha=a))) + "</pre>")
    parts.append("<h2>Plots</h2>")
    for name, caption, png in plot_images(res, alpha=a):
        data = base64.b64encode(png).decode("ascii")
        parts.append(f'<figure><img src="data:image/png;base64,{data}" alt="{_e(caption)}">'
                     f"<figcaption>{_e(caption)} ({_e(name)})</figcaption></figure>")
    if study_text:
        parts += ["<h2>Study file</h2>",
                  f"<p class=\"small\">{_e(prov.get('study_path', ''))}</p>",
                  f"<pre>{_e(study_text)}</pre>"]
    if prov:
        parts += ["<h2>Provenance</h2>", _provenance_html(prov)]
    parts.append("</body></html>")
    return "\n".join(parts) + "\n"


def _study_title(text: str) -> str | None:
    try:
        title = tomllib.loads(text).get("study", {}).get("title") if text else None
    except tomllib.TOMLDecodeError:
        return None
    return title if isinstance(title, str) and title.strip() else None


def _provenance_html(prov: dict) -> str:
    rows = []
    for key in ("run_file", "package_version", "format_version", "seed", "chunk_size",
                "permutations_planned", "exact"):
        if key in prov:
            rows.append((key.replace("_", " "), prov[key]))
    for key, value in sorted(prov.get("settings", {}).items()):
        rows.append(("SHA-256 of the dyad set" if key == "mask" else f"setting: {key}", value))
    for key, value in prov.get("fingerprints", {}).items():
        rows.append((f"SHA-256 of input {key}", value))
    body = "\n".join(f"<tr><td>{_e(k)}</td><td><code>{_e(v)}</code></td></tr>"
                     for k, v in rows)
    return f"<table>\n{body}\n</table>"


# --------------------------------------------------------------------------- one call

@dataclass(frozen=True)
class Report:
    """What :func:`make_report` produced: the text to show and the files it wrote."""

    text: str
    written: list[Path] = field(default_factory=list)


def make_report(run_file: Any, *, as_json: bool = False, csv_file: Any = None,
                plots: Any = None, html_file: Any = None,
                alpha: float | None = None) -> Report:
    """Read a run file and produce the report pieces asked for (the CLI's ``report``)."""
    if csv_file is not None:
        csv_file = check_output_file(csv_file, "CSV file")
    if html_file is not None:
        html_file = check_output_file(html_file, "HTML file")
    res = open_result(run_file)
    a = _alpha(res, alpha)
    prov = provenance(run_file)
    text = json_text(res, prov) if as_json else format_table(res, alpha=a)
    written: list[Path] = []
    if csv_file is not None:
        Path(csv_file).write_text(csv_text(res), encoding="utf-8")
        written.append(Path(csv_file))
    if plots is not None:
        written += write_plots(res, plots, alpha=a)
    if html_file is not None:
        Path(html_file).write_text(html_text(res, provenance=prov, alpha=a), encoding="utf-8")
        written.append(Path(html_file))
    return Report(text, written)
