"""Keystroke simulation: hand-counted examples, closed forms, and an independent recount."""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import nextword
from nextword.evaluate import ceiling_keystrokes, evaluate, is_held_out, simulate_message, split_messages
from nextword.model import Suggestion
from nextword.corpus import open_sources

ROOT = Path(__file__).resolve().parent.parent
CORPUS = ["Bring the stand", "Bring the stand", "Bring the tubes"]


@pytest.fixture(scope="module")
def model(tmp_path_factory: pytest.TempPathFactory) -> nextword.Model:
    path = tmp_path_factory.mktemp("ev") / "m.nwm"
    nextword.train_texts(CORPUS, path, min_count=1)
    return nextword.load(path)


def test_hand_counted_keystrokes(model: nextword.Model) -> None:
    # counts: bring 3, the 3, stand 2, tubes 1; N = 9 words + 3 </s> = 12; λ = 0.9
    # "Bring": asked with "" -> only successor of <s> is bring, shown "Bring": 1 tap, space free
    # "the":   asked with "Bring " -> the: 1 tap, space free
    # "tubes": asked with "Bring the " -> stand .9*2/3+.1*2/12 = .617, tubes .9/3+.1/12 = .308
    #          k=1: stand only -> type "t" (1); asked "Bring the t" -> tubes .308 > the .025: 1 tap
    #          k=3: tubes is second -> 1 tap at once
    # k=1: 1 + 1 + 1 + 1 = 4 keystrokes for 15 characters, KSR = 11/15
    # k=3: 3 keystrokes, KSR = 12/15 = the ceiling (3 taps, 2 free spaces)
    out = simulate_message(model.suggest, "Bring the tubes", (1, 3))
    assert (out[1].keystrokes, out[3].keystrokes, out[1].characters) == (4, 3, 15)
    assert out[1].ksr == pytest.approx(11 / 15) and out[3].ksr == pytest.approx(12 / 15)
    assert out[1].ceiling_ksr == out[3].ceiling_ksr == pytest.approx(12 / 15)
    assert (out[1].hits_before_typing, out[3].hits_before_typing) == (2, 3)
    assert out[1].letters_before_accept == 1 and out[1].mean_letters_before_accept == pytest.approx(1 / 3)


def test_exact_spelling_is_required(model: nextword.Model) -> None:
    # "bring" typed in lowercase at a sentence start: the suggestion "Bring" does not match,
    # so the user types b (1) then is offered "bring" (lowercase prefix wins): 1 tap,
    # space free; then "the" 1 tap, space free; "stand" offered at once: 1 tap -> 4 of 15
    out = simulate_message(model.suggest, "bring the stand", (1,))
    assert out[1].keystrokes == 4


def test_other_characters_cost_one_each(model: nextword.Model) -> None:
    # "Bring 2 stands!" = 15 chars. Bring: tap, space free. "2": 1. " ": 1.
    # "stands" (not in vocabulary): never offered -> 6 letters. "!": 1. Total 1+1+1+6+1 = 10
    out = simulate_message(model.suggest, "Bring 2 stands!", (1,))
    assert out[1].keystrokes == 10
    # the ceiling: 2 words -> 2 taps; only "Bring" is followed by a single space; 15 - 11 letters
    # + 2 taps - 1 free space = 5
    assert ceiling_keystrokes("Bring 2 stands!") == 5


def _perfect(message: str):
    starts = {m.start(): m.group() for m in re.finditer(r"[^\W_]+(?:['’\-‐‑][^\W_]+)*", message)}

    def suggest(text: str, k: int) -> list[Suggestion]:
        word = starts.get(len(text))
        return [Suggestion(word, 1.0)] if word else []

    return suggest


