"""Size budget: file size against held-out perplexity and KSR@3, for both pruning rules.

Starts from the 5-million-word model of ``bench_core.py`` and its held-out text; each
budget is met by ``nextword.prune.prune_to_size`` (the file size is measured), then the
pruned model is evaluated on the same held-out messages. Figures go into
``bench/RESULTS.md`` between the ``prune`` markers; a plot into ``bench/out/prune/``.

    python bench/prepare_corpus.py && python bench/bench_core.py && python bench/bench_prune.py
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
from nextword.evaluate import evaluate  # noqa: E402
from nextword.prune import prune_to_size, tables_from_model, vocabulary_bytes  # noqa: E402
from nextword.store import atomic_write  # noqa: E402


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description="pruning curve")
    ap.add_argument("--messages", type=int, default=400, help="held-out messages for KSR")
    ap.add_argument("--no-results", action="store_true")
    args = ap.parse_args(argv)
    core, test = HERE / "out" / "core.nwm", HERE / "data" / "test.txt"
    if not core.exists() or not test.exists():
        print("bench_prune: run bench/prepare_corpus.py and bench/bench_core.py first", file=sys.stderr)
        return 2
    out = HERE / "out" / "prune"
    out.mkdir(parents=True, exist_ok=True)
    model = nextword.load(core)
    held = [m for m in test.read_text(encoding="utf-8").splitlines() if m.strip()]
    ksr_msgs = held[: args.messages]
    tables = tables_from_model(model)
    floor = vocabulary_bytes(tables, lam=model.stored_lam)
    budgets = [model.file_size] + [int(x * 1e6) for x in (4.0, 3.0, 2.5, 2.0, 1.5, 1.2)]
    rows = []
    t0 = time.perf_counter()
    for rule in ("count", "entropy"):
        for budget in budgets:
            if budget < floor:
                continue
            if budget == model.file_size:
                path = core
            else:
                _, chunks, _ = prune_to_size(tables, budget, rule=rule, lam=model.stored_lam)  # type: ignore[arg-type]
                path = out / f"{rule}-{budget}.nwm"
                atomic_write(path, chunks)
            m = nextword.load(path)
            overall, _ = evaluate(m, [("held", ksr_msgs)], (3,))
            rows.append((rule, m.file_size, m.n_bigrams, m.perplexity(held), overall.per_k[3].ksr))
    took = time.perf_counter() - t0
    table = "\n".join(
        f"| {rule} | {size:,} | {pairs:,} | {ppl:.1f} | {100 * ksr:.2f}% |" for rule, size, pairs, ppl, ksr in rows
    )
    md = f"""### Size budget (`bench/bench_prune.py`)

Command: `python bench/prepare_corpus.py && python bench/bench_core.py && python bench/bench_prune.py` — {time.strftime('%Y-%m-%d')}
Machine: {machine()}.
The 5M-word model ({model.file_size:,} bytes, {model.n_bigrams:,} pairs) pruned to each budget (the vocabulary
alone needs {floor:,} bytes); perplexity on all {len(held):,} held-out messages, KSR@3 on the first {len(ksr_msgs):,}.
{took:.0f} s in all.

| rule | file bytes | pairs kept | perplexity | KSR@3 |
|---|---|---|---|---|
{table}
"""
    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError:
        pass
    else:
        fig, axes = plt.subplots(1, 2, figsize=(9, 3.5))
        for rule in ("count", "entropy"):
            pts = sorted((s, p, k) for r, s, _, p, k in rows if r == rule)
            axes[0].plot([s / 1e6 for s, _, _ in pts], [p for _, p, _ in pts], "o-", label=rule)
            axes[1].plot([s / 1e6 for s, _, _ in pts], [100 * k for _, _, k in pts], "o-", label=rule)
        axes[0].set_xlabel("file size (MB)")
        axes[0].set_ylabel("held-out perplexity")
        axes[1].set_xlabel("file size (MB)")
        axes[1].set_ylabel("KSR@3 (%)")
        axes[0].legend()
        fig.tight_layout()
        fig.savefig(out / "size_curve.png", dpi=120)
        plt.close(fig)
        md += "\nPlot: `bench/out/prune/size_curve.png` (made by the command, not committed).\n"
    publish(md, "prune", write=not args.no_results)
    return 0


if __name__ == "__main__":
    sys.exit(main())
