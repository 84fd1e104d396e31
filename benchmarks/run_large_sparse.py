"""Time the issue-15 study through the command line: check, run (y, dsp, freedman-lane), a
run killed part way (kill -9) and extended.

Needs the files of ``make_large_sparse.py`` in FOLDER. Every command runs under
``/usr/bin/time -v`` in its own process, so each figure includes starting Python, reading
the CSV files and node table, the setup (dyad set, fixed products, observed fit, the
scheme's plan) and writing the run file; wall time, CPU time (user + system) and peak
resident memory come from ``time``. The dsp run is killed with SIGKILL once
``--kill-at`` of its relabellings are done (read from its progress bar) and finished with
``dyadperm extend``; its figures are the sum of both processes.

Run: ``python benchmarks/run_large_sparse.py FOLDER [--permutations 10000] [--jobs 2]
[--write]``. With fewer permutations than 10,000 the report projects 10,000 from the
measured time per relabelling (total minus the setup of a one-relabelling run, counted
twice for the killed and extended run). ``--schemes`` runs a subset.
"""

from __future__ import annotations

import argparse
import os
import platform
import re
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np

TARGET = 10_000
SCHEMES = ("y", "dsp", "freedman-lane")
TIME = "/usr/bin/time"
DYADPERM = str(Path(sys.executable).with_name("dyadperm"))
PROGRESS = re.compile(rb"([\d,]+)/([\d,]+)")


def _cpu_name() -> str:
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or "unknown"


def _clock(text: str) -> float:
    parts = [float(p) for p in text.split(":")]
    return sum(p * 60 ** k for k, p in enumerate(reversed(parts)))