@settings(max_examples=200, deadline=None)
@given(st.text(alphabet="ab '-.,!?7 \n", max_size=40))
def test_ceiling_equals_its_closed_form(message: str) -> None:
    # a predictor that always offers the intended word first: one tap per word, and a single
    # following space free (the closed form), whatever the message
    message = nextword.text.normalize(message)
    if any(not re.search(r"[^\W\d_]", w) for w in re.findall(r"[^\W_]+(?:['’\-‐‑][^\W_]+)*", message)):
        return  # digit-only tokens are numbers, not words: covered by the hand-counted test
    out = simulate_message(_perfect(message), message, (1,))
    words = re.findall(r"[^\W_]+(?:['’\-‐‑][^\W_]+)*", message)
    followed = len(re.findall(r"[^\W_]+(?:['’\-‐‑][^\W_]+)* ", message))
    assert out[1].keystrokes == ceiling_keystrokes(message)
    assert out[1].keystrokes == len(message) - sum(map(len, words)) + len(words) - followed


def test_never_asks_twice_or_about_typed_characters(model: nextword.Model) -> None:
    asked: list[str] = []

    def spy(text: str, k: int) -> list[Suggestion]:
        asked.append(text)
        return model.suggest(text, k)

    message = "Bring the tubes and the stand, then bring the stand again"
    simulate_message(spy, message, (1, 3, 5))
    assert all(message.startswith(t) for t in asked)
    lengths = [len(t) for t in asked]
    assert lengths == sorted(set(lengths))  # strictly increasing: each position asked at most once


def _naive_keystrokes(model: nextword.Model, message: str, k: int) -> int:
    """A second, independent count: walk the characters, ask with this k only."""
    words = {m.start(): m.end() for m in re.finditer(r"[^\W_]+(?:['’\-‐‑][^\W_]+)*", message)
             if re.search(r"[^\W\d_]", m.group())}
    keys, i = 0, 0
    while i < len(message):
        if i in words:
            end = words[i]
            word = message[i:end]
            pos = i
            while pos < end and word not in [s.word for s in model.suggest(message[:pos], k)]:
                pos += 1
                keys += 1
            if pos < end:  # accepted with one tap
                keys += 1
                i = end + (message[end : end + 1] == " ")
            else:
                i = end
        else:
            keys += 1
            i += 1
    return keys


def test_eval_command_equals_an_independent_recount(tmp_path: Path) -> None:
    from pydoc_data.topics import topics  # real English shipped with CPython

    lines = [ln for k in sorted(topics)[:15] for ln in topics[k].splitlines() if ln.strip()]
    train, test = lines[: int(len(lines) * 0.8)], lines[int(len(lines) * 0.8) :][:60]
    model_path = tmp_path / "m.nwm"
    nextword.train_texts(train, model_path, min_count=1)
    log = tmp_path / "held.jsonl"
    log.write_text("".join(json.dumps({"text": t, "app": "x"}) + "\n" for t in test), encoding="utf-8")
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    r = subprocess.run(
        [sys.executable, "-m", "nextword", "eval", str(model_path), str(log), "-k", "1", "3", "--json", "--no-baselines"],
        capture_output=True, text=True, env=env,
    )
    assert r.returncode == 0, r.stderr
    data = json.loads(r.stdout)
    model = nextword.load(model_path)
    for row in data["overall"]["per_k"]:
        want = sum(_naive_keystrokes(model, nextword.text.normalize(t), row["k"]) for t in test)
        assert row["keystrokes"] == want
        assert row["characters"] == sum(len(nextword.text.normalize(t)) for t in test)
    assert data["overall"]["latency"]["calls"] > 0


def test_perplexity_and_oov_rate(model: nextword.Model) -> None:
    overall, per_log = evaluate(model, [("a", ["Bring the stand"]), ("b", ["Bring zebras"])], (1,))
    # words: bring the stand | bring zebras -> 5 word tokens, 1 out of vocabulary
    assert overall.word_tokens == 5 and overall.oov_tokens == 1
    assert per_log[0].perplexity == pytest.approx(model.perplexity(["Bring the stand"]))
    assert overall.perplexity == pytest.approx(model.perplexity(["Bring the stand", "Bring zebras"]))


