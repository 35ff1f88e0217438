"""The native C runtime (native/) against the Python library, side by side in one run.

On the 5M-word corpus (``bench/data/{train,test}.txt`` from ``prepare_corpus.py``) a JM bigram
(the defaults), a KN trigram and the same KN trigram quantised to 5 bits (format 1.5, the
``quant`` codec; compare its row with the exact one) are trained with ``nextword.build.train``; the first
``--queries`` typed texts of the held-out part (the keystroke simulation's own queries,
``baselines.sample_queries``) are answered by ``Model.suggest`` and by the C library
(``nwsuggest --bench``, which times each call with a monotonic clock in the same process as
the library), in this one run, on the same files. Also: open time (mmap + every load-time
check, median of 21 opens) against ``nextword.load``, the RSS of the C process with the
model open after all queries, and the answers compared word for word.

The fourth row is the same 5-bit KN trigram with its successor lists coded by chunked Elias-Fano
(format 1.6, ``--compact``; docs/FORMAT.md §7.18): compare it with the 1.5 row (same values, other
list layout) for the cost of decoding the lists in C and Python, and for the smaller file.

The last row is the mixture of the first two (a ``.nwx`` file, weights 0.3 / 0.7): the C library
opens it with ``nw_open`` and answers as ``nextword.mix.MixedModel.suggest`` (timed against
``load_mix(...).suggest`` on the same queries, in the same run). Its open time includes
what ``load_mix`` does too: the SHA-256 of both parts and the union vocabulary.

    python bench/prepare_corpus.py && python bench/bench_native.py

Targets (issue 16): C p50/p99 ≤ 5/20 µs and ≥ 5× faster than Python in the same run; open ≤ 1 ms.
"""

from __future__ import annotations

import argparse
import ctypes
import json
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
sys.path.insert(0, str(HERE))

from bench_core import machine, publish  # noqa: E402

import nextword  # noqa: E402
from nextword.baselines import sample_queries, time_queries  # noqa: E402
from nextword.mix import load_mix, write_mix  # noqa: E402

DATA = HERE / "data"
MODELS: tuple[tuple[str, dict[str, Any]], ...] = (
    ("JM bigram (defaults)", {}),
    ("KN trigram", {"order": 3, "smoothing": "kn"}),
    ("KN trigram, quantised 5 bits (format 1.5)", {"order": 3, "smoothing": "kn", "quantize": 5}),
    ("KN trigram, quantised 5 bits, compact (format 1.6)", {"order": 3, "smoothing": "kn", "quantize": 5, "compact": True}),
)
#: the mixture row: the two models above, mixed with these weights
MIX_WEIGHTS = (0.3, 0.7)


def figure_files(data: Path = DATA) -> dict[str, tuple[list[Path], list[Path]]]:
    """The figures this script publishes: the models' training file and the held-out file of the queries."""
    return {"native: 5M-word models, queries from held-out text": ([data / "train.txt"], [data / "test.txt"])}


def _percentile(xs: list[float], q: float) -> float:
    s = sorted(xs)
    return s[min(len(s) - 1, int(len(s) * q))]


def build(out: Path) -> Path:
    """The library and nwsuggest, from source (native/Makefile)."""
    subprocess.run(["make", "-s", "-C", str(ROOT / "native"), f"BUILD={out}"], check=True, capture_output=True)
    return out


def same_answers(lib_path: Path, model_path: Path, model: Any, queries: list[str], k: int) -> int:
    """How many queries the C library answers exactly as Model.suggest (words and probabilities)."""
    lib = ctypes.CDLL(str(lib_path))

    class Sugg(ctypes.Structure):
        _fields_ = [("word", ctypes.c_char_p), ("len", ctypes.c_size_t), ("prob", ctypes.c_double)]

    m, s = ctypes.c_void_p(), ctypes.c_void_p()
    assert lib.nw_open(str(model_path).encode(), ctypes.byref(m), None) == 0
    assert lib.nw_session_new(m, ctypes.byref(s), None) == 0
    out, buf, n = (Sugg * 64)(), ctypes.create_string_buffer(1 << 14), ctypes.c_size_t()
    same = 0
    for q in queries:
        data = q.encode()
        lib.nw_suggest(s, data, ctypes.c_size_t(len(data)), k, out, ctypes.byref(n), buf, ctypes.c_size_t(len(buf)), None)
        ours = [(out[i].word[: out[i].len].decode(), out[i].prob) for i in range(n.value)]
        same += ours == [(x.word, x.prob) for x in model.suggest(q, k)]
    lib.nw_session_free(s)
    lib.nw_close(m)
    return same


