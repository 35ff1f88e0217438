"""Text rules (README "Text rules"): hand-made examples, one rule per test."""

from __future__ import annotations

import pytest

from hypothesis import assume, given, settings
from hypothesis import strategies as st

from nextword.text import BOS, UNK, Context, fold, normalize, parse_typed, sentences, word_spans


def test_words_keep_internal_apostrophes_and_hyphens() -> None:
    assert sentences("We'll fix the well-known squeak, don’t worry") == [
        ["We'll", "fix", "the", "well-known", "squeak", "don’t", "worry"]
    ]


def test_sentence_ends_and_line_ends_split_sentences() -> None:
    assert sentences("Done! See you? Yes. ok\nthanks") == [["Done"], ["See", "you"], ["Yes"], ["ok"], ["thanks"]]


def test_numbers_and_symbols_break_context_and_collapse() -> None:
    # "£15" is a symbol then a number: one break; "7:30" and "3.5" are single numbers
    assert sentences("It costs £15 at 7:30 or 3.5 + 2 more") == [
        ["It", "costs", None, "at", None, "or", None, "more"]
    ]


def test_words_with_digits_are_words_but_pure_digits_are_not() -> None:
    assert sentences("meet 5pm 42 mp3") == [["meet", "5pm", None, "mp3"]]


def test_soft_punctuation_does_not_break() -> None:
    assert sentences('tools, "levers" (two) & pads') == [["tools", "levers", "two", "pads"]]


def test_nfc_normalisation() -> None:
    decomposed = "cafe\u0301"  # e + combining acute
    assert sentences(decomposed) == [["café"]]
    assert fold(decomposed) == "café"


def test_fold_unifies_case_apostrophes_and_hyphens() -> None:
    assert fold("DON’T") == "don't"
    assert fold("Well\u2010Known") == "well-known"
    assert fold("STRASSE") == fold("straße")  # Unicode case folding (common practice)


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        ("", Context(BOS, "")),
        ("see you at the ", Context("the", "")),
        ("see you at the wor", Context("the", "wor")),
        ("Great. Th", Context(BOS, "Th")),
        ("Great.\nsee", Context(BOS, "see")),
        ("meet at 7:30 ", Context(UNK, "")),
        ("meet at 7:30 p", Context(UNK, "p")),
        ("costs £", Context(UNK, "")),
        ("we, then ", Context("then", "")),
        ("I don'", Context("I", "don'")),
        ("a well-", Context("a", "well-")),
        ("at 7", Context("at", "7")),
    ],
)
def test_parse_typed(text: str, expected: Context) -> None:
    got = parse_typed(text)
    assert (got.previous, got.prefix) == (expected.previous, expected.prefix)


@pytest.mark.parametrize(
    ("text", "history"),
    [
        ("", (BOS,)),
        ("Thanks. ", (BOS,)),
        ("the tr", (BOS, "the")),
        ("see you at the ", ("at", "the")),
        ("Hi. see ", (BOS, "see")),
        ("meet at 7:30 ", ("at", UNK)),
        ("costs £5 + £6 to", ("costs", UNK)),
        ("at 7, 8 then ", (UNK, "then")),
        ("we, (then) ", ("we", "then")),
        ("x" * 300 + " the ", (BOS, "the")),  # the window cut a word: the sentence starts there
    ],
)
def test_parse_typed_two_word_history(text: str, history: tuple[str, ...]) -> None:
    # hand-checked against the text rules above: breaks collapse to one <unk>, soft
    # punctuation is skipped, a boundary or the start of the text is <s>
    assert parse_typed(text).history == history


_PIECES = ["we", "fix", "Bikes", "don't", "7:30", "£", ",", ".", "!", " ", "  ", "(", "well-known", "5pm", "\n"]


@settings(max_examples=300, deadline=None)
@given(st.lists(st.sampled_from(_PIECES), max_size=30))
def test_history_is_what_counting_sees(parts: list[str]) -> None:
    # The context of a query must be the context counting gave the next word: the last
    # two tokens of the last sentence of ``sentences`` (None = <unk>), or <s> after a boundary.
    text = " ".join(parts).replace("\\n", "\n") + " "
    assume(len(text) < 200)
    sents = sentences(text)
    ends_sentence = not sents or parse_typed(text).previous == BOS
    got = parse_typed(text).history
    if ends_sentence:
        assert got == (BOS,)
    else:
        toks = [UNK if t is None else t for t in sents[-1]]
        want = tuple(([BOS] + toks)[-2:])
        assert got == want


def test_parse_looks_only_at_the_tail() -> None:
    long_text = "word " * 10_000 + "the tr"
    assert parse_typed(long_text) == Context("the", "tr", "word")
    # the cut lands inside a word: that fragment is not taken as context
    assert parse_typed("x" * 300 + " ") == Context(BOS, "")
    assert parse_typed("see " + "," * 100 + "yo") == Context("see", "yo", BOS)
    assert parse_typed("see " + " " * 300 + "yo") == Context(BOS, "yo")
    # a partial word longer than the window stays a (hopeless) prefix, not a next-word query
    assert parse_typed("a " + "x" * 100).prefix == "x" * 100
    assert len(parse_typed("x" * 400).prefix) < 400


@pytest.mark.parametrize("n", [0, 1, 30, 63, 64, 65, 100, 255, 256, 257, 400])
def test_windowed_parse_equals_parsing_the_whole_tail(n: int) -> None:
    # filler of length n before "the wor": the result must not depend on the window
    for filler in ("a" * n, "word " * (n // 5), "." * n, " " * n):
        text = filler + " the wor"
        got = parse_typed(text)
        assert (got.previous, got.prefix) == ("the", "wor")
        # before "the": the filler's last word, or <s> (a sentence end, nothing, or a cut word)
        assert got.before in (BOS, "word", "a" * n)


@given(st.lists(st.sampled_from(_PIECES), max_size=30))
def test_word_spans_are_the_words_of_sentences(parts: list[str]) -> None:
    # the oracle: sentences(), the reference reading of the same rules, minus its breaks
    text = normalize("".join(parts))
    want = [w for sent in sentences(text) for w in sent if w is not None]
    assert [text[s:e] for s, e in word_spans(text)] == want


def test_word_spans_example() -> None:
    # hand-checked: "5pm" is a word, "42" and "7:30" are numbers, "don't" one word
    assert word_spans("meet 5pm, 42 don't 7:30") == [(0, 4), (5, 8), (13, 18)]


def test_a_backslash_after_a_word_is_not_a_joiner() -> None:
    """Only apostrophes and hyphens join (the rules above); a trailing backslash is punctuation.

    Found by the native runtime's comparison: the character class once held the regex
    escape of the hyphen as a joiner of its own.
    """
    from nextword.text import parse_typed

    assert parse_typed("One line\\").prefix == ""
    assert parse_typed("One line\\").previous == "line"
    assert parse_typed("well-").prefix == "well-"  # a real joiner still waits for the rest of the word
