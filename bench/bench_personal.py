"""Personal adaptation benchmark: prequential replay of a user's log over two base models.

The bases are trained on the 5M-word corpus's training part (``bench/data/train.txt`` from
``prepare_corpus.py``): a Jelinek-Mercer bigram (λ 0.9) and a Kneser-Ney trigram, side by
side in one run. The "user" is the Jargon File's held-out entries (``prepare_corpus``'s own
split rule: messages no base was trained on; one community's technical slang, with its own
recurring names and phrases), in file order. Each message is first typed with the current
layer (the keystroke simulation of ``nextword.evaluate``) and only then learned, so every
figure is on text the layer had not seen; the base alone types the same messages.

Latency is measured on the *same queries*: every text the layer's simulation asks about is
also asked of the base model at once, the two calls in alternating order (so neither gets
the other's warm caches systematically). The figure issue 13 asks for is the added p99:
p99 of the layer's calls minus p99 of the base's calls; the p99 of the per-query
difference is shown beside it. Figures go into ``bench/RESULTS.md`` between the
``personal`` markers.

    python bench/prepare_corpus.py && python bench/bench_personal.py [--messages N]
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import nextword  # noqa: E402
from bench_core import machine, publish  # noqa: E402
from nextword.evaluate import simulate_message  # noqa: E402
from nextword.personal import PersonalLayer  # noqa: E402
from prepare_corpus import DICTS, part_of  # noqa: E402
from prepare_corpus import messages as public_messages  # noqa: E402

DATA = HERE / "data"
OUT = HERE / "out" / "personal"
#: (label, file stem, train keyword arguments)
BASES: tuple[tuple[str, str, dict[str, Any]], ...] = (
    ("JM bigram (λ 0.9)", "jm2", {"order": 2, "smoothing": "jm"}),
    ("KN trigram", "kn3", {"order": 3, "smoothing": "kn"}),
)


def base_model(stem: str, kwargs: dict[str, Any]) -> tuple[nextword.Model, float | None]:
    """The base trained on the corpus's training part (reused while newer than the corpus)."""
    OUT.mkdir(parents=True, exist_ok=True)
    path = OUT / f"{stem}.nwm"
    train = DATA / "train.txt"
    seconds = None
    if not path.exists() or path.stat().st_mtime < train.stat().st_mtime:
        t0 = time.perf_counter()
        nextword.train(train, path, **kwargs)
        seconds = time.perf_counter() - t0
    return nextword.load(path), seconds


