"""Load test of the local service (``nextword serve``): throughput, latency, and no lost or wrong answers.

Starts the server as its own process on a Unix socket (loopback only), then for 1, 4 and
16 concurrent clients — separate processes, one persistent connection each, one request
at a time, as an input method would — sends ``suggest`` requests built from held-out
text positions. Every answer is compared with ``Model.suggest`` called in this process on
the same model (words and probabilities exactly), and every request must be answered.
The in-process call on the same queries is timed in the same run, side by side, so the
service's cost per request reads as a ratio, not a figure from another day.

Model and queries: ``bench/out/core.nwm`` with ``bench/data/test.txt`` (made by
``bench/prepare_corpus.py`` and ``bench/bench_core.py``) when present; otherwise the demo
corpus is trained into ``bench/out/serve_demo.nwm`` without every tenth message, and
those messages are the held-out text. Bounded: at most ``--requests`` per level and
``--seconds`` per level (the whole run stays under about two minutes).

    python bench/bench_serve.py            # writes bench/out/serve.json and the serve section of bench/RESULTS.md
"""

from __future__ import annotations

import argparse
import json
import multiprocessing as mp
import os
import shutil
import signal
import socket
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
sys.path.insert(0, str(HERE))
sys.path.insert(0, str(ROOT))

import nextword  # noqa: E402
from bench_core import machine, make_queries, percentiles, publish  # noqa: E402


def model_and_heldout(out_dir: Path) -> tuple[Path, list[str], str]:
    """The benchmark model and held-out lines, and a sentence saying where they came from."""
    core, test = out_dir / "core.nwm", HERE / "data" / "test.txt"
    if core.exists() and test.exists():
        lines = [ln for ln in test.read_text(encoding="utf-8").splitlines() if ln.strip()]
        return core, lines, "`bench/out/core.nwm` (the core benchmark's model), queries from `bench/data/test.txt`"
    demo = ROOT / "examples" / "data" / "demo_messages.txt"
    lines = [ln for ln in demo.read_text(encoding="utf-8").splitlines() if ln.strip()]
    train, held = [ln for i, ln in enumerate(lines) if i % 10], [ln for i, ln in enumerate(lines) if not i % 10]
    path = out_dir / "serve_demo.nwm"
    out_dir.mkdir(parents=True, exist_ok=True)
    nextword.train_texts(train, path)
    return path, held, "the demo corpus without every tenth message (`bench/out/serve_demo.nwm`), queries from those messages"


def client(sock_path: str, requests: list[tuple[int, str]], k: int, deadline_s: float, barrier: Any, results: Any) -> None:
    """One client process: one connection, one request at a time; reports answers and latencies."""
    s = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    s.settimeout(60.0)
    s.connect(sock_path)
    f = s.makefile("rb")
    answers: dict[int, Any] = {}
    lat: list[float] = []
    barrier.wait()
    start = time.perf_counter()
    stop_at = start + deadline_s
    sent = 0
    try:
        for rid, text in requests:
            if time.perf_counter() > stop_at:
                break
            line = (json.dumps({"id": rid, "op": "suggest", "text": text, "k": k}, ensure_ascii=False) + "\n").encode()
            t0 = time.perf_counter()
            s.sendall(line)
            sent += 1
            reply = f.readline()
            lat.append(time.perf_counter() - t0)
            if not reply:
                break
            obj = json.loads(reply)
            answers[obj.get("id")] = obj
    except OSError:
        pass
    end = time.perf_counter()
    s.close()
    results.put({"sent": sent, "answers": answers, "latencies": lat, "start": start, "end": end})


