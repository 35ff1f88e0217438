"""Hand-computable corpora: every expected value is worked out in the comments."""

from __future__ import annotations

import math
from pathlib import Path

import pytest

import nextword
from nextword import InvalidArgumentError

# Jurafsky & Martin, Speech and Language Processing (3rd ed. draft), ch. 3, the
# three-sentence "I am Sam" mini-corpus and its bigram MLE values.
SAM = ["I am Sam", "Sam I am", "I do not like green eggs and ham"]


@pytest.fixture(scope="module")
def sam(tmp_path_factory: pytest.TempPathFactory) -> nextword.Model:
    path = tmp_path_factory.mktemp("sam") / "sam.nwm"
    nextword.train_texts(SAM, path, min_count=1)
    return nextword.load(path)


def test_jurafsky_martin_bigram_mle(sam: nextword.Model) -> None:
    # with λ = 1 the model is the bigram MLE; values from J&M ch. 3
    p = lambda w, v: sam.prob(w, v, lam=1.0)  # noqa: E731
    assert p("I", None) == pytest.approx(2 / 3)
    assert p("Sam", None) == pytest.approx(1 / 3)
    assert p("am", "I") == pytest.approx(2 / 3)
    assert p("do", "I") == pytest.approx(1 / 3)
    assert p("Sam", "am") == pytest.approx(1 / 2)
    assert p("</s>", "Sam") == pytest.approx(1 / 2)


def test_interpolated_value_by_hand(sam: nextword.Model) -> None:
    # Tokens predicted (N): 3 + 3 + 8 words + 3 </s> = 17.  c(i) = 3, c(am) = 2.
    # c(i, am) = 2, c(i as history) = 3.
    # P(am | i) = 0.9 * 2/3 + 0.1 * 2/17 = 0.6 + 0.0117647... = 0.6117647...
    assert sam.prob("am", "i") == pytest.approx(0.9 * 2 / 3 + 0.1 * 2 / 17, abs=1e-15)
    # unseen pair: P(ham | sam) = 0.9 * 0/2 + 0.1 * 1/17
    assert sam.prob("ham", "Sam") == pytest.approx(0.1 / 17, abs=1e-15)
    # unknown history falls back to the unigram: P(i | <unk>) = 3/17 (no <unk> in training)
    assert sam.prob("I", "zebra") == pytest.approx(3 / 17, abs=1e-15)


def test_display_keeps_capitals_of_I_and_names(sam: nextword.Model) -> None:
    # "I" and "Sam" occur mid-sentence capitalised, so they keep their capitals
    assert [s.word for s in sam.suggest("Sam ", 1)] == ["I"]
    assert [s.word for s in sam.suggest("I am s", 1)] == ["Sam"]


def test_suggest_at_sentence_start(sam: nextword.Model) -> None:
    # after <s>: P(i) = .9*2/3 + .1*3/17 = .6176..., P(sam) = .9/3 + .1*2/17 = .3117...
    # every other word scores by unigram only: the most frequent left is am (c = 2,
    # tied with sam, which is already ranked) -> .1*2/17
    got = sam.suggest("", 3)
    assert [s.word for s in got] == ["I", "Sam", "Am"]
    assert got[0].prob == pytest.approx(0.9 * 2 / 3 + 0.1 * 3 / 17)
    assert got[1].prob == pytest.approx(0.9 / 3 + 0.1 * 2 / 17)
    assert got[2].prob == pytest.approx(0.1 * 2 / 17)


def test_perplexity_by_hand(sam: nextword.Model) -> None:
    # "I am Sam": P(i|<s>) P(am|i) P(sam|am) P(</s>|sam), 4 events
    ps = [
        0.9 * 2 / 3 + 0.1 * 3 / 17,
        0.9 * 2 / 3 + 0.1 * 2 / 17,
        0.9 * 1 / 2 + 0.1 * 2 / 17,
        0.9 * 1 / 2 + 0.1 * 3 / 17,
    ]
    expected = math.exp(-sum(math.log(p) for p in ps) / 4)
    assert sam.perplexity(["I am Sam"]) == pytest.approx(expected, rel=1e-12)


