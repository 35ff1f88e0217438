"""Baselines to measure the engine against, side by side in one run.

:class:`DictBigram` is the same interpolated bigram model written the obvious way,
with plain Python dicts: the version anyone would write first. It is also the test
suite's oracle: it scores *every* vocabulary word, so the engine's bounded candidate
search must reproduce its ranking exactly. It shares only the text rules
(``nextword.text``) with the engine. :func:`nltk_baseline` times the general-purpose
library a Python user would pick (nltk.lm, an optional dependency).
:func:`write_same_smoothing_bigram` writes, for an order-3 model file, the bigram model of
the same smoothing on the same counts, so ``nextword eval`` shows what the two-word
context buys.
"""

from __future__ import annotations

import time
from collections import Counter
import os
from typing import TYPE_CHECKING, Any, Callable, Iterable

import numpy as np

from .counts import DEFAULT_MAX_VOCAB, DEFAULT_MIN_COUNT
from .errors import InvalidArgumentError
from .text import BOS, EOS, UNK, fold, normalize, parse_typed, sentences, word_spans

if TYPE_CHECKING:
    from .model import Model
    from .ngrams import NgramCounts

__all__ = [
    "DictBigram", "key_sentences", "nltk_baseline", "sample_queries", "time_queries",
    "raw_bigram_counts", "write_same_smoothing_bigram",
]


def key_sentences(messages: Iterable[str], *, min_count: int, max_vocab: int) -> tuple[list[list[str]], list[str]]:
    """Every sentence as folded keys (``<unk>`` for breaks) and the vocabulary rule's words.

    The vocabulary: words seen at least ``min_count`` times, most frequent first, ties by
    key, at most ``max_vocab`` — the engine's rule, written out plainly for the oracles.
    Sentences keep out-of-vocabulary keys; callers map them to ``<unk>``.
    """
    streams: list[list[str]] = []
    word_counts: Counter[str] = Counter()
    for message in messages:
        for sent in sentences(message):
            toks = [UNK if t is None else fold(t) for t in sent]
            streams.append(toks)
            word_counts.update(t for t in toks if t != UNK)
    ranked = sorted((w for w, c in word_counts.items() if c >= min_count), key=lambda w: (-word_counts[w], w))
    return streams, ranked[:max_vocab]


class DictBigram:
    """Counts in dicts; ``rank`` scores all words, sorts, and takes the first k."""

    def __init__(self, messages: Iterable[str], *, min_count: int = DEFAULT_MIN_COUNT, max_vocab: int = DEFAULT_MAX_VOCAB) -> None:
        streams, self.vocab = key_sentences(messages, min_count=min_count, max_vocab=max_vocab)
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

    def suggest_keys(self, typed: str, k: int, lam: float) -> list[tuple[str, float]]:
        """The ranking for a typed text (no display spelling, no capitalisation)."""
        ctx = parse_typed(typed)
        return self.rank(ctx.previous, ctx.prefix, k, lam)


def sample_queries(messages: Iterable[str], n: int) -> list[str]:
    """The first ``n`` typed texts the keystroke simulation would ask about."""
    out: list[str] = []
    for message in messages:
        message = normalize(message)
        for start, end in word_spans(message):
            for j in range(end - start):
                out.append(message[: start + j])
                if len(out) >= n:
                    return out
    return out


def time_queries(
    suggest: Callable[[str], object], queries: list[str], *, progress: Callable[[int], None] | None = None
) -> list[float]:
    """Seconds per call of ``suggest`` on each query; ``progress(n)`` after each (outside the timing)."""
    times = []
    for q in queries:
        t0 = time.perf_counter()
        suggest(q)
        times.append(time.perf_counter() - t0)
        if progress is not None:
            progress(len(times))
    return times


def nltk_baseline(
    train_messages: list[str],
    queries: list[str],
    k: int,
    lam: float,
    *,
    min_count: int = DEFAULT_MIN_COUNT,
    progress: Callable[[int], None] | None = None,
) -> dict[str, Any]:
    """Fit nltk.lm's bigram MLE on the same tokens and answer top-k queries by scoring the vocabulary.

    The interpolated score is λ·MLE(w | v) + (1 − λ)·MLE(w), computed from nltk's own
    counts; every vocabulary word matching the prefix is scored, as a user of a
    general-purpose library would do. Needs nltk (the ``baselines`` extra).
    ``progress(n)`` is called after each timed query (the fit comes first).
    """
    try:
        from nltk.lm import MLE
        from nltk.lm.preprocessing import pad_both_ends
        from nltk.util import ngrams
    except ImportError:
        raise InvalidArgumentError("the nltk baseline needs nltk: pip install 'nextword[baselines]'") from None
    t0 = time.perf_counter()
    sents = [[UNK if t is None else fold(t) for t in s] for m in train_messages for s in sentences(m)]
    padded = [list(pad_both_ends(s, n=2)) for s in sents]
    from nltk.lm import Vocabulary

    lm = MLE(2, vocabulary=Vocabulary((w for s in padded for w in s), unk_cutoff=min_count))
    lm.fit([list(ngrams(s, 1)) + list(ngrams(s, 2)) for s in padded])
    fit_seconds = time.perf_counter() - t0
    words = sorted(w for w in lm.vocab if w not in (BOS, EOS, UNK, "<UNK>"))

    def suggest(text: str) -> list[tuple[str, float]]:
        ctx = parse_typed(text)
        prev = ctx.previous if ctx.previous in (BOS, UNK) else fold(ctx.previous)
        p = fold(ctx.prefix)
        scored = [(lam * lm.score(w, [prev]) + (1 - lam) * lm.score(w), w) for w in words if w.startswith(p)]
        scored.sort(key=lambda t: (-t[0], t[1]))
        return [(w, s) for s, w in scored[:k]]

    times = time_queries(suggest, queries, progress=progress)
    return {"fit_seconds": fit_seconds, "query_seconds": times, "vocabulary": len(words)}


