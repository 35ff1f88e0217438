"""Size budget: file size against held-out KSR@3 and perplexity, per pruning rule, on two corpora.

Corpora (Debian text packages, prepared at run time by ``bench/prepare_corpus.py``'s
readers, nothing committed): the dictionaries (GCIDE, FOLDOC, Jargon File; about 5M words),
the ``fortunes`` quotations, and FOLDOC + Jargon File alone. Each is split with the benchmarks' one rule,
``nextword.evaluate.is_held_out`` (10 % held out), trained with the defaults, then pruned
to fractions of its full size by ``nextword.prune.prune_to_size`` (the file size is
measured) with each rule — letting the vocabulary shrink (the default) and, for comparison,
keeping it — and evaluated on the held-out messages. Figures go into ``bench/RESULTS.md``
between the ``prune`` markers.

    python bench/bench_prune.py
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import nextword  # noqa: E402
from bench_core import machine, publish  # noqa: E402
from prepare_corpus import messages  # noqa: E402
from nextword.evaluate import evaluate, is_held_out  # noqa: E402
from nextword.prune import RULES, prune_to_size, tables_from_model  # noqa: E402
from nextword.store import atomic_write  # noqa: E402

FRACTIONS = (1.0, 0.6, 0.4, 0.25, 0.15, 0.1)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description="pruning curves")
    ap.add_argument("--messages", type=int, default=1000, help="held-out messages simulated for KSR (default 1000)")
    ap.add_argument("--test-percent", type=int, default=10)
    ap.add_argument("--no-results", action="store_true")
    args = ap.parse_args(argv)
    out = HERE / "out" / "prune"
    out.mkdir(parents=True, exist_ok=True)
    # the 5M-word dictionary corpus of bench_core, the fortunes quotations, and the two
    # computing dictionaries alone (a third genre: technical definitions and hacker slang)
    corpora: dict[str, list[str]] = {"dictionaries": [], "fortunes": [], "computing (FOLDOC + Jargon File)": []}
    for source, msg in messages():
        corpora["fortunes" if source == "fortunes" else "dictionaries"].append(msg)
        if source in ("foldoc", "jargon"):
            corpora["computing (FOLDOC + Jargon File)"].append(msg)
    if not corpora["dictionaries"] or not corpora["fortunes"]:
        print("bench_prune: apt-get install dict-gcide dict-foldoc dict-jargon fortunes", file=sys.stderr)
        return 2
    t0 = time.perf_counter()
    sections = []
    curves: dict[str, list[tuple[str, int, int, int, float, float]]] = {}
    for name, msgs in corpora.items():
        train = [m for m in msgs if not is_held_out(m, args.test_percent)]
        held = [m for m in msgs if is_held_out(m, args.test_percent)]
        ksr_msgs = held[: args.messages]
        full = out / f"{name.split()[0]}.nwm"
        nextword.train_texts(train, full)
        model = nextword.load(full)
        tables = tables_from_model(model)
        rows = []
        for rule, vocab in [(r, True) for r in RULES] + [("entropy", False), ("count", False)]:
            label = rule if vocab else f"{rule}, vocabulary kept"
            for frac in FRACTIONS:
                budget = int(model.file_size * frac)
                path = full
                if frac < 1.0:
                    try:
                        _, chunks, _ = prune_to_size(tables, budget, rule=rule, lam=model.stored_lam, vocabulary=vocab)  # type: ignore[arg-type]
                    except nextword.InvalidArgumentError:
                        continue  # below the vocabulary alone, and the vocabulary is kept
                    path = out / f"{name.split()[0]}-{rule}-{int(vocab)}-{budget}.nwm"
                    atomic_write(path, chunks)
                m = nextword.load(path)
                overall, _ = evaluate(m, [("held", ksr_msgs)], (3,))
                rows.append((label, m.file_size, m.n_words, m.n_bigrams, m.perplexity(held), overall.per_k[3].ksr))
                m.close()
        curves[name] = rows
        table = "\n".join(
            f"| {label} | {size:,} | {words:,} | {pairs:,} | {ppl:.1f} | {100 * ksr:.2f}% |"
            for label, size, words, pairs, ppl, ksr in rows
        )
        info = model.info()
        sections.append(f"""#### {name}: {len(train):,} training / {len(held):,} held-out messages

Full model {model.file_size:,} bytes: {model.n_words:,} words, {model.n_bigrams:,} pairs; the vocabulary is
{info['vocabulary_bytes']:,} bytes ({100 * info['vocabulary_share']:.0f}% of the file). Budgets: {', '.join(f'{int(100 * f)}%' for f in FRACTIONS)} of it.

| rule | file bytes | words | pairs | perplexity | KSR@3 |
|---|---|---|---|---|---|
{table}
""")
    took = time.perf_counter() - t0
    md = f"""### Size budget (`bench/bench_prune.py`)

Command: `python bench/bench_prune.py` — {time.strftime('%Y-%m-%d')}
Machine: {machine()}.
Each corpus split by `nextword.evaluate.is_held_out` ({args.test_percent}% held out), trained with the defaults,
pruned to each budget; perplexity on all held-out messages, KSR@3 on the first {args.messages}. Perplexity is
comparable only between rows with the same number of words (a dropped word becomes `<unk>`, which makes its
tokens easier to predict); KSR@3 is comparable across all rows. {took:.0f} s in all.

""" + "\n".join(sections)
    publish(md, "prune", write=not args.no_results)
    return 0


if __name__ == "__main__":
    sys.exit(main())
