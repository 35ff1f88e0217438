"""Held-out keystroke-savings benchmark on real public text, baselines side by side.

Prepares Debian's ``fortunes`` quotations and jokes at run time (nothing is committed),
splits them by a hash of each message (``nextword split`` at ``prepare_corpus.TEST_PERCENT``:
the rule and share of ``bench/prepare_corpus.py``, so this held-out part is exactly the
fortunes in ``bench/data/test.txt`` and none of it is in the 5M-word model's training
text either), trains on one part,
and runs ``nextword eval`` on the other with every baseline: λ = 0 and λ = 0.999 on the
same model, the plain-dict implementation and nltk.lm (fit and top-k query times).
Figures go to ``bench/out/eval/`` (report with plots) and into ``bench/RESULTS.md``
between the ``eval`` markers.

    apt-get install fortunes && python bench/bench_eval.py
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

from bench_core import machine, publish  # noqa: E402
from prepare_corpus import FORTUNES, TEST_PERCENT, messages, split_of  # noqa: E402

from nextword import load as load_model  # noqa: E402

OUT = HERE / "out" / "eval"


def nextword(*args: str) -> str:
    proc = subprocess.run([sys.executable, "-m", "nextword", *args], check=True, capture_output=True, text=True)
    return proc.stdout


def split_fortunes(out: Path = OUT, *, test_percent: int = TEST_PERCENT, fortunes: Path = FORTUNES) -> dict[str, int]:
    """Write ``out/fortunes.txt`` and split it with ``nextword split`` into ``out/train.txt``
    and ``out/test.txt``; returns the number of messages in each part."""
    out.mkdir(parents=True, exist_ok=True)
    corpus = out / "fortunes.txt"
    with open(corpus, "w", encoding="utf-8") as f:
        for _, msg in messages(dicts={}, fortunes=fortunes):
            f.write(msg + "\n")
    return json.loads(nextword("split", str(corpus), "--train-out", str(out / "train.txt"), "--test-out",
                               str(out / "test.txt"), "--test-percent", str(test_percent), "--json"))


def core_matches_split(core_model: Path, data: Path, test_percent: int) -> bool:
    """Whether the 5M-word model was trained on ``data/train.txt`` as split at this share:
    only then are this script's held-out fortunes outside its training text."""
    split = split_of(data)
    if split is None or split["test_percent"] != test_percent:
        print(f"bench_eval: {data} was not split at {test_percent}%; leaving out the 5M-word row", file=sys.stderr)
        return False
    if load_model(core_model).info()["corpus"]["messages"] != split["train_messages"]:
        print(f"bench_eval: {core_model} was not trained on {data / 'train.txt'}; leaving out its row", file=sys.stderr)
        return False
    return True


