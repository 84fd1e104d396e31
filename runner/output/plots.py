"""Plots of a result, rendered to PNG bytes with matplotlib's non-interactive Agg canvas.

Figures are built as ``matplotlib.figure.Figure`` objects and drawn by
``FigureCanvasAgg``: no pyplot, no global backend or style is changed. The styling is meant
for print: black and greys with one accent colour, line styles that stay apart in grey,
labelled axes with units, titles that name the term.
"""

from __future__ import annotations

import io
from typing import Any

import numpy as np

from ..pipeline.pvalues import clopper_pearson
from ..pipeline.stopping import exceedances

# One place for the look of every figure.
WIDTH, HEIGHT, DPI = 6.4, 4.6, 150
FONT = 9.5
HIST_FACE = "#b8b8b8"
ACCENT = "#1f4e9a"      # dark blue: reads as dark grey in black-and-white print
ALPHA_LINE = "#b2182b"  # dark red
BAND = "#9ecae1"

_STAT_LABEL = {"t": "t statistic", "z": "Wald z statistic", "coef": "coefficient",
               "score": "score statistic", "r": "correlation r"}


def _figure(width: float = WIDTH, height: float = HEIGHT):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), dpi=DPI, layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def _png(fig) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=DPI, metadata={"Software": None})
    return buf.getvalue()


def _style(ax) -> None:
    ax.tick_params(labelsize=FONT)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)


def _legend(fig, ax) -> None:
    """The legend below the axes, where it cannot hide data."""
    handles, labels = ax.get_legend_handles_labels()
    fig.legend(handles, labels, loc="outside lower center", ncols=2, fontsize=FONT - 1,
               frameon=False)


def _stat_name(res: Any) -> str:
    if res.kind in ("correlation", "layers"):
        return _STAT_LABEL["r"]
    label = _STAT_LABEL.get(res.statistic, res.statistic)
    return label


def _p_text(p: float) -> str:
    return f"{p:.4f}" if p >= 1e-4 else f"{p:.1e}"


def null_histogram(res: Any, column: int, *, alpha: float = 0.05) -> bytes:
    """Histogram of one tested term's permuted statistics, the observed value marked.

    The observed statistic (the one the p-value compares with, ``res.observed``) is a
    solid line; its mirror image -observed a dashed one, since the two-sided p-value counts
    relabellings beyond either. A term with no finite observed statistic shows the null
    alone.
    """
    i = int(res.tested_index()[column])
    term = res.terms[i]
    null = np.asarray(res.null[:, column], dtype=np.float64)
    null = null[np.isfinite(null)]
    obs = float(np.asarray(res.observed)[column])
    fig = _figure()
    ax = fig.add_subplot()
    _style(ax)
    name = _stat_name(res)
    if null.size:
        bins = int(np.clip(np.sqrt(null.size), 20, 60))
        ax.hist(null, bins=bins, color=HIST_FACE, edgecolor="#555555", linewidth=0.4,
                label=f"relabelled ({null.size:,})")
    if not np.isfinite(obs):
        ax.set_xlabel(f"{name} (no unit)", fontsize=FONT)
        ax.set_ylabel("relabellings (count)", fontsize=FONT)
        ax.set_title(f"{term}: null distribution of the {name}\nno p-value: the observed "
                     "statistic could not be computed", fontsize=FONT + 1)
        if null.size:
            _legend(fig, ax)
        return _png(fig)
    ax.axvline(obs, color="black", linewidth=2.0, label=f"observed {obs:.3g}")
    if obs != 0:
        ax.axvline(-obs, color="black", linewidth=1.2, linestyle=(0, (4, 3)),
                   label=f"{-obs:.3g}: the two-sided p counts both tails")
    lo = min(null.min() if null.size else obs, -abs(obs))
    hi = max(null.max() if null.size else obs, abs(obs))
    pad = 0.06 * (hi - lo if hi > lo else 1.0)
    ax.set_xlim(lo - pad, hi + pad)
    ax.set_xlabel(f"{name} (no unit)", fontsize=FONT)
    ax.set_ylabel("relabellings (count)", fontsize=FONT)
    p = res.p[i]
    how = "exact" if res.exact else f"{res.permutations:,} random relabellings"
    ax.set_title(f"{term}: null distribution of the {name}\n"
                 f"two-sided p = {_p_text(p)} ({how})", fontsize=FONT + 1)
    _legend(fig, ax)
    return _png(fig)


