"""Result objects of regressions and correlations, with a text table and a dict form."""

from __future__ import annotations

import math
from dataclasses import dataclass, field, fields
from typing import Any

import numpy as np

from ..inputs.optional import require_pandas
from .table import format_table, header_lines

#: Columns of the per-term table that the CSV report and ``to_frame`` give, in order;
#: layer correlation results add ``LAYER_COLUMNS`` (the two networks of each pair).
TERM_COLUMNS = ("term", "estimate", "std_error", "statistic", "p", "p_se", "p_low", "p_high",
                "p_adjusted", "p_greater", "p_less", "exceedances", "failed", "stop_at",
                "stop_verdict", "ci_low", "ci_high", "ci_low_mc_se", "ci_high_mc_se")
LAYER_COLUMNS = ("network_a", "network_b")


@dataclass(frozen=True, eq=False, repr=False)
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
    # -- precision and many tests (dyadperm.precision) -------------------------------
    #: familywise adjusted p-values, single-step max statistic (Westfall & Young 1993)
    p_adjusted: np.ndarray = field(default=None)
    #: level the stop rule decides at and the report marks results at
    alpha: float = 0.05
    #: the stop rule in force: {"rule", "exceedances", "risk", "alpha"}
    stop: dict = field(default_factory=dict)
    #: the rule that ended the run before its planned total, or None
    stopped_by: str | None = None
    #: relabellings after which each term's stop rule was met (NaN: not met, or no rule)
    stop_at: np.ndarray = field(default=None)
    #: gandy: each term's decision, "p <= alpha", "p > alpha" or "" (undecided)
    stop_verdict: tuple[str, ...] = ()
    #: permutations the run was planned with (``permutations`` is how many it used)
    planned: int = 0
    #: workers that computed the chunks of this call (None: read from a run file, or a
    #: Dask cluster)
    workers: int | None = None
    #: the observed statistic of each tested term through the permutation kernels (the
    #: identity relabelling), which the p-values compare ``null`` with; ``stat`` holds the
    #: fit's own, equal to rounding
    observed: np.ndarray = field(default=None)

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

    def to_frame(self) -> Any:
        """The per-term table as a pandas DataFrame: one row per term, the columns and
        values of the CSV report (``dyadperm report --csv``); NaN where the report leaves
        a cell empty (the intercept's p-values, an undecided stop verdict). Needs pandas.
        """
        pd = require_pandas("to_frame()")
        columns, rows = term_rows(self)
        return pd.DataFrame({name: [np.nan if _empty(row[k]) else row[k] for row in rows]
                             for k, name in enumerate(columns)})

    def __repr__(self) -> str:
        """What the table's header says, and the terms; the arrays stay attributes."""
        rows = getattr(self.null, "shape", (self.permutations,))
        lines = [f"<{type(self).__name__}"] + ["  " + line for line in header_lines(self)]
        lines.append("  terms: " + ", ".join(self.terms))
        lines.append(f"  arrays: p, p_interval, stat, ... and null ({rows[0]:,} x "
                     f"{rows[1] if len(rows) > 1 else '?'}); .table() prints the table>")
        return "\n".join(lines)

    def table(self) -> str:
        """Formatted text table (see the README for how to read it)."""
        return format_table(self)

    #: "regression", "correlation" or "layers": which table and report a result gets
    kind = "regression"

    def tested_index(self) -> np.ndarray:
        """Indices (into ``terms``) of the tested terms, in the column order of ``null``."""
        return np.arange(len(self.terms))


@dataclass(frozen=True, eq=False, repr=False)
class RegressionResult(_Common):
    """Result of :func:`dyadperm.regress`. ``coef`` is the least-squares coefficient of
    each term; ``r2`` the fit's R squared (linear) and ``deviance`` NaN (logistic: the
    reverse)."""

    coef: np.ndarray = field(default=None)
    r2: float = float("nan")
    deviance: float = float("nan")
    #: the interval of each coefficient at ``ci_level``: the values b that the scheme's own
    #: test of beta = b does not reject, on the same relabellings (NaN for the intercept,
    #: and where no interval is computed: see ``notes``; dyadperm.pipeline.intervals)
    ci_low: np.ndarray = field(default=None)
    ci_high: np.ndarray = field(default=None)
    #: 0.95 for 95% intervals; NaN when the run computed none
    ci_level: float = float("nan")
    #: Monte Carlo standard error of ci_low and ci_high (p x 2), from halves of the run
    ci_mc_se: np.ndarray = field(default=None)
    #: leading terms that are fixed, never tested: 1 (the intercept), or with waves one
    #: intercept per wave (``dyadperm.Waves``)
    fixed_terms: int = 1

    def _estimates(self) -> np.ndarray:
        return self.coef

    def tested_index(self) -> np.ndarray:
        """Every term but the leading fixed ones (the intercept, or one per wave):
        relabelling says nothing about them."""
        return np.arange(self.fixed_terms, len(self.terms))


