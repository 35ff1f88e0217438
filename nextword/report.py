"""Rendering measurement results: a terminal table, JSON-ready data, a Markdown report with plots.

Plotting needs matplotlib (the optional ``plot`` extra); without it the Markdown report
is written without images and says so. Nothing here is imported by ``import nextword``.
"""

from __future__ import annotations

import math
import os
from pathlib import Path
from typing import Any, Sequence

from .errors import InvalidArgumentError
from .evaluate import LogStats
from .store import atomic_write

__all__ = [
    "eval_data",
    "text_report",
    "markdown_report",
    "write_report",
    "plots_available",
    "save_figure",
    "identical_to",
    "ksr_figure",
    "latency_figure",
    "tune_figures",
    "size_tradeoff_figure",
    "plot_size_tradeoff",
]


def eval_data(model_path: str, overall: LogStats, per_log: list[LogStats], baselines: dict[str, Any]) -> dict[str, Any]:
    """Everything measured, as plain data (what ``nextword eval --json`` prints)."""
    return {
        "model": model_path,
        "overall": overall.as_dict(),
        "logs": [st.as_dict() for st in per_log],
        "baselines": baselines,
    }


def _model_baselines(baselines: dict[str, Any]) -> dict[str, Any]:
    """The baseline models measured on the same logs, by name: each part alone (a
    mixture), the bigram of the same smoothing (order-3 models), then the λ runs (Jelinek-Mercer)."""
    out: dict[str, Any] = dict(baselines.get("parts", {}))
    if baselines.get("bigram"):
        out[baselines["bigram"]["name"]] = baselines["bigram"]
    out.update(baselines.get("lambda", {}))
    return out


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
        for name, item in _model_baselines(b).items():
            ksr = ", ".join(f"KSR@{row['k']} {_pct(row['ksr']).strip()}" for row in item["per_k"])
            out.append(f"  {name}: {ksr}; perplexity {item['perplexity']:.2f}")
        if b.get("bigram"):
            out.append(f"  bigram baseline: {b['bigram']['how']}")
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
        for name, item in _model_baselines(b).items():
            lines.append(
                f"| {name} | " + " | ".join(_pct(r["ksr"]).strip() for r in item["per_k"]) + f" | {item['perplexity']:.2f} |"
            )
        if b.get("bigram"):
            lines += ["", f"The bigram baseline: {b['bigram']['how']}; it shows what the two-word context buys."]
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
    if not plots_available():
        note = PLOTS_SKIPPED
    else:
        save_figure(ksr_figure(data), out / "ksr.png")
        save_figure(latency_figure(latencies), out / "latency.png")
        images = ["ksr.png", "latency.png"]
    md = markdown_report(data, images, note)
    atomic_write(out / "report.md", [md.encode("utf-8")])
    return [out / "report.md", *(out / i for i in images)]


# ---------------------------------------------------------------- plots
#
# Every plot is built on a bare matplotlib ``Figure`` (no pyplot: no global state, no GUI
# backend, safe in threads and tests) by a ``*_figure`` function that returns it, so tests
# inspect lines, markers and legend texts instead of pixels; ``save_figure`` writes the PNG
# atomically.

PLOTS_SKIPPED = "_Plots skipped: matplotlib is not installed (pip install 'nextword[plot]')._"
#: share of the latency distribution the histogram shows; the rest is stated on the plot
LATENCY_CLIP_QUANTILE = 0.999
#: markers and line styles given to series in turn, so equal series stay distinguishable
_MARKERS = ("o", "s", "^", "D", "v", "P", "X", "*")
_STYLES = ("-", "--", "-.", ":")
_DPI = 120


def plots_available() -> bool:
    """True when matplotlib (the ``plot`` extra) can be imported."""
    try:
        import matplotlib  # noqa: F401
    except ImportError:
        return False
    return True


def _figure(width: float = 5.5, height: float = 3.8) -> tuple[Any, Any]:
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height))
    return fig, fig.subplots()


