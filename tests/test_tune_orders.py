"""λ per order for the interpolated Jelinek-Mercer trigram: events, EM, the optimum.

Checks against things outside the tuning code: counts by plain dicts over the raw
sentences (brute force), ``JelinekMercer.fit(...).prob`` (itself checked against
``DictBigram`` in tests/test_estimators.py), a hand-solved example and a grid search.
"""

from __future__ import annotations

import itertools
import math
from collections import Counter

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from nextword.errors import InvalidArgumentError
from nextword.estimators import JelinekMercer
from nextword.evaluate import is_held_out
from nextword.ngrams import NgramCounts
from nextword.store import MAX_LAMBDA
from nextword.text import UNK, fold, sentences
from nextword.tune import (
    OrderBuckets,
    em_order_lambdas,
    fit_order_buckets,
    optimal_order_lambdas,
    order_events,
    order_loglik,
    order_perplexity,
    order_probs,
)

V = 4  # words 0..3, </s> = 4, <unk> = 5, <s> = 6
sentence = st.lists(st.sampled_from([*range(V), V + 1]), max_size=6)  # words and <unk>
corpus = st.lists(sentence, min_size=1, max_size=12)


def _history_tokens(s: list[int], bos: int, eos: int) -> list[tuple[tuple[int, ...], int]]:
    """(full history, predicted token) of every token of a held-out sentence."""
    seq = [bos, *s, eos]
    return [(tuple(seq[:i]), seq[i]) for i in range(1, len(seq))]


def test_hand_example_events_em_steps_and_optimum() -> None:
    # Training "y x" (x = 0, y = 1; </s> = 2, <s> = 4): <s> y x </s>.
    # c(y) = c(x) = c(</s>) = 1, N = 3; bigrams (<s> y), (y x), (x </s>); trigrams (<s> y x), (y x </s>).
    counts = NgramCounts.from_sentences([[1, 0]], 2, 3)
    # Held out "y": token y after <s>: b2 = c(<s> y)/c(<s> •) = 1, u = 1/3, no two-token context;
    # token </s> after (<s>, y): b3 = 0/1, b2 = c(y </s>)/c(y •) = 0/1, u = 1/3.
    ev = order_events(counts, [[1]])
    assert ev.count.tolist() == [[1, 1, 0], [1, 0, 0]]
    assert ev.total.tolist() == [[3, 1, 0], [3, 1, 1]]
    # L = ln(λ2 + (1 − λ2)/3) + ln((1 − λ3)(1 − λ2)/3): λ3 only lowers the second token, so λ3* = 0;
    # dL/dλ2 = 2/(1 + 2λ2) − 1/(1 − λ2) = 0  =>  2 − 2λ2 = 1 + 2λ2  =>  λ2* = 1/4   (by hand)
    # EM from (1/2, 1/2): token 1 has P = 1/2 + 1/6 = 2/3, share of order 2 = (1/2)/(2/3) = 3/4;
    # token 2 has P = 1/12, all of it from the unigram (shares 0, 0, 1). λ3 ← 0/1 = 0,
    # λ2 ← (3/4 + 0)/2 = 3/8; next: P1 = 3/8 + 5/24 = 7/12, share 9/14, λ2 ← 9/28.
    one, _ = em_order_lambdas(ev, start=[0.5, 0.5], iterations=1)
    assert one == pytest.approx([3 / 8, 0.0], abs=1e-15)
    two, trace = em_order_lambdas(ev, start=[0.5, 0.5], iterations=2)
    assert two == pytest.approx([9 / 28, 0.0], abs=1e-15)
    assert trace[0] == pytest.approx(math.log(2 / 3) + math.log(1 / 12), abs=1e-12)
    assert optimal_order_lambdas(ev) == pytest.approx([0.25, 0.0], abs=1e-9)
    assert order_loglik(ev, [0.25, 0.0]) == pytest.approx(math.log(1.5 / 3) + math.log(0.75 / 3), abs=1e-12)