# -- the bigram of the same smoothing, for an order-3 model ---------------------------------


def raw_bigram_counts(model: Model) -> NgramCounts:
    """Raw unigram and bigram counts of an order-3 model file's training text, in its ids.

    Jelinek-Mercer files store raw counts at every order: read as they are. Kneser-Ney
    files store raw counts only at the highest order and for n-grams that start with
    ``<s>`` (continuation counts below), but those determine the rest: every bigram
    occurrence (v, w) with v ≠ ``<s>`` is the end of exactly one trigram occurrence
    (u, v, w) in the same sentence (u = ``<s>`` for a sentence's second token), so
    c(v, w) = Σ_u c(u, v, w); c(<s>, w) is stored; and every predicted token has exactly one
    predecessor, so c(w) = Σ_v c(v, w). These are the counts counting the same corpus
    with the same vocabulary gives (a test compares the files byte for byte). A file whose
    context totals are not the sums of its stored n-grams (pruned) is refused
    (:class:`~nextword.errors.InvalidArgumentError`): its raw counts are lost.
    """
    from .ngrams import NgramCounts

    if model.order != 3:
        raise InvalidArgumentError(f"{model.path}: raw bigram counts are derived from order-3 files; this one is order {model.order}")
    if not model.totals_are_sums():
        raise InvalidArgumentError(
            f"{model.path}: its context totals are not the sums of its stored n-grams (a pruned file), "
            "so its raw bigram counts cannot be recovered"
        )
    stored = model.stored_ngrams()
    n, bos = model.n_words, model.n_words + 2
    if model.estimator == "jm":
        return NgramCounts(n, stored.grams[:2], stored.counts[:2])
    g2, v2 = stored.grams[1], stored.counts[1]
    g3, v3 = stored.grams[2], stored.counts[2]
    base = bos + 1
    after_bos = g2[:, 0] == bos
    key = np.concatenate([g2[after_bos, 0] * base + g2[after_bos, 1], g3[:, 1] * base + g3[:, 2]])
    value = np.concatenate([v2[after_bos], v3])
    uniq, inv = np.unique(key, return_inverse=True)
    big = np.bincount(inv, weights=value).astype(np.int64)
    bigrams = np.stack([uniq // base, uniq % base], axis=1)
    uni = np.bincount(bigrams[:, 1], weights=big, minlength=n + 2).astype(np.int64)
    words = np.flatnonzero(uni > 0)
    return NgramCounts(n, (words.reshape(-1, 1), bigrams), (uni[words], big))


def write_same_smoothing_bigram(model: Model, path: str | os.PathLike[str]) -> str:
    """Write the bigram model of ``model``'s smoothing on the same counts; returns how it was made.

    For a Jelinek-Mercer trigram: the Jelinek-Mercer bigram with the λ the trigram's queries
    use for the bigram level (λ2, or a load-time override). For a Kneser-Ney trigram: the
    Kneser-Ney bigram of the raw counts (:func:`raw_bigram_counts`), its discounts fitted
    from their count-of-counts as ``train --order 2 --smoothing kn`` does. Same words, same
    ids' keys and spellings, same skyband settings. Refuses a bigram file (it is its own
    bigram) and its own path.
    """
    from .counts import CountTables
    from .estimators import JelinekMercer, KneserNey
    from .paths import check_new_output
    from .store import build

    check_new_output(model.path, path, "bigram baseline model")
    counts = raw_bigram_counts(model)
    n = model.n_words
    uni = np.zeros(n + 2, dtype=np.int64)
    uni[counts.grams[0][:, 0]] = counts.counts[0]
    g2 = counts.grams[1]
    tables = CountTables(
        keys=model.word_keys(), displays=[model.display(i) for i in range(n)], unigram=uni,
        pair_left=g2[:, 0].copy(), pair_right=g2[:, 1].copy(), pair_count=counts.counts[1].copy(), stats=dict(model.stats),
    )
    head = model.header()
    if model.estimator == "kn":
        estimator: JelinekMercer | KneserNey = KneserNey()
        how = "Kneser-Ney bigram of the same counts (raw bigram counts summed from the trigrams; discounts fitted)"
    else:
        lam2 = model.query_lambdas()[0]
        estimator = JelinekMercer([lam2])
        how = f"Jelinek-Mercer bigram of the same counts with the model's λ2 = {lam2:g}"
    build(counts, tables, estimator, path, skyband_k=head["skyband_k"], skyband_min=head["skyband_min"])
    return how
