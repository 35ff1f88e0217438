"""The same interpolated bigram model written the obvious way, with plain Python dicts.

Two uses: the test suite's oracle (it scores *every* vocabulary word, so the engine's
bounded candidate search must reproduce its ranking exactly) and the benchmark's
baseline (the version anyone would write first), timed side by side with the engine.
It shares only the text rules (``nextword.text``) with the engine.
"""

from __future__ import annotations

from collections import Counter
from typing import Iterable

from nextword.text import BOS, EOS, UNK, fold, parse_before_cursor, sentences

__all__ = ["DictBigram"]


class DictBigram:
    """Counts in dicts; ``rank`` scores all words, sorts, and takes the first k."""

    def __init__(self, messages: Iterable[str], *, min_count: int = 2, max_vocab: int = 30_000) -> None:
        streams: list[list[str]] = []
        word_counts: Counter[str] = Counter()
        for message in messages:
            for sent in sentences(message):
                toks = [UNK if t is None else fold(t) for t in sent]
                streams.append(toks)
                word_counts.update(t for t in toks if t != UNK)
        ranked = sorted((w for w, c in word_counts.items() if c >= min_count), key=lambda w: (-word_counts[w], w))
        self.vocab: list[str] = ranked[:max_vocab]
        self.known = known = set(self.vocab)
        self.unigram: Counter[str] = Counter()
        self.bigram: dict[str, Counter[str]] = {}
        for toks in streams:
            prev = BOS
            for t in [*(t if t in known else UNK for t in toks), EOS]:
                self.unigram[t] += 1
                self.bigram.setdefault(prev, Counter())[t] += 1
                prev = t
        self.total = sum(self.unigram.values())
        self.history = {v: sum(row.values()) for v, row in self.bigram.items()}

    def _hist(self, previous: str | None) -> str:
        if previous is None or previous == BOS:
            return BOS
        if previous == UNK:
            return UNK
        key = fold(previous)
        return key if key in self.known else UNK

    def prob(self, word: str, previous: str | None, lam: float) -> float:
        v = self._hist(previous)
        if word in (EOS, UNK):
            w = word
        else:
            w = fold(word)
            w = w if w in self.known else UNK
        u = self.unigram[w] / self.total
        cv = self.history.get(v, 0)
        if cv == 0:
            return u
        return lam * (self.bigram[v][w] / cv) + (1.0 - lam) * u

    def rank(self, previous: str | None, prefix: str, k: int, lam: float) -> list[tuple[str, float]]:
        """Top k (key, P) among vocabulary words starting with ``prefix``: score all, sort."""
        p = fold(prefix)
        scored = [(self.prob(w, previous, lam), w) for w in self.vocab if w.startswith(p)]
        scored.sort(key=lambda t: (-t[0], t[1]))
        return [(w, s) for s, w in scored[:k]]

    def suggest_keys(self, text_before_cursor: str, k: int, lam: float) -> list[tuple[str, float]]:
        """The ranking for a typed text (no display spelling, no capitalisation)."""
        ctx = parse_before_cursor(text_before_cursor)
        return self.rank(ctx.previous, ctx.prefix, k, lam)
