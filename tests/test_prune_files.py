"""Pruned model files of every kind (JM/KN, order 2/3), read back by the engine.

What is checked on each pruned file (format 1.4 for KN and order 3, dropped mass stored):

* it loads, also with ``verify=True``, and fits its budget;
* every context's probabilities over all outcomes sum to 1 (``Model.prob_after``; the
  invariant of the dropped-mass formula, docs/SEAMS.md "Probabilities sum to 1");
* every probability equals the pruned model's own, computed outside the engine's query
  side: :func:`nextword.prune.context_distributions` of the pruned fitted estimator (α, γ
  of the estimator classes, checked against the plain-dict oracles ``DictKneserNey`` and
  ``DictJM`` in tests/test_prune_ngram.py), or for a pruned JM bigram the fit of the kept
  pairs (c(v) = the kept row sums, as its file stores);
* ``Model.rank_after`` and ``Model.suggest`` equal a brute-force ranking of every word of
  the prefix range by those probabilities (ties by key), with the default skybands and
  with bands forced onto tiny segments (``skyband_min=1``, ``skyband_k=3``);
* the kept trigrams' context bigrams are all stored (the structural rule of the pruning).
"""

from __future__ import annotations

import json
import math
import random
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import nextword
from nextword.counts import CountBuilder, CountTables
from nextword.errors import InvalidArgumentError
from nextword.estimators import Fitted, FittedKneserNey, JelinekMercer, KneserNey
from nextword.ngrams import NgramCounts
from nextword.prune import (context_distributions, ngram_file, prune_model, prune_ngrams_to_size, prune_to_size, unigrams_only,
                            vocabulary_bytes)
from nextword.reference_kn import Discounts
from nextword.store import build
from test_model_kn import random_messages

