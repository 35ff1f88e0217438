"""Cost of a personal layer's file work: one learn with the journal vs the old full rewrite.

For layers of about 1k, 10k and 60k entries (built by learning lines of real English,
the CPython topic help shipped with Python), times a learn on a layer opened from its
file (journal append + fdatasync; compaction included when it falls in the run) side
by side with the previous behaviour (the same learn, then the whole layer rewritten
atomically: temp file, fsync, rename, directory fsync — what every change cost before
the journal), interleaved in one run so the shared machine's noise hits both alike.
Also: opening the file, one compaction, a suggestion with its freshness check, and how
fast crafted files are refused. Writes the ``layer_io`` section of bench/RESULTS.md.

    python bench/bench_layer_io.py            # ~1 minute
"""

from __future__ import annotations

import argparse
import statistics
import struct
import sys
import tempfile
import time
import zlib
from pathlib import Path

import msgpack

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))
sys.path.insert(0, str(HERE))

import nextword  # noqa: E402
from bench_core import machine, publish  # noqa: E402
from nextword.personal import PERSONAL_MAGIC, PersonalLayer  # noqa: E402


def _lines() -> list[str]:
    from pydoc_data.topics import topics

    return [ln.strip() for k in sorted(topics) for ln in topics[k].splitlines() if len(ln.split()) >= 4]


def _pct(xs: list[float], q: float) -> float:
    s = sorted(xs)
    return s[min(len(s) - 1, int(q * len(s)))]