def run_level(sock_path: str, queries: list[str], n_clients: int, n_requests: int, seconds: float, k: int,
              truth: list[list[tuple[str, float]]]) -> dict[str, Any]:
    ctx = mp.get_context("fork")
    barrier = ctx.Barrier(n_clients)
    results = ctx.Queue()
    per = n_requests // n_clients
    procs = []
    for c in range(n_clients):
        ids = [(c * per + i) % len(queries) for i in range(per)]
        reqs = [(c * per + i, queries[q]) for i, q in zip(range(per), ids)]
        p = ctx.Process(target=client, args=(sock_path, reqs, k, seconds, barrier, results))
        p.start()
        procs.append(p)
    got = [results.get(timeout=seconds + 120) for _ in procs]
    for p in procs:
        p.join(60)
    sent = sum(g["sent"] for g in got)
    answered = sum(len(g["answers"]) for g in got)
    wrong = 0
    for g in got:
        for rid, obj in g["answers"].items():
            q = rid % len(queries)
            pairs = [(s["word"], s["prob"]) for s in obj.get("suggestions", [])] if obj.get("ok") else None
            if pairs != truth[q]:
                wrong += 1
    lat = [x for g in got for x in g["latencies"]]
    wall = max(g["end"] for g in got) - min(g["start"] for g in got)
    return {
        "clients": n_clients,
        "sent": sent,
        "answered": answered,
        "lost": sent - answered,
        "wrong": wrong,
        "seconds": wall,
        "requests_per_second": answered / wall if wall > 0 else 0.0,
        "latency": percentiles(lat),
    }


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description="load test of nextword serve")
    ap.add_argument("--clients", type=int, nargs="+", default=[1, 4, 16, 64])
    ap.add_argument("--requests", type=int, default=8000, help="requests per level (split among its clients)")
    ap.add_argument("--seconds", type=float, default=20.0, help="time cap per level")
    ap.add_argument("--queries", type=int, default=4000, help="distinct held-out queries")
    ap.add_argument("-k", type=int, default=3)
    ap.add_argument("--seed", type=int, default=3)
    ap.add_argument("--no-results", action="store_true", help="do not edit bench/RESULTS.md")
    args = ap.parse_args(argv)

    t_all = time.perf_counter()
    out_dir = HERE / "out"
    model_path, held, source = model_and_heldout(out_dir)
    model = nextword.load(model_path)
    queries = [text for _, text in make_queries(held, args.queries, args.seed)]
    truth = [[(s.word, s.prob) for s in model.suggest(q, args.k)] for q in queries]

    # the in-process call on the same queries, in this run: warm-up, then single timed calls
    for q in queries[:500]:
        model.suggest(q, args.k)
    inproc = []
    for q in queries:
        t0 = time.perf_counter()
        model.suggest(q, args.k)
        inproc.append(time.perf_counter() - t0)
    inproc_p = percentiles(inproc)

    tmp = Path(tempfile.mkdtemp(prefix="nwb"))
    sock = tmp / "s.sock"
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    server = subprocess.Popen(
        [sys.executable, "-m", "nextword", "serve", str(model_path), "--socket", str(sock), "--max-clients", "64"],
        stdout=subprocess.PIPE, text=True, env=env,
    )
    try:
        assert server.stdout is not None
        ready = json.loads(server.stdout.readline())
        assert ready["event"] == "ready", ready
        # warm the server (page in the model, start-up costs) before measuring
        run_level(str(sock), queries, 1, 500, 10.0, args.k, truth)
        levels = [run_level(str(sock), queries, n, args.requests, args.seconds, args.k, truth) for n in args.clients]
    finally:
        server.send_signal(signal.SIGTERM)
        out, _ = server.communicate(timeout=60)
        shutil.rmtree(tmp, ignore_errors=True)
    stopped = json.loads(out.splitlines()[-1])

    total = time.perf_counter() - t_all
    data = {
        "model": str(model_path), "source": source, "queries": len(queries), "k": args.k,
        "in_process": {**inproc_p, "calls_per_second": len(inproc) / sum(inproc)},
        "levels": levels, "server_exit": server.returncode, "server_stop": stopped, "seconds": total,
        "machine": machine(),
    }
    (out_dir / "serve.json").write_text(json.dumps(data, indent=2))

    p50_in = inproc_p["p50_us"]
    rows = []
    for lv in levels:
        lat = lv["latency"]
        rows.append(
            f"| {lv['clients']} | {lv['answered']:,} / {lv['sent']:,} | {lv['lost']} | {lv['wrong']} | "
            f"{lv['requests_per_second']:,.0f} | {lat['p50_us']:.0f} / {lat['p99_us']:.0f} µs | "
            f"{lat['p50_us'] / p50_in:.1f}× |"
        )
    cmd = "python bench/bench_serve.py" + (" " + " ".join(argv) if argv else "")
    md = "\n".join([
        "### Local service (`bench/bench_serve.py`)",
        "",
        f"Command: `{cmd}` — {time.strftime('%Y-%m-%d')}",
        f"Machine: {machine()}.",
        f"Model: {source}; {model.n_words:,} words, {model.n_bigrams:,} bigrams. {len(queries):,} distinct held-out",
        f"queries (next word and 1–3 letters into a word, mixed), k = {args.k}. Server: `nextword serve` in its own process",
        "on a Unix socket; clients: separate processes, one persistent connection each, one request at a time",
        "(send, wait for the answer), all on the same 2-core machine as the server. Every answer compared with",
        f"`Model.suggest` in the benchmark process (words and probabilities exactly). Total {total:.1f} s.",
        "",
        "| clients | answered / sent | lost | wrong | requests/s | latency p50 / p99 | p50 vs in-process |",
        "|---|---|---|---|---|---|---|",
        *rows,
        "",
        f"In-process `Model.suggest`, same queries, same run (single calls): p50 {p50_in:.1f} µs / p99 "
        f"{inproc_p['p99_us']:.1f} µs, {data['in_process']['calls_per_second']:,.0f} calls/s on one thread.",
        "The server answers from one Python process (threads share one interpreter lock), so its throughput is about",
        "one core's worth whatever the number of clients; past that, each client waits its turn and latency grows with",
        f"the queue (clients / throughput: {levels[-1]['clients']} / {levels[-1]['requests_per_second']:,.0f} per s = "
        f"{1e3 * levels[-1]['clients'] / max(levels[-1]['requests_per_second'], 1e-9):.1f} ms at the last level).",
        f"Server stop (SIGTERM): exit status {server.returncode}, {stopped['requests']:,} requests answered in all,"
        f" {stopped['connections_cut']} connections cut.",
        "",
    ])
    publish(md, "serve", write=not args.no_results)
    return 0 if all(lv["lost"] == 0 and lv["wrong"] == 0 for lv in levels) and server.returncode == 0 else 1


if __name__ == "__main__":
    sys.exit(main())
