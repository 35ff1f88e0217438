"""Fitting a size budget by dropping the least valuable word pairs, and words.

No count is ever lost: a dropped pair's mass stays with its history, a dropped word's
with ``<unk>`` (see below). After pruning, a history's count c(v) becomes the
sum of its kept pairs (stored in the optional HIST section, format 1.2), so
P(w | v) = λ·c(v,w)/c(v) + (1−λ)·c(w)/N still sums to 1 over the vocabulary: the mass of
the dropped pairs flows back to the kept ones and to the unigram part.

Two rules decide which pairs go first:

* ``count`` — the simple cutoff: the pairs seen least often;
* ``entropy`` — the pairs whose removal changes the model least, by the relative-entropy
  criterion of Stolcke ("Entropy-based pruning of backoff language models", 1998):
  P(v) · D(P(·|v) ‖ P'(·|v)), P(v) = c(v)/N, where P' is this model with the pair
  removed — computed exactly, including the renormalisation of the history's other
  pairs over the smaller c(v) (see :func:`_entropy_scores`). As in the paper, each pair
  is scored alone and the lowest scores are removed together.

When the vocabulary itself is a large share of the budget, words go too
(:func:`drop_words`): a dropped word becomes ``<unk>`` everywhere — its unigram count is
added to ``<unk>``'s, its pairs merge into the matching ``<unk>`` pairs, its history count
into ``<unk>``'s — so every history still sums to 1 and the model is exactly the one whose
training text had the dropped words replaced by an unknown word. The vocabulary/pair
split is chosen by **value per byte** (:func:`choose_vocabulary`): a word's value is the
rule's value of its unigram (``count``: c(x); ``entropy``: its term c(x)/N·ln(N/c(x)) of
the unigram entropy) plus the values of all its pairs (as history and as successor),
divided by the measured bytes one word costs in the file; a pair's value is its score
divided by the measured bytes per pair. Words and pairs are taken best first until the
estimated size reaches the budget; the words taken are kept, then the pairs are pruned
again on the smaller vocabulary until the measured file fits.

Models of any estimator and order (Kneser-Ney order 2 and 3, Jelinek-Mercer order 3)
are pruned on their fitted levels instead (:func:`prune_ngrams_to_size`, the comment
above :func:`ngram_scores`): every n-gram of order ≥ 2 is scored by Stolcke's exact
relative entropy, a dropped n-gram's value stays in its context's total as *dropped
mass* that backs off to the lower order (γ grows by exactly the dropped α, so every
context still sums to 1 and no other stored probability changes), and n-grams of
different orders compete by score per measured byte of their order, words by the same
value-per-byte rule as above; a kept trigram keeps its context bigram (the file finds a
trigram context through its bigram entry). The file is :func:`nextword.store.build` of
the pruned fitted model (the dropped mass stored, format 1.4). ``train --max-size`` uses
it for every estimator and order (:func:`write_to_size`), ``nextword prune`` on a file
of any kind (:func:`prune_model`, read through the model's public accessors); a
Jelinek-Mercer bigram keeps the pair rule above.

Measured figures: bench/RESULTS.md, "Size budget".
"""

from __future__ import annotations

import copy
import dataclasses
import os
import re
from typing import TYPE_CHECKING, Any, Callable, Final, Literal, Sequence

import numpy as np

from .counts import CountTables
from .errors import InvalidArgumentError
from .estimators import Estimator, Fitted, Level
from .ngrams import NgramCounts, group_starts
from .codecs import EXACT, codec_for_bits
from .store import COMPACT_MINOR, DEFAULT_SKYBAND_K, DEFAULT_SKYBAND_MIN, atomic_write, build_ngram_sections, build_sections, encode_sections, history_counts

if TYPE_CHECKING:  # prune is imported by model (the train default), not the other way round
    from .model import Model

__all__ = [
    "RULES",
    "DEFAULT_RULE",
    "parse_size",
    "tables_from_model",
    "prune_tables",
    "pair_scores",
    "word_values",
    "drop_words",
    "choose_vocabulary",
    "prune_to_size",
    "vocabulary_bytes",
    "top_k",
    "context_distributions",
    "context_probability",
    "ngram_scores",
    "prune_level",
    "prune_fitted",
    "unigrams_only",
    "stored_ngrams",
    "keep_best",
    "ngram_file",
    "drop_ngram_words",
    "ngram_word_values",
    "prune_ngrams_to_size",
    "write_to_size",
    "context_bigrams",
    "with_dependants",
    "keep_contexts",
    "kept_ngrams",
    "file_context_mass",
    "prune_model",
]

RULES = ("entropy", "count")
Rule = Literal["entropy", "count"]
#: The rule `train --max-size` and `prune` use unless told otherwise; chosen by the
#: held-out size/KSR@3 curves of bench/RESULTS.md ("Size budget"), see README.
DEFAULT_RULE: Final[Rule] = "entropy"
_UNITS = {"": 1, "b": 1, "kb": 1000, "k": 1000, "mb": 10**6, "m": 10**6, "gb": 10**9, "g": 10**9,
          "kib": 1024, "mib": 1024**2, "gib": 1024**3}


def parse_size(text: str) -> int:
    """'4MB' → 4,000,000; '1.5MiB' → 1,572,864; a plain number is bytes."""
    m = re.fullmatch(r"\s*([0-9]*\.?[0-9]+)\s*([a-zA-Z]*)\s*", text)
    if not m or m.group(2).lower() not in _UNITS:
        raise InvalidArgumentError(f"cannot read a size from {text!r} (examples: 4MB, 1.5MiB, 250000)")
    return int(float(m.group(1)) * _UNITS[m.group(2).lower()])


def tables_from_model(model: Model) -> CountTables:
    """The counts a Jelinek-Mercer bigram file holds, as :class:`CountTables` (to prune an existing model).

    Read through the model's public accessors (:meth:`Model.stored_ngrams`: the unigram
    counts and the pairs; :meth:`Model.stored_levels`: c(v) as queries read it). The
    history counts are kept only where they differ from those the unigram counts give
    (a file pruned before, which stores them); else None, as for a file never pruned.
    Kneser-Ney and order-3 files are pruned on their fitted levels (:func:`prune_model`).
    """
    if model.estimator != "jm" or model.order != 2:
        raise InvalidArgumentError(
            f"{model.path}: tables_from_model reads Jelinek-Mercer bigram files; this one is {model.estimator} order {model.order} "
            f"(its stored values are not plain pair counts): prune it with prune_model"
        )
    stored = model.stored_ngrams()
    n = model.n_words
    unigram = np.zeros(n + 2, dtype=np.int64)
    unigram[stored.grams[0][:, 0]] = stored.counts[0]
    lev2 = model.stored_levels()[1]
    stored_hist = np.zeros(n + 3, dtype=np.int64)
    stored_hist[lev2.ctx[:, 0]] = lev2.ctx_total
    history = None if np.array_equal(stored_hist, history_counts(unigram, n)) else stored_hist
    g2 = stored.grams[1]
    return CountTables(
        keys=model.word_keys(),
        displays=[model.display(i) for i in range(n)],
        unigram=unigram,
        pair_left=np.asarray(g2[:, 0], dtype=np.int64),
        pair_right=np.asarray(g2[:, 1], dtype=np.int64),
        pair_count=np.asarray(stored.counts[1], dtype=np.int64),
        stats=dict(model.stats),
        history=history,
    )


def _history(tables: CountTables) -> np.ndarray:
    if tables.history is not None:
        return tables.history
    return history_counts(tables.unigram, tables.n_words)


def pair_scores(tables: CountTables, rule: Rule, lam: float) -> np.ndarray:
    """Value of every pair; the smallest go first."""
    if rule == "count":
        return tables.pair_count.astype(np.float64)
    if rule != "entropy":
        raise InvalidArgumentError(f"unknown pruning rule {rule!r}; expected one of {RULES}")
    return _entropy_scores(tables, float(lam))


#: elements of the (pair × distinct count) expansion evaluated at once by the entropy
#: scores: small enough that the temporaries stay in the processor's cache
_BLOCK = 1 << 16
#: rows at least this long are expanded against their distinct counts by broadcasting
#: (no index arrays); shorter rows are gathered together, a block at a time
_LONG_ROW = 256