def test_probabilities_sum_to_one_on_every_history(sam: nextword.Model) -> None:
    vocab = [w for w, _ in sam.words()] + ["</s>", "<unk>"]
    for v in [None, "<unk>", *[w for w, _ in sam.words()]]:
        assert math.fsum(sam.prob(w, v) for w in vocab) == pytest.approx(1.0, abs=1e-12)


def test_lambda_is_stored_and_overridable(tmp_path: Path) -> None:
    path = tmp_path / "m.nwm"
    nextword.train_texts(SAM, path, min_count=1, lam=0.5)
    m = nextword.load(path)
    assert m.lam == 0.5
    assert m.prob("am", "I") == pytest.approx(0.5 * 2 / 3 + 0.5 * 2 / 17)
    assert m.prob("am", "I", lam=0.9) == pytest.approx(0.9 * 2 / 3 + 0.1 * 2 / 17)
    assert nextword.load(path, lam=0.0).prob("am", "I") == pytest.approx(2 / 17)


def test_vocabulary_limits_map_rare_words_to_unknown(tmp_path: Path) -> None:
    path = tmp_path / "m.nwm"
    # counts: a=4, b=3, c=2, d=1
    nextword.train_texts(["a a b c", "a b c", "a b d"], path, min_count=2, max_vocab=2)
    m = nextword.load(path)
    assert [w for w, _ in m.words()] == ["a", "b"]
    assert "c" not in m and "d" not in m
    # c, d are <unk>: c(<unk>) = 3 of N = 10 words + 3 </s> = 13
    assert m.unigram_count("<unk>") == 3
    assert m.prob("c", "b", lam=0.0) == pytest.approx(3 / 13)
    assert m.suggest("a b ", 5) and all(s.word in ("a", "b") for s in m.suggest("a b ", 5))


def test_numbers_are_never_suggested_and_break_context(tmp_path: Path) -> None:
    path = tmp_path / "m.nwm"
    nextword.train_texts(["open at 7 tonight", "open at 7 tonight", "at 9 sharp"], path, min_count=1)
    m = nextword.load(path)
    words = [w for w, _ in m.words()]
    assert "7" not in words and "9" not in words
    # after a number the context is <unk>: c(<unk>, tonight) = 2 of c(<unk>) = 3
    assert m.bigram_count("<unk>", "tonight") == 2
    assert m.suggest("we open at 7 ", 1)[0].word == "tonight"
    assert m.bigram_count("at", "tonight") == 0


def test_capitalisation_rules(sam: nextword.Model) -> None:
    assert [s.word for s in sam.suggest("I do not l", 1)] == ["like"]
    assert [s.word for s in sam.suggest("I do not L", 1)] == ["Like"]
    assert [s.word for s in sam.suggest("I do not LI", 1)] == ["LIKE"]
    assert [s.word for s in sam.suggest("green. e", 1)] == ["eggs"]  # typed lowercase wins
    assert [s.word for s in sam.suggest("green. ", 1)][0][0].isupper()


@pytest.mark.parametrize("bad", [0, -1, 1.5, "3", True])
def test_bad_k_raises(sam: nextword.Model, bad: object) -> None:
    with pytest.raises(InvalidArgumentError, match="k must be"):
        sam.suggest("I", bad)  # type: ignore[arg-type]


@pytest.mark.parametrize("bad", [-0.1, 1.01, float("nan"), "0.5"])
def test_bad_lambda_raises(sam: nextword.Model, bad: object) -> None:
    with pytest.raises(InvalidArgumentError, match="lam must be"):
        sam.prob("am", "I", lam=bad)  # type: ignore[arg-type]