def _grow(base: nextword.Model, lines: list[str], target: int) -> tuple[PersonalLayer, int]:
    layer = PersonalLayer(base, max_entries=65_536)
    i = 0
    while layer.entries < target:
        layer.learn(lines[i % len(lines)] + f" n{i // len(lines)}")
        i += 1
    return layer, i


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description="personal layer file cost: journal vs full rewrite")
    ap.add_argument("--sizes", default="1000,10000,60000", help="layer sizes in entries (default %(default)s)")
    ap.add_argument("--learns", type=int, default=300, help="timed learns per size and method (default %(default)s)")
    ap.add_argument("--no-results", action="store_true", help="do not edit bench/RESULTS.md")
    args = ap.parse_args(argv)
    lines = _lines()
    work = Path(tempfile.mkdtemp(prefix="nw-layer-io-", dir=HERE / "out" if (HERE / "out").is_dir() else None))
    train = [ln for ln in lines[: len(lines) // 2]]
    nextword.train_texts(train, work / "base.nwm", min_count=2)
    base = nextword.load(work / "base.nwm")
    rows = []
    for size in (int(s) for s in args.sizes.split(",")):
        grown, used = _grow(base, lines, size)
        start_entries = grown.entries
        journal_path, full_path = work / f"j{size}.nwp", work / f"f{size}.nwp"
        grown.save(journal_path)
        t0 = time.perf_counter()
        attached = PersonalLayer.open(base, journal_path)
        open_ms = (time.perf_counter() - t0) * 1e3
        snapshot_bytes = journal_path.stat().st_size
        old = PersonalLayer.load(base, journal_path)  # in memory; rewritten whole after each learn, as before
        new_t, old_t = [], []
        for j in range(args.learns):
            msg = lines[(used + j) % len(lines)] + " zorbing trip"
            t0 = time.perf_counter()
            attached.learn(msg)
            new_t.append(time.perf_counter() - t0)
            t0 = time.perf_counter()
            old.learn(msg)
            old.save(full_path)
            old_t.append(time.perf_counter() - t0)
        assert attached.messages == old.messages and attached.entries == old.entries
        journal_bytes = Path(str(journal_path) + ".journal").stat().st_size
        t0 = time.perf_counter()
        reopened = PersonalLayer.load(base, journal_path)
        replay_ms = (time.perf_counter() - t0) * 1e3
        assert reopened.messages == attached.messages
        t0 = time.perf_counter()
        attached.save(journal_path)  # compaction: new snapshot, empty journal
        compact_ms = (time.perf_counter() - t0) * 1e3
        sugg_att, sugg_det = [], []
        for text in ("the ", "see the fu", "a ", "in the co") * 50:
            t0 = time.perf_counter()
            attached.suggest(text, 3)
            sugg_att.append(time.perf_counter() - t0)
            t0 = time.perf_counter()
            reopened.suggest(text, 3)
            sugg_det.append(time.perf_counter() - t0)
        attached.close()
        rows.append({
            "start": start_entries, "entries": attached.entries, "snapshot_kb": snapshot_bytes / 1024, "journal_kb": journal_bytes / 1024,
            "new_med": statistics.median(new_t) * 1e3, "new_p99": _pct(new_t, 0.99) * 1e3,
            "old_med": statistics.median(old_t) * 1e3, "old_p99": _pct(old_t, 0.99) * 1e3,
            "open_ms": open_ms, "replay_ms": replay_ms, "compact_ms": compact_ms,
            "sugg_att": statistics.median(sugg_att) * 1e6, "sugg_det": statistics.median(sugg_det) * 1e6,
        })
        print(f"size {size}: {rows[-1]}", file=sys.stderr)

    # crafted files with valid checksums: how long until ModelFormatError
    crafted = []
    payload = {"settings": {"min_uses": 2, "strength": 2000.0, "max_weight": 0.5, "lam": 0.9, "half_life_messages": None,
                            "half_life_days": None, "max_entries": 65_536},
               "messages": 1, "unigram": {f"w{i}": 1.0 for i in range(1_000_000)}, "bigram": {}, "spelling": {},
               "blocklist": []}
    cases = (
        ("1,000,000 words, max_entries 65,536", payload),
        ("262,144 words, max_entries 65,536, settings last", dict(
            {k: v for k, v in payload.items() if k != "settings"},
            unigram={f"w{i}": 1.0 for i in range(262_144)}, settings=payload["settings"])),
        ("262,144 words, max_entries 262,144, the last count NaN", dict(
            payload, settings=dict(payload["settings"], max_entries=262_144),
            unigram={**{f"w{i}": 1.0 for i in range(262_143)}, "last": float("nan")})),
        ("15 MiB of nested nils in 'messages'", dict(payload, unigram={}, messages=[[None] * 60_000] * 250)),
        ("messages = inf", dict(payload, unigram={"w": 1.0}, messages=float("inf"))),
    )
    for label, p in cases:
        body = msgpack.packb(p, use_bin_type=True)
        path = work / "crafted.nwp"
        path.write_bytes(struct.pack("<8sHHQI", PERSONAL_MAGIC, 1, 1, len(body), zlib.crc32(body)) + body)
        t0 = time.perf_counter()
        try:
            PersonalLayer.load(base, path)
            outcome = "loaded (!)"
        except nextword.ModelFormatError:
            outcome = "ModelFormatError"
        crafted.append((label, len(body) / 2**20, (time.perf_counter() - t0) * 1e3, outcome))

    md = [
        "## Personal layer file work: journal vs full rewrite",
        "",
        f"`python bench/bench_layer_io.py --learns {args.learns}` — {args.learns} learns per size, each timed with "
        "the journal (append + fdatasync, under the file lock) and, interleaved, the previous behaviour (the same "
        "learn, then the whole layer rewritten atomically with fsync). Layers grown from lines of CPython's topic help. "
        "The journal is compacted when it passes max(256 KiB, the snapshot): that cost is the compaction column, "
        "paid once per that many bytes of learns.",
        "",
        "| entries (start → end) | snapshot KiB | journal KiB after | learn, journal: median / p99 ms | learn, full rewrite: median / p99 ms | speed-up (median) |",
        "|---:|---:|---:|---:|---:|---:|",
    ]
    for r in rows:
        md.append(
            f"| {r['start']:,} → {r['entries']:,} | {r['snapshot_kb']:,.0f} | {r['journal_kb']:,.0f} | {r['new_med']:.2f} / {r['new_p99']:.2f} "
            f"| {r['old_med']:.2f} / {r['old_p99']:.2f} | {r['old_med'] / r['new_med']:.0f}× |"
        )
    md += [
        "",
        "| entries (end) | open (snapshot, lock, orphan sweep) ms | load with journal replay ms | compaction ms | suggest, attached (freshness stat) µs | suggest, detached µs |",
        "|---:|---:|---:|---:|---:|---:|",
    ]
    for r in rows:
        md.append(
            f"| {r['entries']:,} | {r['open_ms']:.1f} | {r['replay_ms']:.1f} | {r['compact_ms']:.1f} "
            f"| {r['sugg_att']:.0f} | {r['sugg_det']:.0f} |"
        )
    md += ["", "Crafted files with a valid checksum:", "", "| payload | MiB | time to refuse ms | outcome |", "|---|---:|---:|---|"]
    for label, mib, ms, outcome in crafted:
        md.append(f"| {label} | {mib:.1f} | {ms:.0f} | {outcome} |")
    md += ["", f"Machine: {machine()} (shared, noisy; compare the columns of one run)."]
    publish("\n".join(md), "layer_io", write=not args.no_results)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
