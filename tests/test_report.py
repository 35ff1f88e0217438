"""Report plots: read back from the matplotlib Figure objects (lines, markers, texts), not pixels.

matplotlib is the optional ``plot`` extra: the module is skipped without it. The
figures are bare ``Figure`` objects rendered by the Agg canvas, so no display is needed.
"""

from __future__ import annotations

import statistics
from pathlib import Path
from typing import Any

import pytest

pytest.importorskip("matplotlib")

from nextword.errors import InvalidArgumentError  # noqa: E402
from nextword.report import (  # noqa: E402
    identical_to,
    ksr_figure,
    latency_figure,
    plot_size_tradeoff,
    size_tradeoff_figure,
    tune_figures,
    write_report,
)

PNG_MAGIC = b"\x89PNG\r\n\x1a\n"  # the PNG signature (PNG specification, section 5.2)


def _per_k(values: list[float], ceiling: float = 0.7) -> list[dict[str, Any]]:
    return [{"k": k, "ksr": v, "ceiling_ksr": ceiling} for k, v in zip((1, 3, 5), values)]


def _eval_data(model: list[float], unigram: list[float], bigram: list[float]) -> dict[str, Any]:
    return {
        "model": "m.nwm",
        "overall": {"per_k": _per_k(model)},
        "baselines": {"lambda": {"unigram only (λ = 0)": {"per_k": _per_k(unigram)},
                                 "bigram only (λ = 0.999)": {"per_k": _per_k(bigram)}}},
    }


def _legend(fig: Any) -> list[str]:
    return [t.get_text() for ax in fig.axes if ax.get_legend() for t in ax.get_legend().get_texts()]


def _texts(fig: Any) -> str:
    return "\n".join(t.get_text() for ax in fig.axes for t in ax.texts)


def test_equal_series_say_identical_and_stay_visible() -> None:
    fig = ksr_figure(_eval_data([0.26, 0.37, 0.40], [0.19, 0.30, 0.35], [0.26, 0.37, 0.40]))
    legend = _legend(fig)
    assert "bigram only (λ = 0.999) (identical to this model)" in legend
    assert sum("identical" in t for t in legend) == 1  # the unigram series differs
    lines = {ln.get_label(): ln for ln in fig.axes[0].get_lines()}
    model, bigram = lines["this model"], lines["bigram only (λ = 0.999) (identical to this model)"]
    assert list(model.get_ydata()) == list(bigram.get_ydata())  # same values...
    assert all(a != b for a, b in zip(model.get_xdata(), bigram.get_xdata()))  # ...drawn side by side
    assert model.get_marker() != bigram.get_marker()


def test_different_series_do_not_say_identical_and_have_distinct_markers() -> None:
    fig = ksr_figure(_eval_data([0.26, 0.37, 0.40], [0.19, 0.30, 0.35], [0.26, 0.371, 0.40]))
    assert not any("identical" in t for t in _legend(fig))
    series = [ln for ln in fig.axes[0].get_lines() if not ln.get_label().startswith("ceiling")]
    assert len(series) == 3 and len({ln.get_marker() for ln in series}) == 3
    assert len({ln.get_linestyle() for ln in series}) == 3


def test_identical_to_names_the_first_equal_series() -> None:
    series = [("a", [1.0, 2.0]), ("b", [1.0, 2.0]), ("c", [1.0, 2.0]), ("d", [1.0, 2.5])]
    # b and c both equal a, the first of the group; d differs in its second value
    assert identical_to(series) == {"b": "a", "c": "a"}


def test_latency_histogram_states_its_cut_and_the_maximum() -> None:
    lat = [i * 1e-6 for i in range(1, 2001)] + [0.05]  # 1..2000 µs, and one 50 ms outlier
    fig = latency_figure(lat)
    us = [t * 1e6 for t in lat]
    # the 99.9th percentile by Python's statistics module (Hyndman & Fan type 7 = 'inclusive'),
    # independent of the numpy quantile the plot uses
    cut = statistics.quantiles(us, n=1000, method="inclusive")[998]
    beyond = sum(u > cut for u in us)
    note = _texts(fig)
    assert "99.9th percentile" in note and f"({cut:,.1f} µs)" in note
    assert f"{beyond:,} of {len(us):,} calls beyond it" in note
    assert "max 50,000 µs" in note  # 0.05 s = 50,000 µs
    ax = fig.axes[0]
    assert ax.get_xlim()[1] < 50_000  # the outlier is off the axis, as the note says


def test_latency_without_calls_says_so() -> None:
    assert "no suggest calls" in _texts(latency_figure([]))


def _tune_result(chosen: float, objective: str = "perplexity") -> dict[str, Any]:
    grid = [0.0, 0.2, 0.4, 0.6, 0.8, 0.9, 0.99]
    return {
        "chosen_lambda": chosen,
        "objective": objective,
        "perplexity_optimal_lambda": 0.7777,
        "keystroke_optimal_lambda": 0.9,
        "k": 3,
        "perplexity_curve": [{"lambda": x, "perplexity": 200 + 300 * (x - 0.78) ** 2} for x in grid],
        "ksr_curve": [{"lambda": x, "ksr": 0.3 + 0.07 * x} for x in grid],
    }


