"""Rendering measurement results: a terminal table, JSON-ready data, a Markdown report with plots.

Plotting needs matplotlib (the optional ``plot`` extra); without it the Markdown report
is written without images and says so. Nothing here is imported by ``import nextword``.
"""

from __future__ import annotations

import math
import os
from pathlib import Path
from typing import Any

from .evaluate import LogStats
from .store import atomic_write

__all__ = ["eval_data", "text_report", "markdown_report", "write_report"]


def eval_data(model_path: str, overall: LogStats, per_log: list[LogStats], baselines: dict[str, Any]) -> dict[str, Any]:
    """Everything measured, as plain data (what ``nextword eval --json`` prints)."""
    return {
        "model": model_path,
        "overall": overall.as_dict(),
        "logs": [st.as_dict() for st in per_log],
        "baselines": baselines,
    }


def _pct(x: float) -> str:
    return f"{100 * x:5.1f}%" if math.isfinite(x) else "   n/a"


def _rows(st: LogStats) -> list[str]:
    lines = []
    for k in st.ks:
        s = st.per_k[k]
        lines.append(
            f"{st.name[:24]:24} {st.messages:8,} {s.words:8,} {k:3} {_pct(s.ksr)} {_pct(s.ceiling_ksr)}"
            f"     {_pct(s.ksr_of_ceiling)} {_pct(s.hit_rate)} {s.mean_letters_before_accept:8.2f}"
        )
    return lines


def _latency_line(st: LogStats) -> str:
    lat = st.latency_summary()
    if not lat.get("calls"):
        return "no suggest calls"
    return (
        f"suggest latency over {lat['calls']:,} calls: p50 {lat['p50_us']:.1f} µs, p95 {lat['p95_us']:.1f}, "
        f"p99 {lat['p99_us']:.1f}, max {lat['max_us']:.0f}; {lat['end_to_end_calls_per_second']:,.0f} calls/s "
        f"end to end ({lat['engine_calls_per_second']:,.0f}/s in the engine)"
    )


def text_report(data: dict[str, Any], overall: LogStats, per_log: list[LogStats]) -> str:
    """The terminal table of ``nextword eval``."""
    head = f"{'log':24} {'messages':>8} {'words':>8} {'k':>3} {'KSR':>6} {'ceiling':>6} {'of ceiling':>10} {'hit@k':>6} {'letters':>8}"
    out = [f"model: {data['model']}", head, "-" * len(head)]
    for st in per_log:
        out.extend(_rows(st))
    if len(per_log) > 1:
        out.extend(_rows(overall))
    out.append("")
    out.append(f"perplexity {overall.perplexity:.2f}, out-of-vocabulary words {_pct(overall.oov_rate).strip()}")
    out.append(_latency_line(overall))
    b = data.get("baselines") or {}
    if b:
        out.append("")
        out.append("baselines on the same logs:")
        for name, item in b.get("lambda", {}).items():
            ksr = ", ".join(f"KSR@{row['k']} {_pct(row['ksr']).strip()}" for row in item["per_k"])
            out.append(f"  {name}: {ksr}; perplexity {item['perplexity']:.2f}")
        d = b.get("dict")
        if d:
            out.append(
                f"  plain-dict implementation: fit {d['fit_seconds']:.2f} s; suggest p50 {d['p50_us']:,.0f} µs vs engine "
                f"{d['engine_p50_us']:.1f} µs = {d['ratio_p50']:,.0f}x slower; identical rankings {d['identical']} of {d['queries']}"
            )
        n = b.get("nltk")
        if n:
            out.append(
                f"  nltk.lm MLE(2): fit {n['fit_seconds']:.2f} s ({n['fit_ratio']:.1f}x the engine's training); top-k by "
                f"scoring the vocabulary p50 {n['p50_us']:,.0f} µs = {n['ratio_p50']:,.0f}x the engine"
            )
    return "\n".join(out)


