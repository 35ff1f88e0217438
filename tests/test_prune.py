"""Pruning to a size budget: the budget holds, unigrams stay, the model stays a distribution."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import nextword
from nextword.counts import CountBuilder
from nextword.prune import parse_size, prune_to_size, tables_from_model, vocabulary_bytes
from nextword.store import atomic_write


@pytest.fixture(scope="module")
def lines() -> list[str]:
    from pydoc_data.topics import topics  # real English shipped with CPython

    return [ln for k in sorted(topics)[:40] for ln in topics[k].splitlines() if ln.strip()]


def test_parse_size() -> None:
    assert parse_size("4MB") == 4_000_000 and parse_size("1.5MiB") == 1_572_864 and parse_size("250000") == 250_000
    with pytest.raises(nextword.InvalidArgumentError, match="cannot read a size"):
        parse_size("four")


@pytest.mark.parametrize("vocabulary", [False, True])
@pytest.mark.parametrize("rule", ["entropy", "count"])
def test_pruned_model_fits_keeps_unigrams_and_sums_to_one(lines: list[str], tmp_path: Path, rule: str, vocabulary: bool) -> None:
    b = CountBuilder()
    b.add_texts(lines)
    tables = b.tables(min_count=1)
    full = tmp_path / "full.nwm"
    nextword.store.write_model(tables, full, lam=0.9)
    floor = vocabulary_bytes(tables)
    budget = floor + (full.stat().st_size - floor) // 2  # half of the pairs' bytes
    pruned_tables, chunks, info = prune_to_size(tables, budget, rule=rule, lam=0.9, vocabulary=vocabulary)  # type: ignore[arg-type]
    out = tmp_path / "pruned.nwm"
    atomic_write(out, chunks)
    assert out.stat().st_size <= budget and (info["removed"] > 0 or info["words_removed"] > 0)
    m = nextword.load(out, verify=True)
    assert m.format_version == (1, 2)
    unig = np.asarray(m._unig)
    if not vocabulary:
        assert np.array_equal(unig, tables.unigram)  # no unigram is ever removed
    else:  # kept words keep their counts; the dropped words' mass is <unk>'s now
        n = m.n_words
        assert info["words_removed"] == tables.n_words - n
        kept = [tables.keys.index(nextword.text.fold(w)) for w, _ in m.words()]
        assert np.array_equal(unig[:n], tables.unigram[kept])
        assert unig[n] == tables.unigram[-2] and unig.sum() == tables.unigram.sum()
        if info["removed"] == 0 and info["words_removed"] > 0:  # no budget left unused: one more word overflows
            from nextword.prune import drop_words, prune_tables, word_values

            wv = word_values(tables, rule, 0.9)  # type: ignore[arg-type]
            mask = np.isin(np.asarray(tables.keys), [nextword.text.fold(w) for w, _ in m.words()])
            best_dropped = np.flatnonzero(~mask)[np.argmax(wv[~mask])]
            mask[best_dropped] = True
            bigger = drop_words(tables, mask)
            size = sum(len(c) for c in nextword.store.encode_sections(
                nextword.store.build_sections(prune_tables(bigger, np.ones(len(bigger.pair_count), dtype=bool)), lam=0.9), minor=2))
            assert size > budget
    vocab = [w for w, _ in m.words()] + ["</s>", "<unk>"]
    for prev in [None, "the", "is", "a", "<unk>", "object"]:
        assert math.fsum(m.prob(w, prev) for w in vocab) == pytest.approx(1.0, abs=1e-12)
    # exact ranking still holds on pruned rows: compare with scoring every word by prob()
    for prev in [None, "the", "a", "is"]:
        for prefix in ["", "t", "ex"]:
            want = sorted(
                ((m.prob(w, prev), nextword.text.fold(w)) for w, _ in m.words() if nextword.text.fold(w).startswith(prefix)),
                key=lambda t: (-t[0], t[1]),
            )[:5]
            assert [(k, p) for k, p in m.rank_ids(prev, prefix, 5)] == [(k, p) for p, k in want]
    # an existing model prunes to the same result as its counts
    again, _, _ = prune_to_size(tables_from_model(nextword.load(full)), budget, rule=rule, lam=0.9, vocabulary=vocabulary)  # type: ignore[arg-type]
    assert np.array_equal(again.pair_count, pruned_tables.pair_count)


def test_budget_below_the_vocabulary_is_a_clear_error(lines: list[str]) -> None:
    b = CountBuilder()
    b.add_texts(lines[:200])
    with pytest.raises(nextword.InvalidArgumentError, match="below the vocabulary alone"):
        prune_to_size(b.tables(min_count=1), 1000, vocabulary=False)


def test_train_with_max_size(lines: list[str], tmp_path: Path) -> None:
    import os
    import subprocess
    import sys

    corpus = tmp_path / "c.txt"
    corpus.write_text("\n".join(lines) + "\n")
    full = tmp_path / "full.nwm"
    nextword.train(corpus, full, min_count=1)
    b = CountBuilder()
    b.add_texts(lines)
    floor = vocabulary_bytes(b.tables(min_count=1))
    budget = floor + (full.stat().st_size - floor) // 3
    out = tmp_path / "small.nwm"
    env = dict(os.environ, PYTHONPATH=str(Path(__file__).resolve().parent.parent))
    r = subprocess.run([sys.executable, "-m", "nextword", "train", str(corpus), "-o", str(out), "--min-count", "1",
                        "--max-size", str(budget)], capture_output=True, text=True, env=env)
    assert r.returncode == 0, r.stderr
    assert out.stat().st_size <= budget
    assert nextword.load(out, verify=True).n_words <= nextword.load(full).n_words


@settings(max_examples=25, deadline=None)
@given(
    st.lists(st.lists(st.sampled_from(["a", "b", "c", "d", "e", "f"]), min_size=1, max_size=8).map(" ".join),
             min_size=1, max_size=10),
    st.sampled_from([0.0, 0.5, 0.9, 0.99]),
)
def test_entropy_score_is_the_exact_relative_entropy_of_removing_the_pair(msgs: list[str], lam: float) -> None:
    # Stolcke (1998), eq. for D(p || p'): the weighted relative entropy between the model
    # with and without one pair. Brute force: write both models, ask each for P(w | v)
    # over every outcome, sum P(v) · Σ_w P ln(P / P') with P(v) = c(v)/N.
    import tempfile

    from nextword.prune import pair_scores, prune_tables
    from nextword.store import write_model

    b = CountBuilder()
    b.add_texts(msgs)
    tables = b.tables(min_count=1)
    scores = pair_scores(tables, "entropy", lam)
    n = tables.n_words
    names = tables.keys + ["</s>", "<unk>", "<s>"]
    outcomes = tables.keys + ["</s>", "<unk>"]
    total = float(tables.unigram.sum())
    with tempfile.TemporaryDirectory() as tmp:
        full_path = Path(tmp) / "full.nwm"
        write_model(prune_tables(tables, np.ones(len(tables.pair_count), dtype=bool)), full_path, lam=lam)
        full = nextword.load(full_path)
        for j in range(len(tables.pair_count)):
            keep = np.ones(len(tables.pair_count), dtype=bool)
            keep[j] = False
            path = Path(tmp) / f"p{j}.nwm"
            write_model(prune_tables(tables, keep), path, lam=lam)
            pruned = nextword.load(path)
            v = int(tables.pair_left[j])
            prev = None if v == n + 2 else names[v]
            cv = float(tables.pair_count[tables.pair_left == v].sum())
            d = 0.0
            for w in outcomes:
                p, q = full.prob(w, prev), pruned.prob(w, prev)
                if p > 0:
                    d += p * (math.log(p / q) if q > 0 else math.inf)
            want = cv / total * d
            assert scores[j] == pytest.approx(want, rel=1e-9, abs=1e-12), (j, names[v])
            pruned.close()
        full.close()


# -- shrinking the vocabulary ---------------------------------------------------------------------


RARE = ["bell", "brake", "chain", "crank", "fork", "gear", "hub", "pedal", "rim", "saddle", "spoke", "tube"]


@settings(max_examples=40, deadline=None)
@given(st.lists(st.lists(st.sampled_from(RARE), min_size=1, max_size=6), min_size=1, max_size=12), st.integers(1, 15))
def test_dropping_the_rarest_words_equals_retraining_with_a_smaller_vocabulary(rows: list[list[str]], keep: int) -> None:
    # An independent path to the same counts: CountBuilder.tables(max_vocab=K) keeps the K most
    # frequent words (ties by key) and maps the rest to <unk> while counting. The rare words are
    # always separated by "the", so no two unknown words are ever adjacent (the counter merges
    # runs of unknown tokens into one, which dropping cannot know about).
    from nextword.prune import drop_words

    msgs = [" ".join(f"the {w}" for w in row) for row in rows]
    b = CountBuilder()
    b.add_texts(msgs)
    full = b.tables(min_count=1)
    keep = min(keep, full.n_words)
    mask = np.arange(full.n_words) < keep
    dropped = drop_words(full, mask)
    want = b.tables(min_count=1, max_vocab=keep)
    assert dropped.keys == want.keys and dropped.displays == want.displays
    assert np.array_equal(dropped.unigram, want.unigram)
    assert np.array_equal(dropped.pair_left, want.pair_left)
    assert np.array_equal(dropped.pair_right, want.pair_right)
    assert np.array_equal(dropped.pair_count, want.pair_count)
    assert dropped.history is None


@pytest.mark.parametrize("rule", ["entropy", "count"])
def test_a_budget_below_the_vocabulary_shrinks_it(lines: list[str], tmp_path: Path, rule: str) -> None:
    b = CountBuilder()
    b.add_texts(lines)
    tables = b.tables(min_count=1)
    floor = vocabulary_bytes(tables)
    budget = floor * 6 // 10  # before: "below the vocabulary alone; lower max_vocab"
    _, chunks, info = prune_to_size(tables, budget, rule=rule, lam=0.9)  # type: ignore[arg-type]
    out = tmp_path / "small.nwm"
    atomic_write(out, chunks)
    assert out.stat().st_size <= budget
    m = nextword.load(out, verify=True)
    assert 0 < m.n_words < tables.n_words and info["words_removed"] == tables.n_words - m.n_words
    assert info["kept"] > 0  # the split keeps pairs too, not only words
    vocab = [w for w, _ in m.words()] + ["</s>", "<unk>"]
    for prev in [None, "the", "is", "<unk>", "zebra"]:
        assert math.fsum(m.prob(w, prev) for w in vocab) == pytest.approx(1.0, abs=1e-12)
    # the count rule drops the rarest words first: every kept word is at least as frequent as every dropped one
    if rule == "count":
        kept = {nextword.text.fold(w) for w, _ in m.words()}
        low = min(int(tables.unigram[i]) for i, k in enumerate(tables.keys) if k in kept)
        high = max((int(tables.unigram[i]) for i, k in enumerate(tables.keys) if k not in kept), default=0)
        assert low >= high


def test_info_splits_the_file_into_vocabulary_and_pair_bytes(lines: list[str], tmp_path: Path) -> None:
    # the section lengths come from the file's own section table (docs/FORMAT.md §4), read here with struct
    import json
    import os
    import subprocess
    import sys

    from nextword.store import ENTRY, HEADER

    b = CountBuilder()
    b.add_texts(lines)
    tables = b.tables(min_count=1)
    full = tmp_path / "full.nwm"
    nextword.store.write_model(tables, full, lam=0.9)
    _, chunks, _ = prune_to_size(tables, vocabulary_bytes(tables) * 8 // 10, lam=0.9)
    small = tmp_path / "small.nwm"
    atomic_write(small, chunks)
    env = dict(os.environ, PYTHONPATH=str(Path(__file__).resolve().parent.parent))
    for path in (full, small):
        data = path.read_bytes()
        lengths = {}
        for i in range(HEADER.unpack_from(data, 0)[3]):
            tag, _, _, length, _ = ENTRY.unpack_from(data, HEADER.size + i * ENTRY.size)
            lengths[tag.decode()] = length
        pair = sum(lengths[t] for t in ("SUCC", "CNTS", "BIGI", "BIGC", "SEGS", "SEGE", "SKYP", "SKYI", "SKYC"))
        vocab = sum(lengths[t] for t in lengths if t not in ("META", "SUCC", "CNTS", "BIGI", "BIGC", "SEGS", "SEGE", "SKYP", "SKYI", "SKYC"))
        r = subprocess.run([sys.executable, "-m", "nextword", "info", str(path), "--json"], capture_output=True, text=True, env=env)
        info = json.loads(r.stdout)
        assert info["pair_bytes"] == pair and info["vocabulary_bytes"] == vocab
        assert info["vocabulary_bytes"] + info["pair_bytes"] + info["other_bytes"] == len(data)
        assert info["vocabulary_share"] == pytest.approx(vocab / len(data))
        assert info["pair_bytes_per_pair"] == pytest.approx(pair / info["bigrams"])
        assert info["file_bytes_per_pair"] == pytest.approx(len(data) / info["bigrams"])
        text = subprocess.run([sys.executable, "-m", "nextword", "info", str(path)], capture_output=True, text=True, env=env).stdout
        assert "pair bytes per pair (vocabulary excluded)" in text and "whole file / pairs (vocabulary included)" in text
        assert f"{100 * vocab / len(data):.1f}%" in text


def test_prune_curve_command_prints_size_against_ksr_and_perplexity(lines: list[str], tmp_path: Path) -> None:
    import json
    import os
    import subprocess
    import sys

    from nextword.evaluate import evaluate, is_held_out

    train = [m for m in lines if not is_held_out(m, 20)]
    held = [m for m in lines if is_held_out(m, 20)]
    model = tmp_path / "m.nwm"
    nextword.train_texts(train, model, min_count=1)
    log = tmp_path / "held.txt"
    log.write_text("\n".join(held) + "\n")
    size = model.stat().st_size
    env = dict(os.environ, PYTHONPATH=str(Path(__file__).resolve().parent.parent))
    sizes = [str(size), str(size * 6 // 10), str(size * 3 // 10)]
    r = subprocess.run([sys.executable, "-m", "nextword", "prune", str(model), "--curve", str(log), "--sizes", *sizes,
                        "--messages", "30", "--json"], capture_output=True, text=True, env=env)
    assert r.returncode == 0, r.stderr
    res = json.loads(r.stdout)
    assert [(row["rule"], row["budget"]) for row in res["rows"]] == [(rule, int(s)) for rule in ("entropy", "count") for s in sizes]
    assert all(row["file_bytes"] <= row["budget"] for row in res["rows"])
    # each row is what evaluating that pruned model gives: recompute one with the library
    row = res["rows"][4]  # count rule, 60 %
    pruned, chunks, _ = prune_to_size(tables_from_model(nextword.load(model)), row["budget"], rule="count", lam=0.9)
    again = tmp_path / "again.nwm"
    atomic_write(again, chunks)
    m = nextword.load(again)
    overall, _ = evaluate(m, [("held", held[:30])], (3,))
    assert row["ksr"] == overall.per_k[3].ksr and row["perplexity"] == pytest.approx(m.perplexity(held), rel=1e-12)
    assert (row["words"], row["pairs"]) == (m.n_words, m.n_bigrams)
    assert res["rows"][0]["ksr"] >= res["rows"][2]["ksr"]  # the full model against 30 % of it (entropy)
    text = subprocess.run([sys.executable, "-m", "nextword", "prune", str(model), "--curve", str(log), "--sizes", *sizes[:2],
                           "--messages", "30"], capture_output=True, text=True, env=env)
    assert text.returncode == 0 and "KSR@3" in text.stdout and len(text.stdout.strip().splitlines()) == 2 + 4
    bad = subprocess.run([sys.executable, "-m", "nextword", "prune", str(model)], capture_output=True, text=True, env=env)
    assert bad.returncode == 2 and bad.stderr.startswith("nextword: error: prune needs -o/--output and --max-size")


@settings(max_examples=30, deadline=None)
@given(
    st.lists(st.lists(st.sampled_from(RARE + ["the", "a", "at"]), min_size=1, max_size=9).map(" ".join), min_size=1, max_size=15),
    st.floats(0.3, 1.0),
    st.sampled_from(["entropy", "count"]),
)
def test_any_budget_gives_a_valid_distribution(msgs: list[str], frac: float, rule: str) -> None:
    # invariant (common practice for interpolated models): after any pruning, every history's
    # probabilities over all words, </s> and <unk> sum to 1, and the file passes verify=True
    import tempfile

    b = CountBuilder()
    b.add_texts(msgs)
    tables = b.tables(min_count=1)
    with tempfile.TemporaryDirectory() as tmp:
        full = Path(tmp) / "full.nwm"
        nextword.store.write_model(tables, full, lam=0.9)
        budget = int(full.stat().st_size * frac)
        try:
            _, chunks, info = prune_to_size(tables, budget, rule=rule, lam=0.9)  # type: ignore[arg-type]
        except nextword.InvalidArgumentError as e:
            assert "below the smallest possible model" in str(e)  # not even one word fits
            return
        out = Path(tmp) / "p.nwm"
        atomic_write(out, chunks)
        assert out.stat().st_size <= budget
        m = nextword.load(out, verify=True)
        outcomes = [w for w, _ in m.words()] + ["</s>", "<unk>"]
        for prev in [None, "<unk>", *RARE[:3], "the"]:
            assert math.fsum(m.prob(w, prev) for w in outcomes) == pytest.approx(1.0, abs=1e-12)
        m.close()


def test_prune_curve_skips_budgets_below_the_smallest_model_and_draws_the_tradeoff(lines: list[str], tmp_path: Path) -> None:
    import json

    from nextword.cli import main
    from nextword.evaluate import is_held_out

    pytest.importorskip("matplotlib")
    model = tmp_path / "m.nwm"
    nextword.train_texts([m for m in lines if not is_held_out(m, 20)], model, min_count=1)
    log = tmp_path / "held.txt"
    log.write_text("\n".join(m for m in lines if is_held_out(m, 20)) + "\n")
    size = model.stat().st_size
    png = tmp_path / "sizes.png"
    import contextlib
    import io

    buf = io.StringIO()
    with contextlib.redirect_stdout(buf):
        code = main(["prune", str(model), "--curve", str(log), "--sizes", str(size * 6 // 10), "100",
                     "--messages", "20", "--plot", str(png), "--json"])
    assert code == 0
    res = json.loads(buf.getvalue())
    # 100 bytes is below any model: reported per rule, the other budget still measured
    assert [(s["rule"], s["budget"]) for s in res["skipped"]] == [("entropy", 100), ("count", 100)]
    assert "smallest possible model" in res["skipped"][0]["reason"]
    assert [(r["rule"], r["budget"]) for r in res["rows"]] == [("entropy", size * 6 // 10), ("count", size * 6 // 10)]
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" and res["plot"] == str(png)
