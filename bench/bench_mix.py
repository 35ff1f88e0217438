"""Mixing a general model with a domain model, against each alone and the corpora concatenated: one run.

The scenario a keyboard engineer meets: a large general text and a small sample of the
users' own domain. Here, from public Debian text packages (prepared at run time, never
committed; ``apt-get install dict-gcide dict-foldoc dict-jargon fortunes``):

* **domain**: Debian's ``fortunes`` quotations, split by the one held-out rule
  (``nextword split``: test = ``evaluate.is_held_out`` at ``prepare_corpus.TEST_PERCENT``,
  the same test messages as every other benchmark; a tune part carved from the rest by
  the split's independent hash) — the models train on its train part, the mixture weights
  are fitted on its tune part, and every figure is measured on its test part;
* **general**: the dictionaries (GCIDE, FOLDOC, the Jargon File), the training side of the
  same rule, minus any paragraph identical to a domain test or tune message (the
  dictionaries quote literature, as fortunes do).

Rows, side by side on the same held-out domain messages and the same timed queries:
domain alone, general alone, the two corpora concatenated into one training text, and the
mixture with EM weights (each with ``--smoothing``/``--order``, KN trigram by default), plus
a mixture of a general JM bigram with a domain KN trigram. KSR@1/3/5, hit@3, perplexity,
out-of-vocabulary rate, size, suggest p50/p99. Figures go into bench/RESULTS.md between
the ``mix`` markers.

Perplexities of models with different vocabularies are not comparable one to one: a
model that knows fewer words lumps more tokens into ``<unk>`` (a mixture gives a word only
one part knows nothing from the other part; see ``nextword.mix``). KSR is comparable.

    python bench/bench_mix.py --messages 1000 --queries 12000
"""

from __future__ import annotations

import argparse
import json
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any, Mapping

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
sys.path.insert(0, str(HERE.parent))

from bench_core import machine, publish  # noqa: E402
from prepare_corpus import DICTS, FORTUNES, TEST_PERCENT, messages  # noqa: E402

import nextword  # noqa: E402
from nextword.baselines import sample_queries  # noqa: E402
from nextword.evaluate import evaluate, is_held_out  # noqa: E402
from nextword.mix import MixedModel, Predictor, fit_weights, load_mix, write_mix  # noqa: E402

OUT = HERE / "out" / "mix"
TUNE_PERCENT = 5


def _lines(path: Path) -> list[str]:
    return [ln.rstrip("\n") for ln in path.open(encoding="utf-8") if ln.strip()]


def figure_files(out: Path = OUT) -> dict[str, tuple[list[Path], list[Path]]]:
    """Each figure this script publishes: (the text its models were trained or tuned on, its held-out files)."""
    trained = [out / "domain-train.txt", out / "domain-tune.txt", out / "general-train.txt", out / "concatenated-train.txt"]
    return {"mix: every row, on the domain's held-out part": (trained, [out / "domain-test.txt"])}


def prepare(out: Path = OUT, *, dicts: Mapping[str, Path] = DICTS, fortunes: Path = FORTUNES) -> dict[str, Path]:
    """Write the domain's train/tune/test parts and the general training text; return their paths."""
    out.mkdir(parents=True, exist_ok=True)
    domain = out / "fortunes.txt"
    with open(domain, "w", encoding="utf-8") as f:
        for _, msg in messages(dicts={}, fortunes=fortunes):
            f.write(msg + "\n")
    paths = {name: out / f"domain-{name}.txt" for name in ("train", "tune", "test")}
    subprocess.run([sys.executable, "-m", "nextword", "split", str(domain), "--train-out", str(paths["train"]),
                    "--test-out", str(paths["test"]), "--tune-out", str(paths["tune"]),
                    "--test-percent", str(TEST_PERCENT), "--tune-percent", str(TUNE_PERCENT)], check=True, capture_output=True)
    avoid = set(_lines(paths["test"])) | set(_lines(paths["tune"]))
    general = out / "general-train.txt"
    kept = dropped = 0
    with open(general, "w", encoding="utf-8") as f:
        for _, msg in messages(dicts=dicts, fortunes=None):
            if is_held_out(msg, TEST_PERCENT):
                continue
            if msg in avoid:
                dropped += 1
                continue
            f.write(msg + "\n")
            kept += 1
    both = out / "concatenated-train.txt"
    with open(both, "w", encoding="utf-8") as f:
        for src in (paths["train"], general):
            f.write(src.read_text(encoding="utf-8"))
    (out / "prepared.json").write_text(json.dumps({"general_messages": kept, "general_dropped_as_domain_held_out": dropped}))
    return {**paths, "general": general, "concatenated": both}


