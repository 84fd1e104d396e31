"""What a study's inputs look like: the summary ``dyadperm check`` prints.

Nodes, dyads, density, missing values, symmetry per network, and the correlations and
condition number of the predictors over the dyad set (collinearity); which route the study
takes (sparse or dense), the schemes it can use there, and the memory the dense route would
need. A design that the run would refuse (the one rule of ``design.check_design``) is named
in a note.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..errors import InputError
from ..kernels.stats import column_summary
from . import memory
from .design import (MISSING_SHARE, STREAM_DYADS, check_design, dyads_phrase, fit_pivot,
                     fold_rows, iter_dyad_rows, prepare, standardised_condition)
from .sparse import NETWORK, SparseNetwork, prepare_sparse
from .study_file import read_study
from .waves import is_waves, prepare_waves, wave_lines

# Share of missing dyad values above which a network is flagged.
MOSTLY_MISSING = 0.5


@dataclass(frozen=True)
class NetworkSummary:
    name: str
    role: str
    observed: int
    missing: int
    nonzero: int
    minimum: float
    maximum: float
    mean: float
    symmetric: bool


@dataclass(frozen=True)
class StudySummary:
    title: str
    n_nodes: str
    directed: bool
    two_mode: bool
    n_dyads: int
    complete_dyads: int
    networks: tuple[NetworkSummary, ...]
    correlations: np.ndarray
    condition: float
    notes: tuple[str, ...]
    route: tuple[str, ...] = ()

    def text(self) -> str:
        mode = "two-mode" if self.two_mode else ("directed" if self.directed else "undirected")
        lines = [f"study: {self.title}",
                 f"nodes: {self.n_nodes}   dyads: {self.n_dyads:,} ({mode})   complete in "
                 f"every network: {self.complete_dyads:,}"] + list(self.route) + [""]
        w = max(10, max(len(n.name) for n in self.networks) + 2)
        ow = max(10, max(len(f"{n.observed:,}") for n in self.networks) + 2)
        lines.append(f"{'network':<{w}}{'role':<11}{'observed':>{ow}}{'missing':>9}"
                     f"{'density':>9}{'min':>11}{'max':>11}{'mean':>11}  symmetric")
        for n in self.networks:
            dens = n.nonzero / n.observed if n.observed else float("nan")
            lines.append(f"{n.name:<{w}}{n.role:<11}{n.observed:>{ow},}{n.missing:>9,}"
                         + (f"{dens:>9.3f}" if not 0 < dens < 1e-3 else f"{dens:>9.1e}")
                         + f"{n.minimum:>11.4g}{n.maximum:>11.4g}{n.mean:>11.4g}  "
                         f"{'yes' if n.symmetric else 'no'}")
        preds = [n.name for n in self.networks if n.role == "predictor"]
        if len(preds) > 1 and self.correlations.size:
            lines += ["", "correlation of predictors over the complete dyads:"]
            lines.append(" " * w + "".join(f"{p[:9]:>10}" for p in preds))
            for i, p in enumerate(preds):
                lines.append(f"{p:<{w}}" + "".join(f"{self.correlations[i, j]:>10.3f}"
                                                   for j in range(len(preds))))
            lines.append(f"condition number of the standardised predictors: {self.condition:.3g}")
        for note in self.notes:
            lines.append(f"note: {note}")
        return "\n".join(lines)


def describe_study(path: str | Path, *, storage: str | None = None) -> StudySummary:
    """Load and validate a study file, and summarise its inputs (raises InputError);
    ``storage`` overrides the file's (the layers the dense route would hold)."""
    st = read_study(path, storage=storage)
    if isinstance(st.response, SparseNetwork):
        return _describe_sparse(st)
    route = route_lines(st)
    if is_waves(st.response):  # a panel: the waves side by side, pooled below
        prep, info = prepare_waves(st.response, st.predictors,
                                   directed=st.spec["study"]["directed"], groups=st.groups,
                                   dyads=st.spec["test"]["dyads"], wave_effects=False)
        route = route + tuple(wave_lines(info, prep.response_name))
    else:
        prep = prepare(st.response, st.predictors, directed=st.spec["study"]["directed"],
                       groups=st.groups, dyads=st.spec["test"]["dyads"])
    names = prep.names + (prep.response_name,)
    roles = ["predictor"] * prep.k + ["response"]
    nets = []
    notes = list(st.notes)
    complete = 0
    sums = np.zeros((len(names) + 1, len(names) + 1))
    r_acc = np.zeros((0, prep.k + 1))
    # each network's counts, extremes and sum, block by block over the dyad set (no
    # temporary the size of a matrix)
    L = len(names)
    observed = np.zeros(L, dtype=np.int64)
    nonzero = np.zeros(L, dtype=np.int64)
    total = np.zeros(L)
    low = np.full(L, np.inf)
    high = np.full(L, -np.inf)
    for block in iter_dyad_rows(prep, prep.matrices if prep.exact is None else prep.exact):
        ok = ~np.isnan(block).any(axis=1)
        complete += int(ok.sum())
        z = np.concatenate([np.ones((int(ok.sum()), 1)), block[ok]], axis=1)
        sums += z.T @ z
        r_acc = fold_rows(r_acc, z[:, :prep.k + 1])  # R of [1, X] over the complete dyads
        column_summary(block, observed, nonzero, total, low, high)
    for idx, (name, role) in enumerate(zip(names, roles)):
        obs = int(observed[idx])
        miss = prep.n_dyads - obs
        nets.append(NetworkSummary(
            name, role, obs, miss, int(nonzero[idx]),
            float(low[idx]) if obs else float("nan"),
            float(high[idx]) if obs else float("nan"),
            float(total[idx] / obs) if obs else float("nan"),
            _symmetric_input(prep.matrices[idx], prep)))
        if prep.n_dyads and miss / prep.n_dyads > MOSTLY_MISSING:
            notes.append(f"{name!r} is mostly missing ({miss:,} of {prep.n_dyads:,} dyads)")
    if 0 < complete < prep.n_dyads:
        notes.append(f"{prep.n_dyads - complete:,} of {prep.n_dyads:,} dyads are missing in "
                     "some network: every relabelling fits over its own complete dyads, one "
                     "pass per tested term; with few missing values (up to about "
                     f"{MISSING_SHARE:.0%} of the dyads) the complete-data kernel and a "
                     "correction at the missing ones, else a sum over the complete dyads one "
                     "by one, many times slower (`dyadperm plan` times a run)")
    k = prep.k
    n = max(sums[0, 0], 1.0)
    mean = sums[0, 1:] / n
    cov = sums[1:, 1:] / n - np.outer(mean, mean)
    sd = np.sqrt(np.clip(np.diag(cov), 0, None))
    with np.errstate(divide="ignore", invalid="ignore"):
        corr = cov / np.outer(sd, sd)
    pc = corr[:k, :k]
    cond = 1.0
    if complete > k + 1:
        rx = r_acc[:k + 1, :k + 1]
        raw = np.sqrt((rx[:, 1:] * rx[:, 1:]).sum(axis=0))
        pivot = fit_pivot(prep.complete, model=st.spec["test"].get("model") or "linear")
        try:
            cond = check_design(rx[1:, 1:], prep.names, pivot=pivot, raw_norms=raw,
                                where=dyads_phrase(prep, complete))
        except InputError as err:
            notes.append(f"a run would refuse this design: {err}")
            if np.all(np.sqrt((rx[1:, 1:] ** 2).sum(axis=0)) > 0):
                cond = standardised_condition(rx[1:, 1:])
    else:
        notes.append(f"too few complete dyads for the model: {complete} for {k + 1} terms")
    shape = (f"{prep.mask.shape[0]} x {prep.mask.shape[1]}" if prep.two_mode
             else f"{prep.mask.shape[0]}")
    return StudySummary(st.title, shape, prep.directed, prep.two_mode, prep.n_dyads, complete,
                        tuple(nets), pc, cond, tuple(notes), route)