def test_hand_example_em_step_with_a_seen_trigram() -> None:
    # Same training "y x"; held out "y x": token y after <s>: b2 = 1, u = 1/3 (no two-token context);
    # x after (<s>, y) and </s> after (y, x): b3 = 1/1, b2 = 1/1, u = 1/3.
    counts = NgramCounts.from_sentences([[1, 0]], 2, 3)
    ev = order_events(counts, [[1, 0]])
    assert ev.count.tolist() == [[1, 1, 0], [1, 1, 1], [1, 1, 1]]
    assert ev.total.tolist() == [[3, 1, 0], [3, 1, 1], [3, 1, 1]]
    # EM from (1/2, 1/2), by hand. Token 1: P = 2/3, order-2 share 3/4 (reaches order 2 with weight 1).
    # Tokens 2, 3: P2 = 1/2 + 1/6 = 2/3, P = 1/2 + (1/2)(2/3) = 5/6; shares r3 = (1/2)/(5/6) = 3/5,
    # r2 = (1/4)/(5/6) = 3/10, r1 = (1/12)/(5/6) = 1/10; each reaches order 2 with r2 + r1 = 2/5.
    # λ3 <- (3/5 + 3/5)/2 = 3/5;  λ2 <- (3/4 + 3/10 + 3/10)/(1 + 2/5 + 2/5) = (27/20)/(9/5) = 3/4.
    one, trace = em_order_lambdas(ev, start=[0.5, 0.5], iterations=1)
    assert one == pytest.approx([3 / 4, 3 / 5], abs=1e-15)
    assert trace[0] == pytest.approx(math.log(2 / 3) + 2 * math.log(5 / 6), abs=1e-12)
    # every b exceeds its lower order here, so L rises in both λ up to the cap
    assert optimal_order_lambdas(ev) == [MAX_LAMBDA, MAX_LAMBDA]


@settings(max_examples=80, deadline=None)
@given(corpus, corpus, st.floats(0.0, MAX_LAMBDA), st.floats(0.0, MAX_LAMBDA))
def test_events_give_the_estimators_probability_and_brute_force_counts(
    train: list[list[int]], held: list[list[int]], l2: float, l3: float
) -> None:
    counts = NgramCounts.from_sentences(train, V, 3)
    bos, eos = counts.bos, counts.eos
    # brute-force counts over the padded training sentences (plain dicts)
    gram: Counter[tuple[int, ...]] = Counter()
    ctx: Counter[tuple[int, ...]] = Counter()
    for s in train:
        seq = [bos, *s, eos]
        for i in range(1, len(seq)):
            for m in (1, 2, 3):
                if i - (m - 1) >= 0:
                    h = tuple(seq[i - m + 1 : i])
                    gram[(*h, seq[i])] += 1
                    ctx[h] += 1
    ev = order_events(counts, held)
    fitted = JelinekMercer([l2, l3]).fit(counts)
    p = order_probs(ev, [l2, l3])
    row = 0
    for s in held:
        for hist, w in _history_tokens(s, bos, eos):
            for m in (1, 2, 3):
                h = hist[len(hist) - (m - 1):] if m > 1 else ()
                if len(h) == m - 1 and (m == 1 or ctx[h] > 0):
                    assert ev.total[row, m - 1] == ctx[h] and ev.count[row, m - 1] == gram[(*h, w)]
                else:
                    assert ev.total[row, m - 1] == 0
            assert p[row] == fitted.prob(w, hist)  # the same float operations: exact
            row += 1
    assert row == len(ev)


def _grid_best(ev, steps: int = 21) -> float:  # type: ignore[no-untyped-def]
    grid = [*np.linspace(0.0, MAX_LAMBDA, steps)]
    return max(order_loglik(ev, [a, b]) for a, b in itertools.product(grid, grid))


@settings(max_examples=60, deadline=None)
@given(corpus, corpus)
def test_tuned_lambdas_beat_every_grid_point(train: list[list[int]], held: list[list[int]]) -> None:
    # grid search over (λ2, λ3) as the outside check (common practice)
    counts = NgramCounts.from_sentences(train, V, 3)
    ev = order_events(counts, held)
    if int((ev.count[:, 0] > 0).sum()) == 0:
        with pytest.raises(InvalidArgumentError, match="no held-out"):
            optimal_order_lambdas(ev)
        return
    lams = optimal_order_lambdas(ev)
    assert all(0.0 <= x <= MAX_LAMBDA for x in lams)
    assert order_loglik(ev, lams) >= _grid_best(ev) - 1e-9