def replay(base: nextword.Model, msgs: list[str], k: int, blocks: int) -> dict[str, Any]:
    layer = PersonalLayer(base)
    rows = []  # per message: (chars, keys_base, keys_layer)
    # per query: (wall seconds, CPU seconds of this thread) of the base's call and of the layer's
    lat_base: list[tuple[float, float]] = []
    lat_layer: list[tuple[float, float]] = []
    flip = [False]
    clock, cpu = time.perf_counter, time.thread_time

    def timed(fn: Any, typed: str, kk: int, into: list[tuple[float, float]]) -> list[nextword.Suggestion]:
        c0, t0 = cpu(), clock()
        out = fn(typed, kk)
        t1, c1 = clock(), cpu()
        into.append((t1 - t0, c1 - c0))
        return out  # type: ignore[no-any-return]

    def paired(typed: str, kk: int) -> list[nextword.Suggestion]:
        """The layer's answer; the base is asked the same query beside it, in alternating order."""
        flip[0] = not flip[0]
        if flip[0]:
            out = timed(layer.suggest, typed, kk, lat_layer)
            timed(base.suggest, typed, kk, lat_base)
        else:
            timed(base.suggest, typed, kk, lat_base)
            out = timed(layer.suggest, typed, kk, lat_layer)
        return out

    learn_s = 0.0
    t0 = clock()
    for m in msgs:
        with_layer = simulate_message(paired, m, (k,))[k]
        alone = simulate_message(base.suggest, m, (k,))[k]
        rows.append((alone.characters, alone.keystrokes, with_layer.keystrokes))
        t1 = clock()
        layer.learn(m)
        learn_s += clock() - t1
    wall = clock() - t0
    a = np.asarray(rows, dtype=np.float64)
    curve = []
    for block in np.array_split(np.arange(len(rows)), blocks):
        if len(block):
            b = a[block]
            curve.append((int(block[0]) + 1, int(block[-1]) + 1, 1 - b[:, 1].sum() / b[:, 0].sum(), 1 - b[:, 2].sum() / b[:, 0].sum()))
    with tempfile.TemporaryDirectory() as d:
        layer.save(Path(d) / "user.nwp")
        size = (Path(d) / "user.nwp").stat().st_size
    lb, ll = np.asarray(lat_base) * 1e6, np.asarray(lat_layer) * 1e6  # (queries, [wall, cpu]) in µs
    return {
        "ksr_base": 1 - a[:, 1].sum() / a[:, 0].sum(),
        "ksr_layer": 1 - a[:, 2].sum() / a[:, 0].sum(),
        "curve": curve,
        "entries": layer.entries,
        "size": size,
        "weight": layer.weight,
        "learn_ms": 1e3 * learn_s / len(msgs),
        "wall": wall,
        "queries": len(lb),
        **{
            f"{what}_{name}": (np.percentile(x[:, col], 50), np.percentile(x[:, col], 99))
            for col, what in ((0, "wall"), (1, "cpu"))
            for name, x in (("base", lb), ("layer", ll), ("diff", ll - lb))
        },
    }


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description="prequential personal-adaptation benchmark")
    ap.add_argument("-k", type=int, default=3)
    ap.add_argument("--blocks", type=int, default=6, help="points on the learning curve")
    ap.add_argument("--messages", type=int, default=400, help="user messages replayed (at most the held-out entries)")
    ap.add_argument("--no-results", action="store_true")
    args = ap.parse_args(argv)
    if not (DATA / "train.txt").exists():
        print("bench_personal: run bench/prepare_corpus.py first", file=sys.stderr)
        return 2
    msgs = [m for src, m in public_messages(dicts={"jargon": DICTS["jargon"]}, fortunes=None) if part_of(m) == "test"][: args.messages]
    if not msgs:
        print("bench_personal: the Jargon File is missing; run: apt-get install dict-jargon", file=sys.stderr)
        return 2
    k = args.k
    results = []
    for label, stem, kwargs in BASES:
        base, _ = base_model(stem, kwargs)
        results.append((label, base, replay(base, msgs, k, args.blocks)))
    words = sum(len(m.split()) for m in msgs)
    def row(label: str, r: dict[str, Any], what: str) -> str:
        b, lay, d = r[f"{what}_base"], r[f"{what}_layer"], r[f"{what}_diff"]
        return (
            f"| {label} | {what} | {b[0]:.1f} / {b[1]:.1f} | {lay[0]:.1f} / {lay[1]:.1f} "
            f"| **{lay[0] - b[0]:+.1f} / {lay[1] - b[1]:+.1f}** | {d[0]:+.1f} / {d[1]:+.1f} |"
        )

    table = "\n".join(row(label, r, what) for label, _, r in results for what in ("cpu", "wall"))
    ksr = "\n".join(
        f"| {label} | {100 * r['ksr_base']:.2f}% | {100 * r['ksr_layer']:.2f}% ({100 * (r['ksr_layer'] - r['ksr_base']):+.2f} points) |"
        for label, _, r in results
    )
    curves = []
    for label, _, r in results:
        rows = "\n".join(f"| {s:,}–{e:,} | {100 * kb:.2f}% | {100 * kl:.2f}% | {100 * (kl - kb):+.2f} |" for s, e, kb, kl in r["curve"])
        curves.append(f"{label}:\n\n| messages | base alone | with layer | gain |\n|---|---|---|---|\n{rows}\n")
    sizes = "; ".join(
        f"{label}: {r['entries']:,} entries, {r['size']:,} bytes on disk, μ = {r['weight']:.3f}, learning {r['learn_ms']:.2f} ms per message, "
        f"{r['queries']:,} query pairs, {r['wall']:.0f} s"
        for label, _, r in results
    )
    md = f"""### Personal adaptation (`bench/bench_personal.py`)

Command: `python bench/prepare_corpus.py && python bench/bench_personal.py --messages {args.messages}` — {time.strftime('%Y-%m-%d')}
Machine: {machine()}.
Prequential replay over two bases trained on the 5M-word corpus's training part (`bench/data/train.txt`), side by side in
one run; user log = the first {len(msgs):,} held-out entries of the Jargon File ({words:,} words, text no base was trained
on), each typed with the current layer, then learned. Layer defaults (min_uses 2, strength 2000, max_weight 0.5, λ 0.9,
no decay).

| base | KSR@{k} base alone | KSR@{k} base + layer |
|---|---|---|
{ksr}

Latency in µs per suggest call on the *same* queries (every query of the layer's simulation is also asked of the base,
in alternating order): "cpu" = this thread's CPU time (what the call costs, without the waits of a shared machine),
"wall" = elapsed time; "added" = the layer's percentile minus the base's; "per query" = percentiles of (layer − base)
call by call.

| base | clock | base p50 / p99 | layer p50 / p99 | added p50 / p99 | per query p50 / p99 |
|---|---|---|---|---|---|
{table}

Learning curve (messages in order; each block measured before its messages were learned):

{chr(10).join(curves)}
After the whole log — {sizes}.
"""
    publish(md, "personal", write=not args.no_results)
    return 0


if __name__ == "__main__":
    sys.exit(main())
