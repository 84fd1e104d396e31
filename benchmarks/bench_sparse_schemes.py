"""Benchmark of dsp and Freedman–Lane on the sparse path (issue 15): 100,000 nodes.

Invented scenario (no real people or data): members of a fictional hobby forum. The
response is the number of messages from member i to member j over a season (directed,
weighted, about 1,000,000 edges); predictors are who follows whom (a second edge list of
about 1,000,000 edges), the same home region (``same``, 10 regions) and the difference in
membership age in days (``gap`` of a continuous attribute). The generator plants a
follows and a same-region effect.

What is measured, per scheme (y: the existing ``sparse.build_sparse_plan``; dsp and
freedman-lane: ``sparse_schemes.build_sparse_scheme_plan``), each in its own process so
that its peak resident memory (ru_maxrss) is its own:
- setup: dyad set, closed-form fixed products, observed fit (through the y plan, as the
  route does today) and the scheme's plan, from the in-memory edge lists (reading the CSV
  files and the CLI are not part of this: the route is not wired yet);
- one thread: ``plan.statistics`` on batches of relabellings (wall and CPU time);
- two threads: ``engine.run_all`` over a slice of relabellings at jobs=2 (threads over
  chunks), projected to 10,000 relabellings plus setup;
- beside them: a naive numpy baseline of the same relabelled-by-fixed sums (per
  relabelling: numpy sums over the edge lists by fancy indexing and key intersection, the
  numpy closed forms of ``sparse.fixed_products`` on the permuted attributes), checked
  against the plan's sums; the memory-traffic floor (every edge list read once per
  relabelling at the measured read bandwidth); and the dense route's memory need.

Run: ``python benchmarks/bench_sparse_schemes.py [--slice 200] [--write]``; ``--write``
appends the figures to benchmarks/RESULTS.md under its own heading.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import resource
import subprocess
import sys
import time
from dataclasses import replace
from pathlib import Path

import numpy as np

import dyadperm as dp
from dyadperm.routes import sparse as sparse_path
from dyadperm.routes import sparse_products as products
from dyadperm.pipeline.engine import Draws, run_all
from dyadperm.kernels.sparse import NETWORK
from dyadperm.pipeline.permutations import draw
from dyadperm.routes.sparse_schemes import build_sparse_scheme_plan

N_NODES = 100_000
N_EDGES = 1_000_000
TARGET_PERMUTATIONS = 10_000
SEED = 20240611
SCHEMES = ("y", "dsp", "freedman-lane")
BATCH = 16  # relabellings per statistics call (one thread) and per chunk (two threads)


def _edges(rng, n, size, p_send, region, by_region, starts, local_share):
    """Candidate edges: senders by activity, a share of receivers from the home region."""
    src = rng.choice(n, size=size, p=p_send)
    dst = rng.integers(0, n, size)
    local = rng.random(size) < local_share
    reg = region[src[local]]
    lo, hi = starts[reg], starts[reg + 1]
    dst[local] = by_region[lo + (rng.random(local.sum()) * (hi - lo)).astype(np.int64)]
    return src, dst


def _unique(rng, n, src, dst, want):
    keep = src != dst
    keys = np.unique(src[keep] * n + dst[keep])
    keys = np.sort(rng.permutation(keys)[:want])
    return keys // n, keys % n


def make_forum(n: int, n_edges: int, seed: int):
    """The response, the follows network and the two node attributes (module docstring)."""
    rng = np.random.default_rng(seed)
    region = rng.integers(0, 10, n)
    days = rng.gamma(3.0, 250.0, n)  # membership age, continuous
    activity = rng.gamma(2.0, 1.0, n)
    by_region = np.argsort(region, kind="stable")
    starts = np.searchsorted(region[by_region], np.arange(11))
    p_send = activity / activity.sum()
    fs, fd = _edges(rng, n, int(1.1 * n_edges), p_send, region, by_region, starts, 0.3)
    fs, fd = _unique(rng, n, fs, fd, n_edges)
    follows = dp.SparseNetwork(fs, fd, None, n, directed=True, name="follows")
    # messages: a third along follows ties (planted), the rest like new ties
    along = rng.choice(fs.size, n_edges // 3, replace=False)
    ms, md = _edges(rng, n, n_edges, p_send, region, by_region, starts, 0.3)
    ms, md = _unique(rng, n, np.concatenate([fs[along], ms]), np.concatenate([fd[along], md]),
                     n_edges)
    counts = 1.0 + rng.poisson(1.5, ms.size)
    messages = dp.SparseNetwork(ms, md, counts, n, directed=True, name="messages")
    preds = {"follows": follows, "same_region": dp.same(region), "days_gap": dp.gap(days)}
    return messages, preds


def cpu_name() -> str:
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or "unknown"


def read_bandwidth() -> float:
    """Bytes per second of one streaming read (numpy sum over 400 MB), best of 3."""
    a = np.ones(50_000_000)
    best = np.inf
    for _ in range(3):
        t = time.perf_counter()
        a.sum()
        best = min(best, time.perf_counter() - t)
    return a.nbytes / best


def cpu_seconds() -> float:
    ru = resource.getrusage(resource.RUSAGE_SELF)
    return ru.ru_utime + ru.ru_stime


def setup(net, preds, scheme):
    """Everything before the relabellings: (prep, plan, observed t)."""
    prep = sparse_path.prepare_sparse(net, preds)
    mom = products.fixed_products(prep)
    y_mean, y_sd = products._response_sd(prep.response_name, prep.n_dyads, mom.y_sum,
                                            mom.y_sq)
    products._check_collinear(prep, mom)
    yplan = products.build_sparse_plan(prep, mom, y_sd, statistic="t")
    fit = products.observed_fit_sparse(prep, mom, *yplan.observed_products(), y_mean, y_sd)
    if scheme == "y":
        return prep, yplan, fit
    del yplan
    plan = build_sparse_scheme_plan(prep, scheme=scheme, statistic="t", moments=mom)
    return prep, plan, fit


# --- one scheme, in its own process -------------------------------------------------------------
def measure(scheme: str, slice_: int, jobs: int) -> dict:
    small, small_preds = make_forum(400, 4000, 1)  # compile (or load) the kernels first
    prep_s, plan_s, _ = setup(small, small_preds, scheme)
    plan_s.statistics(*draw(prep_s.blocks, 1, 0, 2))
    rss_start = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss

    net, preds = make_forum(N_NODES, N_EDGES, SEED)
    t = time.perf_counter()
    prep, plan, fit = setup(net, preds, scheme)
    t_setup = time.perf_counter() - t

    rows, cols = draw(prep.blocks, SEED, 0, BATCH)
    plan.statistics(rows[:1], cols[:1])
    one_wall, one_cpu = np.inf, np.inf
    for _ in range(3):
        t, c = time.perf_counter(), time.thread_time()
        plan.statistics(rows, cols)
        one_wall = min(one_wall, (time.perf_counter() - t) / BATCH)
        one_cpu = min(one_cpu, (time.thread_time() - c) / BATCH)

    draws = Draws(prep.blocks, slice_, BATCH, False, SEED)
    t, c = time.perf_counter(), cpu_seconds()
    null = run_all(plan, draws, jobs=jobs)
    two_wall = (time.perf_counter() - t) / slice_
    two_cpu = (cpu_seconds() - c) / slice_
    # the first chunk again in one thread: the same bits (chunking and threads change none)
    same = bool(np.array_equal(plan.statistics(rows, cols), null[:BATCH]))
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return dict(scheme=scheme, n=prep.n, edges=prep.y.size,
                pred_edges=[t.edges.size for t in prep.terms if t.kind == NETWORK],
                dyads=prep.n_dyads, setup=t_setup, one_wall=one_wall, one_cpu=one_cpu,
                two_wall=two_wall, two_cpu=two_cpu, jobs=jobs, slice=slice_, same_bits=same,
                peak_gib=peak / 2 ** 20, start_gib=rss_start / 2 ** 20,
                t_obs=[float(v) for v in fit.t], names=list(prep.names))


# --- the naive numpy baseline ---------------------------------------------------------------------
def naive_cross(prep, layers, rel, fix, perm, inv) -> np.ndarray:
    """Relabelled-by-fixed centred sums (R, F) by numpy: each relabelled term rebuilt from
    the permutation (attributes a[pi]; edges moved to (pi^-1(u), pi^-1(v)) and re-sorted),
    then the numpy sums of ``sparse._cross_sum`` (edge sums by fancy indexing, network pairs
    by key intersection, derived pairs by the closed forms)."""
    N = prep.n_dyads
    out = np.empty((len(rel), len(fix)))
    for r, a in enumerate(rel):
        term, mean_a = layers[a]
        if term.kind == NETWORK:
            i, j = inv[term.edges.src], inv[term.edges.dst]
            o = np.lexsort((j, i))
            moved = replace(term, edges=sparse_path.Edges(i[o], j[o], term.edges.w[o]))
        else:
            moved = replace(term, attr=term.attr[perm])
        for f, c in enumerate(fix):
            other, mean_c = layers[c]
            out[r, f] = products._cross_sum(prep, moved, other) - N * mean_a * mean_c
    return out


def naive(scheme: str, reps: int) -> dict:
    net, preds = make_forum(N_NODES, N_EDGES, SEED)
    prep = sparse_path.prepare_sparse(net, preds)
    mom = products.fixed_products(prep)
    plan = build_sparse_scheme_plan(prep, scheme=scheme, statistic="t", moments=mom)
    y_term = sparse_path.Term("y", NETWORK, None, 0.0, prep.y)
    layers = [(t, mom.mean[c]) for c, t in enumerate(prep.terms)]
    layers.append((y_term, mom.y_sum / prep.n_dyads))
    rows, _ = draw(prep.blocks, SEED, 0, reps)
    t = time.perf_counter()
    got = []
    for p in rows:
        inv = np.empty_like(p)
        inv[p] = np.arange(p.size)
        got.append(naive_cross(prep, layers, plan.rel, plan.fix, p, inv))
    per = (time.perf_counter() - t) / reps
    want = plan.pairs.sums(rows, rows)
    err = float(np.max(np.abs(np.array(got) - want) / np.maximum(1.0, np.abs(want))))
    return dict(scheme=scheme, naive=per, max_rel_diff=err)


def child(args) -> None:
    if args.child == "naive":
        res = naive(args.scheme, args.reps)
    else:
        res = measure(args.child, args.slice, args.jobs)
    print("RESULT " + json.dumps(res))


def run_child(*extra) -> dict:
    out = subprocess.run([sys.executable, __file__, *extra], capture_output=True, text=True,
                         check=True)
    line = [ln for ln in out.stdout.splitlines() if ln.startswith("RESULT ")][-1]
    return json.loads(line[len("RESULT "):])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--slice", type=int, default=200, help="relabellings timed at jobs=2")
    ap.add_argument("--jobs", type=int, default=2)
    ap.add_argument("--naive-reps", type=int, default=3)
    ap.add_argument("--write", action="store_true", help="append to benchmarks/RESULTS.md")
    ap.add_argument("--child", help=argparse.SUPPRESS)
    ap.add_argument("--scheme", help=argparse.SUPPRESS)
    ap.add_argument("--reps", type=int, default=3, help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child:
        child(args)
        return

    load0 = os.getloadavg()[0]
    res = {s: run_child("--child", s, "--slice", str(args.slice), "--jobs", str(args.jobs))
           for s in SCHEMES}
    base = {s: run_child("--child", "naive", "--scheme", s, "--reps", str(args.naive_reps))
            for s in SCHEMES[1:]}
    load1 = os.getloadavg()[0]
    bw = read_bandwidth()
    r0 = res["y"]
    lines = [
        f"machine: {cpu_name()}, {os.cpu_count()} cores (shared with other jobs); numpy "
        f"{np.__version__}; python {platform.python_version()}; load average {load0:.1f} at "
        f"the start, {load1:.1f} at the end (other work on the cores slows every figure)",
        f"study: {r0['n']:,} nodes, {r0['edges']:,} response edges (weighted, directed), "
        f"one edge-list predictor of {r0['pred_edges'][0]:,} edges, same (10 categories), "
        f"gap (continuous); {r0['dyads']:,} dyads; statistic t",
    ]
    for s in SCHEMES:
        r = res[s]
        proj = r["setup"] + TARGET_PERMUTATIONS * r["two_wall"]
        idle = r["setup"] + TARGET_PERMUTATIONS * r["two_cpu"] / min(r["jobs"], 2)
        lines.append(
            f"{s}: setup {r['setup']:.1f} s; one thread {1e3 * r['one_wall']:.1f} ms per "
            f"relabelling (CPU {1e3 * r['one_cpu']:.1f}); jobs={r['jobs']} "
            f"{1e3 * r['two_wall']:.1f} ms (CPU {1e3 * r['two_cpu']:.1f} per relabelling, "
            f"{r['slice']} relabellings); projected {TARGET_PERMUTATIONS:,} + setup: "
            f"{proj / 60:.1f} min ({idle / 60:.1f} min from CPU time / 2, the cores to "
            f"itself); peak memory {r['peak_gib']:.2f} GiB (after compiling: "
            f"{r['start_gib']:.2f}); chunked run = one batch bit for bit: {r['same_bits']}")
    for s in SCHEMES[1:]:
        r, b = res[s], base[s]
        lines.append(
            f"{s} / y per relabelling: one thread {r['one_wall'] / r0['one_wall']:.2f} x "
            f"(CPU {r['one_cpu'] / r0['one_cpu']:.2f} x), jobs={r['jobs']} "
            f"{r['two_wall'] / r0['two_wall']:.2f} x (goal: within 5 x)")
        lines.append(
            f"{s} naive numpy (same sums, one thread): {1e3 * b['naive']:.0f} ms per "
            f"relabelling = {b['naive'] / r['one_wall']:.1f} x the plan's whole statistics "
            f"in one thread; largest relative difference of the sums {b['max_rel_diff']:.1e}")
    e_all = r0["edges"] + sum(r0["pred_edges"])
    floor = e_all * 24 / bw
    lines.append(
        f"memory-traffic floor (every edge list read once at {bw / 1e9:.1f} GB/s: "
        f"{e_all:,} edges x 24 bytes): {1e3 * floor:.1f} ms per relabelling; dsp one thread "
        f"/ floor = {res['dsp']['one_wall'] / floor:.1f} x, freedman-lane "
        f"{res['freedman-lane']['one_wall'] / floor:.1f} x")
    lines.append(f"dense route: not runnable, its 5 n x n float64 layers need "
                 f"{5 * N_NODES ** 2 * 8 / 1e9:,.0f} GB")
    lines.append("observed t: " + ", ".join(
        f"{name} {t:.2f}" for name, t in zip(["intercept"] + r0["names"], r0["t_obs"])))
    print("\n".join(lines))
    if args.write:
        path = Path(__file__).with_name("RESULTS.md")
        block = ["", "## Sparse path, dsp and Freedman–Lane: 100,000 nodes (issue 15)", "",
                 "`python benchmarks/bench_sparse_schemes.py --write`", ""]
        block += [f"- {line}" for line in lines]
        with path.open("a") as fh:
            fh.write("\n".join(block) + "\n")


if __name__ == "__main__":
    main()