def save_figure(fig: Any, path: str | os.PathLike[str]) -> Path:
    """Write ``fig`` as a PNG, atomically (temp file + rename, like every file we write)."""
    import io

    buf = io.BytesIO()
    fig.tight_layout()
    fig.savefig(buf, format="png", dpi=_DPI)
    atomic_write(path, [buf.getvalue()])
    return Path(path)


def identical_to(series: Sequence[tuple[str, Sequence[float]]]) -> dict[str, str]:
    """For each series equal to an earlier one (same values, exactly), the earlier one's label.

    Exact equality is the right test here: KSR values are ratios of keystroke counts, so
    two models that save the same keystrokes produce the same floats.
    """
    out: dict[str, str] = {}
    for j, (label, values) in enumerate(series):
        for first, earlier in series[:j]:
            if first not in out and list(earlier) == list(values):
                out[label] = first
                break
    return out


def _dodge(i: int, n: int, width: float) -> float:
    """Horizontal offset of series ``i`` of ``n``, centred on 0 (so equal points sit side by side)."""
    return (i - (n - 1) / 2) * width


def ksr_figure(data: dict[str, Any]) -> Any:
    """KSR against k for the model, its λ baselines and the ceiling.

    Each series has its own marker and line style, and is shifted a little along k, so a
    series hidden under another is still seen; a series equal to an earlier one says
    "identical to ..." in the legend.
    """
    o = data["overall"]
    ks = [r["k"] for r in o["per_k"]]
    series: list[tuple[str, list[float]]] = [("this model", [100 * r["ksr"] for r in o["per_k"]])]
    for name, item in _model_baselines(data.get("baselines") or {}).items():
        series.append((name, [100 * r["ksr"] for r in item["per_k"]]))
    same = identical_to(series)
    fig, ax = _figure()
    step = min((b - a for a, b in zip(ks, ks[1:])), default=1)
    for i, (label, ys) in enumerate(series):
        xs = [k + _dodge(i, len(series), 0.08 * step) for k in ks]
        shown = f"{label} (identical to {same[label]})" if label in same else label
        ax.plot(xs, ys, marker=_MARKERS[i % len(_MARKERS)], linestyle=_STYLES[i % len(_STYLES)],
                markerfacecolor="none" if i else None, markersize=7 - i, label=shown)
    ax.plot(ks, [100 * r["ceiling_ksr"] for r in o["per_k"]], linestyle=":", marker="_", color="grey",
            label="ceiling (perfect predictor)")
    ax.set_xlabel("k (suggestions shown)")
    ax.set_ylabel("keystroke savings (%)")
    ax.set_xticks(ks)
    ax.legend(fontsize=8)
    return fig


def latency_figure(latencies: Sequence[float], *, clip_quantile: float = LATENCY_CLIP_QUANTILE) -> Any:
    """Histogram of suggest latencies (seconds in, µs shown), cut at ``clip_quantile``.

    The cut is stated on the plot with the number of calls beyond it and the maximum, so
    a long tail is never silently hidden.
    """
    import numpy as np

    fig, ax = _figure()
    us = np.asarray(latencies, dtype=np.float64) * 1e6
    if len(us) == 0:
        ax.text(0.5, 0.5, "no suggest calls", ha="center", va="center", transform=ax.transAxes)
    else:
        cut = max(float(np.quantile(us, clip_quantile)), 1.0)
        beyond = int(np.count_nonzero(us > cut))
        heights, _, _ = ax.hist(us[us <= cut], bins=100, range=(0.0, cut))
        ax.set_ylim(0, max(float(np.max(heights)), 1.0) * 1.35)  # room for the note above the bars
        p50 = float(np.median(us))
        ax.axvline(p50, color="black", linestyle="--", linewidth=1)
        note = (
            f"median {p50:,.1f} µs (dashed line)\n"
            f"axis cut at the {100 * clip_quantile:g}th percentile ({cut:,.1f} µs):\n"
            f"{beyond:,} of {len(us):,} calls beyond it, max {float(us.max()):,.0f} µs"
        )
        ax.text(0.98, 0.97, note, ha="right", va="top", fontsize=7, transform=ax.transAxes,
                bbox={"facecolor": "white", "edgecolor": "grey", "alpha": 0.9})
    ax.set_xlabel("suggest latency (µs)")
    ax.set_ylabel("calls")
    return fig


