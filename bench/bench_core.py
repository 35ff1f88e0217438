"""Core engine benchmark: training speed, file size, load time and suggest latency.

Runs on the corpus made by ``bench/prepare_corpus.py`` (real public text, ≥ 5 million
words) and compares, in the same run and on the same queries, the engine with the
plain-dict implementation of the same formula (``nextword.baselines.DictBigram``). Figures
are written to ``bench/out/core.json`` and into ``bench/RESULTS.md`` between the
``core`` markers. This is a benchmark, not a test: nothing here fails on a slow machine.

    python bench/prepare_corpus.py && python bench/bench_core.py
"""

from __future__ import annotations

import argparse
import gc
import json
import os
import platform
import random
import resource
import statistics
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import nextword  # noqa: E402
from nextword.baselines import DictBigram  # noqa: E402
from nextword.counts import PARALLEL_MIN_BYTES  # noqa: E402
from nextword.text import TOKEN_RE, normalize  # noqa: E402


def make_queries(lines: list[str], n: int, seed: int) -> list[tuple[str, str]]:
    """(kind, text before cursor) pairs: next word, or 1–3 letters into a word, mixed evenly."""
    rng = random.Random(seed)
    out: list[tuple[str, str]] = []
    while len(out) < n:
        text = normalize(rng.choice(lines))
        words = [m for m in TOKEN_RE.finditer(text) if m.lastgroup == "word" and not m.group().isdigit()]
        if not words:
            continue
        m = rng.choice(words)
        j = rng.choice([0, 1, 2, 3])
        if j and len(m.group()) <= j:
            continue
        out.append(("next" if j == 0 else f"prefix{j}", text[: m.start() + j]))
    return out


def percentiles(xs: list[float]) -> dict[str, float]:
    a = np.asarray(xs) * 1e6
    return {
        "p50_us": float(np.percentile(a, 50)),
        "p90_us": float(np.percentile(a, 90)),
        "p99_us": float(np.percentile(a, 99)),
        "max_us": float(a.max()),
        "mean_us": float(a.mean()),
    }


def child_queries(model_path: str, queries_path: str, k: int) -> None:
    """Run in a fresh process: load time, per-query latency, peak RSS of the engine alone."""
    queries = json.loads(Path(queries_path).read_text())
    loads = []
    for _ in range(200):
        t0 = time.perf_counter()
        m = nextword.load(model_path)
        loads.append(time.perf_counter() - t0)
    for _, text in queries[:500]:  # warm-up
        m.suggest(text, k)
    times: dict[str, list[float]] = {}
    all_times = []
    results = []
    for kind, text in queries:
        t0 = time.perf_counter()
        s = m.suggest(text, k)
        dt = time.perf_counter() - t0
        all_times.append(dt)
        times.setdefault(kind, []).append(dt)
        results.append([x.word for x in s])
    t0 = time.perf_counter()
    for _, text in queries:
        m.suggest(text, k)
    qps = len(queries) / (time.perf_counter() - t0)
    # best of 3 per query: the cost of the call itself, without the shared machine's
    # scheduling noise (reported next to the single-call figures, not instead of them)
    best = []
    for _, text in queries:
        b = 1.0
        for _ in range(3):
            t0 = time.perf_counter()
            m.suggest(text, k)
            b = min(b, time.perf_counter() - t0)
        best.append(b)
    out = {
        "load_ms_median": statistics.median(loads) * 1e3,
        "load_ms_max": max(loads) * 1e3,
        "queries": len(queries),
        "latency": percentiles(all_times),
        "latency_by_kind": {kind: percentiles(v) for kind, v in sorted(times.items())},
        "latency_best_of_3": percentiles(best),
        "queries_per_second": qps,
        "peak_rss_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
        "answers": results,
    }
    print(json.dumps(out))


def machine() -> str:
    cpu = "unknown CPU"
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    return f"{cpu}, {os.cpu_count()} cores, Python {platform.python_version()}, numpy {np.__version__}"


def update_results(md: str, marker: str) -> None:
    path = HERE / "RESULTS.md"
    text = path.read_text() if path.exists() else "# Benchmark results\n"
    begin, end = f"<!-- {marker}:begin -->", f"<!-- {marker}:end -->"
    block = f"{begin}\n{md}\n{end}"
    if begin in text and end in text:
        text = text[: text.index(begin)] + block + text[text.index(end) + len(end) :]
    else:
        text = text.rstrip("\n") + "\n\n" + block + "\n"
    tmp = path.with_suffix(".md.tmp")
    tmp.write_text(text)
    os.replace(tmp, path)


def publish(md: str, marker: str, *, write: bool) -> None:
    """Print a benchmark's Markdown section and, unless told not to, put it in RESULTS.md."""
    print(md)
    if write:
        update_results(md, marker)


