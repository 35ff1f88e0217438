"""The read-only model: exact top-k next-word and completion queries, probabilities, perplexity.

P(w | v) = λ·c(v,w)/c(v) + (1−λ)·c(w)/N, where c(v) counts v as a history, so that the
probabilities of all words, ``</s>`` and ``<unk>`` after any history sum to 1. A history
never seen (c(v) = 0) falls back to the unigram c(w)/N.

Ranking is exact: the k words a call returns are the first k of *all* matching vocabulary
words ordered by (probability descending, key ascending in code-point order). The
implementation only ever looks at a bounded candidate set (see :meth:`Model._rank`);
tests compare it with scoring every word.
"""

from __future__ import annotations

import bisect
import math
import os
import sys
import time
from dataclasses import dataclass
from typing import Any, Iterable, Iterator, NamedTuple, Sequence

import numpy as np

from ._progress import DEFAULT_TICK, Progress
from .corpus import Format, iter_messages, open_sources
from .counts import DEFAULT_MAX_VOCAB, DEFAULT_MIN_COUNT, CountBuilder, CountTables, auto_workers, count_in_processes
from .estimators import unigram_floor
from .errors import InputDataError, InvalidArgumentError, ModelFormatError
from .prune import DEFAULT_RULE
from .store import (
    COUNT_ESCAPE,
    DEFAULT_SKYBAND_K,
    DEFAULT_SKYBAND_MIN,
    MAX_LAMBDA,
    TOPK_FANOUT,
    ModelArrays,
    read_model,
    key_head,
    topk_levels,
    write_model,
)
from .text import BOS, EOS, UNK, fold, parse_typed, sentences

__all__ = ["Model", "Suggestion", "TrainReport", "train", "train_texts", "load", "DEFAULT_LAMBDA", "SMOOTHINGS", "TRAIN_ORDERS"]

#: Weight of the bigram estimate; a value near 0.9 is the usual starting point (common practice).
DEFAULT_LAMBDA = 0.9
#: sections whose size grows with the number of stored pairs, and with the vocabulary (for ``info``)
_PAIR_SECTIONS = ("SUCC", "CNTS", "BIGI", "BIGC", "SEGS", "SEGE", "SKYP", "SKYI", "SKYC")
_VOCAB_SECTIONS = ("TKID", "IDTK", "ALPH", "APOS", "KEY4", "TOPK", "UNIG", "ROWS", "HIST", "DISI", "DISO")
# below this many successor candidates, plain Python beats numpy's per-call overhead
_SMALL = 80


class Suggestion(NamedTuple):
    """One suggested word: ``word`` as it should be shown, ``prob`` = P(word | context).

    A named tuple: immutable, and about five times cheaper to create than a frozen
    dataclass, which matters at several per keystroke.
    """

    word: str
    prob: float


@dataclass(frozen=True, slots=True)
class TrainReport:
    """What :func:`train` did: sizes, corpus statistics and timings."""

    path: str
    n_words: int
    n_bigrams: int
    word_tokens: int
    messages: int
    file_bytes: int
    count_seconds: float
    build_seconds: float

    @property
    def words_per_second(self) -> float:
        total = self.count_seconds + self.build_seconds
        return self.word_tokens / total if total > 0 else 0.0


def _check_lam(lam: float) -> float:
    if isinstance(lam, bool) or not isinstance(lam, (int, float)) or not 0.0 <= lam <= 1.0:
        raise InvalidArgumentError(f"lam must be a number in [0, 1], got {lam!r}")
    return float(lam)


def _check_k(k: int) -> int:
    if isinstance(k, bool) or not isinstance(k, int) or k < 1:
        raise InvalidArgumentError(f"k must be an integer >= 1, got {k!r}")
    return k


def _native_view(arr: np.ndarray) -> memoryview:
    """A memoryview for fast scalar reads (Python ints) of a little-endian array."""
    if sys.byteorder != "little":  # pragma: no cover - no big-endian CI
        arr = arr.astype(arr.dtype.newbyteorder("="))
    fmt = {1: "B", 2: "H", 4: "I", 8: "Q"}[arr.dtype.itemsize]
    return memoryview(np.ascontiguousarray(arr)).cast("B").cast(fmt)  # type: ignore[arg-type,call-overload]


class _AlphaKeys:
    """Sequence view of the vocabulary keys in alphabetical order, truncated to a length."""

    __slots__ = ("restore", "idtk", "alph", "length")

    def __init__(self, restore: Any, idtk: memoryview, alph: memoryview, length: int) -> None:
        self.restore = restore
        self.idtk = idtk
        self.alph = alph
        self.length = length

    def __len__(self) -> int:
        return len(self.alph) - 2

    def __getitem__(self, i: int) -> str:
        return self.restore(self.idtk[self.alph[i]])[: self.length]  # type: ignore[no-any-return]


