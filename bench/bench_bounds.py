"""Cost of the count bounds (no probability above 1 from damaged pair data): load and query.

Runs an older revision of the package (``--before``, exported with ``git archive`` into a
temporary directory) and this working tree side by side, alternating fresh child processes
on the same model and queries, so the shared machine's noise hits both equally. Figures go
into ``bench/RESULTS.md`` between the ``bounds`` markers.

    python bench/prepare_corpus.py && python bench/bench_core.py && python bench/bench_bounds.py --before f93ea60
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
sys.path.insert(0, str(HERE))

from bench_core import machine, make_queries, publish  # noqa: E402


def child(model: str, queries_path: str, loads: int) -> None:
    import nextword

    queries = json.loads(Path(queries_path).read_text())
    times = []
    for _ in range(loads):
        t0 = time.perf_counter()
        m = nextword.load(model)
        times.append(time.perf_counter() - t0)
        m.close()
    # what the rejected alternative would add to every load: an O(pairs) pass bounding
    # every one-byte count by its row's c(v) (a per-row maximum over CNTS)
    import numpy as np

    full = []
    for _ in range(loads):
        m = nextword.load(model)
        t0 = time.perf_counter()
        a = m._src.arrays
        rows = a["ROWS"].astype(np.int64)
        n = m.n_words
        hist = np.zeros(n + 3, dtype=np.int64)
        hist[: n + 2] = a["UNIG"]
        hist[n], hist[n + 2] = 0, a["UNIG"][n]
        nonempty = np.flatnonzero(np.diff(rows) > 0)
        top = np.maximum.reduceat(a["CNTS"], rows[nonempty])
        bad = bool(np.any((top < 255) & (top > hist[nonempty])))
        full.append(time.perf_counter() - t0)
        assert not bad
        m.close()
    m = nextword.load(model)
    for _, typed in queries[:200]:  # warm the caches the same way in both
        m.suggest(typed, 3)
    lat = []
    for _, typed in queries:
        t0 = time.perf_counter()
        m.suggest(typed, 3)
        lat.append(time.perf_counter() - t0)
    print(json.dumps({"load_ms": statistics.median(times) * 1e3, "load_max_ms": max(times) * 1e3,
                      "full_check_ms": statistics.median(full) * 1e3,
                      "p50_us": statistics.median(lat) * 1e6, "p99_us": sorted(lat)[int(0.99 * (len(lat) - 1))] * 1e6}))


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description="cost of the count bounds")
    ap.add_argument("--before", required=True, help="git revision without the bounds (e.g. f93ea60)")
    ap.add_argument("--rounds", type=int, default=5)
    ap.add_argument("--loads", type=int, default=200)
    ap.add_argument("--queries", type=int, default=5000)
    ap.add_argument("--no-results", action="store_true")
    ap.add_argument("--child", nargs=3, help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.child:
        child(args.child[0], args.child[1], int(args.child[2]))
        return 0
    model, test = HERE / "out" / "core.nwm", HERE / "data" / "test.txt"
    if not model.exists():
        print("bench_bounds: run bench/prepare_corpus.py and bench/bench_core.py first", file=sys.stderr)
        return 2
    tmp = Path(tempfile.mkdtemp(prefix="nextword-before-"))
    archive = subprocess.run(["git", "-C", str(ROOT), "archive", args.before, "nextword"], check=True, capture_output=True)
    subprocess.run(["tar", "-x", "-C", str(tmp)], input=archive.stdout, check=True)
    qpath = tmp / "queries.json"
    qpath.write_text(json.dumps(make_queries(test.read_text(encoding="utf-8").splitlines(), args.queries, 1)))
    results: dict[str, list[dict[str, float]]] = {"before": [], "after": []}
    for _ in range(args.rounds):
        for label, path in (("before", tmp), ("after", ROOT)):
            env = dict(os.environ, PYTHONPATH=str(path))
            out = subprocess.run([sys.executable, __file__, "--before", args.before, "--child", str(model), str(qpath),
                                  str(args.loads)], check=True, capture_output=True, text=True, env=env, cwd=tmp)
            results[label].append(json.loads(out.stdout))
    med = {k: {f: statistics.median(r[f] for r in v) for f in v[0]} for k, v in results.items()}
    rows = "\n".join(
        f"| {label} | {med[label]['load_ms']:.3f} ms | {med[label]['load_max_ms']:.3f} ms | {med[label]['p50_us']:.1f} µs | {med[label]['p99_us']:.1f} µs |"
        for label in ("before", "after")
    )
    m = __import__("nextword").load(model)
    md = f"""### Count bounds: load and query cost (`bench/bench_bounds.py`)

Command: `python bench/bench_bounds.py --before {args.before}` — {time.strftime('%Y-%m-%d')}
Machine: {machine()}.
Model `bench/out/core.nwm` ({m.file_size:,} bytes, {m.n_bigrams:,} pairs, {len(m._src.arrays['BIGI']):,} escaped counts).
"before" is revision `{args.before}` (no bound), "after" this tree: every load bounds each escaped count by its row's c(v)
(O(escapes)), and every query checks the pair counts it reads against c(v). {args.rounds} alternating rounds of fresh
processes, medians of the rounds; each round: {args.loads} loads, then {args.queries:,} held-out `suggest(typed, 3)` calls.

| code | load, median | load, max | suggest p50 | suggest p99 |
|---|---|---|---|---|
{rows}

Load after/before: {med['after']['load_ms'] / med['before']['load_ms']:.2f}×; suggest p50 after/before: {med['after']['p50_us'] / med['before']['p50_us']:.2f}×.
The rejected alternative, bounding every one-byte count on load (a per-row maximum over all
{m.n_bigrams:,} entries of `CNTS`), would add {med['after']['full_check_ms']:.3f} ms (median) to each load on this model
and grow with the number of pairs; the query-time check costs one comparison per count read.
"""
    publish(md, "bounds", write=not args.no_results)
    return 0


if __name__ == "__main__":
    sys.exit(main())
