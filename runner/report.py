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

from .errors import InputError
from .result import (TERM_COLUMNS, CorrelationResult, LayerCorrelationResult, _num, _plain,
                     _pval, term_rows, tested_terms)

#: One-line notes under the table, in the order they are shown.
NOTE_P = ("p: two-sided permutation p-value (|statistic| at least the observed); "
          "MC s.e.: its Monte Carlo standard error")
NOTE_INTERVAL = ("95% interval: Clopper-Pearson interval of the Monte Carlo p-value "
                 "(b + 1 of m + 1 relabellings)")
NOTE_ADJUSTED = ("adjusted p: familywise, single-step max statistic over the {k} tested "
                 "terms (Westfall & Young 1993); * marks adjusted p <= {alpha:g}")
NOTE_ONE = "* marks p <= {alpha:g}"
NOTE_SIDED = "one-sided p-values and exceedance counts: report --csv or --json"


# --------------------------------------------------------------------------- helpers

def _kind(res: Any) -> str:
    if isinstance(res, LayerCorrelationResult):
        return "layers"
    if isinstance(res, CorrelationResult):
        return "correlation"
    return "regression"


def _tested(res: Any) -> np.ndarray:
    """Indices (into ``res.terms``) of the tested terms, in null-column order."""
    return tested_terms(res)


def _alpha(res: Any, alpha: float | None) -> float:
    if alpha is None:
        return float(res.alpha)
    if isinstance(alpha, bool) or not isinstance(alpha, (int, float)) or not 0 < alpha < 1:
        raise InputError(f"`alpha` must be a number with 0 < alpha < 1; got {alpha!r}")
    return float(alpha)


def _draws_line(res: Any) -> str:
    if res.exact:
        return f"null: all {res.permutations:,} relabellings (exact enumeration)"
    return (f"null: {res.permutations:,} random relabellings, seed {res.seed} "
            f"(chunks of {res.chunk_size:,})")


def _stop_lines(res: Any) -> list[str]:
    """What the stop rule did: the run as a whole, then each tested term."""
    rule = (res.stop or {}).get("rule", "none")
    if rule == "none" or res.exact:
        return []
    from .precision import StopRule

    desc = StopRule.from_dict(res.stop).describe()
    if res.stopped_by:
        lines = [f"stop rule {desc}: stopped the run after {res.permutations:,} of "
                 f"{res.planned:,} planned relabellings (every tested term done)"]
    else:
        lines = [f"stop rule {desc}: ran all {res.permutations:,} planned relabellings "
                 "(not every term was done earlier)"]
    for i in _tested(res):
        term, at = res.terms[i], res.stop_at[i]
        if rule == "besag-clifford":
            h = res.stop["exceedances"]
            what = (f"{h}th exceedance after {int(at):,} relabellings: p = {h}/{int(at):,} "
                    "(Besag & Clifford 1991), interval exact for sampling to the "
                    f"{h}th exceedance" if np.isfinite(at)
                    else f"fewer than {h} exceedances: p = (b + 1)/(m + 1)")
        else:
            verdict = res.stop_verdict[i] if i < len(res.stop_verdict) else ""
            what = (f"decided {verdict.replace('alpha', format(res.stop['alpha'], 'g'))} "
                    f"after {int(at):,} relabellings (Gandy 2009)" if np.isfinite(at)
                    else "undecided: the p-value is too close to alpha for this many "
                         "relabellings")
        lines.append(f"  {term}: {what}")
    return lines


def header_lines(res: Any) -> list[str]:
    """The lines above the table: what was fitted, on what, with which null."""
    kind = _kind(res)
    mode = "two-mode" if res.two_mode else ("directed" if res.directed else "undirected")
    if kind == "regression":
        k = len(_tested(res))
        fit = (f"R squared {res.r2:.4f}" if np.isfinite(res.r2)
               else f"deviance {res.deviance:.4f}" if np.isfinite(res.deviance) else "")
        lines = [f"regression of {res.response} on {k} predictor{'s' * (k != 1)} (MRQAP)",
                 f"model {res.model} | scheme {res.scheme} | statistic {res.statistic}"
                 + (f" | {fit}" if fit else "")]
    elif kind == "correlation":
        lines = [f"QAP correlation of {res.response} with {res.terms[0]} ({res.method})"]
    else:
        lines = [f"QAP correlations of {len(res.layers)} networks, {len(res.terms)} pairs "
                 f"({res.method}), shared relabellings"]
    lines.append(f"{res.n_nodes:,} nodes | {res.n_dyads:,} dyads ({mode})")
    lines.append(_draws_line(res))
    return lines


def _interval(res: Any, i: int) -> str:
    if not np.isfinite(res.p[i]):
        return "-"
    if res.exact:
        return "exact"
    lo, hi = res.p_interval[i]
    return f"[{_pval(lo, 0).strip()}, {_pval(hi, 0).strip()}]"


