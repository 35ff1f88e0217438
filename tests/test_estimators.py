"""The array estimators against the plain-dict oracles, on random corpora (hypothesis).

- ``KneserNey`` (nextword/estimators/kn.py) must equal ``DictKneserNey``
  (nextword/reference_kn.py, itself checked by hand and against nltk.lm in
  tests/test_reference_kn.py) for every outcome after every context, orders 1..3.
- ``JelinekMercer`` of order 2 must equal ``DictBigram`` (nextword/baselines.py, the
  engine's existing oracle) *exactly* (same operations, same order).
- Both sum to 1 over the outcomes after every context.
"""

from __future__ import annotations

import math

import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st

from nextword.baselines import DictBigram
from nextword.errors import InvalidArgumentError
from nextword.estimators import JelinekMercer, KneserNey
from nextword.ngrams import NgramCounts
from nextword.reference_kn import DictKneserNey
from nextword.text import BOS, EOS, UNK, fold, sentences

WORDS = ["ride", "fix", "the", "wheel", "a", "chain", "Ride", "7", ".", "spoke"]
corpus = st.lists(st.lists(st.sampled_from(WORDS), max_size=12).map(" ".join), min_size=1, max_size=25)


def _ids(msgs: list[str], vocab: list[str]) -> tuple[list[list[int]], dict[str, int]]:
    n = len(vocab)
    index = {w: i for i, w in enumerate(vocab)}
    index[EOS], index[UNK], index[BOS] = n, n + 1, n + 2
    sents = []
    for m in msgs:
        for s in sentences(m):
            sents.append([index.get(UNK if t is None else fold(t), n + 1) for t in s])
    return sents, index


@settings(max_examples=80, deadline=None)
@given(corpus, st.integers(1, 3), st.booleans(), st.data())
def test_kneser_ney_arrays_equal_the_dict_oracle(msgs: list[str], order: int, fixed: bool, data: st.DataObject) -> None:
    disc = [0.4] * order if fixed else None
    oracle = DictKneserNey(msgs, order=order, min_count=1, discounts=disc)
    sents, index = _ids(msgs, oracle.vocab)
    fitted = KneserNey(discounts=disc).fit(NgramCounts.from_sentences(sents, len(oracle.vocab), order))
    if not fixed:
        assert fitted.fallbacks == oracle.fallbacks
    contexts = [(), (BOS,), *[(w,) for w in oracle.vocab[:4]], *[(a, b) for a in [BOS, *oracle.vocab[:3]] for b in oracle.vocab[:3]]]
    for ctx in contexts:
        hid = tuple(index[t] for t in ctx)
        total = 0.0
        for w in oracle.outcomes:
            p = fitted.prob(index[w], hid)
            assert p == pytest.approx(oracle.prob_key(w, oracle._context(list(ctx))), rel=1e-12, abs=1e-15)
            total += p
        assert total == pytest.approx(1.0, abs=1e-12)
    floor = fitted.floor()
    assert floor.sum() == pytest.approx(1.0, abs=1e-12)
    assert all(floor[index[w]] == pytest.approx(oracle.prob_key(w, ()), rel=1e-12) for w in oracle.outcomes)


@settings(max_examples=60, deadline=None)
@given(corpus, st.floats(0.0, 0.999))
def test_jelinek_mercer_bigram_equals_dict_bigram_exactly(msgs: list[str], lam: float) -> None:
    oracle = DictBigram(msgs, min_count=1)
    assume(oracle.total > 0)
    sents, index = _ids(msgs, oracle.vocab)
    fitted = JelinekMercer([lam]).fit(NgramCounts.from_sentences(sents, len(oracle.vocab), 2))
    for prev in [BOS, UNK, *oracle.vocab]:
        for w in [*oracle.vocab, EOS, UNK]:
            assert fitted.prob(index[w], (index[prev],)) == oracle.prob(w, prev, lam)


@settings(max_examples=40, deadline=None)
@given(corpus, st.floats(0.0, 0.999), st.floats(0.0, 0.999))
def test_jelinek_mercer_trigram_sums_to_one(msgs: list[str], l2: float, l3: float) -> None:
    oracle = DictBigram(msgs, min_count=1)
    assume(oracle.total > 0)
    sents, index = _ids(msgs, oracle.vocab)
    fitted = JelinekMercer([l2, l3]).fit(NgramCounts.from_sentences(sents, len(oracle.vocab), 3))
    ids = [index[BOS], *range(len(oracle.vocab))][:5]
    for a in ids:
        for b in ids:
            s = math.fsum(fitted.prob(w, (a, b)) for w in range(fitted.n_outcomes))
            assert s == pytest.approx(1.0, abs=1e-12)


def test_estimator_arguments_are_checked() -> None:
    with pytest.raises(InvalidArgumentError, match="1.5"):
        KneserNey(discounts=[1.5])
    with pytest.raises(InvalidArgumentError, match="1.0"):
        JelinekMercer([1.0])
    counts = NgramCounts.from_sentences([[0, 1]], 2, 2)
    with pytest.raises(InvalidArgumentError, match="order 2"):
        KneserNey(discounts=[0.5]).fit(counts)
    with pytest.raises(InvalidArgumentError, match="order"):
        NgramCounts.from_sentences([[0]], 1, 4)
