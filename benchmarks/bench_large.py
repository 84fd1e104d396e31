"""A 10,000-node dense study on this machine: projected time and peak memory.

The study: a dense directed response and 3 dense predictors on n = 10,000 nodes (10^8
cells each, 3.2 GB of float64 inputs), scheme dsp, 10,000 permutations, jobs=2. Running
it whole takes long, so this times a slice: after the setup (load, prepare, observed fit,
plan) and a warm-up permutation, ``--slice`` permutations (default 32: two chunks, one per
worker) go through ``engine.iter_chunks`` with jobs=2; the time of 10,000 is projected
from their rate plus the setup. Peak resident memory (VmHWM) is measured, and the resident
memory after each stage shows where the copies are. Each mode runs in a fresh subprocess:

- ``study``: the networks are .npy files named by a study file (written once to a
  temporary folder); ``load_study`` reads them straight into the engine's layer array and
  the plan standardises it in place (what ``dyadperm run`` does) -- float64 layers;
- ``arrays-float64`` / ``arrays-float32``: the networks are arrays made in memory and
  passed to the engine, which copies them into its layer stack (float32: half the bytes).

A floor line gives the time of reading the relabelled layers once per permutation at this
machine's measured two-thread read bandwidth.

Usage: python benchmarks/bench_large.py [--n 10000] [--slice 32]
       [--modes study,arrays-float64,arrays-float32]
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import time

PERMUTATIONS = 10_000
K = 3
SEED = 7


def rss_mib() -> tuple[float, float]:
    """(current, peak) resident memory of this process in MiB, from /proc/self/status."""
    cur = peak = float("nan")
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith("VmRSS"):
                cur = int(line.split()[1]) / 1024
            elif line.startswith("VmHWM"):
                peak = int(line.split()[1]) / 1024
    return cur, peak


def make_networks(n: int):
    """The study's networks, one at a time: (name, array). x2 and y depend on x1."""
    import numpy as np

    rng = np.random.default_rng(SEED)
    x1 = rng.standard_normal((n, n))
    yield "x1", x1
    x2 = rng.standard_normal((n, n))
    x2 += 0.5 * x1
    yield "x2", x2
    del x2
    yield "x3", rng.standard_normal((n, n))
    y = rng.standard_normal((n, n))
    y += 0.05 * x1
    yield "y", y


def write_study(folder, n: int) -> str:
    """Write the networks as .npy files and a study file naming them; return its path."""
    import numpy as np
    from pathlib import Path

    folder = Path(folder)
    for name, arr in make_networks(n):
        np.save(folder / f"{name}.npy", arr)
    preds = "".join(f'[[predictor]]\nname = "x{i}"\nfile = "x{i}.npy"\n' for i in (1, 2, 3))
    (folder / "large.toml").write_text(
        '[study]\ntitle = "large dense study"\ndirected = true\n'
        f'[response]\nname = "y"\nfile = "y.npy"\n{preds}'
        f'[test]\nscheme = "dsp"\npermutations = {PERMUTATIONS}\nseed = {SEED}\n')
    return str(folder / "large.toml")


