"""Benchmark of the sparse path (issue 9): 100,000 nodes, 1,000,000 edges, 4 derived predictors.

Invented scenario (no real people or data): members of a fictional hobby forum send each
other messages; the response is the number of messages from member i to member j over a
season (directed, mostly zero). Predictors come from node attributes: same home region
(``same``), age difference (``gap``), posting activity of the sender (``sender``) and
reputation of the receiver (``receiver``). The generator plants a same-region and an
activity effect.

What is measured (scheme y, t statistic):
- setup: reading the edges, closed-form fixed products, observed fit (one time);
- a slice of relabellings through the engine at jobs=2, projected to 10,000;
- peak resident memory of the process (ru_maxrss);
- beside them: a naive numpy baseline of the same per-relabelling sums over the edges
  (fancy indexing), the dense engine's memory need (not runnable: n x n layers), and the
  memory-traffic floor (one read of the edge arrays per relabelling at the measured read
  bandwidth).

Run: ``python benchmarks/bench_sparse.py [--slice 200] [--write]``; ``--write`` appends
the figures to benchmarks/RESULTS.md under its own heading.
"""

from __future__ import annotations

import argparse
import os
import platform
import resource
import time
from pathlib import Path

import numpy as np

import dyadperm as dp
from dyadperm.routes import sparse as sparse_path
from dyadperm.routes import sparse_products as products
from dyadperm.pipeline.engine import Draws, run_all
from dyadperm.pipeline.permutations import draw

N_NODES = 100_000
N_EDGES = 1_000_000
TARGET_PERMUTATIONS = 10_000
SEED = 20240611


def make_forum(n: int, n_edges: int, seed: int):
    """Edges (sender, receiver, count) and four node attributes of the invented forum."""
    rng = np.random.default_rng(seed)
    region = rng.integers(0, 30, n)
    age = rng.integers(16, 80, n).astype(np.float64)
    activity = rng.gamma(2.0, 1.0, n)
    reputation = rng.lognormal(0.0, 0.5, n)
    rows = np.empty(0, np.int64)
    cols = np.empty(0, np.int64)
    by_region = np.argsort(region, kind="stable")
    starts = np.searchsorted(region[by_region], np.arange(31))
    p_send = activity / activity.sum()
    while rows.size < n_edges:
        m = int(1.2 * (n_edges - rows.size)) + 1000
        src = rng.choice(n, size=m, p=p_send)  # active members send more
        dst = rng.integers(0, n, m)
        local = rng.random(m) < 0.3  # planted: 30% of messages stay in the home region
        reg = region[src[local]]
        lo, hi = starts[reg], starts[reg + 1]
        dst[local] = by_region[lo + (rng.random(local.sum()) * (hi - lo)).astype(np.int64)]
        keep = src != dst
        keys = np.unique(np.concatenate([rows * n + cols, src[keep] * n + dst[keep]]))
        keys = rng.permutation(keys)[:n_edges] if keys.size > n_edges else keys
        rows, cols = keys // n, keys % n
    counts = 1.0 + rng.poisson(1.0, rows.size)
    net = dp.SparseNetwork(rows, cols, counts, n, directed=True, name="messages")
    preds = {"same_region": dp.same(region), "age_gap": dp.gap(age),
             "activity": dp.sender(activity), "reputation": dp.receiver(reputation)}
    return net, preds


def read_bandwidth() -> float:
    """Bytes per second of one streaming read (numpy sum over 400 MB), best of 3."""
    a = np.ones(50_000_000)
    best = np.inf
    for _ in range(3):
        t = time.perf_counter()
        a.sum()
        best = min(best, time.perf_counter() - t)
    return a.nbytes / best


def naive_numpy(prep, plan, perms) -> float:
    """Seconds per relabelling of the same centred cross products by numpy fancy indexing."""
    src, dst, w = prep.y.src, prep.y.dst, prep.y.w
    t = time.perf_counter()
    for p in perms:
        inv = np.empty_like(p)
        inv[p] = np.arange(p.size)
        i, j = inv[src], inv[dst]
        for c, term in enumerate(prep.terms):
            x = products.eval_derived(term, i, j)
            (w * (x - plan.center[c])).sum()
    return (time.perf_counter() - t) / len(perms)


def cpu_seconds() -> float:
    ru = resource.getrusage(resource.RUSAGE_SELF)
    return ru.ru_utime + ru.ru_stime


