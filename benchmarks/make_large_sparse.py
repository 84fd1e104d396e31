"""Write the issue-15 study as files: 100,000 nodes, a 1,000,000-edge CSV response.

Invented scenario (no real people or data), the one of ``bench_sparse_schemes.py``:
members of a fictional hobby forum. ``messages.csv`` is the response (messages from
member i to member j over a season; directed, weighted, about 1,000,000 edges),
``follows.csv`` an edge-list predictor (who follows whom, about 1,000,000 edges),
``members.csv`` the node table with the home region (10 categories: a ``same``
predictor) and the membership age in days (a ``gap`` predictor). The generator plants a
follows and a same-region effect.

Three study files are written beside the data, one per scheme: ``forum_y.toml``,
``forum_dsp.toml``, ``forum_freedman-lane.toml`` (10,000 relabellings, seed fixed). The
data are made in memory, never committed: run

    python benchmarks/make_large_sparse.py FOLDER [--nodes 100000] [--edges 1000000]

then ``dyadperm check FOLDER/forum_dsp.toml`` and ``dyadperm run ...`` (or
``benchmarks/run_large_sparse.py FOLDER``, which times the CLI runs).
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from bench_sparse_schemes import SEED, make_forum  # noqa: E402

SCHEMES = ("y", "dsp", "freedman-lane")
STUDY = """[study]
title = "Messages in an invented hobby forum ({scheme})"
nodes = "members.csv"
id_column = "member"

[response]
name = "messages"
file = "messages.csv"

[[predictor]]
name = "follows"
file = "follows.csv"

[[predictor]]
name = "same_region"
same = "region"

[[predictor]]
name = "days_gap"
gap = "days"

[test]
scheme = "{scheme}"
permutations = 10000
seed = 20240611
"""


def write_edges(path: Path, src: np.ndarray, dst: np.ndarray, w: np.ndarray | None) -> None:
    """An edge-list CSV (source,target[,weight]) with labels m0 .. m{n-1}."""
    with path.open("w") as fh:
        if w is None:
            fh.write("source,target\n")
            fh.writelines(f"m{a},m{b}\n" for a, b in zip(src.tolist(), dst.tolist()))
        else:
            fh.write("source,target,weight\n")
            fh.writelines(f"m{a},m{b},{c:g}\n"
                          for a, b, c in zip(src.tolist(), dst.tolist(), w.tolist()))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("folder", type=Path)
    ap.add_argument("--nodes", type=int, default=100_000)
    ap.add_argument("--edges", type=int, default=1_000_000)
    args = ap.parse_args()
    out = args.folder
    out.mkdir(parents=True, exist_ok=True)
    t = time.perf_counter()
    messages, preds = make_forum(args.nodes, args.edges, SEED)
    follows = preds["follows"]
    region = np.asarray(preds["same_region"].values)
    days = np.asarray(preds["days_gap"].values)
    with (out / "members.csv").open("w") as fh:
        fh.write("member,region,days\n")
        fh.writelines(f"m{i},r{r},{d:.1f}\n"
                      for i, (r, d) in enumerate(zip(region.tolist(), days.tolist())))
    write_edges(out / "messages.csv", messages.rows, messages.cols, messages.weights)
    write_edges(out / "follows.csv", follows.rows, follows.cols, None)
    for scheme in SCHEMES:
        (out / f"forum_{scheme}.toml").write_text(STUDY.format(scheme=scheme))
    print(f"wrote {out}: {args.nodes:,} members, {messages.rows.size:,} message edges, "
          f"{follows.rows.size:,} follows edges, {len(SCHEMES)} study files "
          f"({time.perf_counter() - t:.1f} s)")


if __name__ == "__main__":
    main()
