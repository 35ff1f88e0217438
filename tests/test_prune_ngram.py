"""Relative-entropy pruning of Kneser-Ney and Jelinek-Mercer models of order 2 and 3.

Oracles (plain dicts, sharing nothing with the array code but the id → key naming):

* Kneser-Ney: :class:`nextword.reference_kn.DictKneserNey` (checked by hand and against
  nltk in tests/test_reference_kn.py) and its pruned mode ``without``;
* Jelinek-Mercer: :class:`DictJM` below, the textbook interpolation (Jelinek & Mercer
  1980; Chen & Goodman 1998, section 2.3) of any order, with the same pruned mode.

The score under test is Stolcke's criterion ("Entropy-based pruning of backoff language
models", 1998): P(h) · Σ_w P(w|h) ln(P(w|h) / P′(w|h)), P′ the model without the n-gram.
Here it is measured directly: two oracle models, with and without the n-gram, every
outcome's probability from each, the sum taken term by term.
"""

from __future__ import annotations

import math
from collections import Counter
from collections.abc import Iterable, Sequence

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from nextword.errors import InvalidArgumentError
from nextword.estimators import Fitted, JelinekMercer, KneserNey
from nextword.ngrams import NgramCounts
from nextword.prune import keep_best, ngram_scores, prune_fitted, stored_ngrams
from nextword.reference_kn import DictKneserNey
from nextword.text import BOS, EOS, UNK

Gram = tuple[str, ...]


class DictJM:
    """Jelinek-Mercer interpolation of orders 1..n from raw n-gram counts in dicts.

    P_m(w|h) = λ_m·c(h w)/c(h •) + (1 − λ_m + λ_m·dropped(h)/c(h •))·P_{m−1}(w|h′),
    P_1(w) = c(w)/N, a context never seen leaving its level out. ``dropped(h)`` is the
    count of h's pruned n-grams (0 before pruning): the pruned model's rule, written plainly.
    """

    def __init__(self, grams: Counter[Gram], outcomes: Sequence[str], order: int, lams: Sequence[float]) -> None:
        self.outcomes = list(outcomes)
        self.order = order
        self.lams = [1.0, *lams]
        self.rows: dict[Gram, Counter[str]] = {}
        for g, c in grams.items():
            self.rows.setdefault(g[:-1], Counter())[g[-1]] += c
        self.totals = {h: sum(r.values()) for h, r in self.rows.items()}

    def without(self, drop: Iterable[Gram]) -> DictJM:
        out = DictJM.__new__(DictJM)
        out.__dict__.update(self.__dict__)
        out.rows = {h: Counter(r) for h, r in self.rows.items()}
        for g in drop:
            del out.rows[g[:-1]][g[-1]]
        return out

    def prob_key(self, w: str, h: Gram) -> float:
        m = len(h) + 1
        lower = self.prob_key(w, h[1:]) if m > 1 else 0.0
        total = self.totals.get(h, 0)
        if total == 0:
            return lower
        row = self.rows[h]
        lam = self.lams[m - 1]
        dropped = total - sum(row.values())
        return lam * (row.get(w, 0) / total) + (1.0 - lam + lam * dropped / total) * lower


def names(n_words: int) -> list[str]:
    return [f"w{i}" for i in range(n_words)] + [EOS, UNK, BOS]


def raw_grams(counts: NgramCounts) -> Counter[Gram]:
    key = names(counts.n_words)
    out: Counter[Gram] = Counter()
    for g, c in zip(counts.grams, counts.counts):
        for row, n in zip(g.tolist(), c.tolist()):
            out[tuple(key[i] for i in row)] = n
    return out


def oracle(counts: NgramCounts, smoothing: str, lams: tuple[float, float]) -> DictKneserNey | DictJM:
    key = names(counts.n_words)
    grams = raw_grams(counts)
    if smoothing == "kn":
        return DictKneserNey.from_counts(grams, key[: counts.n_words], order=counts.order)
    return DictJM(grams, key[: counts.n_words + 2], counts.order, lams)


def fit(counts: NgramCounts, smoothing: str, lams: tuple[float, float]) -> Fitted:
    return (KneserNey() if smoothing == "kn" else JelinekMercer(lams)).fit(counts)


def relative_entropy(p: DictKneserNey | DictJM, q: DictKneserNey | DictJM, h: Gram, outcomes: Sequence[str]) -> float:
    """Σ_w P(w|h) ln(P(w|h)/Q(w|h)) over every outcome, term by term."""
    total = 0.0
    for w in outcomes:
        a, b = p.prob_key(w, h), q.prob_key(w, h)
        if a > 0:
            total += a * math.log(a / b)
    return total


