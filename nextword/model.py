"""The read-only model: exact top-k next-word and completion queries, probabilities, perplexity.

P(w | v) = λ·c(v,w)/c(v) + (1−λ)·c(w)/N, where c(v) counts v as a history, so that the
probabilities of all words, ``</s>`` and ``<unk>`` after any history sum to 1. A history
never seen (c(v) = 0) falls back to the unigram c(w)/N.

Ranking is exact: the k words a call returns are the first k of *all* matching vocabulary
words ordered by (probability descending, then the smaller word id — the larger floor
c(w)/N or continuation unigram, then the key in code-point order; docs/SEAMS.md "Ties"). The
implementation only ever looks at a bounded candidate set (see :meth:`Model._rank`);
tests compare it with scoring every word.
"""

from __future__ import annotations

import bisect
import heapq
import math
import os
import sys
from typing import Any, Callable, Iterable, Iterator, NamedTuple, Sequence, cast

import numpy as np

from .codecs import EXACT, ValueView, codec_named
from .estimators import Level, unigram_floor
from .estimators.jm import jm_alpha, jm_gamma, jm_step
from .ngrams import NgramCounts
from .errors import InvalidArgumentError, ModelFormatError
from .candidates import CandidateRange, CandidateSource, NearMiss, PrefixRange, merge_ranked
from .keyboard import Channel
from .store import (
    BIGRAM_TAGS,
    COUNT_ESCAPE,
    MAX_LAMBDA,
    SUMMARY_MIN,
    TRIGRAM_TAGS,
    ModelArrays,
    read_model,
)
from .successors import PlainSparseTable, SparseTable, TrigramLists, native_view
from .text import BOS, EOS, UNK, fold, parse_typed, recase, sentences

__all__ = ["Model", "Suggestion", "load", "check_k", "check_lam"]

#: sections whose size grows with the number of stored pairs, and with the vocabulary (for ``info``)
_PAIR_SECTIONS = ("SUCC", "CNTS", "BIGI", "BIGC", "SEGS", "SEGE", "SKYP", "SKYI", "SKYC", "SEFH", "SEFB")
_VOCAB_SECTIONS = ("TKID", "IDTK", "ALPH", "APOS", "KEY4", "TOPK", "UNIG", "ROWS", "HIST", "DISI", "DISO", "RWEH", "RWEB")
#: how many of a context's best words bound the near-miss ranges (Model._context_top): the
#: stored skyband depth, so the list comes from the bands without scanning a segment
_BOUND_TOP = 8
#: near-miss ranges of at most this many words are scored word by word (Model._rank_near)
_TINY_RANGE = 4
# below this many successor candidates, plain Python beats numpy's per-call overhead
_SMALL = 80
#: a plain trigram row range longer than this is cut with numpy before the Python scoring (_NgramScorer;
#: a bigram range, longer than _SMALL)
_TRIM = 24
#: Contexts whose per-context sums _NgramScorer keeps (cleared when full).
_CTX_CACHE = 4096


class Suggestion(NamedTuple):
    """One suggested word: ``word`` as it should be shown, ``prob`` = P(word | context).

    A named tuple: immutable, and about five times cheaper to create than a frozen
    dataclass, which matters at several per keystroke.
    """

    word: str
    prob: float


def check_lam(lam: float) -> float:
    """``lam`` as a float if it is a number in [0, 1], else :class:`InvalidArgumentError` (a query's λ override)."""
    if isinstance(lam, bool) or not isinstance(lam, (int, float)) or not 0.0 <= lam <= 1.0:
        raise InvalidArgumentError(f"lam must be a number in [0, 1], got {lam!r}")
    return float(lam)


def check_k(k: int) -> int:
    """``k`` if it is an integer >= 1, else :class:`InvalidArgumentError` (how many suggestions a query returns)."""
    if isinstance(k, bool) or not isinstance(k, int) or k < 1:
        raise InvalidArgumentError(f"k must be an integer >= 1, got {k!r}")
    return k


