"""The candidate seam: which vocabulary words a query considers for a typed prefix.

A query has a context and a partial word. The estimator says how likely each word is
after the context; this module says *which* words are worth scoring at all, as ranges of
alphabetical positions (the order of the model file's ALPH section), each with a channel
weight — how likely the user typed what they typed if they meant a word of that range:

* :class:`PrefixRange` (today): the words whose key starts with the folded prefix form
  one contiguous range, weight 1.0. Its stored top lists also give the k most frequent
  words of any range (:meth:`PrefixRange.top_ids`), the lower bound the exact ranking
  needs for the words it does not score one by one.
* a near-miss source (issue 17) returns several ranges — the exact prefix and the
  prefixes one likely slip away on the keyboard — each weighted by P(typed | prefix).

The model ranks each range exactly (top k by P(word | context), ties by the smaller id: floor
descending, then key; docs/SEAMS.md "Ties") and
:func:`merge_ranked` combines them by weight × probability. A word reached through several
ranges keeps its best weighted score (the single most likely intended prefix), which keeps
the merge exact: every word of the overall top k is in the top k of the range that gives
its best score. With one range of weight 1.0 the merge is the identity, and
:class:`~nextword.model.Model` skips it.
"""

from __future__ import annotations

import bisect
import heapq
from typing import Any, NamedTuple, Protocol, Sequence

import numpy as np

from .keyboard import Channel
from .store import TOPK_FANOUT, key_head, topk_levels

__all__ = ["CandidateRange", "CandidateSource", "NearMiss", "PrefixRange", "merge_ranked"]


class CandidateRange(NamedTuple):
    """Alphabetical positions [lo, hi) to rank, and the channel weight of their scores."""

    lo: int
    hi: int
    weight: float


class CandidateSource(Protocol):
    """What the query layer asks of a candidate source (exact prefixes, near misses)."""

    def ranges(self, key: str) -> tuple[CandidateRange, ...]:
        """Non-empty ranges to rank for the folded typed prefix ``key``; empty if none."""
        ...  # pragma: no cover - a protocol


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


