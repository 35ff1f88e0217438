"""Query-side access to the successor lists of a model file, whatever their layout.

The store lays the n-grams out as lists of successors per context; how a list is coded is
the file's business (docs/SEAMS.md, "The successor seam"): formats 1.0–1.5 store each
successor as its alphabetical position in one plain array (``SUCC``, ``TSUC``), format 1.6
as chunked Elias-Fano sequences (:mod:`nextword.succinct`, docs/FORMAT.md §7.18), the
trigram successors remapped to their index in the bigram row of v. The query code asks
these views, never the arrays, so a new layout is one new pair of classes here.

Every method takes the context it is about (v for a bigram row, the trigram context's
bigram entry j and its v), because a compressed layout needs it to turn a stored number
into a position; the plain layout ignores it. Entry indices are global (the row's entries
are ``rows[v] … rows[v+1]−1``, a trigram context's ``span(j)``), as the value codecs'.
"""

from __future__ import annotations

import bisect
import sys
from abc import ABC, abstractmethod
from collections import OrderedDict
from typing import Final

import numpy as np

from .codecs import ValueView
from .errors import ModelFormatError
from .succinct import ChunkedEF, PrefixSums

__all__ = [
    "BigramLists", "TrigramLists", "PlainBigramLists", "EFBigramLists", "PlainTrigramLists", "EFTrigramLists",
    "SparseTable", "PlainSparseTable", "EFSparseTable", "RowCounts", "CTX_BLOCK", "native_view",
]

#: bigram entries per block of the plain layout's TCTB (docs/FORMAT.md §7.14)
CTX_BLOCK: Final = 16


def native_view(arr: np.ndarray) -> memoryview:
    """A memoryview for fast scalar reads (Python ints) of a little-endian array."""
    if sys.byteorder != "little":  # pragma: no cover - no big-endian CI
        arr = arr.astype(arr.dtype.newbyteorder("="))
    fmt = {1: "B", 2: "H", 4: "I", 8: "Q"}[arr.dtype.itemsize]
    return memoryview(np.ascontiguousarray(arr)).cast("B").cast(fmt)  # type: ignore[arg-type,call-overload]


class BigramLists(ABC):
    """The alphabetical positions of the successors of each bigram context (row) v."""

    @abstractmethod
    def lower_bound(self, v: int, pos: int, s: int, e: int) -> int:
        """The first entry in [s, e) (inside row v) whose position is ≥ ``pos`` (e if none)."""

    @abstractmethod
    def at(self, v: int, i: int) -> int:
        """The position of entry ``i`` of row v."""

    @abstractmethod
    def slice(self, v: int, s: int, e: int) -> np.ndarray:
        """The positions of entries s … e−1 of row v (int64)."""

    @abstractmethod
    def take(self, v: int, idx: np.ndarray) -> np.ndarray:
        """The positions of the entries ``idx`` of row v (int64)."""

    @abstractmethod
    def all(self) -> np.ndarray:
        """The position of every entry (int64, entry order): verification, export, pruning."""

    def find(self, v: int, pos: int, s: int, e: int) -> int:
        """The entry of row v in [s, e) with position ``pos``, or −1."""
        i = self.lower_bound(v, pos, s, e)
        return i if i < e and self.at(v, i) == pos else -1


class PlainBigramLists(BigramLists):
    """Formats 1.0–1.5: ``SUCC``, one position per entry (u16 or u32)."""

    def __init__(self, succ: np.ndarray) -> None:
        self._a = succ
        self._mv = native_view(succ)

    def lower_bound(self, v: int, pos: int, s: int, e: int) -> int:
        return bisect.bisect_left(self._mv, pos, s, e)

    def at(self, v: int, i: int) -> int:
        return self._mv[i]  # type: ignore[no-any-return]

    def slice(self, v: int, s: int, e: int) -> np.ndarray:
        return self._a[s:e].astype(np.int64)

    def take(self, v: int, idx: np.ndarray) -> np.ndarray:
        return self._a[np.asarray(idx, dtype=np.int64)].astype(np.int64)

    def all(self) -> np.ndarray:
        return np.asarray(self._a, dtype=np.int64)


#: decoded positions the compact views keep per model (int32: at most 8 MB, about the plain
#: layout's successor array of a 5M-word model), and trigram contexts; least recently used go first
_ROW_CACHE_ENTRIES: Final = 1 << 21
_CONTEXT_CACHE: Final = 16384


