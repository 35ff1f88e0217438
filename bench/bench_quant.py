"""Quantised values (codec ``quant``, format 1.5) and compact files (format 1.6) against exact ones, side by side in one run.

On the 5M-word benchmark corpus (``bench/data/{train,test}.txt``, the split of
``bench/prepare_corpus.py``), for the JM bigram, the KN bigram and the KN trigram, every
value codec: ``exact`` and ``quant`` at 8, 4 and 2 bits (4 bits both with Lloyd's
iterations and with plain weighted-quantile bins, the two codebook fits of
``nextword.codecs.fit_codebook``). Per file: bytes, bytes per stored n-gram (whole file ÷
stored bigrams + trigrams), perplexity and KSR@3 on held-out messages (the engine's own
``Model.perplexity`` and ``Model.suggest``, which are exact for the file's own
probabilities), the median load time, and suggest p50/p99 over one fixed query set —
every model of a kind timed in the same process, interleaved round by round, so the
ratios to the exact file are the figures to read (absolute times vary with the machine).

    python bench/bench_quant.py                       # figures into bench/RESULTS.md
    python bench/bench_quant.py --messages 200 --no-results
"""

from __future__ import annotations

import argparse
import statistics
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import nextword  # noqa: E402
from bench_core import machine, make_queries, publish  # noqa: E402
from nextword.codecs import EXACT, QuantCodec  # noqa: E402
from nextword.evaluate import evaluate  # noqa: E402

DATA = HERE / "data"
#: (label, codec, compact) of every file per model kind; codec None = the exact codec; compact: format 1.6
#: (chunked Elias-Fano successor lists; a quantised compact file uses quant version 2, the ones elided)
CODECS = (
    ("exact", None, False),
    ("quant 8-bit", (8, "lloyd"), False),
    ("quant 6-bit", (6, "lloyd"), False),
    ("quant 5-bit (Lloyd)", (5, "lloyd"), False),
    ("quant 5-bit (quantile bins)", (5, "quantile"), False),
    ("quant 4-bit (Lloyd)", (4, "lloyd"), False),
    ("quant 4-bit (quantile bins)", (4, "quantile"), False),
    ("quant 3-bit", (3, "lloyd"), False),
    ("compact, exact", None, True),
    ("compact, quant 5-bit", (5, "lloyd"), True),
    ("compact, quant 4-bit", (4, "lloyd"), True),
)


def figure_files(data: Path = DATA) -> dict[str, tuple[list[Path], list[Path]]]:
    """The held-out figures: (their models' training files, their held-out files)."""
    return {"quant: exact against quantised values, 5M-word corpus": ([data / "train.txt"], [data / "test.txt"])}


def interleaved_times(models: list[nextword.Model], queries: list[tuple[str, str]]) -> list[list[float]]:
    """CPU seconds per suggest(k=3) call of every model over ``queries``, each query asked of all models in turn."""
    out: list[list[float]] = [[] for _ in models]
    clock = time.thread_time
    for _, typed in queries:
        for i, m in enumerate(models):
            t = clock()
            m.suggest(typed, 3)
            out[i].append(clock() - t)
    return out


def load_ms(path: Path, rounds: int) -> float:
    times = []
    for _ in range(rounds):
        t = time.perf_counter()
        m = nextword.load(path)
        times.append(time.perf_counter() - t)
        m.close()
    return 1000 * statistics.median(times)