@dataclass(frozen=True, eq=False, repr=False)
class CorrelationResult(_Common):
    """Result of :func:`dyadperm.correlate`: one term, ``r`` the correlation of the two
    networks over the dyad set, ``method`` pearson or spearman."""

    r: np.ndarray = field(default=None)
    method: str = "pearson"
    kind = "correlation"

    def _estimates(self) -> np.ndarray:
        return self.r


@dataclass(frozen=True, eq=False, repr=False)
class LayerCorrelationResult(_Common):
    """Result of :func:`dyadperm.correlate` given several networks: one term per pair.

    ``layers`` names the networks; ``pairs`` holds the (i, j) network indices of each
    term (i < j, row by row of the upper triangle); ``r`` the pair's correlation over
    the dyad set. ``matrix("r")`` (or "p", "p_adjusted", "stat") gives the K x K matrix.
    """

    r: np.ndarray = field(default=None)
    method: str = "pearson"
    layers: tuple[str, ...] = ()
    pairs: tuple[tuple[int, int], ...] = ()
    kind = "layers"

    def _estimates(self) -> np.ndarray:
        return self.r

    def matrix(self, what: str = "r") -> np.ndarray:
        """K x K symmetric matrix of a per-pair field; the diagonal is 1 for r, else NaN."""
        values = np.asarray(getattr(self, what), dtype=np.float64)
        k = len(self.layers)
        out = np.full((k, k), np.nan)
        for (i, j), v in zip(self.pairs, values):
            out[i, j] = out[j, i] = v
        if what == "r":
            np.fill_diagonal(out, 1.0)
        return out


def statistic_label(model: str, statistic: str) -> str:
    """The name a result gives its statistic: the Wald statistic of a logistic fit is a z."""
    return "z" if model == "logistic" and statistic == "t" else statistic


def term_rows(res: _Common) -> tuple[tuple[str, ...], list[list]]:
    """The per-term table: its columns and one row of values per term.

    Values are as stored (numpy floats, NaN where a value does not apply), with ``""``
    for the exceedance and failure counts of an untested term, for the exceedance count of
    a term without an observed statistic (no p-value), and for an empty stop verdict. The CSV report writes these rows (empty cells for ``""`` and non-finite
    numbers); ``to_frame`` holds them with NaN for those cells.
    """
    tested = list(res.tested_index())
    layers = res.kind == "layers"
    est = res._estimates()
    rows = []
    for i, term in enumerate(res.terms):
        col = tested.index(i) if i in tested else None
        verdict = res.stop_verdict[i] if i < len(res.stop_verdict) else ""
        row = [term, est[i], res.se[i], res.stat[i], res.p[i], res.p_se[i],
               res.p_interval[i][0], res.p_interval[i][1], res.p_adjusted[i],
               res.p_greater[i], res.p_less[i],
               "" if col is None or not np.isfinite(res.observed[col]) else int(res.exceed[col]),
               "" if col is None else int(res.failed[col]), res.stop_at[i], verdict]
        row += ci_cells(res, i)
        if layers:
            a, b = res.pairs[i]
            row += [res.layers[a], res.layers[b]]
        rows.append(row)
    return TERM_COLUMNS + (LAYER_COLUMNS if layers else ()), rows


def ci_cells(res: _Common, i: int) -> list:
    """Term i's interval and the Monte Carlo errors of its ends (NaN: none)."""
    if getattr(res, "ci_low", None) is None:
        return [np.nan] * 4
    return [res.ci_low[i], res.ci_high[i], res.ci_mc_se[i][0], res.ci_mc_se[i][1]]


def _empty(v: Any) -> bool:
    """A cell the CSV report leaves empty: "" or a number that is not finite."""
    if isinstance(v, str):
        return v == ""
    return isinstance(v, (float, np.floating)) and not np.isfinite(v)


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