corpora = st.integers(2, 7).flatmap(
    lambda n: st.tuples(
        st.just(n),
        st.lists(st.lists(st.integers(0, n), min_size=1, max_size=7), min_size=2, max_size=12),
    )
)
kinds = st.tuples(st.sampled_from(["kn", "jm"]), st.sampled_from([2, 3]),
                  st.tuples(st.sampled_from([0.5, 0.9, 0.99]), st.sampled_from([0.3, 0.8])))


def counts_of(corpus: tuple[int, list[list[int]]], order: int) -> NgramCounts:
    n, sents = corpus
    # id n stands for <unk> (n + 1 in the id scheme): the corpus then has unknown words too
    return NgramCounts.from_sentences([[n + 1 if t == n else t for t in s] for s in sents], n, order)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(corpora, kinds)
def test_every_score_is_the_relative_entropy_measured_between_two_oracle_models(corpus, kind) -> None:
    smoothing, order, lams = kind
    counts = counts_of(corpus, order)
    fitted = fit(counts, smoothing, lams)
    scores = ngram_scores(fitted, counts)
    ref = oracle(counts, smoothing, lams)
    key = names(counts.n_words)
    outcomes = key[: counts.n_words + 2]
    n_tokens = sum(int(c) for c in counts.counts[0])
    grams = raw_grams(counts)
    for m in range(2, order + 1):
        lev = fitted.levels[m - 1]
        assert len(scores[m - 1]) == len(lev.grams)
        for row, score in zip(lev.grams.tolist(), scores[m - 1].tolist()):
            g = tuple(key[i] for i in row)
            h = g[:-1]
            # P(h): how often h was followed by a token, over the predicted tokens
            ph = sum(c for x, c in grams.items() if len(x) == m and x[:-1] == h) / n_tokens
            want = ph * relative_entropy(ref, ref.without([g]), h, outcomes)
            assert score == pytest.approx(want, rel=1e-7, abs=1e-13), (g, smoothing, order)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(corpora, kinds, st.data())
def test_pruned_models_sum_to_one_in_every_context_and_equal_the_pruned_oracle(corpus, kind, data) -> None:
    smoothing, order, lams = kind
    counts = counts_of(corpus, order)
    fitted = fit(counts, smoothing, lams)
    keep: list[np.ndarray | None] = [None]
    for m in range(2, order + 1):
        k = len(fitted.levels[m - 1].grams)
        keep.append(np.asarray(data.draw(st.lists(st.booleans(), min_size=k, max_size=k)), dtype=bool))
    pruned = prune_fitted(fitted, keep)
    key = names(counts.n_words)
    dropped = [tuple(key[i] for i in row)
               for m in range(2, order + 1)
               for row, kept in zip(fitted.levels[m - 1].grams.tolist(), keep[m - 1]) if not kept]
    ref = oracle(counts, smoothing, lams).without(dropped)
    assert stored_ngrams(pruned) == stored_ngrams(fitted) - len(dropped)
    outcomes = range(counts.n_outcomes)
    # every context of every order, as stored before pruning, plus one never seen
    contexts = {tuple(r) for m in range(2, order + 1) for r in fitted.levels[m - 1].ctx.tolist()}
    contexts.add((counts.bos,) * (order - 1) if order == 2 else (0, counts.n_words))
    for h in contexts:
        h = h[-(order - 1):]
        ps = [pruned._prob(w, h) for w in outcomes]
        assert math.fsum(ps) == pytest.approx(1.0, abs=1e-12)
        for w, p in zip(outcomes, ps):
            assert p == pytest.approx(ref.prob_key(key[w], tuple(key[i] for i in h)), rel=1e-12, abs=1e-15)


def test_keep_best_takes_the_highest_scores_across_orders() -> None:
    # common practice (Stolcke 1998): one threshold over the scores of every order
    vals = [np.zeros(0), np.array([0.5, 0.1, 0.9]), np.array([0.2, 0.7])]
    keep = keep_best(vals, 3)  # the three highest: 0.9, 0.7, 0.5
    assert keep[0] is None
    assert keep[1].tolist() == [True, False, True] and keep[2].tolist() == [False, True]


