"""What a study's inputs look like: the summary ``dyadperm check`` prints.

Nodes, dyads, density, missing values, symmetry per network, and the correlations and
condition number of the predictors over the dyad set (collinearity). A design that the
run would refuse (the one rule of ``design.check_design``) is named in a note.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..errors import InputError
from .design import (check_design, dyads_phrase, fit_pivot, fold_rows, iter_dyad_rows, prepare,
                     standardised_condition)
from .sparse import SparseNetwork
from .study_file import read_study

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

    def text(self) -> str:
        mode = "two-mode" if self.two_mode else ("directed" if self.directed else "undirected")
        lines = [f"study: {self.title}",
                 f"nodes: {self.n_nodes}   dyads: {self.n_dyads:,} ({mode})   complete in "
                 f"every network: {self.complete_dyads:,}", ""]
        w = max(10, max(len(n.name) for n in self.networks) + 2)
        lines.append(f"{'network':<{w}}{'role':<11}{'observed':>10}{'missing':>9}{'density':>9}"
                     f"{'min':>11}{'max':>11}{'mean':>11}  symmetric")
        for n in self.networks:
            dens = n.nonzero / n.observed if n.observed else float("nan")
            lines.append(f"{n.name:<{w}}{n.role:<11}{n.observed:>10,}{n.missing:>9,}{dens:>9.3f}"
                         f"{n.minimum:>11.4g}{n.maximum:>11.4g}{n.mean:>11.4g}  "
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


def describe_study(path: str | Path) -> StudySummary:
    """Load and validate a study file, and summarise its inputs (raises InputError)."""
    st = read_study(path)
    if isinstance(st.response, SparseNetwork):
        return _describe_sparse(st)
    prep = prepare(st.response, st.predictors, directed=st.spec["study"]["directed"],
                   groups=st.groups, dyads=st.spec["test"]["dyads"])
    names = prep.names + (prep.response_name,)
    roles = ["predictor"] * prep.k + ["response"]
    nets = []
    notes = list(st.notes)
    complete = 0
    sums = np.zeros((len(names) + 1, len(names) + 1))
    r_acc = np.zeros((0, prep.k + 1))
    for block in iter_dyad_rows(prep, prep.matrices):
        ok = ~np.isnan(block).any(axis=1)
        complete += int(ok.sum())
        z = np.concatenate([np.ones((int(ok.sum()), 1)), block[ok]], axis=1)
        sums += z.T @ z
        r_acc = fold_rows(r_acc, z[:, :prep.k + 1])  # R of [1, X] over the complete dyads
    for idx, (name, role) in enumerate(zip(names, roles)):
        vals = prep.matrices[idx][prep.mask]
        fin = vals[~np.isnan(vals)]
        miss = int(vals.size - fin.size)
        nets.append(NetworkSummary(
            name, role, int(fin.size), miss, int(np.count_nonzero(fin)),
            float(fin.min()) if fin.size else float("nan"),
            float(fin.max()) if fin.size else float("nan"),
            float(fin.mean()) if fin.size else float("nan"),
            _symmetric_input(prep.matrices[idx], prep)))
        if vals.size and miss / vals.size > MOSTLY_MISSING:
            notes.append(f"{name!r} is mostly missing ({miss:,} of {vals.size:,} dyads)")
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
                        tuple(nets), pc, cond, tuple(notes))


def _symmetric_input(mat: np.ndarray, prep) -> bool:
    if prep.two_mode:
        return False
    if not prep.directed:
        return True
    a = np.where(np.isnan(mat), 0.0, mat)
    return bool(np.array_equal(a, a.T))


def _describe_sparse(st) -> StudySummary:
    """Summary of a study kept as edge lists (the sparse path): no n x n array is built."""
    n = len(st.node_ids)
    directed = st.spec["study"]["directed"]
    nets = []
    for role, name, net in [("response", st.response.name or "response", st.response)] + [
            ("predictor", nm, p) for nm, p in st.predictors.items() if isinstance(p, SparseNetwork)]:
        rows, cols = np.asarray(net.rows), np.asarray(net.cols)
        w = np.ones(rows.size) if net.weights is None else np.asarray(net.weights, dtype=float)
        w = w[rows != cols]
        dyads = n * (n - 1) if directed is not False else n * (n - 1) // 2
        nonzero = int(np.count_nonzero(w))
        nets.append(NetworkSummary(name, role, dyads, 0, nonzero, float(min(w.min(initial=0), 0)),
                                   float(max(w.max(initial=0), 0)), float(w.sum() / dyads),
                                   directed is False))
    derived = [nm for nm, p in st.predictors.items() if not isinstance(p, SparseNetwork)]
    notes = list(st.notes) + [
        "kept as edge lists: the engine's sparse path runs this study (scheme y or "
        "correlation); predictors derived from node attributes: " + (", ".join(derived) or "none")]
    return StudySummary(st.title, str(n), directed is not False, False, nets[0].observed,
                        nets[0].observed, tuple(nets), np.zeros((0, 0)), float("nan"),
                        tuple(notes))