def _mark_lambda(ax: Any, xs: list[float], ys: list[float], chosen: float, why: str) -> None:
    """A vertical line at the chosen λ and a star on the curve there (interpolated if off the grid)."""
    import numpy as np

    ax.axvline(chosen, color="tab:red", linestyle="--", linewidth=1, label=f"chosen λ = {chosen:.4f} ({why})")
    order = np.argsort(xs)
    y = float(np.interp(chosen, np.asarray(xs)[order], np.asarray(ys)[order]))
    ax.plot([chosen], [y], marker="*", markersize=12, color="tab:red", linestyle="none")


def _mark_other(ax: Any, lam: float | None, chosen: float, xs: list[float], ys: list[float], name: str) -> None:
    """A hollow triangle at the curve's own optimum when the chosen λ is a different one."""
    if lam is None or round(float(lam), 4) == round(chosen, 4):
        return
    import numpy as np

    order = np.argsort(xs)
    y = float(np.interp(float(lam), np.asarray(xs)[order], np.asarray(ys)[order]))
    ax.plot([lam], [y], marker="^", markersize=10, markerfacecolor="none", markeredgecolor="black",
            linestyle="none", label=f"{name} λ = {float(lam):.4f}")


def _order_tune_figures(result: dict[str, Any]) -> dict[str, Any]:
    """:func:`tune_figures` for λ per order: one perplexity curve per order (the other
    orders at their optimum), each order's chosen λ marked; the shared-λ KSR curve."""
    chosen = [float(x) for x in result["chosen_lambdas"]]
    figs: dict[str, Any] = {}
    fig, ax = _figure()
    for i, (m, rows) in enumerate(result["perplexity_curves"].items()):
        xs, ys = [r["lambda"] for r in rows], [r["perplexity"] for r in rows]
        line, = ax.plot(xs, ys, marker=_MARKERS[i % len(_MARKERS)], linestyle=_STYLES[i % len(_STYLES)],
                        label=f"λ{m} varied, other orders at their optimum")
        lam = chosen[int(m) - 2]
        import numpy as np

        order = np.argsort(xs)
        y = float(np.interp(lam, np.asarray(xs)[order], np.asarray(ys)[order]))
        ax.plot([lam], [y], marker="*", markersize=12, color=line.get_color(), linestyle="none",
                label=f"chosen λ{m} = {lam:.4f} ({result.get('objective', '')})")
    ax.set_xlabel("λ of one order")
    ax.set_ylabel("held-out perplexity")
    ax.legend(fontsize=8)
    figs["perplexity.png"] = fig
    if result["ksr_curve"]:
        best = result.get("keystroke_optimal_lambda")
        figs["ksr.png"] = _ksr_figure(result, f"KSR@{result['k']}, one λ for both orders", "λ (both orders)",
                                      None if best is None else float(best), "keystroke-optimal", None)
    return figs


def _ksr_figure(result: dict[str, Any], label: str, xlabel: str, chosen: float | None, why: str, other: float | None) -> Any:
    """The tune report's KSR-against-λ curve, ``chosen`` marked (and ``other``, the curve's own optimum, if different)."""
    fig, ax = _figure()
    kc = result["ksr_curve"]
    xs, ys = [r["lambda"] for r in kc], [100 * r["ksr"] for r in kc]
    ax.plot(xs, ys, "o-", markersize=4, label=label)
    if chosen is not None:
        _mark_lambda(ax, xs, ys, chosen, why)
        _mark_other(ax, other, chosen, xs, ys, "keystroke-optimal")
    ax.set_xlabel(xlabel)
    ax.set_ylabel(f"KSR@{result['k']} (%)")
    ax.legend(fontsize=8)
    return fig