def test_the_unigram_level_is_not_pruned_by_mask() -> None:
    counts = NgramCounts.from_sentences([[0, 1], [1, 0]], 2, 2)
    fitted = KneserNey().fit(counts)
    with pytest.raises(InvalidArgumentError, match="unigram level"):
        prune_fitted(fitted, [np.zeros(len(fitted.levels[0].grams), bool), None])
    with pytest.raises(InvalidArgumentError, match="keep masks"):
        prune_fitted(fitted, [None])


def test_a_tiny_jm_bigram_by_hand() -> None:
    # Hand arithmetic (λ = 0.5): sentences "a b", "a a" → predicted tokens a b </s> a a </s>,
    # c(a) = 3, c(b) = 1, c(</s>) = 2, N = 6. Context a: a→b 1, a→a 1, a→</s> 1, total 3.
    # Drop (a, a): γ(a) = 0.5 + 0.5·1/3 = 2/3, P(a|a) = 2/3 · 3/6 = 1/3 (was 0.5/3 + 0.5·0.5 = 5/12).
    counts = NgramCounts.from_sentences([[0, 1], [0, 0]], 2, 2)  # ids: a = 0, b = 1
    fitted = JelinekMercer((0.5,)).fit(counts)
    lev = fitted.levels[1]
    grams = lev.grams.tolist()
    keep = np.asarray([g != [0, 0] for g in grams])
    pruned = prune_fitted(fitted, [None, keep])
    assert fitted._prob(0, (0,)) == pytest.approx(5 / 12)
    assert pruned._prob(0, (0,)) == pytest.approx(1 / 3)
    assert pruned._prob(1, (0,)) == pytest.approx(0.5 / 3 + 2 / 3 * 1 / 6)


# -- the size budget ----------------------------------------------------------------------------

def _pydoc_lines(n_topics: int = 40) -> list[str]:
    from pydoc_data.topics import topics  # real English text shipped with Python

    return [ln for k in sorted(topics)[:n_topics] for ln in topics[k].splitlines() if ln.strip()]


@pytest.fixture(scope="module")
def real_counts() -> tuple[object, NgramCounts]:
    from nextword.counts import CountBuilder

    b = CountBuilder(order=3)
    b.add_texts(_pydoc_lines())
    return b.ngram_counts(min_count=1)


def _context_sums(fitted: Fitted) -> list[float]:
    from nextword.prune import context_distributions

    dist = context_distributions(fitted)
    ctxs = {tuple(r) for m in range(2, fitted.order + 1) for r in fitted.levels[m - 1].ctx.tolist()}
    return [math.fsum(dist(h).tolist()) for h in sorted(ctxs)[:400]]


@pytest.mark.parametrize("smoothing,order", [("kn", 2), ("kn", 3), ("jm", 3)])
@pytest.mark.parametrize("share", [0.6, 0.3])
def test_a_budget_is_met_by_the_most_valuable_ngrams_and_every_context_sums_to_one(real_counts, smoothing, order, share) -> None:
    from nextword.prune import ngram_file, prune_ngrams_to_size

    tables, counts3 = real_counts
    counts = counts3 if order == 3 else NgramCounts(counts3.n_words, counts3.grams[:2], counts3.counts[:2])
    est = KneserNey() if smoothing == "kn" else JelinekMercer((0.9, 0.8))
    from nextword.prune import unigrams_only

    fitted = est.fit(counts)
    full = sum(len(c) for c in ngram_file(counts, tables, fitted))
    floor = sum(len(c) for c in ngram_file(counts, tables, unigrams_only(fitted)))
    budget = int(floor + share * (full - floor))  # between the vocabulary alone and the whole model
    pruned, c2, t2, chunks, info = prune_ngrams_to_size(counts, tables, est, budget, vocabulary=False)
    assert info["bytes"] == sum(len(c) for c in chunks) <= budget
    assert info["kept"] == stored_ngrams(pruned) and info["removed"] > 0
    # near the budget: the search stops within 2 % of it (linear steps on measured sizes)
    assert info["bytes"] > 0.98 * budget
    # the file is exactly the pruned model's own file
    assert b"".join(bytes(c) for c in chunks) == b"".join(bytes(c) for c in ngram_file(c2, t2, pruned))
    # probabilities sum to 1 in every context (the dropped mass backs off)
    assert all(s == pytest.approx(1.0, abs=1e-9) for s in _context_sums(pruned))
    # each kept n-gram is worth at least as much per byte as each dropped one of the same order,
    # except bigrams kept as the context (u, v) or the suffix (v, w) of a kept trigram (u, v, w) — every
    # such bigram is kept (common practice in back-off n-gram pruning: a longer n-gram keeps its context
    # and its suffix)
    scores = ngram_scores(fitted, counts)
    kept3 = {tuple(r) for r in pruned.levels[2].grams.tolist()} if order == 3 else set()
    contexts = {g[:2] for g in kept3} | {g[1:] for g in kept3}
    for m in range(2, order + 1):
        before = {tuple(r) for r in fitted.levels[m - 1].grams.tolist()}
        kept = {tuple(r) for r in pruned.levels[m - 1].grams.tolist()}
        assert kept <= before
        if m == 2:
            assert contexts <= kept
            kept = kept - contexts
        value = dict(zip(map(tuple, fitted.levels[m - 1].grams.tolist()), scores[m - 1].tolist()))
        if kept and before - kept - contexts:
            assert min(value[g] for g in kept) >= max(value[g] for g in before - kept - contexts)


