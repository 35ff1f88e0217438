"""Single-call suggest latency of two revisions of the engine, side by side in ONE process.

Both source trees are copied under other package names (``nextword_old`` from a git
revision, ``nextword_new`` from the working tree), load the same model file and answer
the same queries, old and new alternating query by query (the order flipping each time),
so the load of a shared machine falls on both alike. Prints p50/p90/p99/mean per side,
their ratio, and whether every answer (words and probabilities) is identical.

    python bench/bench_ab.py --old 1710c19 --model m.nwm [--queries 20000]

The queries are bench_core's (next word, or 1-3 letters into a word, from the held-out
part of the prepared corpus, bench/data/test.txt). Refactors that must not change the
query path (e.g. the candidate seam) are checked with it.
"""

from __future__ import annotations

import argparse
import importlib
import io
import shutil
import subprocess
import sys
import tarfile
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
sys.path.insert(0, str(HERE))


def _trees(old: str, where: Path) -> None:
    """nextword_old (git revision ``old``) and nextword_new (the working tree) under ``where``."""
    blob = subprocess.run(["git", "archive", old, "nextword"], cwd=ROOT, capture_output=True, check=True).stdout
    with tarfile.open(fileobj=io.BytesIO(blob)) as tar:
        tar.extractall(where / "old", filter="data")
    shutil.move(str(where / "old" / "nextword"), str(where / "nextword_old"))
    shutil.copytree(ROOT / "nextword", where / "nextword_new", ignore=shutil.ignore_patterns("__pycache__"))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--old", required=True, help="git revision to compare the working tree with")
    ap.add_argument("--model", required=True, help="a model file both revisions read")
    ap.add_argument("--queries", type=int, default=20000)
    ap.add_argument("--k", type=int, default=3)
    ap.add_argument("--seed", type=int, default=7)
    args = ap.parse_args()
    from bench_core import make_queries

    from nextword.text import normalize

    lines = [ln for ln in (HERE / "data" / "test.txt").read_text(encoding="utf-8").splitlines() if ln.strip()]
    queries = [t for _, t in make_queries([normalize(x) for x in lines], args.queries, args.seed)]
    with tempfile.TemporaryDirectory() as tmp:
        _trees(args.old, Path(tmp))
        sys.path.insert(0, tmp)
        old, new = importlib.import_module("nextword_old"), importlib.import_module("nextword_new")
        mo, mn = old.load(args.model), new.load(args.model)
        for t in queries[:3000]:  # warm-up: caches and pages of both
            mo.suggest(t, args.k)
            mn.suggest(t, args.k)
        times: dict[str, list[float]] = {"old": [], "new": []}
        same = True
        pc = time.perf_counter
        for i, t in enumerate(queries):
            answers = {}
            for name, m in (("old", mo), ("new", mn)) if i % 2 else (("new", mn), ("old", mo)):
                t0 = pc()
                answers[name] = m.suggest(t, args.k)
                times[name].append(pc() - t0)
            same = same and [tuple(s) for s in answers["old"]] == [tuple(s) for s in answers["new"]]
    a, b = np.asarray(times["old"]) * 1e6, np.asarray(times["new"]) * 1e6
    print(f"{len(queries)} queries, k={args.k}, model {args.model}, old = {args.old}, new = working tree")
    for q in (50, 90, 99):
        x, y = np.percentile(a, q), np.percentile(b, q)
        print(f"p{q}: old {x:.1f} µs, new {y:.1f} µs, new/old {y / x:.3f}")
    print(f"mean: old {a.mean():.1f} µs, new {b.mean():.1f} µs, new/old {b.mean() / a.mean():.3f}")
    print("answers identical (words and probabilities):", same)
    if not same:
        sys.exit(1)


if __name__ == "__main__":
    main()