SETTINGS = settings(max_examples=12, deadline=None,
                    suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
#: words sharing prefixes, so prefix ranges hold several candidates (invented data)
VOCAB = ["bike", "bell", "belt", "brake", "brick", "bridge", "chain", "chair", "crank", "crane", "the", "then", "there",
         "a", "an", "and", "lane", "late", "harbor", "tube", "tire", "tired", "fix", "fit", "is", "it", "to", "too"]
KINDS = [("jm", 2), ("jm", 3), ("kn", 2), ("kn", 3)]


def _counts(messages: list[str], order: int) -> tuple[CountTables, NgramCounts]:
    b = CountBuilder(order=order)
    b.add_texts(messages)
    return b.ngram_counts(min_count=1)


def _size(chunks: list[bytes | memoryview]) -> int:
    return sum(len(c) for c in chunks)


def _pruned_file(messages: list[str], smoothing: str, order: int, share: float, build_kw: dict[str, int],
                 path: Path) -> tuple[Fitted, CountTables, int] | None:
    """Prune the model of ``messages`` to ``share`` of the way from its vocabulary alone to its full size; write it.

    Returns (the pruned fitted model in the counts' ids, the tables, the budget), or None
    for a corpus too small to prune.
    """
    tables, counts = _counts(messages, order)
    if tables.n_words < 2 or len(counts.grams[1]) < 2:
        return None
    if smoothing == "jm" and order == 2:
        est: JelinekMercer | KneserNey = JelinekMercer((0.8,))
        full = _size(prune_to_size(tables, 10**9, lam=0.8, vocabulary=False, **build_kw)[1])
        floor = vocabulary_bytes(tables, lam=0.8, **build_kw)
        budget = int(floor + share * (full - floor))
        small, chunks, _ = prune_to_size(tables, budget, lam=0.8, vocabulary=False, **build_kw)
        seen = np.flatnonzero(small.unigram)
        kept = NgramCounts(small.n_words, (seen[:, None].astype(np.int64), np.column_stack((small.pair_left, small.pair_right))),
                           (np.asarray(small.unigram[seen], np.int64), np.asarray(small.pair_count, np.int64)))
        fitted = est.fit(kept)  # c(v) = the kept row sums: the pruned pair file's rule
    else:
        est = KneserNey() if smoothing == "kn" else JelinekMercer((0.8, 0.6))
        full_fit = est.fit(counts)
        full = _size(ngram_file(counts, tables, full_fit, **build_kw))
        floor = _size(ngram_file(counts, tables, unigrams_only(full_fit), **build_kw))
        budget = int(floor + share * (full - floor))
        fitted, _, _, chunks, _ = prune_ngrams_to_size(counts, tables, est, budget, vocabulary=False, **build_kw)
    path.write_bytes(b"".join(bytes(c) for c in chunks))
    assert path.stat().st_size <= budget
    return fitted, tables, budget


def _check_file(path: Path, fitted: Fitted, tables: CountTables, rng: random.Random) -> None:
    model = nextword.load(path, verify=True)
    assert (model.estimator, model.order) == (fitted.name, fitted.order)
    keys = tables.keys
    n = tables.n_words
    assert sorted(model.word_keys()) == sorted(keys)
    tok = {k: i for i, k in enumerate(keys)}
    names = [*keys, "</s>", "<unk>"]
    if fitted.name == "kn":
        # the file's discounts: the store may fall back to D1 at an order (docs/FORMAT.md §7.11, a stated note)
        lv = fitted.levels
        fitted = FittedKneserNey(NgramCounts(n, tuple(x.grams for x in lv), tuple(x.value for x in lv)), lv,
                                 [Discounts(*d) for d in model.discounts], {})
    dist = context_distributions(fitted)
    histories: list[list[str]] = [["<s>"], ["<s>", rng.choice(keys)], ["<unk>", rng.choice(keys)]]
    histories += [[rng.choice(names[:-2] + ["<unk>"]) for _ in range(2)] for _ in range(5)]
    for hist in histories:
        ids = tuple(fitted.bos if t == "<s>" else tok.get(t, n + 1) for t in hist)
        want = dist(fitted.context_of(ids))
        got = np.asarray(model.probs_after(names, hist))
        assert math.fsum(got.tolist()) == pytest.approx(1.0, abs=1e-9), hist  # every context sums to 1
        assert np.allclose(got, want, rtol=1e-9, atol=1e-15), (hist, got, want)
        for prefix in ("", "b", "br", "t", "th", rng.choice(keys)[:1], "zz"):
            cands = [k for k in keys if k.startswith(prefix)]
            for k in (1, 3, 5):
                brute = sorted(cands, key=lambda w: (-want[tok[w]], w))[:k]
                ranked = model.rank_after(hist, prefix, k)
                assert len(ranked) == len(brute)
                # the same top k: equal words, or equal probabilities where two words tie to the last bits
                for (word, p), b in zip(ranked, brute):
                    assert word.startswith(prefix) and p == pytest.approx(want[tok[word]], rel=1e-9)
                    assert word == b or want[tok[word]] == pytest.approx(want[tok[b]], rel=1e-12), (hist, prefix, k)
                if hist[0] != "<unk>" and all(t in tok for t in hist[1:]) and prefix:
                    # Model.suggest reads the same context from typed text (words of the same sentence)
                    typed = " ".join(hist[1:] if hist[0] == "<s>" else hist) + " " + prefix
                    if hist[0] == "<s>" and len(hist) == 1:
                        typed = prefix
                    shown = [s.word.casefold() for s in model.suggest(typed, k)]
                    assert shown == [w for w, _ in ranked], (typed, shown, ranked)
    if fitted.order == 3:  # the rule: every kept trigram's context (u, v) is a stored bigram
        bigrams = {tuple(r) for r in fitted.levels[1].grams.tolist()}
        assert all(tuple(r[:2]) in bigrams for r in fitted.levels[2].grams.tolist())
    model.close()


@SETTINGS
@given(seed=st.integers(0, 10**6), n_messages=st.integers(20, 80), kind=st.sampled_from(KINDS),
       share=st.sampled_from([0.0, 0.3, 0.7]), small_bands=st.booleans())
def test_pruned_files_of_every_kind_load_sum_to_one_and_rank_as_brute_force(
        tmp_path_factory: pytest.TempPathFactory, seed: int, n_messages: int, kind: tuple[str, int], share: float,
        small_bands: bool) -> None:
    rng = random.Random(seed)
    messages = random_messages(rng, n_messages, VOCAB)
    build_kw = {"skyband_min": 1, "skyband_k": 3} if small_bands else {}
    path = tmp_path_factory.mktemp("pruned") / "m.nwm"
    made = _pruned_file(messages, *kind, share, build_kw, path)
    if made is None:
        return
    fitted, tables, _ = made
    _check_file(path, fitted, tables, rng)


@pytest.mark.parametrize("smoothing,order", [("kn", 2), ("kn", 3), ("jm", 3)])
def test_the_written_file_is_store_build_of_the_pruned_model(tmp_path: Path, smoothing: str, order: int) -> None:
    # the pruned n-gram file goes through the store's own path for fitted models (dropped mass recorded)
    rng = random.Random(7)
    tables, counts = _counts(random_messages(rng, 120, VOCAB), order)
    est = KneserNey() if smoothing == "kn" else JelinekMercer((0.9, 0.7))
    full = _size(ngram_file(counts, tables, est.fit(counts)))
    floor = _size(ngram_file(counts, tables, unigrams_only(est.fit(counts))))
    pruned, c2, t2, chunks, info = prune_ngrams_to_size(counts, tables, est, (full + floor) // 2, vocabulary=False)
    assert info["removed"] > 0
    build(c2, t2, est, tmp_path / "b.nwm", fitted=pruned)
    assert (tmp_path / "b.nwm").read_bytes() == b"".join(bytes(c) for c in chunks)
    model = nextword.load(tmp_path / "b.nwm", verify=True)
    assert not model.totals_are_sums()  # the dropped mass is in the file


def test_a_bigram_context_of_a_kept_trigram_is_never_pruned() -> None:
    # the structural rule, on a model where the bigram alone scores lowest: a bigram (u, v)
    # with a valuable trigram (u, v, w) ranks with that trigram's value
    from nextword.prune import context_bigrams, keep_best, keep_contexts, suffix_bigrams, with_dependants

    counts = NgramCounts.from_sentences([[0, 1, 2], [0, 1, 2], [1, 0]], 3, 3)
    fitted = KneserNey().fit(counts)
    lev2, lev3 = fitted.levels[1], fitted.levels[2]
    values = [np.zeros(0), np.zeros(len(lev2.grams)), np.zeros(len(lev3.grams))]
    t = int(np.flatnonzero((lev3.grams == [0, 1, 2]).all(axis=1))[0])
    values[2][t] = 1.0  # the one trigram worth keeping; every bigram worth nothing alone
    ctx = context_bigrams(fitted)
    assert lev2.grams[ctx[t]].tolist() == [0, 1]
    sfx = suffix_bigrams(fitted)
    assert lev2.grams[sfx[t]].tolist() == [1, 2]
    ranked = with_dependants(fitted, values)
    assert ranked[1][ctx[t]] == 1.0 and ranked[1][sfx[t]] == 1.0 and ranked[2][t] == 1.0
    # by the raw values only the trigram: the rule adds its context (0, 1) and its suffix (1, 2)
    keep = keep_contexts(fitted, keep_best(values, 1))
    assert keep[2] is not None and keep[1] is not None
    assert bool(keep[2][t]) and bool(keep[1][ctx[t]]) and bool(keep[1][sfx[t]]) and int(keep[1].sum()) == 2
    with pytest.raises(InvalidArgumentError, match="not a stored bigram"):
        from nextword.prune import prune_fitted

        bad = prune_fitted(fitted, [None, np.zeros(len(lev2.grams), bool), np.ones(len(lev3.grams), bool)])
        context_bigrams(bad)


@pytest.mark.parametrize("smoothing,order", KINDS)
def test_cli_prunes_every_kind_and_the_file_loads_verified(tmp_path: Path, smoothing: str, order: int) -> None:
    from pydoc_data.topics import topics  # real English text shipped with Python

    lines = [ln for k in sorted(topics)[:25] for ln in topics[k].splitlines() if ln.strip()]
    full = tmp_path / "full.nwm"
    nextword.train_texts(lines, full, order=order, smoothing=smoothing, skyband_min=2, skyband_k=4)
    budget = int(full.stat().st_size * 0.6)
    out = tmp_path / "small.nwm"
    r = subprocess.run([sys.executable, "-m", "nextword", "prune", str(full), "-o", str(out), "--max-size", str(budget),
                        "--json"], capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    info = json.loads(r.stdout)
    assert out.stat().st_size == info["bytes"] <= budget and info["removed"] > 0
    small = nextword.load(out, verify=True)
    # the file's skyband settings carry over; the library call writes the same bytes
    assert (small.header()["skyband_k"], small.header()["skyband_min"]) == (4, 2)
    chunks, _ = prune_model(nextword.load(full), budget)
    assert b"".join(bytes(c) for c in chunks) == out.read_bytes()
    history = ["<s>", small.word_keys()[0]]
    assert math.fsum(small.probs_after([*small.word_keys(), "</s>", "<unk>"], history)) == pytest.approx(1.0, abs=1e-9)
    assert small.suggest("the ", 3)