def words_in(path: Path) -> int:
    return sum(len(ln.split()) for ln in path.open(encoding="utf-8"))


def measure(label: str, model: Predictor, held: list[str], queries: list[str], file_bytes: int) -> dict[str, Any]:
    overall, _ = evaluate(model, [("held", held)], (1, 3, 5))
    model.suggest(queries[0], 3)
    wall, cpu = [], []
    for q in queries:  # each call timed twice: wall clock, and this thread's CPU time (no preemption by other jobs)
        w0, c0 = time.perf_counter(), time.thread_time()
        model.suggest(q, 3)
        cpu.append(time.thread_time() - c0)
        wall.append(time.perf_counter() - w0)
    wall.sort()
    cpu.sort()
    return {
        "label": label, "file_bytes": file_bytes,
        "ksr": {k: overall.per_k[k].ksr for k in (1, 3, 5)}, "hit3": overall.per_k[3].hit_rate,
        "perplexity": overall.perplexity, "oov": overall.oov_rate,
        "p50_us": 1e6 * cpu[len(cpu) // 2], "p99_us": 1e6 * cpu[int(len(cpu) * 0.99)],
        "wall_p50_us": 1e6 * wall[len(wall) // 2], "wall_p99_us": 1e6 * wall[int(len(wall) * 0.99)],
    }


def table(rows: list[dict[str, Any]]) -> str:
    base = rows[0]
    out = ["| model | KSR@1 | KSR@3 (vs domain) | KSR@5 | hit@3 | perplexity | OOV | size | suggest p50 / p99, CPU | wall p50 / p99 |",
           "|---|---|---|---|---|---|---|---|---|---|"]
    for r in rows:
        d3 = 100 * (r["ksr"][3] - base["ksr"][3])
        out.append(
            f"| {r['label']} | {100 * r['ksr'][1]:.2f}% | {100 * r['ksr'][3]:.2f}% ({d3:+.2f}) | {100 * r['ksr'][5]:.2f}% | "
            f"{100 * r['hit3']:.2f}% | {r['perplexity']:.1f} | {100 * r['oov']:.2f}% | {r['file_bytes'] / 1e6:.2f} MB | "
            f"{r['p50_us']:.0f} / {r['p99_us']:.0f} µs | {r['wall_p50_us']:.0f} / {r['wall_p99_us']:.0f} µs |"
        )
    return "\n".join(out)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description="a general and a domain model mixed, against each alone and concatenated")
    ap.add_argument("--messages", type=int, default=1000, help="held-out domain messages simulated (default 1000)")
    ap.add_argument("--queries", type=int, default=12000, help="typed texts timed per model (default 12000)")
    ap.add_argument("--order", type=int, choices=(2, 3), default=3, help="n-gram order of the main rows (default 3)")
    ap.add_argument("--smoothing", choices=("jm", "kn"), default="kn", help="smoothing of the main rows (default kn)")
    ap.add_argument("--no-results", action="store_true", help="do not edit bench/RESULTS.md")
    args = ap.parse_args(argv)
    if not FORTUNES.is_dir() or not all(p.exists() for p in DICTS.values()):
        print("bench_mix: run: apt-get install dict-gcide dict-foldoc dict-jargon fortunes", file=sys.stderr)
        return 2
    paths = prepare()
    held = _lines(paths["test"])[: args.messages]
    tune = _lines(paths["tune"])
    queries = sample_queries(held, args.queries)
    kw = {"order": args.order, "smoothing": args.smoothing}
    kind = f"{'KN' if args.smoothing == 'kn' else 'JM'} {'trigram' if args.order == 3 else 'bigram'}"
    with tempfile.TemporaryDirectory(prefix="nextword-mix-") as t:
        tmp = Path(t)
        files: dict[str, Path] = {}
        for name, src, extra in (("domain", paths["train"], kw), ("general", paths["general"], kw),
                                 ("concatenated", paths["concatenated"], kw),
                                 ("general JM bigram", paths["general"], {"order": 2, "smoothing": "jm"})):
            files[name] = tmp / f"{name.replace(' ', '-')}.nwm"
            t0 = time.perf_counter()
            nextword.train(src, files[name], **extra)
            print(f"trained {name} in {time.perf_counter() - t0:.1f} s", file=sys.stderr)
        models = {name: nextword.load(path) for name, path in files.items()}
        t0 = time.perf_counter()
        fit = fit_weights([models["general"], models["domain"]], tune)
        fit_s = time.perf_counter() - t0
        fit_mixed_jm = fit_weights([models["general JM bigram"], models["domain"]], tune)
        size = {name: path.stat().st_size for name, path in files.items()}
        rows = [
            measure(f"domain alone ({kind})", models["domain"], held, queries, size["domain"]),
            measure(f"general alone ({kind})", models["general"], held, queries, size["general"]),
            measure(f"concatenated corpora ({kind})", models["concatenated"], held, queries, size["concatenated"]),
            measure(f"mixed, EM weights {fit.weights[0]:.3f} general / {fit.weights[1]:.3f} domain",
                    MixedModel([models["general"], models["domain"]], fit.weights), held, queries,
                    size["general"] + size["domain"]),
            measure(f"mixed: general JM bigram + domain {kind}, EM {fit_mixed_jm.weights[0]:.3f} / {fit_mixed_jm.weights[1]:.3f}",
                    MixedModel([models["general JM bigram"], models["domain"]], fit_mixed_jm.weights), held, queries,
                    size["general JM bigram"] + size["domain"]),
        ]
        # opening: a model file, and the mixture file (its parts, their SHA-256, the id maps between them)
        write_mix(tmp / "mixed.nwx", [files["general"], files["domain"]], fit.weights)
        opens: dict[str, list[float]] = {"general": [], "mixture": []}
        for _ in range(5):
            t0 = time.perf_counter()
            nextword.load(files["general"]).close()
            opens["general"].append(time.perf_counter() - t0)
            t0 = time.perf_counter()
            load_mix(tmp / "mixed.nwx").close()
            opens["mixture"].append(time.perf_counter() - t0)
    load_ms = {k: 1000 * statistics.median(v) for k, v in opens.items()}
    dom, gen, cat, mix = rows[0], rows[1], rows[2], rows[3]
    single_p99 = max(dom["p99_us"], gen["p99_us"], cat["p99_us"])
    prepared = json.loads((OUT / "prepared.json").read_text())
    md = "\n".join([
        "## Mixing a general and a domain model (bench_mix.py)",
        "",
        f"Machine: {machine()}. Command: `python bench/bench_mix.py --messages {args.messages} --queries {args.queries}`.",
        f"Domain: Debian `fortunes`, {words_in(paths['train']):,} training words (split by the one rule: test "
        f"{TEST_PERCENT}%, tune {TUNE_PERCENT}%), {len(held):,} held-out test messages simulated, weights fitted by EM on "
        f"{len(tune):,} tune messages ({fit.iterations} iterations, {fit_s:.1f} s). General: GCIDE, FOLDOC and the Jargon File, "
        f"{words_in(paths['general']):,} training words ({prepared['general_dropped_as_domain_held_out']} paragraphs "
        f"dropped as identical to domain test/tune messages). Same {len(queries):,} timed queries for every row.",
        "",
        table(rows),
        "",
        f"* Mixed vs domain alone: **{100 * (mix['ksr'][3] - dom['ksr'][3]):+.2f}** KSR@3 points (target ≥ +1.0); "
        f"vs concatenated: **{100 * (mix['ksr'][3] - cat['ksr'][3]):+.2f}** (target ≥ +1.5); concatenated vs domain alone: "
        f"{100 * (cat['ksr'][3] - dom['ksr'][3]):+.2f}.",
        f"* Suggest p99 (CPU time of the calling thread, so other jobs on the shared machine do not count) of the "
        f"two-part mixture: {mix['p99_us']:.0f} µs = **{mix['p99_us'] / single_p99:.2f}×** the slowest single model's "
        f"({single_p99:.0f} µs; target ≤ 2×); {mix['p99_us'] / dom['p99_us']:.2f}× the domain model's, "
        f"{mix['p99_us'] / cat['p99_us']:.2f}× the concatenated model's; p50 {mix['p50_us'] / cat['p50_us']:.2f}× the "
        f"concatenated model's. Wall-clock p99: {mix['wall_p99_us'] / max(dom['wall_p99_us'], gen['wall_p99_us'], cat['wall_p99_us']):.2f}× "
        f"(it includes preemption by other jobs).",
        f"* Out-of-vocabulary rate: domain alone {100 * dom['oov']:.2f}%, mixed {100 * mix['oov']:.2f}%.",
        f"* Opening (median of 5): the general model file {load_ms['general']:.1f} ms; the mixture file with both parts "
        f"{load_ms['mixture']:.1f} ms (two loads, each part's SHA-256 checked, the id maps between the parts built).",
        "* Perplexity across different vocabularies is not one-to-one comparable (a smaller vocabulary lumps more "
        "tokens into `<unk>`); KSR is.",
    ])
    publish(md, "mix", write=not args.no_results)
    return 0


if __name__ == "__main__":
    sys.exit(main())