def running_p(res: Any, column: int, points: int = 400) -> tuple[np.ndarray, ...]:
    """(l, p_l, low_l, high_l) at up to ``points`` log-spaced l: the p-value after the first
    l relabellings, (b_l + 1) / (l + 1), with its Clopper-Pearson interval."""
    null = np.asarray(res.null[:, column], dtype=np.float64)
    b = np.cumsum(exceedances(null[:, None], np.asarray(res.observed)[column:column + 1])[:, 0])
    m = null.shape[0]
    ls = np.unique(np.geomspace(1, m, num=min(points, m)).astype(np.int64))
    bl = b[ls - 1]
    p = (bl + 1) / (ls + 1)
    band = clopper_pearson(bl + 1, ls + 1)
    return ls, p, band[:, 0], band[:, 1]


def convergence(res: Any, column: int, *, alpha: float = 0.05) -> bytes:
    """The p-value as relabellings accumulate, with its 95% Clopper-Pearson band.

    Log scales on both axes: early relabellings and small p-values stay readable. A
    dotted line marks alpha; a stop rule's stopping point is marked when there is one.
    """
    i = int(res.tested_index()[column])
    term = res.terms[i]
    ls, p, lo, hi = running_p(res, column)
    fig = _figure()
    ax = fig.add_subplot()
    _style(ax)
    ax.fill_between(ls, lo, hi, color=BAND, linewidth=0, label="95% Clopper-Pearson band")
    ax.plot(ls, p, color=ACCENT, linewidth=1.6, label="p after the first l relabellings")
    ax.axhline(alpha, color=ALPHA_LINE, linewidth=1.2, linestyle=(0, (1, 2)),
               label=f"alpha = {alpha:g}")
    at = res.stop_at[i] if res.stop_at is not None else np.nan
    if np.isfinite(at):
        ax.axvline(at, color="black", linewidth=1.0, linestyle=(0, (5, 2)),
                   label=f"stop rule met ({int(at):,})")
    ax.set_xscale("log")
    ax.set_yscale("log")
    floor = 0.5 * min(float(lo[lo > 0].min()) if (lo > 0).any() else alpha, alpha)
    ax.set_ylim(floor, 1.3)
    ax.set_xlim(1, max(ls[-1], 2))
    ax.set_xlabel("relabellings used, l (log scale)", fontsize=FONT)
    ax.set_ylabel("p-value, (b + 1) / (l + 1) (log scale)", fontsize=FONT)
    if np.isfinite(at):
        sub = (f"reported p = {_p_text(res.p[i])}, set by the stop rule after "
               f"{int(at):,} relabellings")
    else:
        sub = f"reported p = {_p_text(res.p[i])} after {res.permutations:,} relabellings"
    ax.set_title(f"{term}: convergence of the permutation p-value\n{sub}", fontsize=FONT + 1)
    _legend(fig, ax)
    return _png(fig)


def correlation_heatmap(res: Any, *, alpha: float = 0.05) -> bytes:
    """The networks' correlation matrix as a heat map; each cell shows r and its
    familywise adjusted p, and * marks adjusted p <= alpha."""
    r = res.matrix("r")
    padj = res.matrix("p_adjusted")
    names = list(res.layers)
    k = len(names)
    size = max(4.2, 1.1 * k + 2.2)
    fig = _figure(size + 1.0, size)
    ax = fig.add_subplot()
    lim = max(0.1, float(np.nanmax(np.abs(r - np.eye(k)))) if k > 1 else 1.0)
    show = r.copy()
    np.fill_diagonal(show, np.nan)
    from matplotlib import colormaps

    cmap = colormaps["RdBu_r"].with_extremes(bad="#eeeeee")  # the diagonal: light grey
    im = ax.imshow(show, cmap=cmap, vmin=-lim, vmax=lim)
    for a in range(k):
        for b in range(k):
            if a == b:
                ax.text(b, a, "-", ha="center", va="center", fontsize=FONT, color="#555555")
                continue
            dark = abs(r[a, b]) > 0.6 * lim
            colour = "white" if dark else "black"
            mark = "*" if padj[a, b] <= alpha else ""
            ax.text(b, a - 0.12, f"{r[a, b]:.2f}{mark}", ha="center", va="center",
                    fontsize=FONT + 1, color=colour, fontweight="bold" if mark else "normal")
            ax.text(b, a + 0.22, f"adj. p {_p_text(padj[a, b])}", ha="center", va="center",
                    fontsize=FONT - 2, color=colour)
    ax.set_xticks(range(k), labels=names, rotation=30, ha="right", fontsize=FONT)
    ax.set_yticks(range(k), labels=names, fontsize=FONT)
    bar = fig.colorbar(im, ax=ax, shrink=0.8)
    bar.set_label(f"{res.method.capitalize()} correlation r over the dyad set", fontsize=FONT)
    bar.ax.tick_params(labelsize=FONT - 1)
    ax.set_title(f"QAP correlations of {k} networks ({res.permutations:,} shared "
                 f"relabellings)\n* familywise adjusted p \u2264 {alpha:g} "
                 "(max statistic, Westfall & Young 1993)", fontsize=FONT + 1)
    return _png(fig)