def test_lambda_override_equals_a_model_loaded_with_it(model: nextword.Model) -> None:
    logs = [("x", ["Bring the tubes", "Bring the stand"])]
    a, _ = evaluate(model, logs, (1, 3), lam=0.2)
    b, _ = evaluate(nextword.load(model.path, lam=0.2), logs, (1, 3))
    assert [a.per_k[k].keystrokes for k in (1, 3)] == [b.per_k[k].keystrokes for k in (1, 3)]


def test_split_is_by_content_not_order(tmp_path: Path) -> None:
    msgs = [f"message number {i} about repairs" for i in range(200)]
    a, b = tmp_path / "a.txt", tmp_path / "b.txt"
    a.write_text("\n".join(msgs) + "\n")
    b.write_text("\n".join(reversed(msgs)) + "\n")
    outs = []
    for src in (a, b):
        tr, te = tmp_path / f"{src.stem}.train", tmp_path / f"{src.stem}.test"
        counts = split_messages(open_sources(src), tr, te, test_percent=20)
        assert counts["train"] + counts["test"] == 200
        outs.append(set(te.read_text().splitlines()))
    assert outs[0] == outs[1] == {m for m in msgs if is_held_out(m, 20)}
    assert 20 <= len(outs[0]) <= 60  # about 20% of 200 (binomial, generous bounds)


def test_split_keeps_json_lines_whole(tmp_path: Path) -> None:
    src = tmp_path / "log.jsonl"
    rows = [{"text": f"hello {i}", "user": i} for i in range(50)]
    src.write_text("".join(json.dumps(r) + "\n" for r in rows))
    tr, te = tmp_path / "tr.jsonl.gz", tmp_path / "te.jsonl"
    split_messages(open_sources(src), tr, te, test_percent=30)
    import gzip

    back = [json.loads(x) for x in gzip.decompress(tr.read_bytes()).decode().splitlines()]
    back += [json.loads(x) for x in te.read_text().splitlines()]
    assert sorted(back, key=lambda r: r["user"]) == rows


def test_eval_with_baselines_and_report(tmp_path: Path) -> None:
    from pydoc_data.topics import topics  # real English shipped with CPython

    lines = [ln for k in sorted(topics)[:30] for ln in topics[k].splitlines() if ln.strip()]
    corpus = tmp_path / "all.txt"
    corpus.write_text("\n".join(lines) + "\n", encoding="utf-8")
    env = dict(os.environ, PYTHONPATH=str(ROOT))

    def cli(*args: str) -> subprocess.CompletedProcess[str]:
        return subprocess.run([sys.executable, "-m", "nextword", *args], capture_output=True, text=True, env=env)

    train, test = tmp_path / "train.txt", tmp_path / "test.txt"
    assert cli("split", str(corpus), "--train-out", str(train), "--test-out", str(test), "--test-percent", "10").returncode == 0
    model = tmp_path / "m.nwm"
    assert cli("train", str(train), "-o", str(model)).returncode == 0
    r = cli("eval", str(model), str(test), "-k", "1", "3", "--train-data", str(train),
            "--baseline-queries", "30", "--report", str(tmp_path / "rep"))
    assert r.returncode == 0, r.stderr
    out = r.stdout
    for needle in ("KSR", "unigram only (λ = 0)", "bigram only (λ = 0.999)", "plain-dict implementation",
                   "identical rankings 30 of 30", "nltk.lm MLE(2)", "calls/s end to end"):
        assert needle in out, needle
    md = (tmp_path / "rep" / "report.md").read_text()
    assert "## Baselines, same logs, same run" in md and "| this model |" in md
    try:
        import matplotlib  # noqa: F401
    except ImportError:
        assert "Plots skipped" in md
    else:
        assert (tmp_path / "rep" / "ksr.png").stat().st_size > 1000


def test_bad_k_for_eval_is_a_usage_error(tmp_path: Path) -> None:
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    r = subprocess.run([sys.executable, "-m", "nextword", "eval", "m.nwm", "x.txt", "-k", "0"],
                       capture_output=True, text=True, env=env)
    assert r.returncode == 2 and r.stderr.count("\n") == 1 and "-k" in r.stderr