def timed(args: list[str], cwd: Path, kill_at: float | None = None) -> dict:
    """Run ``dyadperm ARGS`` under /usr/bin/time -v; SIGKILL it once ``kill_at`` of its
    relabellings are done (its progress bar, so ARGS must include --progress)."""
    proc = subprocess.Popen([TIME, "-v", DYADPERM, *args], cwd=cwd, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE)
    err = bytearray()
    killed = {"at": None}

    def read() -> None:
        while True:
            chunk = proc.stderr.read1(4096)
            if not chunk:
                return
            err.extend(chunk)
            if kill_at is not None and killed["at"] is None:
                tail = bytes(err[-200:]).rsplit(b"\r", 1)[-1]
                found = PROGRESS.findall(tail)
                if found:
                    done, total = (int(x.replace(b",", b"")) for x in found[-1])
                    if done >= kill_at * total:
                        children = Path(f"/proc/{proc.pid}/task/{proc.pid}/children")
                        for pid in children.read_text().split():
                            os.kill(int(pid), signal.SIGKILL)
                        killed["at"] = done

    reader = threading.Thread(target=read)
    reader.start()
    out = proc.stdout.read()
    proc.wait()
    reader.join()
    text = err.decode(errors="replace")

    def field(name: str) -> str:
        m = re.search(rf"{re.escape(name)}: (.+)", text)
        return m.group(1).strip() if m else "nan"

    return dict(wall=_clock(field("Elapsed (wall clock) time (h:mm:ss or m:ss)")),
                cpu=float(field("User time (seconds)")) + float(field("System time (seconds)")),
                peak_gib=float(field("Maximum resident set size (kbytes)")) / 2 ** 20,
                killed_at=killed["at"], signalled="terminated by signal 9" in text,
                code=proc.returncode, stdout=out.decode(errors="replace"),
                errors=[ln for ln in text.splitlines() if "error" in ln.lower()])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("folder", type=Path)
    ap.add_argument("--permutations", type=int, default=TARGET)
    ap.add_argument("--jobs", type=int, default=2)
    ap.add_argument("--kill-at", type=float, default=0.4)
    ap.add_argument("--schemes", nargs="+", default=list(SCHEMES), choices=SCHEMES)
    ap.add_argument("--write", action="store_true", help="append to benchmarks/RESULTS.md")
    args = ap.parse_args()
    folder = args.folder.resolve()
    m, jobs = args.permutations, str(args.jobs)
    for old in folder.glob("run_*.h5"):
        old.unlink()
    load0 = os.getloadavg()[0]
    t0 = time.perf_counter()
    check = timed(["check", "forum_dsp.toml"], folder)
    setup = {s: timed(["run", f"forum_{s}.toml", "--permutations", "1", "--jobs", "1",
                       "--quiet"], folder) for s in args.schemes}
    runs = {}
    for s in args.schemes:
        out = f"run_{s}.h5"
        base = ["run", f"forum_{s}.toml", "--permutations", str(m), "--jobs", jobs, "--out", out]
        if s == "dsp":
            first = timed(base + ["--progress"], folder, kill_at=args.kill_at)
            rest = timed(["extend", out, "--jobs", jobs, "--quiet"], folder)
            runs[s] = dict(wall=first["wall"] + rest["wall"], cpu=first["cpu"] + rest["cpu"],
                           peak_gib=max(first["peak_gib"], rest["peak_gib"]),
                           killed_at=first["killed_at"], signalled=first["signalled"],
                           parts=(first, rest), stdout=rest["stdout"],
                           errors=first["errors"] + rest["errors"], code=rest["code"])
        else:
            runs[s] = timed(base + ["--quiet"], folder)
    load1 = os.getloadavg()[0]
    lines = [
        f"machine: {_cpu_name()}, {os.cpu_count()} cores, shared with other jobs (load "
        f"average {load0:.1f} at the start, {load1:.1f} at the end; other work on the cores "
        f"slows the wall times, CPU times are the steadier figures); numpy {np.__version__}; "
        f"python {platform.python_version()}; {time.perf_counter() - t0:.0f} s in all",
        f"dyadperm check forum_dsp.toml: {check['wall']:.1f} s wall, {check['cpu']:.1f} s CPU, "
        f"peak {check['peak_gib']:.2f} GiB",
    ]
    per = {}
    for s, r in runs.items():
        one = setup[s]
        starts = 2 if s == "dsp" else 1  # the killed run and extend each read and set up
        per[s] = (r["cpu"] - starts * one["cpu"]) / m
        per_wall = (r["wall"] - starts * one["wall"]) / m
        proj = one["wall"] + TARGET * per_wall
        proj_cpu = one["wall"] + TARGET * per[s] / args.jobs
        how = ""
        if s == "dsp":
            first, rest = r["parts"]
            how = (f"; killed with SIGKILL at {r['killed_at']:,} of {m:,} relabellings "
                   f"({first['wall']:.0f} s), finished by `dyadperm extend` "
                   f"({rest['wall']:.0f} s)")
        lines.append(
            f"{s}: {m:,} relabellings at --jobs {jobs}, from the CSV files: {r['wall'] / 60:.1f} "
            f"min wall, {r['cpu'] / 60:.1f} min CPU, peak {r['peak_gib']:.2f} GiB{how}; a "
            f"one-relabelling run (reading, setup, fit): {one['wall']:.1f} s wall, "
            f"{one['cpu']:.1f} s CPU; per relabelling {1e3 * per_wall:.0f} ms wall, "
            f"{1e3 * per[s]:.0f} ms CPU"
            + (f"; projected {TARGET:,}: {proj / 60:.1f} min ({proj_cpu / 60:.1f} min from CPU "
               f"time / {jobs}, the cores to itself)" if m != TARGET else
               f"; from CPU time / {jobs} (the cores to itself): {proj_cpu / 60:.1f} min"))
        if r["code"] != 0 or r["errors"]:
            lines.append(f"  {s} exit code {r['code']}: {r['errors'][:2]}")
    for s in [s for s in ("dsp", "freedman-lane") if s in per and "y" in per]:
        lines.append(f"{s} / y, CPU per relabelling: {per[s] / per['y']:.2f} x (goal: within "
                     "5 x)")
    print("\n".join(lines))
    if "dsp" in runs:
        print(runs["dsp"]["stdout"])
    if args.write:
        path = Path(__file__).with_name("RESULTS.md")
        block = ["", "### Through the command line (`benchmarks/run_large_sparse.py`)", "",
                 f"`python benchmarks/make_large_sparse.py DIR && python "
                 f"benchmarks/run_large_sparse.py DIR --permutations {m} --write`", ""]
        block += [f"- {line}" for line in lines]
        with path.open("a") as fh:
            fh.write("\n".join(block) + "\n")


if __name__ == "__main__":
    main()
