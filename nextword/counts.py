"""Counting words and word pairs in one streaming pass, then fixing the vocabulary.

A corpus is read once (inputs may be pipes or one-shot iterators): each distinct
*surface spelling* gets a temporary id, messages become id streams, and pair counts are
accumulated in numpy in large chunks, so the Python work per word is one dict lookup.
Only after the pass is the vocabulary chosen (minimum count, maximum size), spellings
merged case-insensitively, and out-of-vocabulary words mapped to the unknown symbol.

Ids in the resulting :class:`CountTables` (and in model files):

* ``0 .. n-1``: vocabulary words by descending count, ties by key in code-point order
  (so a smaller id always means "ranked before" when only frequency is known);
* ``n``: end of sentence ``</s>`` (predicted, never a history);
* ``n+1``: the unknown symbol ``<unk>`` (out-of-vocabulary words, numbers, symbols);
* ``n+2``: sentence start ``<s>`` (a history only, never predicted).
"""

from __future__ import annotations

import os
import unicodedata
from dataclasses import dataclass, field
from typing import Any, Iterable, Iterator

import numpy as np

from .errors import InvalidArgumentError
from .text import _HAS_LETTER, _TOKEN_RE, fold, normalize

__all__ = ["CountBuilder", "CountTables", "DEFAULT_MIN_COUNT", "DEFAULT_MAX_VOCAB"]

#: Defaults sized for a phone keyboard: ~30,000 words covers everyday text (common practice).
DEFAULT_MAX_VOCAB = 30_000
#: Words seen once are mostly typos and rare names; dropping them shrinks models (common practice).
DEFAULT_MIN_COUNT = 2

_BOS_T, _EOS_T, _UNK_T = 0, 1, 2  # temporary ids of the reserved symbols
_FLUSH_TOKENS = 1 << 21


@dataclass
class CountTables:
    """Final counts over a fixed vocabulary; the input of the model writer.

    ``pair_left``/``pair_right``/``pair_count`` hold every distinct (history, next) pair
    with its count, sorted by (history, next). ``unigram[i]`` is the number of times id
    ``i`` (word, ``</s>`` or ``<unk>``) was predicted; its sum is N.
    """

    keys: list[str]
    displays: list[str]
    unigram: np.ndarray
    pair_left: np.ndarray
    pair_right: np.ndarray
    pair_count: np.ndarray
    stats: dict[str, int] = field(default_factory=dict)
    #: c(v) per history id when pairs were pruned (row sums); None = derived from unigrams
    history: np.ndarray | None = None

    @property
    def n_words(self) -> int:
        return len(self.keys)


