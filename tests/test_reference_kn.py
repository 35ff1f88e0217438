"""The plain-dict interpolated Kneser-Ney oracle, checked from outside the project.

- A hand-computable corpus, the arithmetic in the comments (the recursion of Chen &
  Goodman 1998, section 3, as restated in nextword/reference_kn.py).
- The general-purpose library ``nltk.lm.KneserNeyInterpolated`` (nltk 3.8+) on real English
  (CPython's ``pydoc_data.topics``): nltk implements interpolated Kneser-Ney with one
  fixed discount for every order, raw counts at the highest order, continuation counts
  below, an undiscounted continuation unigram at the bottom, and n−1 ``<s>`` pads. Fed the
  very same n-grams, the oracle in that configuration (``raw_at_start=False``,
  ``unigram_uniform=False``, one discount) must give the same probability per token and
  so the same perplexity.
- Invariants by hypothesis: probabilities over the prediction vocabulary sum to 1 after
  every context, for order 1..3 and for fitted or fixed discounts.
"""

from __future__ import annotations

import math
from collections import Counter

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from nextword.errors import InvalidArgumentError
from nextword.reference_kn import DictKneserNey, fit_discounts, ngrams_of_sentence
from nextword.text import BOS, EOS, UNK, fold, sentences


def test_hand_computed_bigram() -> None:
    # Sentences "a b", "a c", "b a" -> <s> a b </s> | <s> a c </s> | <s> b a </s>, one discount 0.5.
    m = DictKneserNey(["a b. a c. b a"], order=2, min_count=1, discounts=[0.5, 0.5])
    # Unigram level: continuation counts N1+(. w) over the 8 bigram types
    #   a {<s>, b} = 2, b {<s>, a} = 2, c {a} = 1, </s> {a, b, c} = 3, <unk> 0; total 8.
    #   gamma() = 0.5 * 4 distinct / 8 = 0.25, uniform over 5 outcomes = 0.2 -> 0.05
    #   P1(a) = (2 - 0.5)/8 + 0.05 = 0.2375;  P1(c) = 0.5/8 + 0.05 = 0.1125;  P1(<unk>) = 0.05
    assert m.prob("a") == pytest.approx(0.2375, abs=1e-15)
    assert m.prob("c") == pytest.approx(0.1125, abs=1e-15)
    assert m.prob(UNK) == pytest.approx(0.05, abs=1e-15)
    # Bigram level after "a": raw counts b 1, c 1, </s> 1 (total 3); gamma(a) = 0.5 * 3 / 3 = 0.5
    #   P(b | a) = (1 - 0.5)/3 + 0.5 * P1(b) = 1/6 + 0.5 * 0.2375 = 0.28541666...
    assert m.prob("b", ["a"]) == pytest.approx(1 / 6 + 0.5 * 0.2375, abs=1e-15)
    #   P(a | a) = 0 + 0.5 * 0.2375 = 0.11875
    assert m.prob("a", ["a"]) == pytest.approx(0.11875, abs=1e-15)
    # After <s>: raw a 2, b 1 (total 3), gamma = 0.5 * 2 / 3 = 1/3: P(a | <s>) = 1.5/3 + 0.2375/3
    assert m.prob("a", [BOS]) == pytest.approx(0.5 + 0.2375 / 3, abs=1e-15)
    # an unseen history backs off entirely to the unigram level
    assert m.prob("c", ["zebra"]) == m.prob("c")


def test_hand_computed_trigram_uses_continuation_counts_below_the_top() -> None:
    # <s> x a </s> | <s> y a </s> | <s> x b </s>, order 3, one discount 0.5 for every order.
    m = DictKneserNey(["x a. y a. x b"], order=3, min_count=1, discounts=[0.5, 0.5, 0.5])
    # Bigram level for context "x" counts the distinct left extensions of (x, w):
    #   (<s>, x, a) -> a 1; (<s>, x, b) -> b 1 (so a(x a) = 1 although c(x a) = 1 too).
    # For context "a": (x, a, </s>), (y, a, </s>) -> </s> 2 (raw count 2 as well).
    row = m.table[2][("a",)]
    assert row == Counter({EOS: 2})
    # Top level after (<s>, x): raw a 1, b 1, total 2, gamma = 0.5 * 2 / 2 = 0.5
    #   P(a | <s> x) = 0.5/2 + 0.5 * P2(a | x);  P2(a | x) = 0.5/2 + 0.5 * P1(a)
    # Unigram level: bigram types (<s>,x) (<s>,y) (x,a) (y,a) (x,b) (a,</s>) (b,</s>):
    #   a 2, b 1, x 1, y 1, </s> 2 -> total 7; gamma = 0.5 * 5 / 7; uniform over 6 outcomes
    p1_a = (2 - 0.5) / 7 + (0.5 * 5 / 7) / 6
    p2_a = 0.5 / 2 + 0.5 * p1_a
    assert m.prob("a", [BOS, "x"]) == pytest.approx(0.5 / 2 + 0.5 * p2_a, abs=1e-15)
    # the context never crosses a sentence start: (x, <s>, y) is read as (<s>, y)
    assert m.prob("a", ["x", BOS, "y"]) == m.prob("a", [BOS, "y"])