@pytest.mark.parametrize("smoothing", ["kn", "jm"])
def test_a_budget_below_the_vocabulary_drops_words_or_is_refused(real_counts, smoothing) -> None:
    from nextword.prune import ngram_file, prune_ngrams_to_size, unigrams_only

    tables, counts = real_counts
    est = KneserNey() if smoothing == "kn" else JelinekMercer((0.9, 0.8))
    fitted = est.fit(counts)
    floor = sum(len(c) for c in ngram_file(counts, tables, unigrams_only(fitted)))
    with pytest.raises(InvalidArgumentError, match="below the vocabulary alone"):
        prune_ngrams_to_size(counts, tables, est, floor - 1, vocabulary=False)
    pruned, c2, t2, chunks, info = prune_ngrams_to_size(counts, tables, est, int(floor * 0.8))
    assert info["bytes"] <= floor * 0.8 and info["words_removed"] > 0 and t2.n_words == c2.n_words < tables.n_words
    assert all(s == pytest.approx(1.0, abs=1e-9) for s in _context_sums(pruned))
    with pytest.raises(InvalidArgumentError, match="smallest possible model"):
        prune_ngrams_to_size(counts, tables, est, 2000)


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(corpora, st.data())
def test_dropping_words_equals_counting_the_text_with_them_unknown(corpus, data) -> None:
    # the reference counter NgramCounts.from_sentences on the text with the dropped words
    # replaced by <unk> (ids renumbered in order) must give exactly the merged counts
    from nextword.counts import CountTables
    from nextword.prune import drop_ngram_words

    n, sents = corpus
    sents = [[n + 1 if t == n else t for t in s] for s in sents]
    counts = NgramCounts.from_sentences(sents, n, 3)
    keep = np.asarray(data.draw(st.lists(st.booleans(), min_size=n, max_size=n)), dtype=bool)
    if not keep.any():
        keep[0] = True
    uni = np.zeros(n + 2, np.int64)
    uni[counts.grams[0][:, 0]] = counts.counts[0]
    tables = CountTables([f"w{i}" for i in range(n)], [f"w{i}" for i in range(n)], uni,
                         counts.grams[1][:, 0], counts.grams[1][:, 1], counts.counts[1], {})
    got, small = drop_ngram_words(counts, tables, keep)
    m = int(keep.sum())
    new_id = {old: i for i, old in enumerate(np.flatnonzero(keep).tolist())}
    want = NgramCounts.from_sentences([[new_id.get(t, m + 1) for t in s] for s in sents], m, 3)
    assert got.n_words == m and small.n_words == m
    for a, b, c, d in zip(got.grams, want.grams, got.counts, want.counts):
        assert np.array_equal(a, b) and np.array_equal(c, d)


def test_train_max_size_prunes_every_estimator_and_order(tmp_path) -> None:
    import nextword

    lines = _pydoc_lines(30)
    corpus = tmp_path / "c.txt"
    corpus.write_text("\n".join(lines) + "\n", encoding="utf-8")
    for smoothing, order in (("kn", 3), ("jm", 3), ("kn", 2)):
        full = tmp_path / f"{smoothing}{order}.nwm"
        nextword.train(corpus, full, order=order, smoothing=smoothing, min_count=1)
        budget = full.stat().st_size // 2
        small = tmp_path / f"{smoothing}{order}-small.nwm"
        report = nextword.train(corpus, small, order=order, smoothing=smoothing, min_count=1, max_bytes=budget)
        assert report.file_bytes == small.stat().st_size <= budget
        assert 0 < report.n_bigrams