def format_table(res: Any, *, alpha: float | None = None) -> str:
    """The terminal table: what was run, one row per term, then notes.

    Columns: the estimate (coefficient or r) and its classical standard error, the
    statistic, the permutation p-value with its Monte Carlo standard error and 95%
    Clopper-Pearson interval, and (several tested terms) the familywise adjusted p.
    """
    a = _alpha(res, alpha)
    kind = _kind(res)
    tested = _tested(res)
    several = len(tested) > 1
    est_name = "estimate" if kind == "regression" else "r"
    w = max(12, max(len(t) for t in res.terms) + 2)
    cols = [(f"{'term':<{w}}", w), (f"{est_name:>11}", 11), (f"{'std.error':>11}", 11)]
    if kind == "regression":
        cols.append((f"{res.statistic:>9}", 9))
    cols += [(f"{'p':>9}", 9), (f"{'MC s.e.':>9}", 9), (f"{'95% interval':>21}", 21)]
    if several:
        cols.append((f"{'adjusted p':>12}", 12))
    cols.append(("  ", 2))
    head = "".join(c for c, _ in cols).rstrip()
    lines = header_lines(res) + _stop_lines(res) + ["", head, "-" * len(head)]
    est = res._estimates()
    for i, term in enumerate(res.terms):
        row = f"{term:<{w}}{_num(est[i], 11)}{_num(res.se[i], 11)}"
        if kind == "regression":
            row += _num(res.stat[i], 9, 3)
        tested_i = np.isfinite(res.p[i])
        se = "-" if res.exact or not tested_i else _pval(res.p_se[i], 0).strip()
        row += f"{_pval(res.p[i], 9)}{se:>9}{_interval(res, i):>21}"
        decisive = res.p_adjusted[i] if several else res.p[i]
        if several:
            row += _pval(res.p_adjusted[i], 12)
        mark = "*" if tested_i and np.isfinite(decisive) and decisive <= a else ""
        lines.append((row + f" {mark}").rstrip())
    if kind == "layers":
        lines += [""] + matrix_lines(res, alpha=a)
    lines += ["", NOTE_P]
    if not res.exact:
        lines.append(NOTE_INTERVAL)
    lines.append(NOTE_ADJUSTED.format(k=len(tested), alpha=a) if several
                 else NOTE_ONE.format(alpha=a))
    lines.append(NOTE_SIDED)
    if np.any(np.asarray(res.failed) > 0):
        names = [res.terms[i] for i in tested]
        bad = ", ".join(f"{t}: {int(f)}" for t, f in zip(names, res.failed) if f)
        lines.append(f"failed permuted fits, counted as extreme: {bad}")
    for note in res.notes:
        lines.append(f"note: {note}")
    return "\n".join(lines)


def matrix_lines(res: LayerCorrelationResult, *, alpha: float) -> list[str]:
    """The correlation matrix as text; * marks pairs with adjusted p <= alpha."""
    r = res.matrix("r")
    padj = res.matrix("p_adjusted")
    names = list(res.layers)
    w = max(8, max(len(n) for n in names) + 1)
    lines = [f"correlation matrix (* adjusted p <= {alpha:g})",
             " " * w + "".join(f"{n[:w - 1]:>{w}}" for n in names)]
    for i, name in enumerate(names):
        cells = []
        for j in range(len(names)):
            if i == j:
                cells.append(f"{'-':>{w}}")
            else:
                mark = "*" if padj[i, j] <= alpha else " "
                cells.append(f"{r[i, j]:>{w - 1}.3f}{mark}")
        lines.append(f"{name:<{w}}" + "".join(cells))
    return lines


# --------------------------------------------------------------------------- CSV / JSON

CSV_COLUMNS = TERM_COLUMNS  # the rows themselves: dyadperm.result.term_rows (to_frame too)


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
    from . import store

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
    from . import plots

    a = _alpha(res, alpha)
    out = []
    if _kind(res) == "layers":
        out.append(("correlation_matrix.png",
                    "Correlation matrix of the networks; * marks familywise adjusted "
                    f"p <= {a:g}", plots.correlation_heatmap(res, alpha=a)))
    for col, i in enumerate(_tested(res)):
        stem = f"{col + 1:02d}_{_safe(res.terms[i])}"
        out.append((f"{stem}_null.png", f"{res.terms[i]}: null distribution and the observed "
                    "statistic", plots.null_histogram(res, col, alpha=a)))
        if not res.exact:
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
    kind = _kind(res)
    tested = _tested(res)
    several = len(tested) > 1
    est_name = "estimate" if kind == "regression" else "r"
    heads = ["term", est_name, "std.error"] + ([res.statistic] if kind == "regression" else []) \
        + ["p", "MC s.e.", "95% interval", "p (stat &ge; obs)", "p (stat &le; obs)"] \
        + (["adjusted p"] if several else []) + [""]
    rows = ["<tr>" + "".join(f"<th>{h if '&' in h else _e(h)}</th>" for h in heads) + "</tr>"]
    est = res._estimates()
    for i, term in enumerate(res.terms):
        tested_i = np.isfinite(res.p[i])
        cells = [_e(term), _e(_num(est[i], 0).strip()), _e(_num(res.se[i], 0).strip())]
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
    tested = _tested(res)
    parts = ["<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
             f"<title>{_e(title)}</title>", f"<style>{_CSS}</style></head><body>",
             f"<h1>{_e(title)}</h1>",
             "<p>" + "<br>".join(_e(x) for x in header_lines(res) + _stop_lines(res)) + "</p>",
             "<h2>Results</h2>", _result_table_html(res, a), '<p class="small">',
             "<br>".join(_e(x) for x in [NOTE_P] + ([] if res.exact else [NOTE_INTERVAL])
                         + [NOTE_ADJUSTED.format(k=len(tested), alpha=a) if len(tested) > 1
                            else NOTE_ONE.format(alpha=a)]
                         + [f"note: {n}" for n in res.notes]), "</p>"]
    if _kind(res) == "layers":
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
    from .api import open_result

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