def test_modified_discounts_follow_chen_goodman() -> None:
    # Chen & Goodman 1998, eq. 26: Y = n1/(n1+2 n2), D1 = 1-2Y n2/n1, D2 = 2-3Y n3/n2, D3+ = 3-4Y n4/n3
    d, why = fit_discounts(Counter({1: 100, 2: 40, 3: 20, 4: 10}))
    y = 100 / 180
    assert why is None
    assert (d.d1, d.d2, d.d3) == pytest.approx((1 - 2 * y * 0.4, 2 - 3 * y * 0.5, 3 - 4 * y * 0.5))
    # too few counts: a stated fallback, never a division by zero
    d, why = fit_discounts(Counter({1: 5}))
    assert why is not None and "n1..n4" in why and d.d1 == d.d2 == d.d3 == 0.5
    d, why = fit_discounts(Counter({1: 6, 2: 3}))
    assert why is not None and d.d1 == pytest.approx(6 / 12)


def test_bad_arguments_raise() -> None:
    with pytest.raises(InvalidArgumentError, match="order"):
        DictKneserNey(["a b"], order=0)
    with pytest.raises(InvalidArgumentError, match=r"\(0, 1\)"):
        DictKneserNey(["a b"], order=2, discounts=[0.5, 1.5])


corpus = st.lists(
    st.lists(st.sampled_from(["ride", "fix", "the", "wheel", "a", "chain", "Ride", "7", "."]), min_size=0, max_size=12)
    .map(" ".join),
    min_size=1,
    max_size=25,
)


@settings(max_examples=60, deadline=None)
@given(corpus, st.integers(1, 3), st.booleans(), st.lists(st.sampled_from(["ride", "fix", "the", BOS, UNK, "zzz"]), max_size=3))
def test_probabilities_sum_to_one_after_every_context(msgs: list[str], order: int, fixed: bool, context: list[str]) -> None:
    m = DictKneserNey(msgs, order=order, min_count=1, discounts=[0.3] * order if fixed else None)
    total = math.fsum(m.prob(w, context) for w in m.outcomes)
    assert total == pytest.approx(1.0, abs=1e-12)
    assert all(m.prob(w, context) > 0 for w in m.outcomes)
    # the ranking is the sorted scoring of every matching word
    ranked = m.rank(context, "", 3)
    assert [p for _, p in ranked] == sorted((p for _, p in ranked), reverse=True)


@pytest.fixture(scope="module")
def pydoc_sents() -> list[list[str]]:
    from pydoc_data.topics import topics

    lines = "\n".join(topics[k] for k in sorted(topics)).splitlines()[:1500]
    return [[UNK if t is None else fold(t) for t in s] for line in lines for s in sentences(line)]


def test_matches_nltk_kneser_ney_interpolated_on_real_text(pydoc_sents: list[list[str]]) -> None:
    nltk_lm = pytest.importorskip("nltk.lm")
    from nltk.lm.preprocessing import padded_everygram_pipeline, pad_both_ends
    from nltk.util import everygrams

    order, d = 3, 0.1  # nltk's default discount
    train = pydoc_sents[:-60]
    test = pydoc_sents[-60:]
    lm = nltk_lm.KneserNeyInterpolated(order, discount=d)
    grams_iter, vocab_iter = padded_everygram_pipeline(order, train)
    lm.fit(grams_iter, vocab_iter)
    # the very same n-grams for the oracle: everygrams of nltk's padded sentences
    grams: Counter[tuple[str, ...]] = Counter()
    for s in train:
        grams.update(everygrams(list(pad_both_ends(s, n=order)), max_len=order))
    vocab = sorted({w for s in train for w in s} - {UNK})
    oracle = DictKneserNey.from_counts(grams, vocab, order=order, discounts=[d] * order,
                                       raw_at_start=False, unigram_uniform=False)
    # tokens of held-out sentences whose context nltk and the oracle read alike
    # (every token after the first: nltk's first-word context is (<s>, <s>))
    checked = 0
    log_n = log_o = 0.0
    for s in test:
        padded = list(pad_both_ends(s, n=order))
        for i in range(order, len(padded)):
            w, ctx = padded[i], tuple(padded[i - order + 1 : i])
            if w not in lm.vocab or w == "<UNK>" or lm.vocab.lookup(w) == "<UNK>":
                continue
            if any(lm.vocab.lookup(t) == "<UNK>" for t in ctx):
                continue
            p_n = lm.score(w, ctx)
            p_o = oracle.prob_key(w, ctx)
            assert p_o == pytest.approx(p_n, rel=1e-12), (w, ctx)
            log_n += math.log(p_n)
            log_o += math.log(p_o)
            checked += 1
    assert checked >= 300
    assert math.exp(-log_o / checked) == pytest.approx(math.exp(-log_n / checked), rel=1e-12)


def test_ngrams_of_sentence_do_not_pad_twice() -> None:
    assert ngrams_of_sentence(["a", "b"], 3) == [
        ("a",), (BOS, "a"),
        ("b",), ("a", "b"), (BOS, "a", "b"),
        (EOS,), ("b", EOS), ("a", "b", EOS),
    ]