def child(n: int, slice_: int, mode: str, chunk: int | None, study_path: str) -> dict:
    import numpy as np

    from dyadperm.inputs.design import observed_fit, prepare
    from dyadperm.pipeline.engine import Draws, iter_chunks
    from dyadperm.routes.linear import build_statistics as build_plan
    from dyadperm.study import load_study

    stages = []

    def stage(name: str, t0: float) -> None:
        cur, peak = rss_mib()
        stages.append({"stage": name, "seconds": time.perf_counter() - t0, "rss_mib": cur,
                       "peak_mib": peak})

    t0 = time.perf_counter()
    stage("start", t0)
    inputs_mib = (K + 1) * n * n * 8 / 2**20
    storage = "float32" if mode.endswith("float32") else "float64"
    if mode == "study":
        t_setup = time.perf_counter()
        study = load_study(study_path)
        y, predictors = study.response, study.predictors
        stage("study loaded (.npy files)", t0)
    else:
        nets = dict(make_networks(n))
        y = nets.pop("y")
        predictors = nets
        stage("inputs made", t0)
        t_setup = time.perf_counter()
    prep = prepare(y, predictors, directed=True)
    stage("prepare", t0)
    fit = observed_fit(prep)
    stage("observed fit", t0)
    plan = build_plan(prep, scheme="dsp", statistic="t", storage=storage,
                      overwrite=mode == "study")
    stage("plan", t0)
    setup = time.perf_counter() - t_setup

    ident = np.arange(n, dtype=np.int64)[None, :]
    t_w = time.perf_counter()
    observed = plan.statistics(ident, ident)[0]  # warm-up: compiles or loads the kernels
    warm = time.perf_counter() - t_w
    stage("warm-up (observed statistic)", t0)
    cs = chunk or plan.chunk_size()
    cs = min(cs, max(1, slice_ // 2))  # at least two chunks: one per worker
    draws = Draws(prep.blocks, slice_, cs, False, SEED)
    t_s = time.perf_counter()
    for _ in iter_chunks(plan, draws, range(draws.n_chunks), jobs=2):
        pass
    sliced = time.perf_counter() - t_s
    stage(f"{slice_} permutations, jobs=2", t0)
    per_perm = sliced / slice_
    return {"n": n, "mode": mode, "storage": storage, "chunk": cs, "setup_s": setup,
            "warmup_s": warm, "slice": slice_, "slice_s": sliced, "per_perm_s": per_perm,
            "projected_s": setup + PERMUTATIONS * per_perm, "inputs_mib": inputs_mib,
            "peak_mib": rss_mib()[1], "stages": stages,
            "observed_vs_qr": float(np.max(np.abs(observed - fit.t[1:]))),
            "relabelled_layers": K}


def bandwidth() -> float:
    """Two-thread read bandwidth (bytes/s), as in bench_engine.py."""
    sys.path.insert(0, __file__.rsplit("/", 1)[0])
    from bench_engine import read_bandwidth
    return read_bandwidth(1.5)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=10_000)
    ap.add_argument("--slice", type=int, default=32)
    ap.add_argument("--modes", default="study,arrays-float64,arrays-float32")
    ap.add_argument("--chunk", type=int, default=None,
                    help="chunk size (default: the plan's chunk_size())")
    ap.add_argument("--json", help="also write the results to this file")
    ap.add_argument("--child", nargs="+", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.child:
        n, sl, mode, study_path = (int(args.child[0]), int(args.child[1]), args.child[2],
                                   args.child[3])
        chunk = int(args.child[4]) if len(args.child) > 4 else None
        print(json.dumps(child(n, sl, mode, chunk, study_path)))
        return 0
    import os
    import tempfile
    bw = bandwidth()
    print(f"n = {args.n}, 3 predictors, scheme dsp, {PERMUTATIONS:,} permutations projected "
          f"from a slice of {args.slice}; two-thread read bandwidth {bw / 1e9:.2f} GB/s; "
          f"load average {os.getloadavg()[0]:.2f}")
    results = []
    modes = args.modes.split(",")
    with tempfile.TemporaryDirectory(prefix="dyadperm-large-") as folder:
        study_path = write_study(folder, args.n) if "study" in modes else "-"
        for mode in modes:
            extra = [str(args.chunk)] if args.chunk else []
            proc = subprocess.run([sys.executable, __file__, "--child", str(args.n),
                                   str(args.slice), mode, study_path, *extra],
                                  capture_output=True, text=True)
            if proc.returncode != 0:
                print(proc.stderr[-3000:], file=sys.stderr)
                return 1
            res = json.loads(proc.stdout.strip().splitlines()[-1])
            itemsize = 4 if res["storage"] == "float32" else 8
            res["floor_per_perm_s"] = args.n * args.n * itemsize * res["relabelled_layers"] / bw
            results.append(res)
            print(f"\n[{mode}] {res['storage']} layers, chunk {res['chunk']}: setup "
                  f"{res['setup_s']:.1f} s, {res['per_perm_s'] * 1e3:.0f} ms per permutation "
                  f"(floor {res['floor_per_perm_s'] * 1e3:.0f} ms), projected "
                  f"{PERMUTATIONS:,} permutations: {res['projected_s'] / 60:.1f} min; peak "
                  f"memory {res['peak_mib'] / 1024:.2f} GiB = "
                  f"{res['peak_mib'] / res['inputs_mib']:.2f} x the inputs "
                  f"({res['inputs_mib'] / 1024:.2f} GiB); observed t vs QR "
                  f"{res['observed_vs_qr']:.1e}")
            prev = None
            for st in res["stages"]:
                delta = "" if prev is None else f" ({st['rss_mib'] - prev:+.0f} MiB)"
                print(f"  {st['stage']:<30} {st['seconds']:7.1f} s  resident "
                      f"{st['rss_mib']:8.0f} MiB{delta}  peak {st['peak_mib']:8.0f} MiB")
                prev = st["rss_mib"]
    if args.json:
        with open(args.json, "w") as fh:
            json.dump({"bandwidth": bw, "results": results}, fh, indent=1)
    return 0


if __name__ == "__main__":
    sys.exit(main())