def figure_files(data: Path = HERE / "data", out: Path = OUT) -> dict[str, tuple[list[Path], list[Path]]]:
    """Each figure this script publishes: (its model's training files, its held-out files)."""
    return {
        "eval: fortunes model and its λ baselines": ([out / "train.txt"], [out / "test.txt"]),
        "eval: 5M-word model (bench_core) on the fortunes held-out part": ([data / "train.txt"], [out / "test.txt"]),
    }


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description="held-out keystroke savings benchmark")
    ap.add_argument("--test-percent", type=int, default=TEST_PERCENT,
                    help=f"share held out (default {TEST_PERCENT}, prepare_corpus's; another share makes the "
                         "5M-word row meaningless, so that row is then left out)")
    ap.add_argument("--no-results", action="store_true", help="do not edit bench/RESULTS.md")
    args = ap.parse_args(argv)
    if not FORTUNES.is_dir():
        print("bench_eval: the fortunes package is missing; run: apt-get install fortunes", file=sys.stderr)
        return 2
    out = OUT
    split = split_fortunes(out, test_percent=args.test_percent)
    train, test = out / "train.txt", out / "test.txt"
    model = out / "fortunes.nwm"
    t0 = time.perf_counter()
    trained = json.loads(nextword("train", str(train), "-o", str(model), "--json"))
    train_s = time.perf_counter() - t0
    t0 = time.perf_counter()
    data = json.loads(nextword("eval", str(model), str(test), "-k", "1", "3", "5", "--train-data", str(train),
                               "--report", str(out / "report"), "--json"))
    eval_s = time.perf_counter() - t0
    # the 5-million-word dictionary model of bench_core.py on the same held-out text, if built
    cross = None
    core_model = HERE / "out" / "core.nwm"
    if core_model.exists() and core_matches_split(core_model, HERE / "data", args.test_percent):
        cross = json.loads(nextword("eval", str(core_model), str(test), "-k", "1", "3", "5", "--no-baselines", "--json"))

    o = data["overall"]
    lat = o["latency"]
    b = data["baselines"]

    def ksr_row(name: str, item: dict) -> str:
        cells = " | ".join(f"{100 * r['ksr']:.1f}%" for r in item["per_k"])
        return f"| {name} | {cells} | {item['perplexity']:.1f} |"

    rows = [ksr_row("this model (λ = 0.9)", o)]
    rows += [ksr_row(name, item) for name, item in b["lambda"].items()]
    if cross:
        rows.append(ksr_row("5M-word model (bench_core: dictionaries + the same fortunes training part)", cross["overall"]))
    d, n = b["dict"], b["nltk"]
    per_k = "\n".join(
        f"| {r['k']} | {100 * r['ksr']:.1f}% | {100 * r['ceiling_ksr']:.1f}% | {100 * r['ksr_of_ceiling']:.1f}% | "
        f"{100 * r['hit_rate']:.1f}% | {r['mean_letters_before_accept']:.2f} |"
        for r in o["per_k"]
    )
    md = f"""### Held-out keystroke savings (`bench/bench_eval.py`)

Command: `apt-get install fortunes && python bench/bench_eval.py` — {time.strftime('%Y-%m-%d')}
Machine: {machine()}.
Data: Debian `fortunes` (quotations and jokes), {split['train'] + split['test']:,} messages, split by a hash of
each message (`nextword split --test-percent {args.test_percent}`: the rule and share of `prepare_corpus.py`, so
none of the held-out messages is in either model's training text): {split['train']:,} to train ({trained['word_tokens']:,} words, vocabulary {trained['vocabulary']:,}),
{split['test']:,} held out ({o['word_tokens']:,} words). Training took {train_s:.1f} s; the whole evaluation with
every baseline {eval_s:.1f} s. Out-of-vocabulary words in the held-out text: {100 * o['oov_rate']:.1f}%.

| k | KSR | ceiling | KSR / ceiling | hit@k | letters before accept |
|---|---|---|---|---|---|
{per_k}

Baselines on the same held-out text, same run:

| model | KSR@1 | KSR@3 | KSR@5 | perplexity |
|---|---|---|---|---|
{chr(10).join(rows)}

| implementation | fit | suggest p50 | ratio to this engine |
|---|---|---|---|
| this engine | {n['engine_fit_seconds']:.2f} s (train) | {d['engine_p50_us']:.1f} µs | 1 |
| plain Python dicts, same formula | {d['fit_seconds']:.2f} s | {d['p50_us']:,.0f} µs | {d['ratio_p50']:,.0f}× slower; identical rankings {d['identical']} of {d['queries']} |
| nltk.lm MLE(2), vocabulary scored per query | {n['fit_seconds']:.2f} s ({n['fit_ratio']:.1f}× ours) | {n['p50_us']:,.0f} µs | {n['ratio_p50']:,.0f}× slower ({n['queries']} queries) |

Suggest calls during the simulation: {lat['calls']:,}; p50 {lat['p50_us']:.1f} µs, p95 {lat['p95_us']:.1f} µs,
p99 {lat['p99_us']:.1f} µs, max {lat['max_us']:.0f} µs; {lat['end_to_end_calls_per_second']:,.0f} calls/s end to end
(target ≥ 2,000), {lat['engine_calls_per_second']:,.0f} calls/s inside the engine.
Plots: `bench/out/eval/report/ksr.png`, `latency.png` (not committed; made by the command).
"""
    publish(md, "eval", write=not args.no_results)
    return 0


if __name__ == "__main__":
    sys.exit(main())