#: the training settings timed side by side: (label, extra CLI arguments)
TRAIN_SETTINGS = (
    ("default", ()),
    ("--workers 1", ("--workers", "1")),
    ("--workers 0", ("--workers", "0")),
    ("default --max-size 4MB", ("--max-size", "4MB")),
    ("--workers 1 --max-size 4MB", ("--workers", "1", "--max-size", "4MB")),
)


def _train_once(train: Path, out: Path, extra: tuple[str, ...]) -> tuple[float, float, float, dict[str, Any]]:
    """One whole ``nextword train`` process: wall seconds, CPU seconds of it and its
    workers, the largest process's peak RSS so far (MB, from wait4), its JSON report."""
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    t0 = time.perf_counter()
    proc = subprocess.Popen(
        [sys.executable, "-m", "nextword", "train", str(train), "-o", str(out), "--json", *extra],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
    )
    stdout, stderr = proc.communicate()
    wall = time.perf_counter() - t0
    if proc.returncode:
        raise SystemExit(f"bench_core: training failed: {stderr}")
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    cpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    return wall, cpu, after.ru_maxrss / 1024, json.loads(stdout)


def training_runs(train: Path, out_dir: Path, rounds: int) -> dict[str, dict[str, Any]]:
    """Every setting of TRAIN_SETTINGS ``rounds`` times, interleaved (round 1 of each, then
    round 2 …) so the shared machine's load falls on all of them alike."""
    runs: dict[str, dict[str, Any]] = {}
    for r in range(rounds):
        for i, (label, extra) in enumerate(TRAIN_SETTINGS):
            path = out_dir / f"train-{i}.nwm"
            wall, cpu, rss, report = _train_once(train, path, extra)
            item = runs.setdefault(label, {"walls": [], "cpus": [], "path": path, "report": report, "peak_rss_mb": 0.0})
            item["walls"].append(wall)
            item["cpus"].append(cpu)
            if r == 0:
                item["peak_rss_mb"] = rss  # first round: the running maximum is this setting's own or an earlier one's
            item["bytes"] = path.read_bytes()
    return runs


#: input sizes (MB, a prefix of the training text) at which one process and one per core are compared
SWEEP_MB = (1, 2, 4, 8, 16)


def threshold_sweep(train: Path, out_dir: Path, rounds: int) -> list[tuple[int, int, list[float], list[float]]]:
    """For each size of SWEEP_MB: (bytes, words, walls with --workers 1, walls with --workers 0),
    the measurement behind ``PARALLEL_MIN_BYTES``."""
    data = train.read_bytes()
    rows = []
    for mb in SWEEP_MB:
        cut = data.rfind(b"\n", 0, mb << 20) + 1
        part = out_dir / f"sweep-{mb}mb.txt"
        part.write_bytes(data[:cut])
        walls: dict[str, list[float]] = {"1": [], "0": []}
        words = 0
        for _ in range(rounds):
            for w in walls:
                wall, _, _, report = _train_once(part, out_dir / "sweep.nwm", ("--workers", w))
                walls[w].append(wall)
                words = report["word_tokens"]
        rows.append((cut, words, walls["1"], walls["0"]))
        part.unlink()
    return rows


def sweep_markdown(rows: list[tuple[int, int, list[float], list[float]]]) -> str:
    lines = "\n".join(
        f"| {size / 2**20:.1f} MB | {words:,} | {statistics.median(one):.2f} s ({min(one):.2f}–{max(one):.2f}) | "
        f"{statistics.median(par):.2f} s ({min(par):.2f}–{max(par):.2f}) | {statistics.median(one) / statistics.median(par):.2f}× |"
        for size, words, one, par in rows
    )
    return f"""
Where one process per core starts to pay (prefixes of the same text, whole CLI processes,
`--workers 1` and `--workers 0` interleaved; median (min–max)):

| input | words | `--workers 1` | `--workers 0` | speed-up |
|---|---|---|---|---|
{lines}
"""