def test_cli_train_max_size_for_a_kneser_ney_trigram(tmp_path) -> None:
    import json
    import subprocess
    import sys

    corpus = tmp_path / "c.txt"
    corpus.write_text("\n".join(_pydoc_lines(30)) + "\n", encoding="utf-8")
    out = tmp_path / "k.nwm"
    r = subprocess.run([sys.executable, "-m", "nextword", "train", str(corpus), "-o", str(out), "--order", "3",
                        "--smoothing", "kn", "--min-count", "1", "--max-size", "150KB", "--json"],
                       capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    assert out.stat().st_size <= 150_000 and json.loads(r.stdout)["file_bytes"] == out.stat().st_size


@pytest.mark.parametrize("smoothing,order", [("kn", 2), ("kn", 3), ("jm", 3)])
def test_a_model_file_gives_back_the_fitted_levels_and_the_same_scores(tmp_path, real_counts, smoothing, order) -> None:
    # the levels read from the file equal the estimator's fit of the counts (ids matched by key),
    # P(h) equals the raw counts' context probability, so the scores are the same
    import nextword
    from nextword.export import fitted_from_model
    from nextword.prune import context_probability, file_context_mass

    tables, counts3 = real_counts
    counts = counts3 if order == 3 else NgramCounts(counts3.n_words, counts3.grams[:2], counts3.counts[:2])
    est = KneserNey() if smoothing == "kn" else JelinekMercer((0.9, 0.8))
    path = tmp_path / "m.nwm"
    from nextword.store import build

    build(counts, tables, est, path)
    ref = est.fit(counts)
    model = nextword.load(path)
    got = fitted_from_model(model)  # the public way to a file's levels (Model.stored_levels)
    gcounts = NgramCounts(model.n_words, tuple(lev.grams for lev in got.levels), tuple(lev.value for lev in got.levels))
    mass = file_context_mass(got)
    n = tables.n_words
    to_file = np.arange(n + 3)
    index = {k: i for i, k in enumerate(model.word_keys())}
    to_file[:n] = [index[k] for k in tables.keys]
    ref_scores = ngram_scores(ref, counts)
    got_scores = ngram_scores(got, gcounts, context_mass=mass)
    for m in range(1, order + 1):
        rl, gl = ref.levels[m - 1], got.levels[m - 1]
        mapped = {tuple(to_file[r].tolist()): (v, i) for i, (r, v) in enumerate(zip(rl.grams, rl.value.tolist()))}
        have = {tuple(r): (v, i) for i, (r, v) in enumerate(zip(gl.grams.tolist(), gl.value.tolist()))}
        assert {g: v for g, (v, _) in mapped.items()} == {g: v for g, (v, _) in have.items()}
        rtot = {tuple(to_file[c].tolist()): t for c, t in zip(rl.ctx, rl.ctx_total.tolist())}
        assert rtot == {tuple(c): t for c, t in zip(gl.ctx.tolist(), gl.ctx_total.tolist())}
        if m >= 2:
            rmass = {tuple(to_file[c].tolist()): p for c, p in zip(rl.ctx, context_probability(rl, counts, m).tolist())}
            for c, p in zip(gl.ctx.tolist(), mass[m - 1].tolist()):
                assert p == pytest.approx(rmass[tuple(c)], rel=1e-12)
            for g, (_, i) in have.items():
                assert got_scores[m - 1][i] == pytest.approx(ref_scores[m - 1][mapped[g][1]], rel=1e-9, abs=1e-15)


def test_cli_prune_of_a_kneser_ney_trigram_file(tmp_path) -> None:
    import json
    import subprocess
    import sys

    import nextword

    full = tmp_path / "k.nwm"
    nextword.train_texts(_pydoc_lines(30), full, order=3, smoothing="kn", min_count=1)
    out = tmp_path / "p.nwm"
    budget = full.stat().st_size // 2
    r = subprocess.run([sys.executable, "-m", "nextword", "prune", str(full), "-o", str(out), "--max-size", str(budget), "--json"],
                       capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    info = json.loads(r.stdout)
    assert out.stat().st_size == info["bytes"] <= budget and info["removed"] > 0 and info["words_removed"] == 0
    r = subprocess.run([sys.executable, "-m", "nextword", "prune", str(full), "-o", str(tmp_path / "q.nwm"), "--max-size", "20KB"],
                       capture_output=True, text=True)
    assert r.returncode == 2 and r.stderr.count("\n") == 1 and "keeps its words" in r.stderr, r.stderr