def markdown_report(data: dict[str, Any], images: list[str], note: str = "") -> str:
    """A self-contained Markdown report; ``images`` are file names beside it."""
    o = data["overall"]
    lines = [f"# Keystroke savings of `{data['model']}`", ""]
    lines.append("| log | messages | words | k | KSR | ceiling | KSR / ceiling | hit@k | letters before accept |")
    lines.append("|---|---|---|---|---|---|---|---|---|")
    for log in [*data["logs"], *([o] if len(data["logs"]) > 1 else [])]:
        for row in log["per_k"]:
            lines.append(
                f"| {log['name']} | {log['messages']:,} | {row['words']:,} | {row['k']} | {_pct(row['ksr']).strip()} | "
                f"{_pct(row['ceiling_ksr']).strip()} | {_pct(row['ksr_of_ceiling']).strip()} | "
                f"{_pct(row['hit_rate']).strip()} | {row['mean_letters_before_accept']:.2f} |"
            )
    lat = o["latency"]
    lines += [
        "",
        f"Perplexity {o['perplexity']:.2f}; out-of-vocabulary words {_pct(o['oov_rate']).strip()}.",
        "",
    ]
    if lat.get("calls"):
        lines.append(
            f"Suggest latency over {lat['calls']:,} calls: p50 {lat['p50_us']:.1f} µs, p95 {lat['p95_us']:.1f} µs, "
            f"p99 {lat['p99_us']:.1f} µs, max {lat['max_us']:.0f} µs; {lat['end_to_end_calls_per_second']:,.0f} calls/s end to end."
        )
    b = data.get("baselines") or {}
    if b:
        lines += ["", "## Baselines, same logs, same run", ""]
        lines.append("| model | " + " | ".join(f"KSR@{r['k']}" for r in o["per_k"]) + " | perplexity |")
        lines.append("|---|" + "---|" * (len(o["per_k"]) + 1))
        lines.append("| this model | " + " | ".join(_pct(r["ksr"]).strip() for r in o["per_k"]) + f" | {o['perplexity']:.2f} |")
        for name, item in b.get("lambda", {}).items():
            lines.append(
                f"| {name} | " + " | ".join(_pct(r["ksr"]).strip() for r in item["per_k"]) + f" | {item['perplexity']:.2f} |"
            )
        d, n = b.get("dict"), b.get("nltk")
        if d or n:
            lines += ["", "| implementation | fit | suggest p50 | ratio to the engine |", "|---|---|---|---|"]
            if d:
                lines.append(
                    f"| plain Python dicts, same formula | {d['fit_seconds']:.2f} s | {d['p50_us']:,.0f} µs | "
                    f"{d['ratio_p50']:,.0f}× slower (identical rankings {d['identical']}/{d['queries']}) |"
                )
            if n:
                lines.append(
                    f"| nltk.lm MLE(2), vocabulary scored per query | {n['fit_seconds']:.2f} s ({n['fit_ratio']:.1f}× our training) | "
                    f"{n['p50_us']:,.0f} µs | {n['ratio_p50']:,.0f}× slower |"
                )
    if images:
        lines.append("")
        lines += [f"![{Path(i).stem}]({i})" for i in images]
    if note:
        lines += ["", note]
    return "\n".join(lines) + "\n"


def write_report(out_dir: str | os.PathLike[str], data: dict[str, Any], latencies: list[float]) -> list[Path]:
    """Write report.md (and ksr.png, latency.png when matplotlib is installed) into ``out_dir``."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    images: list[str] = []
    note = ""
    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError:
        note = "_Plots skipped: matplotlib is not installed (pip install 'nextword[plot]')._"
    else:
        o = data["overall"]
        ks = [r["k"] for r in o["per_k"]]
        fig, ax = plt.subplots(figsize=(5, 3.5))
        ax.plot(ks, [100 * r["ksr"] for r in o["per_k"]], "o-", label="this model")
        for name, item in (data.get("baselines") or {}).get("lambda", {}).items():
            ax.plot(ks, [100 * r["ksr"] for r in item["per_k"]], "o--", label=name)
        ax.plot(ks, [100 * r["ceiling_ksr"] for r in o["per_k"]], ":", color="grey", label="ceiling")
        ax.set_xlabel("k (suggestions shown)")
        ax.set_ylabel("keystroke savings (%)")
        ax.set_xticks(ks)
        ax.legend(fontsize=8)
        fig.tight_layout()
        fig.savefig(out / "ksr.png", dpi=120)
        plt.close(fig)
        fig, ax = plt.subplots(figsize=(5, 3.5))
        us = [t * 1e6 for t in latencies]
        ax.hist(us, bins=100, range=(0, max(1.0, sorted(us)[int(0.999 * (len(us) - 1))])) if us else (0, 1))
        ax.set_xlabel("suggest latency (µs)")
        ax.set_ylabel("calls")
        fig.tight_layout()
        fig.savefig(out / "latency.png", dpi=120)
        plt.close(fig)
        images = ["ksr.png", "latency.png"]
    md = markdown_report(data, images, note)
    atomic_write(out / "report.md", [md.encode("utf-8")])
    return [out / "report.md", *(out / i for i in images)]
