"""Suggest latency of the Jelinek-Mercer bigram beside Kneser-Ney and order-3 models, one run.

Models (trained beforehand on bench/data/train.txt, see bench/RESULTS.md for the commands)
are given as NAME=PATH. The same held-out queries (bench_core's mix of next-word and 1-3
letter prefixes, from bench/data/test.txt) go to every model in interleaved rounds, so the
shared machine's load falls on all of them alike; the figures to compare are the ratios.
Held-out perplexity is reported beside them. A benchmark, not a test: nothing here fails.

    python bench/bench_ngram.py jm2=bench/out/m_jm2.nwm kn2=bench/out/m_kn2.nwm kn3=bench/out/m_kn3.nwm
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))
sys.path.insert(0, str(HERE))

import nextword  # noqa: E402
from bench_core import machine, make_queries  # noqa: E402


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("models", nargs="+", metavar="NAME=PATH")
    ap.add_argument("--queries", type=int, default=3000, help="held-out queries (default %(default)s)")
    ap.add_argument("--rounds", type=int, default=3, help="interleaved rounds (default %(default)s)")
    ap.add_argument("-k", type=int, default=3, help="suggestions per query (default %(default)s)")
    ap.add_argument("--ppl-lines", type=int, default=3000, help="held-out messages for perplexity (default %(default)s)")
    args = ap.parse_args()
    test = (HERE / "data" / "test.txt").read_text(encoding="utf-8").splitlines()
    queries = [t for _, t in make_queries(test, args.queries, seed=1)]
    models = {}
    for spec in args.models:
        name, path = spec.split("=", 1)
        models[name] = nextword.load(path)
    times: dict[str, list[float]] = {name: [] for name in models}
    for m in models.values():  # warm-up
        for q in queries[:300]:
            m.suggest(q, args.k)
    for _ in range(args.rounds):
        for name, m in models.items():
            for q in queries:
                t0 = time.perf_counter()
                m.suggest(q, args.k)
                times[name].append(time.perf_counter() - t0)
    print(f"Machine: {machine()}")
    print(f"{len(queries)} queries x {args.rounds} rounds, k = {args.k}")
    base = None
    out = {}
    for name, m in models.items():
        a = np.asarray(times[name]) * 1e6
        p50, p99 = float(np.percentile(a, 50)), float(np.percentile(a, 99))
        # each query's best of the rounds: the call's own cost, without first-touch page
        # faults of the mapped file and the shared machine's scheduling noise
        best = a.reshape(args.rounds, len(queries)).min(axis=0)
        b50, b99 = float(np.percentile(best, 50)), float(np.percentile(best, 99))
        base = base or (p50, p99, b50, b99)
        ppl = m.perplexity(test[: args.ppl_lines])
        out[name] = {"p50_us": p50, "p99_us": p99, "best_p50_us": b50, "best_p99_us": b99, "perplexity": ppl, "file_bytes": m.file_size,
                     "estimator": m.estimator, "order": m.order}  # fmt: skip
        print(f"{name:6} {m.estimator} order {m.order}: p50 {p50:8.1f} µs ({p50 / base[0]:.2f}x)  "
              f"p99 {p99:8.1f} µs ({p99 / base[1]:.2f}x)  best-of-rounds p50 {b50:7.1f} µs ({b50 / base[2]:.2f}x) "
              f"p99 {b99:7.1f} µs ({b99 / base[3]:.2f}x)  perplexity {ppl:8.1f}  {m.file_size / 1e6:6.1f} MB")  # fmt: skip
    (HERE / "out").mkdir(exist_ok=True)
    (HERE / "out" / "ngram.json").write_text(json.dumps(out, indent=2))
    return 0


if __name__ == "__main__":
    sys.exit(main())
