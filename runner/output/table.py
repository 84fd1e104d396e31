"""The text of a result: the terminal table, its header lines and notes.

Results (``dyadperm.output.result``) call these for ``table()`` and ``repr``; reports
(``dyadperm.output.report``) put the same lines in their files. Nothing here reads files or
knows how a result was computed: it formats the fields of a result object.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from ..errors import InputError
from ..settings import StopRule

#: One-line notes under the table, in the order they are shown.
NOTE_P = ("p: two-sided permutation p-value (|statistic| at least the observed); "
          "MC s.e.: its Monte Carlo standard error")
#: Column of the p-value's own interval (kept apart from a coefficient's "95% CI").
P_RANGE = "p 95% range"
NOTE_INTERVAL = (P_RANGE + ": Clopper-Pearson interval of the Monte Carlo p-value "
                 "(b + 1 of m + 1 relabellings): where the p of an endless run would lie")
NOTE_ADJUSTED = ("adjusted p: familywise, single-step max statistic over the {k} tested "
                 "terms (Westfall & Young 1993); * marks adjusted p <= {alpha:g}")
NOTE_ONE = "* marks p <= {alpha:g}"
NOTE_SIDED = "one-sided p-values and exceedance counts: report --csv or --json"
NOTE_CI = ("{label}: the coefficients that the scheme's own test, on the same relabellings, "
           "does not reject at {alpha:g} (test inversion); the Monte Carlo errors of its ends: "
           "report --csv or --json")


# --------------------------------------------------------------------------- helpers

def _alpha(res: Any, alpha: float | None) -> float:
    if alpha is None:
        return float(res.alpha)
    if isinstance(alpha, bool) or not isinstance(alpha, (int, float)) or not 0 < alpha < 1:
        raise InputError(f"`alpha` must be a number with 0 < alpha < 1; got {alpha!r}")
    return float(alpha)


def _draws_line(res: Any) -> str:
    if res.exact:
        w = _workers(res)
        return (f"null: all {res.permutations:,} relabellings (exact enumeration"
                f"{w})")
    return (f"null: {res.permutations:,} random relabellings, seed {res.seed} "
            f"(chunks of {res.chunk_size:,}{_workers(res)})")


def _workers(res: Any) -> str:
    """", N workers" when the result says how many computed its chunks."""
    w = getattr(res, "workers", None)
    return "" if w is None else f", {w} worker{'s' * (w != 1)}"


def _stop_lines(res: Any) -> list[str]:
    """What the stop rule did: the run as a whole, then each tested term."""
    rule = (res.stop or {}).get("rule", "none")
    if rule == "none" or res.exact:
        return []
    desc = StopRule.from_dict(res.stop).describe()
    if res.stopped_by:
        lines = [f"stop rule {desc}: stopped the run after {res.permutations:,} of "
                 f"{res.planned:,} planned relabellings (every tested term done)"]
    else:
        lines = [f"stop rule {desc}: ran all {res.permutations:,} planned relabellings "
                 "(not every term was done earlier)"]
    for i in res.tested_index():
        term, at = res.terms[i], res.stop_at[i]
        if not np.isfinite(res.p[i]):
            lines.append(f"  {term}: no observed statistic, not waited for (see the note)")
            continue
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
    kind = res.kind
    mode = "two-mode" if res.two_mode else ("directed" if res.directed else "undirected")
    if kind == "regression":
        k = len(res.tested_index())
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


def ci_label(res: Any) -> str | None:
    """The column label of a result's coefficient intervals ("95% CI"), or None."""
    level = getattr(res, "ci_level", float("nan"))
    if level is None or not np.isfinite(level) or not np.isfinite(res.ci_low).any():
        return None  # no interval at all (the notes say why)
    return f"{100 * level:g}% CI"


def ci_text(res: Any, i: int) -> str:
    """Term i's interval as "[low, high]" ("-" where there is none)."""
    lo, hi = res.ci_low[i], res.ci_high[i]
    if not (np.isfinite(lo) and np.isfinite(hi)):
        return "-"
    return f"[{_bound(lo)}, {_bound(hi)}]"


def _bound(x: float) -> str:
    """An interval end with four significant digits."""
    return f"{x:.3e}" if x != 0 and (abs(x) >= 1e5 or abs(x) < 1e-3) else f"{x:.4g}"


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
    kind = res.kind
    tested = res.tested_index()
    several = len(tested) > 1
    est_name = "estimate" if kind == "regression" else "r"
    w = max(12, max(len(t) for t in res.terms) + 2)
    cols = [(f"{'term':<{w}}", w), (f"{est_name:>11}", 11), (f"{'std.error':>11}", 11)]
    label = ci_label(res)
    if label is not None:
        # wide enough for the longest interval and a space before it
        ci_w = max(23, 2 + max(len(ci_text(res, i)) for i in range(len(res.terms))))
        cols.append((f"{label:>{ci_w}}", ci_w))
    if kind == "regression":
        cols.append((f"{res.statistic:>9}", 9))
    cols += [(f"{'p':>9}", 9), (f"{'MC s.e.':>9}", 9), (f"{P_RANGE:>21}", 21)]
    if several:
        cols.append((f"{'adjusted p':>12}", 12))
    cols.append(("  ", 2))
    head = "".join(c for c, _ in cols).rstrip()
    lines = header_lines(res) + _stop_lines(res) + ["", head, "-" * len(head)]
    est = res._estimates()
    for i, term in enumerate(res.terms):
        row = f"{term:<{w}}{_num(est[i], 11)}{_num(res.se[i], 11)}"
        if label is not None:
            row += f"{ci_text(res, i):>{ci_w}}"
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
    if label is not None:
        lines.append(NOTE_CI.format(label=label, alpha=1 - res.ci_level))
    if np.any(np.asarray(res.failed) > 0):
        names = [res.terms[i] for i in tested]
        bad = ", ".join(f"{t}: {int(f)}" for t, f in zip(names, res.failed) if f)
        lines.append(f"failed permuted fits, counted as extreme: {bad}")
    for note in res.notes:
        lines.append(f"note: {note}")
    return "\n".join(lines)


def matrix_lines(res: Any, *, alpha: float) -> list[str]:
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


def _num(x: float, width: int, digits: int = 4) -> str:
    if x is None or not np.isfinite(x):
        return "-".rjust(width)
    sci = x != 0 and (abs(x) >= 1e5 or abs(x) < 1e-3)
    text = f"{x:.{digits - 1}e}" if sci else f"{x:.{digits}f}"
    while len(text) >= width and digits > 0:  # fewer digits: keep a space before the column
        digits -= 1
        text = f"{x:.{max(digits - 1, 0)}e}" if sci else f"{x:.{digits}f}"
    return text.rjust(width)


def _pval(x: float, width: int) -> str:
    if not np.isfinite(x):
        return "-".rjust(width)
    return (f"{x:.4f}" if x >= 1e-4 else f"{x:.1e}").rjust(width)