def test_tune_plots_mark_the_chosen_lambda() -> None:
    figs = tune_figures(_tune_result(0.7777))
    assert set(figs) == {"perplexity.png", "ksr.png"}
    for fig in figs.values():
        ax = fig.axes[0]
        vlines = [ln for ln in ax.get_lines() if list(ln.get_xdata()) == [0.7777, 0.7777]]
        assert len(vlines) == 1, "a vertical line at the chosen λ"
        stars = [ln for ln in ax.get_lines() if ln.get_marker() == "*"]
        assert [list(s.get_xdata()) for s in stars] == [[0.7777]]
        assert any("chosen λ = 0.7777 (perplexity)" in t for t in _legend(fig))
    # the KSR curve's own optimum (0.9) differs from the chosen λ: it is marked too
    assert any("keystroke-optimal λ = 0.9000" in t for t in _legend(figs["ksr.png"]))
    assert not any("perplexity-optimal" in t for t in _legend(figs["perplexity.png"]))


def test_tune_plot_star_sits_on_the_curve_between_grid_points() -> None:
    fig = tune_figures(_tune_result(0.5))["ksr.png"]
    star = next(ln for ln in fig.axes[0].get_lines() if ln.get_marker() == "*")
    # KSR = 0.3 + 0.07·λ is linear, so interpolating at 0.5 gives 33.5 %
    assert star.get_ydata()[0] == pytest.approx(33.5)


def test_tune_report_without_ksr_curve_has_one_plot() -> None:
    result = _tune_result(0.78)
    result["ksr_curve"] = []
    assert set(tune_figures(result)) == {"perplexity.png"}


def test_size_tradeoff_plot(tmp_path: Path) -> None:
    points = [(4_500_000, 0.382, "unpruned"),
              (2_000_000, 0.37, "entropy"), (500_000, 0.33, "entropy"), (1_000_000, 0.35, "entropy"),
              (500_000, 0.32, "count"), (2_000_000, 0.368, "count"), (1_000_000, 0.345, "count")]
    path = plot_size_tradeoff(points, tmp_path / "size.png")
    assert path == tmp_path / "size.png" and path.read_bytes()[:8] == PNG_MAGIC
    fig = size_tradeoff_figure(points)
    lines = {ln.get_label(): ln for ln in fig.axes[0].get_lines()}
    assert set(lines) == {"unpruned", "entropy", "count"}
    assert list(lines["entropy"].get_xdata()) == [0.5, 1.0, 2.0]  # MB, in order of size
    assert list(lines["entropy"].get_ydata()) == pytest.approx([33.0, 35.0, 37.0])  # KSR in %
    assert lines["unpruned"].get_linestyle() == "None"  # a lone point, no line
    assert len({ln.get_marker() for ln in lines.values()}) == 3
    assert fig.axes[0].get_xscale() == "linear"  # 0.5 .. 4.5 MB is within 10×


def test_size_tradeoff_log_axis_and_identical_series() -> None:
    points = [(100_000, 0.2, "a"), (10_000_000, 0.4, "a"), (100_000, 0.2, "b"), (10_000_000, 0.4, "b")]
    fig = size_tradeoff_figure(points)
    assert fig.axes[0].get_xscale() == "log"  # 100 kB .. 10 MB spans 100×
    assert "b (identical to a)" in _legend(fig)


@pytest.mark.parametrize(
    ("points", "needle"),
    [([], "no points"), ([(0, 0.3, "x")], "got 0"), ([(1000, 1.5, "x")], "got 1.5"),
     ([(1000, float("nan"), "x")], "nan"), ([(1000, 0.3)], "(1000, 0.3)"), ([(True, 0.3, "x")], "True")],
)
def test_size_tradeoff_rejects_bad_points(tmp_path: Path, points: list[Any], needle: str) -> None:
    with pytest.raises(InvalidArgumentError, match=needle.replace("(", r"\(").replace(")", r"\)")):
        plot_size_tradeoff(points, tmp_path / "x.png")
    assert not (tmp_path / "x.png").exists()


def test_write_report_writes_the_markdown_and_both_plots(tmp_path: Path) -> None:
    data = _eval_data([0.26, 0.37, 0.40], [0.19, 0.30, 0.35], [0.26, 0.37, 0.40])
    per_k = [{**r, "ksr_of_ceiling": r["ksr"] / 0.7, "hit_rate": 0.2, "mean_letters_before_accept": 1.5, "words": 10}
             for r in data["overall"]["per_k"]]
    log = {"name": "held", "messages": 3, "per_k": per_k, "perplexity": 120.0, "oov_rate": 0.05,
           "latency": {"calls": 2, "p50_us": 10.0, "p95_us": 12.0, "p99_us": 12.0, "max_us": 12.0,
                       "end_to_end_calls_per_second": 1000.0}}
    data["overall"] = log
    data["logs"] = [log]
    for item in data["baselines"]["lambda"].values():
        item["perplexity"] = 300.0
    paths = write_report(tmp_path / "rep", data, [10e-6, 12e-6])
    assert [p.name for p in paths] == ["report.md", "ksr.png", "latency.png"]
    assert all(p.read_bytes()[:8] == PNG_MAGIC for p in paths[1:])
    md = paths[0].read_text()
    assert "![ksr](ksr.png)" in md and "![latency](latency.png)" in md