class EFBigramLists(BigramLists):
    """Format 1.6: Y = v·(n+2) + position, one chunked Elias-Fano sequence (§7.18).

    A row is decoded whole the first time a query touches it (vectorised) and kept in a
    bounded cache: a query searches its row two or three times and reads some of its
    entries, and a keyboard asks about the same frequent contexts again and again, so the
    second touch costs what the plain layout costs (a bisect on a memoryview).
    """

    def __init__(self, where: str, ef: ChunkedEF, rows: np.ndarray, n_pos: int) -> None:
        self._where, self._ef, self._u = where, ef, n_pos
        self._rows = np.ascontiguousarray(rows, dtype=np.int64)
        self._rows_l = memoryview(self._rows).cast("B").cast("q")  # type: ignore[arg-type]  # scalar reads
        self._cache: OrderedDict[int, tuple[int, np.ndarray, memoryview]] = OrderedDict()
        self._cached = 0

    def _damaged(self, v: int) -> ModelFormatError:
        return ModelFormatError(f"{self._where}: damaged model data: a successor of row {v} outside the positions")

    def row(self, v: int) -> tuple[int, np.ndarray, memoryview]:
        """(first entry, positions as int32, a memoryview of them) of row v, decoded once and cached."""
        got = self._cache.get(v)
        if got is not None:
            self._cache.move_to_end(v)
            return got
        rs, re_ = self._rows_l[v], self._rows_l[v + 1]
        p = self._ef.slice(rs, re_) - v * self._u
        if len(p) and (int(p.min()) < 0 or int(p.max()) >= self._u):
            raise self._damaged(v)
        p32 = np.ascontiguousarray(p, dtype=np.int32)
        while self._cache and self._cached + len(p32) > _ROW_CACHE_ENTRIES:
            self._cached -= len(self._cache.popitem(last=False)[1][1])
        got = (rs, p32, memoryview(p32).cast("B").cast("i"))  # type: ignore[arg-type]
        self._cache[v] = got
        self._cached += len(p32)
        return got

    def lower_bound(self, v: int, pos: int, s: int, e: int) -> int:
        rs, _, mv = self.row(v)
        return rs + bisect.bisect_left(mv, pos, s - rs, e - rs)

    def at(self, v: int, i: int) -> int:
        rs, _, mv = self.row(v)
        return mv[i - rs]  # type: ignore[no-any-return]

    def slice(self, v: int, s: int, e: int) -> np.ndarray:
        rs, p, _ = self.row(v)
        return p[s - rs : e - rs].astype(np.int64)

    def take(self, v: int, idx: np.ndarray) -> np.ndarray:
        rs, p, _ = self.row(v)
        return p[np.asarray(idx, dtype=np.int64) - rs].astype(np.int64)

    def all(self) -> np.ndarray:
        owner = np.repeat(np.arange(len(self._rows) - 1, dtype=np.int64), np.diff(self._rows))
        p = self._ef.all() - owner * self._u
        if len(p) and (int(p.min()) < 0 or int(p.max()) >= self._u):
            raise ModelFormatError(f"{self._where}: damaged model data: a bigram successor outside the positions")
        return p


class TrigramLists(ABC):
    """The successors of each trigram context, found by its bigram entry j = (u, v)."""

    @abstractmethod
    def span(self, j: int) -> tuple[int, int]:
        """The context's entries [s, e) (s == e: not a trigram context); checked inside the level."""

    @abstractmethod
    def lengths(self) -> np.ndarray:
        """The number of successors of every bigram entry (int64)."""

    @abstractmethod
    def lower_bound(self, j: int, v: int, pos: int, s: int, e: int) -> int:
        """The first entry in [s, e) (inside context j, whose last word is v) with position ≥ ``pos``."""

    @abstractmethod
    def at(self, j: int, v: int, i: int) -> int:
        """The position of entry ``i`` of context j."""

    @abstractmethod
    def slice(self, j: int, v: int, s: int, e: int) -> np.ndarray:
        """The positions of entries s … e−1 of context j (int64)."""

    @abstractmethod
    def bigram_entries(self, j: int, v: int, s: int, e: int) -> np.ndarray:
        """For entries s … e−1 of context j (u, v), the bigram entry (v, w) of each successor w, −1 if not stored."""

    @abstractmethod
    def all(self) -> np.ndarray:
        """The position of every trigram entry (int64, entry order)."""


