"""Text rules (README "Text rules"): hand-made examples, one rule per test."""

from __future__ import annotations

import pytest

from nextword.text import BOS, UNK, Context, fold, parse_typed, sentences


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
    assert parse_typed(text) == expected


def test_parse_looks_only_at_the_tail() -> None:
    long_text = "word " * 10_000 + "the tr"
    assert parse_typed(long_text) == Context("the", "tr")
    # the cut lands inside a word: that fragment is not taken as context
    assert parse_typed("x" * 300 + " ") == Context(BOS, "")
    assert parse_typed("see " + "," * 100 + "yo") == Context("see", "yo")
    assert parse_typed("see " + " " * 300 + "yo") == Context(BOS, "yo")
    # a partial word longer than the window stays a (hopeless) prefix, not a next-word query
    assert parse_typed("a " + "x" * 100).prefix == "x" * 100
    assert len(parse_typed("x" * 400).prefix) < 400


@pytest.mark.parametrize("n", [0, 1, 30, 63, 64, 65, 100, 255, 256, 257, 400])
def test_windowed_parse_equals_parsing_the_whole_tail(n: int) -> None:
    # filler of length n before "the wor": the result must not depend on the window
    for filler in ("a" * n, "word " * (n // 5), "." * n, " " * n):
        text = filler + " the wor"
        assert parse_typed(text) == Context("the", "wor")
