"""Per-permutation speed of the engine beside a naive numpy loop and the memory floor.

For n in {500, 1000, 2000, 5000} (dense directed networks, 3 predictors) and the schemes
y, dsp and freedman-lane, prints in one run:

- engine: wall time per permutation of ``Plan.statistics`` on chunks through
  ``engine.iter_chunks`` with jobs=2 (threads), after a warm-up that compiles the kernels;
  best of two timed passes. Also with float32 layers (``storage="float32"``).
- naive: the loop a user would write in numpy: relabel with fancy indexing
  (``M[np.ix_(p, p)]``), vectorise the dyads, refit with ``np.linalg.lstsq`` (OpenBLAS
  on every core). Scheme y relabels the response; dsp relabels each predictor's residual
  matrix on the other terms and refits y on [Z, e_pi]; freedman-lane relabels each
  reduced-model residual matrix and refits y* = Z g + r_pi on the full design
  (shared/methods.md). Only a few permutations at large n: it is slow.
- floor: the bytes of the relabelled float64 layers read once per permutation
  (n * n * 8 * R; R = 1 for y, 3 for dsp, 4 for freedman-lane) over this machine's
  two-thread read bandwidth, measured in the same run (before each size) by summing a
  large array in two threads.
- engine CPU: the process CPU time per permutation of the same timed pass (both
  threads together). On a machine shared with other work the wall time grows with the
  load; the CPU time much less, so CPU / 2 shows what an idle machine would give.
- ratios: naive / engine (speed-up) and engine / floor; peak resident memory (VmHWM)
  of the process that ran each method, beside the size of the four input matrices.

The engine and the naive loop use the same relabellings, and their t statistics of the
first permutations are compared (the column "agree" gives the largest relative gap).

Each size runs in a fresh subprocess so that peak memory is per method and size.
Usage: python benchmarks/bench_engine.py [--quick] [--sizes 500,1000] [--markdown FILE]
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import subprocess
import sys
import time

SCHEMES = ("y", "dsp", "freedman-lane")
RELABELLED_LAYERS = {"y": 1, "dsp": 3, "freedman-lane": 4}  # with 3 predictors
K = 3
SEED = 20240611
# permutations timed per size (engine, scheme y; dsp and freedman-lane do a half)
ENGINE_PERMS = {500: 1024, 1000: 256, 2000: 128, 5000: 64}
NAIVE_PERMS = {500: 8, 1000: 4, 2000: 2, 5000: 1}
QUICK_ENGINE_PERMS = {500: 128, 1000: 48}
QUICK_NAIVE_PERMS = {500: 2, 1000: 1}
COMPARE = 2  # permutations whose statistics the engine and the naive loop both report


# --- machine ----------------------------------------------------------------------------
def machine() -> dict:
    """CPU model, cores and memory as the kernel reports them (/proc on Linux)."""
    info = {"cpu": platform.processor() or platform.machine(), "cores": os.cpu_count(),
            "ram_gib": float("nan"), "python": platform.python_version()}
    try:
        with open("/proc/cpuinfo") as fh:
            for line in fh:
                if line.startswith("model name"):
                    info["cpu"] = line.split(":", 1)[1].strip()
                    break
        with open("/proc/meminfo") as fh:
            for line in fh:
                if line.startswith("MemTotal"):
                    info["ram_gib"] = int(line.split()[1]) / 2**20
                    break
    except OSError:
        pass
    import numba
    import numpy
    info["numpy"] = numpy.__version__
    info["numba"] = numba.__version__
    info["load_before"] = os.getloadavg()[0]
    return info


def read_bandwidth(gib: float, threads: int = 2, repeats: int = 3) -> float:
    """Read bandwidth in bytes/s of ``threads`` threads: best of ``repeats`` sums of a
    ``gib`` GiB array split among them."""
    import threading

    import numpy as np
    from numba import njit

    @njit(nogil=True, cache=False)
    def total(a):
        # four independent sums so the adds do not limit the read rate
        s0 = 0.0
        s1 = 0.0
        s2 = 0.0
        s3 = 0.0
        n = a.shape[0] - a.shape[0] % 4
        for i in range(0, n, 4):
            s0 += a[i]
            s1 += a[i + 1]
            s2 += a[i + 2]
            s3 += a[i + 3]
        return s0 + s1 + s2 + s3

    a = np.ones(int(gib * 2**30) // 8)  # written once: every page is resident
    total(a[:64])
    parts = np.array_split(a, threads)
    best = float("inf")
    for _ in range(repeats):
        workers = [threading.Thread(target=total, args=(part,)) for part in parts]
        t0 = time.perf_counter()
        for t in workers:
            t.start()
        for t in workers:
            t.join()
        best = min(best, time.perf_counter() - t0)
    return a.nbytes / best


# --- inputs -------------------------------------------------------------------------------
def make_inputs(n: int):
    """Dense directed response and 3 predictors (invented, normal with planted effects)."""
    import numpy as np
    rng = np.random.default_rng(SEED + n)
    xs = [rng.normal(size=(n, n)) for _ in range(K)]
    xs[1] += 0.5 * xs[0]  # some collinearity, as real predictors have
    y = 0.3 * xs[0] - 0.2 * xs[2] + rng.normal(size=(n, n))
    return y, xs


def perms_of(n: int, count: int):
    """The run's relabellings 0 .. count-1 (the engine's own draws, seed SEED)."""
    import numpy as np

    from dyadperm.pipeline.permutations import Blocks, draw
    rows, _ = draw(Blocks(n, n, ((0, n),), None), SEED, 0, count)
    return np.asarray(rows)


# --- children -----------------------------------------------------------------------------
def peak_mib() -> float:
    """Peak resident memory of this process (VmHWM; unlike ru_maxrss it is not inherited
    from the parent across fork and exec)."""
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith("VmHWM"):
                return int(line.split()[1]) / 1024
    import resource
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def child_engine(n: int, perms: int, storage: str, chunk: int | None) -> dict:
    import numpy as np

    from dyadperm.inputs.design import prepare
    from dyadperm.pipeline.engine import Draws, iter_chunks
    from dyadperm.routes.linear import build_statistics as build_plan

    y, xs = make_inputs(n)
    prep = prepare(y, {f"x{i + 1}": x for i, x in enumerate(xs)})
    out = {"n": n, "storage": storage, "schemes": {}}
    for scheme in SCHEMES:
        plan = build_plan(prep, scheme=scheme, statistic="t", storage=storage)
        total = perms if scheme == "y" else max(perms // 2, 4)
        # at least 4 chunks, so both workers stay busy on a short timed slice
        cs = chunk or min(plan.chunk_size(), max(1, total // 4))
        draws = Draws(prep.blocks, total, cs, False, SEED)
        ident = np.arange(n, dtype=np.int64)[None, :]
        plan.statistics(ident, ident)  # compile (or load the cached kernels)
        warm = Draws(prep.blocks, min(total, 2 * cs), cs, False, SEED)
        list(iter_chunks(plan, warm, range(warm.n_chunks), jobs=2))
        best = cpu = float("inf")
        for _ in range(2):
            t0 = time.perf_counter()
            c0 = time.process_time()
            first = None
            for c, stats in iter_chunks(plan, draws, range(draws.n_chunks), jobs=2):
                if c == 0:
                    first = stats
            wall = time.perf_counter() - t0
            if wall < best:
                best, cpu = wall, time.process_time() - c0
        out["schemes"][scheme] = {"sec_per_perm": best / total, "cpu_per_perm": cpu / total,
                                  "perms": total, "chunk": cs,
                                  "first": first[:COMPARE].tolist()}
        del plan
    out["peak_mib"] = peak_mib()
    return out


def _ols_t(X, y):
    """t statistics of an OLS fit by np.linalg.lstsq (the naive refit)."""
    import numpy as np
    beta, *_ = np.linalg.lstsq(X, y, rcond=None)
    resid = y - X @ beta
    sigma2 = resid @ resid / (X.shape[0] - X.shape[1])
    return beta / np.sqrt(sigma2 * np.diag(np.linalg.inv(X.T @ X)))


def child_naive(n: int, perms: int) -> dict:
    import numpy as np

    y, xs = make_inputs(n)
    mask = ~np.eye(n, dtype=bool)
    vx = [x[mask] for x in xs]
    vy = y[mask]
    ones = np.ones(vy.size)
    X = np.column_stack([ones] + vx)
    P = perms_of(n, max(perms, COMPARE))
    out = {"n": n, "schemes": {}}
    # scheme y (Krackhardt 1988): relabel the response, refit
    t0 = time.perf_counter()
    first = []
    for b in range(perms):
        p = P[b]
        first.append(_ols_t(X, y[np.ix_(p, p)][mask])[1:].tolist())
    out["schemes"]["y"] = {"sec_per_perm": (time.perf_counter() - t0) / perms,
                           "first": first[:COMPARE]}
    # dsp (Dekker, Krackhardt & Snijders 2007): relabel the residual matrix E_j of x_j on
    # Z = [1, other x], refit y on [Z, e_pi]; residual matrices are made once, untimed
    Zs, E = [], []
    for j in range(K):
        Z = np.column_stack([ones] + [vx[c] for c in range(K) if c != j])
        g, *_ = np.linalg.lstsq(Z, vx[j], rcond=None)
        Ej = np.zeros((n, n))
        Ej[mask] = vx[j] - Z @ g
        Zs.append(Z)
        E.append(Ej)
    t0 = time.perf_counter()
    first = []
    for b in range(perms):
        p = P[b]
        row = []
        for j in range(K):
            e = E[j][np.ix_(p, p)][mask]
            row.append(_ols_t(np.column_stack([Zs[j], e]), vy)[-1])
        first.append(row)
    out["schemes"]["dsp"] = {"sec_per_perm": (time.perf_counter() - t0) / perms,
                             "first": first[:COMPARE]}
    del E
    # Freedman & Lane (1983): relabel the reduced-model residual matrix R_j, refit
    # y* = Z g + r_pi on the full design
    Rm, fitted = [], []
    for j in range(K):
        g, *_ = np.linalg.lstsq(Zs[j], vy, rcond=None)
        fit = Zs[j] @ g
        Rj = np.zeros((n, n))
        Rj[mask] = vy - fit
        Rm.append(Rj)
        fitted.append(fit)
    t0 = time.perf_counter()
    first = []
    for b in range(perms):
        p = P[b]
        row = []
        for j in range(K):
            ystar = fitted[j] + Rm[j][np.ix_(p, p)][mask]
            row.append(_ols_t(X, ystar)[j + 1])
        first.append(row)
    out["schemes"]["freedman-lane"] = {"sec_per_perm": (time.perf_counter() - t0) / perms,
                                       "first": first[:COMPARE]}
    out["peak_mib"] = peak_mib()
    return out


def run_child(*args: str) -> dict:
    proc = subprocess.run([sys.executable, __file__, "--child", *args],
                          capture_output=True, text=True)
    if proc.returncode != 0:
        raise RuntimeError(f"benchmark child {args} failed:\n{proc.stderr[-3000:]}")
    return json.loads(proc.stdout.strip().splitlines()[-1])


# --- report -------------------------------------------------------------------------------
def agreement(a, b) -> float:
    import numpy as np
    a = np.asarray(a, dtype=float)
    b = np.asarray(b, dtype=float)
    n = min(len(a), len(b))
    return float(np.max(np.abs(a[:n] - b[:n]) / np.maximum(1.0, np.abs(b[:n]))))


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="1-minute smoke version")
    ap.add_argument("--sizes", help="comma-separated n (default 500,1000,2000,5000)")
    ap.add_argument("--chunk", type=int, default=None,
                    help="chunk size (default: the plan's chunk_size())")
    ap.add_argument("--markdown", help="also write the table as Markdown to this file")
    ap.add_argument("--child", nargs="+", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.child:
        kind, n, perms = args.child[0], int(args.child[1]), int(args.child[2])
        if kind == "engine":
            chunk = int(args.child[4]) if len(args.child) > 4 else None
            res = child_engine(n, perms, args.child[3], chunk)
        else:
            res = child_naive(n, perms)
        print(json.dumps(res))
        return 0

    eng_perms = QUICK_ENGINE_PERMS if args.quick else ENGINE_PERMS
    naive_perms = QUICK_NAIVE_PERMS if args.quick else NAIVE_PERMS
    sizes = [int(s) for s in args.sizes.split(",")] if args.sizes else sorted(eng_perms)
    info = machine()
    gib = 0.25 if args.quick else 1.5
    print(f"machine: {info['cpu']}, {info['cores']} cores, {info['ram_gib']:.1f} GiB RAM; "
          f"python {info['python']}, numpy {info['numpy']}, numba {info['numba']}")
    print(f"1-min load average at start: {info['load_before']:.2f}; the read bandwidth is "
          "measured again before each size (other processes share it)")
    rows = []
    bws = []
    for n in sizes:
        bw = read_bandwidth(gib)
        bws.append(bw)
        ep = eng_perms.get(n, max(16, int(256 * (1000 / n) ** 2)))
        npn = naive_perms.get(n, 1)
        extra = [str(args.chunk)] if args.chunk else []
        e64 = run_child("engine", str(n), str(ep), "float64", *extra)
        e32 = run_child("engine", str(n), str(ep), "float32", *extra)
        nv = run_child("naive", str(n), str(npn))
        inputs_mib = (K + 1) * n * n * 8 / 2**20
        for scheme in SCHEMES:
            te = e64["schemes"][scheme]["sec_per_perm"]
            t32 = e32["schemes"][scheme]["sec_per_perm"]
            tn = nv["schemes"][scheme]["sec_per_perm"]
            floor = n * n * 8 * RELABELLED_LAYERS[scheme] / bw
            rows.append({
                "n": n, "scheme": scheme, "bw_gbs": bw / 1e9, "engine_ms": te * 1e3,
                "engine_cpu_ms": e64["schemes"][scheme]["cpu_per_perm"] * 1e3,
                "engine32_ms": t32 * 1e3,
                "naive_ms": tn * 1e3, "floor_ms": floor * 1e3, "speedup": tn / te,
                "vs_floor": te / floor, "chunk": e64["schemes"][scheme]["chunk"],
                "engine_peak_mib": e64["peak_mib"], "engine32_peak_mib": e32["peak_mib"],
                "naive_peak_mib": nv["peak_mib"], "inputs_mib": inputs_mib,
                "agree": agreement(e64["schemes"][scheme]["first"][0],
                                   nv["schemes"][scheme]["first"][0]),
            })
            print_row(rows[-1], header=len(rows) == 1)
    info["load_after"] = os.getloadavg()[0]
    print(f"1-min load average at end: {info['load_after']:.2f} (other processes on the "
          "machine slow every column alike)")
    if args.markdown:
        with open(args.markdown, "w") as fh:
            fh.write(markdown(rows, info))
    return 0


COLUMNS = [("n", "{:>5}"), ("scheme", "{:>13}"), ("bw_gbs", "{:>5.1f}"), ("engine_ms", "{:>10.3f}"),
           ("engine_cpu_ms", "{:>8.3f}"),
           ("engine32_ms", "{:>10.3f}"), ("naive_ms", "{:>10.1f}"), ("floor_ms", "{:>9.3f}"),
           ("speedup", "{:>8.0f}"), ("vs_floor", "{:>8.2f}"), ("chunk", "{:>5}"),
           ("engine_peak_mib", "{:>8.0f}"), ("naive_peak_mib", "{:>8.0f}"),
           ("inputs_mib", "{:>7.0f}"), ("agree", "{:>8.1e}")]
HEADS = ["n", "scheme", "GB/s", "engine ms", "cpu ms", "f32 ms", "naive ms", "floor ms", "naive/e",
         "e/floor", "chunk", "e MiB", "nv MiB", "in MiB", "agree"]


def print_row(row: dict, header: bool) -> None:
    if header:
        widths = [len(fmt.format(0 if "s}" not in fmt else "")) for _, fmt in COLUMNS]
        print(" ".join(h.rjust(w) for h, w in zip(HEADS, widths)))
    print(" ".join(fmt.format(row[key]) for key, fmt in COLUMNS), flush=True)


def markdown(rows, info) -> str:
    lines = [f"Machine: {info['cpu']}, {info['cores']} cores, {info['ram_gib']:.1f} GiB RAM; "
             f"numpy {info['numpy']}, numba {info['numba']}. Load average "
             f"{info['load_before']:.2f} at start, {info.get('load_after', float('nan')):.2f} "
             "at end.", "",
             "| n | scheme | read GB/s | engine ms/perm (jobs=2) | engine CPU ms/perm | "
             "float32 ms/perm | naive ms/perm | floor ms/perm | naive / engine | "
             "engine / floor | chunk | engine peak MiB | float32 peak MiB | naive peak MiB | "
             "inputs MiB |",
             "|---:|---|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|"]
    for r in rows:
        lines.append(f"| {r['n']} | {r['scheme']} | {r['bw_gbs']:.1f} | {r['engine_ms']:.3f} | "
                     f"{r['engine_cpu_ms']:.3f} | {r['engine32_ms']:.3f} | {r['naive_ms']:.1f} | "
                     f"{r['floor_ms']:.3f} | {r['speedup']:.0f} | {r['vs_floor']:.2f} | "
                     f"{r['chunk']} | {r['engine_peak_mib']:.0f} | {r['engine32_peak_mib']:.0f} | "
                     f"{r['naive_peak_mib']:.0f} | {r['inputs_mib']:.0f} |")
    return "\n".join(lines) + "\n"


if __name__ == "__main__":
    sys.exit(main())