@settings(max_examples=100, deadline=None)
@given(corpus, corpus, st.floats(0.0, MAX_LAMBDA), st.floats(0.0, MAX_LAMBDA))
def test_em_never_decreases_the_likelihood(train: list[list[int]], held: list[list[int]], s2: float, s3: float) -> None:
    # a property of EM (Dempster, Laird & Rubin 1977), kept by the capped M-step
    ev = order_events(NgramCounts.from_sentences(train, V, 3), held)
    lams, trace = em_order_lambdas(ev, start=[s2, s3], iterations=40)
    assert all(0.0 <= x <= MAX_LAMBDA for x in lams)
    assert all(y >= x - 1e-9 * max(1.0, abs(x)) for x, y in zip(trace, trace[1:]))


def test_cap_when_every_held_out_trigram_was_seen() -> None:
    # held-out text = training text: every token's trigram is seen, so L keeps rising to λ = 1;
    # the tuned λ stop at the cap (nextword.store.MAX_LAMBDA, the one source)
    train = [[0, 1, 2], [0, 1, 3], [2, 2, 1, 0]]
    ev = order_events(NgramCounts.from_sentences(train, V, 3), train)
    lams = optimal_order_lambdas(ev)
    assert lams[1] == MAX_LAMBDA


def test_order_two_is_the_bigram_tuning() -> None:
    # order 2: the same problem as the existing single-λ tuning (optimal_lambda on (b, u))
    from nextword.tune import optimal_lambda

    rng = np.random.default_rng(5)
    train = [list(rng.integers(0, V, size=rng.integers(1, 8))) for _ in range(60)]
    held = [list(rng.integers(0, V, size=rng.integers(1, 8))) for _ in range(40)]
    ev = order_events(NgramCounts.from_sentences(train, V, 2), held)
    seen = ev.total[:, 1] > 0
    b = ev.count[seen, 1] / ev.total[seen, 1]
    u = ev.count[seen, 0] / ev.total[seen, 0]
    (lam,) = optimal_order_lambdas(ev)
    assert lam == pytest.approx(optimal_lambda(b, u), abs=1e-8)


def _ids(msgs: list[str], index: dict[str, int], unk: int) -> list[list[int]]:
    return [[index.get(UNK if t is None else fold(t), unk) for t in s] for m in msgs for s in sentences(m)]


def test_tuning_lowers_held_out_perplexity_on_real_text() -> None:
    from pydoc_data.topics import topics  # real English shipped with CPython

    lines = [ln for k in sorted(topics) for ln in topics[k].splitlines() if ln.strip()]
    train = [ln for ln in lines if not is_held_out(ln, 20)]
    held = [ln for ln in lines if is_held_out(ln, 20)]
    words = Counter(fold(t) for m in train for s in sentences(m) for t in s if t is not None)
    vocab = sorted((w for w, c in words.items() if c >= 2), key=lambda w: (-words[w], w))  # rarer words -> <unk>
    index = {w: i for i, w in enumerate(vocab)}
    n = len(vocab)
    counts = NgramCounts.from_sentences(_ids(train, index, n + 1), n, 3)
    ev = order_events(counts, _ids(held, index, n + 1))
    assert len(ev) > 10_000 and bool((ev.count[:, 0] > 0).all())  # every held-out token has P > 0
    before = order_perplexity(ev, [0.9, 0.9])
    lams = optimal_order_lambdas(ev)
    after = order_perplexity(ev, lams)
    assert after <= before
    # and the same figure by the estimator itself, token by token on a sample of sentences
    fitted = JelinekMercer(lams).fit(counts)
    p = order_probs(ev, lams)
    row = 0
    for s in _ids(held, index, n + 1)[:200]:
        for hist, w in _history_tokens(s, counts.bos, counts.eos):
            assert p[row] == fitted.prob(w, hist)
            row += 1
    # the trigram tuned is no worse than the tuned bigram on the same held-out text
    ev2 = order_events(NgramCounts.from_sentences(_ids(train, index, n + 1), n, 2), _ids(held, index, n + 1))
    assert after <= order_perplexity(ev2, optimal_order_lambdas(ev2))