class PrefixRange:
    """Exact-prefix candidates over a model file's sorted vocabulary.

    Built by the query layer from the file's trie, IDTK, ALPH, KEY4 and TOPK sections
    (already checked by the reader). Keeps two small caches of pure functions of the file
    (keyboards repeat prefixes constantly); dict reads and writes are atomic, so sharing
    one between threads is safe.
    """

    def __init__(
        self,
        *,
        trie: Any,
        idtk: memoryview,
        alph_view: memoryview,
        key4: memoryview,
        alph: np.ndarray,
        topk: np.ndarray,
        n_words: int,
        max_key_chars: int,
    ) -> None:
        self.n_words = n_words
        self._trie = trie
        self._mv_idtk = idtk
        self._mv_alph = alph_view
        self._mv_key4 = key4
        self._alph = alph
        self._max_key = max_key_chars
        # multi-level prefix top lists as 2-D views (blocks x FANOUT)
        self._levels: list[np.ndarray] = []
        start = 0
        for nb in topk_levels(n_words):
            self._levels.append(topk[start : start + nb * TOPK_FANOUT].reshape(nb, TOPK_FANOUT))
            start += nb * TOPK_FANOUT
        self._range_cache: dict[str, tuple[int, int]] = {}
        self._ranges_cache: dict[str, tuple[CandidateRange, ...]] = {}
        self._top_cache: dict[tuple[int, int, int], list[int]] = {}
        self._next_cache: dict[str, tuple[str, ...]] = {}

    def ranges(self, key: str) -> tuple[CandidateRange, ...]:
        """The one range of words starting with ``key``, weight 1.0; none if no word does."""
        hit = self._ranges_cache.get(key)
        if hit is not None:  # cached: building the named tuple costs more than the search
            return hit
        lo, hi = self.span(key)
        result = (CandidateRange(lo, hi, 1.0),) if lo < hi else ()
        if len(self._ranges_cache) > 65536:
            self._ranges_cache.clear()
        self._ranges_cache[key] = result
        return result

    def span(self, key: str) -> tuple[int, int]:
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
                parent = self._range_cache.get(key[:-1])
                if parent is not None:  # the words starting with key are among those starting with key[:-1]
                    lo, hi = max(lo, parent[0]), min(hi, parent[1])
                seq = _AlphaKeys(self._trie.restore_key, self._mv_idtk, self._mv_alph, len(key))
                lo = bisect.bisect_left(seq, key, lo, hi)
                hi = bisect.bisect_right(seq, key, lo, hi)
            result = (lo, hi)
        if len(self._range_cache) > 65536:
            self._range_cache.clear()
        self._range_cache[key] = result
        return result

    def key_at(self, pos: int) -> str:
        """The key of the word at alphabetical position ``pos``."""
        return self._trie.restore_key(self._mv_idtk[self._mv_alph[pos]])  # type: ignore[no-any-return]

    def next_letters(self, key: str) -> tuple[str, ...]:
        """The characters that follow ``key`` in some vocabulary word, alphabetically.

        One key read and one range search per distinct next character (the words sharing
        ``key + c`` are one contiguous range), cached: near-miss readings ask for the
        same short prefixes again and again.
        """
        hit = self._next_cache.get(key)
        if hit is not None:
            return hit
        lo, hi = self.span(key)
        n = len(key)
        out: list[str] = []
        pos = lo
        while pos < hi:
            word = self.key_at(pos)
            if len(word) <= n:  # the word ``key`` itself comes first
                pos += 1
                continue
            c = word[n]
            out.append(c)
            end = self.span(key + c)[1]
            pos = end if end > pos else pos + 1
        result = tuple(out)
        if len(self._next_cache) > 65536:
            self._next_cache.clear()
        self._next_cache[key] = result
        return result

    def extends(self, key: str, c: str) -> bool:
        """Whether some vocabulary word starts with ``key + c``: from the cached next
        characters of ``key`` when known, else one walk down the trie (several times
        cheaper than a range search, and near-miss searches test many dead prefixes)."""
        nxt = self._next_cache.get(key)
        if nxt is not None:
            return c in nxt
        return next(self._trie.iterkeys(key + c), None) is not None

    def top_ids(self, lo: int, hi: int, k: int) -> list[int]:
        """The k smallest word ids (= highest floor probability) among alphabetical positions [lo, hi).

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


class NearMiss:
    """Typo-tolerant candidates: the exact prefix plus the prefixes a slip of the finger turns
    into what was typed, each weighted by the channel (:class:`~nextword.keyboard.Channel`).

    The readings of a typed prefix come from a depth-first search that builds the intended
    prefix letter by letter beside the typed letters (match, substitution by a key that
    could have produced the typed one, omitted letter, extra tap, swapped pair) and stops a
    branch as soon as its intended prefix starts no vocabulary word (one cached range
    search), its weight drops below the channel's floor or it has used ``max_edits``
    edits. So the work depends on the typed prefix and the vocabulary's branching near it,
    never on the vocabulary size. A reading's weight is its best alignment's product
    (:meth:`Channel.weight`, the dynamic-programming reference it is tested against).

    A prefix whose shorter prefix is also a reading with at least its weight adds nothing
    (its words are in the shorter prefix's range with a weight as high) and is dropped;
    the rest become ranges, best weight first. A prefix that ends in an omitted letter is
    never generated for the same reason. When no near miss survives, the result is
    exactly :meth:`PrefixRange.ranges` (one range, weight 1.0): answers and speed are those
    of the plain prefix.
    """

    def __init__(self, prefixes: PrefixRange, channel: Channel) -> None:
        self.prefixes = prefixes
        self.channel = channel
        self._cache: dict[str, tuple[CandidateRange, ...]] = {}
        self._fronts: dict[str, dict[tuple[str, int], float]] = {}
        self._weights: dict[str, tuple[tuple[str, float], ...]] = {}
        self._closures: dict[str, dict[tuple[str, int], float]] = {}

    def ranges(self, key: str) -> tuple[CandidateRange, ...]:
        """Ranges of the readings of the folded typed prefix ``key``, best weight first."""
        hit = self._cache.get(key)
        if hit is not None:
            return hit
        if not key:
            return self.prefixes.ranges(key)
        span = self.prefixes.span
        result = tuple(CandidateRange(*span(p), w) for p, w in self.prefix_weights(key))
        if len(self._cache) > 16384:
            self._cache.clear()
        self._cache[key] = result
        return result

    def prefix_weights(self, key: str) -> tuple[tuple[str, float], ...]:
        """The intended prefixes behind typed ``key`` with their weights, best first (ties by
        prefix), without those a shorter prefix of the list covers with at least their weight.
        Cached per typed prefix."""
        hit = self._weights.get(key)
        if hit is not None:
            return hit
        best = self.readings(key)
        kept = [(p, w) for p, w in best.items() if not any(best.get(p[:i], 0.0) >= w for i in range(1, len(p)))]
        kept.sort(key=lambda e: (-e[1], e[0]))
        result = tuple(kept)
        if len(self._weights) > 16384:
            self._weights.clear()
        self._weights[key] = result
        return result

    def readings(self, key: str) -> dict[str, float]:
        """Every vocabulary prefix that reads as the typed ``key``, with its best weight."""
        best: dict[str, float] = {}
        for (p, _e), w in self._frontier(key).items():
            if w > best.get(p, 0.0):
                best[p] = w
        return best

    # The search, one typed letter at a time. A state is (intended prefix, edits used) with
    # the best weight of the alignments reaching it; which moves a state allows next
    # depends only on the state, and weights only shrink along a path (every move weighs
    # at most 1), so keeping the best weight per state loses no reading, and pruning at
    # the floor loses none that ends above it (max and × by a positive number commute in
    # floating point too, so the weights are those of the path-by-path products).
    # ``_frontier(q)`` holds the states after consuming all of q (no trailing omission);
    # ``_closure(q)`` adds the states reached from them by omitted letters. Both are
    # cached per typed prefix, so a keystroke costs the moves out of the last states only.

    def _frontier(self, key: str) -> dict[tuple[str, int], float]:
        hit = self._fronts.get(key)
        if hit is not None:
            return hit
        if not key:
            out = {("", 0): 1.0}
        else:
            out = {}
            ch = self.channel
            floor, max_edits = ch.floor, ch.max_edits
            extends = self.prefixes.extends
            x = key[-1]
            subs = ch.sources.get(x, ())
            insertion = ch.insertion_weight

            def put(p: str, e: int, w: float) -> None:
                if w > out.get((p, e), 0.0):
                    out[p, e] = w

            for (p, e), w in self._closure(key[:-1]).items():
                if extends(p, x):
                    put(p + x, e, w)
                if e == max_edits:
                    continue
                for y, r in subs:
                    w2 = w * r
                    if w2 < floor:
                        break
                    if extends(p, y):
                        put(p + y, e + 1, w2)
                r = insertion(p[-1] if p else None, x)
                if r > 0.0 and w * r >= floor:
                    put(p, e + 1, w * r)
            swap = ch.swap_weight
            if len(key) >= 2 and swap > 0.0 and key[-2] != x:
                tail = x + key[-2]
                for (p, e), w in self._closure(key[:-2]).items():
                    if e < max_edits and w * swap >= floor and extends(p, x) and extends(p + x, key[-2]):
                        put(p + tail, e + 1, w * swap)
        if len(self._fronts) > 8192:  # a few kB each: bounded to tens of MB
            self._fronts.clear()
            self._closures.clear()
        self._fronts[key] = out
        return out

    def _closure(self, key: str) -> dict[tuple[str, int], float]:
        hit = self._closures.get(key)
        if hit is not None:
            return hit
        ch = self.channel
        omit, floor, max_edits = ch.omit_weight, ch.floor, ch.max_edits
        out = dict(self._frontier(key))
        todo = list(out.items())
        while todo:
            (p, e), w = todo.pop()
            if e == max_edits or omit <= 0.0 or w * omit < floor:
                continue
            w2 = w * omit
            for y in self.prefixes.next_letters(p):
                st = (p + y, e + 1)
                if w2 > out.get(st, 0.0):
                    out[st] = w2
                    todo.append((st, w2))
        self._closures[key] = out
        return out


def merge_ranked(ranked: Sequence[tuple[float, Sequence[tuple[int, float]]]], k: int) -> list[tuple[int, float]]:
    """Top k of several ranges' rankings by channel weight × probability.

    ``ranked`` holds (weight, [(word id, probability), ...]) per range, each list the exact
    top k of its range. A word in several lists keeps its best weighted score. Ties go to
    the smaller id (floor descending, then key), as within one range; fl(weight·p) is
    monotone in p, so a range's own order is kept.
    """
    best: dict[int, float] = {}
    for weight, pairs in ranked:
        for wid, p in pairs:
            s = weight * p
            if s > best.get(wid, -1.0):
                best[wid] = s
    top = heapq.nsmallest(k, ((-s, w) for w, s in best.items()))
    return [(w, -neg) for neg, w in top]