def successor_estimate(path: Path) -> dict[str, float]:
    """Bytes per successor if the u16 successor lists were Elias-Fano coded (an estimate, not a format).

    Per list of ℓ entries over a universe U: ℓ·(2 + ⌊log₂(U/ℓ)⌋) bits (the upper and lower
    bits of Elias-Fano), pointers not counted. Bigram rows: U = the n + 2 positions.
    Trigram rows: U = the n + 2 positions ("plain"), or U = the length of v's bigram row
    ("by bigram row": each successor coded as its index among v's successors).
    """
    import numpy as np

    from nextword.codecs import EXACT as EX
    from nextword.store import CONTEXT_TAGS, read_model

    arr = read_model(path)
    a = arr.arrays
    u = len(a["UNIG"])
    rows = a["ROWS"].astype(np.int64)
    ln = np.diff(rows)
    ln = ln[ln > 0]
    out = {"bigram": float((ln * (2 + np.floor(np.log2(u / ln)))).sum() / 8 / rows[-1])}
    if "TLEN" in a:
        lens = EX.decode(str(path), a, CONTEXT_TAGS).all()
        ctx = np.flatnonzero(lens)
        v = a["ALPH"].astype(np.int64)[a["SUCC"].astype(np.int64)[ctx]]
        row_len = np.maximum(rows[v + 1] - rows[v], 1)
        l3 = lens[ctx]
        out["trigram plain"] = float((l3 * (2 + np.floor(np.log2(u / l3)))).sum() / 8 / l3.sum())
        out["trigram by bigram row"] = float((l3 * (2 + np.maximum(0, np.floor(np.log2(row_len / l3))))).sum() / 8 / l3.sum())
    arr.close()
    return out


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--data", type=Path, default=DATA)
    ap.add_argument("--messages", type=int, default=400, help="held-out messages simulated for KSR@3 (default 400)")
    ap.add_argument("--ppl-messages", type=int, default=2000, help="held-out messages for perplexity (default 2000)")
    ap.add_argument("--queries", type=int, default=3000, help="timed suggest queries per model and round (default 3000)")
    ap.add_argument("--rounds", type=int, default=3, help="interleaved timing rounds; the median p50/p99 is kept (default 3)")
    ap.add_argument("--kinds", default="jm2,kn2,kn3", help="comma-separated: jm2, kn2, kn3 (default all)")
    ap.add_argument("--no-results", action="store_true", help="do not edit bench/RESULTS.md")
    args = ap.parse_args(argv)

    from nextword.corpus import iter_messages, open_sources
    from nextword.counts import CountBuilder
    from nextword.estimators import JelinekMercer, KneserNey
    from nextword.prune import ngram_file
    from nextword.store import atomic_write, write_model

    train, test = figure_files(args.data)["quant: exact against quantised values, 5M-word corpus"]
    held = [m for m in test[0].read_text(encoding="utf-8").splitlines() if m.strip()]
    ksr_msgs, ppl_msgs = held[: args.messages], held[: args.ppl_messages]
    queries = make_queries(held, args.queries, 7)
    out = HERE / "out" / "quant"
    out.mkdir(parents=True, exist_ok=True)
    t0 = time.perf_counter()
    counted = {}
    for order in (2, 3):
        b = CountBuilder(order=order)
        b.add_texts(iter_messages(open_sources([str(p) for p in train])))
        counted[order] = b.ngram_counts()
    kinds = {"jm2": ("JM bigram", 2, JelinekMercer((0.9,))), "kn2": ("KN bigram", 2, KneserNey()), "kn3": ("KN trigram", 3, KneserNey())}
    sections = []
    for key in args.kinds.split(","):
        label, order, est = kinds[key]
        tables, counts = counted[order]
        fitted = est.fit(counts)
        rows = []
        models = []
        for name, spec, compact in CODECS:
            path = out / f"{key}-{name.split()[0].strip(',')}{'' if spec is None else '-'.join(map(str, spec))}.nwm"
            tb = time.perf_counter()
            if spec is None and key == "jm2" and not compact:
                write_model(tables, path, lam=0.9)  # the default model: format 1.0
            else:
                codec = EXACT if spec is None else QuantCodec(spec[0], method=spec[1], ones=compact)
                atomic_write(path, ngram_file(counts, tables, fitted, codec=codec, compact=compact))
            build_s = time.perf_counter() - tb
            m = nextword.load(path, verify=True)
            m.close()
            m = nextword.load(path)
            grams = m.n_bigrams + int(m.header().get("trigrams", 0))
            ppl = m.perplexity(ppl_msgs)
            overall, _ = evaluate(m, [("held", ksr_msgs)], (3,))
            rows.append({"name": name, "path": path, "bytes": m.file_size, "grams": grams, "ppl": ppl,
                         "ksr": overall.per_k[3].ksr, "version": "%d.%d" % m.format_version, "build_s": build_s})
            models.append(m)
            print(f"  {label} {name}: {m.file_size:,} B, {m.file_size / grams:.3f} B/n-gram, ppl {ppl:.2f}, "
                  f"KSR@3 {100 * overall.per_k[3].ksr:.2f}% ({time.perf_counter() - t0:.0f} s)", file=sys.stderr, flush=True)
        # timing: every model of the kind in this process, interleaved query by query (each query
        # asked of every model in turn), in CPU time of this thread (the shared machine's other
        # jobs do not count); the first round also pays the compact files' first decodes
        p50s: list[list[float]] = [[] for _ in models]
        p99s: list[list[float]] = [[] for _ in models]
        first_p99: list[float] = []
        for rnd in range(args.rounds):
            per = interleaved_times(models, queries)
            for i, ts in enumerate(per):
                ts.sort()
                p50s[i].append(ts[len(ts) // 2])
                p99s[i].append(ts[int(0.99 * (len(ts) - 1))])
                if rnd == 0:
                    first_p99.append(ts[int(0.99 * (len(ts) - 1))])
        for i, r in enumerate(rows):
            r["p50"] = statistics.median(p50s[i]) * 1e6
            r["p99"] = statistics.median(p99s[i]) * 1e6
            r["p99_first"] = first_p99[i] * 1e6
            r["load"] = load_ms(r["path"], 21)
            models[i].close()
        ex = rows[0]
        est = successor_estimate(ex["path"])
        lines = []
        for r in rows:
            lines.append(
                f"| {r['name']} | {r['version']} | {r['bytes']:,} | {r['grams']:,} | {r['bytes'] / r['grams']:.3f} | "
                f"{r['ppl']:.2f} | {100 * (r['ppl'] / ex['ppl'] - 1):+.2f}% | {100 * r['ksr']:.2f}% | "
                f"{100 * (r['ksr'] - ex['ksr']):+.2f} | {r['load']:.2f} | {r['p50']:.0f} | {r['p99']:.0f} | {r['p99'] / ex['p99']:.2f} |"
            )
        q5 = next(r for r in rows if r["name"] == "compact, quant 5-bit")
        best = q5  # the width that meets the quantisation targets (4 bits costs > 1% perplexity)
        cex = next(r for r in rows if r["name"] == "compact, exact")
        verdict = (
            f"Targets: **{best['bytes'] / best['grams']:.3f} bytes / n-gram** ({best['name']}; ≤ 2.0: "
            f"{'met' if best['bytes'] / best['grams'] <= 2.0 else 'NOT met'}); compact 5-bit against exact: "
            f"{100 * (q5['ksr'] - ex['ksr']):+.2f} KSR@3 points (≥ −0.1: {'met' if q5['ksr'] - ex['ksr'] >= -0.001 else 'NOT met'}), "
            f"{100 * (q5['ppl'] / ex['ppl'] - 1):+.2f}% perplexity (≤ 1%: {'met' if q5['ppl'] / ex['ppl'] <= 1.01 else 'NOT met'}), "
            f"load {q5['load']:.2f} ms (≤ 5: {'met' if q5['load'] <= 5 else 'NOT met'}), p99 {q5['p99'] / ex['p99']:.2f}× the exact "
            f"file's (≤ 1.3: {'met' if q5['p99'] / ex['p99'] <= 1.3 else 'NOT met'}); the compact layout alone (exact values) "
            f"{cex['p99'] / ex['p99']:.2f}×, with answers identical to the exact file's (tests/test_compact.py); first round "
            f"(the compact files' rows and contexts decoded on first use): p99 {q5['p99_first']:.0f} µs against "
            f"{ex['p99_first']:.0f} µs ({q5['p99_first'] / ex['p99_first']:.2f}×)."
        )
        sections.append(f"""#### {label}

{verdict}

Elias-Fano estimate made before the compact layout existed (per row, pointers not counted; `successor_estimate`):
{'; '.join(f'{k}: {v:.2f} bytes per successor' for k, v in est.items())}.

| codec | format | file bytes | n-grams | bytes / n-gram | perplexity | vs exact | KSR@3 | vs exact (points) | load ms | suggest p50 µs | p99 µs | p99 / exact |
|---|---|---|---|---|---|---|---|---|---|---|---|---|
""" + "\n".join(lines) + "\n")
    took = time.perf_counter() - t0
    md = f"""### Quantised values (`bench/bench_quant.py`)

Command: `python bench/bench_quant.py {' '.join(argv if argv is not None else sys.argv[1:])}`. Machine: {machine()}. {took:.0f} s.
Training `bench/data/train.txt`; held out `bench/data/test.txt` ({len(held):,} messages): KSR@3 on the first
{len(ksr_msgs):,}, perplexity on the first {len(ppl_msgs):,} (every token, `</s>` included), both by the engine.
n-grams = stored bigrams + trigrams; bytes / n-gram = the whole file (vocabulary included) ÷ n-grams. Timing: one
process, CPU time of the calling thread, every query asked of every model of a kind in turn, {args.rounds} rounds of
{len(queries):,} `suggest(k=3)` queries (median of the rounds' p50/p99); load = median of 21 `nextword.load` calls. Targets (issue 15): ≤ 2.0 bytes /
n-gram; quantisation ≤ 0.1 KSR@3 points and ≤ 1% perplexity; load ≤ 5 ms; p99 ≤ 1.3× exact.
Rows "compact, …": format 1.6 (`compact=True`: chunked Elias-Fano successor lists, starts and counts, docs/FORMAT.md
§7.18); quantised compact files use the `quant` codec version 2 (a ones bitmap, codes only for the other values).

""" + "\n".join(sections)
    publish(md, "quant", write=not args.no_results)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