class PlainTrigramLists(TrigramLists):
    """Formats 1.4/1.5: ``TSUC`` positions, lengths in ``TLEN`` (a codec view) with block bases ``TCTB``."""

    def __init__(self, where: str, tsuc: np.ndarray, tctb: np.ndarray, tlen: ValueView, bigrams: BigramLists, rows: memoryview) -> None:
        self._where, self._a, self._mv = where, tsuc, native_view(tsuc)
        self._tctb, self._tlen = native_view(tctb), tlen
        self._t = len(tsuc)
        self._s2, self._rows = bigrams, rows

    def span(self, j: int) -> tuple[int, int]:
        b0 = j - (j % CTX_BLOCK)
        s = self._tctb[j // CTX_BLOCK] + (sum(self._tlen.slice(b0, j)) if j > b0 else 0)
        e = s + self._tlen.at(j)
        if not 0 <= s <= e <= self._t:
            raise ModelFormatError(f"{self._where}: damaged model data: trigram context {j} has entries [{s}, {e})")
        return s, e

    def lengths(self) -> np.ndarray:
        return np.asarray(self._tlen.all(), dtype=np.int64)

    def lower_bound(self, j: int, v: int, pos: int, s: int, e: int) -> int:
        return bisect.bisect_left(self._mv, pos, s, e)

    def at(self, j: int, v: int, i: int) -> int:
        return self._mv[i]  # type: ignore[no-any-return]

    def slice(self, j: int, v: int, s: int, e: int) -> np.ndarray:
        return self._a[s:e].astype(np.int64)

    def bigram_entries(self, j: int, v: int, s: int, e: int) -> np.ndarray:
        rs, re_ = self._rows[v], self._rows[v + 1]
        tpos = self.slice(j, v, s, e)
        row = self._s2.slice(v, rs, re_)
        if len(row) == 0:
            return np.full(len(tpos), -1, dtype=np.int64)
        at = np.minimum(np.searchsorted(row, tpos), len(row) - 1)
        return np.where(row[at] == tpos, rs + at, -1).astype(np.int64)

    def all(self) -> np.ndarray:
        return np.asarray(self._a, dtype=np.int64)


class EFTrigramLists(TrigramLists):
    """Format 1.6: successors as their index x in v's bigram row, made one increasing sequence (§7.18).

    Y_i = x_i + B_j for the entries of context j, B_j = Y_{start(j)−1} + 1 (0 for the first
    entry of the level), so the level is one chunked Elias-Fano sequence and a context's
    successors cost about 2 + log₂(row length of v / context length) bits each. A context
    is decoded whole the first time a query touches it and kept in a bounded cache.
    """

    def __init__(self, where: str, ef: ChunkedEF, ptr: ChunkedEF, bigrams: EFBigramLists, rows: memoryview, alph: np.ndarray) -> None:
        self._where, self._ef, self._ptr, self._s2, self._rows, self._alph = where, ef, ptr, bigrams, rows, alph
        self._t = len(ef)
        self._cache: OrderedDict[int, tuple[int, int, np.ndarray, memoryview]] = OrderedDict()

    def _damaged(self, what: str) -> ModelFormatError:
        return ModelFormatError(f"{self._where}: damaged model data: {what}")

    def span(self, j: int) -> tuple[int, int]:
        got = self._cache.get(j)
        if got is not None:
            return got[0], got[1]
        s, e = self._ptr.at(j), self._ptr.at(j + 1)
        if not 0 <= s <= e <= self._t:
            raise self._damaged(f"trigram context {j} has entries [{s}, {e})")
        return s, e

    def lengths(self) -> np.ndarray:
        return np.diff(self._ptr.all())

    def context(self, j: int, v: int) -> tuple[int, int, np.ndarray, memoryview]:
        """(start, end, the row-v indices x as int32, a memoryview of them) of context j, decoded once and cached."""
        got = self._cache.get(j)
        if got is not None:
            self._cache.move_to_end(j)
            return got
        s, e = self.span(j)
        x = self._ef.slice(s, e) - (0 if s == 0 else self._ef.at(s - 1) + 1)
        rs, re_ = self._rows[v], self._rows[v + 1]
        if len(x) and (int(x.min()) < 0 or int(x.max()) >= re_ - rs):
            raise self._damaged(f"a successor of trigram context {j} outside the row of its last word")
        x32 = np.ascontiguousarray(x, dtype=np.int32)
        if len(self._cache) >= _CONTEXT_CACHE:
            self._cache.popitem(last=False)
        got = (s, e, x32, memoryview(x32).cast("B").cast("i"))  # type: ignore[arg-type]
        self._cache[j] = got
        return got

    def lower_bound(self, j: int, v: int, pos: int, s: int, e: int) -> int:
        start, _, _, mv = self.context(j, v)
        rs, re_ = self._rows[v], self._rows[v + 1]
        k = self._s2.lower_bound(v, pos, rs, re_) - rs
        return start + bisect.bisect_left(mv, k, s - start, e - start)

    def at(self, j: int, v: int, i: int) -> int:
        start, _, _, mv = self.context(j, v)
        return self._s2.at(v, self._rows[v] + mv[i - start])

    def slice(self, j: int, v: int, s: int, e: int) -> np.ndarray:
        if s >= e:
            return np.zeros(0, dtype=np.int64)
        return self._s2.take(v, self.bigram_entries(j, v, s, e))

    def bigram_entries(self, j: int, v: int, s: int, e: int) -> np.ndarray:
        start, _, x, _ = self.context(j, v)
        return x[s - start : e - start].astype(np.int64) + self._rows[v]

    def all(self) -> np.ndarray:
        starts = self._ptr.all()
        lens = np.diff(starts)
        y = self._ef.all()
        if len(y) == 0:
            return y
        ctx = np.flatnonzero(lens)
        first = starts[ctx]
        base = np.zeros(len(ctx), dtype=np.int64)
        nz = first > 0
        base[nz] = y[first[nz] - 1] + 1
        x = y - np.repeat(base, lens[ctx])
        succ = self._s2.all()
        rows = np.asarray(self._rows, dtype=np.int64)
        v = np.repeat(self._alph[succ[ctx]].astype(np.int64), lens[ctx])
        if int(x.min()) < 0 or bool((x >= rows[v + 1] - rows[v]).any()):
            raise self._damaged("a trigram successor outside the row of its context's last word")
        return succ[rows[v] + x]


class SparseTable(ABC):
    """A sorted sparse table index → value ≥ 1 (the dropped mass of trigram contexts); absent = 0."""

    @abstractmethod
    def get(self, i: int) -> int:
        """The value of index ``i`` (0 when it has none)."""

    @abstractmethod
    def all(self) -> tuple[np.ndarray, np.ndarray]:
        """(indices, values), both int64, indices increasing."""


class PlainSparseTable(SparseTable):
    """Formats 1.4/1.5: an index array and a value array (``TDRI``/``TDRV``)."""

    def __init__(self, idx: np.ndarray, val: np.ndarray) -> None:
        self._idx, self._val = idx, val
        self._mi, self._mv = native_view(idx), native_view(val)

    def get(self, i: int) -> int:
        j = bisect.bisect_left(self._mi, i)
        return self._mv[j] if j < len(self._mi) and self._mi[j] == i else 0  # type: ignore[no-any-return]

    def all(self) -> tuple[np.ndarray, np.ndarray]:
        return np.asarray(self._idx, dtype=np.int64), np.asarray(self._val, dtype=np.int64)


class EFSparseTable(SparseTable):
    """Format 1.6: the indices as one Elias-Fano sequence, the values as the prefix sums of another (§7.18)."""

    def __init__(self, where: str, label: str, idx: ChunkedEF, cum: ChunkedEF) -> None:
        self._where, self._label, self._idx = where, label, idx
        self._val = PrefixSums(where, label, cum)

    def _bad(self) -> ModelFormatError:
        return ModelFormatError(f"{self._where}: damaged model data: {self._label} holds a value below 1")

    def get(self, i: int) -> int:
        n = len(self._idx)
        j = self._idx.lower_bound(i, 0, n)
        if j >= n or self._idx.at(j) != i:
            return 0
        v = self._val[j]
        if v < 1:
            raise self._bad()
        return v

    def all(self) -> tuple[np.ndarray, np.ndarray]:
        val = self._val.all()
        if len(val) and int(val.min()) < 1:
            raise self._bad()
        return self._idx.all(), val


class RowCounts:
    """HN13 of a 1.6 file read by index like the plain array: entry 3v + j is N₁, N₂ or N₃₊ of row v.

    N₁ and N₂ are stored (as prefix sums); N₃₊ is the row's length minus both.
    """

    def __init__(self, where: str, n1: PrefixSums, n2: PrefixSums, rows: np.ndarray) -> None:
        self._where, self._n1, self._n2 = where, n1, n2
        self._rows_a = np.ascontiguousarray(rows, dtype=np.int64)
        self._rows = memoryview(self._rows_a).cast("B").cast("q")  # type: ignore[arg-type]  # scalar reads

    def __len__(self) -> int:
        return 3 * len(self._n1)

    def __getitem__(self, k: int) -> int:
        v, j = divmod(k, 3)
        if j == 0:
            return self._n1[v]
        if j == 1:
            return self._n2[v]
        n3 = self._rows[v + 1] - self._rows[v] - self._n1[v] - self._n2[v]
        if n3 < 0:
            raise ModelFormatError(f"{self._where}: damaged model data: row {v} counts more entries than it has")
        return n3

    def all(self) -> np.ndarray:
        n1, n2 = self._n1.all(), self._n2.all()
        n3 = np.diff(self._rows_a) - n1 - n2
        if bool((n3 < 0).any()):
            raise ModelFormatError(f"{self._where}: damaged model data: a row counts more entries than it has")
        return np.column_stack([n1, n2, n3]).reshape(-1)