class Model:
    """A loaded model file. Read-only and safe to share between threads.

    Obtain one with :func:`load`. The arrays are memory-mapped; nothing is copied.
    """

    def __init__(self, arrays: ModelArrays, *, lam: float | None = None) -> None:
        self._src = arrays
        meta = arrays.meta
        a = arrays.arrays
        self.path = arrays.path
        self.n_words: int = meta["n_words"]
        self.n_bigrams: int = meta["bigrams"]
        self.total: int = meta["total"]
        self.stats: dict[str, int] = dict(meta.get("stats", {}))
        # stored λ above MAX_LAMBDA (files written before the cap) are clamped, not refused:
        # λ = 1 would give every unseen pair probability 0; ``lambda_clamped`` says it happened
        stored = [float(meta["lambda"])]
        # λ by history count (optional): bucket i holds histories with bounds[i-1] <= c(v) < bounds[i]
        buckets = meta.get("lambda_buckets") or {}
        stored += [float(x) for x in buckets.get("lambdas", [])]
        self.lambda_clamped: bool = max(stored) > MAX_LAMBDA
        self.stored_lam: float = min(stored[0], MAX_LAMBDA)
        self.lam: float = self.stored_lam if lam is None else _check_lam(lam)
        self.lambda_bounds: list[int] = list(buckets.get("bounds", []))
        self.lambda_values: list[float] = [min(x, MAX_LAMBDA) for x in stored[1:]]
        self._override = lam is not None
        self.file_size = arrays.file_size
        self.format_version = arrays.version
        n = self.n_words
        self._eos, self._unk, self._bos = n, n + 1, n + 2
        self._sky_min: int = meta["skyband_min"]
        self._sky_k: int = meta["skyband_k"]
        self._max_key: int = meta["max_key_chars"]
        self._trie = arrays.trie
        self._alph = a["ALPH"]
        self._unig = a["UNIG"]
        self._succ = a["SUCC"]
        self._cnts = a["CNTS"]
        self._bigi = a["BIGI"]
        self._bigc = a["BIGC"]
        self._disb = arrays.raw["DISB"]
        mv = {k: _native_view(v) for k, v in a.items() if k not in ("CNTS",)}
        self._mv_tkid, self._mv_idtk = mv["TKID"], mv["IDTK"]
        self._mv_alph, self._mv_apos, self._mv_unig = mv["ALPH"], mv["APOS"], mv["UNIG"]
        self._mv_rows, self._mv_succ = mv["ROWS"], mv["SUCC"]
        self._mv_skyc = mv["SKYC"]
        self._mv_hist = mv.get("HIST")
        self._mv_disi, self._mv_diso, self._mv_key4 = mv["DISI"], mv["DISO"], mv["KEY4"]
        self._mv_segs, self._mv_sege, self._mv_skyp = mv["SEGS"], mv["SEGE"], mv["SKYP"]
        self._mv_cnts = memoryview(np.ascontiguousarray(a["CNTS"])).cast("B")  # type: ignore[arg-type]
        self._mv_bigi, self._mv_bigc, self._mv_skyi = mv["BIGI"], mv["BIGC"], mv["SKYI"]
        # multi-level prefix top lists as 2-D views (blocks x FANOUT)
        self._levels: list[np.ndarray] = []
        start = 0
        for nb in topk_levels(n):
            self._levels.append(a["TOPK"][start : start + nb * TOPK_FANOUT].reshape(nb, TOPK_FANOUT))
            start += nb * TOPK_FANOUT
        self._apos = a["APOS"]
        # small caches of pure functions of the file (keyboards repeat prefixes constantly);
        # dict reads and writes are atomic, so sharing a Model between threads stays safe
        self._range_cache: dict[str, tuple[int, int]] = {}
        self._top_cache: dict[tuple[int, int, int], list[int]] = {}
        self._display_cache: dict[int, str] = {}
        self._big: dict[int, int] | None = None
        #: the smoothing method ("jm" or "kn") and n-gram order (2 or 3) the file stores
        self.estimator: str = meta["estimator"]
        self.order: int = meta["order"]
        #: Kneser-Ney discounts per order ([D1, D2, D3+] for orders 1..n), else empty
        self.discounts: list[list[float]] = [list(d) for d in meta.get("discounts", [])]
        #: why an order's discounts are not Chen & Goodman's estimate (order -> reason)
        self.discount_notes: dict[str, str] = dict(meta.get("discount_notes", {}))
        #: λ of the trigram level (Jelinek-Mercer order 3), else None
        self.stored_lam3: float | None = min(meta["lambda3"], MAX_LAMBDA) if "lambda3" in meta else None
        # everything but the Jelinek-Mercer bigram goes through the general scorer (_NgramScorer)
        self._general = self.estimator != "jm" or self.order != 2
        if self._general:
            if self.estimator == "kn" and lam is not None:
                raise InvalidArgumentError(f"lam={lam!r} given for a Kneser-Ney model, which has no λ")
            self._ng = _NgramScorer(self, a)

    # -- context manager ----------------------------------------------------------------

    def close(self) -> None:
        """Drop the reader's references to the mapped file; do not query the model afterwards.

        The operating system unmaps the file once the last array view of it is gone
        (when this model is garbage-collected). Replacing the file on disk with
        ``os.replace`` is safe at any time: a mapped file keeps its old contents.
        """
        self._src.close()

    def __enter__(self) -> Model:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def __repr__(self) -> str:
        if self.estimator == "kn":
            return f"<nextword.Model {self.path!r}: {self.n_words} words, {self.n_bigrams} bigrams, Kneser-Ney order {self.order}>"
        return f"<nextword.Model {self.path!r}: {self.n_words} words, {self.n_bigrams} bigrams, λ={self.lam}>"

    # -- vocabulary -----------------------------------------------------------------------

    def _key(self, wid: int) -> str:
        return self._trie.restore_key(self._mv_idtk[wid])  # type: ignore[no-any-return]

    def _word_id(self, key: str) -> int | None:
        mid = self._trie.get(key)
        return None if mid is None else self._mv_tkid[mid]

    def display(self, wid: int) -> str:
        """Display spelling of word id ``wid`` (its most frequent spelling)."""
        if isinstance(wid, bool) or not isinstance(wid, int) or not 0 <= wid < self.n_words:
            raise InvalidArgumentError(f"word id must be an integer in [0, {self.n_words}), got {wid!r}")
        hit = self._display_cache.get(wid)
        if hit is not None:
            return hit
        disi = self._mv_disi
        i = bisect.bisect_left(disi, wid)
        if i < len(disi) and disi[i] == wid:
            shown = bytes(self._disb[self._mv_diso[i] : self._mv_diso[i + 1]]).decode("utf-8")
        else:
            shown = self._key(wid)
        self._display_cache[wid] = shown
        return shown

    def words(self) -> Iterator[tuple[str, int]]:
        """Yield (display spelling, count) for every vocabulary word, most frequent first.

        The count is the stored unigram value: c(w) for Jelinek-Mercer; for Kneser-Ney the
        continuation count (distinct words seen before w), and words come by their floor.
        """
        for wid in range(self.n_words):
            yield self.display(wid), self._mv_unig[wid]

    def __contains__(self, word: object) -> bool:
        return isinstance(word, str) and self._word_id(fold(word)) is not None

    def _history_id(self, previous_word: str | None) -> int:
        if previous_word is None or previous_word == BOS:
            return self._bos
        if previous_word == UNK:
            return self._unk
        if previous_word == EOS:
            raise InvalidArgumentError("'</s>' is never a history; use None or '<s>' for a sentence start")
        wid = self._word_id(fold(previous_word))
        return self._unk if wid is None else wid

    def _predicted_id(self, word: str) -> int:
        if word == EOS:
            return self._eos
        if word == UNK:
            return self._unk
        if word == BOS:
            raise InvalidArgumentError("'<s>' is never predicted")
        wid = self._word_id(fold(word))
        return self._unk if wid is None else wid

    # -- counts -----------------------------------------------------------------------------

    def _count_at(self, i: int) -> int:
        c = self._mv_cnts[i]
        if c != COUNT_ESCAPE:
            return c  # type: ignore[no-any-return]
        big = self._big
        if big is None:  # built on first use: escapes are rare (counts >= 255)
            big = self._big = dict(zip(self._mv_bigi.tolist(), self._mv_bigc.tolist()))
        value = big.get(i)
        if value is None:
            raise ModelFormatError(f"{self.path}: escaped count without a value at entry {i}")
        return value

    def _counts(self, idx: np.ndarray) -> np.ndarray:
        c = self._cnts[idx].astype(np.int64)
        if len(self._bigi) == 0:
            return c
        for j in np.flatnonzero(c == COUNT_ESCAPE).tolist():
            c[j] = self._count_at(int(idx[j]))
        return c

    def bigram_count(self, previous_word: str | None, word: str) -> int:
        """c(previous_word, word) as counted in training (after case folding and OOV mapping).

        The stored bigram value: a continuation count in a Kneser-Ney order-3 model (§7.12 of docs/FORMAT.md).
        """
        return self._pair_count(self._history_id(previous_word), self._predicted_id(word))

    def history_count(self, previous_word: str | None) -> int:
        """c(v): how often ``previous_word`` was followed by anything (``None`` = sentence start)."""
        return self._hist(self._history_id(previous_word))

    def _hist(self, v: int) -> int:
        """c(v) as a history: stored in pruned models, else derived from the unigram counts."""
        if self._mv_hist is not None:
            return self._mv_hist[v]  # type: ignore[no-any-return]
        if v == self._eos:
            return 0
        if v == self._bos:
            return self._mv_unig[self._eos]  # type: ignore[no-any-return]
        return self._mv_unig[v]  # type: ignore[no-any-return]

    def unigram_count(self, word: str) -> int:
        """c(w): how often ``word`` was predicted in training (Kneser-Ney: its continuation count)."""
        return self._mv_unig[self._predicted_id(word)]  # type: ignore[no-any-return]

    def _pair_count(self, v: int, w: int) -> int:
        rs, re_ = self._mv_rows[v], self._mv_rows[v + 1]
        pos = self._mv_apos[w]
        i = bisect.bisect_left(self._mv_succ, pos, rs, re_)
        if i < re_ and self._mv_succ[i] == pos:
            return self._count_at(i)
        return 0

    # -- probabilities ----------------------------------------------------------------------

    def lam_for(self, cv: int) -> float:
        """The λ used for a history seen ``cv`` times (the stored buckets, else the single λ)."""
        if self._override or not self.lambda_values:
            return self.lam
        return self.lambda_values[bisect.bisect_right(self.lambda_bounds, cv)]

    def _lam_of(self, v: int, lam: float | None) -> float:
        if lam is not None:
            return lam
        if self._override or not self.lambda_values:
            return self.lam
        return self.lambda_values[bisect.bisect_right(self.lambda_bounds, self._hist(v))]

    def _over(self, c: int, cv: int) -> ModelFormatError:
        """The error for a pair count above its history count (damaged bigram data).

        Valid files have c(v,w) ≤ c(v) (a row's counts sum to c(v)); the bigram-sized
        sections are not checksummed on a plain load, so every query that divides a pair
        count by c(v) checks it instead: a probability is never above 1.
        """
        return ModelFormatError(f"{self.path}: damaged model data: pair count {c} above its history count {cv}")

    def _prob_ids(self, v: int, w: int, lam: float) -> float:
        cv = self._hist(v)
        u = self._mv_unig[w] / self.total
        if cv == 0:
            return u  # type: ignore[no-any-return]
        c = self._pair_count(v, w)
        if c > cv:
            raise self._over(c, cv)
        return lam * (c / cv) + (1.0 - lam) * u  # type: ignore[no-any-return]

    def prob(self, word: str, previous_word: str | None = None, *, lam: float | None = None) -> float:
        """P(word | previous_word). ``None`` or ``'<s>'`` means the sentence start.

        Words are case-insensitive. ``'</s>'`` asks for the end of the sentence; a word
        outside the vocabulary gets the probability of ``<unk>``, as in perplexity.
        """
        lam = None if lam is None else _check_lam(lam)
        v = self._history_id(previous_word)
        if self._general:
            return self._ng.prob(self._predicted_id(word), (v,), self._ng_lams(lam))
        return self._prob_ids(v, self._predicted_id(word), self._lam_of(v, lam))

    def prob_after(self, word: str, history: Sequence[str | None], *, lam: float | None = None) -> float:
        """P(word | history), ``history`` the context tokens oldest first (as ``Context.history``).

        ``None`` or ``'<s>'`` marks a sentence start (nothing before it counts); an order-2
        model reads only the last token, an order-3 model the last two. For a
        Jelinek-Mercer bigram this is :meth:`prob` with ``history[-1]``.
        """
        lam = None if lam is None else _check_lam(lam)
        ctx = self._context_ids(history)
        if self._general:
            return self._ng.prob(self._predicted_id(word), ctx, self._ng_lams(lam))
        return self._prob_ids(ctx[-1], self._predicted_id(word), self._lam_of(ctx[-1], lam))

    def _context_ids(self, history: Sequence[str | None]) -> tuple[int, ...]:
        """Context ids of the last order−1 tokens, never reaching back across a sentence start."""
        if isinstance(history, str) or not isinstance(history, Sequence):
            raise InvalidArgumentError(f"history must be a sequence of tokens, got {type(history).__name__}")
        ids = [self._history_id(t) for t in history] or [self._bos]
        if self._bos in ids:
            ids = ids[len(ids) - 1 - ids[::-1].index(self._bos):]
        return tuple(ids[-(self.order - 1):])

    def _ng_lams(self, lam: float | None) -> tuple[float, float]:
        """(λ2, λ3) for the general scorer: a query-time ``lam`` replaces both (Jelinek-Mercer)."""
        if self.estimator == "kn":
            if lam is not None:
                raise InvalidArgumentError(f"lam={lam!r} given for a Kneser-Ney model, which has no λ")
            return 0.0, 0.0
        if lam is not None:
            return lam, lam
        if self._override:
            return self.lam, self.lam
        return self.stored_lam, (self.stored_lam3 if self.stored_lam3 is not None else self.stored_lam)

    def log_likelihood(self, lines: Iterable[str], *, lam: float | None = None) -> tuple[float, int]:
        """(Σ ln P, number of predicted tokens) over ``lines``, ``</s>`` and ``<unk>`` included.

        The parts of :meth:`perplexity`, so that results over several texts can be pooled.
        The sum is ``-inf`` if a token has probability 0 (possible only with λ = 1).
        """
        lam = None if lam is None else _check_lam(lam)
        log_sum = 0.0
        events = 0
        if self._general:
            lams = self._ng_lams(lam)
            for ctx, w in self._token_contexts(lines):
                p = self._ng.prob(w, ctx, lams)
                log_sum += math.log(p) if p > 0.0 else -math.inf
                events += 1
            return log_sum, events
        for v, w in self._token_pairs(lines):
            p = self._prob_ids(v, w, self._lam_of(v, lam))
            log_sum += math.log(p) if p > 0.0 else -math.inf
            events += 1
        return log_sum, events

    def _token_pairs(self, lines: Iterable[str]) -> Iterator[tuple[int, int]]:
        """(history id, predicted id) for every predicted token, cut as in training."""
        if isinstance(lines, str):
            raise InvalidArgumentError("expected an iterable of messages, not one string")
        for line in lines:
            for sent in sentences(line):
                v = self._bos
                for tok in [*sent, EOS]:  # no word contains "<", so EOS marks the end
                    if tok == EOS:
                        w = self._eos
                    else:
                        wid = None if tok is None else self._word_id(fold(tok))
                        w = self._unk if wid is None else wid
                    yield v, w
                    v = w

    def _token_contexts(self, lines: Iterable[str]) -> Iterator[tuple[tuple[int, ...], int]]:
        """(context ids, predicted id) for every predicted token: the last order−1 tokens of its sentence."""
        m = self.order - 1
        if isinstance(lines, str):
            raise InvalidArgumentError("expected an iterable of messages, not one string")
        for line in lines:
            for sent in sentences(line):
                ctx: list[int] = [self._bos]
                for tok in [*sent, EOS]:
                    if tok == EOS:
                        w = self._eos
                    else:
                        wid = None if tok is None else self._word_id(fold(tok))
                        w = self._unk if wid is None else wid
                    yield tuple(ctx[-m:]), w
                    ctx.append(w)

    def events(self, lines: Iterable[str]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(c(v), c(v, w), c(w)) for every predicted token of ``lines``, as int64 arrays.

        Everything λ-tuning needs: P(w | v) = λ·c(v,w)/c(v) + (1−λ)·c(w)/N, or c(w)/N
        when c(v) = 0. Tokens are cut exactly as in :meth:`log_likelihood`.
        """
        if self._general:
            raise InvalidArgumentError(f"λ events need a Jelinek-Mercer bigram model; {self.path} is {self.estimator} order {self.order}")
        cv, cvw, cw = [], [], []
        for v, w in self._token_pairs(lines):
            cv.append(self._hist(v))
            cvw.append(self._pair_count(v, w))
            if cvw[-1] > cv[-1]:
                raise self._over(cvw[-1], cv[-1])
            cw.append(self._mv_unig[w])
        return (np.asarray(cv, dtype=np.int64), np.asarray(cvw, dtype=np.int64), np.asarray(cw, dtype=np.int64))

    def perplexity(self, lines: Iterable[str], *, lam: float | None = None) -> float:
        """Per-token perplexity of ``lines`` (messages), counting ``</s>`` and ``<unk>`` tokens.

        Text is cut by the same rules as in training. Returns ``inf`` if a token has
        probability 0 (possible only with λ = 1).
        """
        log_sum, events = self.log_likelihood(lines, lam=lam)
        if events == 0:
            raise InvalidArgumentError("no words to score: the text is empty")
        return math.exp(-log_sum / events)

    # -- ranking ------------------------------------------------------------------------------

    def _prefix_range(self, key: str) -> tuple[int, int]:
        """Alphabetical positions [lo, hi) of the words whose key starts with ``key``.

        The 4-byte key heads (KEY4) give the range of prefixes up to 4 UTF-8 bytes with
        two binary searches over integers; longer prefixes refine it over the keys.
        """
        n = self.n_words
        if not key:
            return 0, n
        hit = self._range_cache.get(key)
        if hit is not None:
            return hit
        if len(key) > self._max_key:
            result = (0, 0)
        else:
            head = self._mv_key4
            lo = bisect.bisect_left(head, key_head(key, 0x00), 0, n)
            hi = bisect.bisect_right(head, key_head(key, 0xFF), lo, n)
            if len(key.encode("utf-8")) > 4 and lo < hi:
                seq = _AlphaKeys(self._trie.restore_key, self._mv_idtk, self._mv_alph, len(key))
                lo = bisect.bisect_left(seq, key, lo, hi)
                hi = bisect.bisect_right(seq, key, lo, hi)
            result = (lo, hi)
        if len(self._range_cache) > 65536:
            self._range_cache.clear()
        self._range_cache[key] = result
        return result

    def _range_top_ids(self, lo: int, hi: int, k: int) -> list[int]:
        """The k smallest word ids (= most frequent) among alphabetical positions [lo, hi).

        Uses the stored top lists: the range splits into at most 2·(FANOUT−1) pieces per
        level plus at most FANOUT top-level blocks, each contributing ≤ k ids, so the work
        is bounded whatever the number of matching words (for k ≤ FANOUT).
        """
        F = TOPK_FANOUT
        if lo == 0 and hi == self.n_words:
            return list(range(min(k, hi)))
        if hi - lo <= 2 * F:
            return sorted(self._mv_alph[lo:hi].tolist())[:k]
        hit = self._top_cache.get((lo, hi, k))
        if hit is not None:
            return hit
        if k > F:
            vals = self._alph[lo:hi]
        else:
            pieces = []
            unit, level, a, b = 1, 0, lo, hi
            while True:
                nxt = unit * F
                A = -(-a // nxt) * nxt
                B = (b // nxt) * nxt
                if level == len(self._levels) or A >= B:
                    pieces.append(self._units(level, a // unit, b // unit, k))
                    break
                pieces.append(self._units(level, a // unit, A // unit, k))
                pieces.append(self._units(level, B // unit, b // unit, k))
                a, b, unit, level = A, B, nxt, level + 1
            vals = np.concatenate(pieces)
        if len(vals) > k:
            vals = np.partition(vals, k - 1)[:k]
        vals = np.sort(vals)
        top: list[int] = vals[vals < self.n_words].tolist()
        if len(self._top_cache) > 16384:
            self._top_cache.clear()
        self._top_cache[lo, hi, k] = top
        return top

    def _units(self, level: int, i: int, j: int, k: int) -> np.ndarray:
        if level == 0:
            return self._alph[i:j]
        return self._levels[level - 1][i:j, :k].ravel()

    def _rank(self, v: int, lo: int, hi: int, k: int, lam: float) -> list[tuple[int, float]]:
        """Top-k (word id, probability) in alphabetical positions [lo, hi) after history v.

        Candidates are (a) the k most frequent words of the range — every word that is
        not a successor of v scores (1−λ)·c(w)/N, so no other non-successor can beat them
        — and (b) the successors of v inside the range: the row segment found by binary
        search (rows are sorted by alphabetical position) or, when the segment has more
        than ``skyband_min`` entries, its stored k-skyband, which holds every successor
        that can reach the top k for any λ < 1 (see store._skyband). Ties go to the
        alphabetically first key.
        """
        cv = self._hist(v)
        if cv == 0:
            lam = 0.0
        if lam == 1.0:
            return self._rank_bigram_only(v, lo, hi, k, cv)
        total = self.total
        oml = 1.0 - lam
        unig = self._mv_unig
        top = self._range_top_ids(lo, hi, k)
        if lam == 0.0:
            return [(w, oml * (unig[w] / total)) for w in top]
        rs, re_ = self._mv_rows[v], self._mv_rows[v + 1]
        s = bisect.bisect_left(self._mv_succ, lo, rs, re_)
        e = bisect.bisect_left(self._mv_succ, hi, s, re_)
        entries: Sequence[int] = range(s, e)
        if e - s > self._sky_min and k <= self._sky_k:
            entries = self._segment_band(s, e, k) or entries
        if len(entries) > _SMALL:
            return self._rank_many(entries, top, cv, lam, k)
        succ, alph, apos = self._mv_succ, self._mv_alph, self._mv_apos
        if isinstance(entries, range):
            ps = succ[s:e].tolist()
            cs = self._mv_cnts[s:e].tolist()
        else:
            ps = [succ[i] for i in entries]
            cs = [self._mv_cnts[i] for i in entries]
        if COUNT_ESCAPE in cs:  # counts >= 255 are rare: replace them one by one
            j = cs.index(COUNT_ESCAPE)
            while True:
                cs[j] = self._count_at(entries[j])
                try:
                    j = cs.index(COUNT_ESCAPE, j + 1)
                except ValueError:
                    break
        if cs and max(cs) > cv:
            raise self._over(max(cs), cv)
        # same float operations, in the same order, as the brute-force formula
        cands = [(-(lam * (c / cv) + oml * (unig[alph[p]] / total)), p) for p, c in zip(ps, cs)]
        seen = set(ps)
        for wid in top:
            p = apos[wid]
            if p not in seen:
                cands.append((-(oml * (unig[wid] / total)), p))
        cands.sort()
        return [(alph[p], -neg) for neg, p in cands[:k]]

    def _segment_band(self, s: int, e: int, k: int) -> list[int] | None:
        """Row entries of segment [s, e) with fewer than k dominators, if its skyband is stored.

        The stored skyband is ordered by number of dominators; SKYC says how many of its
        entries have fewer than k, so a top-3 query reads only those.
        """
        segs, sege = self._mv_segs, self._mv_sege
        i = bisect.bisect_left(segs, s)
        while i < len(segs) and segs[i] == s:
            if sege[i] == e:
                start = self._mv_skyp[i]
                stop = min(start + self._mv_skyc[i * self._sky_k + k - 1], self._mv_skyp[i + 1])
                return [s + o for o in self._mv_skyi[start:stop].tolist()]
            i += 1
        return None

    def _rank_many(self, entries: Sequence[int], top: list[int], cv: int, lam: float, k: int) -> list[tuple[int, float]]:
        """The vectorised version of the candidate scoring in :meth:`_rank`, for many successors."""
        if isinstance(entries, range):
            idx = np.arange(entries.start, entries.stop)
            pos = self._succ[entries.start : entries.stop].astype(np.int64)
        else:
            idx = np.sort(np.asarray(entries, dtype=np.int64))  # skybands are stored by dominance
            pos = self._succ[idx].astype(np.int64)
        ids = self._alph[pos].astype(np.int64)
        total = self.total
        counts = self._counts(idx)
        if len(counts) and int(counts.max()) > cv:
            raise self._over(int(counts.max()), cv)
        score = lam * (counts / cv) + (1.0 - lam) * (self._unig[ids] / total)
        top_a = np.asarray(top, dtype=np.int64)
        top_pos = self._apos[top_a].astype(np.int64)
        at = np.minimum(np.searchsorted(pos, top_pos), len(pos) - 1)
        fresh = pos[at] != top_pos  # frequent words that are also successors are scored already
        all_ids = np.concatenate([ids, top_a[fresh]])
        all_pos = np.concatenate([pos, top_pos[fresh]])
        all_score = np.concatenate([score, (1.0 - lam) * (self._unig[top_a[fresh]] / total)])
        return self._select(all_ids, all_pos, all_score, k)

    @staticmethod
    def _select(ids: np.ndarray, pos: np.ndarray, score: np.ndarray, k: int) -> list[tuple[int, float]]:
        if len(score) > k:
            thr = np.partition(score, len(score) - k)[len(score) - k]
            keep = np.flatnonzero(score >= thr)
            ids, pos, score = ids[keep], pos[keep], score[keep]
        order = np.lexsort((pos, -score))[:k]
        return list(zip(ids[order].tolist(), score[order].tolist()))

    def _rank_bigram_only(self, v: int, lo: int, hi: int, k: int, cv: int) -> list[tuple[int, float]]:
        """λ = 1: successors by count, then zero-probability words alphabetically."""
        rs, re_ = self._mv_rows[v], self._mv_rows[v + 1]
        s = bisect.bisect_left(self._mv_succ, lo, rs, re_)
        e = bisect.bisect_left(self._mv_succ, hi, s, re_)
        pos = self._succ[s:e].astype(np.int64)
        counts = self._counts(np.arange(s, e))
        if len(counts) and int(counts.max()) > cv:
            raise self._over(int(counts.max()), cv)
        ranked = self._select(self._alph[pos].astype(np.int64), pos, counts / cv, k)
        if len(ranked) < k:
            taken = set(pos.tolist())
            p = lo
            while p < hi and len(ranked) < k:
                if p not in taken:
                    ranked.append((self._mv_alph[p], 0.0))
                p += 1
        return ranked

    def suggest(self, typed: str, k: int = 3, *, lam: float | None = None) -> list[Suggestion]:
        """The k words the user most likely wants at the cursor, best first.

        If ``typed`` ends inside a word, that partial word is completed
        (case-insensitively); otherwise the next word is predicted. The context is the
        last complete word of the same sentence (the sentence start if none, the unknown
        symbol right after a number or symbol). Suggestions are capitalised at a sentence
        start and after a capitalised prefix; an explicitly lowercase prefix stays lowercase.
        """
        if not isinstance(typed, str):
            raise InvalidArgumentError(f"typed must be str, got {type(typed).__name__}")
        k = _check_k(k)
        lam = None if lam is None else _check_lam(lam)
        ctx = parse_typed(typed)
        if self._general:
            lams = self._ng_lams(lam)
            lo, hi = self._prefix_range(fold(ctx.prefix))
            if lo >= hi:
                return []
            ids = self._context_ids(ctx.history)
            try:
                ranked = self._ng.rank(ids, lo, hi, k, lams)
                at_start = ids[-1] == self._bos
                return [Suggestion(_recase(self.display(i), ctx.prefix, at_start), p) for i, p in ranked]
            except (IndexError, ValueError, UnicodeDecodeError) as e:
                raise ModelFormatError(f"{self.path}: damaged model data: {e}") from None
        if ctx.previous == BOS:
            v = self._bos
        elif ctx.previous == UNK:
            v = self._unk
        else:
            wid = self._word_id(fold(ctx.previous))
            v = self._unk if wid is None else wid
        lo, hi = self._prefix_range(fold(ctx.prefix))
        if lo >= hi:
            return []
        try:
            ranked = self._rank(v, lo, hi, k, self._lam_of(v, lam))
            at_start = v == self._bos
            shown = self._display_cache
            return [
                Suggestion(_recase(shown.get(i) or self.display(i), ctx.prefix, at_start), p) for i, p in ranked
            ]
        except (IndexError, ValueError, UnicodeDecodeError) as e:
            raise ModelFormatError(f"{self.path}: damaged model data: {e}") from None

    def rank_ids(self, previous_word: str | None, prefix: str = "", k: int = 3, *, lam: float | None = None) -> list[tuple[str, float]]:
        """(key, probability) of the top k after ``previous_word`` among words starting with ``prefix``.

        The raw ranking behind :meth:`suggest`, without text parsing or capitalisation;
        keys are the case-folded vocabulary keys.
        """
        k = _check_k(k)
        lam = None if lam is None else _check_lam(lam)
        if self._general:
            return self.rank_after((previous_word,), prefix, k, lam=lam)
        v = self._history_id(previous_word)
        lo, hi = self._prefix_range(fold(prefix))
        if lo >= hi:
            return []
        try:
            return [(self._key(i), p) for i, p in self._rank(v, lo, hi, k, self._lam_of(v, lam))]
        except (IndexError, ValueError) as e:
            raise ModelFormatError(f"{self.path}: damaged model data: {e}") from None

    def rank_after(
        self, history: Sequence[str | None], prefix: str = "", k: int = 3, *, lam: float | None = None
    ) -> list[tuple[str, float]]:
        """Like :meth:`rank_ids` with a context of tokens oldest first (see :meth:`prob_after`)."""
        k = _check_k(k)
        lam = None if lam is None else _check_lam(lam)
        ctx = self._context_ids(history)
        lo, hi = self._prefix_range(fold(prefix))
        if lo >= hi:
            return []
        try:
            if self._general:
                return [(self._key(i), p) for i, p in self._ng.rank(ctx, lo, hi, k, self._ng_lams(lam))]
            v = ctx[-1]
            return [(self._key(i), p) for i, p in self._rank(v, lo, hi, k, self._lam_of(v, lam))]
        except (IndexError, ValueError) as e:
            raise ModelFormatError(f"{self.path}: damaged model data: {e}") from None

    def header(self) -> dict[str, Any]:
        """The file's metadata as plain data (a copy): estimator, order, λ or discounts, sizes."""
        import copy

        return copy.deepcopy(self._src.meta)

    def info(self) -> dict[str, Any]:
        """Sizes, settings and corpus statistics, as plain data (for ``nextword info``)."""
        a = self._src.arrays
        bigram_bytes = sum(
            a[s].nbytes for s in ("SUCC", "CNTS", "BIGI", "BIGC", "ROWS", "SEGS", "SEGE", "SKYP", "SKYI", "SKYC")
        )
        # the file split into what grows with the pairs and what grows with the vocabulary
        # (trie, permutations, key heads, top lists, unigram/history counts, row offsets,
        # spellings); the rest is header, section table, metadata and padding
        pair_bytes = sum(a[s].nbytes for s in _PAIR_SECTIONS)
        vocab_bytes = sum(a[s].nbytes for s in _VOCAB_SECTIONS if s in a) + len(self._src.raw["TRIE"]) + len(self._disb)
        # Kneser-Ney context counts and the trigram sections (format 1.3)
        ngram_bytes = sum(a[s].nbytes for s in ("HN13", "TROW", "TCTU", "TCTS", "TSUC", "TVAL", "TTOT", "TN13") if s in a)
        pairs = self.n_bigrams
        return {
            "path": self.path,
            "format_version": "%d.%d" % self.format_version,
            "file_bytes": self.file_size,
            "vocabulary": self.n_words,
            "bigrams": self.n_bigrams,
            "vocabulary_bytes": vocab_bytes,
            "pair_bytes": pair_bytes,
            "other_bytes": self.file_size - vocab_bytes - pair_bytes - ngram_bytes,
            **({"trigram_and_context_bytes": ngram_bytes} if ngram_bytes else {}),
            "vocabulary_share": vocab_bytes / self.file_size,
            "pair_bytes_per_pair": pair_bytes / pairs if pairs else None,
            "file_bytes_per_pair": self.file_size / pairs if pairs else None,
            "bytes_per_bigram": self.file_size / pairs if pairs else None,
            "bigram_section_bytes_per_bigram": bigram_bytes / pairs if pairs else None,
            "lambda": None if self.estimator == "kn" else self.stored_lam,
            "lambda_clamped": self.lambda_clamped,
            "lambda_buckets": (
                {"bounds": self.lambda_bounds, "lambdas": self.lambda_values} if self.lambda_values else None
            ),
            "tokens": self.total,
            # a Jelinek-Mercer bigram's answer is unchanged (the service's protocol quotes it)
            **({"estimator": self.estimator, "order": self.order} if self._general else {}),
            **({"discounts": self.discounts, "discount_notes": self.discount_notes} if self.estimator == "kn" else {}),
            **({"lambda3": self.stored_lam3} if self.stored_lam3 is not None else {}),
            **({"trigrams": self._src.meta["trigrams"]} if self.order == 3 else {}),
            "corpus": self.stats,
        }


def _recase(word: str, prefix: str, at_start: bool) -> str:
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


# -- building and loading ---------------------------------------------------------------------


def load(path: str | os.PathLike[str], *, lam: float | None = None, verify: bool = False) -> Model:
    """Open a model file (memory-mapped). ``lam`` overrides the stored λ for every query.

    ``verify=True`` reads and checks the whole file (checksums of every section and every
    entry); without it only the header, metadata, trie and vocabulary-sized arrays are
    checked, which keeps opening fast whatever the model size.
    """
    if lam is not None:
        _check_lam(lam)
    return Model(read_model(path, verify=verify), lam=lam)


#: smoothing methods ``train`` offers: Jelinek-Mercer interpolation, interpolated modified Kneser-Ney
SMOOTHINGS = ("jm", "kn")
#: n-gram orders ``train`` offers (2 = one-word context, 3 = two-word context)
TRAIN_ORDERS = (2, 3)


def _check_kind(order: int, smoothing: str, lam: float | None, max_bytes: int | None) -> None:
    if isinstance(order, bool) or order not in TRAIN_ORDERS:
        raise InvalidArgumentError(f"order must be one of {', '.join(map(str, TRAIN_ORDERS))}, got {order!r}")
    if smoothing not in SMOOTHINGS:
        raise InvalidArgumentError(f"smoothing must be one of {', '.join(SMOOTHINGS)}, got {smoothing!r}")
    if smoothing == "kn" and lam is not None:
        raise InvalidArgumentError(f"lam={lam!r} given with Kneser-Ney smoothing, which has no λ (its discounts are fitted)")


def _finish(
    builder: CountBuilder,
    output_path: str | os.PathLike[str],
    *,
    lam: float,
    min_count: int,
    max_vocab: int,
    skyband_k: int,
    skyband_min: int,
    t0: float,
    max_bytes: int | None = None,
    prune_rule: str = DEFAULT_RULE,
    order: int = 2,
    smoothing: str = "jm",
    lam3: float = DEFAULT_LAMBDA,
) -> TrainReport:
    t1 = time.perf_counter()
    general = order != 2 or smoothing != "jm"
    if general:
        tables, counts = builder.ngram_counts(min_count=min_count, max_vocab=max_vocab)
    else:
        tables = builder.tables(min_count=min_count, max_vocab=max_vocab)
    if tables.stats["word_tokens"] == 0:
        raise InputDataError("the input holds no words")
    if general:
        from .estimators import JelinekMercer, KneserNey
        from .store import build

        estimator = KneserNey() if smoothing == "kn" else JelinekMercer((lam, lam3))
        if max_bytes is None:
            build(counts, tables, estimator, output_path, skyband_k=skyband_k, skyband_min=skyband_min)
        else:  # every estimator and order: nextword.prune chooses the n-grams (and words) that fit
            from .prune import write_to_size

            tables, n_bigrams = write_to_size(counts, tables, estimator, max_bytes, output_path, rule=prune_rule,  # type: ignore[arg-type]
                                              skyband_k=skyband_k, skyband_min=skyband_min)
    elif max_bytes is None:
        write_model(tables, output_path, lam=lam, skyband_k=skyband_k, skyband_min=skyband_min)
    else:
        from .prune import prune_to_size
        from .store import atomic_write

        tables, chunks, _ = prune_to_size(
            tables, max_bytes, rule=prune_rule, lam=lam, skyband_k=skyband_k, skyband_min=skyband_min  # type: ignore[arg-type]
        )
        atomic_write(output_path, chunks)
    t2 = time.perf_counter()
    return TrainReport(
        path=os.fspath(output_path),
        n_words=tables.n_words,
        n_bigrams=n_bigrams if general and max_bytes is not None else len(tables.pair_count),
        word_tokens=tables.stats["word_tokens"],
        messages=tables.stats["messages"],
        file_bytes=os.path.getsize(output_path),
        count_seconds=t1 - t0,
        build_seconds=t2 - t1,
    )


def _check_build_args(lam: float, skyband_k: int, skyband_min: int) -> float:
    lam = _check_lam(lam)
    if lam > MAX_LAMBDA:
        raise InvalidArgumentError(
            f"a stored λ must be at most {MAX_LAMBDA} (λ = 1 gives every unseen pair probability 0), got {lam!r}; "
            "queries may still pass lam=1.0"
        )
    if isinstance(skyband_k, bool) or not isinstance(skyband_k, int) or not 1 <= skyband_k <= 4096:
        raise InvalidArgumentError(f"skyband_k must be an integer in [1, 4096], got {skyband_k!r}")
    if isinstance(skyband_min, bool) or not isinstance(skyband_min, int) or skyband_min < 0:
        raise InvalidArgumentError(f"skyband_min must be an integer >= 0, got {skyband_min!r}")
    return lam


def train(
    inputs: str | os.PathLike[str] | Iterable[str | os.PathLike[str]],
    output_path: str | os.PathLike[str],
    *,
    lam: float | None = None,
    min_count: int = DEFAULT_MIN_COUNT,
    max_vocab: int = DEFAULT_MAX_VOCAB,
    fmt: Format = "auto",
    field: str = "text",
    skyband_k: int = DEFAULT_SKYBAND_K,
    skyband_min: int = DEFAULT_SKYBAND_MIN,
    progress: bool | None = None,
    max_bytes: int | None = None,
    prune_rule: str = DEFAULT_RULE,
    workers: int | None = None,
    memory_cap: int | None = None,
    order: int = 2,
    smoothing: str = "jm",
    lam3: float = DEFAULT_LAMBDA,
) -> TrainReport:
    """Count the messages in ``inputs`` and write a model file to ``output_path``.

    ``inputs`` is a path or a list of paths (``"-"`` = standard input): plain text with
    one message per line, or JSON Lines with a ``field`` holding the message, optionally
    gzip-compressed. Each input is read exactly once. The file is written atomically.
    ``max_bytes`` prunes word pairs (``prune_rule`` "entropy" or "count") until the file
    fits, and whole words where they are worth less per byte (a dropped word becomes
    ``<unk>``; no count is lost, see :mod:`nextword.prune`). ``workers`` > 1 counts
    chunks of messages in that many processes (0 = one per core) and merges the partial
    counts; the file is byte for byte the one a single process writes. The default
    (``None``) picks the fastest: one per core for inputs of at least
    :data:`~nextword.counts.PARALLEL_MIN_BYTES`, else one (:func:`~nextword.counts.auto_workers`). ``memory_cap``
    (bytes) bounds the pair counts held in memory by spilling sorted runs to a temporary
    directory (see :class:`~nextword.counts.CountBuilder`).
    ``skyband_k`` and ``skyband_min`` trade file size for query speed (see
    docs/FORMAT.md); the defaults suit keyboards.
    ``order`` 3 conditions on the last two words of the sentence; ``smoothing`` "kn"
    (interpolated modified Kneser-Ney, discounts fitted, no λ) replaces Jelinek-Mercer
    ("jm", λ = ``lam`` for the bigram level, default 0.9, and ``lam3`` for the trigram
    level). Both are counted in the same streaming pass (:class:`~nextword.counts.CountBuilder` of that order).
    """
    _check_kind(order, smoothing, lam, max_bytes)
    lam = _check_build_args(DEFAULT_LAMBDA if lam is None else lam, skyband_k, skyband_min)
    lam3 = _check_build_args(lam3, skyband_k, skyband_min)
    sources = open_sources(inputs, fmt=fmt, field=field)
    from .paths import check_outputs

    check_outputs([("corpus", s.name) for s in sources if s.name != "-"], [("model", output_path)])
    t0 = time.perf_counter()
    if workers is None:
        workers = auto_workers(s.name for s in sources)
    if isinstance(workers, bool) or not isinstance(workers, int) or workers < 0:
        raise InvalidArgumentError(f"workers must be an integer >= 0, got {workers!r}")
    workers = workers or (os.cpu_count() or 1)
    # no ticker thread when worker processes are forked (a thread at fork time risks a deadlock)
    bar = Progress("train", stages=2, enabled=progress, tick=None if workers > 1 else DEFAULT_TICK)
    try:
        bar.stage("counting", unit="B")  # total: the input files' sizes (compressed bytes for gzip)
        messages = iter_messages(sources, progress=bar.update)
        if workers == 1:
            builder = CountBuilder(memory_cap=memory_cap, order=order)
            builder.add_texts(messages)
        else:
            builder = count_in_processes(messages, workers, memory_cap=memory_cap, order=order)
        bar.stage("building the model file" if max_bytes is None else f"building and pruning to {max_bytes:,} bytes")
        return _finish(
            builder, output_path, lam=lam, min_count=min_count, max_vocab=max_vocab,
            skyband_k=skyband_k, skyband_min=skyband_min, t0=t0, max_bytes=max_bytes, prune_rule=prune_rule,
            order=order, smoothing=smoothing, lam3=lam3,
        )
    finally:
        bar.done()  # also on errors: the error message then starts on a clean line


def train_texts(
    texts: Iterable[str],
    output_path: str | os.PathLike[str],
    *,
    lam: float | None = None,
    min_count: int = DEFAULT_MIN_COUNT,
    max_vocab: int = DEFAULT_MAX_VOCAB,
    skyband_k: int = DEFAULT_SKYBAND_K,
    skyband_min: int = DEFAULT_SKYBAND_MIN,
    order: int = 2,
    smoothing: str = "jm",
    lam3: float = DEFAULT_LAMBDA,
) -> TrainReport:
    """Like :func:`train`, but from messages already in memory (consumed once)."""
    _check_kind(order, smoothing, lam, None)
    lam = _check_build_args(DEFAULT_LAMBDA if lam is None else lam, skyband_k, skyband_min)
    lam3 = _check_build_args(lam3, skyband_k, skyband_min)
    if isinstance(texts, str):
        raise InvalidArgumentError("train_texts() takes an iterable of messages, not one string")
    t0 = time.perf_counter()
    builder = CountBuilder(order=order)
    builder.add_texts(texts)
    return _finish(
        builder, output_path, lam=lam, min_count=min_count, max_vocab=max_vocab,
        skyband_k=skyband_k, skyband_min=skyband_min, t0=t0,
        order=order, smoothing=smoothing, lam3=lam3,
    )


def _discount(c: np.ndarray, d: Sequence[float]) -> np.ndarray:
    """D(c) per value: D1 for 1, D2 for 2, D3+ for 3 or more, 0 for 0 (as ``Discounts.of``)."""
    return np.where(c >= 3, d[2], np.where(c >= 2, d[1], np.where(c >= 1, d[0], 0.0)))


def _discount1(c: int, d: Sequence[float]) -> float:
    return 0.0 if c <= 0 else d[0] if c < 2 else d[1] if c < 3 else d[2]


class _NgramScorer:
    """Probabilities and exact top-k for Kneser-Ney (order 2, 3) and Jelinek-Mercer order 3.

    Every word's score has the interpolated shape

        P(w | u v) = α₃(u v w) + γ₃(u v) · [α₂(v w) + γ₂(v) · P₁(w)]

    (Kneser-Ney: α = max(a − D(a), 0)/total, γ = (D₁n₁ + D₂n₂ + D₃n₃)/total; JM: α = λ·c/total,
    γ = 1 − λ; an unseen context has α = 0, γ = 1). Ids rank by the floor P₁ (the file's
    unigram values, ties by key), so for a prefix range the exact top k lies among the k
    smallest ids of the range, the bigram successors of v in the range (the stored
    skyband when the segment is long) and every trigram successor of (u, v) in the range
    (docs/SEAMS.md). Each candidate is scored with the full formula, in the operation
    order of the oracles (``reference_kn.DictKneserNey.prob_key``), so results agree with
    them to the last bit.
    """

    def __init__(self, m: Model, a: dict[str, np.ndarray]) -> None:
        self.m = m
        self.kn = m.estimator == "kn"
        self.order = m.order
        unig = a["UNIG"].astype(np.int64)
        if self.kn:
            self.floor = unigram_floor(unig, m.discounts[0], m.total)
            self.d2, self.d3 = m.discounts[1], (m.discounts[2] if self.order == 3 else m.discounts[1])
            self._mv_hn13 = _native_view(a["HN13"])
        else:
            self.floor = unig / m.total
        if not bool(np.all((self.floor >= 0.0) & (self.floor <= 1.0 + 1e-9))):
            raise ModelFormatError(f"{m.path}: damaged model data: a unigram probability outside [0, 1]")
        self._floor_list: list[float] = self.floor.tolist()
        if self.order == 3:
            self._trow = _native_view(a["TROW"])
            self._tctu = _native_view(a["TCTU"])
            self._tcts = _native_view(a["TCTS"])
            self._tsuc_mv = _native_view(a["TSUC"])
            self._tval_mv = _native_view(a["TVAL"])
            self._ttot = _native_view(a["TTOT"])
            self._tsuc = a["TSUC"]
            self._tval = a["TVAL"]
            self._mv_tn13 = _native_view(a["TN13"]) if self.kn else None

    # -- per-context weights -------------------------------------------------------------

    def _gamma2(self, v: int, tot: int) -> float:
        h = self._mv_hn13
        d = self.d2
        return (d[0] * h[3 * v] + d[1] * h[3 * v + 1] + d[2] * h[3 * v + 2]) / tot  # type: ignore[no-any-return]

    def _gamma3(self, j: int, tot: int) -> float:
        h = self._mv_tn13
        assert h is not None
        d = self.d3
        return (d[0] * h[3 * j] + d[1] * h[3 * j + 1] + d[2] * h[3 * j + 2]) / tot  # type: ignore[no-any-return]

    def _context3(self, ctx: tuple[int, ...]) -> int:
        """Index of trigram context (u, v) in TCTU, or −1 (not stored, or a one-token context)."""
        if self.order != 3 or len(ctx) != 2:
            return -1
        u, v = ctx
        s, e = self._trow[v], self._trow[v + 1]
        i = bisect.bisect_left(self._tctu, u, s, e)
        return i if i < e and self._tctu[i] == u else -1

    def _damaged(self, what: str) -> ModelFormatError:
        return ModelFormatError(f"{self.m.path}: damaged model data: {what}")

    # -- one probability -------------------------------------------------------------------

    def prob(self, w: int, ctx: tuple[int, ...], lams: tuple[float, float]) -> float:
        m = self.m
        p = self._floor_list[w]
        v = ctx[-1]
        tot = m._hist(v)
        if tot > 0:
            c = m._pair_count(v, w)
            if c > tot:
                raise m._over(c, tot)
            if self.kn:
                p = max(c - _discount1(c, self.d2), 0.0) / tot + self._gamma2(v, tot) * p
            else:
                p = lams[0] * (c / tot) + (1.0 - lams[0]) * p
        j = self._context3(ctx)
        if j >= 0:
            tot3 = self._ttot[j]
            s, e = self._tcts[j], self._tcts[j + 1]
            pos = m._mv_apos[w]
            i = bisect.bisect_left(self._tsuc_mv, pos, s, e)
            c3 = self._tval_mv[i] if i < e and self._tsuc_mv[i] == pos else 0
            if c3 > tot3 or tot3 == 0:
                raise self._damaged(f"trigram value {c3} above its context total {tot3}")
            if self.kn:
                p = max(c3 - _discount1(c3, self.d3), 0.0) / tot3 + self._gamma3(j, tot3) * p
            else:
                p = lams[1] * (c3 / tot3) + (1.0 - lams[1]) * p
        if not 0.0 <= p <= 1.0 + 1e-9:
            raise self._damaged(f"a probability of {p!r}")
        return p  # type: ignore[no-any-return]

    # -- many probabilities ----------------------------------------------------------------

    def scores(self, ids: np.ndarray, ctx: tuple[int, ...], lams: tuple[float, float]) -> np.ndarray:
        """P(w | ctx) for every id in ``ids`` (same operations as :meth:`prob`)."""
        m = self.m
        p = self.floor[ids]
        pos = m._apos[ids].astype(np.int64)
        v = ctx[-1]
        tot = m._hist(v)
        if tot > 0:
            rs, re_ = m._mv_rows[v], m._mv_rows[v + 1]
            row = m._succ[rs:re_]
            at = np.searchsorted(row, pos.astype(row.dtype))  # same dtype: the row is not converted
            hit = at < len(row)
            hit[hit] = row[at[hit]] == pos[hit]
            c = np.zeros(len(ids), dtype=np.int64)
            if hit.any():
                c[hit] = m._counts(rs + at[hit])
                if int(c.max()) > tot:
                    raise m._over(int(c.max()), tot)
            if self.kn:
                p = np.maximum(c - _discount(c, self.d2), 0.0) / tot + self._gamma2(v, tot) * p
            else:
                p = lams[0] * (c / tot) + (1.0 - lams[0]) * p
        j = self._context3(ctx)
        if j >= 0:
            tot3 = self._ttot[j]
            s, e = self._tcts[j], self._tcts[j + 1]
            row = self._tsuc[s:e]
            at = np.searchsorted(row, pos.astype(row.dtype))
            hit = at < len(row)
            hit[hit] = row[at[hit]] == pos[hit]
            c = np.zeros(len(ids), dtype=np.int64)
            c[hit] = self._tval[s + at[hit]]
            if tot3 == 0 or (len(c) and int(c.max()) > tot3):
                raise self._damaged(f"a trigram value above its context total {tot3}")
            if self.kn:
                p = np.maximum(c - _discount(c, self.d3), 0.0) / tot3 + self._gamma3(j, tot3) * p
            else:
                p = lams[1] * (c / tot3) + (1.0 - lams[1]) * p
        if len(p) and not bool(np.all((p >= 0.0) & (p <= 1.0 + 1e-9))):
            raise self._damaged("a probability outside [0, 1]")
        return np.asarray(p, dtype=np.float64)

    def rank(self, ctx: tuple[int, ...], lo: int, hi: int, k: int, lams: tuple[float, float]) -> list[tuple[int, float]]:
        """Top-k (word id, probability) among alphabetical positions [lo, hi), ties by key."""
        m = self.m
        if not self.kn and (lams[0] == 1.0 or (self.order == 3 and lams[1] == 1.0)):
            # a zero floor: unseen words tie at 0 and rank by key, so score the whole range
            ids = m._alph[lo:hi].astype(np.int64)
        else:
            parts = [np.asarray(m._range_top_ids(lo, hi, k), dtype=np.int64)]
            v = ctx[-1]
            if m._hist(v) > 0:
                rs, re_ = m._mv_rows[v], m._mv_rows[v + 1]
                s = bisect.bisect_left(m._mv_succ, lo, rs, re_)
                e = bisect.bisect_left(m._mv_succ, hi, s, re_)
                if e > s:
                    band = m._segment_band(s, e, k) if e - s > m._sky_min and k <= m._sky_k else None
                    entries = np.asarray(band, dtype=np.int64) if band else np.arange(s, e)
                    parts.append(m._alph[m._succ[entries].astype(np.int64)].astype(np.int64))
            j = self._context3(ctx)
            if j >= 0:
                s3, e3 = self._tcts[j], self._tcts[j + 1]
                a3 = bisect.bisect_left(self._tsuc_mv, lo, s3, e3)
                b3 = bisect.bisect_left(self._tsuc_mv, hi, a3, e3)
                if b3 > a3:
                    parts.append(m._alph[self._tsuc[a3:b3].astype(np.int64)].astype(np.int64))
            seen = np.zeros(m.n_words + 3, dtype=bool)  # a set over the id space: sorted, no hashing
            for part in parts:
                seen[part] = True
            ids = np.flatnonzero(seen[: m.n_words])
        ids = ids[ids < m.n_words]
        if len(ids) == 0:
            return []
        score = self.scores(ids, ctx, lams)
        return Model._select(ids, m._apos[ids].astype(np.int64), score, k)
