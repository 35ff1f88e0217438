"""Text rules: how raw typed text becomes words, sentence boundaries and context breaks.

Training and querying must cut text the same way, or the model would be asked about
contexts it never counted. Both go through this module. The rules (also in README):

* Text is normalised to Unicode NFC first.
* A *word* is a run of letters and digits (Python's ``str.isalnum``), possibly joined by
  internal apostrophes (``'`` or ``’``) or hyphens (``-``, ``‐``, ``‑``), containing at
  least one letter: ``don't``, ``well-known``, ``5pm``, ``mp3``.
* A *number* (a run of digits, optionally with internal ``. , :`` as in ``7:30`` or
  ``3.5``) and any *symbol* character (Unicode category S*: ``£ + = ©`` …) are non-words:
  they are never suggested, and they *break the context*: the next word is predicted
  from the unknown symbol, not from the word before the number. A run of consecutive
  non-words counts as one.
* Sentences end at ``. ! ? …`` (and their full-width forms) and at line ends. The first
  word of a sentence is predicted from the sentence-start context.
* Other punctuation (commas, quotes, brackets, dashes, ``& @ #`` …) separates words but
  does not break the context.
* Counting is case-insensitive: a word's *key* is its case-folded form, with curly
  apostrophes and Unicode hyphens mapped to ``'`` and ``-``.
"""

from __future__ import annotations

import re
import unicodedata
from dataclasses import dataclass
from typing import Final, Iterator

__all__ = [
    "BOS",
    "EOS",
    "UNK",
    "WORD",
    "BREAK",
    "END",
    "Context",
    "fold",
    "fold_all",
    "normalize",
    "tokens",
    "word_spans",
    "is_word",
    "TOKEN_RE",
    "HAS_LETTER",
    "sentences",
    "parse_typed",
    "recase",
    "MAX_CONTEXT_CHARS",
    "TEXT_RULES",
]

#: Reserved symbols. None of them can be a word: words contain no ``<`` or ``>``.
BOS: Final = "<s>"
EOS: Final = "</s>"
UNK: Final = "<unk>"

#: Token kinds produced by :func:`tokens`.
WORD: Final = 0
BREAK: Final = 1
END: Final = 2

_SENTENCE_END_CHARS = ".!?…‼‽⁇⁈⁉。！？｡\n\r\u2028\u2029\u0085\x0b\x0c"
_JOINERS = "'’-‐‑"  # a word may continue after one of these (apostrophes, hyphens)
#: The one token pattern of the text rules. Its named groups: ``num`` (digits with internal
#: ``. , :``), ``word`` (letters/digits joined by apostrophes or hyphens; a word only if
#: :func:`is_word`, else a number), ``end`` (a run of sentence-end characters) and
#: ``other`` (one punctuation or symbol character: symbols break the context, punctuation
#: is skipped). :func:`tokens` is the reference reading; the counting fast path
#: (:mod:`nextword.counts`) and the keystroke simulation (:mod:`nextword.evaluate`) read
#: the same matches, so every module cuts text alike.
TOKEN_RE: Final = re.compile(
    r"(?P<num>\d+(?:[.,:]\d+)+)"
    rf"|(?P<word>[^\W_]+(?:[{re.escape(_JOINERS)}][^\W_]+)*)"
    rf"|(?P<end>[{re.escape(_SENTENCE_END_CHARS)}]+)"
    r"|(?P<other>[^\w\s])"
)
#: a letter (a ``word`` match is a word only if it holds one, see :func:`is_word`)
HAS_LETTER: Final = re.compile(r"[^\W\d_]")
_FOLD_PAIRS = (("’", "'"), ("‐", "-"), ("‑", "-"))
_FOLD_TABLE = str.maketrans(dict(_FOLD_PAIRS))

#: Version of these rules. A model file records the version it was counted with (META
#: ``text_rules``; absent means 1); the reader refuses a newer one, and a mixture refuses
#: parts counted under different rules, since they would cut the same text differently.
#: Bump it whenever a change here would cut any text differently.
TEXT_RULES: Final = 1

#: suggest() looks at no more than this many characters before the cursor, so a call
#: costs the same whether the document is one line or a whole book.
MAX_CONTEXT_CHARS: Final = 256


def normalize(text: str) -> str:
    """Return ``text`` in Unicode NFC, the form every rule here assumes."""
    return unicodedata.normalize("NFC", text)


def fold(word: str) -> str:
    """Return the counting key of a word: case-folded, NFC, apostrophes and hyphens unified.

    >>> fold("Don’t")
    "don't"
    """
    return unicodedata.normalize("NFC", word.casefold()).translate(_FOLD_TABLE)


def fold_all(words: list[str]) -> list[str]:
    """:func:`~nextword.text.fold` of every word, in one pass over their joined text.

    Exact: case folding and the apostrophe/hyphen mapping work character by character,
    and NFC never composes across the line break that separates the words (none of
    them contains one).
    """
    if not words:
        return []
    text = unicodedata.normalize("NFC", "\n".join(words).casefold())
    for src, dst in _FOLD_PAIRS:  # str.replace is much faster than str.translate here
        if src in text:
            text = text.replace(src, dst)
    return text.split("\n")


def is_word(token: str) -> bool:
    """Whether a ``word`` match of :data:`TOKEN_RE` is a word: it holds at least one letter (``5pm`` yes, ``42`` no)."""
    return token.isalpha() or HAS_LETTER.search(token) is not None


