"""Cost per relabelling of a panel (waves of one node set) beside one wave and a naive loop.

For a directed network of n nodes (default 1,000) with 2 predictors, complete data, and the
schemes y, dsp and freedman-lane, prints:

- one wave: wall time per relabelling of ``Plan.statistics`` of the plain dense route;
- T waves (default 3): the same for ``dyadperm.Waves`` of T waves with one intercept per
  wave (``routes.waves``): one relabelling applied to every wave through the stacked
  (n, n * T) layers; the ratio T waves / one wave (the issue asks at most 3.5 at T = 3);
- naive: the loop a user would write in numpy for the panel: relabel each wave's matrix
  with fancy indexing (``M[np.ix_(p, p)]``), stack the dyads of every wave, refit the
  scheme's regression with wave dummies by ``np.linalg.lstsq`` (a few relabellings);
- the engine's t statistics of the first relabelling against the naive loop's.

Both routes run in this process with jobs=1 (the machine is shared; one thread keeps the
comparison fair), after a warm-up that compiles the kernels; best of three timed rounds, the
one-wave and the panel plans timed in turn in each round.
Usage: python benchmarks/bench_waves.py [--n 1000] [--waves 3] [--perms 48]
"""

from __future__ import annotations

import argparse
import os
import platform
import time

import numpy as np

import dyadperm as dp
from dyadperm.pipeline.permutations import draw
from dyadperm.routes import linear, waves

SCHEMES = ("y", "dsp", "freedman-lane")
SEED = 20240611


def data(n: int, T: int, rng: np.random.Generator):
    send = rng.normal(size=n)
    xs = [[rng.normal(size=(n, n)) + send[:, None] for _ in range(T)] for _ in range(2)]
    ys = [0.2 * xs[0][t] + rng.normal(size=(n, n)) + send[:, None] for t in range(T)]
    return ys, xs


def per_perm(plans, perms: int, rounds: int = 3) -> list[float]:
    """Best wall time per relabelling of each plan, the plans timed in turn in each of
    ``rounds`` rounds (so a change of the machine's load reaches them alike)."""
    draws = [draw(plan.blocks, SEED, 0, perms) for plan in plans]
    for plan, (rows, cols) in zip(plans, draws):
        plan.statistics(rows[:2], cols[:2])  # warm-up (compiled already: cached kernels)
    best = [np.inf] * len(plans)
    for _ in range(rounds):
        for i, (plan, (rows, cols)) in enumerate(zip(plans, draws)):
            t0 = time.perf_counter()
            plan.statistics(rows, cols)
            best[i] = min(best[i], time.perf_counter() - t0)
    return [b / perms for b in best]


def naive_stats(ys, xs, scheme: str, perm: np.ndarray) -> np.ndarray:
    """t of each predictor under one relabelling, by refits on the stacked dyads."""
    T, n = len(ys), ys[0].shape[0]
    off = ~np.eye(n, dtype=bool)
    N = off.sum()
    D = np.repeat(np.eye(T), N, axis=0)
    vec = lambda mats: np.concatenate([M[off] for M in mats])  # noqa: E731
    X = np.column_stack([D] + [vec(W) for W in xs])
    y = vec(ys)

    def t_of(A, v, col):
        beta, *_ = np.linalg.lstsq(A, v, rcond=None)
        r = v - A @ beta
        s2 = r @ r / (A.shape[0] - A.shape[1])
        return beta[col] / np.sqrt(s2 * np.linalg.inv(A.T @ A)[col, col])

    ix = np.ix_(perm, perm)
    out = []
    for j in range(len(xs)):
        col = T + j
        Z = np.delete(X, col, axis=1)
        if scheme == "y":
            out.append(t_of(X, vec([Y[ix] for Y in ys]), col))
            continue
        target = X[:, col] if scheme == "dsp" else y
        g, *_ = np.linalg.lstsq(Z, target, rcond=None)
        e = target - Z @ g
        E = [np.zeros((n, n)) for _ in range(T)]
        for t in range(T):
            E[t][off] = e[t * N:(t + 1) * N]
        e_pi = vec([M[ix] for M in E])
        if scheme == "dsp":
            out.append(t_of(np.column_stack([Z, e_pi]), y, -1))
        else:
            out.append(t_of(X, Z @ g + e_pi, col))
    return np.array(out)


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--n", type=int, default=1000)
    ap.add_argument("--waves", type=int, default=3)
    ap.add_argument("--perms", type=int, default=48)
    ap.add_argument("--naive", type=int, default=2)
    args = ap.parse_args()
    n, T = args.n, args.waves
    rng = np.random.default_rng(SEED)
    ys, xs = data(n, T, rng)
    print(f"machine: {platform.processor() or platform.machine()}, {os.cpu_count()} cores; "
          f"load average {os.getloadavg()[0]:.2f} at start; n = {n}, {T} waves, 2 predictors,"
          " jobs = 1")
    print("| scheme | one wave ms/perm | waves ms/perm | waves / one wave | naive ms/perm "
          "| naive / waves | agree |")
    print("|---|---:|---:|---:|---:|---:|---:|")
    for scheme in SCHEMES:
        one = linear.plan(ys[0], {"a": xs[0][0], "b": xs[1][0]}, scheme=scheme,
                          statistic="t")
        panel = waves.plan(dp.Waves(ys), {"a": dp.Waves(xs[0]), "b": dp.Waves(xs[1])},
                           scheme=scheme, statistic="t")
        t_one, t_panel = per_perm([one, panel], args.perms)
        rows, cols = draw(panel.blocks, SEED, 0, args.naive)
        eng = panel.statistics(rows, cols)
        t0 = time.perf_counter()
        naive = np.array([naive_stats(ys, xs, scheme, rows[b]) for b in range(args.naive)])
        t_naive = (time.perf_counter() - t0) / args.naive
        agree = float(np.max(np.abs(eng - naive) / np.maximum(1.0, np.abs(naive))))
        print(f"| {scheme} | {1e3 * t_one:.2f} | {1e3 * t_panel:.2f} | "
              f"{t_panel / t_one:.2f} | {1e3 * t_naive:.0f} | {t_naive / t_panel:.0f}x | "
              f"{agree:.1e} |")
    print(f"load average {os.getloadavg()[0]:.2f} at the end")


if __name__ == "__main__":
    main()