@settings(max_examples=40, deadline=None)
@given(corpus, corpus, st.integers(1, 6))
def test_buckets_probabilities_and_per_bucket_optimum(train: list[list[int]], held: list[list[int]], min_events: int) -> None:
    counts = NgramCounts.from_sentences(train, V, 3)
    ev = order_events(counts, held)
    if int((ev.count[:, 0] > 0).sum()) == 0:
        return
    bk = fit_order_buckets(ev, min_events=min_events, base=2.0)
    single = optimal_order_lambdas(ev)
    # starts from the single optimum and only climbs: never worse than one λ per order
    assert order_loglik(ev, bk) >= order_loglik(ev, single) - 1e-9
    # every bucket's λ beats a grid for that bucket with the others held (grid search, common practice)
    grid = np.linspace(0.0, MAX_LAMBDA, 21)
    best = order_loglik(ev, bk)
    for o in range(2):
        for i in range(len(bk.lambdas[o])):
            for g in grid:
                lam = [list(v) for v in bk.lambdas]
                lam[o][i] = float(g)
                assert best >= order_loglik(ev, OrderBuckets(bk.bounds, lam)) - 1e-9
    # per token, the estimator with that token's λ (by the bucket of each context count)
    fits: dict[tuple[float, float], object] = {}
    p = order_probs(ev, bk)
    row = 0
    for s in held:
        for hist, w in _history_tokens(s, counts.bos, counts.eos):
            key = (bk.lam_for(2, int(ev.total[row, 1])), bk.lam_for(3, int(ev.total[row, 2])))
            fitted = fits.setdefault(key, JelinekMercer(list(key)).fit(counts))
            assert p[row] == fitted.prob(w, hist)  # type: ignore[attr-defined]
            row += 1


def test_one_bucket_per_order_is_the_single_optimum_and_buckets_help_on_real_text() -> None:
    from pydoc_data.topics import topics

    lines = [ln for k in sorted(topics)[:60] for ln in topics[k].splitlines() if ln.strip()]
    train = [ln for ln in lines if not is_held_out(ln, 30)]
    held = [ln for ln in lines if is_held_out(ln, 30)]
    words = Counter(fold(t) for m in train for s in sentences(m) for t in s if t is not None)
    vocab = sorted((w for w, c in words.items() if c >= 2), key=lambda w: (-words[w], w))
    index = {w: i for i, w in enumerate(vocab)}
    n = len(vocab)
    counts = NgramCounts.from_sentences(_ids(train, index, n + 1), n, 3)
    ev = order_events(counts, _ids(held, index, n + 1))
    single = optimal_order_lambdas(ev)
    one = fit_order_buckets(ev, min_events=10**9)
    assert one.bounds == [[], []]
    assert [v[0] for v in one.lambdas] == pytest.approx(single, abs=1e-9)
    many = fit_order_buckets(ev, min_events=200)
    assert all(len(v) > 2 for v in many.lambdas)
    assert all(x >= 200 for v in many.events for x in v)
    assert all(0.0 <= x <= MAX_LAMBDA for v in many.lambdas for x in v)
    assert order_perplexity(ev, many) < order_perplexity(ev, single)
    assert many.as_meta() == {"bounds": many.bounds, "lambdas": many.lambdas}


def test_arguments_are_checked() -> None:
    counts = NgramCounts.from_sentences([[0, 1]], 2, 3)
    ev = order_events(counts, [[0]])
    with pytest.raises(InvalidArgumentError, match="1 λ values given for order 3"):
        order_probs(ev, [0.5])
    with pytest.raises(InvalidArgumentError, match="1.0"):
        order_probs(ev, [0.5, 1.0])
    with pytest.raises(InvalidArgumentError, match="sentence id 2"):
        order_events(counts, [[0, 2]])  # 2 is </s>: not allowed inside a sentence
    with pytest.raises(InvalidArgumentError, match="sentence id 4"):
        order_events(counts, [[4]])  # <s>
    with pytest.raises(InvalidArgumentError, match="buckets"):
        order_probs(ev, OrderBuckets([[3]], [[0.5, 0.5]]))  # one order of buckets for order 3
    with pytest.raises(InvalidArgumentError, match=r"\[3, 2\]"):
        order_probs(ev, OrderBuckets([[3, 2], []], [[0.5, 0.5, 0.5], [0.5]]))
    with pytest.raises(InvalidArgumentError, match="min_events"):
        fit_order_buckets(ev, min_events=0)
    with pytest.raises(InvalidArgumentError, match="empty"):
        order_perplexity(order_events(counts, []), [0.5, 0.5])
