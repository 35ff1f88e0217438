"""Counting words, word pairs and (``order=3``) word triples in one streaming pass, then fixing the vocabulary.

A corpus is read once (inputs may be pipes or one-shot iterators): each distinct
*surface spelling* gets a temporary id, messages become id streams, and pair (and
triple) counts are accumulated in numpy in large chunks, so the Python work per word is
one dict lookup. Only after the pass is the vocabulary chosen (minimum count, maximum
size), spellings merged case-insensitively, and out-of-vocabulary words mapped to the
unknown symbol; n-grams that become equal by that mapping are summed.

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
from .ngrams import MAX_ORDER, NgramCounts
from .text import HAS_LETTER as _HAS_LETTER, TOKEN_RE as _TOKEN_RE, fold, fold_all, normalize

__all__ = [
    "CountBuilder",
    "CountTables",
    "DEFAULT_MIN_COUNT",
    "DEFAULT_MAX_VOCAB",
    "DEFAULT_ORDER",
    "PARALLEL_MIN_BYTES",
    "auto_workers",
    "count_in_processes",
]

#: Defaults sized for a phone keyboard: ~30,000 words covers everyday text (common practice).
DEFAULT_MAX_VOCAB = 30_000
#: Keep every word seen at least once, up to ``DEFAULT_MAX_VOCAB``. Dropping once-seen words
#: shrinks a model built from a small corpus (common practice), but measured on held-out
#: fortunes it cost 0.86–0.90 KSR@3 points for every estimator (JM bigram 39.36% → 38.50%,
#: KN trigram 40.65% → 39.75%) for a file 33–48% smaller; on large corpora the vocabulary
#: cap binds first and both rules give the same model (bench/RESULTS.md, "Vocabulary rule").
#: Size is better bought with ``--max-size``, which drops words by value per byte.
DEFAULT_MIN_COUNT = 1

#: The n-gram order counted when none is asked for: words and word pairs.
DEFAULT_ORDER = 2

_BOS_T, _EOS_T, _UNK_T = 0, 1, 2  # temporary ids of the reserved symbols
_LOW32 = 0xFFFFFFFF
#: three ids below this pack into one int64 sort key (21 bits each); with more ids, triples
#: are sorted as two int64 columns by ``np.lexsort`` (slower, same result)
_PACK3_LIMIT = 1 << 21
_LOW21 = (1 << 21) - 1
_FLUSH_TOKENS = 1 << 21
_BATCH_CHARS = 1 << 20
#: line-end characters (sentence ends that str.split would treat as plain spaces)
_LINE_ENDS = "\n\r\u2028\u2029\x85\x0b\x0c"
#: soft punctuation and sentence ends often glued to a word, with the codes they add
#: (checked against the full rules by the hypothesis test against text.sentences)
_TRAIL = {",": (), ";": (), ":": (), ")": (), '"': (), "'": (), "”": (), "’": (),
          ".": (_EOS_T,), "!": (_EOS_T,), "?": (_EOS_T,)}
_LEAD = {"(": (), '"': (), "'": (), "“": (), "‘": ()}
#: distinct space-free pieces remembered before the cache starts afresh
_PIECE_CACHE_MAX = 1 << 21
#: below this much input (bytes on disk, all files together) ``workers=None`` counts in one
#: process: starting workers, shipping their counts back and merging them costs more than
#: splitting a few batches saves (measured in bench/RESULTS.md, "Training")
PARALLEL_MIN_BYTES = 8 << 20


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


class _Partial:
    """Partial counts of one n-gram order over temporary ids, in memory and spilled.

    A part in memory is a tuple of int64 columns, the key columns then the counts, sorted
    by key (except a part remapped by :meth:`CountBuilder.merge` until the next summing;
    nothing relies on the order of a part). A run on disk holds the same columns as one raw little-endian int64 file
    each, read back in slices, so a run never has to fit in memory at once. Pairs have
    one key column, ``(left << 32) | right``; triples two, ``(u << 32) | v`` and ``w``.
    """

    def __init__(self, kind: str, n_keys: int) -> None:
        self.kind = kind
        self.n_keys = n_keys
        self.parts: list[tuple[np.ndarray, ...]] = []
        self.runs: list[tuple[str, int]] = []

    @property
    def nbytes(self) -> int:
        return sum(a.nbytes for part in self.parts for a in part)

    def exts(self) -> list[str]:
        """File name endings of a run's columns."""
        return [f".k{i}" for i in range(self.n_keys)] + [".c"]

    def spill(self, stem: str) -> None:
        """Write the one (summed) part as a run at ``stem`` and drop it from memory."""
        (part,) = self.parts
        for column, ext in zip(part, self.exts()):
            column.astype("<i8", copy=False).tofile(stem + ext)
        self.runs.append((stem, len(part[0])))
        self.parts = []

    def move_runs(self, directory: str) -> None:
        import shutil

        moved = []
        for stem, length in self.runs:
            new = os.path.join(directory, os.path.basename(stem))
            for ext in self.exts():
                shutil.move(stem + ext, new + ext)
            moved.append((new, length))
        self.runs = moved

    def slices(self, slice_len: int | None = None) -> Iterator[tuple[np.ndarray, ...]]:
        """Every partial count, spilled and in memory, in slices of at most ``slice_len``."""
        from contextlib import ExitStack

        for stem, length in self.runs:
            step = length if slice_len is None else slice_len
            with ExitStack() as stack:
                files = [stack.enter_context(open(stem + ext, "rb")) for ext in self.exts()]
                done = 0
                while done < length:
                    m = min(step, length - done)
                    columns = tuple(np.fromfile(f, dtype="<i8", count=m) for f in files)
                    if any(len(c) != m for c in columns):
                        raise OSError(f"spilled run {stem} is shorter than written")
                    yield tuple(c.astype(np.int64, copy=False) for c in columns)
                    done += m
        for part in self.parts:
            n = len(part[0])
            step = max(n, 1) if slice_len is None else slice_len
            for i in range(0, n, step):
                yield tuple(column[i : i + step] for column in part)