def training_markdown(runs: dict[str, dict[str, Any]], rounds: int, train: Path) -> str:
    words = runs["default"]["report"]["word_tokens"]
    oracle = {False: runs["--workers 1"]["bytes"], True: runs["--workers 1 --max-size 4MB"]["bytes"]}
    rows = []
    for label, item in runs.items():
        w = sorted(item["walls"])
        med = statistics.median(w)
        same = item["bytes"] == oracle["--max-size" in label]
        rows.append(
            f"| `{label}` | {w[0]:.2f} / {med:.2f} / {w[-1]:.2f} s | {words / med:,.0f} | {words / w[0]:,.0f} | "
            f"{statistics.median(item['cpus']):.2f} s | {len(item['bytes']):,} | {same} |"
        )
    return f"""### Training speed (`bench/bench_core.py`)

Command: `python bench/prepare_corpus.py && python bench/bench_core.py` (`--train-only` for this table alone) — {time.strftime('%Y-%m-%d')}
Machine: {machine()} (shared with other jobs: the spread between rounds is their load).
Each row is the whole `nextword train bench/data/train.txt -o OUT --json [setting]` process
({words:,} words, {runs['default']['report']['messages']:,} messages, {train.stat().st_size / 1e6:.1f} MB), run {rounds} times,
interleaved with the other settings round by round; "same bytes" compares with `--workers 1` (with the
same `--max-size`). Default `workers`: one per core for inputs of at least {PARALLEL_MIN_BYTES >> 20} MB, else one
(`nextword.counts.auto_workers`). Target: ≥ 1M words/s end to end on 2 cores.

| setting | wall min / median / max | words/s (median) | words/s (best) | CPU, all processes (median) | file bytes | same bytes |
|---|---|---|---|---|---|---|
{chr(10).join(rows)}
"""


