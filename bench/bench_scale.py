"""Scale: a 100-million-word corpus trained under a memory cap, on every core and on one.

The corpus is synthetic (Zipf-distributed invented words — what matters here is size and
the number of distinct pairs, not meaning), generated at run time into bench/data/
(git-ignored). Both trainings run as subprocesses so their peak RSS is their own; the two
model files must be identical. Figures go into bench/RESULTS.md between the ``scale``
markers.

    python bench/bench_scale.py            # about 10 minutes on 2 cores; needs /usr/bin/time (Debian: time)
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

from bench_core import machine, publish  # noqa: E402


def make_corpus(path: Path, words: int, vocab: int, seed: int = 7) -> None:
    rng = np.random.default_rng(seed)
    names = np.array([f"w{i:x}" for i in range(vocab)])
    p = 1.0 / np.arange(1, vocab + 1) ** 1.05
    p /= p.sum()
    with open(path, "w", encoding="utf-8") as f:
        done = 0
        while done < words:
            n = min(2_000_000, words - done)
            toks = names[rng.choice(vocab, size=n, p=p)]
            lines = [" ".join(toks[i : i + 20]) for i in range(0, n, 20)]
            f.write("\n".join(lines) + "\n")
            done += n


def _tree_rss_kb(root: int) -> int:
    """Resident memory of a process and all its descendants now (Linux /proc), in kB."""
    children: dict[int, list[int]] = {}
    rss: dict[int, int] = {}
    for entry in Path("/proc").iterdir():
        if not entry.name.isdigit():
            continue
        try:
            status = (entry / "status").read_text()
        except OSError:
            continue
        fields = dict(line.split(":", 1) for line in status.splitlines() if ":" in line)
        pid = int(entry.name)
        children.setdefault(int(fields.get("PPid", "0").strip()), []).append(pid)
        rss[pid] = int(fields.get("VmRSS", "0 kB").split()[0])
    total, todo = 0, [root]
    while todo:
        pid = todo.pop()
        total += rss.get(pid, 0)
        todo.extend(children.get(pid, []))
    return total


def train(corpus: Path, out: Path, *extra: str) -> tuple[float, float, float, dict]:
    """Train in a subprocess; returns wall time, the largest single process's peak RSS
    (MB, /usr/bin/time), the peak of the whole process tree's summed RSS (MB, sampled
    every 50 ms) and the command's JSON report."""
    t0 = time.perf_counter()
    proc = subprocess.Popen(
        ["/usr/bin/time", "-f", "%M", sys.executable, "-m", "nextword", "train", str(corpus), "-o", str(out), "--json", *extra],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
    )
    tree_peak = 0
    while proc.poll() is None:
        tree_peak = max(tree_peak, _tree_rss_kb(proc.pid))
        time.sleep(0.05)
    stdout, stderr = proc.communicate()
    if proc.returncode:
        raise SystemExit(f"training failed: {stderr}")
    wall = time.perf_counter() - t0
    peak_kb = int(stderr.strip().splitlines()[-1])  # /usr/bin/time: the largest child's own peak
    return wall, peak_kb / 1024, tree_peak / 1024, json.loads(stdout)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description="100M-word scale benchmark")
    ap.add_argument("--words", type=int, default=100_000_000)
    ap.add_argument("--vocab", type=int, default=200_000)
    ap.add_argument("--cap", default="1GB")
    ap.add_argument("--no-results", action="store_true")
    args = ap.parse_args(argv)
    data = HERE / "data"
    data.mkdir(exist_ok=True)
    corpus = data / f"zipf{args.words // 1_000_000}m.txt"
    t0 = time.perf_counter()
    if not corpus.exists():
        make_corpus(corpus, args.words, args.vocab)
    gen_s = time.perf_counter() - t0
    out = HERE / "out" / "scale"
    out.mkdir(parents=True, exist_ok=True)
    par = train(corpus, out / "workers.nwm", "--workers", "0", "--memory-cap", args.cap)
    one = train(corpus, out / "one.nwm", "--workers", "1", "--memory-cap", args.cap)
    same = (out / "workers.nwm").read_bytes() == (out / "one.nwm").read_bytes()
    words = par[3]["word_tokens"]
    md = f"""### Scale (`bench/bench_scale.py`)

Command: `python bench/bench_scale.py` — {time.strftime('%Y-%m-%d')}
Machine: {machine()}.
Synthetic corpus: {words:,} Zipf-distributed words over {args.vocab:,} invented types, 20 per message
({corpus.stat().st_size / 1e9:.2f} GB, generated in {gen_s:.0f} s); model {par[3]['vocabulary']:,} words,
{par[3]['bigrams']:,} bigrams, {par[3]['file_bytes']:,} bytes. Memory cap `--memory-cap {args.cap}`.
Peak RSS: "largest process" is the biggest single process's own peak (`/usr/bin/time -f %M`);
"all processes" is the peak of the summed RSS of the command and its worker processes,
sampled every 50 ms from /proc.

| training | wall time | words/s | peak RSS, largest process | peak RSS, all processes |
|---|---|---|---|---|
| `--workers 0` (every core) | {par[0]:.0f} s | {words / par[0]:,.0f} | {par[1]:,.0f} MB | {par[2]:,.0f} MB |
| one process | {one[0]:.0f} s | {words / one[0]:,.0f} | {one[1]:,.0f} MB | {one[2]:,.0f} MB |

Same model bytes from both: {same}.
"""
    publish(md, "scale", write=not args.no_results)
    return 0


if __name__ == "__main__":
    sys.exit(main())
