"""Memory of the local service with many users: the open-layer cap (``--max-open-users``) side by side.

A server that meets many users over its life used to keep every personal layer in
memory. This starts ``nextword serve`` once per cap, in the same run, on the same model
and the same users' texts, and for each:

1. each of ``--users`` users sends one ``learn`` (a chunk of held-out text, a few hundred
   words, different for each user); the server's resident memory (VmRSS from
   /proc/PID/status) is sampled after 0, 250, 500, 1000 and 2000 users, and its peak (VmHWM)
   at the end;
2. then every user asks one ``suggest`` in the same order (with a cap, every one of those
   reopens a closed layer from its file), timed: the price of the cap in requests/s;
3. the ``suggest`` answers of every server must be identical (words and probabilities):
   a capped server answers exactly what the uncapped one does.

Beside it, in a child process, the memory of one full layer (``max_entries`` = 65,536
counts, the layer's own cap) measured with tracemalloc, so the per-user figure of a heavy
user is a measurement too.

Text: ``bench/data/test.txt`` (``bench/prepare_corpus.py``) when present, else the demo
messages; model: ``bench/out/core.nwm`` when present, else the demo corpus trained into
``bench/out/serve_demo.nwm``.

    python bench/bench_serve_users.py       # writes bench/out/serve_users.json and its section of bench/RESULTS.md
"""

from __future__ import annotations

import argparse
import json
import multiprocessing as mp
import os
import random
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
from bench_core import machine, publish  # noqa: E402

UNCAPPED = 1_000_000  # more than any run's users: nothing is ever closed


def texts_and_model(out_dir: Path) -> tuple[Path, list[str], str]:
    test = HERE / "data" / "test.txt"
    core = out_dir / "core.nwm"
    demo = ROOT / "examples" / "data" / "demo_messages.txt"
    out_dir.mkdir(parents=True, exist_ok=True)
    if core.exists():
        model, model_src = core, "`bench/out/core.nwm`"
    else:
        model = out_dir / "serve_demo.nwm"
        if not model.exists():
            nextword.train(demo, model)
        model_src = "the demo corpus (`bench/out/serve_demo.nwm`)"
    source = test if test.exists() else demo
    lines = [ln for ln in source.read_text(encoding="utf-8").splitlines() if ln.strip()]
    return model, lines, f"model {model_src}; users' text from `{source.relative_to(ROOT)}`"


def user_texts(lines: list[str], n_users: int, words: int, seed: int) -> list[str]:
    """One chunk of about ``words`` words per user: consecutive lines from a random start."""
    rng = random.Random(seed)
    out = []
    for _ in range(n_users):
        i = rng.randrange(len(lines))
        chunk: list[str] = []
        count = 0
        while count < words:
            line = lines[i % len(lines)]
            chunk.append(line)
            count += len(line.split())
            i += 1
        out.append(" ".join(chunk))
    return out


def rss_kib(pid: int) -> dict[str, int]:
    out = {}
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        key, _, value = line.partition(":")
        if key in ("VmRSS", "VmHWM"):
            out[key] = int(value.split()[0])
    return out


class Conn:
    def __init__(self, path: Path) -> None:
        self.sock = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
        self.sock.settimeout(120.0)
        self.sock.connect(str(path))
        self.file = self.sock.makefile("rb")

    def call(self, **req: Any) -> dict[str, Any]:
        self.sock.sendall((json.dumps(req, ensure_ascii=False) + "\n").encode())
        answer = json.loads(self.file.readline())
        assert isinstance(answer, dict)
        return answer

    def close(self) -> None:
        self.file.close()
        self.sock.close()


def run_server(model: Path, cap: int, texts: list[str], queries: list[str], checkpoints: list[int]) -> dict[str, Any]:
    tmp = Path(tempfile.mkdtemp(prefix="nwu"))
    sock, users = tmp / "s.sock", tmp / "users"
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    proc = subprocess.Popen(
        [sys.executable, "-m", "nextword", "serve", str(model), "--socket", str(sock), "--users", str(users),
         "--max-open-users", str(cap)],
        stdout=subprocess.PIPE, text=True, env=env,
    )
    try:
        assert proc.stdout is not None
        assert json.loads(proc.stdout.readline())["event"] == "ready"
        c = Conn(sock)
        for q in queries[:200]:  # page in the model and warm the interpreter before the baseline
            c.call(op="suggest", text=q)
        samples = [{"users": 0, **rss_kib(proc.pid)}]
        entries = 0
        t0 = time.perf_counter()
        for i, text in enumerate(texts, 1):
            answer = c.call(op="learn", user=f"user{i:05d}", text=text)
            assert answer["ok"], answer
            entries += answer["entries"]
            if i in checkpoints:
                samples.append({"users": i, **rss_kib(proc.pid)})
        learn_s = time.perf_counter() - t0
        answers = []
        t0 = time.perf_counter()
        for i, q in enumerate(queries[: len(texts)], 1):
            answer = c.call(op="suggest", user=f"user{i:05d}", text=q)
            assert answer["ok"], answer
            answers.append(answer["suggestions"])
        suggest_s = time.perf_counter() - t0
        end = rss_kib(proc.pid)
        c.close()
    finally:
        proc.send_signal(signal.SIGTERM)
        out, _ = proc.communicate(timeout=120)
        shutil.rmtree(tmp, ignore_errors=True)
    stopped = json.loads(out.splitlines()[-1])
    return {
        "cap": cap, "samples": samples, "peak_kib": end["VmHWM"], "end_kib": end["VmRSS"],
        "mean_entries": entries / len(texts), "learn_per_s": len(texts) / learn_s,
        "suggest_per_s": len(texts) / suggest_s, "answers": answers, "exit": proc.returncode, "stop": stopped,
    }