_native_view = native_view  # a memoryview for fast scalar reads of a little-endian array


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
        #: version of the text rules the file was counted with (``text.TEXT_RULES``)
        self.text_rules: int = meta["text_rules"]
        # stored λ above MAX_LAMBDA (files written before the cap) are clamped, not refused:
        # λ = 1 would give every unseen pair probability 0; ``lambda_clamped`` says it happened
        stored = [float(meta["lambda"])]
        # λ by history count (optional): bucket i holds histories with bounds[i-1] <= c(v) < bounds[i]
        buckets = meta.get("lambda_buckets") or {}
        stored += [float(x) for x in buckets.get("lambdas", [])]
        self.lambda_clamped: bool = max(stored) > MAX_LAMBDA
        self.stored_lam: float = min(stored[0], MAX_LAMBDA)
        self.lam: float = self.stored_lam if lam is None else check_lam(lam)
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
        #: the bigram successor lists (any layout: docs/SEAMS.md, "The successor seam")
        self._s2 = arrays.succ2
        self._cnts = a["CNTS"]
        self._bigi = a["BIGI"]
        self._bigc = a["BIGC"]
        self._disb = arrays.raw["DISB"]
        mv = {k: _native_view(v) for k, v in a.items() if k not in ("CNTS",)}
        self._mv_tkid, self._mv_idtk = mv["TKID"], mv["IDTK"]
        self._mv_alph, self._mv_apos, self._mv_unig = mv["ALPH"], mv["APOS"], mv["UNIG"]
        self._mv_rows = mv["ROWS"]
        self._mv_skyc = mv["SKYC"]
        # c(v) per history: stored (pruned and n-gram files; a 1.6 file reads it coded), else derived from UNIG
        self._mv_hist: Any = mv.get("HIST", arrays.views.get("HIST"))
        self._mv_disi, self._mv_diso, self._mv_key4 = mv["DISI"], mv["DISO"], mv["KEY4"]
        self._mv_segs, self._mv_sege, self._mv_skyp = mv["SEGS"], mv["SEGE"], mv["SKYP"]
        self._mv_cnts = memoryview(np.ascontiguousarray(a["CNTS"])).cast("B")  # type: ignore[arg-type]
        self._mv_bigi, self._mv_bigc, self._mv_skyi = mv["BIGI"], mv["BIGC"], mv["SKYI"]
        self._apos = a["APOS"]
        # which words a query considers (docs/SEAMS.md, the candidate seam): exact prefixes today
        self._candidates = PrefixRange(
            trie=self._trie, idtk=self._mv_idtk, alph_view=self._mv_alph, key4=self._mv_key4,
            alph=self._alph, topk=a["TOPK"], n_words=n, max_key_chars=self._max_key,
        )
        # near-miss sources per typing channel (typo-tolerant queries), built on first use
        self._near: dict[Channel, NearMiss] = {}
        self._top_cache: dict[Any, tuple[list[tuple[str, float]], float]] = {}
        #: alphabetical positions [lo, hi) of the words starting with a folded prefix
        self._prefix_range: Callable[[str], tuple[int, int]] = self._candidates.span
        #: the k most frequent word ids of an alphabetical range (the ranking's lower bound)
        self._range_top_ids: Callable[[int, int, int], list[int]] = self._candidates.top_ids
        # a small cache of a pure function of the file; dict reads and writes are atomic,
        # so sharing a Model between threads stays safe
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
        #: how the file stores its n-gram values (docs/FORMAT.md §7.12, §7.17)
        self.codec = codec_named(self.path, meta["codec"]) if "codec" in meta else EXACT
        # a quantised file's bigram values come through its codec; exact ones are read in place
        self._vals2: ValueView | None = None if self.codec is EXACT else self.codec.decode(self.path, a, BIGRAM_TAGS, self.n_bigrams)
        # everything but the Jelinek-Mercer bigram goes through the general scorer (_NgramScorer);
        # a quantised JM bigram too when it has dropped mass (the JM bigram path has no γ term
        # for it); without, both paths compute the same floats (γ = 1 − λ exactly when r = 0)
        # a JM bigram with dropped mass (a pruned 1.5/1.6 file) needs γ = (1 − λ) + λ·r/T: the general path
        self._general = self.estimator != "jm" or self.order != 2 or ("HDRI" in a and len(a["HDRI"]) > 0)
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
        if self._vals2 is not None:
            return self._vals2.at(i)
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
        if self._vals2 is not None:
            return np.asarray(self._vals2.take(idx), dtype=np.int64)
        c = self._cnts[idx].astype(np.int64)
        if len(self._bigi) == 0:
            return c
        esc = np.flatnonzero(c == COUNT_ESCAPE)
        if len(esc):  # one binary search for all of them (BIGI is strictly increasing, FORMAT §7.8)
            at = np.asarray(idx, dtype=np.int64)[esc]
            where = np.minimum(np.searchsorted(self._bigi, at), len(self._bigi) - 1)
            found = np.asarray(self._bigi[where], dtype=np.int64) == at
            if not bool(found.all()):
                bad = int(at[np.flatnonzero(~found)[0]])
                raise ModelFormatError(f"{self.path}: escaped count without a value at entry {bad}")
            c[esc] = np.asarray(self._bigc[where], dtype=np.int64)
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
        i = self._s2.find(v, pos, rs, re_)
        if i >= 0:
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
        return jm_step(lam, c, cv, u)  # type: ignore[no-any-return]

    def prob(self, word: str, previous_word: str | None = None, *, lam: float | None = None) -> float:
        """P(word | previous_word). ``None`` or ``'<s>'`` means the sentence start.

        Words are case-insensitive. ``'</s>'`` asks for the end of the sentence; a word
        outside the vocabulary gets the probability of ``<unk>``, as in perplexity.
        """
        lam = None if lam is None else check_lam(lam)
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
        lam = None if lam is None else check_lam(lam)
        ctx = self._context_ids(history)
        if self._general:
            return self._ng.prob(self._predicted_id(word), ctx, self._ng_lams(lam))
        return self._prob_ids(ctx[-1], self._predicted_id(word), self._lam_of(ctx[-1], lam))

    def _context_ids(self, history: Sequence[str | None]) -> tuple[int, ...]:
        """Context ids of the last order−1 tokens, never reaching back across a sentence start."""
        if type(history) is not tuple and (isinstance(history, str) or not isinstance(history, Sequence)):
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
        lam = None if lam is None else check_lam(lam)
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

    def _rank(self, v: int, lo: int, hi: int, k: int, lam: float) -> list[tuple[int, float]]:
        """Top-k (word id, probability) in alphabetical positions [lo, hi) after history v.

        Candidates are (a) the k most frequent words of the range — every word that is
        not a successor of v scores (1−λ)·c(w)/N, so no other non-successor can beat them
        — and (b) the successors of v inside the range: the row segment found by binary
        search (rows are sorted by alphabetical position) or, when the segment has more
        than ``skyband_min`` entries, its stored k-skyband, which holds every successor
        that can reach the top k for any λ < 1 (see store._skyband). Ties go to the
        smaller id (higher floor, then key).
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
        s = self._s2.lower_bound(v, lo, rs, re_)
        e = self._s2.lower_bound(v, hi, s, re_)
        entries: Sequence[int] = range(s, e)
        if e - s > self._sky_min and k <= self._sky_k:
            entries = self._segment_band(s, e, k) or entries
        if len(entries) > _SMALL:
            return self._rank_many(v, entries, top, cv, lam, k)
        alph, apos = self._mv_alph, self._mv_apos
        vals = self._vals2
        if isinstance(entries, range):
            ps = self._s2.slice(v, s, e).tolist()
            cs = self._mv_cnts[s:e].tolist() if vals is None else vals.slice(s, e)
        else:
            ps = self._s2.take(v, np.asarray(entries, dtype=np.int64)).tolist()
            cs = [self._mv_cnts[i] for i in entries] if vals is None else [vals.at(i) for i in entries]
        if vals is None and COUNT_ESCAPE in cs:  # counts >= 255 are rare: replace them one by one
            j = cs.index(COUNT_ESCAPE)
            while True:
                cs[j] = self._count_at(entries[j])
                try:
                    j = cs.index(COUNT_ESCAPE, j + 1)
                except ValueError:
                    break
        if cs and max(cs) > cv:
            raise self._over(max(cs), cv)
        # estimators.jm.jm_step inlined in this hot loop (a call per candidate costs more than
        # the formula): the same float operations, in the same order, as every other path
        # and the brute-force oracle, which the ranking tests compare with ==
        # ties by id (floor descending, then key): see docs/SEAMS.md "Ties"
        cands = [(-(lam * (c / cv) + oml * (unig[w] / total)), w) for w, c in zip([alph[p] for p in ps], cs)]
        seen = set(ps)
        for wid in top:
            if apos[wid] not in seen:
                cands.append((-(oml * (unig[wid] / total)), wid))
        cands.sort()
        return [(w, -neg) for neg, w in cands[:k]]

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

    def _rank_many(self, v: int, entries: Sequence[int], top: list[int], cv: int, lam: float, k: int) -> list[tuple[int, float]]:
        """The vectorised version of the candidate scoring in :meth:`_rank`, for many successors."""
        if isinstance(entries, range):
            idx = np.arange(entries.start, entries.stop)
            pos = self._s2.slice(v, entries.start, entries.stop)
        else:
            idx = np.sort(np.asarray(entries, dtype=np.int64))  # skybands are stored by dominance
            pos = self._s2.take(v, idx)
        ids = self._alph[pos].astype(np.int64)
        total = self.total
        counts = self._counts(idx)
        if len(counts) and int(counts.max()) > cv:
            raise self._over(int(counts.max()), cv)
        score = jm_step(lam, counts, cv, self._unig[ids] / total)
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
        order = np.lexsort((ids, -score))[:k]  # ties by id: floor descending, then key
        return list(zip(ids[order].tolist(), score[order].tolist()))

    def _rank_bigram_only(self, v: int, lo: int, hi: int, k: int, cv: int) -> list[tuple[int, float]]:
        """λ = 1: successors by count, then zero-probability words by id (floor descending, then key)."""
        rs, re_ = self._mv_rows[v], self._mv_rows[v + 1]
        s = self._s2.lower_bound(v, lo, rs, re_)
        e = self._s2.lower_bound(v, hi, s, re_)
        pos = self._s2.slice(v, s, e)
        counts = self._counts(np.arange(s, e))
        if len(counts) and int(counts.max()) > cv:
            raise self._over(int(counts.max()), cv)
        ranked = self._select(self._alph[pos].astype(np.int64), pos, counts / cv, k)
        if len(ranked) < k:
            taken = set(pos.tolist())
            for wid in self._range_top_ids(lo, hi, k + len(taken)):
                if len(ranked) == k:
                    break
                if self._mv_apos[wid] not in taken:
                    ranked.append((wid, 0.0))
        return ranked

    @staticmethod
    def _check_typo(typo: Channel | None) -> None:
        if typo is not None and not isinstance(typo, Channel):
            raise InvalidArgumentError(f"typo must be a nextword.keyboard.Channel or None, got {type(typo).__name__}")

    def _source(self, typo: Channel | None) -> CandidateSource:
        """The candidate source of a query: exact prefixes, or near misses under ``typo``."""
        if typo is None:
            return self._candidates
        if not isinstance(typo, Channel):
            raise InvalidArgumentError(f"typo must be a nextword.keyboard.Channel or None, got {type(typo).__name__}")
        src = self._near.get(typo)
        if src is None:
            if len(self._near) > 16:
                self._near.clear()
            src = self._near[typo] = NearMiss(self._candidates, typo)
        return src

    def suggest(
        self, typed: str, k: int = 3, *, lam: float | None = None, typo: Channel | None = None
    ) -> list[Suggestion]:
        """The k words the user most likely wants at the cursor, best first.

        If ``typed`` ends inside a word, that partial word is completed
        (case-insensitively); otherwise the next word is predicted. The context is the
        last complete word of the same sentence (the sentence start if none, the unknown
        symbol right after a number or symbol). Suggestions are capitalised at a sentence
        start and after a capitalised prefix; an explicitly lowercase prefix stays lowercase.

        With ``typo`` (a :class:`~nextword.keyboard.Channel`) the partial word may hold
        slips of the finger: words are ranked by channel weight × probability over the
        prefixes that read as what was typed (:class:`~nextword.candidates.NearMiss`), and
        the scores are those products, no longer probabilities. Off by default: the exact
        prefix answer stays what it always was.
        """
        if not isinstance(typed, str):
            raise InvalidArgumentError(f"typed must be str, got {type(typed).__name__}")
        k = check_k(k)
        lam = None if lam is None else check_lam(lam)
        self._check_typo(typo)
        ctx = parse_typed(typed)
        if self._general:
            lams = self._ng_lams(lam)
            key = fold(ctx.prefix)
            if typo is None and not self._candidates.ranges(key):
                return []
            ids = self._context_ids(ctx.history)
            try:
                ranked = self._rank_typed(self._ng.rank, ids, key, typo, k, lams, None)
                at_start = ids[-1] == self._bos
                return [Suggestion(recase(self.display(i), ctx.prefix, at_start), p) for i, p in ranked]
            except (IndexError, ValueError, UnicodeDecodeError) as e:
                raise ModelFormatError(f"{self.path}: damaged model data: {e}") from None
        if ctx.previous == BOS:
            v = self._bos
        elif ctx.previous == UNK:
            v = self._unk
        else:
            wid = self._word_id(fold(ctx.previous))
            v = self._unk if wid is None else wid
        key = fold(ctx.prefix)
        rs = self._candidates.ranges(key) if typo is None else ()
        if typo is None and not rs:
            return []
        try:
            if typo is not None:
                ranked = self._rank_typed(self._rank, v, key, typo, k, self._lam_of(v, lam), self._prob_ids)
            elif len(rs) == 1 and rs[0][2] == 1.0:  # the exact prefix: one range, ranked directly
                ranked = self._rank(v, rs[0][0], rs[0][1], k, self._lam_of(v, lam))
            else:
                ranked = self._rank_ranges(self._rank, v, rs, k, self._lam_of(v, lam))
            at_start = v == self._bos
            shown = self._display_cache
            return [
                Suggestion(recase(shown.get(i) or self.display(i), ctx.prefix, at_start), p) for i, p in ranked
            ]
        except (IndexError, ValueError, UnicodeDecodeError) as e:
            raise ModelFormatError(f"{self.path}: damaged model data: {e}") from None

    def rank_ids(
        self, previous_word: str | None, prefix: str = "", k: int = 3, *, lam: float | None = None,
        typo: Channel | None = None,
    ) -> list[tuple[str, float]]:
        """(key, probability) of the top k after ``previous_word`` among words starting with ``prefix``.

        The raw ranking behind :meth:`suggest`, without text parsing or capitalisation;
        keys are the case-folded vocabulary keys.
        """
        k = check_k(k)
        lam = None if lam is None else check_lam(lam)
        self._check_typo(typo)
        if self._general:
            return self.rank_after((previous_word,), prefix, k, lam=lam, typo=typo)
        v = self._history_id(previous_word)
        try:
            ranked = self._rank_typed(self._rank, v, fold(prefix), typo, k, self._lam_of(v, lam), self._prob_ids)
            return [(self._key(i), p) for i, p in ranked]
        except (IndexError, ValueError) as e:
            raise ModelFormatError(f"{self.path}: damaged model data: {e}") from None

    def rank_after(
        self, history: Sequence[str | None], prefix: str = "", k: int = 3, *, lam: float | None = None,
        typo: Channel | None = None,
    ) -> list[tuple[str, float]]:
        """Like :meth:`rank_ids` with a context of tokens oldest first (see :meth:`prob_after`).

        With ``typo``, scores are channel weight × probability (see :meth:`suggest`).
        """
        k = check_k(k)
        lam = None if lam is None else check_lam(lam)
        self._check_typo(typo)
        ctx = self._context_ids(history)
        key = fold(prefix)
        try:
            if self._general:
                ranked = self._rank_typed(self._ng.rank, ctx, key, typo, k, self._ng_lams(lam), None)
            else:
                v = ctx[-1]
                ranked = self._rank_typed(self._rank, v, key, typo, k, self._lam_of(v, lam), self._prob_ids)
            return [(self._key(i), p) for i, p in ranked]
        except (IndexError, ValueError) as e:
            raise ModelFormatError(f"{self.path}: damaged model data: {e}") from None

    def _rank_ranges(
        self, rank: Callable[[Any, int, int, int, Any], list[tuple[int, float]]], context: Any,
        ranges: Sequence[CandidateRange], k: int, weights: Any,
    ) -> list[tuple[int, float]]:
        """Top-k (word id, score) over the candidate ranges: ``rank`` (exact within one range) per
        range, merged by channel weight × probability (:func:`~nextword.candidates.merge_ranked`).

        The exact prefix is one range of weight 1.0, ranked directly: scores stay probabilities.
        """
        if len(ranges) == 1:
            lo, hi, w = ranges[0]
            if w == 1.0:
                return rank(context, lo, hi, k, weights)
        per = [(w, rank(context, lo, hi, k, weights)) for lo, hi, w in ranges]
        return merge_ranked(per, k)

    def _rank_typed(
        self, rank: Callable[[Any, int, int, int, Any], list[tuple[int, float]]], context: Any, key: str,
        typo: Channel | None, k: int, weights: Any, score_of: Callable[[Any, int, Any], float] | None,
    ) -> list[tuple[int, float]]:
        """Top-k (word id, score) for the folded typed prefix ``key``: its exact prefix range,
        or (with ``typo``) the near-miss readings (:meth:`_rank_near`). ``score_of(context,
        id, weights)`` is the scorer's own P(word | context), the same value ``rank`` gives,
        when one word costs less than ranking a few (the Jelinek-Mercer bigram), else None."""
        if typo is None:
            rs = self._candidates.ranges(key)
            return self._rank_ranges(rank, context, rs, k, weights) if rs else []
        src = self._source(typo)
        assert isinstance(src, NearMiss)
        readings = src.prefix_weights(key) if key else [("", 1.0)]
        return self._rank_near(rank, context, readings, k, weights, score_of)

    def _rank_near(
        self, rank: Callable[[Any, int, int, int, Any], list[tuple[int, float]]], context: Any,
        readings: Sequence[tuple[str, float]], k: int, weights: Any, score_of: Callable[[Any, int, Any], float] | None,
    ) -> list[tuple[int, float]]:
        """Top k by channel weight × probability over the readings (intended prefix, weight),
        best weight first: each reading's range ranked exactly, merged by :func:`merge_ranked`.

        A reading is skipped when its weight × an upper bound of P(word | context) over its
        words is below the k-th score so far: none of them can enter the top k (strictly
        below, so not even a tie is lost). The bound comes from the context's top list over
        the whole vocabulary (its first _BOUND_TOP words, cached per context): the best of
        those that start with the reading's prefix, and the list's last probability for
        every other word. Ranges are looked up only for the readings actually ranked; a
        range of at most _TINY_RANGE words is scored word by word with ``score_of`` (the same
        value, without the ranking's set-up). The exact prefix alone (weight 1.0) is ranked
        directly: scores stay probabilities.
        """
        alph = self._mv_alph
        span = self._candidates.span
        if len(readings) == 1 and readings[0][1] == 1.0:
            lo, hi = span(readings[0][0])
            return rank(context, lo, hi, k, weights) if lo < hi else []
        per: list[tuple[float, list[tuple[int, float]]]] = []
        best: dict[int, float] = {}
        kth = -1.0
        top: tuple[list[tuple[str, float]], float] | None = None
        for p, w in readings:
            if len(best) >= k:
                if top is None:
                    top = self._context_top(rank, context, weights)
                listed, bound = top
                for word, prob in listed:
                    if prob > bound and word.startswith(p):
                        bound = prob
                if w * bound < kth:
                    continue
            lo, hi = span(p)
            if lo >= hi:
                continue
            if score_of is not None and hi - lo <= _TINY_RANGE:
                scored = sorted((-score_of(context, alph[pos], weights), alph[pos]) for pos in range(lo, hi))
                pairs = [(wid, -neg) for neg, wid in scored[:k]]
            else:
                pairs = rank(context, lo, hi, k, weights)
            per.append((w, pairs))
            raised = False
            for wid, prob in pairs:
                sc = w * prob
                if sc > best.get(wid, -1.0):
                    best[wid] = sc
                    raised = raised or sc > kth
            if raised and len(best) >= k:  # the k-th score only moves when a score above it came in
                kth = heapq.nlargest(k, best.values())[-1]
        return merge_ranked(per, k)

    def _context_top(
        self, rank: Callable[[Any, int, int, int, Any], list[tuple[int, float]]], context: Any, weights: Any
    ) -> tuple[list[tuple[str, float]], float]:
        """The context's best _BOUND_TOP words over the whole vocabulary as (key, probability),
        and the bound of every other word (the list's last probability; 0.0 when the list
        holds every word)."""
        cache_key = (context, weights)
        hit = self._top_cache.get(cache_key)
        if hit is None:
            top = rank(context, 0, self.n_words, _BOUND_TOP, weights)
            rest = top[-1][1] if len(top) == _BOUND_TOP else 0.0
            hit = ([(self._key(wid), p) for wid, p in top], rest)
            if len(self._top_cache) > 4096:
                self._top_cache.clear()
            self._top_cache[cache_key] = hit
        return hit

    def header(self) -> dict[str, Any]:
        """The file's metadata as plain data (a copy): estimator, order, λ or discounts, sizes."""
        import copy

        return copy.deepcopy(self._src.meta)

    # -- public accessors for the personal layer (nextword.personal) -------------------------
    # One block, so accessors other modules need can be merged beside it. The layer mixes
    # its own counts with this model's P(w | context) and ranks exactly with the model's
    # own exact top k (rank_after) as one candidate source; these give it the rest.

    def typo_prefixes(self, prefix: str, typo: Channel) -> list[tuple[str, float]]:
        """The vocabulary prefixes typed ``prefix`` may have meant under the channel ``typo``,
        with their channel weights, best first (:meth:`NearMiss.prefix_weights`; the exact
        prefix, when words start with it, weighs 1.0). What a layer ranking on top of
        this model needs to be typo-tolerant the same way."""
        if not isinstance(prefix, str):
            raise InvalidArgumentError(f"prefix must be str, got {type(prefix).__name__}")
        if not isinstance(typo, Channel):
            raise InvalidArgumentError(f"typo must be a nextword.keyboard.Channel, got {type(typo).__name__}")
        src = self._source(typo)
        assert isinstance(src, NearMiss)
        key = fold(prefix)
        if not key:
            return [("", 1.0)]
        return list(src.prefix_weights(key))

    def tie_rank(self, word: str) -> int:
        """Where ``word`` goes among words of equal probability: its id (floor descending, then key).

        ``n_words`` for a word the model lacks (after every vocabulary word). The ranking
        breaks ties by this number (docs/SEAMS.md "Ties"), so a layer that ranks on top of
        :meth:`rank_after` and must agree with it breaks its own ties the same way.
        """
        if not isinstance(word, str):
            raise InvalidArgumentError(f"word must be str, got {type(word).__name__}")
        wid = self._word_id(fold(word))
        return self.n_words if wid is None or wid >= self.n_words else wid

    def spelling(self, word: str) -> str | None:
        """The display spelling of vocabulary word ``word`` (any casing), or None if the model lacks it."""
        if not isinstance(word, str):
            raise InvalidArgumentError(f"word must be str, got {type(word).__name__}")
        wid = self._word_id(fold(word))
        return None if wid is None else self.display(wid)

    def probs_after(
        self, words: Sequence[str], history: Sequence[str | None], *, lam: float | None = None
    ) -> list[float]:
        """P(w | history) for each of ``words``: :meth:`prob_after` of each, bit for bit.

        The context is read once, so scoring a handful of candidates after one context
        (what the personal layer does per keystroke) costs one lookup per word.
        """
        if isinstance(words, str) or not isinstance(words, Sequence):
            raise InvalidArgumentError(f"words must be a sequence of words, got {type(words).__name__}")
        lam = None if lam is None else check_lam(lam)
        ctx = self._context_ids(history)
        ids = []
        for w in words:
            if not isinstance(w, str):
                raise InvalidArgumentError(f"words must be str, got {type(w).__name__}")
            ids.append(self._predicted_id(w))
        if self._general:
            lams = self._ng_lams(lam)
            if len(ids) >= 8 and max(ids) < self.n_words:  # the scorer's vector path: the same operations
                return self._ng.scores(np.asarray(ids, dtype=np.int64), ctx, lams).tolist()  # type: ignore[no-any-return]
            return [self._ng.prob(w, ctx, lams) for w in ids]
        v = ctx[-1]
        lam_v = self._lam_of(v, lam)
        return [self._prob_ids(v, w, lam_v) for w in ids]

    # -- end of the public accessors for the personal layer ------------------------------------
    # -- public accessors for export, tune and evaluation (h-wiring) ------------------------
    # What the commands outside the query layer need of a loaded file, so that no module
    # reads Model privates: the word keys, the stored n-gram values, the held-out text in
    # this file's ids, and the λ values a query uses.

    def word_keys(self) -> list[str]:
        """The case-folded key of every word id 0..n_words−1 (unique, never white space).

        One walk over the trie (its (key, key id) pairs), not a lookup per id: a third of the time.
        """
        keys: list[str] = [""] * self.n_words
        tkid = self._mv_tkid
        for key, kid in self._trie.items():
            wid = tkid[kid]
            if not 0 <= wid < self.n_words or keys[wid]:
                raise ModelFormatError(f"{self.path}: damaged model data: trie key {kid} maps to word id {wid}")
            keys[wid] = key
        if not all(keys):
            raise ModelFormatError(f"{self.path}: damaged model data: a word id has no trie key")
        return keys

    # -- public accessors for mixtures (nextword.mix): the same queries in this file's word ids ------
    # A mixture joins its parts' lists by id (maps between the parts' ids are built once),
    # so that a keystroke costs no key restoring or folding beyond the parts' own ranking.

    def rank_after_ids(self, history: Sequence[str | None], prefix: str = "", k: int = 3) -> list[tuple[int, float]]:
        """:meth:`rank_after` with this file's word ids instead of keys (the same ranking, the same floats)."""
        k = check_k(k)
        ctx = self._context_ids(history)
        rs = self._candidates.ranges(fold(prefix))
        if not rs:
            return []
        try:
            if self._general:
                return self._rank_ranges(self._ng.rank, ctx, rs, k, self._ng_lams(None))
            v = ctx[-1]
            return self._rank_ranges(self._rank, v, rs, k, self._lam_of(v, None))
        except (IndexError, ValueError) as e:
            raise ModelFormatError(f"{self.path}: damaged model data: {e}") from None

    def probs_of_ids(self, ids: Sequence[int], history: Sequence[str | None]) -> list[float]:
        """:meth:`probs_after` of word ids 0..n_words−1 of this file, bit for bit."""
        ctx = self._context_ids(history)
        n = self.n_words
        for w in ids:
            if isinstance(w, bool) or not isinstance(w, int) or not 0 <= w < n:
                raise InvalidArgumentError(f"word id must be an integer in [0, {n}), got {w!r}")
        if self._general:
            lams = self._ng_lams(None)
            if len(ids) >= 8:  # the scorer's vector path: the same operations
                return self._ng.scores(np.asarray(ids, dtype=np.int64), ctx, lams).tolist()  # type: ignore[no-any-return]
            return [self._ng.prob(w, ctx, lams) for w in ids]
        v = ctx[-1]
        lam_v = self._lam_of(v, None)
        return [self._prob_ids(v, w, lam_v) for w in ids]

    def key_of(self, wid: int) -> str:
        """The case-folded key of word id ``wid``."""
        if isinstance(wid, bool) or not isinstance(wid, int) or not 0 <= wid < self.n_words:
            raise InvalidArgumentError(f"word id must be an integer in [0, {self.n_words}), got {wid!r}")
        return self._key(wid)

    def stored_ngrams(self) -> NgramCounts:
        """Every stored n-gram of every order 1..order with its stored value, in this file's ids.

        Jelinek-Mercer: raw counts (a pruned file: the kept pairs, whose sums are the
        stored history counts); Kneser-Ney: the adjusted counts the file stores (raw at the
        highest order and after ``<s>``, continuation counts below). Fitting the file's
        estimator on these values (``Level.of``) gives back the model's probabilities.
        """
        a = self._src.arrays
        n = self.n_words
        unig = np.asarray(a["UNIG"], dtype=np.int64)
        w1 = np.flatnonzero(unig > 0)
        rows = np.asarray(a["ROWS"], dtype=np.int64)
        alph = np.asarray(a["ALPH"], dtype=np.int64)
        left = np.repeat(np.arange(n + 3, dtype=np.int64), np.diff(rows))
        right = alph[self._s2.all()]
        value2 = self._counts(np.arange(int(rows[-1])))
        o2 = np.lexsort((right, left))
        grams = [w1.reshape(-1, 1), np.stack([left[o2], right[o2]], axis=1)]
        values = [unig[w1], value2[o2]]
        if self.order == 3:
            u3, v3, w3, val3 = self._stored_trigrams(left, right)
            o3 = np.lexsort((w3, v3, u3))
            grams.append(np.stack([u3[o3], v3[o3], w3[o3]], axis=1))
            values.append(val3[o3])
        return NgramCounts(n, tuple(grams), tuple(values))

    def stored_levels(self) -> list[Level]:
        """What the file stores per order, in the estimator-neutral form (``estimators.Level``).

        The n-grams and values of :meth:`stored_ngrams`, and per context the *total* and the
        counts of values 1, 2, ≥ 3 exactly as queries read them (history counts — stored, or
        derived from the unigram counts —, the Kneser-Ney n₁/n₂/n₃₊ sections, the trigram
        totals), so a fitted estimator built on these levels scores as the model does even
        where a file's totals are not the sums of its stored values. A context with a total
        but no stored n-gram is kept, with an empty block.
        """
        a = self._src.arrays
        n = self.n_words
        counts = self.stored_ngrams()
        levels = [Level.of(counts.grams[0], counts.counts[0])]
        hist = np.asarray([self._hist(v) for v in range(n + 3)], dtype=np.int64)
        g2, v2 = counts.grams[1], counts.counts[1]
        ctx2 = np.flatnonzero(hist > 0)
        start2 = np.searchsorted(g2[:, 0], np.append(ctx2, n + 3), side="left").astype(np.int64)
        hn13 = a["HN13"] if "HN13" in a else (self._src.views["HN13"].all() if self.estimator == "kn" else None)
        n123 = (np.asarray(hn13, dtype=np.int64).reshape(-1, 3)[ctx2] if self.estimator == "kn"
                else _n123_of(v2, start2))
        levels.append(Level(g2, v2, ctx2.reshape(-1, 1), start2, hist[ctx2], n123))
        if self.order == 3:
            g3, v3 = counts.grams[2], counts.counts[2]
            base = n + 3
            keys = g3[:, 0] * base + g3[:, 1]
            starts = np.flatnonzero(np.r_[True, keys[1:] != keys[:-1]]) if len(keys) else np.zeros(0, np.int64)
            ctx3 = g3[starts, :2] if len(keys) else np.zeros((0, 2), np.int64)
            start3 = np.append(starts, len(keys)).astype(np.int64)
            sums = np.add.reduceat(v3, starts) if len(keys) else np.zeros(0, np.int64)
            # dropped mass per context (TDRI/TDRV, keyed by the context's bigram entry)
            ent = self._bigram_entries(ctx3[:, 0], ctx3[:, 1])
            assert self._src.dropped3 is not None  # an order-3 file has the table (checked on load)
            tdri, tdrv = self._src.dropped3.all()
            dropped = np.zeros(len(ent), dtype=np.int64)
            if len(tdri):  # the sorted sparse table, looked up for every context at once
                at = np.minimum(np.searchsorted(tdri, ent), len(tdri) - 1)
                hit = tdri[at] == ent
                dropped[hit] = tdrv[at[hit]]
            levels.append(Level(g3, v3, ctx3, start3, (sums + dropped).astype(np.int64), _n123_of(v3, start3)))
        return levels

    def _bigram_entries(self, u: np.ndarray, v: np.ndarray) -> np.ndarray:
        """Index of bigram entry (u, v) in the rows for each pair (every pair stored)."""
        rows = np.asarray(self._src.arrays["ROWS"], dtype=np.int64)
        npos = self.n_words + 3
        left = np.repeat(np.arange(npos, dtype=np.int64), np.diff(rows))
        keys = left * npos + self._s2.all()  # increasing: rows by u, then position
        out = np.searchsorted(keys, np.asarray(u, dtype=np.int64) * npos + self._apos[v].astype(np.int64))
        return np.asarray(out, dtype=np.int64)

    def _stored_trigrams(self, left: np.ndarray, right: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """(u, v, w, value) of every stored trigram; ``left``/``right`` are the bigram entries' ids in file order."""
        ng = self._ng
        lens = ng.lists().lengths()
        owner = np.repeat(np.arange(len(lens), dtype=np.int64), lens)
        alph = np.asarray(self._src.arrays["ALPH"], dtype=np.int64)
        w = alph[ng.lists().all()]
        return left[owner], right[owner], w, np.asarray(ng._tval.all(), dtype=np.int64)

    def totals_are_sums(self) -> bool:
        """Whether every context's total is the sum of its stored n-grams' values.

        True for every file ``train`` writes; false where a pruned file keeps the mass of
        dropped n-grams in its totals — then the raw counts cannot be rebuilt from it.
        """
        for lev in self.stored_levels()[1:]:
            if bool((lev.ctx_start[1:] == lev.ctx_start[:-1]).any()):
                return False
            sums = np.add.reduceat(lev.value, lev.ctx_start[:-1]) if len(lev.value) else np.zeros(0, np.int64)
            if not np.array_equal(sums, lev.ctx_total):
                return False
        return True

    def sentence_ids(self, lines: Iterable[str]) -> list[list[int]]:
        """Every sentence of ``lines`` as ids (words; ``<unk>`` for unknown words and breaks), cut as in training.

        The input :func:`nextword.tune.order_events` takes; ``<s>`` and ``</s>`` are not included.
        """
        if isinstance(lines, str):
            raise InvalidArgumentError("expected an iterable of messages, not one string")
        out: list[list[int]] = []
        for line in lines:
            for sent in sentences(line):
                ids = []
                for tok in sent:
                    wid = None if tok is None else self._word_id(fold(tok))
                    ids.append(self._unk if wid is None else wid)
                out.append(ids)
        return out

    def query_lambdas(self, lam: float | None = None) -> list[float]:
        """[λ2] or [λ2, λ3] as a query uses them (a load-time or ``lam`` override replaces every
        order's); empty for Kneser-Ney. λ by history count, if stored, is :meth:`lam_for`."""
        if self.estimator == "kn":
            if lam is not None:
                raise InvalidArgumentError(f"lam={lam!r} given for a Kneser-Ney model, which has no λ")
            return []
        lam = None if lam is None else check_lam(lam)
        if self.order == 2:
            return [self.lam if lam is None else lam]
        return list(self._ng_lams(lam))

    def uses_lambda_buckets(self) -> bool:
        """Whether queries take λ from the stored buckets by history count (not overridden)."""
        return bool(self.lambda_values) and not self._override

    def info(self) -> dict[str, Any]:
        """Sizes, settings and corpus statistics, as plain data (for ``nextword info``)."""
        a = self._src.section_bytes  # what the file holds (a 1.6 file's decoded arrays are not in it)
        bigram_bytes = sum(a.get(s, 0) for s in ("SUCC", "CNTS", "BIGI", "BIGC", "ROWS", "SEGS", "SEGE", "SKYP", "SKYI", "SKYC",
                                                  "SEFH", "SEFB", "RWEH", "RWEB"))
        # the file split into what grows with the pairs and what grows with the vocabulary
        # (trie, permutations, key heads, top lists, unigram/history counts, row offsets,
        # spellings); the rest is header, section table, metadata and padding
        pair_bytes = sum(a.get(s, 0) for s in _PAIR_SECTIONS)
        vocab_bytes = sum(a.get(s, 0) for s in _VOCAB_SECTIONS) + a["TRIE"] + a["DISB"]
        # Kneser-Ney context counts, context totals and the trigram sections (format 1.4)
        ngram_bytes = sum(v for s, v in a.items() if s not in _PAIR_SECTIONS and s not in _VOCAB_SECTIONS
                          and s not in ("META", "TRIE", "DISB"))
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
            **({"estimator": self.estimator, "order": self.order} if self._general or self._vals2 is not None else {}),
            **({"codec": self.codec.meta()} if self.codec is not EXACT else {}),
            **({"successors": dict(self._src.meta["successors"])} if "successors" in self._src.meta else {}),
            **({"discounts": self.discounts, "discount_notes": self.discount_notes} if self.estimator == "kn" else {}),
            **({"lambda3": self.stored_lam3} if self.stored_lam3 is not None else {}),
            **({"trigrams": self._src.meta["trigrams"]} if self.order == 3 else {}),
            "corpus": self.stats,
        }


def _best(score: np.ndarray, ids: np.ndarray, k: int) -> np.ndarray:
    """Indices of the k best entries by (score descending, id ascending), in that order.

    ``np.lexsort((ids, -score))[:k]``, without sorting a long array whole: a partition
    finds the k-th score, every entry at or above it (ties included) is sorted. The same
    indices in the same order (tests/test_model_trigram.py ranks against brute force).
    """
    n = len(score)
    if n <= 4 * k or n <= 256:
        return np.lexsort((ids, -score))[:k]
    kth = -np.partition(-score, k - 1)[k - 1]
    cand = np.flatnonzero(score >= kth)
    return cand[np.lexsort((ids[cand], -score[cand]))][:k]


def _n123_of(value: np.ndarray, start: np.ndarray) -> np.ndarray:
    """(contexts, 3): how many of each context's values (blocks ``start[j]:start[j+1]``) are 1, 2 and ≥ 3."""
    owner = np.repeat(np.arange(len(start) - 1), np.diff(start))
    out = np.zeros((len(start) - 1, 3), dtype=np.int64)
    for j, mask in enumerate((value == 1, value == 2, value >= 3)):
        out[:, j] = np.bincount(owner[mask], minlength=len(start) - 1)
    return out


# -- loading ---------------------------------------------------------------------


def load(path: str | os.PathLike[str], *, lam: float | None = None, verify: bool = False) -> Model:
    """Open a model file (memory-mapped). ``lam`` overrides the stored λ for every query.

    ``verify=True`` reads and checks the whole file (checksums of every section and every
    entry); without it only the header, metadata, trie and vocabulary-sized arrays are
    checked, which keeps opening fast whatever the model size.
    """
    if lam is not None:
        check_lam(lam)
    return Model(read_model(path, verify=verify), lam=lam)


def _discount(c: np.ndarray, d: Sequence[float]) -> np.ndarray:
    """D(c) per value: D1 for 1, D2 for 2, D3+ for 3 or more, 0 for 0 (as ``Discounts.of``)."""
    return np.asarray([0.0, d[0], d[1], d[2]])[np.minimum(c, 3)]  # type: ignore[no-any-return]


def _discount1(c: int, d: Sequence[float]) -> float:
    return 0.0 if c <= 0 else d[0] if c < 2 else d[1] if c < 3 else d[2]


class _NgramScorer:
    """Probabilities and exact top-k for Kneser-Ney (order 2, 3) and Jelinek-Mercer order 3.

    Every word's score has the interpolated shape

        P(w | u v) = α₃(u v w) + γ₃(u v) · B(v, w),   B(v, w) = α₂(v w) + γ₂(v) · P₁(w)

    (:func:`nextword.store.level_mix`; an unseen context has α = 0, γ = 1). Ids rank by
    the floor P₁, so for a prefix range the exact top k lies among the k smallest ids of
    the range, the bigram successors of v in the range (their stored skyband when the
    segment is long) and the trigram successors of (u, v) in the range (their stored
    skyband under dominance on (trigram value, B) when the segment is long); see
    docs/SEAMS.md. A query scores those few candidates with Python floats (memoryviews
    and bisect), or with numpy when there are many, in the operation order of the
    oracles (``reference_kn.DictKneserNey.prob_key``), so results agree with them to the
    last bit. Stored values come through the file's codec (:mod:`nextword.codecs`).
    """

    def __init__(self, m: Model, a: dict[str, np.ndarray]) -> None:
        self.m = m
        self.kn = m.estimator == "kn"
        self.order = m.order
        meta = m._src.meta
        self.codec = codec_named(m.path, meta.get("codec"))
        unig = a["UNIG"].astype(np.int64)
        if self.kn:
            self.floor = unigram_floor(unig, m.discounts[0], m.total)
            self.d2, self.d3 = m.discounts[1], (m.discounts[2] if self.order == 3 else m.discounts[1])
            self._mv_hn13: Any = _native_view(a["HN13"]) if "HN13" in a else m._src.views["HN13"]
        else:
            self.floor = unig / m.total
        if not bool(np.all((self.floor >= 0.0) & (self.floor <= 1.0 + 1e-9))):
            raise ModelFormatError(f"{m.path}: damaged model data: a unigram probability outside [0, 1]")
        self._floor_list: list[float] = self.floor.tolist()
        self._dropped2 = PlainSparseTable(a["HDRI"], a["HDRV"])  # vocabulary-sized: decoded in every layout
        self._ctx_cache: dict[tuple[tuple[int, ...], tuple[float, float]], tuple[int, float, int, int, int, int, float]] = {}
        # the trigram skybands hold for the stored parameters (KN: always; JM: stored λs, λ₃ > 0)
        self._band_lams = (m.stored_lam, m.stored_lam3) if not self.kn else None
        # the trigram successor lists (None below order 3, where no code path reads them)
        self._s3: TrigramLists = cast(TrigramLists, m._src.succ3)
        if self.order == 3:
            self._t = int(meta["trigrams"])
            self._tsky_min: int = meta["trigram_skyband_min"]
            self._tval = self.codec.decode(m.path, a, TRIGRAM_TAGS, self._t)
            self._tlni, self._tlnv = _native_view(a["TLNI"]), _native_view(a["TLNV"])
            assert m._src.dropped3 is not None  # an order-3 file has the table (checked on load)
            self._dropped3: SparseTable = m._src.dropped3
            self._tsgs, self._tsge = _native_view(a["TSGS"]), _native_view(a["TSGE"])
            self._tskp, self._tski, self._tskc = _native_view(a["TSKP"]), _native_view(a["TSKI"]), _native_view(a["TSKC"])

    def _damaged(self, what: str) -> ModelFormatError:
        return ModelFormatError(f"{self.m.path}: damaged model data: {what}")

    # -- per-context weights -------------------------------------------------------------

    def _level2(self, v: int, lam2: float) -> tuple[int, float]:
        """(T, γ₂) of bigram context v (T = 0: never a context, γ₂ = 1)."""
        tot = self.m._hist(v)
        if tot <= 0:
            return 0, 1.0
        dropped = self._dropped2.get(v)
        if dropped > tot:
            raise self._damaged(f"dropped mass {dropped} above its context total {tot}")
        if self.kn:
            h, d = self._mv_hn13, self.d2
            return tot, (dropped + d[0] * h[3 * v] + d[1] * h[3 * v + 1] + d[2] * h[3 * v + 2]) / tot
        return tot, jm_gamma(lam2, dropped, tot)

    def _context3(self, ctx: tuple[int, ...]) -> int:
        """The bigram entry (u, v) of trigram context (u, v), or −1 (not a context, or a one-token context)."""
        if self.order != 3 or len(ctx) != 2:
            return -1
        m = self.m
        u, v = ctx
        rs, re_ = m._mv_rows[u], m._mv_rows[u + 1]
        pos = m._mv_apos[v]
        i = m._s2.find(u, pos, rs, re_)
        if i < 0:
            return -1
        s, e = self._s3.span(i)
        return i if e > s else -1

    def lists(self) -> TrigramLists:
        """The trigram successor lists (any layout)."""
        return self._s3

    def _rows3(self, i: int) -> tuple[int, int]:
        """Row entries [s, e) of the trigram context at bigram entry i (checked: a damaged length never escapes)."""
        s, e = self._s3.span(i)
        if not 0 <= s < e <= self._t:
            raise self._damaged(f"trigram context {i} has entries [{s}, {e})")
        return s, e

    def _level3(self, j: int, s: int, e: int, lam3: float) -> tuple[int, float]:
        """(T, γ₃) of trigram context j with entries [s, e): its sums read from the row or TLNV."""
        if e - s > SUMMARY_MIN:
            i = bisect.bisect_left(self._tlni, j)
            if i >= len(self._tlni) or self._tlni[i] != j:
                raise self._damaged(f"trigram context {j} has no stored summary")
            sm, n1, n2, n3 = (self._tlnv[4 * i + x] for x in range(4))
            if n1 + n2 + n3 != e - s or sm < e - s:
                raise self._damaged(f"trigram context {j} has a summary that does not fit its row")
        else:
            vals = self._tval.slice(s, e)
            sm, n1, n2 = sum(vals), vals.count(1), vals.count(2)
            n3 = len(vals) - n1 - n2
        tot = sm + self._dropped3.get(j)
        if tot <= 0:
            raise self._damaged(f"trigram context {j} has a total of {tot}")
        if self.kn:
            d = self.d3
            return tot, (tot - sm + d[0] * n1 + d[1] * n2 + d[2] * n3) / tot
        return tot, jm_gamma(lam3, tot - sm, tot)

    # -- one probability -------------------------------------------------------------------

    def prob(self, w: int, ctx: tuple[int, ...], lams: tuple[float, float]) -> float:
        m = self.m
        p = self._floor_list[w]
        v = ctx[-1]
        tot, g = self._level2(v, lams[0])
        if tot > 0:
            c = m._pair_count(v, w)
            if c > tot:
                raise m._over(c, tot)
            p = self._alpha(c, tot, self.d2 if self.kn else lams[0]) + g * p
        j = self._context3(ctx)
        if j >= 0:
            s, e = self._rows3(j)
            tot3, g3 = self._level3(j, s, e, lams[1])
            pos = m._mv_apos[w]
            i = self._s3.lower_bound(j, v, pos, s, e)
            c3 = self._tval.at(i) if i < e and self._s3.at(j, v, i) == pos else 0
            if c3 > tot3:
                raise self._damaged(f"trigram value {c3} above its context total {tot3}")
            p = self._alpha(c3, tot3, self.d3 if self.kn else lams[1]) + g3 * p
        if not 0.0 <= p <= 1.0 + 1e-9:
            raise self._damaged(f"a probability of {p!r}")
        return p  # type: ignore[no-any-return]

    def _alpha(self, c: int, tot: int, param: Any) -> float:
        if self.kn:
            return max(c - _discount1(c, param), 0.0) / tot
        return jm_alpha(param, c, tot)  # type: ignore[no-any-return]

    # -- many probabilities ----------------------------------------------------------------

    def scores(self, ids: np.ndarray, ctx: tuple[int, ...], lams: tuple[float, float]) -> np.ndarray:
        """P(w | ctx) for every id in ``ids`` (same operations as :meth:`prob`)."""
        m = self.m
        p = self.floor[ids]
        pos = m._apos[ids].astype(np.int64)
        v = ctx[-1]
        tot, g = self._level2(v, lams[0])
        if tot > 0:
            rs, re_ = m._mv_rows[v], m._mv_rows[v + 1]
            row = m._s2.slice(v, rs, re_)
            at = np.searchsorted(row, pos)
            hit = at < len(row)
            hit[hit] = row[at[hit]] == pos[hit]
            c = np.zeros(len(ids), dtype=np.int64)
            if hit.any():
                c[hit] = m._counts(rs + at[hit])
                if int(c.max()) > tot:
                    raise m._over(int(c.max()), tot)
            if self.kn:
                p = np.maximum(c - _discount(c, self.d2), 0.0) / tot + g * p
            else:
                p = lams[0] * (c / tot) + g * p
        j = self._context3(ctx)
        if j >= 0:
            s, e = self._rows3(j)
            tot3, g3 = self._level3(j, s, e, lams[1])
            row = self._s3.slice(j, v, s, e)
            at = np.searchsorted(row, pos)
            hit = at < len(row)
            hit[hit] = row[at[hit]] == pos[hit]
            c = np.zeros(len(ids), dtype=np.int64)
            c[hit] = self._tval.take(s + at[hit])
            if len(c) and int(c.max()) > tot3:
                raise self._damaged(f"a trigram value above its context total {tot3}")
            if self.kn:
                p = np.maximum(c - _discount(c, self.d3), 0.0) / tot3 + g3 * p
            else:
                p = lams[1] * (c / tot3) + g3 * p
        if len(p) and not bool(np.all((p >= 0.0) & (p <= 1.0 + 1e-9))):
            raise self._damaged("a probability outside [0, 1]")
        return np.asarray(p, dtype=np.float64)

    # -- ranking ---------------------------------------------------------------------------

    def _band3(self, s: int, e: int, k: int) -> list[int] | None:
        """Entries of trigram segment [s, e) with fewer than k dominators, if its skyband is stored."""
        segs, sege = self._tsgs, self._tsge
        i = bisect.bisect_left(segs, s)
        while i < len(segs) and segs[i] == s:
            if sege[i] == e:
                start, stop = self._tskp[i], self._tskp[i + 1]
                stop = min(start + self._tskc[i * self.m._sky_k + k - 1], stop)
                offs = self._tski[start:stop].tolist()
                if offs and max(offs) >= e - s:
                    raise self._damaged(f"trigram skyband {i} points outside its segment")
                return [s + o for o in offs]
            i += 1
        return None

    def _context_state(self, ctx: tuple[int, ...], lams: tuple[float, float]) -> tuple[int, float, int, int, int, int, float]:
        """(T, γ₂, trigram context j or −1, its entries [s, e), T₃, γ₃) of a context, checked, and cached.

        A keyboard asks about one context again and again while a word is typed (each
        letter is a new prefix), so these per-context sums are kept (a bounded dict; the
        file is read-only, so an entry never goes stale).
        """
        tot, g = self._level2(ctx[-1], lams[0])
        j = self._context3(ctx)
        s3 = e3 = tot3 = 0
        g3 = 1.0
        if j >= 0:
            s3, e3 = self._rows3(j)
            tot3, g3 = self._level3(j, s3, e3, lams[1])
        state = (tot, g, j, s3, e3, tot3, g3)
        if len(self._ctx_cache) >= _CTX_CACHE:
            self._ctx_cache.clear()
        self._ctx_cache[ctx, lams] = state
        return state

    def rank(self, ctx: tuple[int, ...], lo: int, hi: int, k: int, lams: tuple[float, float]) -> list[tuple[int, float]]:
        """Top-k (word id, probability) among alphabetical positions [lo, hi), ties by the smaller id."""
        m = self.m
        if not self.kn and (lams[0] == 1.0 or (self.order == 3 and lams[1] == 1.0)):
            # a zero floor: unseen words tie at 0 and rank by id, so score the whole range
            return self._rank_numpy(m._alph[lo:hi].astype(np.int64), ctx, k, lams)
        top = m._range_top_ids(lo, hi, k)
        v = ctx[-1]
        state = self._ctx_cache.get((ctx, lams))
        if state is None:
            state = self._context_state(ctx, lams)
        tot, g, j, s3, e3, tot3, g3 = state
        b_idx: Sequence[int] = ()
        b_full = True  # b_idx holds every bigram successor in the range
        if tot > 0:
            rs, re_ = m._mv_rows[v], m._mv_rows[v + 1]
            s = m._s2.lower_bound(v, lo, rs, re_)
            e = m._s2.lower_bound(v, hi, s, re_)
            b_idx = range(s, e)
            if e - s > m._sky_min and k <= m._sky_k:
                band = m._segment_band(s, e, k)
                if band is not None:
                    b_idx, b_full = band, False
        t_idx: Sequence[int] = ()
        if j >= 0:
            a3 = self._s3.lower_bound(j, v, lo, s3, e3)
            b3 = self._s3.lower_bound(j, v, hi, a3, e3)
            t_idx = range(a3, b3)
            if b3 - a3 > self._tsky_min and k <= m._sky_k and (self.kn or (lams == self._band_lams and lams[1] > 0.0)):
                band3 = self._band3(a3, b3, k)
                if band3 is not None:
                    t_idx = band3
        # Score the candidates with Python floats. Only the words that can be in the top k
        # need their exact score: a trigram candidate (in c3) gets its exact B (its bigram
        # value looked up if the bigram side was cut); every other candidate is scored from
        # the values at hand, α₃ = 0 unless in c3, α₂ = 0 unless its B was computed. A word
        # scored too low that way is a successor left out of a band or a cut, so k exactly
        # scored candidates rank before it anyway (docs/SEAMS.md), and the top k is exact.
        # A word outside c3 scores γ₃·B, so of those only the k best by (B, id) are kept.
        s2, s3l = m._s2, self._s3
        apos, alph, fl = m._mv_apos, m._mv_alph, self._floor_list
        kn = self.kn
        # D(c) by min(c, 3): the same floats as _discount1, without a call per candidate
        dk2: Sequence[float] = (0.0, *self.d2) if kn else ()
        dk3: Sequence[float] = (0.0, *self.d3) if kn else ()
        l2, l3 = lams
        c3: dict[int, int] = {}
        if len(t_idx):
            if isinstance(t_idx, range) and len(t_idx) > _TRIM:
                c3 = self._trim_trigrams(j, t_idx, v, tot, g, tot3, g3, k, lams)
            elif isinstance(t_idx, range):
                c3 = dict(zip(s3l.slice(j, v, t_idx.start, t_idx.stop).tolist(), self._tval.slice(t_idx.start, t_idx.stop)))
            else:
                c3 = {s3l.at(j, v, i): self._tval.at(i) for i in t_idx}
            if max(c3.values()) > tot3:
                raise self._damaged(f"a trigram value above its context total {tot3}")
        # B(v, x) of the bigram candidates, by position
        bs: dict[int, float] = {}
        if len(b_idx):
            if isinstance(b_idx, range) and len(b_idx) > _SMALL:
                c2, b_full = self._trim_bigrams(v, b_idx, tot, g, k + len(c3), lams[0]), False
                ps, cs = list(c2), list(c2.values())
            elif m._vals2 is not None:  # a quantised file: decoded through its codebook
                ps = (s2.take(v, np.asarray(b_idx, dtype=np.int64)) if not isinstance(b_idx, range) else s2.slice(v, b_idx.start, b_idx.stop)).tolist()
                cs = [m._vals2.at(i) for i in b_idx] if not isinstance(b_idx, range) else m._vals2.slice(b_idx.start, b_idx.stop)
            elif isinstance(b_idx, range):
                ps = s2.slice(v, b_idx.start, b_idx.stop).tolist()
                cs = m._mv_cnts[b_idx.start : b_idx.stop].tolist()
                if COUNT_ESCAPE in cs:
                    cs = [m._count_at(b_idx.start + x) if c == COUNT_ESCAPE else c for x, c in enumerate(cs)]
            else:
                cn = m._mv_cnts
                ps = s2.take(v, np.asarray(b_idx, dtype=np.int64)).tolist()
                cs = [cn[i] for i in b_idx]
                if COUNT_ESCAPE in cs:
                    cs = [m._count_at(i) if c == COUNT_ESCAPE else c for i, c in zip(b_idx, cs)]
            if max(cs) > tot:
                raise m._over(max(cs), tot)
            if kn:
                # α₂ = max(c − D(c), 0)/T: a table for c < 3; c − D₃₊ ≥ 0 for c ≥ 3 (D₃₊ ≤ 3, checked on
                # load), so max() is the identity there: the same floats as scores() and the oracle
                d3 = dk2[3]
                a2 = [max(c - dk2[c], 0.0) / tot for c in range(3)]
                bs = {p: ((c - d3) / tot if c >= 3 else a2[c]) + g * fl[alph[p]] for p, c in zip(ps, cs)}
            else:
                bs = {p: l2 * (c / tot) + g * fl[alph[p]] for p, c in zip(ps, cs)}
        rest = [(-b, alph[p]) for p, b in bs.items() if p not in c3]
        for w in top:
            p = apos[w]
            if p not in bs and p not in c3:
                rest.append((-(g * fl[w]) if tot > 0 else -fl[w], w))
        if j < 0:
            scored = rest
        else:
            rest.sort()
            scored = [(-(g3 * -nb), w) for nb, w in rest[:k]]
            for p, c in c3.items():
                w = alph[p]
                b = bs.get(p)
                if b is None:
                    if tot > 0:
                        c2v = 0
                        if not b_full:
                            i = s2.find(v, p, rs, re_)
                            if i >= 0:
                                c2v = m._count_at(i)
                        if c2v > tot:
                            raise m._over(c2v, tot)
                        b = (max(c2v - dk2[c2v if c2v < 3 else 3], 0.0) / tot if kn else l2 * (c2v / tot)) + g * fl[w]
                    else:
                        b = fl[w]
                scored.append((-((max(c - dk3[c if c < 3 else 3], 0.0) / tot3 if kn else l3 * (c / tot3)) + g3 * b), w))
        scored.sort()  # ties by id (floor descending, then key): docs/SEAMS.md "Ties"
        out = [(w, -neg) for neg, w in scored[:k]]
        for _, q in out:
            if not 0.0 <= q <= 1.0 + 1e-9:
                raise self._damaged(f"a probability of {q!r}")
        return out

    def _trim_trigrams(
        self, j: int, t_idx: range, v: int, tot: int, g: float, tot3: int, g3: float, k: int, lams: tuple[float, float]
    ) -> dict[int, int]:
        """Position → value of the k best trigram successors in ``t_idx`` by their full score.

        A trigram successor outside them has k successors of the same context ranking
        before it (score descending, id ascending), so it is not in the top k. The
        scores are those of :meth:`scores`, computed with numpy for the whole range.
        """
        m = self.m
        s, e = t_idx.start, t_idx.stop
        tpos = self._s3.slice(j, v, s, e)
        c3 = self._tval.take(np.arange(s, e))
        if int(c3.max()) > tot3:
            raise self._damaged(f"a trigram value above its context total {tot3}")
        tids = m._alph[tpos].astype(np.int64)
        b = self.floor[tids]
        if tot > 0:
            ent = self._s3.bigram_entries(j, v, s, e)
            hit = np.flatnonzero(ent >= 0)
            c2 = np.zeros(len(tpos), dtype=np.int64)
            if len(hit):
                c2[hit] = m._counts(ent[hit])
                if int(c2.max()) > tot:
                    raise m._over(int(c2.max()), tot)
            if self.kn:
                b = np.maximum(c2 - _discount(c2, self.d2), 0.0) / tot + g * b
            else:
                b = lams[0] * (c2 / tot) + g * b
        if self.kn:
            score = np.maximum(c3 - _discount(c3, self.d3), 0.0) / tot3 + g3 * b
        else:
            score = lams[1] * (c3 / tot3) + g3 * b
        sel = _best(score, tids, k)
        return dict(zip(tpos[sel].tolist(), c3[sel].tolist()))

    def _trim_bigrams(self, v: int, b_idx: range, tot: int, g: float, keep: int, lam2: float) -> dict[int, int]:
        """Position → value of the ``keep`` best bigram successors in ``b_idx`` by B (§9.7).

        A word that follows v but not (u, v) scores γ₃·B, so among those only the k best
        by (B descending, id ascending) can reach the top k; keeping k plus the
        number of trigram candidates keeps at least k such words.
        """
        m = self.m
        s, e = b_idx.start, b_idx.stop
        pos = m._s2.slice(v, s, e)
        c = m._counts(np.arange(s, e))
        if self.kn:
            alpha = np.maximum(c - _discount(c, self.d2), 0.0) / tot
        else:
            alpha = lam2 * (c / tot)
        ids = m._alph[pos].astype(np.int64)
        b = alpha + g * self.floor[ids]
        sel = _best(b, ids, keep)  # ties by id, as the ranking
        return dict(zip(pos[sel].tolist(), c[sel].tolist()))

    def _rank_numpy(self, ids: np.ndarray, ctx: tuple[int, ...], k: int, lams: tuple[float, float]) -> list[tuple[int, float]]:
        m = self.m
        ids = ids[ids < m.n_words]
        if len(ids) == 0:
            return []
        score = self.scores(ids, ctx, lams)
        return Model._select(ids, m._apos[ids].astype(np.int64), score, k)
