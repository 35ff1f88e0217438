"""Our counts and probabilities against general-purpose reference libraries on real English.

Text: the documentation topics shipped with every CPython (``pydoc_data.topics``), about
65,000 words of real English. Both sides see the same token sequences (our text rules
cut the text; ``None`` breaks become ``<unk>``), so these tests check the counting and
the formula, not the tokeniser (tests/test_text.py does that by hand).
"""

from __future__ import annotations

import random
from pathlib import Path

import pytest

import nextword
from nextword.text import fold, sentences

nltk_lm = pytest.importorskip("nltk.lm")
wordfreq = pytest.importorskip("wordfreq")


@pytest.fixture(scope="module")
def pydoc_lines() -> list[str]:
    from pydoc_data.topics import topics

    return "\n".join(topics[k] for k in sorted(topics)).splitlines()


@pytest.fixture(scope="module")
def model(pydoc_lines: list[str], tmp_path_factory: pytest.TempPathFactory) -> nextword.Model:
    path = tmp_path_factory.mktemp("pydoc") / "pydoc.nwm"
    nextword.train_texts(pydoc_lines, path, min_count=1, max_vocab=10**6)  # no OOV words
    return nextword.load(path)


@pytest.fixture(scope="module")
def token_sents(pydoc_lines: list[str]) -> list[list[str]]:
    return [["<unk>" if t is None else fold(t) for t in s] for line in pydoc_lines for s in sentences(line)]


@pytest.fixture(scope="module")
def nltk_models(token_sents: list[list[str]]) -> tuple[object, object]:
    from nltk.lm import MLE
    from nltk.lm.preprocessing import pad_both_ends
    from nltk.util import ngrams

    # bigram MLE, nltk's standard padding with <s> and </s>
    bi = MLE(2)
    padded = [list(pad_both_ends(s, n=2)) for s in token_sents]
    bi.fit([list(ngrams(s, 1)) + list(ngrams(s, 2)) for s in padded], vocabulary_text=[w for s in padded for w in s])
    # unigram MLE over the predicted tokens (words and </s>, not <s>), as our N counts them
    uni = MLE(1)
    right = [s + ["</s>"] for s in token_sents]
    uni.fit([list(ngrams(s, 1)) for s in right], vocabulary_text=[w for s in right for w in s])
    return bi, uni


def test_unigram_scores_equal_nltk_mle(model: nextword.Model, nltk_models: tuple) -> None:
    # nltk.lm.MLE(1).score(w) = c(w) / N over the same tokens (nltk 3.x documentation)
    _, uni = nltk_models
    for word, _ in model.words():
        ours = model.unigram_count(word) / model.total
        assert ours == pytest.approx(uni.score(fold(word)), rel=1e-12)
    assert model.unigram_count("</s>") / model.total == pytest.approx(uni.score("</s>"), rel=1e-12)


def test_bigram_scores_equal_nltk_mle(model: nextword.Model, nltk_models: tuple, token_sents: list[list[str]]) -> None:
    # nltk.lm.MLE(2).score(w, [v]) = c(v, w) / c(v as context); with λ = 1 ours is the same
    bi, _ = nltk_models
    pairs = {(v, w) for s in token_sents for v, w in zip(["<s>", *s], [*s, "</s>"])}
    assert len(pairs) > 20_000
    for v, w in pairs:
        assert model.prob(w, v, lam=1.0) == pytest.approx(bi.score(w, [v]), rel=1e-12)
    rng = random.Random(3)
    vocab = [fold(w) for w, _ in model.words()]
    for _ in range(2000):  # unseen pairs too: both must give 0
        v, w = rng.choice(vocab), rng.choice(vocab)
        assert model.prob(w, v, lam=1.0) == pytest.approx(bi.score(w, [v]), abs=1e-15)


def test_interpolation_equals_mix_of_nltk_scores(model: nextword.Model, nltk_models: tuple) -> None:
    bi, uni = nltk_models
    rng = random.Random(5)
    vocab = [fold(w) for w, _ in model.words()]
    for _ in range(3000):
        v, w = rng.choice(vocab), rng.choice(vocab + ["</s>"])
        lam = rng.choice([0.9, 0.5, 0.1])
        want = lam * bi.score(w, [v]) + (1 - lam) * uni.score(w)
        assert model.prob(w, v, lam=lam) == pytest.approx(want, rel=1e-12)


def test_top_words_overlap_wordfreq(model: nextword.Model) -> None:
    # wordfreq's English list is built from many large corpora; technical documentation
    # shares most of its top function words. Measured on CPython 3.11 topics: 18 of our
    # top 20 and 28 of our top 50 are in wordfreq's top 100; the bounds leave margin for
    # other CPython versions, while a counting or case-folding bug falls far below them.
    top = [fold(w) for w, _ in model.words()][:50]
    common = set(wordfreq.top_n_list("en", 100))
    assert len(set(top[:20]) & common) >= 15
    assert len(set(top) & common) >= 24
    assert top[0] == wordfreq.top_n_list("en", 1)[0] == "the"


def test_perplexity_matches_nltk_for_pure_bigram_where_defined(
    model: nextword.Model, nltk_models: tuple, token_sents: list[list[str]], tmp_path: Path
) -> None:
    # On its own training text a λ = 1 model has finite perplexity equal to nltk's MLE(2)
    bi, _ = nltk_models
    from nltk.lm.preprocessing import pad_both_ends
    from nltk.util import ngrams

    sample = [" ".join(s) for s in token_sents[:300] if "<unk>" not in s]
    test_bigrams = [g for line in sample for g in ngrams(pad_both_ends(line.split(), n=2), 2)]
    assert model.perplexity(sample, lam=1.0) == pytest.approx(bi.perplexity(test_bigrams), rel=1e-9)
