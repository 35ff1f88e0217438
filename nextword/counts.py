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
from .text import _HAS_LETTER, _TOKEN_RE, fold, fold_all, normalize

__all__ = ["CountBuilder", "CountTables", "DEFAULT_MIN_COUNT", "DEFAULT_MAX_VOCAB", "PARALLEL_MIN_BYTES", "auto_workers"]

#: Defaults sized for a phone keyboard: ~30,000 words covers everyday text (common practice).
DEFAULT_MAX_VOCAB = 30_000
#: Words seen once are mostly typos and rare names; dropping them shrinks models (common practice).
DEFAULT_MIN_COUNT = 2

_BOS_T, _EOS_T, _UNK_T = 0, 1, 2  # temporary ids of the reserved symbols
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
        self._runs: list[tuple[str, int]] = []
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
        self._part_keys: list[np.ndarray] = []
        self._part_counts: list[np.ndarray] = []
        self.messages = 0
        self.sentences = 0

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
        del a, left, right, keep
        self._part_keys.append(keys)
        self._part_counts.append(counts.astype(np.int64))
        del keys, counts
        if len(self._part_keys) >= 8 or self._over_cap():
            self._merge_parts()

    def _over_cap(self) -> bool:
        if self.memory_cap is None:
            return False
        held = sum(k.nbytes for k in self._part_keys) + sum(c.nbytes for c in self._part_counts)
        return held > self.memory_cap // 16

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
        for keys, counts in other._pair_parts(self._slice_len):
            left, right = remap[keys >> 32], remap[keys & 0xFFFFFFFF]
            self._part_keys.append((left << 32) | right)
            self._part_counts.append(np.array(counts))
            del left, right, keys, counts
            if len(self._part_keys) >= 8 or self._over_cap():  # inside the loop: runs arrive one by one
                self._merge_parts()
        self.messages += other.messages
        self.sentences += other.sentences

    def _merge_parts(self) -> None:
        keys, counts = _sum_by_key(np.concatenate(self._part_keys), np.concatenate(self._part_counts))
        self._part_keys = [keys]
        self._part_counts = [counts]
        if self.memory_cap is not None and keys.nbytes + counts.nbytes > self.memory_cap // 16:
            self._spill()

    def _spill(self) -> None:
        """Write the merged in-memory pairs as one sorted run on disk and drop them.

        A run is two raw little-endian int64 files (keys, counts), read back in slices
        with plain reads, so a run never has to fit in memory at once.
        """
        import tempfile

        if self._spill_root is not None:
            root = self._spill_root
        else:
            if self._spill_dir is None:
                self._spill_dir = tempfile.TemporaryDirectory(prefix="nextword-counts-")
            root = self._spill_dir.name
        stem = os.path.join(root, f"run{os.getpid()}-{id(self):x}-{len(self._runs):05d}")
        keys, counts = self._part_keys[0], self._part_counts[0]
        keys.astype("<i8", copy=False).tofile(stem + ".keys")
        counts.astype("<i8", copy=False).tofile(stem + ".counts")
        self._runs.append((stem, len(keys)))
        self._part_keys, self._part_counts = [], []

    def _adopt_runs(self, memory_cap: int | None) -> None:
        """Take ownership of runs spilled into someone else's directory (a worker's
        builder becoming the result): move them into a directory of our own, and take
        the given memory cap for the work that follows."""
        import shutil
        import tempfile

        self.memory_cap = memory_cap
        self._spill_root = None
        if self._runs:
            self._spill_dir = tempfile.TemporaryDirectory(prefix="nextword-counts-")
            moved = []
            for stem, length in self._runs:
                new = os.path.join(self._spill_dir.name, os.path.basename(stem))
                for ext in (".keys", ".counts"):
                    shutil.move(stem + ext, new + ext)
                moved.append((new, length))
            self._runs = moved

    @property
    def spilled_runs(self) -> int:
        """How many sorted runs of pair counts went to disk (0 without a memory cap)."""
        return len(self._runs)

    def _pair_parts(self, slice_len: int | None = None) -> Iterator[tuple[np.ndarray, np.ndarray]]:
        """Every partial pair count, spilled and in memory, in slices of at most ``slice_len``."""
        for stem, length in self._runs:
            step = length if slice_len is None else slice_len
            with open(stem + ".keys", "rb") as fk, open(stem + ".counts", "rb") as fc:
                done = 0
                while done < length:
                    m = min(step, length - done)
                    keys = np.fromfile(fk, dtype="<i8", count=m)
                    counts = np.fromfile(fc, dtype="<i8", count=m)
                    if len(keys) != m or len(counts) != m:
                        raise OSError(f"spilled run {stem} is shorter than written")
                    yield keys.astype(np.int64, copy=False), counts.astype(np.int64, copy=False)
                    done += m
        for keys, counts in zip(self._part_keys, self._part_counts):
            step = max(len(keys), 1) if slice_len is None else slice_len
            for i in range(0, len(keys), step):
                yield keys[i : i + step], counts[i : i + step]

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
        if isinstance(min_count, bool) or not isinstance(min_count, int) or min_count < 1:
            raise InvalidArgumentError(f"min_count must be an integer >= 1, got {min_count!r}")
        if isinstance(max_vocab, bool) or not isinstance(max_vocab, int) or max_vocab < 1:
            raise InvalidArgumentError(f"max_vocab must be an integer >= 1, got {max_vocab!r}")
        self._flush()
        if self._part_keys and not self._runs and self.memory_cap is None:
            self._merge_parts()
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
        return CountTables(
            keys=vocab,
            displays=displays,
            unigram=unigram,
            pair_left=left,
            pair_right=right,
            pair_count=counts,
            stats=stats,
        )

    def _final_pairs(self, tid_map: np.ndarray, width: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Pair counts over final ids, sorted by (history, next): uint32 ids, int64 counts."""
        id_type = np.uint32 if width <= 1 << 32 else np.int64
        if self.memory_cap is None:
            parts = []
            for keys, counts in self._pair_parts():
                parts.append(_sum_by_key(tid_map[keys >> 32] * width + tid_map[keys & 0xFFFFFFFF], counts))
            if not parts:
                return np.zeros(0, id_type), np.zeros(0, id_type), np.zeros(0, np.int64)
            if len(parts) == 1:
                keys, counts = parts[0]
            else:
                keys, counts = _sum_by_key(np.concatenate([k for k, _ in parts]), np.concatenate([c for _, c in parts]))
            del parts
            return (keys // width).astype(id_type), (keys % width).astype(id_type), counts
        import tempfile

        slice_len = self._slice_len
        assert slice_len is not None
        # pass 1: how many partial entries each final history has
        per_history = np.zeros(width, dtype=np.int64)
        for keys, _ in self._pair_parts(slice_len):
            per_history += np.bincount(tid_map[keys >> 32], minlength=width)
        # histories cut into buckets of at most slice_len entries (one history may exceed it)
        cum = np.cumsum(per_history)
        edges = [0]
        while edges[-1] < width:
            start = int(cum[edges[-1] - 1]) if edges[-1] else 0
            nxt = int(np.searchsorted(cum, start + slice_len, side="right"))
            edges.append(min(width, max(nxt, edges[-1] + 1)))
        edge_keys = np.asarray(edges[1:-1], dtype=np.int64) * width
        with tempfile.TemporaryDirectory(prefix="nextword-final-") as tmp:
            names = [os.path.join(tmp, f"b{i:05d}") for i in range(len(edges) - 1)]
            sizes = [0] * len(names)
            # pass 2: remap each slice, sum it, append its pieces to the buckets' files
            for keys, counts in self._pair_parts(slice_len):
                fk, fc = _sum_by_key(tid_map[keys >> 32] * width + tid_map[keys & 0xFFFFFFFF], counts)
                del keys, counts
                cuts = [0, *np.searchsorted(fk, edge_keys).tolist(), len(fk)]
                for b in range(len(names)):
                    lo, hi = cuts[b], cuts[b + 1]
                    if hi > lo:
                        with open(names[b] + ".k", "ab") as f:
                            fk[lo:hi].tofile(f)
                        with open(names[b] + ".c", "ab") as f:
                            fc[lo:hi].tofile(f)
                        sizes[b] += hi - lo
            # pass 3: sum each bucket; the buckets are in key order
            out_l: list[np.ndarray] = []
            out_r: list[np.ndarray] = []
            out_c: list[np.ndarray] = []
            for name, size in zip(names, sizes):
                if not size:
                    continue
                k, c = _sum_by_key(np.fromfile(name + ".k", dtype=np.int64), np.fromfile(name + ".c", dtype=np.int64))
                os.remove(name + ".k")
                os.remove(name + ".c")
                out_l.append((k // width).astype(id_type))
                out_r.append((k % width).astype(id_type))
                out_c.append(c)
                del k, c
        if not out_c:
            return np.zeros(0, id_type), np.zeros(0, id_type), np.zeros(0, np.int64)
        # concatenate one column at a time, dropping its parts, to keep the peak low
        columns = []
        for parts_ in (out_l, out_r, out_c):
            columns.append(np.concatenate(parts_))
            parts_.clear()
        return columns[0], columns[1], columns[2]

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
    order = np.argsort(keys, kind="stable")
    k = keys[order]
    c = counts[order]
    starts = np.flatnonzero(np.concatenate(([True], k[1:] != k[:-1])))
    return k[starts], np.add.reduceat(c, starts).astype(np.int64)
