"""What the progress line costs: the keystroke simulation with and without it, side by side.

``nextword eval`` reports after every simulated message and the line redraws at most
10 times a second. This script runs ``evaluate`` on the same held-out messages with no
progress callback and with an enabled progress line (drawing into /dev/null, so a
terminal's speed does not enter), alternating the two in several rounds, and prints the
median of each and their ratio, plus the cost of one throttled ``update`` call. Writes a
``progress`` section into bench/RESULTS.md (``--no-results`` to skip). This is a
benchmark, not a test: nothing here fails on a slow machine.
"""

from __future__ import annotations

import argparse
import os
import statistics
import sys
import time
import timeit
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))
sys.path.insert(0, str(HERE))

import nextword  # noqa: E402
from bench_core import machine, publish  # noqa: E402
from nextword._progress import Progress  # noqa: E402
from nextword.evaluate import evaluate  # noqa: E402


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description="cost of the progress line")
    ap.add_argument("--data", type=Path, default=HERE / "data")
    ap.add_argument("--messages", type=int, default=1500, help="held-out messages per run (default %(default)s)")
    ap.add_argument("--rounds", type=int, default=6, help="alternating rounds of each variant (default %(default)s)")
    ap.add_argument("--no-results", action="store_true", help="do not edit bench/RESULTS.md")
    args = ap.parse_args(argv)
    train, test = args.data / "train.txt", args.data / "test.txt"
    if not train.exists():
        print("bench_progress: run bench/prepare_corpus.py first", file=sys.stderr)
        return 2
    out = HERE / "out"
    out.mkdir(exist_ok=True)
    model_path = out / "progress.nwm"
    nextword.train(train, model_path, progress=False)
    model = nextword.load(model_path)
    with open(test, encoding="utf-8") as f:
        msgs = [ln.rstrip("\n") for ln in f if ln.strip()][: args.messages]
    evaluate(model, [("warm", msgs)], (3,))  # fill the model's caches once for both variants

    sink = open(os.devnull, "w", encoding="utf-8")  # noqa: SIM115 - closed below
    plain: list[float] = []
    shown: list[float] = []
    redraws: list[int] = []
    for r in range(args.rounds):
        if r % 2:  # ABBA order: neither variant always runs second
            t0 = time.perf_counter()
            evaluate(model, [("a", msgs)], (3,))
            plain.append(time.perf_counter() - t0)

        class Counting:
            writes = 0

            def write(self, s: str) -> int:
                Counting.writes += 1
                return sink.write(s)

            def flush(self) -> None:
                sink.flush()

        bar = Progress("eval", stages=1, enabled=True, stream=Counting())  # type: ignore[arg-type]
        bar.stage("simulating typing", total=len(msgs), unit="messages")
        t0 = time.perf_counter()
        evaluate(model, [("b", msgs)], (3,), progress=bar.update)
        shown.append(time.perf_counter() - t0)
        redraws.append(Counting.writes)
        if not r % 2:
            t0 = time.perf_counter()
            evaluate(model, [("a", msgs)], (3,))
            plain.append(time.perf_counter() - t0)
    print("seconds per round, no progress:", [round(x, 3) for x in plain], file=sys.stderr)
    print("seconds per round, progress:   ", [round(x, 3) for x in shown], file=sys.stderr)
    sink.close()

    idle = Progress("x", total=10**9, enabled=True, stream=open(os.devnull, "w"))  # noqa: SIM115
    idle.update(1)  # first draw; the next calls inside 0.1 s are throttled
    n = 200_000
    per_call_ns = timeit.timeit(lambda: idle.update(2), number=n) / n * 1e9
    a, b = statistics.median(plain), statistics.median(shown)
    md = "\n".join([
        "## Progress line cost",
        "",
        f"`python bench/bench_progress.py` — evaluate() on {len(msgs):,} held-out messages (k = 3), "
        f"{args.rounds} rounds of each in ABBA order; the progress line draws into /dev/null.",
        "",
        "| variant | median seconds | fastest–slowest round | ratio of medians | ratio of fastest |",
        "|---|---|---|---|---|",
        f"| no progress callback | {a:.3f} | {min(plain):.3f}–{max(plain):.3f} | 1.000 | 1.000 |",
        f"| progress after every message | {b:.3f} | {min(shown):.3f}–{max(shown):.3f} | {b / a:.3f} | "
        f"{min(shown) / min(plain):.3f} |",
        "",
        f"Computed cost: {len(msgs):,} throttled calls × {per_call_ns:.0f} ns = "
        f"{len(msgs) * per_call_ns / 1e9 / a:.3%} of the run (plus the redraws); any measured "
        "difference smaller than the spread between rounds is the shared machine's noise.",
        "",
        f"Redraws per run: {statistics.median(redraws):.0f} (≤ 10 a second by design); "
        f"a throttled update() call costs {per_call_ns:.0f} ns, against "
        f"{a / len(msgs) * 1e6:,.0f} µs of simulation per message.",
        "",
        f"Machine: {machine()}",
    ])
    publish(md, "progress", write=not args.no_results)
    return 0


if __name__ == "__main__":
    sys.exit(main())
