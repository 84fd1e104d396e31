"""Setup of the dense linear route (before any relabelling), in reads of the inputs.

For n in {2000, 5000} (dense directed networks, 3 predictors, complete data) and the
schemes y and dsp, times ``routes.linear.plan`` (prepare, layers, orthonormal basis and the
classical fit read off its QR factor, invariant Gram) in a fresh subprocess, best of
``--repeats`` after a warm-up call that loads the kernels, and stages on their own:

- prepare: alignment, directedness (symmetry), infinite and missing value scans;
- statistics: means and spreads, the standardised layer stack, the orthonormalisation
  (one QR pass, two for ill-conditioned layers) with the classical fit, the invariant
  Gram (``linear.build_statistics``);
- the price of fresh memory on this machine: a new array the size of the float64 stack
  written for the first time, then again, before any plan. On a virtual machine whose
  host takes freed pages back, a first write costs far more than the write itself (seen:
  1.6 s against 0.1 s for 800 MB); the plans timed after it then get pages this probe
  already paid for, as in a process that has run before, and its line says what the
  first plan of a fresh process pays on top;
- not part of this plan: the fingerprints (SHA-256 of each input, ``plan.
  input_fingerprints``), taken only for a run file (or first, when a study's layers are
  standardised in place), and the QR of the float64 inputs (``design.observed_fit``),
  which only float32 layers and missing dyads need.

"Reads" = time x the two-thread read bandwidth measured in the same run / the bytes of the
float64 inputs (4 n^2 8): how many times the setup could have read its inputs from memory.
The issue's target is at most 20. SHA-256 alone runs at about 1-2 GB/s on one core, so
the fingerprints cost several reads by themselves. The machine is shared: figures move
with its load (printed).

Usage: python benchmarks/bench_setup.py [--sizes 2000,5000] [--schemes y,dsp] [--repeats 2]
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

K = 3


def child(n: int, scheme: str, repeats: int) -> dict:
    import numpy as np

    from dyadperm.inputs.design import observed_fit, prepare
    from dyadperm.routes import linear
    from dyadperm.routes.plan import input_fingerprints

    rng = np.random.default_rng(5)
    xs = {f"x{i}": rng.standard_normal((n, n)) for i in range(1, K + 1)}
    y = 0.1 * xs["x1"] + rng.standard_normal((n, n))
    small = {k: v[:50, :50].copy() for k, v in xs.items()}
    linear.plan(y[:50, :50].copy(), small, scheme=scheme, statistic="t")  # loads kernels
    best: dict[str, float] = {}
    # the machine's price of fresh memory: a stack-sized array written for the first time
    # (page faults; on a virtual machine whose host has taken back freed pages, several
    # times the write itself), then written again
    t0 = time.perf_counter()
    fresh = np.empty((n, n, K + 1))
    fresh.fill(1.0)
    t1 = time.perf_counter()
    fresh.fill(2.0)
    best["(stack-sized array: first write)"] = t1 - t0
    best["(the same, written again)"] = time.perf_counter() - t1
    del fresh
    for _ in range(repeats):
        t = {}
        t0 = time.perf_counter()
        linear.plan(y, xs, scheme=scheme, statistic="t")
        t["plan (total)"] = time.perf_counter() - t0
        t0 = time.perf_counter()
        prep = prepare(y, xs)
        t["prepare"] = time.perf_counter() - t0
        t0 = time.perf_counter()
        linear.build_statistics(prep, scheme=scheme, statistic="t")
        t["statistics"] = time.perf_counter() - t0
        t0 = time.perf_counter()
        input_fingerprints(prep)
        t["(fingerprints)"] = time.perf_counter() - t0
        t0 = time.perf_counter()
        observed_fit(prep, pivot=linear.fit_pivot(prep))
        t["(QR of the inputs)"] = time.perf_counter() - t0
        for key, val in t.items():
            best[key] = min(best.get(key, float("inf")), val)
    return {"n": n, "scheme": scheme, "seconds": best, "input_bytes": (K + 1) * n * n * 8}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", default="2000,5000")
    ap.add_argument("--schemes", default="y,dsp")
    ap.add_argument("--repeats", type=int, default=2)
    ap.add_argument("--json", help="also write the figures to this file")
    ap.add_argument("--child", nargs=3, help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.child:
        print(json.dumps(child(int(args.child[0]), args.child[1], int(args.child[2]))))
        return 0
    from bench_engine import read_bandwidth

    rows = []
    for n in (int(s) for s in args.sizes.split(",")):
        bw = read_bandwidth(1.5)
        print(f"n = {n:,}: two-thread read bandwidth {bw / 1e9:.1f} GB/s, load average "
              f"{os.getloadavg()[0]:.2f} (shared machine)")
        for scheme in args.schemes.split(","):
            proc = subprocess.run([sys.executable, __file__, "--child", str(n), scheme,
                                   str(args.repeats)], capture_output=True, text=True)
            if proc.returncode != 0:
                print(proc.stderr[-3000:], file=sys.stderr)
                return 1
            res = json.loads(proc.stdout.strip().splitlines()[-1])
            res["bandwidth"] = bw
            rows.append(res)
            once = res["input_bytes"] / bw
            parts = ", ".join(f"{k} {v:.2f} s ({v / once:.0f} reads)"
                              for k, v in res["seconds"].items())
            print(f"  {scheme:>4}: {parts}")
    if args.json:
        with open(args.json, "w") as fh:
            json.dump(rows, fh, indent=1)
    return 0


if __name__ == "__main__":
    sys.exit(main())
