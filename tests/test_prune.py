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


@pytest.mark.parametrize("rule", ["entropy", "count"])
def test_pruned_model_fits_keeps_unigrams_and_sums_to_one(lines: list[str], tmp_path: Path, rule: str) -> None:
    b = CountBuilder()
    b.add_texts(lines)
    tables = b.tables(min_count=1)
    full = tmp_path / "full.nwm"
    nextword.store.write_model(tables, full, lam=0.9)
    floor = vocabulary_bytes(tables)
    budget = floor + (full.stat().st_size - floor) // 2  # half of the pairs' bytes
    pruned_tables, chunks, info = prune_to_size(tables, budget, rule=rule, lam=0.9)  # type: ignore[arg-type]
    out = tmp_path / "pruned.nwm"
    atomic_write(out, chunks)
    assert out.stat().st_size <= budget and info["removed"] > 0
    m = nextword.load(out, verify=True)
    assert m.format_version == (1, 2)
    assert np.array_equal(np.asarray(m._unig), tables.unigram)  # no unigram is ever removed
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
    again, _, _ = prune_to_size(tables_from_model(nextword.load(full)), budget, rule=rule, lam=0.9)  # type: ignore[arg-type]
    assert np.array_equal(again.pair_count, pruned_tables.pair_count)


def test_budget_below_the_vocabulary_is_a_clear_error(lines: list[str]) -> None:
    b = CountBuilder()
    b.add_texts(lines[:200])
    with pytest.raises(nextword.InvalidArgumentError, match="below the vocabulary alone"):
        prune_to_size(b.tables(min_count=1), 1000)


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
    assert nextword.load(out, verify=True).n_words == nextword.load(full).n_words


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
