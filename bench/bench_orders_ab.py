"""Suggest latency of JM/KN bigram and trigram models, two revisions of the engine, ONE process.

Each revision's own code trains its own files from the same corpus (the trigram files
differ between revisions when the build changes; the bigram files are trained by each
side too), then old and new answer the same held-out typed texts, alternating query by
query with the order flipping, so the load of a shared machine falls on both alike. Per
model and side: p50/p99 of single calls in wall time (perf_counter) and in CPU time
(thread_time, which leaves out the time this thread was not running), file size and
bytes per stored n-gram, and how many answers (words) differ between the sides.

    python bench/bench_orders_ab.py --old main --messages 300 --queries 6000

The queries are ``nextword.baselines.sample_queries`` over the first ``--messages``
held-out messages of bench/data/test.txt (the typed texts of bench_models.py).
"""

from __future__ import annotations

import argparse
import importlib
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

from bench_ab import _trees  # noqa: E402

DATA = HERE / "data"
MODELS: tuple[tuple[str, dict[str, Any]], ...] = (
    ("JM bigram", {"order": 2, "smoothing": "jm"}),
    ("KN bigram", {"order": 2, "smoothing": "kn"}),
    ("JM trigram", {"order": 3, "smoothing": "jm"}),
    ("KN trigram", {"order": 3, "smoothing": "kn"}),
)


def _pct(x: list[float], q: float) -> float:
    return float(np.percentile(np.asarray(x) * 1e6, q))


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--old", required=True, help="git revision to compare the working tree with")
    ap.add_argument("--train", type=Path, default=DATA / "train.txt")
    ap.add_argument("--messages", type=int, default=300)
    ap.add_argument("--queries", type=int, default=6000)
    ap.add_argument("--k", type=int, default=3)
    ap.add_argument("--keep", type=Path, default=None, help="directory to keep the trained files in")
    args = ap.parse_args()
    held = [ln for ln in (DATA / "test.txt").read_text(encoding="utf-8").splitlines() if ln.strip()][: args.messages]
    with tempfile.TemporaryDirectory(prefix="nextword-ab-") as tmp:
        _trees(args.old, Path(tmp))
        sys.path.insert(0, tmp)
        sides = {"old": importlib.import_module("nextword_old"), "new": importlib.import_module("nextword_new")}
        queries = importlib.import_module("nextword_new.baselines").sample_queries(held, args.queries)
        where = args.keep or Path(tmp)
        where.mkdir(parents=True, exist_ok=True)
        print(f"{len(queries)} typed texts from {len(held)} held-out messages, k={args.k}; old = {args.old}, new = working tree")
        print("| model | side | file MB | bytes/n-gram | wall p50 | wall p99 | CPU p50 | CPU p99 |")
        print("|---|---|---|---|---|---|---|---|")
        for label, kw in MODELS:
            models, sizes = {}, {}
            for name, pkg in sides.items():
                path = where / f"{name}-{kw['smoothing']}{kw['order']}.nwm"
                rep = pkg.train(args.train, path, **kw)
                models[name] = pkg.load(path)
                grams = rep.n_bigrams + int(models[name].header().get("trigrams", 0))
                sizes[name] = (path.stat().st_size, path.stat().st_size / max(grams, 1))
            for t in queries[:2000]:  # warm-up: caches and pages of both
                for m in models.values():
                    m.suggest(t, args.k)
            wall: dict[str, list[float]] = {"old": [], "new": []}
            cpu: dict[str, list[float]] = {"old": [], "new": []}
            differ = 0
            pc, tt = time.perf_counter, time.thread_time
            for i, t in enumerate(queries):
                got = {}
                for name in (("old", "new") if i % 2 else ("new", "old")):
                    m = models[name]
                    c0, w0 = tt(), pc()
                    got[name] = m.suggest(t, args.k)
                    w1, c1 = pc(), tt()
                    wall[name].append(w1 - w0)
                    cpu[name].append(c1 - c0)
                differ += [s.word for s in got["old"]] != [s.word for s in got["new"]]
            for name in ("old", "new"):
                size, per = sizes[name]
                print(f"| {label} | {name} | {size / 1e6:.2f} | {per:.2f} | {_pct(wall[name], 50):.0f} µs | "
                      f"{_pct(wall[name], 99):.0f} µs | {_pct(cpu[name], 50):.0f} µs | {_pct(cpu[name], 99):.0f} µs |")
            print(f"|  {label}: answers differing in words: {differ} of {len(queries)} | | | | | | | |", flush=True)
            for m in models.values():
                m.close()
    return 0


if __name__ == "__main__":
    sys.exit(main())