def _entropy_scores(tables: CountTables, lam: float) -> np.ndarray:
    """P(v) · D(P(·|v) ‖ P'(·|v)) for every pair, where P' is the model without that pair.

    Removing (v, w_j) from a row with counts c_i and sum C sets c(v) to C' = C − c_j:
    w_j falls back to (1−λ)·u_j, every other kept successor rises by c_i·t with
    t = λ·c_j / (C·C'), and unseen words do not change (if the row empties, c(v) = 0
    and every outcome gets its unigram probability). So

        D = p_j·ln(p_j / p'_j) − Σ_{i≠j} p_i·ln(1 + c_i·t / p_i),

    and the sum depends on j only through t, i.e. through c_j: it is computed once per
    distinct count of each row (rows hold few distinct counts), which makes the exact
    relative entropy of Stolcke's criterion affordable without approximation. The sums
    F(t) = Σ_i p_i·ln(1 + c_i·t/p_i) over whole rows are evaluated in cache-sized blocks
    (:func:`_row_sums`), every term by the same operations in the same order.
    """
    n_hist = tables.n_words + 3
    left = np.asarray(tables.pair_left, dtype=np.int64)
    c = np.asarray(tables.pair_count, dtype=np.float64)
    if len(c) == 0:
        return np.zeros(0)
    total = float(tables.unigram.sum())
    row_sum = np.bincount(left, weights=c, minlength=n_hist)
    cv = row_sum[left]
    u = tables.unigram[np.asarray(tables.pair_right, dtype=np.int64)] / total
    p = lam * c / cv + (1.0 - lam) * u
    rows = np.concatenate([[0], np.cumsum(np.bincount(left, minlength=n_hist))])

    # one combination per (row, distinct count); pairs are sorted by row
    radix = int(c.max()) + 1
    combos, pair_combo = np.unique(left * radix + c.astype(np.int64), return_inverse=True)
    combo_row = combos // radix
    combo_c = (combos % radix).astype(np.float64)
    combo_cv = row_sum[combo_row]
    rest = combo_cv - combo_c
    with np.errstate(divide="ignore", invalid="ignore"):
        combo_t = np.where(rest > 0, lam * combo_c / (combo_cv * np.where(rest > 0, rest, 1.0)), 0.0)
    combo_f = _row_sums(p, c, rows, combo_row, combo_t)

    t = combo_t[pair_combo]
    emptied = (cv - c) <= 0
    with np.errstate(divide="ignore", invalid="ignore"):
        fallback = np.where(emptied, u, (1.0 - lam) * u)
        own = p * np.log(p / fallback)
        others = np.where(emptied, 0.0, -(combo_f[pair_combo] - p * np.log1p(c * t / p)))
        # an emptied row also moves every unseen word from (1−λ)·u to u
        unseen = (1.0 - lam) * np.log(1.0 - lam) * (1.0 - u) if lam < 1.0 else np.zeros_like(u)
        kl = own + others + np.where(emptied, unseen, 0.0)
    kl = np.where(np.isnan(kl), np.inf, kl)
    return (cv / total) * np.maximum(kl, 0.0)


