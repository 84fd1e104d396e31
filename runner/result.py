"""Result objects of regressions and correlations, with a text table and a dict form."""

from __future__ import annotations

import math
from dataclasses import dataclass, field, fields
from typing import Any

import numpy as np


@dataclass(frozen=True, eq=False)
class _Common:
    """Fields shared by regression and correlation results.

    Arrays of length p (one entry per term, intercept first for regressions): ``se``,
    ``stat``, ``p``, ``p_greater``, ``p_less``, ``p_se`` (NaN for the intercept:
    relabelling says nothing about it), ``p_interval`` (p x 2). ``null`` holds the m x k
    permuted statistics of the k tested terms, in permutation order.
    """

    terms: tuple[str, ...]
    se: np.ndarray
    stat: np.ndarray
    p: np.ndarray
    p_greater: np.ndarray
    p_less: np.ndarray
    p_se: np.ndarray
    p_interval: np.ndarray
    null: Any
    permutations: int
    exact: bool
    n_nodes: int
    n_dyads: int
    scheme: str
    model: str
    statistic: str
    seed: int | None
    directed: bool
    two_mode: bool
    response: str
    exceed: np.ndarray
    failed: np.ndarray
    chunk_size: int
    notes: tuple[str, ...]

    # -- shared helpers -----------------------------------------------------------------
    def _estimates(self) -> np.ndarray:
        raise NotImplementedError

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-ready dict (lists; NaN and infinities as None); ``null`` left out."""
        out: dict[str, Any] = {}
        for f in fields(self):
            if f.name == "null":
                continue
            out[f.name] = _plain(getattr(self, f.name))
        return out

    def table(self) -> str:
        """Formatted text table (see the README for how to read it)."""
        return format_table(self)


@dataclass(frozen=True, eq=False)
class RegressionResult(_Common):
    """Result of :func:`dyadperm.regress`. ``coef`` is the least-squares coefficient of
    each term; ``r2`` the fit's R squared (linear) and ``deviance`` NaN (logistic: the
    reverse)."""

    coef: np.ndarray = field(default=None)
    r2: float = float("nan")
    deviance: float = float("nan")

    def _estimates(self) -> np.ndarray:
        return self.coef


@dataclass(frozen=True, eq=False)
class CorrelationResult(_Common):
    """Result of :func:`dyadperm.correlate`: one term, ``r`` the correlation of the two
    networks over the dyad set, ``method`` pearson or spearman."""

    r: np.ndarray = field(default=None)
    method: str = "pearson"

    def _estimates(self) -> np.ndarray:
        return self.r


def _plain(v: Any) -> Any:
    if isinstance(v, np.ndarray):
        return [_plain(x) for x in v.tolist()] if v.ndim else _plain(v.item())
    if isinstance(v, (list, tuple)):
        return [_plain(x) for x in v]
    if isinstance(v, (np.floating, float)):
        f = float(v)
        return f if math.isfinite(f) else None
    if isinstance(v, (np.integer,)):
        return int(v)
    if isinstance(v, np.bool_):
        return bool(v)
    return v


def _num(x: float, width: int, digits: int = 4) -> str:
    if x is None or not np.isfinite(x):
        return "-".rjust(width)
    if x != 0 and (abs(x) >= 1e5 or abs(x) < 1e-3):
        return f"{x:.{digits - 1}e}".rjust(width)
    return f"{x:.{digits}f}".rjust(width)


def _pval(x: float, width: int) -> str:
    if not np.isfinite(x):
        return "-".rjust(width)
    return (f"{x:.4f}" if x >= 1e-4 else f"{x:.1e}").rjust(width)


def format_table(res: _Common) -> str:
    """The terminal table: header lines on the run, then one row per term."""
    kind = "correlation" if isinstance(res, CorrelationResult) else "regression"
    mode = "two-mode" if res.two_mode else ("directed" if res.directed else "undirected")
    if res.exact:
        draws = f"all {res.permutations:,} relabellings (exact)"
    else:
        draws = f"{res.permutations:,} random relabellings, seed {res.seed}"
    lines = []
    if kind == "regression":
        fit = (f"R squared {res.r2:.4f}" if np.isfinite(res.r2) else f"deviance {res.deviance:.4f}")
        lines.append(f"response: {res.response}   model: {res.model}   scheme: {res.scheme}   "
                     f"statistic: {res.statistic}")
    else:
        fit = f"{res.method} correlation"
        lines.append(f"correlation of {res.response} with {res.terms[0]} ({res.method}), QAP")
    lines.append(f"nodes: {res.n_nodes}   dyads: {res.n_dyads:,} ({mode})   {fit}")
    lines.append(f"null: {draws}")
    est_name = "estimate" if kind == "regression" else "r"
    stat_name = res.statistic if kind == "regression" else "r"
    w = max(12, max(len(t) for t in res.terms) + 2)
    head = (f"{'term':<{w}}{est_name:>12}{'std.error':>12}{stat_name:>10}"
            f"{'p':>10}{'p interval (95%)':>22}{'p upper':>10}{'p lower':>10}")
    lines += ["", head, "-" * len(head)]
    est = res._estimates()
    for i, term in enumerate(res.terms):
        if np.isfinite(res.p[i]):
            lo, hi = res.p_interval[i]
            interval = f"[{_pval(lo, 0).strip()}, {_pval(hi, 0).strip()}]"
        else:
            interval = "-"
        lines.append(f"{term:<{w}}{_num(est[i], 12)}{_num(res.se[i], 12)}{_num(res.stat[i], 10, 3)}"
                     f"{_pval(res.p[i], 10)}{interval:>22}{_pval(res.p_greater[i], 10)}"
                     f"{_pval(res.p_less[i], 10)}")
    lines.append("")
    lines.append("p: two-sided, from relabellings; p upper / p lower: one-sided "
                 "(statistic at least / at most the observed).")
    if not res.exact:
        lines.append("p interval: Clopper-Pearson 95% interval of the Monte Carlo p-value.")
    if np.any(res.failed > 0):
        bad = ", ".join(f"{t}: {int(f)}" for t, f in zip(res.terms[-len(res.failed):], res.failed) if f)
        lines.append(f"failed permuted fits, counted as extreme: {bad}")
    for note in res.notes:
        lines.append(f"note: {note}")
    return "\n".join(lines)
