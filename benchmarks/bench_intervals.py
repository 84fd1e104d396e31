"""What coefficient intervals add to a run: the same run with ``ci=0.95`` and ``ci=None``.

For each size n and scheme (dsp, freedman-lane; 3 predictors, complete data, jobs 1 so a
busy machine slows both alike), prints the wall time of a whole ``dp.regress`` call (setup,
relabellings, p-values, intervals) with and without intervals, best of ``--rounds`` rounds
run in turn, and their ratio (goal: at most 1.10). Also the time spent inverting the tests
alone (``pipeline.intervals.for_terms`` on the stored rows) and a naive baseline: the
interval found by bisection, each step a fresh permutation test of y - b x_k on the same
relabellings (every relabelling refitted with numpy ``lstsq``), to 1e-4 of the
coefficient's standard error.

Usage: python benchmarks/bench_intervals.py [--sizes 90,500] [--permutations 10000]
       [--rounds 3] [--naive-permutations 199]
"""

from __future__ import annotations

import argparse
import os
import platform
import time

import numpy as np

import dyadperm as dp
from dyadperm.pipeline import intervals
from dyadperm.pipeline.permutations import draw


def make(n: int, seed: int = 1):
    rng = np.random.default_rng(seed)
    xs = [rng.normal(size=(n, n)) for _ in range(3)]
    xs[1] += 0.5 * xs[0]
    y = 0.2 * xs[0] - 0.1 * xs[2] + rng.normal(size=(n, n))
    return y, {f"x{i}": x for i, x in enumerate(xs)}


INVERTING: list[float] = []
_for_terms = intervals.for_terms


def _timed_for_terms(*a, **kw):
    """The pipeline's inversion, timed on the way (the time of every call is kept)."""
    t0 = time.perf_counter()
    out = _for_terms(*a, **kw)
    INVERTING.append(time.perf_counter() - t0)
    return out


intervals.for_terms = _timed_for_terms


def timed(fn):
    t0 = time.perf_counter()
    out = fn()
    return time.perf_counter() - t0, out


def naive_interval(y, xs, scheme, m, term="x0"):
    """Bisection on b, each p-value by refitting every relabelling with lstsq (DSP only
    written out: residual of x_k relabelled, t of it in the fit of y - b x_k)."""
    n = y.shape[0]
    off = ~np.eye(n, dtype=bool)
    names = list(xs)
    j = names.index(term)
    X = np.column_stack([np.ones(off.sum())] + [xs[c][off] for c in names])
    Z = np.delete(X, j + 1, axis=1)
    e = X[:, j + 1] - Z @ np.linalg.lstsq(Z, X[:, j + 1], rcond=None)[0]
    E = np.zeros((n, n))
    E[off] = e
    perms = draw(dp.inputs.design.prepare(y, xs).blocks, 1, 0, m)[0]

    def t_of(yb, col):
        A = np.column_stack([Z, col])
        beta, *_ = np.linalg.lstsq(A, yb, rcond=None)
        r = yb - A @ beta
        cov = np.linalg.inv(A.T @ A) * (r @ r) / (len(yb) - A.shape[1])
        return beta[-1] / np.sqrt(cov[-1, -1])

    def p_of(b):
        yb = y[off] - b * xs[term][off]
        obs = abs(t_of(yb, e))
        hits = sum(abs(t_of(yb, E[np.ix_(p, p)][off])) >= obs * (1 - 1e-9) for p in perms)
        return (hits + 1) / (m + 1)

    fit = np.linalg.lstsq(X, y[off], rcond=None)[0][j + 1]
    ends = []
    for direction in (-1, 1):
        inside, outside = fit, fit + direction * 1.0
        while p_of(outside) > 0.05:
            outside += direction * 1.0
        while abs(outside - inside) > 1e-4:
            mid = (inside + outside) / 2
            inside, outside = (mid, outside) if p_of(mid) > 0.05 else (inside, mid)
        ends.append(inside)
    return ends


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--sizes", default="90,500")
    ap.add_argument("--permutations", type=int, default=10_000)
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--naive-permutations", type=int, default=199)
    args = ap.parse_args()
    print(f"machine: {platform.processor() or platform.machine()}, {os.cpu_count()} cores "
          "(shared with other jobs); jobs = 1")
    dp.regress(*make(12), permutations=50, seed=1)  # compile the kernels first
    for n in (int(s) for s in args.sizes.split(",")):
        y, xs = make(n)
        for scheme in ("dsp", "freedman-lane"):
            kw = dict(scheme=scheme, permutations=args.permutations, seed=3, jobs=1)
            best = {None: np.inf, 0.95: np.inf}
            for _ in range(args.rounds):
                for ci in (None, 0.95):
                    INVERTING.clear()
                    t, res = timed(lambda: dp.regress(y, xs, ci=ci, **kw))
                    if t < best[ci]:
                        best[ci] = t
                        if ci:
                            t_inv, rows = sum(INVERTING), res.null.shape
            print(f"n = {n:5d}  {scheme:14s} without {best[None]:7.2f} s  with {best[0.95]:7.2f}"
                  f" s  ratio {best[0.95] / best[None]:.3f}  (inverting alone {t_inv:.3f} s;"
                  f" null {rows})")
        if n <= 100:
            m = args.naive_permutations
            t_naive, ends = timed(lambda: naive_interval(y, xs, "dsp", m))
            t_eng, res = timed(lambda: dp.regress(y, xs, scheme="dsp", permutations=m, seed=1,
                                                  jobs=1))
            print(f"n = {n:5d}  dsp, {m} relabellings: naive bisection {t_naive:.1f} s for one "
                  f"term's interval {np.round(ends, 4)} (the engine's: "
                  f"[{res.ci_low[1]:.4f} {res.ci_high[1]:.4f}]), the engine {t_eng:.3f} s "
                  f"for every term ({t_naive / t_eng:.0f}x)")

if __name__ == "__main__":
    main()
