"""The 10,000-node dsp study through the command line: wall time and peak memory.

The study: a study file over four n x n float64 ``.npy`` files (a directed response and 3
predictors; 3.2 GB at n = 10,000), scheme dsp, ``storage = "float32"`` (or float64 with
``--storage float64``), jobs 2. ``dyadperm run`` is started in a subprocess twice: with 1
relabelling (the setup: start-up, loading the files into the layer stack, the observed fit
read from the files in float64, the plan; after a first such run that fills numba's kernel
cache if it is cold) and with ``--prefix`` relabellings; the time per
relabelling is the difference over ``prefix - 1`` and the time of 10,000 is projected as
setup + 10,000 x that. ``--full`` also runs all 10,000. Peak resident memory of each
command: the ``ru_maxrss`` a small wrapper process reads of it, and VmHWM polled from
/proc (memory-mapped pages of the files would count in both, which is why the files are
read with plain reads). The bandwidth and the files are made in subprocesses too.

Targets (issue 18): 10,000 relabellings plus setup within 15 minutes on 2 cores, peak
memory at most 0.6 x the float64 inputs + 0.5 GB. A floor line gives the time of reading
the 3 relabelled layers once per relabelling at the two-thread read bandwidth measured in
the same run. The files sit in the page cache after they are written (24 GiB machine),
so the setup reads them from memory, not from disk.

Usage: python benchmarks/bench_float32_study.py [--n 10000] [--prefix 200]
       [--storage float32] [--jobs 2] [--full] [--folder DIR] [--json FILE]
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

from bench_large import K, PERMUTATIONS, SEED, make_networks  # noqa: E402

GB = 1e9


def write_files(folder: Path, n: int) -> None:
    """The four .npy files (reused when they are there with the right size)."""
    import numpy as np

    want = 128 + n * n * 8
    for name, arr in make_networks(n):
        path = folder / f"{name}.npy"
        if path.exists() and abs(path.stat().st_size - want) < 4096:
            continue
        np.save(path, arr)
        del arr


def write_study(folder: Path, storage: str, jobs: int) -> Path:
    preds = "".join(f'[[predictor]]\nname = "x{i}"\nfile = "x{i}.npy"\n' for i in (1, 2, 3))
    path = folder / f"large_{storage}.toml"
    path.write_text('[study]\ntitle = "large dense study"\ndirected = true\n'
                    f'[response]\nname = "y"\nfile = "y.npy"\n{preds}'
                    f'[test]\nscheme = "dsp"\npermutations = {PERMUTATIONS}\nseed = {SEED}\n'
                    f'jobs = {jobs}\nstorage = "{storage}"\n')
    return path


def _status(pid: int) -> tuple[int, int]:
    """(VmRSS, VmHWM) of a process in bytes (0 when gone)."""
    rss = hwm = 0
    try:
        with open(f"/proc/{pid}/status") as fh:
            for line in fh:
                if line.startswith("VmRSS"):
                    rss = int(line.split()[1]) * 1024
                elif line.startswith("VmHWM"):
                    hwm = int(line.split()[1]) * 1024
    except OSError:
        pass
    return rss, hwm


def _children(pid: int) -> list[int]:
    try:
        with open(f"/proc/{pid}/task/{pid}/children") as fh:
            return [int(x) for x in fh.read().split()]
    except OSError:
        return []


def run_cli(study: Path, permutations: int) -> dict:
    """``dyadperm run`` in a subprocess: wall time, peak memory, the result."""
    # a small wrapper process runs the command and reports its children's ru_maxrss (the
    # peak of the command itself: the wrapper it is forked from holds little)
    wrap = ("import resource, subprocess, sys; done = subprocess.run(sys.argv[1:]); "
            "ru = resource.getrusage(resource.RUSAGE_CHILDREN); "
            "sys.stderr.write('\\nmaxrss %d %.3f\\n' % (ru.ru_maxrss, ru.ru_utime + ru.ru_stime)); "
            "sys.exit(done.returncode)")
    cmd = [sys.executable, "-c", wrap, sys.executable, "-m", "dyadperm.cli", "run", str(study),
           "--permutations", str(permutations), "--quiet", "--json"]
    t0 = time.perf_counter()
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    peak = 0
    while proc.poll() is None:
        for child in _children(proc.pid):
            peak = max(peak, _status(child)[1])
        time.sleep(0.05)
    wall = time.perf_counter() - t0
    out, err = proc.communicate()
    if proc.returncode != 0:
        raise SystemExit(f"dyadperm run failed ({proc.returncode}): {err[-2000:]}")
    last = err.strip().splitlines()[-1].split()
    maxrss, cpu = int(last[1]) * 1024, float(last[2])
    return {"permutations": permutations, "wall_s": wall, "cpu_s": cpu,
            "peak_bytes": max(peak, maxrss),
            "polled_peak_bytes": peak, "maxrss_bytes": maxrss, "result": json.loads(out)}


def bandwidth() -> float:
    """Two-thread read bandwidth (bench_engine.read_bandwidth), in a subprocess: this
    process stays small, since a child's ru_maxrss counts the parent's pages it was forked
    with."""
    code = ("import sys; sys.path.insert(0, %r); from bench_engine import read_bandwidth; "
            "print(read_bandwidth(1.5))" % str(HERE))
    return float(subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                                check=True).stdout.split()[-1])


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=10_000)
    ap.add_argument("--prefix", type=int, default=200)
    ap.add_argument("--storage", default="float32", choices=("float32", "float64"))
    ap.add_argument("--jobs", type=int, default=2)
    ap.add_argument("--full", action="store_true", help="also run all 10,000 relabellings")
    ap.add_argument("--folder", help="keep the .npy files here (default: a temporary folder)")
    ap.add_argument("--json", help="also write the figures to this file")
    ap.add_argument("--write", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.write:
        write_files(Path(args.write), args.n)
        return 0
    bw = bandwidth()
    inputs = (K + 1) * args.n * args.n * 8
    budget = 0.6 * inputs + 0.5 * GB
    print(f"n = {args.n:,}, {K} predictors, dsp, storage {args.storage}, jobs {args.jobs}; "
          f"inputs {inputs / GB:.2f} GB of float64 .npy; two-thread read bandwidth "
          f"{bw / GB:.1f} GB/s; load average {os.getloadavg()[0]:.2f} (shared machine)")
    with tempfile.TemporaryDirectory(prefix="dyadperm-f32-") as tmp:
        folder = Path(args.folder) if args.folder else Path(tmp)
        folder.mkdir(parents=True, exist_ok=True)
        t0 = time.perf_counter()
        subprocess.run([sys.executable, __file__, "--write", str(folder), "--n", str(args.n)],
                       check=True)  # in a subprocess too, for the same reason
        print(f"files ready in {time.perf_counter() - t0:.0f} s ({folder})")
        study = write_study(folder, args.storage, args.jobs)
        # a first run fills numba's kernel cache when it is cold (a fresh checkout, an edit
        # of a kernel): its compile time is no part of the setup measured next
        warm = run_cli(study, 1)
        print(f"first run (compiles the kernels if their cache is cold): {warm['wall_s']:.1f} "
              "s wall")
        one = run_cli(study, 1)
        pre = run_cli(study, args.prefix)
        runs = [one, pre]
        per = (pre["wall_s"] - one["wall_s"]) / (args.prefix - 1)
        projected = one["wall_s"] + (PERMUTATIONS - 1) * per
        itemsize = 4 if args.storage == "float32" else 8
        floor = args.n * args.n * itemsize * K / bw
        peak = max(r["peak_bytes"] for r in runs)
        cpu_per = (pre["cpu_s"] - one["cpu_s"]) / (args.prefix - 1)
        print(f"setup (a 1-relabelling run, start-up included): {one['wall_s']:.1f} s wall, "
              f"{one['cpu_s']:.1f} s CPU")
        print(f"{args.prefix} relabellings: {pre['wall_s']:.1f} s wall, {pre['cpu_s']:.1f} s "
              f"CPU -> {per * 1e3:.0f} ms wall per relabelling (floor {floor * 1e3:.0f} ms: "
              f"{per / floor:.2f} x), {cpu_per * 1e3:.0f} ms CPU (both workers)")
        print(f"projected 10,000 relabellings + setup: {projected / 60:.1f} min wall (target "
              f"15 min); from CPU time / {args.jobs} (the cores to itself): "
              f"{(one['cpu_s'] + (PERMUTATIONS - 1) * cpu_per / args.jobs) / 60:.1f} min")
        print(f"peak memory {peak / GB:.2f} GB = {peak / inputs:.2f} x the float64 inputs "
              f"(budget {budget / GB:.2f} GB = 0.6 x inputs + 0.5 GB; ru_maxrss "
              f"{max(r['maxrss_bytes'] for r in runs) / GB:.2f} GB, polled VmHWM "
              f"{max(r['polled_peak_bytes'] for r in runs) / GB:.2f} GB)")
        full = None
        if args.full:
            full = run_cli(study, PERMUTATIONS)
            runs.append(full)
            print(f"full run of 10,000 relabellings: {full['wall_s'] / 60:.1f} min wall, "
                  f"{full['cpu_s'] / 60:.1f} min CPU, peak memory "
                  f"{full['peak_bytes'] / GB:.2f} GB")
        res = pre["result"]
        print("observed t: " + ", ".join(
            f"{t} {s:.3f}" for t, s in zip(res.get("terms", []), res.get("stat", []))))
        print(f"load average after: {os.getloadavg()[0]:.2f}")
    if args.json:
        with open(args.json, "w") as fh:
            json.dump({"bandwidth": bw, "inputs_bytes": inputs, "budget_bytes": budget,
                       "per_relabelling_s": per, "floor_s": floor, "projected_s": projected,
                       "peak_bytes": peak,
                       "runs": [{k: v for k, v in r.items() if k != "result"} for r in runs]},
                      fh, indent=1)
    return 0


if __name__ == "__main__":
    sys.exit(main())
