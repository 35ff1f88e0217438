"""Interpolated Kneser-Ney written the obvious way, with plain dicts: the oracle for the engine.

This is the reference that the engine's Kneser-Ney estimator (order 2 and 3) must
reproduce, the way :class:`nextword.baselines.DictBigram` is the reference for the
Jelinek-Mercer bigram: it scores every word from counts kept in dicts, with no bounds,
no arrays and no file. It shares only the text rules (``nextword.text``) with the engine.

The estimate (Chen & Goodman, "An empirical study of smoothing techniques for language
modeling", 1998, section 3 — interpolated modified Kneser-Ney), for an n-gram order n,
a context h of n−1 tokens and its shortened context h′ (h without its first token):

    P_n(w | h) = max(a(h w) − D(a(h w)), 0) / a(h •)  +  γ(h) · P_{n−1}(w | h′)
    γ(h)       = (D₁·N₁(h •) + D₂·N₂(h •) + D₃₊·N₃₊(h •)) / a(h •)

where a(·) is the raw count at the highest order and the *continuation* count
N₁₊(• h w) (how many distinct tokens precede h w) at every lower order — except, by
common practice (the adjusted counts of Chen & Goodman's appendix, also used by
widely used toolkits), an n-gram that starts with the sentence start ``<s>`` keeps its
raw count, since nothing can precede ``<s>``. N_j(h •) counts the words that follow h
with adjusted count exactly j (N₃₊: three or more). A context never seen backs off
entirely (γ = 1, no first term). At the bottom the unigram level is discounted the same
way and interpolated with the uniform distribution over the prediction vocabulary, so
every word keeps a positive probability.

The discounts come from the count-of-counts n_j of each order's adjusted counts
(Chen & Goodman's equation 26):

    Y = n₁ / (n₁ + 2 n₂),  D₁ = 1 − 2Y n₂/n₁,  D₂ = 2 − 3Y n₃/n₂,  D₃₊ = 3 − 4Y n₄/n₃

When an order's counts are too few for that (some n_j = 0, or a D out of (0, j]), the
order falls back to one discount D = Y for every count (Ney's absolute-discounting
estimate), and if even that is undefined, to D = 0.5; :attr:`DictKneserNey.fallbacks`
says which order fell back and why. Fixed discounts may be given instead (a single
number per order, as the general-purpose ``nltk.lm.KneserNeyInterpolated`` uses).
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Iterable, Sequence
from dataclasses import dataclass

from .counts import DEFAULT_MAX_VOCAB, DEFAULT_MIN_COUNT
from .errors import InvalidArgumentError
from .text import BOS, EOS, UNK, fold, parse_typed

__all__ = ["Discounts", "DictKneserNey", "fit_discounts", "ngrams_of_sentence"]

Gram = tuple[str, ...]


@dataclass(frozen=True, slots=True)
class Discounts:
    """The three discounts of one order: for adjusted count 1, 2, and 3 or more."""

    d1: float
    d2: float
    d3: float

    def of(self, count: float) -> float:
        if count <= 0:
            return 0.0
        if count < 2:
            return self.d1
        if count < 3:
            return self.d2
        return self.d3


def fit_discounts(count_of_counts: Counter[int]) -> tuple[Discounts, str | None]:
    """Modified Kneser-Ney discounts from n₁..n₄; the second value says why it fell back (or None)."""
    n1, n2, n3, n4 = (count_of_counts.get(j, 0) for j in (1, 2, 3, 4))
    if n1 > 0 and n2 > 0 and n3 > 0 and n4 > 0:
        y = n1 / (n1 + 2 * n2)
        d = Discounts(1 - 2 * y * n2 / n1, 2 - 3 * y * n3 / n2, 3 - 4 * y * n4 / n3)
        if 0 < d.d1 <= 1 and 0 < d.d2 <= 2 and 0 < d.d3 <= 3:
            return d, None
        reason = f"modified discounts out of range ({d.d1:.3g}, {d.d2:.3g}, {d.d3:.3g})"
    else:
        reason = f"too few counts for three discounts (n1..n4 = {n1}, {n2}, {n3}, {n4})"
    if n1 > 0 and n2 > 0:
        y = n1 / (n1 + 2 * n2)
        return Discounts(y, y, y), reason + "; one discount Y = n1/(n1+2n2)"
    return Discounts(0.5, 0.5, 0.5), reason + "; one discount 0.5"


def ngrams_of_sentence(tokens: Sequence[str], order: int) -> list[Gram]:
    """Every n-gram of length 1..order ending at a predicted token of ``<s> tokens </s>``.

    The context never crosses the sentence start: the first word's longest n-gram is
    ``(<s>, w1)``, the second's ``(<s>, w1, w2)`` (no repeated padding).
    """
    seq = [BOS, *tokens, EOS]
    out: list[Gram] = []
    for i in range(1, len(seq)):
        for m in range(1, order + 1):
            if i - m + 1 < 0:
                break
            out.append(tuple(seq[i - m + 1 : i + 1]))
    return out


class DictKneserNey:
    """Counts in dicts; ``prob`` follows the recursion above, ``rank`` scores every word.

    Build from messages (the engine's text rules and vocabulary rule) or from n-gram
    counts directly with :meth:`from_counts`.
    """

    def __init__(
        self,
        messages: Iterable[str],
        *,
        order: int = 3,
        min_count: int = DEFAULT_MIN_COUNT,
        max_vocab: int = DEFAULT_MAX_VOCAB,
        discounts: Sequence[float] | None = None,
    ) -> None:
        from .baselines import key_sentences

        streams, vocab = key_sentences(messages, min_count=min_count, max_vocab=max_vocab)
        known = set(vocab)
        grams: Counter[Gram] = Counter()
        for toks in streams:
            grams.update(ngrams_of_sentence([t if t in known else UNK for t in toks], order))
        self._setup(grams, vocab, order=order, discounts=discounts, raw_at_start=True)

    @classmethod
    def from_counts(
        cls,
        grams: Counter[Gram],
        vocab: Sequence[str],
        *,
        order: int,
        discounts: Sequence[float] | None = None,
        raw_at_start: bool = True,
        unigram_uniform: bool = True,
    ) -> DictKneserNey:
        """A model from raw n-gram counts of every length 1..order (as :func:`ngrams_of_sentence` makes).

        ``raw_at_start=False`` and ``unigram_uniform=False`` give the textbook variant
        without the sentence-start rule and with an undiscounted continuation unigram
        (the one ``nltk.lm.KneserNeyInterpolated`` implements, with one fixed discount).
        """
        self = cls.__new__(cls)
        self._setup(grams, list(vocab), order=order, discounts=discounts, raw_at_start=raw_at_start,
                    unigram_uniform=unigram_uniform)
        return self

    def _setup(
        self,
        grams: Counter[Gram],
        vocab: list[str],
        *,
        order: int,
        discounts: Sequence[float] | None,
        raw_at_start: bool,
        unigram_uniform: bool = True,
    ) -> None:
        if isinstance(order, bool) or not isinstance(order, int) or order < 1:
            raise InvalidArgumentError(f"order must be an integer >= 1, got {order!r}")
        if discounts is not None:
            if len(discounts) != order or not all(0 < d < 1 for d in discounts):
                raise InvalidArgumentError(f"discounts must be {order} values in (0, 1), got {list(discounts)!r}")
        self.order = order
        self.vocab = vocab
        self.known = set(vocab)
        #: the prediction vocabulary: every word, the end of sentence and the unknown symbol
        self.outcomes = [*vocab, EOS, UNK]
        self.unigram_uniform = unigram_uniform
        # adjusted counts a(h w) per order m (context length m − 1)
        self.table: list[dict[Gram, Counter[str]]] = [{} for _ in range(order + 1)]
        for g, c in grams.items():
            m = len(g)
            if m == order or (raw_at_start and g[0] == BOS):
                self.table[m].setdefault(g[:-1], Counter())[g[-1]] += c
        for g in grams:  # continuation counts: one per distinct left extension
            if 1 < len(g) <= order:
                low = g[1:]
                if not (raw_at_start and low[0] == BOS):
                    self.table[len(low)].setdefault(low[:-1], Counter())[low[-1]] += 1
        self.totals = [{h: sum(row.values()) for h, row in t.items()} for t in self.table]
        self.discounts: list[Discounts | None] = [None]
        self.fallbacks: dict[int, str] = {}
        for m in range(1, order + 1):
            if discounts is not None:
                d = float(discounts[m - 1])
                self.discounts.append(Discounts(d, d, d))
                continue
            coc: Counter[int] = Counter(int(c) for row in self.table[m].values() for c in row.values())
            fitted, why = fit_discounts(coc)
            self.discounts.append(fitted)
            if why is not None:
                self.fallbacks[m] = why

    def _key(self, word: str) -> str:
        if word in (EOS, UNK):
            return word
        w = fold(word)
        return w if w in self.known else UNK

    def _context(self, context: Sequence[str]) -> Gram:
        out = []
        for t in context:
            out.append(t if t in (BOS, UNK) else self._key(t))
        # nothing precedes the sentence start: keep the context from the last <s> on
        if BOS in out:
            out = out[len(out) - 1 - out[::-1].index(BOS):]
        return tuple(out[-(self.order - 1):]) if self.order > 1 else ()

    def prob_key(self, w: str, h: Gram) -> float:
        """P(w | h) for a vocabulary key (or ``</s>``, ``<unk>``) and a context of keys."""
        m = len(h) + 1
        row = self.table[m].get(h)
        lower = self.prob_key(w, h[1:]) if m > 1 else (
            1.0 / len(self.outcomes) if self.unigram_uniform else 0.0)
        if not row:
            return lower
        total = self.totals[m][h]
        a = row.get(w, 0)
        if m == 1 and not self.unigram_uniform:
            return a / total
        d = self.discounts[m]
        assert d is not None
        first = max(a - d.of(a), 0.0) / total
        n1 = sum(1 for c in row.values() if 0 < c < 2)
        n2 = sum(1 for c in row.values() if 2 <= c < 3)
        n3 = sum(1 for c in row.values() if c >= 3)
        dropped = total - sum(row.values())
        if dropped:  # a pruned context: each dropped n-gram's whole count backs off
            gamma = (d.d1 * n1 + d.d2 * n2 + d.d3 * n3 + dropped) / total
        else:
            gamma = (d.d1 * n1 + d.d2 * n2 + d.d3 * n3) / total
        return first + gamma * lower

    def without(self, grams: Iterable[Gram]) -> DictKneserNey:
        """This model with the given n-grams (of order ≥ 2, as key tuples) pruned.

        The pruned model of :mod:`nextword.prune`, written plainly: a dropped n-gram
        leaves its context's row, the context's total stays as counted, so the dropped
        count backs off to the lower order (γ gains it); continuation counts, discounts
        and every other row stay as estimated on the full data.
        """
        out = DictKneserNey.__new__(DictKneserNey)
        out.__dict__.update(self.__dict__)
        out.table = [{h: Counter(row) for h, row in t.items()} for t in self.table]
        for g in grams:
            if len(g) < 2:
                raise InvalidArgumentError(f"only n-grams of order 2 or more are pruned, got {g!r}")
            row = out.table[len(g)].get(g[:-1])
            if row is None or g[-1] not in row:
                raise InvalidArgumentError(f"{g!r} is not a stored n-gram")
            del row[g[-1]]
        return out

    def prob(self, word: str, context: Sequence[str] = ()) -> float:
        """P(word | the last order−1 tokens of ``context``); ``<s>`` marks a sentence start."""
        return self.prob_key(self._key(word), self._context(context))

    def rank(self, context: Sequence[str], prefix: str, k: int) -> list[tuple[str, float]]:
        """Top k (key, P) among vocabulary words starting with ``prefix``: score all, sort.

        Order: probability descending, then the floor (the unigram level P(w), the
        distribution the engine's ids follow) descending, then the key — the engine's
        (probability, smaller id) without knowing its ids (docs/SEAMS.md "Ties").
        """
        h = self._context(context)
        p = fold(prefix)
        scored = [(self.prob_key(w, h), self.prob_key(w, ()), w) for w in self.vocab if w.startswith(p)]
        scored.sort(key=lambda t: (-t[0], -t[1], t[2]))
        return [(w, s) for s, _, w in scored[:k]]

    def suggest_keys(self, typed: str, k: int) -> list[tuple[str, float]]:
        """The ranking for a typed text, with the one-word context the text rules give today."""
        ctx = parse_typed(typed)
        return self.rank([ctx.previous], ctx.prefix, k)