def tune_figures(result: dict[str, Any]) -> dict[str, Any]:
    """The figures of ``nextword tune --report``: {file name: Figure}, the chosen λ marked on each."""
    if "chosen_lambdas" in result:
        return _order_tune_figures(result)
    chosen = float(result["chosen_lambda"])
    why = str(result.get("objective", ""))
    figs: dict[str, Any] = {}
    fig, ax = _figure()
    pc = result["perplexity_curve"]
    xs, ys = [r["lambda"] for r in pc], [r["perplexity"] for r in pc]
    ax.plot(xs, ys, "o-", label="held-out perplexity")
    _mark_lambda(ax, xs, ys, chosen, why)
    _mark_other(ax, result.get("perplexity_optimal_lambda"), chosen, xs, ys, "perplexity-optimal")
    ax.set_xlabel("λ")
    ax.set_ylabel("held-out perplexity")
    ax.legend(fontsize=8)
    figs["perplexity.png"] = fig
    if result["ksr_curve"]:
        figs["ksr.png"] = _ksr_figure(result, f"KSR@{result['k']}", "λ", chosen, why, result.get("keystroke_optimal_lambda"))
    return figs


def size_tradeoff_figure(points: Sequence[tuple[int, float, str]], *, k: int = 3) -> Any:
    """File size against KSR@k; see :func:`plot_size_tradeoff`."""
    import numpy as np

    if not points:
        raise InvalidArgumentError("no points to plot: expected (bytes, ksr, label) tuples")
    by_label: dict[str, list[tuple[int, float]]] = {}
    for item in points:
        try:
            size, ksr, label = item
        except (TypeError, ValueError):
            raise InvalidArgumentError(f"expected a (bytes, ksr, label) tuple, got {item!r}") from None
        if isinstance(size, bool) or not isinstance(size, (int, np.integer)) or size <= 0:
            raise InvalidArgumentError(f"file size must be a whole number of bytes > 0, got {size!r}")
        if not isinstance(ksr, (int, float, np.floating)) or not 0.0 <= float(ksr) <= 1.0:
            raise InvalidArgumentError(f"KSR must be a fraction in [0, 1], got {ksr!r}")
        by_label.setdefault(str(label), []).append((int(size), float(ksr)))
    series = [(label, sorted(pts)) for label, pts in by_label.items()]
    same = identical_to([(label, [v for pt in pts for v in pt]) for label, pts in series])
    fig, ax = _figure(6.0, 4.0)
    for i, (label, pts) in enumerate(series):
        shown = f"{label} (identical to {same[label]})" if label in same else label
        ax.plot([b / 1e6 for b, _ in pts], [100 * v for _, v in pts], marker=_MARKERS[i % len(_MARKERS)],
                linestyle=_STYLES[i % len(_STYLES)] if len(pts) > 1 else "none",
                markerfacecolor="none" if i else None, markersize=8 - min(i, 4), label=shown)
    sizes = [b for _, pts in series for b, _ in pts]
    if max(sizes) > 10 * min(sizes):
        ax.set_xscale("log")
    ax.set_xlabel("model file size (MB)")
    ax.set_ylabel(f"KSR@{k} (%)")
    ax.legend(fontsize=8)
    return fig


def plot_size_tradeoff(
    points: Sequence[tuple[int, float, str]], path: str | os.PathLike[str], *, k: int = 3
) -> Path:
    """Write a PNG of model file size against keystroke savings; returns ``path``.

    ``points`` are ``(file_bytes, ksr, label)``: ``ksr`` a fraction in [0, 1] (as
    ``KStats.ksr`` gives it, plotted in %), ``label`` the series (e.g. the pruning rule).
    Points sharing a label are joined in order of size; a label with one point (e.g.
    "unpruned") is a lone marker. The size axis turns logarithmic when sizes span more
    than 10×. Needs matplotlib (the ``plot`` extra); bad points raise InvalidArgumentError.
    """
    fig = size_tradeoff_figure(points, k=k)
    return save_figure(fig, path)