class CountBuilder:
    """Mutable accumulator of counts. Feed messages, then call :meth:`tables` (or
    :meth:`ngram_counts`, for the counts of every order).

    >>> b = CountBuilder()
    >>> b.add_text("See you at the workshop.")
    >>> b.tables(min_count=1).keys
    ['at', 'see', 'the', 'workshop', 'you']
    """

    def __init__(self, *, memory_cap: int | None = None, order: int = DEFAULT_ORDER) -> None:
        """``memory_cap`` (bytes) bounds the n-gram counts held in memory: past half of it,
        they are merged and spilled to sorted runs in a temporary directory, which the
        final step reads one at a time. The table of distinct spellings stays in memory.
        ``order`` 3 also counts every word triple within a sentence (:meth:`ngram_counts`);
        order 2 (the default) counts words and pairs only.
        """
        if memory_cap is not None and (isinstance(memory_cap, bool) or not isinstance(memory_cap, int) or memory_cap < 1 << 16):
            raise InvalidArgumentError(f"memory_cap must be an integer >= 65536 bytes, got {memory_cap!r}")
        if isinstance(order, bool) or not isinstance(order, int) or not 2 <= order <= MAX_ORDER:
            raise InvalidArgumentError(f"order must be an integer in 2..{MAX_ORDER}, got {order!r}")
        self.memory_cap = memory_cap
        self.order = order
        self._pairs = _Partial("p", 1)
        self._triples = _Partial("t", 2) if order >= 3 else None
        self._spill_dir: Any = None
        #: a directory owned by someone else (e.g. the parent of worker processes) to spill into
        self._spill_root: str | None = None
        self._ids: dict[str, int] = {}
        self._surfaces: list[str] = ["", "", ""]
        self._buf: list[np.ndarray] = []
        self._buf_len = 0
        self._reset_pieces()
        self._tok_counts = np.zeros(0, dtype=np.int64)
        self._initial_counts = np.zeros(0, dtype=np.int64)
        self.messages = 0
        self.sentences = 0

    def _partials(self) -> list[_Partial]:
        return [self._pairs] if self._triples is None else [self._pairs, self._triples]

    # sizes of the units of work, derived from the cap (which a merge may change): under a
    # cap, the token buffer is flushed and batches are cut well before they approach it,
    # and spilled counts are read back in slices of a known length

    @property
    def _flush_tokens(self) -> int:
        cap = self.memory_cap
        return _FLUSH_TOKENS if cap is None else max(1 << 14, min(_FLUSH_TOKENS, cap // 512))

    @property
    def _batch_chars(self) -> int:
        return batch_chars(self.memory_cap)

    @property
    def _slice_len(self) -> int | None:
        return None if self.memory_cap is None else max(1 << 12, self.memory_cap // 256)

    # -- feeding ---------------------------------------------------------------------

    def add_texts(self, texts: Iterable[str]) -> None:
        """Count every message of ``texts`` (consumed once).

        Messages are counted in batches of about a million characters: each batch is
        cut at spaces and every distinct space-free piece is tokenised once and
        remembered, so the work per word is a dictionary lookup and a few numpy steps.
        """
        for joined, n in join_batches(texts, self._batch_chars):
            self._add_joined(joined, n)

    def add_text(self, text: str) -> None:
        """Count one message. Line breaks inside it end sentences, as everywhere."""
        if not isinstance(text, str):
            raise InvalidArgumentError(f"messages must be str, got {type(text).__name__}")
        self._add_joined(text, 1)

    def _add_joined(self, text: str, n_messages: int) -> None:
        """Count ``n_messages`` messages joined by line breaks.

        Joining is exact: a line break ends a sentence, and so does the end of a message,
        and NFC never composes across a line break.
        """
        self.messages += n_messages
        text = normalize(text)
        for ch in _LINE_ENDS:  # every line end becomes its own space-separated piece
            if ch in text:
                text = text.replace(ch, " \n ")
        pieces = text.split(" ")
        pieces.append("\n")
        cache = self._pieces
        if len(cache) > _PIECE_CACHE_MAX:
            self._reset_pieces()
            cache = self._pieces
        idx = np.fromiter(map(cache.__getitem__, pieces), dtype=np.int64, count=len(pieces))
        starts, flat = self._piece_arrays()
        lens = starts[1:][idx] - starts[:-1][idx]
        total = int(lens.sum())
        ends = np.cumsum(lens)
        gather = np.arange(total, dtype=np.int64) + np.repeat(starts[:-1][idx] - (ends - lens), lens)
        codes = flat[gather]
        # a run of numbers and symbols is one unknown token
        if len(codes) > 1:
            codes = codes[np.concatenate(([True], (codes[1:] != _UNK_T) | (codes[:-1] != _UNK_T)))]
        # a sentence end counts only after something (empty sentences are dropped)
        prev_end = np.concatenate(([True], codes[:-1] == _EOS_T))
        codes = codes[(codes != _EOS_T) | ~prev_end]
        # every sentence opens with <s>
        opens = np.flatnonzero(np.concatenate(([True], codes[:-1] == _EOS_T))[: len(codes)])
        if len(codes):
            codes = np.insert(codes, opens, _BOS_T)
        self.sentences += int(np.count_nonzero(codes == _EOS_T))
        self._buf.append(codes)
        self._buf_len += len(codes)
        del text, pieces, idx, lens, ends, gather, codes, opens, prev_end  # before the flush's peak
        if self._buf_len >= self._flush_tokens:
            self._flush()

    def _piece_codes(self, piece: str) -> list[int]:
        """Token codes of one space-free piece of text (the text rules of :mod:`.text`)."""
        ids = self._ids
        surfaces = self._surfaces
        word = piece
        tail: tuple[int, ...] = ()
        if not piece.isalpha():  # a word between soft punctuation or before a sentence end?
            if piece[-1:] in _TRAIL:
                tail = _TRAIL[piece[-1]]
                word = piece[:-1]
            if word[:1] in _LEAD:
                word = word[1:]
        if word.isalpha():  # the common cases: one plain word, perhaps with "," "." "(" …
            tid = ids.get(word)
            if tid is None:
                tid = ids[word] = len(surfaces)
                surfaces.append(word)
            return [tid, *tail]
        out: list[int] = []
        for m in _TOKEN_RE.finditer(piece):
            group = m.lastgroup
            s = m.group()
            if group == "word" and (s.isalpha() or _HAS_LETTER.search(s)):
                tid = ids.get(s)
                if tid is None:
                    tid = len(surfaces)
                    ids[s] = tid
                    surfaces.append(s)
                out.append(tid)
            elif group == "end":
                out.append(_EOS_T)
            elif group == "other" and unicodedata.category(s).startswith("P"):
                continue
            else:  # a number or a symbol
                out.append(_UNK_T)
        return out

    def _reset_pieces(self) -> None:
        builder = self

        class _Pieces(dict):  # type: ignore[type-arg]
            def __missing__(self, piece: str) -> int:
                codes = builder._piece_codes(piece)
                builder._new_flat.extend(codes)
                builder._new_starts.append(builder._flat_len + len(builder._new_flat))
                index = len(self)
                self[piece] = index
                return index

        self._pieces: dict[str, int] = _Pieces()
        self._starts = np.zeros(1, dtype=np.int64)
        self._flat = np.zeros(0, dtype=np.int64)
        self._flat_len = 0
        self._new_flat: list[int] = []
        self._new_starts: list[int] = []

    def _piece_arrays(self) -> tuple[np.ndarray, np.ndarray]:
        """The pieces' codes as CSR arrays, extended by the pieces met since last time."""
        if self._new_starts:
            self._starts = np.concatenate([self._starts, np.asarray(self._new_starts, dtype=np.int64)])
            self._flat = np.concatenate([self._flat, np.asarray(self._new_flat, dtype=np.int64)])
            self._flat_len = len(self._flat)
            self._new_flat, self._new_starts = [], []
        return self._starts, self._flat

    def __getstate__(self) -> dict[str, Any]:
        """Pickle without the piece cache (rebuilt on demand) or the temporary directory."""
        self._flush()
        state = self.__dict__.copy()
        for name in ("_pieces", "_starts", "_flat", "_flat_len", "_new_flat", "_new_starts"):
            state.pop(name, None)
        state["_spill_dir"] = None
        return state

    def __setstate__(self, state: dict[str, Any]) -> None:
        self.__dict__.update(state)
        self._reset_pieces()

    def _flush(self) -> None:
        if not self._buf:
            return
        a = np.concatenate(self._buf) if len(self._buf) > 1 else self._buf[0]
        self._buf = []
        self._buf_len = 0
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
        del left, right, keep
        self._pairs.parts.append((keys, counts.astype(np.int64)))
        del keys, counts
        if self._triples is not None:
            self._triples.parts.append(_count_triples(a, n_types))
        del a
        if max(len(p.parts) for p in self._partials()) >= 8 or self._over_cap():
            self._merge_parts()

    def _over_cap(self) -> bool:
        if self.memory_cap is None:
            return False
        return sum(p.nbytes for p in self._partials()) > self.memory_cap // 16

    def merge(self, other: CountBuilder) -> None:
        """Add another builder's counts (e.g. from another process or machine) to this one.

        The result is exactly what counting both inputs in one builder gives: partial
        counts are keyed by surface spelling, remapped to this builder's ids, and added.
        ``other`` is left unchanged except that its pending work is flushed. Both must
        count the same order.
        """
        if not isinstance(other, CountBuilder):
            raise InvalidArgumentError(f"can only merge a CountBuilder, got {type(other).__name__}")
        if other.order != self.order:
            raise InvalidArgumentError(f"cannot merge counts of order {other.order} into a builder of order {self.order}")
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
        for mine_p, theirs_p in zip(self._partials(), other._partials()):
            for columns in theirs_p.slices(self._slice_len):
                *key_cols, counts = columns
                remapped = [(remap[key_cols[0] >> 32] << 32) | remap[key_cols[0] & _LOW32]]
                remapped += [remap[k] for k in key_cols[1:]]
                mine_p.parts.append((*remapped, np.array(counts)))
                del remapped, key_cols, counts, columns
                if len(mine_p.parts) >= 8 or self._over_cap():  # inside the loop: runs arrive one by one
                    self._merge_parts()
        self.messages += other.messages
        self.sentences += other.sentences

    def _merge_parts(self) -> None:
        n_types = len(self._surfaces)
        for partial in self._partials():
            if not partial.parts:
                continue
            columns = [np.concatenate(c) for c in zip(*partial.parts)] if len(partial.parts) > 1 else list(partial.parts[0])
            partial.parts = []
            if partial.n_keys == 1:
                partial.parts = [_sum_by_key(columns[0], columns[1])]
            else:
                partial.parts = [_sum_triples_tmp(columns[0], columns[1], columns[2], n_types)]
            del columns
        if self.memory_cap is not None and sum(p.nbytes for p in self._partials()) > self.memory_cap // 16:
            for partial in self._partials():
                if partial.parts:
                    self._spill(partial)

    def _spill(self, partial: _Partial) -> None:
        """Write one order's merged in-memory counts as one sorted run on disk and drop them."""
        import tempfile

        if self._spill_root is not None:
            root = self._spill_root
        else:
            if self._spill_dir is None:
                self._spill_dir = tempfile.TemporaryDirectory(prefix="nextword-counts-")
            root = self._spill_dir.name
        partial.spill(os.path.join(root, f"run{os.getpid()}-{id(self):x}-{partial.kind}{len(partial.runs):05d}"))

    def _adopt_runs(self, memory_cap: int | None) -> None:
        """Take ownership of runs spilled into someone else's directory (a worker's
        builder becoming the result): move them into a directory of our own, and take
        the given memory cap for the work that follows."""
        import tempfile

        self.memory_cap = memory_cap
        self._spill_root = None
        if any(p.runs for p in self._partials()):
            self._spill_dir = tempfile.TemporaryDirectory(prefix="nextword-counts-")
            for partial in self._partials():
                partial.move_runs(self._spill_dir.name)

    @property
    def spilled_runs(self) -> int:
        """How many sorted runs of n-gram counts went to disk (0 without a memory cap)."""
        return sum(len(p.runs) for p in self._partials())

    # -- finishing -------------------------------------------------------------------

    @property
    def word_tokens(self) -> int:
        """Word tokens counted so far (flushes pending work)."""
        self._flush()
        return int(self._tok_counts[3:].sum()) if len(self._tok_counts) > 3 else 0

    def tables(self, *, min_count: int = DEFAULT_MIN_COUNT, max_vocab: int = DEFAULT_MAX_VOCAB) -> CountTables:
        """Fix the vocabulary and return final counts. The builder stays usable.

        Under a memory cap the pair counts are reduced in bounded slices: a first pass
        over the (spilled) pairs counts how many belong to each final history, the
        histories are cut into buckets that fit the cap, each slice is remapped to final
        ids and appended to its bucket's file, and each bucket is summed on its own.
        """
        return self._tables(min_count, max_vocab)[0]

    def ngram_counts(
        self, *, min_count: int = DEFAULT_MIN_COUNT, max_vocab: int = DEFAULT_MAX_VOCAB
    ) -> tuple[CountTables, NgramCounts]:
        """Fix the vocabulary as :meth:`tables` does and return its tables together with
        the counts of every order ``1..order`` over the same ids.

        Level 1 is the predicted tokens (the non-zero entries of ``CountTables.unigram``),
        level 2 the pairs (its ``pair_count`` array is the tables' own), level 3 (order 3)
        every triple within a sentence — ``(<s>, w1, w2)`` at the second word, never
        across a sentence start — after case folding and mapping out-of-vocabulary
        words to ``<unk>``, triples made equal by that mapping summed. The triples are
        reduced like the pairs, in bounded slices under a memory cap. The builder stays usable.
        """
        tables, tid_map = self._tables(min_count, max_vocab)
        n = tables.n_words
        seen = np.flatnonzero(tables.unigram)
        grams = [seen.astype(np.int64)[:, None], np.column_stack((tables.pair_left, tables.pair_right)).astype(np.int64)]
        counts = [tables.unigram[seen].astype(np.int64), tables.pair_count]
        if self._triples is not None:
            g3, c3 = self._final_triples(tid_map, n + 3)
            grams.append(g3)
            counts.append(c3)
        return tables, NgramCounts(n, tuple(grams), tuple(counts))

    def _tables(self, min_count: int, max_vocab: int) -> tuple[CountTables, np.ndarray]:
        """The final tables and the map from temporary to final ids."""
        if isinstance(min_count, bool) or not isinstance(min_count, int) or min_count < 1:
            raise InvalidArgumentError(f"min_count must be an integer >= 1, got {min_count!r}")
        if isinstance(max_vocab, bool) or not isinstance(max_vocab, int) or max_vocab < 1:
            raise InvalidArgumentError(f"max_vocab must be an integer >= 1, got {max_vocab!r}")
        self._flush()
        n_types = len(self._surfaces)
        tok = np.zeros(n_types, np.int64)
        tok[: len(self._tok_counts)] = self._tok_counts
        initial = np.zeros(n_types, np.int64)
        initial[: len(self._initial_counts)] = self._initial_counts

        # merge spellings case-insensitively
        folded = fold_all(self._surfaces[3:])
        key_list = list(dict.fromkeys(folded))  # distinct keys in order of first spelling
        key_index = {k: i for i, k in enumerate(key_list)}
        tid_key = np.zeros(n_types, dtype=np.int64)
        tid_key[3:] = np.fromiter(map(key_index.__getitem__, folded), dtype=np.int64, count=n_types - 3)
        del folded, key_index
        key_counts = np.bincount(tid_key[3:], weights=tok[3:], minlength=len(key_list)).astype(np.int64)
        chosen = _choose(key_counts, key_list, min_count, max_vocab)
        vocab = [key_list[i] for i in chosen]
        n = len(vocab)
        eos, unk, bos = n, n + 1, n + 2
        key_wid = np.full(max(len(key_list), 1), unk, dtype=np.int64)  # tid_key is 0 for the reserved ids
        key_wid[np.asarray(chosen, dtype=np.int64)] = np.arange(n)
        tid_map = key_wid[tid_key]
        tid_map[_BOS_T], tid_map[_EOS_T], tid_map[_UNK_T] = bos, eos, unk

        # each word's spellings (temporary ids), grouped by final id
        in_vocab = np.flatnonzero(tid_map[3:] < n) + 3
        spellings = in_vocab[np.argsort(tid_map[in_vocab], kind="stable")]
        bounds = np.searchsorted(tid_map[spellings], np.arange(n + 1)).tolist()
        spell_list = spellings.tolist()
        displays = [self._display(vocab[w], spell_list[bounds[w] : bounds[w + 1]], tok, initial) for w in range(n)]

        unigram = np.bincount(tid_map[1:], weights=tok[1:], minlength=n + 2).astype(np.int64)[: n + 2]
        left, right, counts = self._final_pairs(tid_map, n + 3)
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
        tables = CountTables(
            keys=vocab,
            displays=displays,
            unigram=unigram,
            pair_left=left,
            pair_right=right,
            pair_count=counts,
            stats=stats,
        )
        return tables, tid_map

    def _final_pairs(self, tid_map: np.ndarray, width: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Pair counts over final ids, sorted by (history, next): uint32 ids, int64 counts."""
        id_type = np.uint32 if width <= 1 << 32 else np.int64

        def to_final(keys: np.ndarray) -> tuple[np.ndarray, ...]:
            return (tid_map[keys >> 32] * width + tid_map[keys & _LOW32],)

        def first_bin(keys: np.ndarray) -> np.ndarray:  # buckets by final history
            return tid_map[keys >> 32]  # type: ignore[no-any-return]

        keys, counts = self._final_columns(self._pairs, to_final, _sum_by_key, first_bin, width, width)
        return (keys // width).astype(id_type), (keys % width).astype(id_type), counts

    def _final_triples(self, tid_map: np.ndarray, width: int) -> tuple[np.ndarray, np.ndarray]:
        """Triple counts over final ids: a sorted ``(k, 3)`` int64 array and int64 counts."""
        assert self._triples is not None
        # the context (u, v) as one key u * width + v (< width², well inside int64), w beside it;
        # buckets by the context's top bits, so no context (e.g. one starting with <s>) is
        # tied to the size of all the triples sharing its first word
        n_bins = min(1 << 20, max(1 << 10, (self.memory_cap or 0) // 64))
        shift = max(0, (width * width - 1).bit_length() - (n_bins - 1).bit_length())

        def to_final(ctx: np.ndarray, w: np.ndarray) -> tuple[np.ndarray, ...]:
            return tid_map[ctx >> 32] * width + tid_map[ctx & _LOW32], tid_map[w]

        def reduce(ctx: np.ndarray, w: np.ndarray, counts: np.ndarray) -> tuple[np.ndarray, ...]:
            if width > _PACK3_LIMIT:
                return _sum_by_keys(ctx, w, counts)
            keys, sums = _sum_by_key(ctx * width + w, counts)
            return keys // width, keys % width, sums

        def first_bin(ctx: np.ndarray, w: np.ndarray) -> np.ndarray:
            return (tid_map[ctx >> 32] * width + tid_map[ctx & _LOW32]) >> shift  # type: ignore[no-any-return]

        if self.memory_cap is None and width <= _PACK3_LIMIT:
            fast = self._final_triples_packed(tid_map, width)
            if fast is not None:
                return fast
        n_bins = ((width * width - 1) >> shift) + 1
        ctx, w, counts = self._final_columns(self._triples, to_final, reduce, first_bin, n_bins, 1 << shift)
        grams = np.empty((len(counts), 3), dtype=np.int64)
        grams[:, 2] = w
        del w
        np.remainder(ctx, width, out=grams[:, 1])
        ctx //= width
        grams[:, 0] = ctx
        return grams, counts

    def _final_triples_packed(self, tid_map: np.ndarray, width: int) -> tuple[np.ndarray, np.ndarray] | None:
        """:meth:`_final_triples` without a cap when a final triple key and a partial count
        fit side by side in one int64 (else None): the key ``(u * width + v) * width + w``
        and the count are written into one array, part by part, sorted in place and summed,
        so the largest step of order 3 makes few temporary arrays."""
        assert self._triples is not None
        parts = self._triples.parts
        total = sum(len(p[0]) for p in parts)
        if total == 0:
            return np.zeros((0, 3), np.int64), np.zeros(0, np.int64)
        count_bits = max(int(p[2].max()) for p in parts if len(p[0])).bit_length()
        if (width**3 - 1).bit_length() + count_bits > 63:
            return None
        both = np.empty(total, dtype=np.int64)
        lo = 0
        for ctx, w, counts in parts:
            seg = both[lo : lo + len(ctx)]
            np.take(tid_map, ctx >> 32, out=seg)
            seg *= width
            seg += tid_map[ctx & _LOW32]
            seg *= width
            seg += tid_map[w]
            seg <<= count_bits
            seg |= counts
            lo += len(ctx)
        both.sort()
        keys = both >> count_bits
        both &= (1 << count_bits) - 1
        starts = np.flatnonzero(np.concatenate(([True], keys[1:] != keys[:-1])))
        sums = np.add.reduceat(both, starts)
        del both
        keys = keys[starts]
        del starts
        grams = np.empty((len(keys), 3), dtype=np.int64)
        np.remainder(keys, width, out=grams[:, 2])
        keys //= width
        np.remainder(keys, width, out=grams[:, 1])
        keys //= width
        grams[:, 0] = keys
        return grams, sums.astype(np.int64, copy=False)

    def _final_columns(
        self,
        partial: _Partial,
        to_final: Any,
        reduce: Any,
        first_bin: Any,
        n_bins: int,
        bin_width: int,
    ) -> list[np.ndarray]:
        """One order's counts over final ids as sorted columns (keys..., counts).

        ``to_final`` maps temporary key columns to final ones (the first column's order is
        the bucket order), ``reduce`` sums equal keys and sorts, ``first_bin`` gives a
        temporary key's bucket bin, ``n_bins`` of them, bin ``i`` starting at first-column
        key ``i * bin_width``. Without a cap every part is summed in memory; under a cap,
        a first pass counts the partial entries of each bin, the bins are cut into
        buckets of at most a slice each (one bin may exceed it), each slice is remapped,
        summed and appended to its buckets' files, and each bucket is summed on its own.
        """
        n_cols = partial.n_keys + 1
        if self.memory_cap is None:  # everything mapped to final ids, then summed in one sort
            parts = [(*to_final(*columns[:-1]), columns[-1]) for columns in partial.slices()]
            if not parts:
                return [np.zeros(0, np.int64) for _ in range(n_cols)]
            joined = [np.concatenate([p[i] for p in parts]) if len(parts) > 1 else parts[0][i] for i in range(n_cols)]
            del parts
            return list(reduce(*joined))
        import tempfile

        slice_len = self._slice_len
        assert slice_len is not None
        # pass 1: how many partial entries each bin has
        per_bin = np.zeros(n_bins, dtype=np.int64)
        for columns in partial.slices(slice_len):
            per_bin += np.bincount(first_bin(*columns[:-1]), minlength=n_bins)
        # bins cut into buckets of at most slice_len entries (one bin may exceed it)
        cum = np.cumsum(per_bin)
        del per_bin
        edges = [0]
        while edges[-1] < n_bins:
            start = int(cum[edges[-1] - 1]) if edges[-1] else 0
            nxt = int(np.searchsorted(cum, start + slice_len, side="right"))
            edges.append(min(n_bins, max(nxt, edges[-1] + 1)))
        del cum
        edge_keys = np.asarray(edges[1:-1], dtype=np.int64) * bin_width
        with tempfile.TemporaryDirectory(prefix="nextword-final-") as tmp:
            names = [os.path.join(tmp, f"b{i:05d}") for i in range(len(edges) - 1)]
            sizes = [0] * len(names)
            # pass 2: remap each slice, sum it, append its pieces to the buckets' files
            for columns in partial.slices(slice_len):
                summed = reduce(*to_final(*columns[:-1]), columns[-1])
                del columns
                cuts = [0, *np.searchsorted(summed[0], edge_keys).tolist(), len(summed[0])]
                for b in range(len(names)):
                    lo, hi = cuts[b], cuts[b + 1]
                    if hi > lo:
                        for i, column in enumerate(summed):
                            with open(f"{names[b]}.{i}", "ab") as f:
                                column[lo:hi].tofile(f)
                        sizes[b] += hi - lo
                del summed
            # pass 3: sum each bucket; the buckets are in key order
            outs: list[list[np.ndarray]] = [[] for _ in range(n_cols)]
            for name, size in zip(names, sizes):
                if not size:
                    continue
                loaded = [np.fromfile(f"{name}.{i}", dtype=np.int64) for i in range(n_cols)]
                for i in range(n_cols):
                    os.remove(f"{name}.{i}")
                for out, column in zip(outs, reduce(*loaded)):
                    out.append(column)
                del loaded
        # concatenate one column at a time, dropping its parts, to keep the peak low
        result = []
        for out in outs:
            result.append(np.concatenate(out) if out else np.zeros(0, np.int64))
            out.clear()
        return result

    def _display(self, key: str, tids: list[int], tok: np.ndarray, initial: np.ndarray) -> str:
        """Most frequent spelling away from sentence starts, where capitals are positional.

        Ties prefer the spelling equal to the key, then code-point order. A word seen only
        at sentence starts keeps the key when its capital is explained by position
        ("Thanks" -> "thanks") and its spelling otherwise ("NASA").
        """
        surfaces = self._surfaces
        if len(tids) == 1:
            best = tids[0]
            if tok[best] - initial[best] > 0:
                return surfaces[best]
        else:
            best = _most(tids, [int(tok[t] - initial[t]) for t in tids], surfaces, key)
            if tok[best] - initial[best] > 0:
                return surfaces[best]
            best = _most(tids, [int(initial[t]) for t in tids], surfaces, key)
        s = surfaces[best]
        if s[:1].upper() + s[1:] == s and fold(s[:1]) + s[1:] == key:
            return key
        return s


def auto_workers(paths: Iterable[str]) -> int:
    """Counting processes when none are asked for: one per core for inputs of at least
    :data:`PARALLEL_MIN_BYTES` on disk (or of unknown size: standard input), else one.

    Every setting writes the same model file, so this only picks the fastest.
    """
    total = 0
    for name in paths:
        if name == "-":
            return os.cpu_count() or 1
        try:
            total += os.path.getsize(name)
        except OSError:
            continue  # reported by whoever opens it
    return (os.cpu_count() or 1) if total >= PARALLEL_MIN_BYTES else 1


def batch_chars(memory_cap: int | None) -> int:
    """Characters per batch of joined messages: about a million, less under a small cap."""
    return _BATCH_CHARS if memory_cap is None else max(1 << 12, min(_BATCH_CHARS, memory_cap // 512))


def join_batches(texts: Iterable[str], limit: int) -> Iterator[tuple[str, int]]:
    """Messages joined by line breaks into batches of about ``limit`` characters, with
    how many messages each holds (what :meth:`CountBuilder._add_joined` takes)."""
    batch: list[str] = []
    chars = 0
    for t in texts:
        if not isinstance(t, str):
            raise InvalidArgumentError(f"messages must be str, got {type(t).__name__}")
        batch.append(t)
        chars += len(t)
        if chars >= limit:
            yield "\n".join(batch), len(batch)
            batch, chars = [], 0
    if batch:
        yield "\n".join(batch), len(batch)


def _choose(counts: np.ndarray, keys: list[str], min_count: int, max_vocab: int) -> list[int]:
    """Indices of the vocabulary: count >= min_count, the max_vocab most frequent,
    ordered by (count descending, key in code-point order)."""
    eligible = np.flatnonzero(counts >= min_count)
    if len(eligible) > max_vocab:
        c = counts[eligible]
        cut = int(np.partition(c, len(c) - max_vocab)[len(c) - max_vocab])  # the max_vocab-th largest
        above = eligible[c > cut]
        tied = sorted(eligible[c == cut].tolist(), key=keys.__getitem__)
        eligible = np.concatenate([above, np.asarray(tied[: max_vocab - len(above)], dtype=np.int64)])
    cl = counts.tolist()
    return sorted(eligible.tolist(), key=lambda i: (-cl[i], keys[i]))


def _most(tids: list[int], values: list[int], surfaces: list[str], key: str) -> int:
    """The spelling with the largest value; ties go to the key itself, then code-point order."""
    top = max(values)
    tied = [t for t, v in zip(tids, values) if v == top]
    if len(tied) == 1:
        return tied[0]
    for t in tied:
        if surfaces[t] == key:
            return t
    return min(tied, key=surfaces.__getitem__)


def _sum_by_key(keys: np.ndarray, counts: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Sum ``counts`` of equal ``keys``; returns sorted unique keys and their totals."""
    if len(keys) == 0:
        return keys.astype(np.int64), counts.astype(np.int64)
    key_bits = int(keys.max()).bit_length()
    count_bits = int(counts.max()).bit_length()
    if key_bits + count_bits <= 63 and int(keys.min()) >= 0 and int(counts.min()) >= 0:
        # key and count side by side in one int64: a plain sort (much faster than
        # argsort and two gathers), equal keys adjacent whatever their counts
        both = np.sort((keys << count_bits) | counts)
        k = both >> count_bits
        c = both & ((1 << count_bits) - 1)
        del both
    else:
        order = np.argsort(keys)  # keys end up distinct and integer sums are exact: any sort will do
        k = keys[order]
        c = counts[order]
        del order
    starts = np.flatnonzero(np.concatenate(([True], k[1:] != k[:-1])))
    return k[starts], np.add.reduceat(c, starts).astype(np.int64)


def _count_triples(a: np.ndarray, n_types: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Distinct triples of a token stream (temporary ids below ``n_types``) with their
    counts, as sorted columns ``(u << 32) | v``, ``w``, count.

    A triple neither starts at ``</s>`` nor holds it in the middle: (</s>, <s>, w) and
    (x, </s>, <s>) join two sentences; so (<s>, w1, w2) is the first of a sentence.
    """
    if len(a) < 3:
        empty = np.zeros(0, np.int64)
        return empty, empty.copy(), empty.copy()
    u, v, w = a[:-2], a[1:-1], a[2:]
    keep = (u != _EOS_T) & (v != _EOS_T)
    if n_types <= _PACK3_LIMIT:  # one key per triple, built and sorted with few temporary arrays
        packed = u << 42
        packed |= v << 21
        packed |= w
        packed = packed[keep]
        del keep
        if len(packed) == 0:
            return packed, packed.copy(), packed.copy()
        packed.sort()
        starts = np.flatnonzero(np.concatenate(([True], packed[1:] != packed[:-1])))
        counts = np.diff(np.append(starts, len(packed)))
        keys = packed[starts]
        del packed, starts
        ctx = keys >> 42
        ctx <<= 32
        ctx |= (keys >> 21) & _LOW21
        keys &= _LOW21
        return ctx, keys, counts.astype(np.int64, copy=False)
    ctx, last = ((u << 32) | v)[keep], w[keep]
    del keep
    return _sum_by_keys(ctx, last, np.ones(len(ctx), np.int64))


def _sum_triples_tmp(ctx: np.ndarray, w: np.ndarray, counts: np.ndarray, n_types: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """:func:`_sum_by_keys` for triples over temporary ids below ``n_types``: one packed
    int64 key per triple when the ids fit in 21 bits each."""
    if n_types > _PACK3_LIMIT:
        return _sum_by_keys(ctx, w, counts)
    keys, sums = _sum_by_key(((ctx >> 32) << 42) | ((ctx & _LOW32) << 21) | w, counts)
    return ((keys >> 42) << 32) | ((keys >> 21) & _LOW21), keys & _LOW21, sums


def _sum_by_keys(hi: np.ndarray, lo: np.ndarray, counts: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Sum ``counts`` of equal (hi, lo) rows; returns the distinct rows sorted by (hi, lo)
    and their totals (two sort keys: for ids too many to pack into one int64)."""
    if len(hi) == 0:
        return hi.astype(np.int64), lo.astype(np.int64), counts.astype(np.int64)
    order = np.lexsort((lo, hi))
    h = hi[order]
    low = lo[order]
    c = counts[order]
    del order
    starts = np.flatnonzero(np.concatenate(([True], (h[1:] != h[:-1]) | (low[1:] != low[:-1]))))
    return h[starts], low[starts], np.add.reduceat(c, starts).astype(np.int64)


def _count_worker(inbox: Any, outbox: Any, memory_cap: int | None, spill_root: str, order: int) -> None:
    """Worker process: count every batch it is sent into one builder, then send it back."""
    builder = CountBuilder(memory_cap=memory_cap, order=order)
    builder._spill_root = spill_root
    while True:
        item = inbox.get()
        if item is None:
            break
        builder._add_joined(*item)
    builder._flush()
    outbox.put(builder)


def count_in_processes(
    messages: Iterable[str], workers: int, *, memory_cap: int | None = None, order: int = DEFAULT_ORDER
) -> CountBuilder:
    """Count batches of messages in ``workers`` processes and merge their counts.

    The result equals one builder counting every message (``CountBuilder(memory_cap=...,
    order=...)``; merging is exact). This process only reads and joins messages into
    batches of about a million characters; each worker keeps one builder for everything
    it is sent, so partial counts are merged once per worker at the end, not once per
    batch. At most ``2 × workers`` batches wait in the queue, so memory does not grow
    with the input. Under ``memory_cap`` every worker gets an equal share of the cap
    (and this process one more share while counting, the whole cap while merging);
    workers spill their sorted runs into a directory this process owns and removes.
    """
    import multiprocessing as mp
    import queue as queue_mod
    import tempfile

    if isinstance(workers, bool) or not isinstance(workers, int) or workers < 1:
        raise InvalidArgumentError(f"workers must be an integer >= 1, got {workers!r}")
    CountBuilder(memory_cap=memory_cap, order=order)  # check the settings before starting processes
    method = "fork" if "fork" in mp.get_all_start_methods() else "spawn"
    ctx: Any = mp.get_context(method)
    share = None if memory_cap is None else max(1 << 16, memory_cap // (workers + 1))
    limit = batch_chars(share)
    with tempfile.TemporaryDirectory(prefix="nextword-counts-") as spill_root:
        inbox = ctx.Queue(maxsize=2 * workers)
        outbox = ctx.Queue()
        procs = [
            ctx.Process(target=_count_worker, args=(inbox, outbox, share, spill_root, order), daemon=True)
            for _ in range(workers)
        ]
        for proc in procs:
            proc.start()

        def check() -> None:
            for proc in procs:
                if proc.exitcode not in (None, 0):
                    raise RuntimeError(f"a counting worker process died (exit code {proc.exitcode})")

        def put(item: Any) -> None:
            while True:
                try:
                    inbox.put(item, timeout=0.5)
                    return
                except queue_mod.Full:
                    check()

        try:
            for item in join_batches(messages, limit):
                put(item)
            for _ in procs:
                put(None)
            builder: CountBuilder | None = None
            for _ in procs:
                while True:
                    try:
                        part = outbox.get(timeout=0.5)
                        break
                    except queue_mod.Empty:
                        check()
                if builder is None:  # the first part becomes the result: no remapping
                    builder = part
                    builder._adopt_runs(memory_cap)
                else:
                    builder.merge(part)  # re-spills the part's runs into the builder's own directory
                del part
            for proc in procs:
                proc.join()
            assert builder is not None
        finally:
            inbox.cancel_join_thread()  # never hang on batches no worker will read
            for proc in procs:
                if proc.is_alive():
                    proc.terminate()
                    proc.join()
    return builder
