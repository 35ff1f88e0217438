"""Personal adaptation benchmark: prequential replay of a user's log over a base model.

The base model is the fortunes model of ``bench_eval.py`` (quotations and jokes); the
"user" is the Jargon File from Debian's ``dict-jargon`` (one community's technical slang:
another kind of text, with its own recurring names and phrases), in file order. Each message is first typed with the current layer (the keystroke
simulation of ``nextword.evaluate``) and only then learned, so every figure is on text
the layer had not seen. The base model alone types the same messages for comparison.
Figures go into ``bench/RESULTS.md`` between the ``personal`` markers.

    python bench/bench_eval.py && python bench/bench_personal.py
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import nextword  # noqa: E402
from bench_core import machine, publish  # noqa: E402
from nextword.evaluate import simulate_message  # noqa: E402
from nextword.personal import PersonalLayer  # noqa: E402
from prepare_corpus import messages as public_messages  # noqa: E402


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description="prequential personal-adaptation benchmark")
    ap.add_argument("-k", type=int, default=3)
    ap.add_argument("--blocks", type=int, default=8, help="points on the learning curve")
    ap.add_argument("--messages", type=int, default=1500, help="user messages replayed")
    ap.add_argument("--no-results", action="store_true")
    args = ap.parse_args(argv)
    base_path = HERE / "out" / "eval" / "fortunes.nwm"
    if not base_path.exists():
        print("bench_personal: run bench/bench_eval.py first", file=sys.stderr)
        return 2
    base = nextword.load(base_path)
    msgs = [m for src, m in public_messages() if src == "jargon"][: args.messages]
    if not msgs:
        print("bench_personal: the Jargon File is missing; run: apt-get install dict-jargon", file=sys.stderr)
        return 2
    layer = PersonalLayer(base)
    k = args.k
    rows = []  # per message: (chars, keys_base, keys_layer)
    lat_base: list[float] = []
    lat_layer: list[float] = []
    learn_s = 0.0
    t0 = time.perf_counter()
    for m in msgs:
        with_layer = simulate_message(layer.suggest, m, (k,), latencies=lat_layer)[k]
        alone = simulate_message(base.suggest, m, (k,), latencies=lat_base)[k]
        rows.append((alone.characters, alone.keystrokes, with_layer.keystrokes))
        t1 = time.perf_counter()
        layer.learn(m)
        learn_s += time.perf_counter() - t1
    wall = time.perf_counter() - t0
    a = np.asarray(rows, dtype=np.float64)
    ksr_base = 1 - a[:, 1].sum() / a[:, 0].sum()
    ksr_layer = 1 - a[:, 2].sum() / a[:, 0].sum()
    curve = []
    for i, block in enumerate(np.array_split(np.arange(len(rows)), args.blocks)):
        b = a[block]
        curve.append((i, int(block[0]) + 1, int(block[-1]) + 1, 1 - b[:, 1].sum() / b[:, 0].sum(), 1 - b[:, 2].sum() / b[:, 0].sum()))
    with tempfile.TemporaryDirectory() as d:
        layer.save(Path(d) / "user.nwp")
        size = (Path(d) / "user.nwp").stat().st_size
    lb, ll = np.asarray(lat_base) * 1e6, np.asarray(lat_layer) * 1e6
    curve_rows = "\n".join(
        f"| {s:,}–{e:,} | {100 * kb:.2f}% | {100 * kl:.2f}% | {100 * (kl - kb):+.2f} |" for _, s, e, kb, kl in curve
    )
    md = f"""### Personal adaptation (`bench/bench_personal.py`)

Command: `apt-get install fortunes dict-jargon && python bench/bench_eval.py && python bench/bench_personal.py` — {time.strftime('%Y-%m-%d')}
Machine: {machine()}.
Prequential replay: base model = the fortunes model (bench_eval: quotations and jokes); user log = the first
{len(msgs):,} entries of the Jargon File (another kind of text), each typed with the current layer, then learned.
Layer defaults (min_uses 2, strength 2000, max_weight 0.5, λ 0.9, no decay). Total {wall:.1f} s.

| | KSR@{k} |
|---|---|
| base model alone | {100 * ksr_base:.2f}% |
| base + personal layer | {100 * ksr_layer:.2f}% ({100 * (ksr_layer - ksr_base):+.2f} points) |

Learning curve (messages in order; each block measured before its messages were learned):

| messages | base alone | with layer | gain |
|---|---|---|---|
{curve_rows}

Layer after the whole log: {layer.entries:,} entries (words + pairs), {size:,} bytes on disk, weight μ = {layer.weight:.3f};
learning took {1e3 * learn_s / len(msgs):.2f} ms per message (counting + no save; saving is one atomic write).
Latency per suggest call, same run: base alone p50 {np.percentile(lb, 50):.1f} µs / p99 {np.percentile(lb, 99):.1f} µs;
with the layer p50 {np.percentile(ll, 50):.1f} µs / p99 {np.percentile(ll, 99):.1f} µs
(added p50 {np.percentile(ll, 50) - np.percentile(lb, 50):.1f} µs).
"""
    plot = _plot(curve, HERE / "out" / "personal" / "learning_curve.png", k)
    if plot:
        md += f"Plot: `{plot.relative_to(HERE.parent)}` (made by the command, not committed).\n"
    publish(md, "personal", write=not args.no_results)
    return 0


def _plot(curve: list[tuple[int, int, int, float, float]], path: Path, k: int) -> Path | None:
    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError:
        return None
    path.parent.mkdir(parents=True, exist_ok=True)
    x = [e for _, _, e, _, _ in curve]
    fig, ax = plt.subplots(figsize=(5.5, 3.5))
    ax.plot(x, [100 * b for *_, b, _ in curve], "o--", label="base model alone")
    ax.plot(x, [100 * w for *_, w in curve], "o-", label="with personal layer")
    ax.set_xlabel("messages typed so far")
    ax.set_ylabel(f"KSR@{k} in the block (%)")
    ax.legend(fontsize=8)
    fig.tight_layout()
    fig.savefig(path, dpi=120)
    plt.close(fig)
    return path


if __name__ == "__main__":
    sys.exit(main())
