"""Trigram count cutoff: bytes per n-gram and KSR@3 with and without the trigrams seen once.

Dropping n-grams seen once at the highest order is common practice in n-gram toolkits
(their count "cutoffs"); here it is done the way format 1.4 stores a pruned level: the
trigram level loses its n-grams of value 1, every context keeps its total, and the
removed part is the context's dropped mass (docs/FORMAT.md §7.15), so each context still
sums to 1. The discounts are those fitted on the full counts. Nothing here changes what
``nextword train`` does; the figures inform that choice.

    python bench/bench_cutoff.py --messages 300 --queries 6000
"""

from __future__ import annotations

import argparse
import statistics
import sys
import tempfile
import time
from pathlib import Path
from typing import Any


HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import nextword  # noqa: E402
from nextword.baselines import sample_queries, time_queries  # noqa: E402
from nextword.counts import DEFAULT_MAX_VOCAB, DEFAULT_MIN_COUNT, CountBuilder  # noqa: E402
from nextword.estimators import JelinekMercer, KneserNey  # noqa: E402
from nextword.prune import prune_level  # noqa: E402
from nextword.evaluate import evaluate  # noqa: E402
from nextword.store import build  # noqa: E402

DATA = HERE / "data"


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description="trigram count cutoff: size and KSR")
    ap.add_argument("--messages", type=int, default=300, help="held-out messages simulated (default 300)")
    ap.add_argument("--queries", type=int, default=6000, help="typed texts timed per model (default 6000)")
    args = ap.parse_args(argv)
    train = [ln.rstrip("\n") for ln in (DATA / "train.txt").open(encoding="utf-8") if ln.strip()]
    held = [ln.rstrip("\n") for ln in (DATA / "test.txt").open(encoding="utf-8") if ln.strip()][: args.messages]
    queries = sample_queries(held, args.queries)
    b = CountBuilder(order=3)
    b.add_texts(train)
    tables, counts = b.ngram_counts(min_count=DEFAULT_MIN_COUNT, max_vocab=DEFAULT_MAX_VOCAB)
    rows: list[dict[str, Any]] = []
    with tempfile.TemporaryDirectory(prefix="nextword-cutoff-") as t:
        for name, est in (("KN", KneserNey()), ("JM", JelinekMercer((0.9, 0.9)))):
            for min_value in (1, 2):
                fitted = est.fit(counts)
                fitted.levels = [*fitted.levels[:2], prune_level(fitted.levels[2], fitted.levels[2].value >= min_value)]
                path = Path(t) / f"{name}{min_value}.nwm"
                build(counts, tables, est, path, fitted=fitted)
                loads = []
                for _ in range(9):
                    t0 = time.perf_counter()
                    nextword.load(path).close()
                    loads.append(time.perf_counter() - t0)
                model = nextword.load(path)
                info = model.info()
                overall, _ = evaluate(model, [("held", held)], (1, 3, 5))
                times = sorted(time_queries(lambda q: model.suggest(q, 3), queries))
                ngrams = info["bigrams"] + info["trigrams"]
                rows.append({
                    "label": f"{name} trigram, trigrams seen {'once or more' if min_value == 1 else 'twice or more'}",
                    "ksr3": overall.per_k[3].ksr, "ppl": overall.perplexity, "bytes": info["file_bytes"],
                    "ngrams": ngrams, "trigrams": info["trigrams"], "load_ms": 1000 * statistics.median(loads),
                    "p50": 1e6 * times[len(times) // 2], "p99": 1e6 * times[int(len(times) * 0.99)],
                })  # fmt: skip
    print("| model | KSR@3 | perplexity | file | trigrams | bytes/n-gram | load | suggest p50 / p99 |")
    print("|---|---|---|---|---|---|---|---|")
    for r in rows:
        print(f"| {r['label']} | {100 * r['ksr3']:.2f}% | {r['ppl']:.1f} | {r['bytes'] / 1e6:.2f} MB | {r['trigrams']:,} | "
              f"{r['bytes'] / r['ngrams']:.2f} | {r['load_ms']:.2f} ms | {r['p50']:.0f} / {r['p99']:.0f} µs |")
    return 0


if __name__ == "__main__":
    sys.exit(main())