def cpu_name() -> str:
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or "unknown"


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--slice", type=int, default=200, help="relabellings timed")
    ap.add_argument("--jobs", type=int, default=2)
    ap.add_argument("--write", action="store_true", help="append to benchmarks/RESULTS.md")
    args = ap.parse_args()

    load = os.getloadavg()
    # warm up the JIT (compiled code is cached between runs)
    small, small_preds = make_forum(300, 3000, 1)
    dp.regress(small, small_preds, scheme="y", permutations=20, seed=1)

    t = time.perf_counter()
    net, preds = make_forum(N_NODES, N_EDGES, SEED)
    t_make = time.perf_counter() - t

    t = time.perf_counter()
    prep = sparse_path.prepare_sparse(net, preds)
    mom = products.fixed_products(prep)
    y_mean, y_sd = products._response_sd(prep.response_name, prep.n_dyads, mom.y_sum,
                                            mom.y_sq)
    plan = products.build_sparse_plan(prep, mom, y_sd, statistic="t")
    fit = products.observed_fit_sparse(prep, mom, *plan.observed_products(), y_mean, y_sd)
    t_setup = time.perf_counter() - t

    chunk = sparse_path.chunk_size(prep)
    draws = Draws(prep.blocks, args.slice, chunk, False, SEED)
    t = time.perf_counter()
    cpu0 = cpu_seconds()
    null = run_all(plan, draws, jobs=args.jobs)
    cpu_per_perm = (cpu_seconds() - cpu0) / args.slice
    t_slice = time.perf_counter() - t
    per_perm = t_slice / args.slice
    projected = t_setup + TARGET_PERMUTATIONS * per_perm
    # what the same CPU work takes when the run has the cores to itself
    idle = t_setup + TARGET_PERMUTATIONS * cpu_per_perm / min(args.jobs, os.cpu_count() or 1)

    # end to end through dp.regress, same slice
    t = time.perf_counter()
    res = dp.regress(net, preds, scheme="y", permutations=args.slice, seed=SEED,
                     jobs=args.jobs)
    t_api = time.perf_counter() - t
    assert np.array_equal(np.asarray(res.null), null)

    t = time.perf_counter()
    rows, _ = draw(prep.blocks, SEED, 0, 8)
    t_draw = (time.perf_counter() - t) / 8
    t_naive = naive_numpy(prep, plan, rows)
    bw = read_bandwidth()
    floor = prep.y.size * 24 / bw  # src, dst (int64) and w (float64) read once
    dense_bytes = N_NODES * N_NODES * 8 * (len(preds) + 1)
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024

    lines = [
        f"machine: {cpu_name()}, {os.cpu_count()} cores; numpy {np.__version__}; "
        f"python {platform.python_version()}; load average during the run "
        f"{load[0]:.1f} -> {os.getloadavg()[0]:.1f} (other work sharing the cores slows it)",
        f"network: {prep.n:,} nodes, {prep.y.size:,} edges, {prep.n_dyads:,} dyads "
        f"(directed); 4 derived predictors (same, gap, sender, receiver); scheme y, t",
        f"data generation: {t_make:.1f} s (not part of the analysis)",
        f"setup (edges, closed-form fixed products, observed fit): {t_setup:.2f} s",
        f"relabellings: {args.slice} at jobs={args.jobs}, chunk size {chunk}: "
        f"{t_slice:.2f} s = {1e3 * per_perm:.1f} ms per relabelling "
        f"(drawing one permutation of {N_NODES:,}: {1e3 * t_draw:.2f} ms, single thread)",
        f"projected for {TARGET_PERMUTATIONS:,} relabellings: {projected:.0f} s "
        f"= {projected / 60:.1f} min (target < 10 min)",
        f"CPU time {1e3 * cpu_per_perm:.1f} ms per relabelling; with the cores to itself "
        f"(CPU time / {min(args.jobs, os.cpu_count() or 1)} threads) the projection is "
        f"{idle:.0f} s = {idle / 60:.1f} min",
        f"end to end dp.regress, {args.slice} relabellings: {t_api:.2f} s (null identical "
        "to the slice above)",
        f"peak resident memory: {peak / 2**30:.2f} GiB (target < 2 GB)",
        f"naive numpy over the edges (fancy indexing, one thread): {1e3 * t_naive:.1f} ms "
        f"per relabelling = {t_naive / per_perm:.1f} x the engine at jobs={args.jobs}",
        f"dense engine: not runnable, its {len(preds) + 1} n x n float64 layers need "
        f"{dense_bytes / 1e9:,.0f} GB",
        f"memory-traffic floor (edges read once at {bw / 1e9:.1f} GB/s): "
        f"{1e3 * floor:.2f} ms per relabelling; engine / floor = "
        f"{per_perm * args.jobs / floor:.1f} x per core",
        "observed t: " + ", ".join(f"{name} {t:.2f}" for name, t in
                                    zip(("intercept",) + prep.names, fit.t)),
    ]
    print("\n".join(lines))
    if args.write:
        path = Path(__file__).with_name("RESULTS.md")
        block = ["", "## Sparse path: 100,000 nodes, 1,000,000 edges (issue 9)", "",
                 "`python benchmarks/bench_sparse.py --write`", ""]
        block += [f"- {line}" for line in lines]
        with path.open("a") as fh:
            fh.write("\n".join(block) + "\n")


if __name__ == "__main__":
    main()
