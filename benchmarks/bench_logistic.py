"""Per-relabelling cost of the logistic model against statsmodels refits, in one run.

The design is the case of issue 16 (invented data): a directed binary network of n
organisations (density about 4 %) with three predictors, a binary tie predictor (an earlier
contract, 5 % of dyads), a same-category predictor (same region of five) and an absolute
difference (of founding years). For each n (default 600 and 1000) it prints, per
relabelling:

- the engine's routes of ``dyadperm.routes.logistic`` at ``--jobs`` threads (the engine's thread
  backend: the relabellings split into one chunk per thread): refits (``statistic="t"``,
  the Wald z) of schemes y and dsp, and score statistics (``statistic="score"``) of schemes
  y and dsp; the route each takes (``LogisticPlan.kind``) and the passes over the dyads per
  relabelling, per refit and per score statistic (a gather of a relabelled layer counts as a
  pass; scheme y's complete-data route fits from moments of the design and needs only its
  gather);
- the baseline: statsmodels ``Logit`` refitted on each relabelled response from the observed
  estimate (warm start), ``Logit(y_pi, X).fit(start_params=..., method="newton", disp=0)``
  (statsmodels' BLAS may use every core), with the relabelling by fancy indexing; also a
  plain numpy Newton refit from the same start (the naive loop);
- ratios baseline / engine (issue 16: refits >= 10x, score statistics >= 100x), and the
  engine against the memory-traffic floor (the relabelled float64 layers read once at this
  machine's one-thread read bandwidth: n^2 8 R bytes, R = 1 for y, k for dsp);
- with ``--study-perms P`` (n = the largest): ``dyadperm.regress(..., scheme="dsp",
  permutations=P, jobs)`` end to end, and its projection to 10,000 relabellings.

Wall-clock times, best of ``--rounds`` rounds in which every route runs once in turn, so a
busy machine slows all routes alike. The engine's statistics are compared with statsmodels'
on the same relabellings (largest relative gap of the Wald z). Each n runs in a fresh
subprocess (peak resident memory per n).

Usage: python benchmarks/bench_logistic.py [--ns 600,1000] [--perms 16] [--rounds 3]
       [--jobs 2] [--study-perms 300] [--markdown FILE]
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

SEED = 20240611
HERE = Path(__file__).resolve().parent
ROUTES = (("y", "t"), ("dsp", "t"), ("y", "score"), ("dsp", "score"))


def read_bandwidth_one_thread(gib: float = 0.5) -> float:
    """One-thread read bandwidth in bytes/s: best of 5 sums of a ``gib`` GiB array."""
    sys.path.insert(0, str(HERE))
    from bench_engine import read_bandwidth

    return read_bandwidth(gib, threads=1, repeats=5)


def make_inputs(n: int, density: float = 0.04, seed: int = SEED):
    """(Y, predictors for dyadperm, X and y of the dyads for statsmodels); invented data."""
    import numpy as np
    from scipy.special import expit

    import dyadperm as dp
    rng = np.random.default_rng(seed + n)
    contract = (rng.random((n, n)) < 0.05).astype(float)
    region = rng.integers(0, 5, n)
    founded = rng.normal(1990.0, 12.0, n)
    same = (region[:, None] == region[None, :]).astype(float)
    gap = np.abs(founded[:, None] - founded[None, :])
    eta = 1.5 * contract + 0.6 * same - 0.02 * gap
    off = ~np.eye(n, dtype=bool)
    lo, hi = -20.0, 20.0
    for _ in range(60):  # the intercept that gives the density
        mid = (lo + hi) / 2
        lo, hi = (mid, hi) if expit(mid + eta[off]).mean() < density else (lo, mid)
    Y = (rng.random((n, n)) < expit(lo + eta)).astype(float)
    np.fill_diagonal(Y, 0.0)
    preds = {"contract": contract, "region": dp.same(region), "founded": dp.gap(founded)}
    X = np.column_stack([np.ones(off.sum()), contract[off], same[off], gap[off]])
    return Y, preds, X, off


def _naive_newton(X, y, beta0):
    """Newton refit in plain numpy from beta0 (the naive loop): Wald z of every slope."""
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


def _threaded(plan, perms, jobs):
    """Statistics and passes of ``perms`` split into ``jobs`` chunks run on as many
    threads (the engine's thread backend)."""
    import numpy as np
    parts = np.array_split(perms, jobs)
    with ThreadPoolExecutor(jobs) as pool:
        res = list(pool.map(lambda p: plan.statistics_and_passes(p, p), parts))
    return np.concatenate([r[0] for r in res]), np.concatenate([r[1] for r in res])


def child(n: int, n_perm: int, rounds: int, jobs: int, study_perms: int) -> dict:
    import resource
    import warnings

    import numpy as np
    import statsmodels.api as sm

    import dyadperm as dp
    from dyadperm.routes import logistic as lg
    from dyadperm.inputs.design import prepare
    from dyadperm.pipeline.permutations import draw

    Y, preds, X, off = make_inputs(n)
    t0 = time.perf_counter()
    prep = prepare(Y, preds)
    dd = lg.dyad_data(prep)
    fit = lg.observed_fit(prep, dd)
    setup = {"prepare and observed fit": time.perf_counter() - t0}
    plans = {}
    for scheme, statistic in ROUTES:
        t0 = time.perf_counter()
        plans[(scheme, statistic)] = lg.build_plan(prep, dd, fit, scheme=scheme,
                                                   statistic=statistic)
        setup[f"plan {scheme}/{statistic}"] = time.perf_counter() - t0
    perms, _ = draw(prep.blocks, SEED, 0, n_perm)
    for plan in plans.values():  # warm-up: compile or load the kernels
        plan.statistics(perms[:1], perms[:1])
    y_obs = Y[off]
    sm_obs = sm.Logit(y_obs, X).fit(method="newton", disp=0)
    n_sm = max(2, min(6, n_perm))
    best = {key: float("inf") for key in list(plans) + ["statsmodels", "naive"]}
    stats, passes, sm_z = {}, {}, []
    for _ in range(rounds):
        for key, plan in plans.items():
            t0 = time.perf_counter()
            st, ps = _threaded(plan, perms, jobs)
            best[key] = min(best[key], (time.perf_counter() - t0) / n_perm)
            stats[key], passes[key] = st, ps
        t0 = time.perf_counter()
        sm_z = []
        for b in range(n_sm):
            yb = Y[np.ix_(perms[b], perms[b])][off]
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                res = sm.Logit(yb, X).fit(start_params=sm_obs.params, method="newton", disp=0)
            sm_z.append(res.tvalues[1:])
        best["statsmodels"] = min(best["statsmodels"], (time.perf_counter() - t0) / n_sm)
        t0 = time.perf_counter()
        for b in range(2):
            yb = Y[np.ix_(perms[b], perms[b])][off]
            _naive_newton(X, yb, sm_obs.params.copy())
        best["naive"] = min(best["naive"], (time.perf_counter() - t0) / 2)
    sm_z = np.array(sm_z)
    gap = float(np.max(np.abs(stats[("y", "t")][:n_sm] - sm_z) / np.maximum(1, np.abs(sm_z))))
    k = prep.k
    out = {"n": n, "k": k, "n_dyads": prep.n_dyads, "density": float(y_obs.mean()),
           "jobs": jobs, "perms": n_perm, "setup": setup, "agree_z": gap, "routes": {},
           "sec": {"statsmodels": best["statsmodels"], "naive": best["naive"]},
           "sm_iterations": int(sm_obs.mle_retvals["iterations"])}
    for (scheme, statistic), plan in plans.items():
        refits = 1 if scheme == "y" else k
        out["routes"][f"{scheme}/{statistic}"] = {
            "kind": plan.kind, "sec": best[(scheme, statistic)],
            "passes": float(np.mean(passes[(scheme, statistic)])),
            "per_fit": float(np.mean(passes[(scheme, statistic)])) / refits,
            "layers": 1 if scheme == "y" else k,
            "failed": int(np.isnan(stats[(scheme, statistic)]).sum())}
    if study_perms:
        t0 = time.perf_counter()
        res = dp.regress(Y, preds, model="logistic", scheme="dsp", permutations=study_perms,
                         seed=SEED, jobs=jobs)
        wall = time.perf_counter() - t0
        t0 = time.perf_counter()
        dp.regress(Y, preds, model="logistic", scheme="dsp", permutations=1, seed=SEED)
        fixed = time.perf_counter() - t0
        per = (wall - fixed) / study_perms
        out["study"] = {"perms": study_perms, "wall": wall, "setup": fixed,
                        "per_perm": per, "projected_10000": fixed + 10_000 * per,
                        "failed": int(res.failed.sum())}
    out["peak_mib"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    return out


def machine() -> dict:
    sys.path.insert(0, str(HERE))
    from bench_engine import machine as engine_machine  # the engine benchmark's probe
    return engine_machine()


def report(results: list[dict], bandwidth: float, info: dict) -> str:
    lines = [f"machine: {info['cpu']}, {info['cores']} cores, {info['ram_gib']:.1f} GiB; "
             f"python {info['python']}, numpy {info['numpy']}, numba {info['numba']}; "
             f"load average before the run {info['load_before']:.1f} (shared machine)",
             f"one-thread read bandwidth: {bandwidth / 1e9:.1f} GB/s"]
    for res in results:
        n, sm_sec = res["n"], res["sec"]["statsmodels"]
        lines += ["", f"n = {n}, k = {res['k']} predictors, {res['n_dyads']:,} dyads, density "
                      f"{res['density']:.3f}; jobs = {res['jobs']}, {res['perms']} relabellings "
                      f"per route; peak resident memory {res['peak_mib']:.0f} MiB", "",
                  "| route | kind | ms / relabelling | passes / relabelling | passes / refit "
                  "or statistic | statsmodels / engine | engine / floor |",
                  "|---|---|---:|---:|---:|---:|---:|"]
        for name, r in res["routes"].items():
            floor = n * n * 8 * r["layers"] / bandwidth
            lines.append(f"| {name} | {r['kind']} | {r['sec'] * 1e3:.2f} | {r['passes']:.2f} | "
                         f"{r['per_fit']:.2f} | {sm_sec / r['sec']:.1f} | "
                         f"{r['sec'] / floor:.1f} |")
        lines.append(f"| statsmodels Logit refit from the observed estimate | - | "
                     f"{sm_sec * 1e3:.1f} | - | - | 1.0 | - |")
        lines.append(f"| naive numpy Newton refit from the observed estimate | - | "
                     f"{res['sec']['naive'] * 1e3:.1f} | - | - | "
                     f"{sm_sec / res['sec']['naive']:.2f} | - |")
        lines += ["", f"largest relative gap of the engine's and statsmodels' Wald z (scheme y, "
                      f"same relabellings): {res['agree_z']:.1e}; statsmodels' observed fit: "
                      f"{res['sm_iterations']} Newton steps",
                  "setup (s): " + ", ".join(f"{key} {v:.2f}" for key, v in res["setup"].items())]
        if "study" in res:
            s = res["study"]
            lines.append(f"dsp study end to end (dyadperm.regress, jobs = {res['jobs']}): "
                         f"{s['perms']} relabellings in {s['wall']:.1f} s, of which "
                         f"{s['setup']:.1f} s setup (a run of 1 relabelling): "
                         f"{s['per_perm'] * 1e3:.1f} ms per relabelling; projected for "
                         f"10,000 relabellings: {s['projected_10000']:.0f} s = "
                         f"{s['projected_10000'] / 60:.1f} min; failed fits {s['failed']}")
    return "\n".join(lines)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--ns", default="600,1000")
    ap.add_argument("--perms", type=int, default=16)
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--jobs", type=int, default=2)
    ap.add_argument("--study-perms", type=int, default=0)
    ap.add_argument("--markdown", default=None, help="append the results to this file")
    ap.add_argument("--child", default=None, help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child:
        n, study = map(int, args.child.split(","))
        print(json.dumps(child(n, args.perms, args.rounds, args.jobs, study)))
        return
    info = machine()
    bandwidth = read_bandwidth_one_thread()
    ns = list(map(int, args.ns.split(",")))
    results = []
    for n in ns:
        study = args.study_perms if n == max(ns) else 0
        proc = subprocess.run([sys.executable, __file__, "--child", f"{n},{study}",
                               "--perms", str(args.perms), "--rounds", str(args.rounds),
                               "--jobs", str(args.jobs)], capture_output=True, text=True,
                              check=True)
        results.append(json.loads(proc.stdout.strip().splitlines()[-1]))
    text = report(results, bandwidth, info)
    print(text)
    if args.markdown:
        with open(args.markdown, "a") as fh:
            fh.write("\n## Logistic model against statsmodels (benchmarks/bench_logistic.py)\n\n")
            fh.write(f"Run {time.strftime('%Y-%m-%d')} with `python benchmarks/bench_logistic.py "
                     f"--ns {args.ns} --perms {args.perms} --rounds {args.rounds} --jobs "
                     f"{args.jobs} --study-perms {args.study_perms}`. Wall-clock time per "
                     "relabelling, best of the rounds.\n\n")
            fh.write(text + "\n")


if __name__ == "__main__":
    main()
