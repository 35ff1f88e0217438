"""`nextword eval` of an order-3 model shows the bigram of the same smoothing beside it.

How the baseline is made: from the trigram file's own counts (Jelinek-Mercer: the raw
counts it stores, with the model's λ2; Kneser-Ney: raw bigram counts summed from the raw
trigram counts, discounts fitted). Outside checks: the raw counts against plain
``collections.Counter`` counting of the text (brute force, sharing only the text rules);
the baseline file against ``train --order 2`` on the same corpus (byte for byte); the
Kneser-Ney bigram's probabilities against the plain-dict oracle ``DictKneserNey`` (checked
by hand and against nltk.lm in tests/test_reference_kn.py). Corpus: CPython's
``pydoc_data.topics`` (real English shipped with Python).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from collections import Counter
from pathlib import Path

import pytest

import nextword
from nextword.baselines import key_sentences, raw_bigram_counts, write_same_smoothing_bigram
from nextword.errors import InvalidArgumentError
from nextword.evaluate import evaluate, is_held_out
from nextword.reference_kn import DictKneserNey
from nextword.text import BOS, EOS, UNK

ROOT = Path(__file__).resolve().parent.parent
ENV = dict(os.environ, PYTHONPATH=str(ROOT))


def _cli(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "nextword", *args], capture_output=True, text=True, env=ENV)


@pytest.fixture(scope="module")
def corpus(tmp_path_factory: pytest.TempPathFactory) -> dict[str, object]:
    from pydoc_data.topics import topics

    lines = [ln for k in sorted(topics)[:25] for ln in topics[k].splitlines() if ln.strip()]
    train = [m for m in lines if not is_held_out(m, 15)]
    held = [m for m in lines if is_held_out(m, 15)][:150]
    tmp = tmp_path_factory.mktemp("evb")
    (tmp / "held.txt").write_text("\n".join(held) + "\n", encoding="utf-8")
    for sm in ("kn", "jm"):
        for order in (2, 3):
            kw: dict[str, object] = {"lam": 0.7, "lam3": 0.4} if sm == "jm" and order == 3 else ({"lam": 0.7} if sm == "jm" else {})
            nextword.train_texts(train, tmp / f"{sm}{order}.nwm", order=order, smoothing=sm, min_count=2, **kw)  # type: ignore[arg-type]
    return {"tmp": tmp, "train": train, "held": held}


@pytest.mark.parametrize("sm", ["kn", "jm"])
def test_raw_bigram_counts_equal_plain_counting(corpus: dict[str, object], sm: str) -> None:
    tmp, train = Path(str(corpus["tmp"])), list(corpus["train"])  # type: ignore[call-overload]
    model = nextword.load(tmp / f"{sm}3.nwm")
    counts = raw_bigram_counts(model)
    names = [*model.word_keys(), EOS, UNK, BOS]
    # brute force: Counter over the sentences, words outside the vocabulary as <unk>
    streams, _ = key_sentences(train, min_count=2, max_vocab=30_000)
    known = set(model.word_keys())
    pairs: Counter[tuple[str, str]] = Counter()
    for toks in streams:
        seq = [BOS, *(t if t in known else UNK for t in toks), EOS]
        pairs.update(zip(seq, seq[1:]))
    got = {(names[int(v)], names[int(w)]): int(c) for (v, w), c in zip(counts.grams[1], counts.counts[1])}
    assert got == dict(pairs)
    uni = Counter[str]()
    for (_, w), c in pairs.items():
        uni[w] += c
    assert {names[int(w)]: int(c) for (w,), c in zip(counts.grams[0], counts.counts[0])} == dict(uni)


@pytest.mark.parametrize("sm", ["kn", "jm"])
def test_baseline_file_is_the_trained_bigram(corpus: dict[str, object], tmp_path: Path, sm: str) -> None:
    tmp, train = Path(str(corpus["tmp"])), list(corpus["train"])  # type: ignore[call-overload]
    how = write_same_smoothing_bigram(nextword.load(tmp / f"{sm}3.nwm"), tmp_path / "b.nwm")
    assert ("Kneser-Ney" if sm == "kn" else "λ2 = 0.7") in how
    # byte for byte what `train --order 2` writes from the same corpus (JM: with the trigram's λ2)
    assert (tmp_path / "b.nwm").read_bytes() == (tmp / f"{sm}2.nwm").read_bytes()
    if sm == "kn":  # and the oracle's probabilities
        b = nextword.load(tmp_path / "b.nwm")
        oracle = DictKneserNey(train, order=2, min_count=2)
        for ctx in ([BOS], ["the"], ["of"], ["zebra"]):
            for w in [*oracle.vocab[:40], EOS, UNK]:
                assert b.prob_after(w, [None if t == BOS else t for t in ctx]) == pytest.approx(oracle.prob(w, ctx), rel=1e-12)


def test_baseline_refuses_bigram_files_and_its_model(corpus: dict[str, object], tmp_path: Path) -> None:
    tmp = Path(str(corpus["tmp"]))
    with pytest.raises(InvalidArgumentError, match="order 2"):
        write_same_smoothing_bigram(nextword.load(tmp / "kn2.nwm"), tmp_path / "x.nwm")
    before = (tmp / "kn3.nwm").read_bytes()
    with pytest.raises(InvalidArgumentError, match="kn3.nwm"):
        write_same_smoothing_bigram(nextword.load(tmp / "kn3.nwm"), tmp / "kn3.nwm")
    assert (tmp / "kn3.nwm").read_bytes() == before


@pytest.mark.parametrize("sm", ["kn", "jm"])
def test_cli_eval_reports_the_bigram_of_the_same_smoothing(corpus: dict[str, object], tmp_path: Path, sm: str) -> None:
    tmp, held = Path(str(corpus["tmp"])), list(corpus["held"])  # type: ignore[call-overload]
    extra = ["--lam", "0.5"] if sm == "jm" else []
    r = _cli("eval", str(tmp / f"{sm}3.nwm"), str(tmp / "held.txt"), "-k", "1", "3", "--json", "--report", str(tmp_path / "rep"), *extra)
    assert r.returncode == 0, r.stderr
    data = json.loads(r.stdout)
    b = data["baselines"]["bigram"]
    assert b["name"] == ("Kneser-Ney" if sm == "kn" else "Jelinek-Mercer") + " bigram, same counts"
    # the same figures as simulating the trained bigram of the same smoothing (JM: with the query λ 0.5)
    ref = nextword.load(tmp / f"{sm}2.nwm", lam=0.5 if sm == "jm" else None)
    o, _ = evaluate(ref, [("held", held)], (1, 3))
    assert [row["ksr"] for row in b["per_k"]] == [o.per_k[1].ksr, o.per_k[3].ksr]
    assert b["perplexity"] == o.perplexity
    if sm == "jm":
        assert "λ2 = 0.5" in b["how"] and "highest order only (λ = 0.999)" in data["baselines"]["lambda"]
    md = (tmp_path / "rep" / "report.md").read_text(encoding="utf-8")
    assert f"| {b['name']} |" in md and "what the two-word context buys" in md
    text = _cli("eval", str(tmp / f"{sm}3.nwm"), str(tmp / "held.txt"), "-k", "3", *extra).stdout
    assert f"{b['name']}: KSR@3" in text


def test_no_bigram_baseline_for_bigram_files_or_when_off(corpus: dict[str, object]) -> None:
    tmp = Path(str(corpus["tmp"]))
    for args in (["kn2.nwm"], ["jm2.nwm"], ["kn3.nwm", "--no-baselines"]):
        r = _cli("eval", str(tmp / args[0]), str(tmp / "held.txt"), "-k", "3", "--json", *args[1:])
        assert r.returncode == 0, r.stderr
        assert "bigram" not in json.loads(r.stdout)["baselines"]


def test_ksr_figure_shows_the_bigram_series() -> None:
    pytest.importorskip("matplotlib")
    from nextword.report import ksr_figure

    def per_k(ksr: float) -> list[dict[str, float]]:
        return [{"k": 3, "ksr": ksr, "ceiling_ksr": 0.6}]

    data = {"overall": {"per_k": per_k(0.4)},
            "baselines": {"bigram": {"name": "Kneser-Ney bigram, same counts", "how": "x", "per_k": per_k(0.35)}}}
    ax = ksr_figure(data).axes[0]
    lines = {ln.get_label(): ln for ln in ax.get_lines()}
    assert list(lines["Kneser-Ney bigram, same counts"].get_ydata()) == [35.0]


def test_a_file_whose_totals_are_not_sums_is_refused(corpus: dict[str, object], monkeypatch: pytest.MonkeyPatch) -> None:
    # a pruned file keeps context totals above the sums of its kept n-grams (dropped mass): the raw
    # counts cannot be recovered from it, so no baseline is made (eval notes it and goes on)
    import dataclasses

    model = nextword.load(Path(str(corpus["tmp"])) / "kn3.nwm")
    levels = model.stored_levels()
    bumped = levels[2].ctx_total.copy()
    bumped[0] += 1
    monkeypatch.setattr(model, "stored_levels", lambda: [*levels[:2], dataclasses.replace(levels[2], ctx_total=bumped)])
    with pytest.raises(InvalidArgumentError, match="pruned"):
        raw_bigram_counts(model)
