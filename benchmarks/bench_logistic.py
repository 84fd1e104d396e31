"""Per-permutation cost of the logistic model beside the linear engine, a naive loop and the floor.

For n = 1000 nodes (dense directed networks, a 0/1 response with about 30 % ties) and
k = 1 and k = 3 predictors, prints in one run, per relabelling:

- linear y / linear dsp: ``dyadperm.routes.linear`` statistics (the linear engine), the yardstick;
- logistic score, scheme y and dsp (``statistic="score"``): the dot-product routes of
  ``dyadperm.routes.logistic`` (y: one product x'y_pi when k = 1, reduced refits otherwise;
  dsp: the row-wise sums of ``kernels.irls.score_rows``);
- logistic refit, scheme y and dsp (``statistic="t"``, the Wald z): Newton refits;
- naive: what a user would write in numpy: relabel with fancy indexing
  (``Y[np.ix_(p, p)]``), vectorise the dyads, refit by Newton steps with
  ``np.linalg.solve`` from the same warm start (Y-permutation, Wald z);
- floor: the bytes of the relabelled float64 layers read once per relabelling
  (n * n * 8 * R; R = 1 for y, k for dsp) at this machine's one-thread read bandwidth,
  measured in the same run.

Times are CPU seconds of one thread (``time.process_time``; BLAS limited to one thread),
best of ``--rounds`` rounds in which every route runs once in turn, so a busy machine
slows all routes alike. The statistics of the engine and of the naive loop are compared on
the same relabellings (largest relative gap reported). Also recorded: mean Newton steps
per refit from the warm start used and from the alternatives (the choice the module
docstring of ``dyadperm.routes.logistic`` explains), the bytes of each plan's stored arrays, and
each child's peak resident memory (ru_maxrss).

Each k runs in a fresh subprocess. Usage:
python benchmarks/bench_logistic.py [--n 1000] [--ks 1,3] [--rounds 3] [--markdown FILE]
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time
from pathlib import Path

SEED = 20240611
HERE = Path(__file__).resolve().parent


def _env_one_thread() -> dict:
    env = dict(os.environ)
    for var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS",
                "NUMBA_NUM_THREADS"):
        env[var] = "1"
    return env


def read_bandwidth_one_thread(gib: float = 0.5) -> float:
    """One-thread read bandwidth in bytes/s: best of 5 sums of a ``gib`` GiB array."""
    sys.path.insert(0, str(HERE))
    from bench_engine import read_bandwidth

    return read_bandwidth(gib, threads=1, repeats=5)


def make_inputs(n: int, k: int):
    """Invented data: k normal predictors (the second leaning on the first), a 0/1
    response from a logistic model with one real effect (about 30 % ties)."""
    import numpy as np
    rng = np.random.default_rng(SEED + 10 * n + k)
    xs = [rng.normal(size=(n, n)) for _ in range(k)]
    if k > 1:
        xs[1] += 0.5 * xs[0]
    eta = -1.0 + 0.4 * xs[0]
    y = (rng.random((n, n)) < 1.0 / (1.0 + np.exp(-eta))).astype(float)
    return y, xs


def _nbytes(obj) -> int:
    import numpy as np
    if isinstance(obj, np.ndarray):
        return obj.nbytes
    if isinstance(obj, dict):
        return sum(_nbytes(v) for v in obj.values())
    if isinstance(obj, (list, tuple)):
        return sum(_nbytes(v) for v in obj)
    return 0


def _naive_newton(X, y, beta0):
    """Newton refit in plain numpy (the naive loop): Wald z of every slope."""
    import numpy as np
    b = beta0.copy()
    for _ in range(50):
        mu = 1.0 / (1.0 + np.exp(-(X @ b)))
        H = X.T @ ((mu * (1 - mu))[:, None] * X)
        step = np.linalg.solve(H, X.T @ (y - mu))
        b += step
        if np.all(np.abs(step) <= 1e-8 * (1 + np.abs(b))):
            break
    mu = 1.0 / (1.0 + np.exp(-(X @ b)))
    cov = np.linalg.inv(X.T @ ((mu * (1 - mu))[:, None] * X))
    return b[1:] / np.sqrt(np.diag(cov)[1:])


def child(n: int, k: int, rounds: int) -> dict:
    import resource

    import numpy as np

    from dyadperm.routes import logistic as lg
    from dyadperm.inputs.design import prepare
    from dyadperm.pipeline.permutations import draw
    from dyadperm.routes.linear import build_statistics as build_plan

    y, xs = make_inputs(n, k)
    prep = prepare(y, {f"x{i + 1}": x for i, x in enumerate(xs)})
    dd = lg.dyad_data(prep)
    fit = lg.observed_fit(prep, dd)
    routes = {
        "linear y": (build_plan(prep, scheme="y", statistic="t"), 32, 1),
        "linear dsp": (build_plan(prep, scheme="dsp", statistic="t"), 32, k),
        "logistic score, y": (lg.build_plan(prep, dd, fit, scheme="y", statistic="score"),
                              32 if k == 1 else 2, 1),
        "logistic score, dsp": (lg.build_plan(prep, dd, fit, scheme="dsp", statistic="score"),
                                32, k),
        "logistic refit, y": (lg.build_plan(prep, dd, fit, scheme="y", statistic="t"), 4, 1),
        "logistic refit, dsp": (lg.build_plan(prep, dd, fit, scheme="dsp", statistic="t"),
                                4 if k == 1 else 2, k),
    }
    rows, _ = draw(prep.blocks, SEED, 0, 32)
    out = {"n": n, "k": k, "n_dyads": prep.n_dyads, "routes": {}}
    stats = {}
    for name, (plan, B, _) in routes.items():  # warm-up: compile or load the kernels
        plan.statistics(rows[:1], rows[:1])
    best = {name: float("inf") for name in routes}
    for _ in range(rounds):
        for name, (plan, B, _) in routes.items():
            t0 = time.process_time()
            st = plan.statistics(rows[:B], rows[:B])
            best[name] = min(best[name], (time.process_time() - t0) / B)
            stats[name] = st
    for name, (plan, B, layers) in routes.items():
        if hasattr(plan, "arrays"):
            mem = _nbytes(plan.arrays)
        else:  # a linear plan: its layer stacks (dsp uses one stack as rel and fix)
            stacks = {id(a): a for p in plan.passes for a in (p.rel, p.fix)}
            mem = _nbytes(list(stacks.values()))
        out["routes"][name] = {"sec_per_perm": best[name], "perms": B,
                               "relabelled_layers": layers, "plan_mib": mem / 2**20}
    # naive loop: relabel with fancy indexing, Newton refit in numpy (scheme y, Wald z)
    mask = prep.mask
    X = dd.X
    beta0 = lg._null_start(dd.y, dd.complete, k + 1)
    naive = float("inf")
    first = []
    for b in range(2):
        p = rows[b]
        t0 = time.process_time()
        yb = y[np.ix_(p, p)][mask]
        z = _naive_newton(X, yb, beta0)
        naive = min(naive, time.process_time() - t0)
        first.append(z)
    engine_first = stats["logistic refit, y"][:2]
    gap = float(np.max(np.abs(engine_first - np.array(first)) / np.maximum(1, np.abs(first))))
    out["naive"] = {"sec_per_perm": naive, "agree": gap}
    # Newton steps per refit from three starts: the expected fit under relabelling, that
    # start moved by its free first Newton step (what the engine uses with complete data),
    # and the observed full fit
    steps = {"y, intercept-only fit": [], "y, + free first step (used)": [],
             "y, observed fit": [], "dsp, reduced fit + 0": [],
             "dsp, + free first step (used)": [], "dsp, observed fit": []}
    zcols = lg._reduced_columns(k)
    gam, cinv = lg._reduced_fits(prep, dd, zcols, dd.complete)
    E = lg._residual_layers(prep, dd)
    Xo = np.column_stack([X[:, zcols[0]], E[:, :, 0][dd.rows, dd.cols]])
    _, b_obs, _ = lg.fit_logistic(Xo, np.arange(k + 1), dd.y, dd.complete,
                                  np.r_[gam[0], 0.0])
    ybar = dd.y.mean()
    h0inv = np.linalg.inv(ybar * (1 - ybar) * (X.T @ X))
    mu_red = 1.0 / (1.0 + np.exp(-(X[:, zcols[0]] @ gam[0])))
    w_red = mu_red * (1 - mu_red)
    for b in range(4):
        p = rows[b]
        yb = y[np.ix_(p, p)][dd.rows, dd.cols]
        one = beta0 + h0inv @ (X.T @ yb - ybar * X.sum(axis=0))
        for key, st in (("y, intercept-only fit", beta0), ("y, + free first step (used)", one),
                        ("y, observed fit", fit.beta_std)):
            steps[key].append(lg.fit_logistic(X, np.arange(k + 1), yb, dd.complete, st)[0])
        eb = E[:, :, 0][np.ix_(p, p)][dd.rows, dd.cols]
        Xb = np.column_stack([X[:, zcols[0]], eb])
        S = X[:, zcols[0]].T @ (w_red * eb)
        step_e = (eb @ (dd.y - mu_red)) / ((w_red * eb) @ eb - S @ cinv[0] @ S)
        one = np.r_[gam[0] - cinv[0] @ S * step_e, step_e]
        for key, st in (("dsp, reduced fit + 0", np.r_[gam[0], 0.0]),
                        ("dsp, + free first step (used)", one), ("dsp, observed fit", b_obs)):
            steps[key].append(lg.fit_logistic(Xb, np.arange(k + 1), dd.y, dd.complete, st)[0])
    out["newton_steps"] = {key: float(np.mean(v)) for key, v in steps.items()}
    out["peak_mib"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    return out


def machine() -> dict:
    sys.path.insert(0, str(HERE))
    from bench_engine import machine as engine_machine  # the engine benchmark's probe
    return engine_machine()


def report(results: list[dict], bandwidth: float, info: dict) -> str:
    lines = []
    lines.append(f"machine: {info['cpu']}, {info['cores']} cores, {info['ram_gib']:.1f} GiB; "
                 f"python {info['python']}, numpy {info['numpy']}, numba {info['numba']}; "
                 f"load average before the run {info['load_before']:.1f}")
    lines.append(f"one-thread read bandwidth: {bandwidth / 1e9:.1f} GB/s")
    for res in results:
        n, k = res["n"], res["k"]
        lin = res["routes"]["linear y"]["sec_per_perm"]
        lin_dsp = res["routes"]["linear dsp"]["sec_per_perm"]
        lines.append("")
        lines.append(f"n = {n}, k = {k} predictors, {res['n_dyads']:,} dyads; "
                     f"peak resident memory {res['peak_mib']:.0f} MiB")
        lines.append("")
        lines.append("| route | ms / relabelling | x linear y | x linear dsp | engine / floor "
                     "| plan arrays (MiB) |")
        lines.append("|---|---:|---:|---:|---:|---:|")
        for name, r in res["routes"].items():
            floor = n * n * 8 * r["relabelled_layers"] / bandwidth
            lines.append(f"| {name} | {r['sec_per_perm'] * 1e3:.2f} | "
                         f"{r['sec_per_perm'] / lin:.2f} | {r['sec_per_perm'] / lin_dsp:.2f} | "
                         f"{r['sec_per_perm'] / floor:.1f} | {r['plan_mib']:.0f} |")
        nv = res["naive"]
        refit = res["routes"]["logistic refit, y"]["sec_per_perm"]
        lines.append(f"| naive numpy refit, y | {nv['sec_per_perm'] * 1e3:.2f} | "
                     f"{nv['sec_per_perm'] / lin:.2f} | {nv['sec_per_perm'] / lin_dsp:.2f} | "
                     f"{nv['sec_per_perm'] / (n * n * 8 / bandwidth):.1f} | - |")
        lines.append("")
        lines.append(f"naive / engine refit (y): {nv['sec_per_perm'] / refit:.2f}; largest "
                     f"relative gap of their z statistics: {nv['agree']:.1e}")
        steps = ", ".join(f"{key}: {v:.2f}" for key, v in res["newton_steps"].items())
        lines.append(f"mean Newton steps per refit (each but the last costs a pass over the "
                     f"dyads), by warm start: {steps}")
    return "\n".join(lines)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=1000)
    ap.add_argument("--ks", default="1,3")
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--markdown", default=None, help="append the results to this file")
    ap.add_argument("--child", default=None, help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child:
        n, k = map(int, args.child.split(","))
        print(json.dumps(child(n, k, args.rounds)))
        return
    info = machine()
    bandwidth = read_bandwidth_one_thread()
    results = []
    for k in map(int, args.ks.split(",")):
        proc = subprocess.run([sys.executable, __file__, "--child", f"{args.n},{k}",
                               "--rounds", str(args.rounds)], capture_output=True, text=True,
                              env=_env_one_thread(), check=True)
        results.append(json.loads(proc.stdout.strip().splitlines()[-1]))
    text = report(results, bandwidth, info)
    print(text)
    if args.markdown:
        with open(args.markdown, "a") as fh:
            fh.write("\n## Logistic model (benchmarks/bench_logistic.py)\n\n")
            fh.write(f"Run {time.strftime('%Y-%m-%d')} with `python benchmarks/bench_logistic.py "
                     f"--n {args.n} --ks {args.ks} --rounds {args.rounds}`. CPU time of one "
                     "thread per relabelling, best of the rounds.\n\n")
            fh.write(text + "\n")


if __name__ == "__main__":
    main()