def measure(label: str, path: Path, queries: list[str], qfile: Path, tools: Path, k: int, rounds: int) -> dict[str, Any]:
    """One row: the model file or mixture at ``path``, Python against C on the same queries."""
    mixture = path.suffix == ".nwx"
    loads = []
    for _ in range(5 if mixture else 21):  # a mixture's open reads both parts (SHA-256): fewer opens
        t0 = time.perf_counter()
        model: Any = load_mix(path) if mixture else nextword.load(path)
        loads.append(time.perf_counter() - t0)
    for q in queries:  # warm, as the C side's first round
        model.suggest(q, k)
    py = [time_queries(lambda q: model.suggest(q, k), queries) for _ in range(rounds)]
    c = []
    for _ in range(rounds):
        proc = subprocess.run([str(tools / "nwsuggest"), "--bench", "-k", str(k), str(path), str(qfile)],
                              capture_output=True, text=True, check=True)
        c.append(json.loads(proc.stdout))
    py_p50 = statistics.median(_percentile(t, 0.5) * 1e6 for t in py)
    py_p99 = statistics.median(_percentile(t, 0.99) * 1e6 for t in py)
    c_p50 = statistics.median(r["p50_us"] for r in c)
    c_p99 = statistics.median(r["p99_us"] for r in c)
    # a model file's version from the model itself (Model.info() does not describe a 1.6 file's sections yet)
    version = "mixture 1.0" if mixture else ".".join(map(str, model.format_version))
    return {
        "label": label, "file_bytes": model.info()["file_bytes"] if mixture else path.stat().st_size,
        "version": version,
        "py_p50": py_p50, "py_p99": py_p99, "c_p50": c_p50, "c_p99": c_p99, "c_max": statistics.median(r["max_us"] for r in c),
        "c_open_ms": statistics.median(r["open_ms"] for r in c), "py_load_ms": statistics.median(loads) * 1e3,
        "rss_kb": statistics.median(r["rss_kb"] for r in c), "rss_before_kb": statistics.median(r["rss_kb_before_open"] for r in c),
        "same": same_answers(tools / "libnextword.so", path, model, queries, k), "queries": len(queries),
    }


def table(rows: list[dict[str, Any]]) -> str:
    out = ["| model | file | C p50 / p99 / max | Python p50 / p99 | speed-up p50 / p99 | C open (median of 21) | "
           "Python load | RSS of the C process (before open → model open, all queries asked) | same answers |",
           "|---|---|---|---|---|---|---|---|---|"]
    for r in rows:
        out.append(
            f"| {r['label']} | {r['file_bytes'] / 1e6:.2f} MB (format {r['version']}) | "
            f"{r['c_p50']:.2f} / {r['c_p99']:.2f} / {r['c_max']:.0f} µs | {r['py_p50']:.1f} / {r['py_p99']:.1f} µs | "
            f"{r['py_p50'] / r['c_p50']:.1f}× / {r['py_p99'] / r['c_p99']:.1f}× | {r['c_open_ms']:.3f} ms | "
            f"{r['py_load_ms']:.3f} ms | {r['rss_before_kb'] / 1024:.1f} → {r['rss_kb'] / 1024:.1f} MB | "
            f"{r['same']:,} of {r['queries']:,} |"
        )
    return "\n".join(out)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description="the native C runtime against Model.suggest, side by side")
    ap.add_argument("--queries", type=int, default=12000, help="held-out typed texts (default 12000)")
    ap.add_argument("-k", type=int, default=3, help="suggestions per query (default 3)")
    ap.add_argument("--rounds", type=int, default=3, help="timed rounds per side; medians reported (default 3)")
    ap.add_argument("--data", type=Path, default=DATA, help="directory with train.txt and test.txt")
    ap.add_argument("--rows", default=None,
                    help="comma-separated model rows to run (0-based, default all; the mixture needs rows 0 and 1)")
    ap.add_argument("--no-results", action="store_true", help="do not edit bench/RESULTS.md")
    args = ap.parse_args(argv)
    shown = argv if argv is not None else sys.argv[1:]
    train, test = args.data / "train.txt", args.data / "test.txt"
    if not train.exists():
        print("bench_native: run bench/prepare_corpus.py first", file=sys.stderr)
        return 2
    held = test.read_text(encoding="utf-8").splitlines()
    queries = [q for q in sample_queries(held, args.queries) if "\n" not in q]
    with tempfile.TemporaryDirectory(prefix="nextword-native-") as t:
        tmp = Path(t)
        tools = build(tmp / "build")
        qfile = tmp / "queries.txt"
        qfile.write_text("".join(q + "\n" for q in queries), encoding="utf-8")
        chosen = sorted({int(x) for x in args.rows.split(",")}) if args.rows else list(range(len(MODELS)))
        paths: dict[int, Path] = {}
        for i in chosen:
            paths[i] = tmp / f"model{i}.nwm"
            nextword.train(train, paths[i], **MODELS[i][1])
        rows = [measure(MODELS[i][0], paths[i], queries, qfile, tools, args.k, args.rounds) for i in chosen]
        if 0 in paths and 1 in paths:
            write_mix(tmp / "mix.nwx", [paths[0], paths[1]], list(MIX_WEIGHTS))  # the exact JM bigram and KN trigram
            mix_label = f"mixture {MIX_WEIGHTS[0]} × JM bigram + {MIX_WEIGHTS[1]} × KN trigram (.nwx)"
            rows.append(measure(mix_label, tmp / "mix.nwx", queries, qfile, tools, args.k, args.rounds))
    md = f"""### Native C runtime against the Python library (`bench/bench_native.py`)

Command: `python bench/prepare_corpus.py && python bench/bench_native.py{' ' + ' '.join(shown) if shown else ''}` — {time.strftime('%Y-%m-%d')}
Machine: {machine()} (shared; compare within the table). {len(queries):,} held-out typed texts
(`baselines.sample_queries`), k = {args.k}, single calls, median of {args.rounds} rounds per side in this one run;
C timed inside its process (`nwsuggest --bench`, built with native/Makefile, -O2), Python with `time_queries`.
Targets: C p50/p99 ≤ 5/20 µs and ≥ 5× faster than Python; open (mmap + load-time checks) ≤ 1 ms; no heap
allocation per query (tests/test_native.py counts them: 0). The mixture row's "file" is both parts plus the
.nwx; its open (C and Python alike) reads both parts for their SHA-256 and builds the union vocabulary, so the
1 ms open target is for model files only.

{table(rows)}
"""
    publish(md, "native", write=not args.no_results)
    return 0


if __name__ == "__main__":
    sys.exit(main())
