"""Counting throughput, order 2 against order 3, side by side on the prepared corpus.

Each measurement is a fresh process that reads ``bench/data/train.txt`` (made by
``bench/prepare_corpus.py``) as ``nextword train`` does (``corpus.iter_messages``),
counts it in one process or in worker processes (``counts.count_in_processes``) and
fixes the vocabulary: ``tables()`` for order 2 (what training calls today),
``ngram_counts()`` for order 3 (the tables plus every level as ``NgramCounts``). The
settings are interleaved round by round, so the machine's load falls on all of them
alike; the spread over rounds is reported. The model build after counting is not
timed here (it belongs to the estimator and the file writer). Figures go to
``bench/out/counts3.json`` and into ``bench/RESULTS.md`` between the ``counts3`` markers.
This is a benchmark, not a test: nothing here fails on a slow machine.

    python bench/prepare_corpus.py && python bench/bench_counts3.py
"""

from __future__ import annotations

import argparse
import datetime
import json
import os
import statistics
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
sys.path.insert(0, str(HERE.parent))

from bench_core import machine, publish  # noqa: E402

#: (label, order, workers) timed side by side
SETTINGS = (
    ("order 2, 1 process", 2, 1),
    ("order 3, 1 process", 3, 1),
    ("order 2, 2 workers", 2, 2),
    ("order 3, 2 workers", 3, 2),
)


def child(path: str, order: int, workers: int) -> None:
    """Run in a fresh process: count ``path`` and print the times as one JSON line."""
    import resource

    from nextword.corpus import iter_messages, open_sources
    from nextword.counts import CountBuilder, count_in_processes

    t0 = time.perf_counter()
    messages = iter_messages(open_sources(path))
    if workers == 1:
        builder = CountBuilder(order=order)
        builder.add_texts(messages)
        builder.word_tokens  # noqa: B018  (flushes the last batch inside the counting time)
    else:
        builder = count_in_processes(messages, workers, order=order)
    t1 = time.perf_counter()
    if order == 2:
        tables = builder.tables()
        sizes = [int((tables.unigram > 0).sum()), len(tables.pair_count)]
    else:
        tables, ngrams = builder.ngram_counts()
        sizes = [len(g) for g in ngrams.grams]
    t2 = time.perf_counter()
    own = resource.getrusage(resource.RUSAGE_SELF)
    kids = resource.getrusage(resource.RUSAGE_CHILDREN)
    print(json.dumps({
        "count_s": t1 - t0,
        "final_s": t2 - t1,
        "wall_s": t2 - t0,
        "cpu_s": own.ru_utime + own.ru_stime + kids.ru_utime + kids.ru_stime,
        "words": tables.stats["word_tokens"],
        "sizes": sizes,
        "peak_rss_mb": max(own.ru_maxrss, kids.ru_maxrss) / 1024,
    }))


def measure(path: Path, rounds: int) -> dict[str, Any]:
    env = dict(os.environ, PYTHONPATH=str(HERE.parent))
    runs: dict[str, list[dict[str, Any]]] = {label: [] for label, _, _ in SETTINGS}
    loads = []
    for r in range(rounds):
        loads.append(os.getloadavg()[0])
        for label, order, workers in SETTINGS:
            out = subprocess.run(
                [sys.executable, __file__, "--child", str(path), str(order), str(workers)],
                capture_output=True, text=True, env=env, check=True,
            )
            runs[label].append(json.loads(out.stdout))
            print(f"round {r + 1}/{rounds} {label}: {runs[label][-1]['wall_s']:.2f} s", file=sys.stderr)
    return {"runs": runs, "load_1min": loads}


def table(result: dict[str, Any]) -> str:
    rows = [
        "| setting | wall min / median / max | words/s (median) | words/s (best) | counting pass (median) "
        "| vocabulary + reduction (median) | CPU, all processes (median) | peak RSS | distinct n-grams (levels 1..n) |",
        "|---|---|---|---|---|---|---|---|---|",
    ]
    medians = {}
    for label, _, _ in SETTINGS:
        rs = result["runs"][label]
        walls = sorted(r["wall_s"] for r in rs)
        words = rs[0]["words"]
        med = statistics.median(walls)
        medians[label] = med
        rows.append(
            f"| {label} | {walls[0]:.2f} / {med:.2f} / {walls[-1]:.2f} s | {words / med:,.0f} | {words / walls[0]:,.0f} "
            f"| {statistics.median(r['count_s'] for r in rs):.2f} s | {statistics.median(r['final_s'] for r in rs):.2f} s "
            f"| {statistics.median(r['cpu_s'] for r in rs):.2f} s | {max(r['peak_rss_mb'] for r in rs):,.0f} MB "
            f"| {' / '.join(f'{s:,}' for s in rs[0]['sizes'])} |"
        )
    # per-round ratios: the two orders measured next to each other in the same round
    ratio_rows = []
    for workers in (1, 2):
        suffix = "1 process" if workers == 1 else "2 workers"
        two, three = result["runs"][f"order 2, {suffix}"], result["runs"][f"order 3, {suffix}"]
        ratios = sorted(b["wall_s"] / a["wall_s"] for a, b in zip(two, three))
        ratio_rows.append(
            f"order 3 / order 2 wall time, {suffix}, per round: median {statistics.median(ratios):.2f}× "
            f"(min {ratios[0]:.2f}×, max {ratios[-1]:.2f}×)"
        )
    return "\n".join(rows) + "\n\n" + "  \n".join(ratio_rows)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--rounds", type=int, default=5, help="rounds of every setting, interleaved (default 5)")
    ap.add_argument("--data", type=Path, default=HERE / "data" / "train.txt", help="corpus (default bench/data/train.txt)")
    ap.add_argument("--no-results", action="store_true", help="do not edit bench/RESULTS.md (default: edit it)")
    ap.add_argument("--child", nargs=3, help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child:
        child(args.child[0], int(args.child[1]), int(args.child[2]))
        return
    if not args.data.exists():
        sys.exit(f"bench_counts3: {args.data} is missing: run python bench/prepare_corpus.py first")
    result = measure(args.data, args.rounds)
    result["machine"] = machine()
    out_dir = HERE / "out"
    out_dir.mkdir(exist_ok=True)
    (out_dir / "counts3.json").write_text(json.dumps(result, indent=1))
    first = result["runs"][SETTINGS[0][0]][0]
    loads = result["load_1min"]
    md = f"""### Counting order 3 against order 2 (`bench/bench_counts3.py`)

Command: `python bench/prepare_corpus.py && python bench/bench_counts3.py --rounds {args.rounds}` — {datetime.date.today().isoformat()}
Machine: {result['machine']} (shared with other jobs: 1-minute load {min(loads):.1f}–{max(loads):.1f} at the starts of the rounds).
Each row is a fresh process reading `{args.data.name}` ({first['words']:,} words, {args.data.stat().st_size / 1e6:.1f} MB)
as `nextword train` does, counting it (`CountBuilder(order=n)` or `count_in_processes(..., 2, order=n)`) and fixing
the vocabulary (order 2: `tables()`; order 3: `ngram_counts()`, which returns the same tables plus every level);
{args.rounds} rounds, the settings interleaved within each round. Not timed: building the model file. Target for
`--order 3`: ≥ 0.7M words/s end to end on 2 cores.

{table(result)}
"""
    publish(md, "counts3", write=not args.no_results)


if __name__ == "__main__":
    main()
