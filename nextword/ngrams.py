"""Counts of every n-gram order 1..n over a fixed vocabulary: the input of every estimator.

Ids follow the scheme of :mod:`nextword.counts` — words ``0..n-1``, ``</s>`` = n,
``<unk>`` = n+1, ``<s>`` = n+2 (a context only) — and n-grams never cross a sentence start:
a sentence ``w1 w2 w3`` contributes ``(<s> w1)``, ``(<s> w1 w2)``, ``(w1 w2 w3)``,
``(w2 w3 </s>)`` and their suffixes (no repeated padding). Level m holds every distinct
m-gram as a row of an ``(k, m)`` id array sorted lexicographically (context first), so a
context's continuations are one contiguous block, with its raw count beside it.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass

import numpy as np

from .errors import InvalidArgumentError

__all__ = ["NgramCounts", "MAX_ORDER", "group_starts"]

#: The longest n-gram the engine counts and stores (a two-word context).
MAX_ORDER = 3


@dataclass(frozen=True)
class NgramCounts:
    """Raw counts of every order. ``grams[m-1]`` is ``(k_m, m)`` int64, ``counts[m-1]`` ``(k_m,)`` int64."""

    n_words: int
    grams: tuple[np.ndarray, ...]
    counts: tuple[np.ndarray, ...]

    @property
    def order(self) -> int:
        return len(self.grams)

    @property
    def eos(self) -> int:
        return self.n_words

    @property
    def unk(self) -> int:
        return self.n_words + 1

    @property
    def bos(self) -> int:
        return self.n_words + 2

    @property
    def n_outcomes(self) -> int:
        """Words, ``</s>`` and ``<unk>``: what a distribution is over."""
        return self.n_words + 2

    def __post_init__(self) -> None:
        if not 1 <= len(self.grams) <= MAX_ORDER or len(self.grams) != len(self.counts):
            raise InvalidArgumentError(f"order must be 1..{MAX_ORDER}, got {len(self.grams)} levels")
        for m, (g, c) in enumerate(zip(self.grams, self.counts), 1):
            if g.ndim != 2 or g.shape[1] != m or c.shape != (g.shape[0],):
                raise InvalidArgumentError(f"level {m}: grams {g.shape} and counts {c.shape} do not fit")
            if len(c) and (int(c.min()) < 1):
                raise InvalidArgumentError(f"level {m}: counts must be >= 1")
            if len(g) and (int(g.min()) < 0 or int(g.max()) > self.bos):
                raise InvalidArgumentError(f"level {m}: ids outside 0..{self.bos}")
            if len(g) > 1 and not _strictly_sorted(g, self.bos + 1):
                raise InvalidArgumentError(f"level {m}: n-grams are not sorted and distinct")

    @classmethod
    def from_sentences(cls, sentences: Iterable[Sequence[int]], n_words: int, order: int) -> NgramCounts:
        """Count id sentences (words and ``<unk>`` only; ``<s>``/``</s>`` are added here).

        The straightforward reference counter (tests, small inputs); the streaming
        builder in :mod:`nextword.counts` must give the same tables.
        """
        if isinstance(order, bool) or not isinstance(order, int) or not 1 <= order <= MAX_ORDER:
            raise InvalidArgumentError(f"order must be an integer in 1..{MAX_ORDER}, got {order!r}")
        bos, eos = n_words + 2, n_words
        seqs = [np.asarray([bos, *s, eos], dtype=np.int64) for s in sentences]
        grams: list[np.ndarray] = []
        counts: list[np.ndarray] = []
        for m in range(1, order + 1):
            parts = []
            for s in seqs:
                if len(s) - 1 >= 1 and len(s) >= m:
                    win = np.lib.stride_tricks.sliding_window_view(s, m)
                    # an m-gram ends at a predicted token: skip the one that is <s> alone (m = 1)
                    parts.append(win[1:] if m == 1 else win)
            allg = np.concatenate(parts) if parts else np.zeros((0, m), np.int64)
            if len(allg):
                uniq, cnt = np.unique(allg, axis=0, return_counts=True)
            else:
                uniq, cnt = allg, np.zeros(0, np.int64)
            grams.append(uniq.astype(np.int64))
            counts.append(cnt.astype(np.int64))
        return cls(n_words, tuple(grams), tuple(counts))


def _strictly_sorted(g: np.ndarray, base: int) -> bool:
    """Whether the rows of ``g`` (ids in ``0..base-1``) increase strictly in lexicographic order.

    Rows become one int64 key each (base-``base`` digits) when they fit, a single
    comparison of neighbours; otherwise the first non-zero difference of each neighbour pair decides.
    """
    if base ** g.shape[1] <= 1 << 63:
        key = g[:, 0].astype(np.int64)
        for j in range(1, g.shape[1]):
            key = key * base + g[:, j]
        return bool((key[1:] > key[:-1]).all())
    d = np.diff(g, axis=0)
    first = d[np.arange(len(d)), np.argmax(d != 0, axis=1)]
    return bool((first > 0).all())


def group_starts(keys: np.ndarray) -> np.ndarray:
    """Start offsets of runs of equal rows in a sorted ``(k, j)`` array, plus ``k`` at the end."""
    k = len(keys)
    if k == 0:
        return np.zeros(1, np.int64)
    if keys.shape[1] == 0:
        return np.asarray([0, k], np.int64)
    change = np.any(keys[1:] != keys[:-1], axis=1)
    return np.concatenate(([0], np.flatnonzero(change) + 1, [k])).astype(np.int64)
