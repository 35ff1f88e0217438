"""The estimators side by side: Jelinek-Mercer and Kneser-Ney, bigram and trigram, one run.

Two held-out comparisons, each on text no model in it was trained or tuned on (the one
split rule, ``nextword.evaluate.is_held_out`` at ``prepare_corpus.TEST_PERCENT``):

* fortunes: Debian's ``fortunes`` split as ``bench_eval.py`` splits them (its train/test);
* the 5M-word corpus's own held-out part (``bench/data/{train,test}.txt`` from
  ``prepare_corpus.py``; the first ``--messages`` held-out messages are simulated).

For each corpus and each of JM bigram (λ 0.9, today's default), KN bigram, JM trigram
(λ 0.9, 0.9) and KN trigram: KSR@1/3/5, hit@3 before any letter, perplexity, file size and
bytes per stored n-gram, load time, suggest p50/p99 on the same ``--queries`` typed texts
(the keystroke simulation's own queries), training throughput. Then the vocabulary rule
(min_count 1, the default, against 2, the default before) for the JM bigram and the KN
trigram, and KN trigrams pruned to 4 MB and 2 MB (``--max-size``) against the unpruned bigram. Figures go into bench/RESULTS.md between the
``models`` markers.

    python bench/prepare_corpus.py && python bench/bench_eval.py && python bench/bench_models.py
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

from bench_core import machine, publish  # noqa: E402
from bench_eval import OUT as EVAL_OUT  # noqa: E402
from bench_eval import split_fortunes  # noqa: E402
from prepare_corpus import FORTUNES, TEST_PERCENT  # noqa: E402

import nextword  # noqa: E402
from nextword.baselines import sample_queries, time_queries  # noqa: E402
from nextword.errors import NextwordError  # noqa: E402
from nextword.evaluate import evaluate  # noqa: E402

DATA = HERE / "data"
#: (label, train keyword arguments)
MODELS: tuple[tuple[str, dict[str, Any]], ...] = (
    ("JM bigram (λ 0.9)", {"order": 2, "smoothing": "jm"}),
    ("KN bigram", {"order": 2, "smoothing": "kn"}),
    ("JM trigram (λ 0.9, 0.9)", {"order": 3, "smoothing": "jm"}),
    ("KN trigram", {"order": 3, "smoothing": "kn"}),
)


def figure_files(data: Path = DATA, out: Path = EVAL_OUT) -> dict[str, tuple[list[Path], list[Path]]]:
    """Each figure this script publishes: (its models' training files, its held-out files)."""
    return {
        "models: fortunes": ([out / "train.txt"], [out / "test.txt"]),
        "models: 5M-word corpus": ([data / "train.txt"], [data / "test.txt"]),
    }


def _lines(path: Path) -> list[str]:
    return [ln.rstrip("\n") for ln in path.open(encoding="utf-8") if ln.strip()]


def measure(label: str, kwargs: dict[str, Any], train: Path, held: list[str], queries: list[str], tmp: Path,
            **extra: Any) -> dict[str, Any]:
    path = tmp / f"{abs(hash((label, str(train), str(extra)))):x}.nwm"
    t0 = time.perf_counter()
    rep = nextword.train(train, path, **kwargs, **extra)
    train_s = time.perf_counter() - t0
    loads = []
    for _ in range(15):
        t0 = time.perf_counter()
        m = nextword.load(path)
        loads.append(time.perf_counter() - t0)
        m.close()
    model = nextword.load(path)
    info = model.info()
    overall, _ = evaluate(model, [("held", held)], (1, 3, 5))
    times = sorted(time_queries(lambda q: model.suggest(q, 3), queries))
    ngrams = info["bigrams"] + info.get("trigrams", 0)
    return {
        "label": label, "file_bytes": info["file_bytes"], "ngrams": ngrams, "vocabulary": info["vocabulary"],
        "bytes_per_ngram": info["file_bytes"] / ngrams if ngrams else float("nan"),
        "load_ms": 1000 * statistics.median(loads),
        "p50_us": 1e6 * times[len(times) // 2], "p99_us": 1e6 * times[int(len(times) * 0.99)],
        "ksr": {k: overall.per_k[k].ksr for k in (1, 3, 5)}, "hit3": overall.per_k[3].hit_rate,
        "perplexity": overall.perplexity, "words_per_s": rep.word_tokens / train_s,
    }


def table(rows: list[dict[str, Any]]) -> str:
    base = rows[0]
    out = ["| model | KSR@1 | KSR@3 | KSR@5 | hit@3 | perplexity | file | n-grams | bytes/n-gram | load | suggest p50 / p99 | train |",
           "|---|---|---|---|---|---|---|---|---|---|---|---|"]
    for r in rows:
        d3 = 100 * (r["ksr"][3] - base["ksr"][3])
        dp = 100 * (r["perplexity"] / base["perplexity"] - 1)
        out.append(
            f"| {r['label']} | {100 * r['ksr'][1]:.2f}% | {100 * r['ksr'][3]:.2f}% ({d3:+.2f}) | {100 * r['ksr'][5]:.2f}% | "
            f"{100 * r['hit3']:.2f}% | {r['perplexity']:.1f} ({dp:+.1f}%) | {r['file_bytes'] / 1e6:.2f} MB | "
            f"{r['ngrams']:,} | {r['bytes_per_ngram']:.2f} | {r['load_ms']:.2f} ms | "
            f"{r['p50_us']:.0f} / {r['p99_us']:.0f} µs | {r['words_per_s'] / 1e6:.2f} M words/s |"
        )
    return "\n".join(out)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description="estimators and orders side by side on held-out text")
    ap.add_argument("--messages", type=int, default=1500, help="held-out messages simulated per corpus (default 1500)")
    ap.add_argument("--queries", type=int, default=12000, help="typed texts timed per model (default 12000)")
    ap.add_argument("--skip-5m", action="store_true", help="only the fortunes comparison")
    ap.add_argument("--no-results", action="store_true", help="do not edit bench/RESULTS.md")
    args = ap.parse_args(argv)
    if not FORTUNES.is_dir():
        print("bench_models: the fortunes package is missing; run: apt-get install fortunes", file=sys.stderr)
        return 2
    split_fortunes(EVAL_OUT, test_percent=TEST_PERCENT)
    corpora = [("fortunes (bench_eval's split)", EVAL_OUT / "train.txt", EVAL_OUT / "test.txt")]
    if not args.skip_5m:
        if not (DATA / "train.txt").exists():
            print("bench_models: run bench/prepare_corpus.py first (or --skip-5m)", file=sys.stderr)
            return 2
        corpora.append(("5M-word corpus, its own held-out part", DATA / "train.txt", DATA / "test.txt"))
    sections = []
    with tempfile.TemporaryDirectory(prefix="nextword-models-") as t:
        tmp = Path(t)
        for name, train, test in corpora:
            held = _lines(test)[: args.messages]
            queries = sample_queries(held, args.queries)
            rows = [measure(label, kw, train, held, queries, tmp) for label, kw in MODELS]
            extra = []
            # the vocabulary rule: min_count 1 (the default) against 2 (the default before), same held-out text
            for label, kw in (MODELS[0], MODELS[3]):
                extra.append(measure(f"{label}, min_count 2", kw, train, held, queries, tmp, min_count=2))
            for label, budget in (("KN trigram, --max-size 4MB", 4_000_000), ("KN trigram, --max-size 2MB", 2_000_000)):
                try:
                    extra.append(measure(label, {"order": 3, "smoothing": "kn"}, train, held, queries, tmp, max_bytes=budget))
                except NextwordError as e:
                    extra.append({"label": f"{label}: not supported ({e})"})
            lines = [f"#### {name}", "", f"{len(held):,} held-out messages simulated, {len(queries):,} typed texts timed.", "",
                     table(rows), "", "Vocabulary rule and size budget (same held-out text):", "",
                     table([rows[0]] + [r for r in extra if "ksr" in r])]
            lines += [f"- {r['label']}" for r in extra if "ksr" not in r]
            sections.append("\n".join(lines))
    md = f"""### Estimators and orders side by side (`bench/bench_models.py`)

Command: `python bench/prepare_corpus.py && python bench/bench_models.py` — {time.strftime('%Y-%m-%d')}
Machine: {machine()} (shared; compare within a table). Differences in brackets are against the JM bigram at
λ 0.9 in the same table. hit@3 = share of held-out words offered among 3 before any of their letters was typed.
Bytes per n-gram = whole file ÷ (bigrams + trigrams), vocabulary included.

{chr(10).join(sections)}
"""
    publish(md, "models", write=not args.no_results)
    return 0


if __name__ == "__main__":
    sys.exit(main())