def tokens(text: str) -> Iterator[tuple[int, str]]:
    """Yield ``(kind, surface)`` for each token of already-normalised ``text``.

    Kinds are :data:`WORD`, :data:`BREAK` (a number or symbol) and :data:`END` (a
    sentence boundary). Soft punctuation yields nothing.
    """
    for m in TOKEN_RE.finditer(text):
        group = m.lastgroup
        s = m.group()
        if group == "word":
            yield (WORD if is_word(s) else BREAK), s
        elif group == "end":
            yield END, s
        elif group == "num":
            yield BREAK, s
        elif not unicodedata.category(s).startswith("P"):
            yield BREAK, s


def word_spans(text: str) -> list[tuple[int, int]]:
    """(start, end) of every word of already-normalised ``text``, by the rules of :func:`tokens`.

    The keystroke simulation types these spans letter by letter; they are the words
    :func:`sentences` returns, with their places in the text.
    """
    return [m.span() for m in TOKEN_RE.finditer(text) if m.lastgroup == "word" and is_word(m.group())]


def sentences(text: str) -> list[list[str | None]]:
    """Split one message into sentences of word surfaces, ``None`` marking a context break.

    Consecutive breaks collapse to one ``None``. Empty sentences are dropped.

    >>> sentences("Meet at 7:30 by the Mill. Thanks!")
    [['Meet', 'at', None, 'by', 'the', 'Mill'], ['Thanks']]
    """
    out: list[list[str | None]] = []
    cur: list[str | None] = []
    for kind, s in tokens(normalize(text)):
        if kind == WORD:
            cur.append(s)
        elif kind == BREAK:
            if not cur or cur[-1] is not None:
                cur.append(None)
        elif cur:
            out.append(cur)
            cur = []
    if cur:
        out.append(cur)
    return out


def recase(word: str, prefix: str, at_start: bool) -> str:
    """Show a vocabulary word with the casing the user asked for by typing ``prefix``.

    Keys are case-folded (:func:`fold`), so the casing of a suggestion is a text rule of
    its own: an explicitly lowercase prefix stays lowercase; two or more capitals typed
    (``"NE"``) ask for the whole word in capitals; a capital first letter, or a sentence
    start (``at_start``) with nothing typed, capitalises the first letter.
    """
    if prefix:
        first = prefix[0]
        if first.islower():  # the common case: an explicitly lowercase prefix wins
            return word
        if prefix.isupper() and sum(c.isupper() for c in prefix) >= 2:
            return word.upper()
        if first.isupper():
            return word[:1].upper() + word[1:]
    if at_start:
        return word[:1].upper() + word[1:]
    return word


@dataclass(frozen=True, slots=True)
class Context:
    """What :func:`parse_typed` found at the end of the typed text.

    ``previous`` is the surface of the last complete word in the same sentence, or
    :data:`BOS` at a sentence start, or :data:`UNK` right after a number or symbol.
    ``prefix`` is the partial word being typed (empty when the cursor follows a
    separator), as typed, NFC-normalised. ``before`` is the token before ``previous``
    in the same sentence, read by the same rules (a surface, :data:`UNK`, or :data:`BOS`
    when ``previous`` opens the sentence), and None when ``previous`` is :data:`BOS`:
    the two-word context of an order-3 model is ``(before, previous)``.
    """

    previous: str
    prefix: str
    before: str | None = None

    @property
    def history(self) -> tuple[str, ...]:
        """The context tokens, oldest first: ``(BOS,)``, or ``(before, previous)``."""
        if self.before is None:
            return (self.previous,)
        return (self.before, self.previous)


def parse_typed(text: str) -> Context:
    """Find the context word and the partial word at the end of ``text``.

    Only the last :data:`MAX_CONTEXT_CHARS` characters are examined (the last 40 first,
    which almost always suffice), so the cost does not grow with the document. If the
    cut lands inside a word, that fragment is not taken as context; if the examined
    tail holds no word, number, symbol or boundary, the context is the sentence start.
    """
    if len(text) > _FIRST_WINDOW:
        found = _parse_tail(text, _FIRST_WINDOW, final=False)
        if found is not None:
            return found
    return _parse_tail(text, MAX_CONTEXT_CHARS, final=True)  # type: ignore[return-value]


_FIRST_WINDOW = 40


def _parse_tail(text: str, window: int, *, final: bool) -> Context | None:
    truncated = len(text) > window
    tail = normalize(text[-window:] if truncated else text)
    toks = list(TOKEN_RE.finditer(tail))
    cut = truncated and bool(toks) and toks[0].start() == 0 and toks[0].lastgroup in ("word", "num")
    prefix = ""
    if toks:
        last = toks[-1]
        if last.lastgroup in ("word", "num") and last.end() == len(tail):
            if cut and len(toks) == 1 and not final:
                return None  # the partial word may be longer than this window
            prefix = last.group()
            toks.pop()
        elif (
            last.lastgroup == "other"
            and last.group() in _JOINERS
            and last.end() == len(tail)
            and len(toks) >= 2
            and toks[-2].lastgroup == "word"
            and toks[-2].end() == last.start()
        ):
            prefix = toks[-2].group() + last.group()
            toks.pop()
            toks.pop()
    if cut and toks:
        toks = toks[1:]
    # the context tokens, most recent first, as counting sees them: words, BOS at a
    # boundary, and one UNK for a run of numbers and symbols (soft punctuation is skipped)
    found: list[str] = []
    for m in reversed(toks):
        group = m.lastgroup
        s = m.group()
        if group == "word" and is_word(s):
            found.append(s)
        elif group == "end":
            found.append(BOS)
        elif group in ("num", "word") or not unicodedata.category(s).startswith("P"):
            if not found or found[-1] != UNK:
                found.append(UNK)
        if found and (found[-1] == BOS or len(found) == 2):
            break
    else:
        # the text ran out: its start is a sentence start, unless the window cut it
        if truncated and not final:
            return None
        found.append(BOS)
    if found[0] == BOS:
        return Context(BOS, prefix)
    return Context(found[0], prefix, found[1])