def _symmetric_input(mat: np.ndarray, prep) -> bool:
    """Whether a one-mode network equals its transpose (missing values read as 0; in a
    panel, wave by wave), compared a block of rows at a time against the same columns."""
    if prep.two_mode:
        return False
    if not prep.directed:
        return True
    n = mat.shape[0]
    w = max(prep.waves, 1)
    step = max(1, STREAM_DYADS // max(mat.shape[1], 1))
    for i0 in range(0, n, step):
        i1 = min(i0 + step, n)
        rows = np.asarray(mat[i0:i1])
        cols = np.asarray(mat[:, i0 * w:i1 * w])
        rows = np.where(np.isnan(rows), 0.0, rows)
        cols = np.where(np.isnan(cols), 0.0, cols)
        # rows[i, j w + t] (node i0 + i to node j at wave t) against cols[j, i w + t]
        if not np.array_equal(rows.reshape(i1 - i0, n, w),
                              cols.reshape(n, i1 - i0, w).transpose(1, 0, 2)):
            return False
    return True


def route_lines(st) -> tuple[str, ...]:
    """Which route the study takes, the schemes it can use there, and the memory the dense
    route would need (``StudyInputs.route``)."""
    test = st.spec["test"]
    route = st.route
    if test["kind"] == "correlation":
        can = f"a {test['method']} correlation"
    elif test["model"] == "logistic":
        can = "schemes y and dsp (logistic model)"
    else:
        can = "schemes y, dsp and freedman-lane (linear model)"
    need = memory.gib(route.dense_bytes)
    have = "" if route.available is None else f"; {memory.gib(route.available)} available"
    if route.sparse:
        return (f"route: sparse (edge lists and node attributes, no n x n array): {can}; the "
                f"dense route would need {need} of memory{have}",)
    lines = [f"route: dense (n x n arrays, {test['storage']} layers, {need} of memory{have}): "
             f"{can}"]
    if route.blocker is not None:
        lines.append(f"  not the sparse route: {route.blocker}")
    return tuple(lines)


def _describe_sparse(st) -> StudySummary:
    """Summary of a study kept as edge lists (the sparse path): no n x n array is built.

    The inputs are put on the dyad set as the sparse route does (``prepare_sparse``:
    directedness, groups, two-mode), so what is printed is what a run uses.
    """
    test = st.spec["test"]
    prep = prepare_sparse(st.response, st.predictors, directed=st.spec["study"]["directed"],
                          groups=st.groups, dyads=test["dyads"])
    N = prep.n_dyads
    nets = []
    edges = [("response", prep.response_name, prep.y)] + [
        ("predictor", t.name, t.edges) for t in prep.terms if t.kind == NETWORK]
    for role, name, ed in edges:
        w = ed.w
        zeros = ed.size < N  # dyads off the edge list hold 0
        lo = float(min(w.min(initial=np.inf), 0.0 if zeros else np.inf))
        hi = float(max(w.max(initial=-np.inf), 0.0 if zeros else -np.inf))
        nets.append(NetworkSummary(name, role, N, 0, int(np.count_nonzero(w)), lo, hi,
                                   float(w.sum() / N), not prep.directed and not prep.two_mode))
    derived = [t.name for t in prep.terms if t.kind != NETWORK]
    notes = list(st.notes) + [
        "kept as edge lists: the engine's sparse path runs this study; predictors derived "
        "from node attributes: " + (", ".join(derived) or "none")]
    shape = f"{prep.n} x {prep.m}" if prep.two_mode else str(prep.n)
    return StudySummary(st.title, shape, prep.directed, prep.two_mode, N, N, tuple(nets),
                        np.zeros((0, 0)), float("nan"), tuple(notes), route_lines(st))