def _row_sums(p: np.ndarray, c: np.ndarray, rows: np.ndarray, combo_row: np.ndarray, combo_t: np.ndarray) -> np.ndarray:
    """F(t) = Σ_i p_i·ln(1 + c_i·t/p_i) over the whole row of each combination.

    Combinations are sorted by row, so each row's combinations are consecutive and its
    terms form a (distinct counts × row length) matrix. Long rows broadcast their t
    against the row's p and c (views, nothing gathered); the short rows are gathered
    into one expansion, a block at a time. Every term is (c·t)/p, log1p, times p, and
    each combination's terms are added by one ``np.add.reduceat`` segment in row order,
    whichever path computes it.
    """
    n = len(combo_t)
    out = np.zeros(n)
    if n == 0:
        return out
    row_len = rows[1:] - rows[:-1]
    combo_len = row_len[combo_row]
    # the long rows, one at a time, a block of their combinations at a time (at least one
    # combination: a row longer than the block gets a buffer of its length)
    first = np.flatnonzero(np.concatenate([[True], combo_row[1:] != combo_row[:-1]]))
    last = np.append(first[1:], n)
    long_rows = combo_len[first] >= _LONG_ROW
    buf = np.empty(max(_BLOCK, int(combo_len.max())))
    with np.errstate(divide="ignore", invalid="ignore"):
        for a, b in zip(first[long_rows].tolist(), last[long_rows].tolist()):
            r = int(combo_row[a])
            s, e = int(rows[r]), int(rows[r + 1])
            pr, cr = p[s:e], c[s:e]
            length = e - s
            step = max(1, _BLOCK // length)
            for j in range(a, b, step):
                k = min(b, j + step)
                m = buf[: (k - j) * length].reshape(k - j, length)
                np.multiply(cr, combo_t[j:k, None], out=m)
                np.divide(m, pr, out=m)
                np.log1p(m, out=m)
                np.multiply(pr, m, out=m)
                out[j:k] = np.add.reduceat(m.reshape(-1), np.arange(0, (k - j) * length, length))
        # the short rows' combinations, gathered in blocks of about _BLOCK terms
        short = np.flatnonzero(np.repeat(~long_rows, last - first))
        if len(short):
            lens = combo_len[short]
            reach = np.concatenate([[0], np.cumsum(lens)])
            start = 0
            while start < len(short):
                stop = max(start + 1, int(np.searchsorted(reach, reach[start] + _BLOCK, side="right")) - 1)
                sel = short[start:stop]
                ln = lens[start:stop]
                ends = np.cumsum(ln)
                idx = np.arange(int(ends[-1])) + np.repeat(rows[combo_row[sel]] - (ends - ln), ln)
                pi = p[idx]
                v = c[idx]
                v *= np.repeat(combo_t[sel], ln)
                v /= pi
                np.log1p(v, out=v)
                np.multiply(pi, v, out=v)
                out[sel] = np.add.reduceat(v, np.concatenate([[0], ends[:-1]]))
                start = stop
    return out


def prune_tables(tables: CountTables, keep: np.ndarray) -> CountTables:
    """The same counts with only the pairs where ``keep`` is true; c(v) = kept row sums."""
    left = tables.pair_left[keep]
    counts = tables.pair_count[keep]
    hist = np.bincount(left, weights=counts, minlength=tables.n_words + 3).astype(np.int64)
    return CountTables(
        keys=tables.keys,
        displays=tables.displays,
        unigram=tables.unigram,
        pair_left=left,
        pair_right=tables.pair_right[keep],
        pair_count=counts,
        stats=dict(tables.stats),
        history=hist,
    )


def word_values(tables: CountTables, rule: Rule, lam: float, pair_values: np.ndarray | None = None) -> np.ndarray:
    """Value of every vocabulary word (ids 0 … n−1); the smallest go first.

    The rule's value of the word's unigram (``count``: c(x); ``entropy``: c(x)/N·ln(N/c(x)),
    its term of the unigram entropy) plus the values of every pair it is part of, as
    history or as successor: dropping the word loses all of them.
    """
    n = tables.n_words
    if pair_values is None:
        pair_values = pair_scores(tables, rule, lam)
    c = tables.unigram[:n].astype(np.float64)
    if rule == "count":
        own = c
    else:
        total = float(tables.unigram.sum())
        with np.errstate(divide="ignore", invalid="ignore"):
            own = np.where(c > 0, c / total * np.log(total / np.where(c > 0, c, 1.0)), 0.0)
    left = np.asarray(tables.pair_left, dtype=np.int64)
    right = np.asarray(tables.pair_right, dtype=np.int64)
    pv = np.where(np.isfinite(pair_values), pair_values, 0.0)
    as_history = np.bincount(left[left < n], weights=pv[left < n], minlength=n)[:n]
    as_next = np.bincount(right[right < n], weights=pv[right < n], minlength=n)[:n]
    return own + as_history + as_next


def drop_words(tables: CountTables, keep: np.ndarray) -> CountTables:
    """The same counts with only the words where ``keep`` (length n) is true; the rest become ``<unk>``.

    Kept words keep their order (their counts do not change, so ids stay in count
    order); a dropped word's unigram count goes to ``<unk>``, its pairs merge into the
    pairs of ``<unk>`` (as history and as successor), its history count into ``<unk>``'s.
    Every history therefore still sums to 1.
    """
    n = tables.n_words
    keep = np.asarray(keep, dtype=bool)
    if keep.shape != (n,):
        raise InvalidArgumentError(f"keep must have one entry per word ({n}), got shape {keep.shape}")
    m = int(keep.sum())
    if m == 0:
        raise InvalidArgumentError("cannot drop every word of the vocabulary")
    remap = np.empty(n + 3, dtype=np.int64)
    remap[:n] = np.where(keep, np.cumsum(keep) - 1, m + 1)
    remap[n:] = [m, m + 1, m + 2]
    unigram = np.zeros(m + 2, dtype=np.int64)
    np.add.at(unigram, remap[: n + 2], np.asarray(tables.unigram, dtype=np.int64))
    left = remap[np.asarray(tables.pair_left, dtype=np.int64)]
    right = remap[np.asarray(tables.pair_right, dtype=np.int64)]
    key = left * (m + 3) + right
    uniq, inverse = np.unique(key, return_inverse=True)
    counts = np.bincount(inverse, weights=np.asarray(tables.pair_count, dtype=np.float64), minlength=len(uniq))
    history = None
    if tables.history is not None:
        history = np.zeros(m + 3, dtype=np.int64)
        np.add.at(history, remap, np.asarray(tables.history, dtype=np.int64))
    ids = np.flatnonzero(keep).tolist()
    stats = dict(tables.stats)
    stats["pruned_words"] = int(stats.get("pruned_words", 0)) + n - m
    return CountTables(
        keys=[tables.keys[i] for i in ids],
        displays=[tables.displays[i] for i in ids],
        unigram=unigram,
        pair_left=uniq // (m + 3),
        pair_right=uniq % (m + 3),
        pair_count=np.rint(counts).astype(np.int64),
        stats=stats,
        history=history,
    )


Chunks = list[bytes | memoryview]


class _Trials:
    """One vocabulary's counts and the files the size search builds from them.

    The search asks for the same files several times — the file with every pair (does
    pruning start at all? bytes per pair), the one with none (the floor; bytes per word)
    — and for the pair scores both to split the budget between words and pairs and to
    fit the pairs; each build costs about as much as writing the model, and the entropy
    scores several builds. So each is computed at most once, and only when asked for:
    a file that fits whole is never scored. Of a file over ``max_bytes`` only the size
    is kept (it is never the answer), so the cache holds no more than one answer.
    """

    def __init__(self, tables: CountTables, rule: Rule, lam: float, build: dict[str, Any],
                 progress: Callable[[str], None] | None, max_bytes: int) -> None:
        self.tables = tables
        self.max_bytes = max_bytes
        self.rule = rule
        self.lam = lam
        self.build = build
        self.progress = progress
        self.n_pairs = len(tables.pair_count)
        self._scores: np.ndarray | None = None
        self._files: dict[int, tuple[CountTables, int, Chunks]] = {}
        self._sizes: dict[int, int] = {}

    def scores(self) -> np.ndarray:
        if self._scores is None:
            if self.progress is not None:
                self.progress(f"scoring {self.n_pairs:,} pairs ({self.rule} rule)")
            self._scores = pair_scores(self.tables, self.rule, self.lam)
        return self._scores

    def size(self, k: int) -> int:
        """Bytes of the file keeping the ``k`` most valuable pairs."""
        k = min(k, self.n_pairs)
        return self._sizes[k] if k in self._sizes else self.file(k)[1]

    def file(self, k: int) -> tuple[CountTables, int, Chunks]:
        """(counts, file size, file chunks) keeping the ``k`` most valuable pairs."""
        k = min(k, self.n_pairs)
        hit = self._files.get(k)
        if hit is not None:
            return hit
        if self.progress is not None:
            self.progress(f"building a file with {k:,} of {self.n_pairs:,} pairs")
        keep = np.ones(self.n_pairs, dtype=bool) if k == self.n_pairs else top_k(self.scores(), k)
        pruned = prune_tables(self.tables, keep)
        size, chunks = _size(pruned, self.lam, **self.build)
        hit = (pruned, size, chunks)
        if k == 0 or k == self.n_pairs:  # the two files asked for more than once
            self._sizes[k] = size
            if size <= self.max_bytes:
                self._files[k] = hit
        return hit

    def fit_pairs(self, max_bytes: int) -> tuple[CountTables, Chunks, dict[str, float]]:
        """The most valuable pairs of this vocabulary that fit ``max_bytes`` (see :func:`prune_to_size`)."""
        total_pairs = self.n_pairs
        words = self.tables.n_words
        full_size = self.size(total_pairs)
        if full_size <= max_bytes:
            full, _, chunks = self.file(total_pairs)
            return full, chunks, {"kept": total_pairs, "removed": 0, "bytes": full_size, "words_kept": words, "words_removed": 0}
        base_size = self.size(0)  # at most full_size: fewer pairs never make a larger file
        if base_size > max_bytes:
            raise InvalidArgumentError(
                f"a budget of {max_bytes:,} bytes is below the vocabulary alone ({base_size:,} bytes); "
                "let the vocabulary shrink too (the default; not with --keep-vocabulary / vocabulary=False) or lower max_vocab"
            )
        per_pair = (full_size - base_size) / max(total_pairs, 1)
        k = int((max_bytes - base_size) / per_pair)
        for _ in range(60):
            pruned, size, chunks = self.file(k)
            if size <= max_bytes:
                return pruned, chunks, {"kept": k, "removed": total_pairs - k, "bytes": size, "words_kept": words, "words_removed": 0}
            k = max(0, min(k - 1, int(k - (size - max_bytes) / per_pair * 1.02) - 1))
        raise InvalidArgumentError(f"could not fit {max_bytes:,} bytes")  # pragma: no cover - k reaches 0 first


def choose_vocabulary(
    tables: CountTables, max_bytes: int, *, rule: Rule = DEFAULT_RULE, lam: float = 0.9, **build: int
) -> np.ndarray:
    """Which words to keep under ``max_bytes``, by value per byte (the module docstring's rule).

    Bytes per word and per pair are measured from three small builds (all words without
    pairs, one word without pairs, all pairs); words and pairs are then taken by value per
    byte, best first, until the estimated size reaches the budget. Returns a boolean
    mask over the word ids (at least the most valuable word).
    """
    return _choose(_Trials(tables, rule, lam, build, None, max_bytes), max_bytes)[0]


def _choose(trials: _Trials, max_bytes: int) -> tuple[np.ndarray, np.ndarray]:
    """:func:`choose_vocabulary` on the builds and scores ``trials`` holds; returns (mask, word values)."""
    tables = trials.tables
    n = tables.n_words
    pv = trials.scores()
    wv = word_values(tables, trials.rule, trials.lam, pv)
    vocab_only = trials.size(0)
    one = np.zeros(n, dtype=bool)
    one[int(np.argmax(wv))] = True
    # one word, no pairs: the pairs go before the words are merged (the same counts, no pair merge to pay for)
    no_pairs = prune_tables(tables, np.zeros(trials.n_pairs, dtype=bool))
    fixed = _size(drop_words(no_pairs, one), trials.lam, **trials.build)[0]
    full = trials.size(trials.n_pairs)
    per_word = max((vocab_only - fixed) / max(n - 1, 1), 1e-9)
    per_pair = max((full - vocab_only) / max(len(pv), 1), 1e-9)
    # Words and pairs best first by value per byte (ties: words first, then by index, as a
    # stable sort of the words' values followed by the pairs' would give), adding up costs
    # until the budget is reached. Only the words' places in that order matter — every
    # pair costs the same — so the pairs' values are sorted, not argsorted: a word's place
    # is its rank among the words plus the number of pairs worth strictly more.
    word_value = wv / per_word
    pair_value = np.sort(np.where(np.isfinite(pv), pv / per_pair, np.inf))
    by_value = np.argsort(-word_value, kind="stable")
    place = np.arange(n) + (len(pv) - np.searchsorted(pair_value, word_value[by_value], side="right"))
    cost = np.full(n + len(pv), per_pair)
    cost[place] = per_word
    fits = fixed + np.cumsum(cost) - per_word <= max_bytes  # the first word is in ``fixed``
    cut = len(fits) if fits.all() else int(np.argmin(fits))
    keep = np.zeros(n, dtype=bool)
    keep[by_value[place < cut]] = True
    keep[int(np.argmax(wv))] = True
    return keep, wv


def top_k(values: np.ndarray, k: int) -> np.ndarray:
    """Mask of the ``k`` largest of ``values`` (no NaN), ties to the smaller index.

    The same set as the first ``k`` of ``np.argsort(-values, kind="stable")`` (the order
    pruning removes pairs in), found by one partition instead of a sort: everything above
    the k-th largest value, then the first of the values equal to it.
    """
    n = len(values)
    if k <= 0:
        return np.zeros(n, dtype=bool)
    if k >= n:
        return np.ones(n, dtype=bool)
    kth = np.partition(values, n - k)[n - k]
    keep = values > kth
    keep[np.flatnonzero(values == kth)[: k - int(np.count_nonzero(keep))]] = True
    return keep


def _size(tables: CountTables, lam: float, **build: int) -> tuple[int, Chunks]:
    chunks = encode_sections(build_sections(tables, lam=lam, **build), minor=2)
    return sum(len(c) for c in chunks), chunks


def vocabulary_bytes(tables: CountTables, *, lam: float = 0.9, **build: int) -> int:
    """Size of the file with every pair pruned: the smallest budget these counts can meet."""
    return _size(prune_tables(tables, np.zeros(len(tables.pair_count), dtype=bool)), lam, **build)[0]


def prune_to_size(
    tables: CountTables,
    max_bytes: int,
    *,
    rule: Rule = DEFAULT_RULE,
    lam: float = 0.9,
    vocabulary: bool = True,
    progress: Callable[[str], None] | None = None,
    **build: int,
) -> tuple[CountTables, Chunks, dict[str, float]]:
    """Keep the most valuable words and pairs that fit ``max_bytes``; returns (tables, file chunks, info).

    With ``vocabulary`` (the default) the vocabulary/pair split is chosen by value per
    byte (:func:`choose_vocabulary`) and dropped words become ``<unk>``; without it only
    pairs are removed, and a budget below the vocabulary alone is an error. The file size
    is measured, not estimated: candidate sizes come from a linear fit of bytes against
    kept pairs, then the count is lowered until the encoded file fits.
    ``progress(label)`` is called before each expensive step (scoring, each trial build).
    Each file the search needs is built once, and pairs are scored only when a file
    with all of them does not fit (see :class:`_Trials`).
    """
    words_before = tables.n_words
    trials = _Trials(tables, rule, lam, build, progress, max_bytes)
    if not vocabulary or trials.size(trials.n_pairs) <= max_bytes:
        return trials.fit_pairs(max_bytes)
    keep, wv = _choose(trials, max_bytes)
    while True:
        smaller = trials if keep.all() else _Trials(drop_words(tables, keep), rule, lam, build, progress, max_bytes)
        floor = smaller.size(0)
        if floor <= max_bytes:
            break
        if keep.sum() == 1:
            raise InvalidArgumentError(
                f"a budget of {max_bytes:,} bytes is below the smallest possible model ({floor:,} bytes: one word, no pairs)"
            )
        # the estimate was optimistic: drop the least valuable tenth of the kept words too
        kept = np.flatnonzero(keep)
        keep[kept[np.argsort(wv[kept], kind="stable")[: max(1, len(kept) // 10)]]] = False
    pruned, chunks, info = smaller.fit_pairs(max_bytes)
    if info["removed"] == 0 and not keep.all():
        # every pair of the smaller vocabulary fits: the estimate dropped more words than
        # needed, so take back the most valuable dropped words while the whole file fits
        # (the size grows with every word taken back, so bisection finds the most)
        back = np.flatnonzero(~keep)
        back = back[np.argsort(-wv[back], kind="stable")]
        lo, hi = 0, len(back)
        best = smaller
        while lo < hi:
            mid = (lo + hi + 1) // 2
            trial = keep.copy()
            trial[back[:mid]] = True
            candidate = trials if trial.all() else _Trials(drop_words(tables, trial), rule, lam, build, progress, max_bytes)
            if candidate.size(candidate.n_pairs) <= max_bytes:
                lo, best = mid, candidate
            else:
                hi = mid - 1
        if lo:
            keep[back[:lo]] = True
            smaller = best  # its whole file fits, and is already built
            pruned, chunks, info = smaller.fit_pairs(max_bytes)
    info["words_removed"] = words_before - smaller.tables.n_words
    info["words_kept"] = smaller.tables.n_words
    return pruned, chunks, info


# -- pruning a fitted n-gram model of any estimator and order ---------------------------------
#
# The pruned model keeps every context's total as estimated on the full data; a dropped
# n-gram's value stays in that total as *dropped mass*, which backs off to the lower
# order: with T the context's total and ``dropped`` the part of it no longer stored,
#
#     Kneser-Ney:      γ(h) = (D₁n₁ + D₂n₂ + D₃n₃ + dropped) / T   (n_j over the stored n-grams)
#     Jelinek-Mercer:  γ(h) = (1 − λ) + λ · dropped / T
#
# and every stored n-gram keeps its α (its value over the unchanged T). Removing one
# n-gram (h, w) therefore moves exactly its α from the first term to γ(h): P(·|h) still
# sums to 1, no other α changes. Lower-order values stay as estimated on the full data
# (Kneser-Ney's continuation counts are not recounted over the kept n-grams, nor are the
# discounts refitted). Every n-gram of order ≥ 2 is scored alone on the full model and the
# least valuable go first, whatever their order, under one structural rule: a kept trigram
# (u, v, w) keeps the bigram (u, v) — a bigram that is the context of a kept trigram is not
# prunable (common practice in back-off n-gram pruning: the longer n-gram's context stays
# in the model; the file format finds a trigram context through its bigram entry, §7.14 of
# docs/FORMAT.md) — and its suffix bigram (v, w) (common practice too, for back-off
# models; format 1.6 stores a trigram's successor as its index in v's bigram row, §7.18).
# So a bigram is ranked by the larger of its own value and the values of the trigrams it
# is the context or the suffix of (:func:`with_dependants`: it leaves with its last
# dependant), and the selection adds the context bigram of every kept trigram that a tie
# left out (:func:`keep_contexts`). A context left with no n-gram is dropped with them
# (γ = 1 there: the same as a context never seen). The unigram level is the vocabulary; it
# shrinks only by dropping whole words into <unk> (:func:`drop_ngram_words`).


def _pack(rows: np.ndarray, base: int) -> np.ndarray:
    """One int64 key per row of ids in ``0..base-1``, ordered as the rows are (lexicographically)."""
    key = np.zeros(len(rows), np.int64)
    for c in range(rows.shape[1]):
        key = key * base + rows[:, c].astype(np.int64)
    return key


def _owners(lev: Level) -> np.ndarray:
    return np.repeat(np.arange(len(lev.ctx)), np.diff(lev.ctx_start))


class _Probs:
    """Vectorised P_m(w | h) of a fitted model for many (h, w) rows at once (α, γ computed once per level)."""

    def __init__(self, fitted: Fitted) -> None:
        self.fitted = fitted
        self.base = fitted.bos + 1
        self._alpha: dict[int, np.ndarray] = {}
        self._gamma: dict[int, np.ndarray] = {}
        lev1 = fitted.levels[0]
        p1 = np.full(fitted.n_outcomes, fitted.base())
        if len(lev1.ctx):
            p1 = p1 * float(fitted.gammas(1)[0])
            p1[lev1.grams[:, 0]] += fitted.alphas(1)
        self.p1 = p1

    def alpha(self, m: int) -> np.ndarray:
        if m not in self._alpha:
            self._alpha[m] = self.fitted.alphas(m)
        return self._alpha[m]

    def gamma(self, m: int) -> np.ndarray:
        if m not in self._gamma:
            self._gamma[m] = self.fitted.gammas(m)
        return self._gamma[m]

    def probs(self, rows: np.ndarray) -> np.ndarray:
        """P_m(w | h) for each row (h…, w) of a ``(k, m)`` id array."""
        m = rows.shape[1]
        if m == 1:
            return np.asarray(self.p1[rows[:, 0]], dtype=np.float64)
        lower = self.probs(rows[:, 1:])
        lev = self.fitted.levels[m - 1]
        alpha = np.zeros(len(rows))
        gamma = np.ones(len(rows))
        if len(lev.grams):
            gk, rk = _pack(lev.grams, self.base), _pack(rows, self.base)
            pos = np.minimum(np.searchsorted(gk, rk), len(gk) - 1)
            hit = gk[pos] == rk
            alpha[hit] = self.alpha(m)[pos[hit]]
            ck, rc = _pack(lev.ctx, self.base), _pack(rows[:, :-1], self.base)
            cpos = np.minimum(np.searchsorted(ck, rc), len(ck) - 1)
            chit = ck[cpos] == rc
            gamma[chit] = self.gamma(m)[cpos[chit]]
        return alpha + gamma * lower


def context_distributions(fitted: Fitted) -> Callable[[tuple[int, ...]], np.ndarray]:
    """A function giving P(·|h) over every outcome (float64, length n_words + 2) for a context of ids.

    Built order by order as one vector — P₁, then γ(h)·P + α on each stored context's row
    — with α and γ computed once per level: the whole distribution of a context at once,
    for checks (every context sums to 1) and brute-force rankings of pruned models.
    """
    probs = _Probs(fitted)
    levels = fitted.levels

    def dist(h: tuple[int, ...]) -> np.ndarray:
        h = fitted.context_of(h)
        p = probs.p1.copy()
        for m in range(2, len(h) + 2):
            lev = levels[m - 1]
            j = lev.find_context(h[len(h) - (m - 1):])
            if j < 0:
                continue
            s, e = int(lev.ctx_start[j]), int(lev.ctx_start[j + 1])
            p = probs.gamma(m)[j] * p
            p[lev.grams[s:e, -1]] += probs.alpha(m)[s:e]
        return p

    return dist


def context_probability(lev: Level, counts: NgramCounts, m: int) -> np.ndarray:
    """P(h) = c(h •) / N for every context of ``lev`` (order m): raw counts as a history.

    c(h •) is how often h was followed by a predicted token in the training text (its raw
    m-gram counts summed, also for Kneser-Ney, whose stored lower-order values are
    continuation counts), N the number of predicted tokens.
    """
    raw_g, raw_c = counts.grams[m - 1], counts.counts[m - 1]
    n_tokens = float(counts.counts[0].sum())
    starts = group_starts(raw_g[:, : m - 1])
    if len(raw_g) == 0 or len(lev.ctx) == 0:
        return np.zeros(len(lev.ctx))
    base = counts.bos + 1
    raw_ctx = _pack(raw_g[starts[:-1], : m - 1], base)
    raw_tot = np.add.reduceat(raw_c, starts[:-1]).astype(np.float64)
    q = _pack(lev.ctx, base)
    pos = np.minimum(np.searchsorted(raw_ctx, q), len(raw_ctx) - 1)
    return np.where(raw_ctx[pos] == q, raw_tot[pos], 0.0) / n_tokens


def ngram_scores(fitted: Fitted, counts: NgramCounts, *, context_mass: Sequence[np.ndarray] | None = None) -> list[np.ndarray]:
    """Stolcke's relative-entropy score of every stored n-gram of order ≥ 2; ``out[m-1]`` for order m.

    The score of (h, w_j) is P(h) · D(P(·|h) ‖ P′(·|h)) with P′ this model without that
    n-gram (see the comment above: its α_j joins γ(h), nothing else in h changes), P(h)
    from :func:`context_probability`. With L the lower-order distribution P_{m−1}(·|h′),
    P′(w|h) = P(w|h) + α_j·L(w) for w ≠ w_j and P′(w_j|h) = (γ + α_j)·L(w_j), so

        D = P_j ln(P_j / P′_j) − Σ_{i stored, i≠j} P_i ln(1 + α_j L_i / P_i)
              − γ ln(1 + α_j / γ) · (1 − Σ_{i stored} L_i)

    (the last term: every word not stored after h, whose P = γ·L). The sum over the
    stored words depends on j only through α_j, i.e. through its value: it is computed
    once per distinct value of each context (:func:`_row_sums`, as for the bigram
    scores). Each n-gram is scored alone, on its own context's distribution (the change
    it makes to higher-order contexts that interpolate with it is not counted, as in
    Stolcke's criterion). ``out[0]`` (the unigram level) is empty: words are valued by
    :func:`ngram_word_values`. ``context_mass[m-1]``, if given, is P(h) of each context of
    order m instead (see :func:`file_context_mass`).
    """
    probs = _Probs(fitted)
    out: list[np.ndarray] = [np.zeros(0)]
    for m in range(2, fitted.order + 1):
        lev = fitted.levels[m - 1]
        k = len(lev.grams)
        if k == 0:
            out.append(np.zeros(0))
            continue
        owner = _owners(lev)
        a = probs.alpha(m)
        g = probs.gamma(m)
        low = probs.probs(lev.grams[:, 1:])
        gj = g[owner]
        p = a + gj * low
        radix = int(lev.value.max()) + 1
        combos, pair_combo = np.unique(owner * radix + lev.value, return_inverse=True)
        pair_combo = pair_combo.reshape(-1)
        first = np.zeros(len(combos), np.int64)
        first[pair_combo[::-1]] = np.arange(k)[::-1]  # any member: α is a function of (context, value)
        combo_row = combos // radix
        f = _row_sums(p, low, lev.ctx_start, combo_row, a[first])
        uncovered = np.maximum(1.0 - np.bincount(owner, weights=low, minlength=len(lev.ctx)), 0.0)
        with np.errstate(divide="ignore", invalid="ignore"):
            own_f = p * np.log1p(a * low / p)
            own = p * np.log(p / ((gj + a) * low))
            unseen = gj * np.log1p(a / gj) * uncovered[owner]
            kl = own - (f[pair_combo] - own_f) - unseen
        kl = np.where(a == 0.0, 0.0, np.where(np.isnan(kl), np.inf, kl))
        ph = context_probability(lev, counts, m) if context_mass is None else np.asarray(context_mass[m - 1], dtype=np.float64)
        out.append(ph[owner] * np.maximum(kl, 0.0))
    return out


def prune_level(lev: Level, keep: np.ndarray, *, contexts: np.ndarray | None = None) -> Level:
    """``lev`` with only the n-grams where ``keep`` is true; kept contexts keep their totals.

    A context left with no n-gram goes too (γ = 1 there, as for a context never seen),
    unless ``contexts`` (a mask over ``lev.ctx``) asks to keep it: then it stays with its
    total and an empty block, which scores the same (all its mass is dropped mass) — the
    form :meth:`nextword.Model.stored_levels` reads such a context back in.
    """
    keep = np.asarray(keep, dtype=bool)
    if keep.shape != (len(lev.grams),):
        raise InvalidArgumentError(f"keep must have one entry per n-gram ({len(lev.grams)}), got shape {keep.shape}")
    owner = _owners(lev)[keep]
    per_ctx = np.bincount(owner, minlength=len(lev.ctx))
    stay = per_ctx > 0
    if contexts is not None:
        stay |= np.asarray(contexts, dtype=bool)
    where = np.flatnonzero(stay)
    starts = np.zeros(len(where) + 1, dtype=np.int64)
    np.cumsum(per_ctx[where], out=starts[1:])
    value = lev.value[keep]
    n123 = np.zeros((len(lev.ctx), 3), np.int64)
    for col, mask in enumerate((value == 1, value == 2, value >= 3)):
        n123[:, col] = np.bincount(owner[mask], minlength=len(lev.ctx))
    return Level(lev.grams[keep], value, lev.ctx[where], starts, np.asarray(lev.ctx_total[where], dtype=np.int64), n123[where])


def prune_fitted(fitted: Fitted, keep: Sequence[np.ndarray | None]) -> Fitted:
    """The model without the n-grams ``keep`` rejects (``keep[m-1]`` per order; None keeps a level whole).

    Only orders ≥ 2 may lose n-grams. Every context's distribution still sums to 1
    (dropped mass backs off, see the comment above :func:`ngram_scores`). A bigram context
    v stays (with its total) while a kept trigram (u, v, w) reads it, even with no bigram
    left: the file stores B(v, w) for the trigram's bands from v's total (docs/FORMAT.md §7.16).
    """
    if len(keep) != fitted.order:
        raise InvalidArgumentError(f"{len(keep)} keep masks given for order {fitted.order}")
    if keep[0] is not None and not bool(np.all(keep[0])):
        raise InvalidArgumentError("the unigram level is the vocabulary: drop words with drop_ngram_words instead")
    levels = list(fitted.levels)
    for m in range(fitted.order, 1, -1):
        k = keep[m - 1]
        if k is None:  # the level whole: every context keeps its n-grams
            continue
        needed = None
        if m < fitted.order:  # contexts the kept (m+1)-grams back off into: their last m−1 context tokens
            upper = levels[m]
            lev = fitted.levels[m - 1]
            base = fitted.bos + 1
            needed = np.isin(_pack(lev.ctx, base), _pack(upper.grams[:, 1:m], base))
        levels[m - 1] = prune_level(fitted.levels[m - 1], k, contexts=needed)
    out = copy.copy(fitted)
    out.levels = levels
    return out


def unigrams_only(fitted: Fitted) -> Fitted:
    """The model with every n-gram of order ≥ 2 pruned: the vocabulary alone."""
    return prune_fitted(fitted, [None] + [np.zeros(len(lev.grams), dtype=bool) for lev in fitted.levels[1:]])


def stored_ngrams(fitted: Fitted) -> int:
    """How many n-grams of order ≥ 2 the model stores (what pruning can remove)."""
    return sum(len(lev.grams) for lev in fitted.levels[1:])


def keep_best(values: Sequence[np.ndarray], k: int) -> list[np.ndarray | None]:
    """Keep masks for the ``k`` highest of the per-order ``values`` (orders ≥ 2) together; ties to the higher order, then index.

    Ties go to the higher order so that a bigram raised to the value of a trigram it is the
    context of (:func:`with_dependants`) never stays at the cut while that trigram goes: the
    trigram ranks first, and a kept bigram is then either the context of a kept trigram or
    worth its own value.
    """
    upper = [np.asarray(v, dtype=np.float64) for v in values[1:]][::-1]  # highest order first
    flat = np.concatenate(upper) if upper else np.zeros(0)
    mask = top_k(flat, k)
    masks: list[np.ndarray] = []
    at = 0
    for v in upper:
        masks.append(mask[at : at + len(v)])
        at += len(v)
    return [None, *masks[::-1]]


def context_bigrams(fitted: Fitted) -> np.ndarray:
    """For each stored trigram (u, v, w), the index of its context bigram (u, v) in ``levels[1].grams``.

    Empty below order 3. Every trigram's context is a stored bigram in a model fitted from
    counts and in a file (the format keeps it); anything else is refused.
    """
    if fitted.order < 3:
        return np.zeros(0, np.int64)
    g2, g3 = fitted.levels[1].grams, fitted.levels[2].grams
    if len(g3) == 0:
        return np.zeros(0, np.int64)
    base = fitted.bos + 1
    k2, q = _pack(g2, base), _pack(g3[:, :2], base)
    pos = np.searchsorted(k2, q)
    if len(k2) == 0 or int(pos.max()) >= len(k2) or not bool(np.all(k2[pos] == q)):
        raise InvalidArgumentError("a stored trigram's context (u, v) is not a stored bigram")
    return np.asarray(pos, dtype=np.int64)


def suffix_bigrams(fitted: Fitted) -> np.ndarray:
    """For each stored trigram (u, v, w), the index of its suffix bigram (v, w) in ``levels[1].grams``, −1 if not stored.

    Empty below order 3. A model fitted from counts stores every suffix (the text that
    holds u v w holds v w); a file pruned before this rule may lack some.
    """
    if fitted.order < 3:
        return np.zeros(0, np.int64)
    g2, g3 = fitted.levels[1].grams, fitted.levels[2].grams
    if len(g3) == 0 or len(g2) == 0:
        return np.full(len(g3), -1, np.int64)
    base = fitted.bos + 1
    k2, q = _pack(g2, base), _pack(g3[:, 1:], base)
    pos = np.minimum(np.searchsorted(k2, q), len(k2) - 1)
    return np.where(k2[pos] == q, pos, -1).astype(np.int64)


def with_dependants(fitted: Fitted, values: Sequence[np.ndarray]) -> list[np.ndarray]:
    """Per-order ``values`` with each bigram raised to the largest value of the trigrams it is the context of.

    The ranking under the rule "a kept trigram keeps its context bigram" (see the comment
    above :func:`ngram_scores`): taking the best k by these values never keeps a trigram
    without its context, ties apart (:func:`keep_contexts` settles those).
    """
    out = [np.asarray(v, dtype=np.float64).copy() for v in values]
    if fitted.order >= 3 and len(out[2]):
        np.maximum.at(out[1], context_bigrams(fitted), out[2])
        suffix = suffix_bigrams(fitted)
        ok = suffix >= 0
        np.maximum.at(out[1], suffix[ok], out[2][ok])
    return out


def keep_contexts(fitted: Fitted, keep: Sequence[np.ndarray | None]) -> list[np.ndarray | None]:
    """Keep masks with the context bigram (u, v) and the suffix bigram (v, w) of every kept trigram (u, v, w) kept too."""
    out = list(keep)
    if fitted.order >= 3 and out[2] is not None and out[1] is not None:
        k2 = np.asarray(out[1], dtype=bool).copy()
        kept3 = np.asarray(out[2], dtype=bool)
        k2[context_bigrams(fitted)[kept3]] = True
        suffix = suffix_bigrams(fitted)[kept3]
        k2[suffix[suffix >= 0]] = True
        out[1] = k2
    return out


def kept_ngrams(keep: Sequence[np.ndarray | None], fitted: Fitted) -> int:
    """How many n-grams of order ≥ 2 the masks keep (None: the whole level)."""
    return sum(len(lev.grams) if k is None else int(np.count_nonzero(k)) for lev, k in zip(fitted.levels[1:], keep[1:]))


def ngram_file(counts: NgramCounts, tables: CountTables, fitted: Fitted, **build: Any) -> Chunks:
    """The model file of a fitted (possibly pruned) model, as chunks (written by :func:`store.atomic_write`).

    The bytes :func:`nextword.store.build` writes with ``fitted=fitted``: a pruned level's
    dropped mass (context totals above the sum of the stored values) is recorded and
    backs off through γ (docs/FORMAT.md §7.13, §7.15).
    """
    sections, minor = build_ngram_sections(counts, tables, None, fitted=fitted, **build)
    return encode_sections(sections, minor=minor)


def drop_ngram_words(counts: NgramCounts, tables: CountTables, keep: np.ndarray) -> tuple[NgramCounts, CountTables]:
    """The counts of every order with only the words where ``keep`` is true; the rest become ``<unk>``.

    :func:`drop_words` for every order: the model is exactly the one trained on the text
    with the dropped words replaced by an unknown word (n-grams made equal are summed),
    so the estimator is fitted again on the result.
    """
    small = drop_words(tables, keep)
    n, m = tables.n_words, small.n_words
    keep = np.asarray(keep, dtype=bool)
    remap = np.empty(n + 3, dtype=np.int64)
    remap[:n] = np.where(keep, np.cumsum(keep) - 1, m + 1)
    remap[n:] = [m, m + 1, m + 2]
    seen = np.flatnonzero(small.unigram)
    grams = [seen.astype(np.int64)[:, None], np.column_stack((small.pair_left, small.pair_right)).astype(np.int64)]
    values = [np.asarray(small.unigram[seen], dtype=np.int64), np.asarray(small.pair_count, dtype=np.int64)]
    for level in range(3, counts.order + 1):
        g = remap[counts.grams[level - 1]]
        key = _pack(g, m + 3)
        uniq, inverse = np.unique(key, return_inverse=True)
        summed = np.bincount(inverse.reshape(-1), weights=counts.counts[level - 1].astype(np.float64), minlength=len(uniq))
        rows = np.zeros((len(uniq), level), dtype=np.int64)
        rest = uniq.copy()
        for c in range(level - 1, -1, -1):
            rows[:, c] = rest % (m + 3)
            rest //= m + 3
        grams.append(rows)
        values.append(np.rint(summed).astype(np.int64))
    return NgramCounts(m, tuple(grams[: counts.order]), tuple(values[: counts.order])), small


def ngram_word_values(counts: NgramCounts, scores: Sequence[np.ndarray], fitted: Fitted) -> np.ndarray:
    """Value of every vocabulary word (ids 0 … n−1) for :func:`prune_ngrams_to_size`; the smallest go first.

    As :func:`word_values` for the entropy rule: the word's term c(x)/N·ln(N/c(x)) of the
    unigram entropy (raw counts) plus the scores of every stored n-gram it is part of,
    in any position — dropping the word loses all of them.
    """
    n = counts.n_words
    c = np.zeros(n + 3)
    c[counts.grams[0][:, 0]] = counts.counts[0]
    c = c[:n]
    total = float(counts.counts[0].sum())
    with np.errstate(divide="ignore", invalid="ignore"):
        out = np.where(c > 0, c / total * np.log(total / np.where(c > 0, c, 1.0)), 0.0)
    for m in range(2, fitted.order + 1):
        g = fitted.levels[m - 1].grams
        v = np.where(np.isfinite(scores[m - 1]), scores[m - 1], 0.0)
        for col in range(m):
            ids = g[:, col]
            inside = ids < n
            out += np.bincount(ids[inside], weights=v[inside], minlength=n)[:n]
    return out


def prune_ngrams_to_size(
    counts: NgramCounts,
    tables: CountTables,
    estimator: Estimator | None,
    max_bytes: int,
    *,
    rule: Rule = DEFAULT_RULE,
    vocabulary: bool = True,
    progress: Callable[[str], None] | None = None,
    context_mass: Sequence[np.ndarray] | None = None,
    fitted: Fitted | None = None,
    **build: Any,
) -> tuple[Fitted, NgramCounts, CountTables, Chunks, dict[str, float]]:
    """Keep the most valuable n-grams (and words) of any estimator and order that fit ``max_bytes``.

    Returns (pruned model, counts, tables, file chunks, info); the counts and tables
    are smaller than the inputs when words were dropped. The rule, by value per byte:

    * every stored n-gram of order ≥ 2 is valued by its relative-entropy score
      (:func:`ngram_scores`) divided by the bytes one n-gram of its order costs, measured
      from three builds (all n-grams; none above order 2; none above order 1) — a
      trigram and a bigram cost different amounts, so one threshold on score per byte
      decides between them;
    * the kept count is found on measured sizes: a first guess from those per-order
      costs, then secant steps on the measured file size until the file fits and the next
      step would not (each trial is a full build of the file);
    * words go only when the vocabulary alone (every n-gram of order ≥ 2 dropped) does not
      fit: the least valuable words (:func:`ngram_word_values`) become ``<unk>`` — a tenth
      of the kept words at a time after a first guess from the bytes per word — the
      estimator is fitted again on the smaller counts and the n-grams are fitted to what
      is left. With ``vocabulary=False`` such a budget is an error instead.

    ``rule`` "count" values each n-gram by its stored value (raw count, or Kneser-Ney's
    adjusted count) instead of its score, per byte the same way. Either way a kept
    trigram keeps its context bigram (the comment above :func:`ngram_scores`).
    ``progress(label)`` is called before each expensive step. ``fitted`` prunes that
    fitted model instead of fitting ``estimator`` to ``counts`` (a model read from a file,
    :func:`prune_model`; its words are kept, so ``vocabulary`` must be False), and
    ``context_mass`` is passed to :func:`ngram_scores` (P(h) where the raw counts are gone).
    """
    if rule not in RULES:
        raise InvalidArgumentError(f"unknown pruning rule {rule!r}; expected one of {RULES}")

    def score(f: Fitted, c: NgramCounts) -> list[np.ndarray]:
        if rule == "count":
            return [np.zeros(0)] + [lev.value.astype(np.float64) for lev in f.levels[1:]]
        return ngram_scores(f, c, context_mass=context_mass)

    def say(label: str) -> None:
        if progress is not None:
            progress(label)

    source = fitted if fitted is not None else estimator
    if source is None:
        raise InvalidArgumentError("prune_ngrams_to_size needs an estimator or a fitted model")
    if source.name == "jm" and counts.order == 2 and build.get("codec", EXACT) is EXACT and not build.get("compact"):
        raise InvalidArgumentError("a Jelinek-Mercer bigram model is pruned by prune_to_size (its file stores the counts themselves)")
    if fitted is not None and vocabulary:
        raise InvalidArgumentError("a fitted model keeps its words (vocabulary=False): dropping words needs its raw counts")
    words_before = tables.n_words
    if fitted is None:
        assert estimator is not None  # source is one of the two
        say("fitting")
        fitted = estimator.fit(counts)
    chunks = ngram_file(counts, tables, fitted, **build)
    total = stored_ngrams(fitted)
    if _nbytes(chunks) <= max_bytes:
        return fitted, counts, tables, chunks, {"kept": total, "removed": 0, "bytes": _nbytes(chunks),
                                                "words_kept": words_before, "words_removed": 0}
    say(f"scoring {total:,} n-grams ({rule} rule)")
    scores = score(fitted, counts)
    full = _nbytes(chunks)
    floor = _nbytes(ngram_file(counts, tables, unigrams_only(fitted), **build))
    costs = _order_costs(counts, tables, fitted, full, floor, say, build)
    if not vocabulary and floor > max_bytes:
        how = ("a model read from a file keeps its words: train it with --max-size to let words go" if estimator is None
               else "let the vocabulary shrink too (the default; not with --keep-vocabulary / vocabulary=False) or lower max_vocab")
        raise InvalidArgumentError(f"a budget of {max_bytes:,} bytes is below the vocabulary alone ({floor:,} bytes); {how}")
    if vocabulary:
        assert estimator is not None  # a fitted model is pruned with vocabulary=False (checked above)
        wv = ngram_word_values(counts, scores, fitted)
        keep = _choose_ngram_words(counts, tables, estimator, fitted, scores, wv, costs, floor, max_bytes, build)
        n = tables.n_words
        while not keep.all():
            say(f"dropping words: keeping {int(keep.sum()):,} of {n:,}")
            small_counts, small_tables = drop_ngram_words(counts, tables, keep)
            small_fit = estimator.fit(small_counts)
            small_floor = _nbytes(ngram_file(small_counts, small_tables, unigrams_only(small_fit), **build))
            if small_floor <= max_bytes:
                say(f"scoring {stored_ngrams(small_fit):,} n-grams ({rule} rule)")
                counts, tables, fitted, floor = small_counts, small_tables, small_fit, small_floor
                scores = score(fitted, counts)
                full = _nbytes(ngram_file(counts, tables, fitted, **build))
                costs = _order_costs(counts, tables, fitted, full, floor, say, build)
                break
            if keep.sum() == 1:
                raise InvalidArgumentError(
                    f"a budget of {max_bytes:,} bytes is below the smallest possible model ({small_floor:,} bytes: one word)"
                )
            # the estimate was optimistic: drop the least valuable tenth of the kept words too
            kept = np.flatnonzero(keep)
            keep[kept[np.argsort(wv[kept], kind="stable")[: max(1, len(kept) // 10)]]] = False
    fitted_out, chunks, info = _fit_ngrams(counts, tables, fitted, scores, max_bytes, floor, full, costs, say, build)
    info["words_kept"] = tables.n_words
    info["words_removed"] = words_before - tables.n_words
    return fitted_out, counts, tables, chunks, info


def _nbytes(chunks: Chunks) -> int:
    return sum(len(c) for c in chunks)


def _order_costs(counts: NgramCounts, tables: CountTables, fitted: Fitted, full: int, floor: int,
                 say: Callable[[str], None], build: dict[str, Any]) -> list[float]:
    """Bytes per stored n-gram of each order (``out[m]``), measured: the full file, then each order from the top removed in turn."""
    order = fitted.order
    sizes = [len(lev.grams) for lev in fitted.levels]
    cost = [0.0] * (order + 1)
    upper = full
    for m in range(order, 1, -1):
        if m == 2:
            below = floor
        else:
            keep: list[np.ndarray | None] = [None] + [
                np.ones(sizes[i], bool) if i + 1 < m else np.zeros(sizes[i], bool) for i in range(1, order)]
            say(f"measuring the bytes of order {m}")
            below = _nbytes(ngram_file(counts, tables, prune_fitted(fitted, keep), **build))
        cost[m] = max((upper - below) / max(sizes[m - 1], 1), 1e-9)
        upper = below
    return cost


def _choose_ngram_words(counts: NgramCounts, tables: CountTables, estimator: Estimator, fitted: Fitted, scores: list[np.ndarray],
                        wv: np.ndarray, cost: list[float], floor: int, max_bytes: int, build: dict[str, Any]) -> np.ndarray:
    """Which words to keep, by value per byte against the n-grams (as :func:`choose_vocabulary` for pairs).

    A word's value (:func:`ngram_word_values`) over the bytes one word costs (the
    vocabulary-only file against the one-word file), an n-gram's score over its order's
    cost; both taken best first until the estimated size reaches the budget.
    """
    n = tables.n_words
    one = np.zeros(n, dtype=bool)
    one[int(np.argmax(wv))] = True
    c1, t1 = drop_ngram_words(counts, tables, one)
    fixed = _nbytes(ngram_file(c1, t1, unigrams_only(estimator.fit(c1)), **build))
    per_word = max((floor - fixed) / max(n - 1, 1), 1e-9)
    values = np.concatenate([np.where(np.isfinite(scores[m - 1]), scores[m - 1] / cost[m], np.inf)
                             for m in range(2, fitted.order + 1)])
    costs = np.concatenate([np.full(len(scores[m - 1]), cost[m]) for m in range(2, fitted.order + 1)])
    ascending = np.argsort(values, kind="stable")
    gram_value = values[ascending]
    gram_cost = costs[ascending][::-1]  # the n-grams' costs, best first
    word_value = wv / per_word
    by_value = np.argsort(-word_value, kind="stable")
    # every item best first: a word's place is its rank among the words plus the n-grams worth strictly more
    ahead = len(gram_value) - np.searchsorted(gram_value, word_value[by_value], side="right")
    place = np.arange(n) + ahead
    cost_all = np.empty(n + len(gram_value))
    is_word = np.zeros(len(cost_all), dtype=bool)
    is_word[place] = True
    cost_all[place] = per_word
    cost_all[~is_word] = gram_cost
    fits = fixed + np.cumsum(cost_all) - per_word <= max_bytes  # the first word is in ``fixed``
    cut = len(fits) if fits.all() else int(np.argmin(fits))
    keep = np.zeros(n, dtype=bool)
    keep[by_value[place < cut]] = True
    keep[int(np.argmax(wv))] = True
    return keep


def _fit_ngrams(counts: NgramCounts, tables: CountTables, fitted: Fitted, scores: list[np.ndarray], max_bytes: int,
                floor: int, full: int, cost: list[float], say: Callable[[str], None],
                build: dict[str, Any]) -> tuple[Fitted, Chunks, dict[str, float]]:
    """The most valuable n-grams by score per byte that fit ``max_bytes`` (``floor``/``full``: the file with none/all)."""
    order = fitted.order
    total = stored_ngrams(fitted)
    if full <= max_bytes:  # after dropping words every n-gram may fit
        chunks = ngram_file(counts, tables, fitted, **build)
        return fitted, chunks, {"kept": total, "removed": 0, "bytes": _nbytes(chunks)}
    sizes = [len(lev.grams) for lev in fitted.levels]
    values = [np.zeros(0)] + [np.where(np.isfinite(scores[m - 1]), scores[m - 1] / cost[m], np.inf) for m in range(2, order + 1)]
    ranked = with_dependants(fitted, values)  # a bigram leaves with its last trigram (see above ngram_scores)

    def choose(k: int) -> list[np.ndarray | None]:
        return keep_contexts(fitted, keep_best(ranked, k))

    # predicted size of keeping the best k: floor + the costs of the kept n-grams, in value order
    flat_cost = np.concatenate([np.full(sizes[m - 1], cost[m]) for m in range(2, order + 1)])
    flat_value = np.concatenate(ranked[1:])
    by_value = np.argsort(-flat_value, kind="stable")
    predicted = floor + np.concatenate([[0.0], np.cumsum(flat_cost[by_value])])
    budget = float(max_bytes)
    known: dict[int, int] = {0: floor, total: full}  # measured file sizes by kept count
    lo, hi = 0, total  # lo fits, hi does not
    k = int(np.searchsorted(predicted, budget, side="right")) - 1
    best: tuple[int, Chunks, Fitted] | None = None
    for _ in range(40):
        k = max(lo + 1, min(hi - 1, k))
        if k <= lo or k >= hi:
            break
        say(f"building a file with {k:,} of {total:,} n-grams")
        keep = choose(k)
        pruned = prune_fitted(fitted, keep)
        chunks = ngram_file(counts, tables, pruned, **build)
        size = _nbytes(chunks)
        known[k] = size
        if size <= max_bytes:
            lo, best = k, (kept_ngrams(keep, fitted), chunks, pruned)
            if max_bytes - size < 0.002 * max_bytes:
                break
        else:
            hi = k
        # secant on the measured sizes either side, corrected by the predicted shape
        (k0, s0), (k1, s1) = (lo, known[lo]), (hi, known[hi])
        guess = k0 + (budget - s0) * (k1 - k0) / max(s1 - s0, 1)
        k = int(guess) if hi - lo > 2 else lo + 1
    if best is None:
        keep = choose(lo)
        pruned = prune_fitted(fitted, keep)
        chunks = ngram_file(counts, tables, pruned, **build)
        best = (kept_ngrams(keep, fitted), chunks, pruned)
    k, chunks, pruned = best
    if _nbytes(chunks) > max_bytes:  # only when even the vocabulary alone is over the budget
        raise InvalidArgumentError(f"could not fit {max_bytes:,} bytes: the vocabulary alone takes {floor:,}")
    return pruned, chunks, {"kept": k, "removed": total - k, "bytes": _nbytes(chunks)}


def write_to_size(
    counts: NgramCounts,
    tables: CountTables,
    estimator: Estimator,
    max_bytes: int,
    path: str | os.PathLike[str],
    *,
    rule: Rule = DEFAULT_RULE,
    progress: Callable[[str], None] | None = None,
    skyband_k: int = DEFAULT_SKYBAND_K,
    skyband_min: int = DEFAULT_SKYBAND_MIN,
    quantize: int | None = None,
    compact: bool = False,
) -> tuple[CountTables, int]:
    """Prune any n-gram model to ``max_bytes`` (:func:`prune_ngrams_to_size`) and write it atomically to ``path``.

    The build step of ``train --max-size`` for every estimator and order; an exact
    Jelinek-Mercer bigram goes through :func:`prune_to_size` (its file stores the counts
    themselves, pruned pairs renormalised over c(v)). Returns the tables the file was
    built from (fewer words when words were dropped) and the number of stored bigrams.

    ``quantize`` (bits) stores the values quantised (:class:`~nextword.codecs.QuantCodec`):
    every trial build measures the quantised file, so the n-grams kept are those that fit
    the budget at the quantised cost per n-gram (the choice of bits is the caller's; the
    rule and its measurements are in docs/SEAMS.md, "Size budget and quantisation").
    ``compact`` measures and writes format 1.6 files (chunked Elias-Fano successor lists).
    """
    if quantize is not None or compact:
        fitted, _, small_tables, chunks, _ = prune_ngrams_to_size(
            counts, tables, estimator, max_bytes, rule=rule, progress=progress, skyband_k=skyband_k,
            skyband_min=skyband_min, codec=codec_for_bits(quantize, ones=compact), compact=compact)
        atomic_write(path, chunks)
        return small_tables, len(fitted.levels[1].grams)
    if estimator.name == "jm" and counts.order == 2:
        lam = float(estimator.lams[0])  # type: ignore[attr-defined]
        small, chunks, _ = prune_to_size(tables, max_bytes, rule=rule, lam=lam, progress=progress,
                                         skyband_k=skyband_k, skyband_min=skyband_min)
        atomic_write(path, chunks)
        return small, len(small.pair_count)
    fitted, _, small_tables, chunks, _ = prune_ngrams_to_size(
        counts, tables, estimator, max_bytes, rule=rule, progress=progress, skyband_k=skyband_k, skyband_min=skyband_min)
    atomic_write(path, chunks)
    return small_tables, len(fitted.levels[1].grams)


def file_context_mass(fitted: Fitted) -> list[np.ndarray]:
    """P(h) of every context per order (``out[m-1]``) of a model read from a file, for :func:`ngram_scores`.

    The file has no raw counts, but its highest order's values are raw counts, and so
    are Jelinek-Mercer's every value and Kneser-Ney's bigram row after ``<s>``:

    * order 2, and every Jelinek-Mercer bigram level: P(v) = T(v)/N, T(v) the context total;
    * Kneser-Ney order 3: c(v •) = Σ_u T(u v) (every token after v ≠ ``<s>`` has a token
      before v), c(<s> •) = T(<s>); P(u v) = T(u v)/N;

    with N = Σ_v c(v •), the number of predicted tokens. Exact for a file never pruned
    (the same as :func:`context_probability` on its training counts); where a previous
    pruning dropped whole trigram contexts, Kneser-Ney's c(v •) is a lower bound.
    """
    lev2 = fitted.levels[1]
    raw2 = np.asarray(lev2.ctx_total, dtype=np.float64)
    if fitted.order >= 3 and fitted.name == "kn":
        lev3 = fitted.levels[2]
        by_v = np.bincount(lev3.ctx[:, 1], weights=lev3.ctx_total.astype(np.float64), minlength=fitted.bos + 1)
        raw2 = np.where(lev2.ctx[:, 0] == fitted.bos, raw2, by_v[lev2.ctx[:, 0]])
    n_tokens = max(float(raw2.sum()), 1.0)
    out = [np.zeros(0), raw2 / n_tokens]
    if fitted.order >= 3:
        out.append(fitted.levels[2].ctx_total.astype(np.float64) / n_tokens)
    return out


def prune_model(
    model: Model,
    max_bytes: int,
    *,
    rule: Rule = DEFAULT_RULE,
    vocabulary: bool = True,
    progress: Callable[[str], None] | None = None,
) -> tuple[Chunks, dict[str, float]]:
    """A model file of any estimator and order pruned to ``max_bytes``: (file chunks, info), nothing written.

    A Jelinek-Mercer bigram file goes through :func:`prune_to_size` on its counts
    (:func:`tables_from_model`; ``vocabulary`` lets words go). Any other file is pruned
    on the fitted estimator it stores (:func:`nextword.export.fitted_from_model`: values,
    context totals with any dropped mass, discounts or λ, all read through the model's
    public accessors), with P(h) from :func:`file_context_mass`; its words stay (dropping
    one needs the raw counts to fit again), so a budget below the vocabulary is an error.
    The skyband settings and the value codec are the file's (:meth:`Model.header`,
    ``Model.codec``): a quantised file stays quantised at its width (its stored values
    already fit the codebook, so nothing is quantised twice), and a quantised Jelinek-Mercer
    bigram is pruned on its fitted levels like the other kinds.
    """
    head = model.header()
    build: dict[str, Any] = {"skyband_k": int(head["skyband_k"]), "skyband_min": int(head["skyband_min"])}
    if model.codec is not EXACT:
        build["codec"] = model.codec
    if model.format_version[1] == COMPACT_MINOR:
        build["compact"] = True
    if model.codec is EXACT and not build.get("compact") and model.estimator == "jm" and model.order == 2:
        _, chunks, info = prune_to_size(tables_from_model(model), max_bytes, rule=rule, lam=model.stored_lam,
                                        vocabulary=vocabulary, progress=progress, **build)
        return chunks, info
    from .export import fitted_from_model  # the file's fitted estimator, rebuilt from its stored levels

    fitted = fitted_from_model(model)
    levels = fitted.levels
    counts = NgramCounts(model.n_words, tuple(lev.grams for lev in levels), tuple(lev.value for lev in levels))
    unigram = np.zeros(model.n_words + 2, dtype=np.int64)
    unigram[levels[0].grams[:, 0]] = levels[0].value
    tables = CountTables(
        keys=model.word_keys(),
        displays=[model.display(i) for i in range(model.n_words)],
        unigram=unigram,
        pair_left=levels[1].grams[:, 0],
        pair_right=levels[1].grams[:, 1],
        pair_count=levels[1].value,
        stats=dict(model.stats),
    )
    _, _, _, chunks, info = prune_ngrams_to_size(
        counts, tables, None, max_bytes, rule=rule, vocabulary=False, progress=progress,
        context_mass=file_context_mass(fitted), fitted=fitted, **build)
    return chunks, info


# -- mixtures -----------------------------------------------------------------------------------------


def prune_mixture(
    mix_path: str | os.PathLike[str],
    max_bytes: int,
    output: str | os.PathLike[str],
    *,
    rule: Rule = DEFAULT_RULE,
    vocabulary: bool = True,
    progress: Callable[[str], None] | None = None,
) -> dict[str, Any]:
    """Prune every part of a mixture so that the parts and the new mixture file fit ``max_bytes``.

    The rule: the parts' budget (``max_bytes`` minus the mixture file itself) is shared in
    proportion to the parts' present sizes, so each part keeps the same share of its
    bytes, and each part is pruned by :func:`prune_model` with ``rule``. It is a rule, not
    a search: a split weighted towards the part that earns more held-out KSR per byte
    could do better. The weights stay as fitted on the unpruned parts (re-fit them with
    ``nextword tune`` on held-out text). Pruned parts are written beside ``output`` as
    ``<name>.part<i>.nwm``; returns what was written.
    """
    from .mix import load_mix, read_mix, write_mix
    from .store import check_new_output

    mix = load_mix(mix_path)
    info = read_mix(mix_path)
    out = os.fspath(output)
    stem = out[: -len(".nwx")] if out.endswith(".nwx") else out
    sizes = [int(p.file_size) for p in mix.parts]
    overhead = 512 + 200 * len(sizes)  # the mixture file: paths, sizes, digests, weights (measured: well under this)
    room = max_bytes - overhead
    if room <= 0:
        raise InvalidArgumentError(f"a budget of {max_bytes:,} bytes leaves no room for the parts of a mixture")
    total = sum(sizes)
    paths: list[str] = []
    parts_info: list[dict[str, Any]] = []
    for i, (part, size) in enumerate(zip(mix.parts, sizes)):
        budget = size if room >= total else int(room * size / total)
        path = f"{stem}.part{i}.nwm"
        check_new_output(str(part.path), path, "pruned part")
        if progress is not None:
            progress(f"part {i}: {size:,} -> at most {budget:,} bytes")
        if budget >= size:
            with open(str(part.path), "rb") as f:
                atomic_write(path, [f.read()])
            kept: dict[str, Any] = {"bytes": size, "pruned": False}
        else:
            chunks, pinfo = prune_model(part, budget, rule=rule, vocabulary=vocabulary)
            atomic_write(path, chunks)
            kept = {"bytes": os.path.getsize(path), "pruned": True, **pinfo}
        paths.append(path)
        parts_info.append({"path": path, "budget": budget, **kept})
    fitted = dict(info["fitted"] or {})
    fitted["pruned_from"] = os.path.basename(os.fspath(mix_path))
    write_mix(out, paths, list(mix.weights), fitted=fitted)
    mix.close()
    return {"output": out, "bytes": os.path.getsize(out) + sum(int(p["bytes"]) for p in parts_info), "parts": parts_info,
            "weights": list(mix.weights)}