class CountBuilder:
    """Mutable accumulator of counts. Feed messages, then call :meth:`tables`.

    >>> b = CountBuilder()
    >>> b.add_text("See you at the workshop.")
    >>> b.tables(min_count=1).keys
    ['at', 'see', 'the', 'workshop', 'you']
    """

    def __init__(self, *, memory_cap: int | None = None) -> None:
        """``memory_cap`` (bytes) bounds the pair counts held in memory: past half of it,
        they are merged and spilled to sorted runs in a temporary directory, which the
        final step reads one at a time. The table of distinct spellings stays in memory.
        """
        if memory_cap is not None and (isinstance(memory_cap, bool) or not isinstance(memory_cap, int) or memory_cap < 1 << 16):
            raise InvalidArgumentError(f"memory_cap must be an integer >= 65536 bytes, got {memory_cap!r}")
        self.memory_cap = memory_cap
        # under a cap, flush the token buffer (Python ints, ~40 bytes each) well before it
        # approaches the cap
        self._flush_tokens = _FLUSH_TOKENS if memory_cap is None else max(1 << 14, min(_FLUSH_TOKENS, memory_cap // 256))
        self._runs: list[str] = []
        self._spill_dir: Any = None
        self._ids: dict[str, int] = {}
        self._surfaces: list[str] = ["", "", ""]
        self._buf: list[int] = []
        self._tok_counts = np.zeros(0, dtype=np.int64)
        self._initial_counts = np.zeros(0, dtype=np.int64)
        self._part_keys: list[np.ndarray] = []
        self._part_counts: list[np.ndarray] = []
        self.messages = 0
        self.sentences = 0

    # -- feeding ---------------------------------------------------------------------

    def add_texts(self, texts: Iterable[str]) -> None:
        """Count every message of ``texts`` (consumed once)."""
        for t in texts:
            self.add_text(t)

    def add_text(self, text: str) -> None:
        """Count one message. Line breaks inside it end sentences, as everywhere."""
        if not isinstance(text, str):
            raise InvalidArgumentError(f"messages must be str, got {type(text).__name__}")
        self.messages += 1
        ids = self._ids
        surfaces = self._surfaces
        buf = self._buf
        append = buf.append
        in_sentence = False
        after_break = False
        for m in _TOKEN_RE.finditer(normalize(text)):
            group = m.lastgroup
            if group == "word":
                s = m.group()
                if s.isalpha() or _HAS_LETTER.search(s):
                    if not in_sentence:
                        append(_BOS_T)
                        in_sentence = True
                    tid = ids.get(s)
                    if tid is None:
                        tid = len(surfaces)
                        ids[s] = tid
                        surfaces.append(s)
                    append(tid)
                    after_break = False
                    continue
            elif group == "end":
                if in_sentence:
                    append(_EOS_T)
                    self.sentences += 1
                    in_sentence = False
                    after_break = False
                continue
            elif group == "other" and unicodedata.category(m.group()).startswith("P"):
                continue
            # a number or a symbol: one unknown token per run, breaking the context
            if not in_sentence:
                append(_BOS_T)
                in_sentence = True
            if not after_break:
                append(_UNK_T)
                after_break = True
        if in_sentence:
            append(_EOS_T)
            self.sentences += 1
        if len(buf) >= self._flush_tokens:
            self._flush()

    def _flush(self) -> None:
        if not self._buf:
            return
        a = np.asarray(self._buf, dtype=np.int64)
        self._buf.clear()
        n_types = len(self._surfaces)
        if len(self._tok_counts) < n_types:
            self._tok_counts = np.concatenate(
                [self._tok_counts, np.zeros(n_types - len(self._tok_counts), np.int64)]
            )
            self._initial_counts = np.concatenate(
                [self._initial_counts, np.zeros(n_types - len(self._initial_counts), np.int64)]
            )
        self._tok_counts[:n_types] += np.bincount(a, minlength=n_types)
        left, right = a[:-1], a[1:]
        keep = left != _EOS_T  # (</s>, <s>) joins two sentences: not a pair
        left, right = left[keep], right[keep]
        self._initial_counts += np.bincount(right[left == _BOS_T], minlength=n_types)
        keys, counts = np.unique((left << 32) | right, return_counts=True)
        self._part_keys.append(keys)
        self._part_counts.append(counts.astype(np.int64))
        if len(self._part_keys) >= 8 or self._over_cap():
            self._merge_parts()

    def _over_cap(self) -> bool:
        if self.memory_cap is None:
            return False
        held = sum(k.nbytes for k in self._part_keys) + sum(c.nbytes for c in self._part_counts)
        return held > self.memory_cap // 4

    def merge(self, other: CountBuilder) -> None:
        """Add another builder's counts (e.g. from another process or machine) to this one.

        The result is exactly what counting both inputs in one builder gives: partial
        counts are keyed by surface spelling, remapped to this builder's ids, and added.
        ``other`` is left unchanged except that its pending work is flushed.
        """
        if not isinstance(other, CountBuilder):
            raise InvalidArgumentError(f"can only merge a CountBuilder, got {type(other).__name__}")
        self._flush()
        other._flush()
        ids = self._ids
        surfaces = self._surfaces
        remap = np.arange(len(other._surfaces), dtype=np.int64)
        for tid in range(3, len(other._surfaces)):
            s = other._surfaces[tid]
            mine = ids.get(s)
            if mine is None:
                mine = len(surfaces)
                ids[s] = mine
                surfaces.append(s)
            remap[tid] = mine
        n_types = len(surfaces)
        for name in ("_tok_counts", "_initial_counts"):
            mine_arr = getattr(self, name)
            grown = np.zeros(n_types, np.int64)
            grown[: len(mine_arr)] = mine_arr
            theirs = getattr(other, name)
            np.add.at(grown, remap[: len(theirs)], theirs)
            setattr(self, name, grown)
        for keys, counts in other._pair_parts():
            left, right = remap[keys >> 32], remap[keys & 0xFFFFFFFF]
            self._part_keys.append((left << 32) | right)
            self._part_counts.append(np.array(counts))
        if len(self._part_keys) >= 8 or self._over_cap():
            self._merge_parts()
        self.messages += other.messages
        self.sentences += other.sentences

    def _merge_parts(self) -> None:
        keys, counts = _sum_by_key(np.concatenate(self._part_keys), np.concatenate(self._part_counts))
        self._part_keys = [keys]
        self._part_counts = [counts]
        if self.memory_cap is not None and keys.nbytes + counts.nbytes > self.memory_cap // 2:
            self._spill()

    def _spill(self) -> None:
        """Write the merged in-memory pairs as one sorted run on disk and drop them."""
        import tempfile

        if self._spill_dir is None:
            self._spill_dir = tempfile.TemporaryDirectory(prefix="nextword-counts-")
        path = os.path.join(self._spill_dir.name, f"run{len(self._runs):05d}.npz")
        np.savez(path, keys=self._part_keys[0], counts=self._part_counts[0])
        self._runs.append(path)
        self._part_keys, self._part_counts = [], []

    @property
    def spilled_runs(self) -> int:
        """How many sorted runs of pair counts went to disk (0 without a memory cap)."""
        return len(self._runs)

    def _pair_parts(self) -> Iterator[tuple[np.ndarray, np.ndarray]]:
        """Every partial pair count, in memory and spilled, one part at a time."""
        for path in self._runs:
            with np.load(path) as run:
                yield run["keys"], run["counts"]
        yield from zip(self._part_keys, self._part_counts)

    # -- finishing -------------------------------------------------------------------

    @property
    def word_tokens(self) -> int:
        """Word tokens counted so far (flushes pending work)."""
        self._flush()
        return int(self._tok_counts[3:].sum()) if len(self._tok_counts) > 3 else 0

    def tables(self, *, min_count: int = DEFAULT_MIN_COUNT, max_vocab: int = DEFAULT_MAX_VOCAB) -> CountTables:
        """Fix the vocabulary and return final counts. The builder stays usable."""
        if isinstance(min_count, bool) or not isinstance(min_count, int) or min_count < 1:
            raise InvalidArgumentError(f"min_count must be an integer >= 1, got {min_count!r}")
        if isinstance(max_vocab, bool) or not isinstance(max_vocab, int) or max_vocab < 1:
            raise InvalidArgumentError(f"max_vocab must be an integer >= 1, got {max_vocab!r}")
        self._flush()
        if self._part_keys and not self._runs:
            self._merge_parts()
        n_types = len(self._surfaces)
        tok = np.zeros(n_types, np.int64)
        tok[: len(self._tok_counts)] = self._tok_counts
        initial = np.zeros(n_types, np.int64)
        initial[: len(self._initial_counts)] = self._initial_counts

        # merge spellings case-insensitively
        key_index: dict[str, int] = {}
        key_list: list[str] = []
        tid_key = np.zeros(n_types, dtype=np.int64)
        for tid in range(3, n_types):
            k = fold(self._surfaces[tid])
            idx = key_index.get(k)
            if idx is None:
                idx = key_index[k] = len(key_list)
                key_list.append(k)
            tid_key[tid] = idx
        key_counts = np.bincount(tid_key[3:], weights=tok[3:], minlength=len(key_list)).astype(np.int64)
        eligible = np.flatnonzero(key_counts >= min_count).tolist()
        eligible.sort(key=lambda i: (-int(key_counts[i]), key_list[i]))
        chosen = eligible[:max_vocab]
        vocab = [key_list[i] for i in chosen]
        # the spellings (temporary ids) of each chosen key
        order = np.argsort(tid_key[3:], kind="stable") + 3
        sorted_keys = tid_key[order]
        by_key = {}
        for i in chosen:
            lo, hi = np.searchsorted(sorted_keys, [i, i + 1])
            by_key[key_list[i]] = order[lo:hi].tolist()
        n = len(vocab)
        eos, unk, bos = n, n + 1, n + 2

        tid_map = np.full(n_types, unk, dtype=np.int64)
        tid_map[_BOS_T], tid_map[_EOS_T], tid_map[_UNK_T] = bos, eos, unk
        displays: list[str] = []
        for wid, k in enumerate(vocab):
            tids = by_key[k]
            tid_map[tids] = wid
            displays.append(self._display(k, tids, tok, initial))

        unigram = np.bincount(tid_map[1:], weights=tok[1:], minlength=n + 2).astype(np.int64)[: n + 2]
        width = n + 3
        # remap each part (in memory or spilled) to final ids and add them up; the final
        # pairs are few (the vocabulary is capped), so only they are ever held together
        acc_keys: list[np.ndarray] = []
        acc_counts: list[np.ndarray] = []
        for pair_keys, pair_counts in self._pair_parts():
            left = tid_map[pair_keys >> 32]
            right = tid_map[pair_keys & 0xFFFFFFFF]
            part_k, part_c = _sum_by_key(left * width + right, pair_counts)
            acc_keys.append(part_k)
            acc_counts.append(part_c)
            if len(acc_keys) >= 4:
                part_k, part_c = _sum_by_key(np.concatenate(acc_keys), np.concatenate(acc_counts))
                acc_keys, acc_counts = [part_k], [part_c]
        if acc_keys:
            keys, counts = _sum_by_key(np.concatenate(acc_keys), np.concatenate(acc_counts))
        else:
            keys, counts = np.zeros(0, np.int64), np.zeros(0, np.int64)
        oov_words = int(unigram[unk]) - int(tok[_UNK_T])
        stats = {
            "messages": self.messages,
            "sentences": self.sentences,
            "word_tokens": int(tok[3:].sum()),
            "nonword_tokens": int(tok[_UNK_T]),
            "oov_word_tokens": oov_words,
            "spellings": n_types - 3,
            "word_types": len(key_list),
            "min_count": min_count,
            "max_vocab": max_vocab,
        }
        return CountTables(
            keys=vocab,
            displays=displays,
            unigram=unigram,
            pair_left=keys // width,
            pair_right=keys % width,
            pair_count=counts,
            stats=stats,
        )

    def _display(self, key: str, tids: list[int], tok: np.ndarray, initial: np.ndarray) -> str:
        """Most frequent spelling away from sentence starts, where capitals are positional.

        Ties prefer the spelling equal to the key, then code-point order. A word seen only
        at sentence starts keeps the key when its capital is explained by position
        ("Thanks" -> "thanks") and its spelling otherwise ("NASA").
        """
        surfaces = self._surfaces
        best = max(tids, key=lambda t: (int(tok[t] - initial[t]), surfaces[t] == key, _neg(surfaces[t])))
        if tok[best] - initial[best] > 0:
            return surfaces[best]
        best = max(tids, key=lambda t: (int(initial[t]), surfaces[t] == key, _neg(surfaces[t])))
        s = surfaces[best]
        if s[:1].upper() + s[1:] == s and fold(s[:1]) + s[1:] == key:
            return key
        return s


def _neg(s: str) -> tuple[int, ...]:
    """Sort key that reverses code-point order inside max()."""
    return tuple(-ord(c) for c in s)


def _sum_by_key(keys: np.ndarray, counts: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Sum ``counts`` of equal ``keys``; returns sorted unique keys and their totals."""
    if len(keys) == 0:
        return keys.astype(np.int64), counts.astype(np.int64)
    order = np.argsort(keys, kind="stable")
    k = keys[order]
    c = counts[order]
    starts = np.flatnonzero(np.concatenate(([True], k[1:] != k[:-1])))
    return k[starts], np.add.reduceat(c, starts).astype(np.int64)