def full_layer(model: str, text: str, q: Any) -> None:
    """Child process: memory of one layer filled to its own cap of counts, by tracemalloc."""
    import tracemalloc

    from nextword.personal import PersonalLayer

    base = nextword.load(model)
    tracemalloc.start()
    layer = PersonalLayer(base)
    words = text.split()
    i = 0
    while layer.entries < 0.85 * layer.max_entries and i < len(words):
        layer.learn(" ".join(words[i : i + 2000]))
        i += 2000
    layer.suggest("the ", 3)
    current, _ = tracemalloc.get_traced_memory()
    q.put({"entries": layer.entries, "max_entries": layer.max_entries, "bytes": current, "words_learned": i})


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description="memory of nextword serve with many users, with and without the open-layer cap")
    ap.add_argument("--users", type=int, default=2000)
    ap.add_argument("--words", type=int, default=300, help="words each user learns (one learn request)")
    ap.add_argument("--caps", type=int, nargs="+", default=[UNCAPPED, 256, 32], help=f"--max-open-users values ({UNCAPPED} = no cap)")
    ap.add_argument("--seed", type=int, default=5)
    ap.add_argument("--no-results", action="store_true", help="do not edit bench/RESULTS.md")
    args = ap.parse_args(argv)

    t_all = time.perf_counter()
    out_dir = HERE / "out"
    model, lines, source = texts_and_model(out_dir)
    texts = user_texts(lines, args.users, args.words, args.seed)
    rng = random.Random(args.seed + 1)
    queries = []
    for text in texts:  # a next-word query from inside the user's own text
        words = text.split()
        queries.append(" ".join(words[: rng.randrange(1, len(words))]) + " ")
    checkpoints = sorted({c for c in (250, 500, 1000, 2000, args.users) if c <= args.users})

    ctx = mp.get_context("spawn")
    q = ctx.Queue()
    child = ctx.Process(target=full_layer, args=(str(model), "\n".join(lines[:40000]), q))
    child.start()
    full = q.get(timeout=1200)
    child.join(60)

    runs = [run_server(model, cap, texts, queries, checkpoints) for cap in args.caps]
    same = all(r["answers"] == runs[0]["answers"] for r in runs)
    total = time.perf_counter() - t_all
    for r in runs:
        r.pop("answers")
    data = {"source": source, "users": args.users, "words": args.words, "full_layer": full, "runs": runs,
            "answers_identical": same, "seconds": total, "machine": machine()}
    (out_dir / "serve_users.json").write_text(json.dumps(data, indent=2))

    def mib(kib: float) -> str:
        return f"{kib / 1024:,.0f}"

    name = {UNCAPPED: "no cap"}
    head = "| `--max-open-users` | " + " | ".join(f"RSS after {c:,} users" for c in [0, *checkpoints]) + \
        " | peak | growth per user | learn/s | reopening suggest/s |"
    rows = []
    for r in runs:
        by = {s["users"]: s["VmRSS"] for s in r["samples"]}
        per = (by[checkpoints[-1]] - by[0]) / checkpoints[-1]
        label = name.get(r["cap"], f"{r['cap']:,}")
        rows.append(
            f"| {label} | "
            + " | ".join(f"{mib(by[c])} MiB" for c in [0, *checkpoints])
            + f" | {mib(r['peak_kib'])} MiB | {per:,.0f} KiB | {r['learn_per_s']:,.0f} | {r['suggest_per_s']:,.0f} |"
        )
    cmd = "python bench/bench_serve_users.py" + (" " + " ".join(argv) if argv else "")
    md = "\n".join([
        "### Local service: memory with many users (`bench/bench_serve_users.py`)",
        "",
        f"Command: `{cmd}` — {time.strftime('%Y-%m-%d')}",
        f"Machine: {machine()}.",
        f"{source}. {args.users:,} users, each sends one `learn` of about {args.words} words (a different chunk each;",
        f"{runs[0]['mean_entries']:,.0f} counts per layer on average), then one `suggest` each in the same order. One",
        "`nextword serve` process per cap, one after another in this run, same texts; resident memory of the server",
        f"(VmRSS; peak = VmHWM). Total {total:.0f} s.",
        "",
        head,
        "|" + "---|" * (len([0, *checkpoints]) + 5),
        *rows,
        "",
        f"Answers of every server identical (every user's `suggest`, words and probabilities): {'yes' if same else 'NO'}.",
        "With a cap, memory stops growing once the cap is reached; without one it grows with every user met. The",
        "`suggest` pass reopens a closed layer from its file for every user when capped (its cost is the last column).",
        f"One full layer ({full['entries']:,} counts of the {full['max_entries']:,} a layer keeps, after learning "
        f"{full['words_learned']:,} words) holds {full['bytes'] / 2**20:.1f} MiB (tracemalloc, child process):",
        f"without the cap, {args.users:,} heavy users would hold about {args.users * full['bytes'] / 2**30:.1f} GiB.",
        "",
    ])
    publish(md, "serve_users", write=not args.no_results)
    return 0 if same and all(r["exit"] == 0 for r in runs) else 1


if __name__ == "__main__":
    sys.exit(main())
