"""Parallel and run-file overhead of whole runs (issue: durable, parallel runs).

Prints, for a dense n x n study with 3 predictors (scheme dsp):
- permutation throughput with jobs=2 over jobs=1 (target >= 1.8x at n = 1000),
- the time a run file adds (target < 5 %),
- peak resident memory of a jobs=2 run over a jobs=1 run (target <= 1.3x).

Each configuration runs in a fresh subprocess (peak memory is per process), after a
warm-up that compiles the kernels. Usage: python benchmarks/bench_runs.py [--n 1000]
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import textwrap

CHILD = textwrap.dedent("""
    import json, resource, sys, time, os
    import numpy as np
    import dyadperm as dp
    n, perms, jobs, out = int(sys.argv[1]), int(sys.argv[2]), int(sys.argv[3]), sys.argv[4]
    rng = np.random.default_rng(0)
    xs = [rng.normal(size=(n, n)) for _ in range(3)]
    y = xs[0] + rng.normal(size=(n, n))
    dp.regress(y[:30, :30], [x[:30, :30] for x in xs], permutations=20, seed=1)  # compile
    base = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    # the setup (alignment, QR fit, layers) is the same for any jobs: time it with a run of
    # one chunk, and the permutations by the difference
    t0 = time.perf_counter()
    dp.regress(y, xs, permutations=16, seed=1, jobs=jobs, chunk_size=16)
    setup = time.perf_counter() - t0
    if out != "-" and os.path.exists(out):
        os.remove(out)
    t0 = time.perf_counter()
    dp.regress(y, xs, permutations=perms, seed=1, jobs=jobs,
               out=None if out == "-" else out)
    t = time.perf_counter() - t0 - setup
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    print(json.dumps({"seconds": t, "setup": setup, "peak_mib": peak / 1024, "base_mib": base / 1024,
                      "inputs_mib": 4 * n * n * 8 / 2**20}))
""")


def measure(n: int, perms: int, jobs: int, out: str) -> dict:
    res = subprocess.run([sys.executable, "-c", CHILD, str(n), str(perms), str(jobs), out],
                         capture_output=True, text=True, check=True)
    return json.loads(res.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=1000)
    ap.add_argument("--permutations", type=int, default=1024)
    args = ap.parse_args()
    n, m = args.n, args.permutations
    with tempfile.TemporaryDirectory() as d:
        one = measure(n, m, 1, "-")
        two = measure(n, m, 2, "-")
        two_file = measure(n, m, 2, f"{d}/run.h5")
    print(f"n = {n}, 3 predictors, scheme dsp, {m} permutations, default chunk size; times exclude "
          f"the setup ({one['setup']:.2f} s: alignment, QR fit, layers)")
    print(f"jobs=1: {one['seconds']:.2f} s ({m / one['seconds']:.1f} perm/s), "
          f"peak {one['peak_mib']:.0f} MiB, of which {one['base_mib']:.0f} MiB before the run "
          f"(interpreter, libraries, inputs of {one['inputs_mib']:.0f} MiB)")
    print(f"jobs=2: {two['seconds']:.2f} s ({m / two['seconds']:.1f} perm/s), "
          f"peak {two['peak_mib']:.0f} MiB")
    print(f"jobs=2 with run file: {two_file['seconds']:.2f} s")
    print(f"speed-up jobs=2 / jobs=1: {one['seconds'] / two['seconds']:.2f}x (target >= 1.8x)")
    print(f"run file overhead: {100 * (two_file['seconds'] / two['seconds'] - 1):+.1f} % "
          "(target < 5 %)")
    print(f"peak memory jobs=2 / jobs=1: {two['peak_mib'] / one['peak_mib']:.2f}x "
          "(target <= 1.3x)")


if __name__ == "__main__":
    main()