def figure_files(data: Path = HERE / "data") -> dict[str, tuple[list[Path], list[Path]]]:
    """The figures this script publishes: the model's training files, and the held-out
    file its queries come from (``bench/prepare_corpus.py`` splits them)."""
    return {"core: 5M-word model, queries from held-out text": ([data / "train.txt"], [data / "test.txt"])}


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description="core engine benchmark")
    ap.add_argument("--data", type=Path, default=HERE / "data")
    ap.add_argument("--queries", type=int, default=12_000)
    ap.add_argument("--baseline-queries", type=int, default=600, help="queries for the slow dict baseline")
    ap.add_argument("-k", type=int, default=3)
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--rounds", type=int, default=5, help="fresh query processes; the median one is reported")
    ap.add_argument("--train-rounds", type=int, default=5, help="runs of each training setting (default 5)")
    ap.add_argument("--train-only", action="store_true", help="only the training table")
    ap.add_argument("--no-results", action="store_true", help="do not edit bench/RESULTS.md")
    ap.add_argument("--child", nargs=2, metavar=("MODEL", "QUERIES"), help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.child:
        child_queries(args.child[0], args.child[1], args.k)
        return 0
    train, test = args.data / "train.txt", args.data / "test.txt"
    if not train.exists():
        print("bench_core: run bench/prepare_corpus.py first", file=sys.stderr)
        return 2
    out_dir = HERE / "out"
    out_dir.mkdir(exist_ok=True)
    model_path = out_dir / "core.nwm"

    # 1. training: every setting as a whole CLI process, interleaved over rounds
    runs = training_runs(train, out_dir, args.train_rounds)
    sweep = threshold_sweep(train, out_dir, args.train_rounds)
    publish(training_markdown(runs, args.train_rounds, train) + sweep_markdown(sweep), "train", write=not args.no_results)
    if args.train_only:
        return 0
    default = runs["default"]
    train_wall = statistics.median(default["walls"])
    train_rss = default["peak_rss_mb"]
    report = default["report"]
    os.replace(default["path"], model_path)
    info = nextword.load(model_path).info()

    # 2. queries from held-out text, engine alone in a fresh process
    lines = test.read_text(encoding="utf-8").splitlines()
    queries = make_queries(lines, args.queries, args.seed)
    qpath = out_dir / "queries.json"
    qpath.write_text(json.dumps(queries))
    # several rounds, each a fresh process: the shared machine's noise moves single-call
    # tails by tens of percent between runs, so report the median round and the spread
    rounds = []
    for _ in range(args.rounds):
        proc = subprocess.run(
            [sys.executable, __file__, "--child", str(model_path), str(qpath), "-k", str(args.k)],
            check=True, capture_output=True, text=True,
        )
        rounds.append(json.loads(proc.stdout))
    answers = rounds[0]["answers"]
    if any(r.pop("answers") != answers for r in rounds):
        raise SystemExit("bench_core: rounds disagree on answers")
    p99s = [r["latency"]["p99_us"] for r in rounds]
    rounds.sort(key=lambda r: r["latency"]["p99_us"])
    engine = rounds[len(rounds) // 2]

    # 3. the plain-dict implementation of the same formula, same queries (a subset: it is slow)
    t0 = time.perf_counter()
    with open(train, encoding="utf-8") as f:
        base = DictBigram(f)
    base_fit = time.perf_counter() - t0
    model = nextword.load(model_path)
    gc.collect()
    gc.freeze()  # the baseline's millions of objects would otherwise slow every GC pass
    sub = queries[: args.baseline_queries]
    bt, et, agree = [], [], 0
    for i, (_, text) in enumerate(sub):
        t0 = time.perf_counter()
        want = base.suggest_keys(text, args.k, model.lam)
        bt.append(time.perf_counter() - t0)
        t0 = time.perf_counter()
        model.suggest(text, args.k)
        et.append(time.perf_counter() - t0)
        got = [nextword.text.fold(w) for w in answers[i]]
        agree += got == [w for w, _ in want]
    base_lat, eng_lat = percentiles(bt), percentiles(et)

    res: dict[str, Any] = {
        "machine": machine(),
        "corpus_words": report["word_tokens"],
        "corpus_messages": report["messages"],
        "train_seconds": train_wall,
        "train_words_per_second": report["word_tokens"] / train_wall,
        "train_peak_rss_mb": train_rss,
        "file_bytes": info["file_bytes"],
        "vocabulary": info["vocabulary"],
        "bigrams": info["bigrams"],
        "bytes_per_bigram": info["bytes_per_bigram"],
        "engine": engine,
        "engine_p99_by_round": p99s,
        "baseline": {
            "fit_seconds": base_fit,
            "queries": len(sub),
            "latency": base_lat,
            "engine_latency_same_queries": eng_lat,
            "median_ratio": base_lat["p50_us"] / eng_lat["p50_us"],
            "p99_ratio": base_lat["p99_us"] / eng_lat["p99_us"],
            "identical_rankings": agree,
        },
    }
    (out_dir / "core.json").write_text(json.dumps(res, indent=2))
    lat = engine["latency"]
    b3 = engine["latency_best_of_3"]
    by_kind = "\n".join(
        f"| {kind} | {v['p50_us']:.1f} | {v['p99_us']:.1f} | {v['max_us']:.0f} |"
        for kind, v in engine["latency_by_kind"].items()
    )
    md = f"""### Core engine (`bench/bench_core.py`)

Command: `python bench/prepare_corpus.py && python bench/bench_core.py` — {time.strftime('%Y-%m-%d')}
Machine: {res['machine']} (shared, noisy; compare ratios within one run).

| figure | value | target |
|---|---|---|
| training corpus | {res['corpus_words']:,} words, {res['corpus_messages']:,} messages (GCIDE, FOLDOC, Jargon File, fortunes) | ≥ 5M words |
| training time (whole CLI process, default settings, median of {args.train_rounds}) | {train_wall:.1f} s = {res['train_words_per_second']:,.0f} words/s (every setting: "Training speed" below) | ≥ 1M words/s |
| training peak RSS (largest process) | {train_rss:,.0f} MB | |
| model | {res['vocabulary']:,} words, {res['bigrams']:,} bigrams, {res['file_bytes']:,} bytes | |
| bytes per stored bigram (whole file / bigrams) | {res['bytes_per_bigram']:.2f} | ≤ 4 |
| load time, median of 200 (max) | {engine['load_ms_median']:.3f} ms ({engine['load_ms_max']:.3f} ms) | ≤ 5 ms |
| suggest latency over {engine['queries']:,} held-out queries, k={args.k}, single calls (median of {args.rounds} rounds by p99): p50 / p90 / p99 / max | {lat['p50_us']:.1f} / {lat['p90_us']:.1f} / {lat['p99_us']:.1f} / {lat['max_us']:.0f} µs | p99 ≤ 100 µs |
| p99 of single calls in each round | {' / '.join(f'{x:.0f}' for x in p99s)} µs | |
| same queries, best of 3 calls each: p50 / p90 / p99 / max | {b3['p50_us']:.1f} / {b3['p90_us']:.1f} / {b3['p99_us']:.1f} / {b3['max_us']:.0f} µs | |
| throughput (one thread) | {engine['queries_per_second']:,.0f} queries/s | |
| query process peak RSS (engine alone) | {engine['peak_rss_mb']:.0f} MB | |
| plain-dict baseline, same {len(sub)} queries: p50 / p99 | {base_lat['p50_us']:,.0f} / {base_lat['p99_us']:,.0f} µs vs engine {eng_lat['p50_us']:.1f} / {eng_lat['p99_us']:.1f} µs | |
| **speed-up over the dict baseline (p50 / p99 ratio)** | **{res['baseline']['median_ratio']:,.0f}× / {res['baseline']['p99_ratio']:,.0f}×** | |
| rankings identical to the baseline's full scoring | {agree} of {len(sub)} | all |
| dict baseline fit time | {base_fit:.1f} s | |

Latency by query kind (µs):

| kind | p50 | p99 | max |
|---|---|---|---|
{by_kind}
"""
    publish(md, "core", write=not args.no_results)
    return 0


if __name__ == "__main__":
    sys.exit(main())
