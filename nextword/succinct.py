"""Chunked Elias-Fano: a monotone integer sequence in about 2 + log2(gap) bits per value.

Format 1.6 stores its successor lists, the trigram lists' starts and the bigram rows'
starts this way (docs/FORMAT.md §7.18). A sequence Y₀ ≤ Y₁ ≤ … ≤ Y_{N−1} is cut into
chunks of :data:`CHUNK` = 64 values; each chunk is coded by Elias-Fano (Elias 1974, Fano
1971) against its own first value, with its own number of low bits, as in partitioned
Elias-Fano (Ottaviano & Venturini, SIGIR 2014) with fixed-size partitions. A header per
chunk — its first value and its bit offset, two u32 — gives random access: value j is in
chunk j // 64, whose low bits sit at a computed offset and whose high bits are a unary
code of at most 3·64 bits, so one access reads a bounded number of bytes (O(1)), and a
search is a binary search over the chunks' first values plus one chunk (O(log N)).

Why chunks rather than one Elias-Fano over the whole sequence: the successor lists of
one level are concatenated into one increasing sequence (each list is shifted above the
previous list's last value), and their density varies by orders of magnitude between the
row of "the" and a rare word's row; a chunk's low-bit width follows the local density, so
dense rows cost 2–4 bits per entry and sparse ones what their gaps need.

The coder is pure numpy (build and query); the same layout is read by the C runtime.
"""

from __future__ import annotations

from typing import Final

import numpy as np

from .errors import InvalidArgumentError, ModelFormatError

__all__ = ["CHUNK", "EF_PAD", "ChunkedEF", "PrefixSums", "ef_encode", "ef_chunk_bits", "ef_check_headers"]

#: values per chunk (a power of two; fixed for version 1 of the layout)
CHUNK: Final = 64
_SHIFT: Final = 6
#: zero bytes after the last chunk, so a reader may load 8 bytes at any bit offset inside the stream
EF_PAD: Final = 8
_U32: Final = 0xFFFFFFFF


def _low_bits(r: np.ndarray, m: np.ndarray) -> np.ndarray:
    """L = ⌊log₂(⌊r / m⌋)⌋ for ⌊r / m⌋ ≥ 1, else 0 (integer arithmetic, no float rounding)."""
    q = r // np.maximum(m, 1)
    # ⌊log₂ q⌋ = frexp's exponent − 1, exact for integers below 2⁵³
    return np.where(q >= 1, np.frexp(np.maximum(q, 1).astype(np.float64))[1] - 1, 0).astype(np.int64)


def ef_chunk_bits(r: np.ndarray, m: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(L, size in bits) of chunks of ``m`` values spanning ``r`` = next first value − first value."""
    r = np.asarray(r, dtype=np.int64)
    m = np.asarray(m, dtype=np.int64)
    low = _low_bits(r, m)
    return low, m * low + (r >> low) + m


def ef_encode(y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(header u32 [2·(C+1)], stream u8) of a non-decreasing sequence of values < 2³²−1.

    Header entry 2c is chunk c's first value, 2c+1 its bit offset; entry 2C is
    Y_{N−1} + 1 (0 when N = 0) and 2C+1 the stream's length in bits.
    """
    y = np.asarray(y, dtype=np.int64)
    n = len(y)
    if n and (int(y[0]) < 0 or bool((np.diff(y) < 0).any())):
        raise InvalidArgumentError("Elias-Fano input must be non-negative and non-decreasing")
    end = int(y[-1]) + 1 if n else 0
    if end > _U32:
        raise InvalidArgumentError(f"Elias-Fano value {end - 1} does not fit the 32-bit chunk headers")
    c = (n + CHUNK - 1) >> _SHIFT
    first = y[:: CHUNK] if n else np.zeros(0, dtype=np.int64)
    nxt = np.append(first[1:], end).astype(np.int64)
    m = np.minimum(CHUNK, n - (np.arange(c, dtype=np.int64) << _SHIFT))
    low, size = ef_chunk_bits(nxt - first, m)
    off = np.zeros(c + 1, dtype=np.int64)
    np.cumsum(size, out=off[1:])
    total = int(off[-1])
    if total > _U32:
        raise InvalidArgumentError(f"Elias-Fano stream of {total} bits does not fit the 32-bit chunk headers")
    head = np.empty(2 * (c + 1), dtype=np.uint32)
    head[0:-2:2], head[1:-2:2] = first, off[:-1]
    head[-2], head[-1] = end, total
    bits = np.zeros(total + 8 * EF_PAD, dtype=np.uint8)
    if n:
        ch = np.arange(n, dtype=np.int64) >> _SHIFT
        i = np.arange(n, dtype=np.int64) - (ch << _SHIFT)
        d = y - first[ch]
        lw = low[ch]
        lo = d & ((np.int64(1) << lw) - 1)
        start = off[ch] + i * lw
        for k in range(int(lw.max()) if n else 0):
            sel = (lw > k) & (((lo >> k) & 1) == 1)
            bits[start[sel] + k] = 1
        bits[off[ch] + m[ch] * lw + (d >> lw) + i] = 1
    stream = np.packbits(bits, bitorder="little")
    return head, stream


def ef_check_headers(where: str, label: str, head: np.ndarray, stream: np.ndarray, n: int, *, strict: bool,
                     chunks: bool = True) -> None:
    """The checks that need only the headers (on every load).

    Always (O(1)): the number of headers, the first offset 0, the stream's length from the
    sentinel offset and its zero tail. With ``chunks`` (O(chunks), numpy; the
    vocabulary-sized sequences, and every sequence with ``verify=True``): every chunk's
    size, offsets and first values increasing. Without it, :class:`ChunkedEF` checks a
    chunk's header when it decodes the chunk, so a decoder always reads inside the stream.
    """
    c = (n + CHUNK - 1) >> _SHIFT
    if len(head) != 2 * (c + 1):
        raise ModelFormatError(f"{where}: {label} has {len(head)} header entries, expected {2 * (c + 1)} for {n} values")
    if not chunks:
        end = int(head[-1])
        if int(head[1]) != 0:
            raise ModelFormatError(f"{where}: {label} chunk offsets do not start at 0")
        if n == 0 and int(head[0]) != 0:
            raise ModelFormatError(f"{where}: {label} is empty but ends at {int(head[0])}")
        _check_tail(where, label, stream, end)
        return
    h = head.astype(np.int64)
    first, off = h[0::2], h[1::2]
    if off[0] != 0 or bool((np.diff(off) < 0).any()):
        raise ModelFormatError(f"{where}: {label} chunk offsets do not start at 0 and increase")
    step = np.diff(first)
    m_all = np.minimum(CHUNK, n - (np.arange(c, dtype=np.int64) << _SHIFT))
    if bool((step < 0).any()) or (strict and n and bool((step < m_all).any())):
        raise ModelFormatError(f"{where}: {label} chunk first values are not increasing")
    if n == 0 and first[0] != 0:
        raise ModelFormatError(f"{where}: {label} is empty but ends at {first[0]}")
    m = np.minimum(CHUNK, n - (np.arange(c, dtype=np.int64) << _SHIFT))
    _, size = ef_chunk_bits(step, m)
    if c and not np.array_equal(size, np.diff(off)):
        bad = int(np.flatnonzero(size != np.diff(off))[0])
        raise ModelFormatError(f"{where}: {label} chunk {bad} has {int(off[bad + 1] - off[bad])} bits, its values need {int(size[bad])}")
    _check_tail(where, label, stream, int(off[-1]))


def _check_tail(where: str, label: str, stream: np.ndarray, end: int) -> None:
    """The stream has ⌈end/8⌉ + 8 bytes and no bit set from bit ``end`` on."""
    want = ((end + 7) >> 3) + EF_PAD
    if len(stream) != want:
        raise ModelFormatError(f"{where}: {label} stream has {len(stream)} bytes, expected {want}")
    tail = stream[end >> 3 :]
    if end & 7:
        if int(tail[0]) >> (end & 7):
            raise ModelFormatError(f"{where}: {label} stream has bits set past its end")
        tail = tail[1:]
    if bool(tail.any()):
        raise ModelFormatError(f"{where}: {label} stream padding is not zero")


class ChunkedEF:
    """Read access to one chunked Elias-Fano sequence (headers checked by :func:`ef_check_headers`).

    Decoded chunks are kept in a small cache: a query touches the same few chunks
    several times (a row's search, then its entries), and a keyboard asks about the same
    frequent contexts again and again; the cache holds at most ``cache`` chunks
    (64 int64 each), so it costs at most ``cache`` × 512 bytes.
    """

    def __init__(self, where: str, label: str, head: np.ndarray, stream: np.ndarray, n: int, *, cache: int = 2048,
                 strict: bool = False) -> None:
        self._where, self._label, self._n = where, label, n
        #: a strictly increasing sequence (successor lists, sparse indices, positive prefix sums): a decoded chunk must be too
        self._strict = strict
        self._head = head
        # scalar reads of the headers without converting them (opening stays O(1) per sequence)
        self._h = memoryview(np.ascontiguousarray(head)).cast("B").cast("Q" if head.dtype.itemsize == 8 else "I")  # type: ignore[arg-type]
        self._stream = stream
        self._cache: dict[int, np.ndarray] = {}
        self._cache_max = cache

    def __len__(self) -> int:
        return self._n

    def first(self) -> int:
        """Y₀ (0 for an empty sequence): the first chunk's header value."""
        return self._h[0]  # type: ignore[no-any-return]

    def end(self) -> int:
        """Y_{N−1} + 1 (0 for an empty sequence): the sentinel header value."""
        return self._h[len(self._h) - 2]  # type: ignore[no-any-return]

    def _bad(self, c: int) -> ModelFormatError:
        return ModelFormatError(f"{self._where}: {self._label} chunk {c} does not decode to its values")

    def chunk(self, c: int) -> np.ndarray:
        """The values of chunk ``c`` (int64, read-only)."""
        got = self._cache.get(c)
        if got is not None:
            return got
        h = self._h
        first, nxt = h[2 * c], h[2 * c + 2]
        m = min(CHUNK, self._n - (c << _SHIFT))
        o0, o1 = h[2 * c + 1], h[2 * c + 3]
        r = nxt - first
        q = r // m if r >= 0 else 0
        low = q.bit_length() - 1 if q else 0
        # this chunk's header (checked here when the load checked only the counts): inside the stream, the right size
        if r < 0 or o1 > h[len(h) - 1] or o1 - o0 != m * low + (r >> low) + m or (self._strict and r < m):
            raise self._bad(c)
        raw = np.unpackbits(self._stream[o0 >> 3 : (o1 + 7) >> 3], bitorder="little")[o0 & 7 : (o0 & 7) + (o1 - o0)]
        ones = np.flatnonzero(raw[m * low :])
        if len(ones) != m:
            raise self._bad(c)
        vals = ones - np.arange(m)
        if low:
            vals <<= low
            vals |= raw[: m * low].reshape(m, low).astype(np.int64) @ (np.int64(1) << np.arange(low, dtype=np.int64))
        vals += first
        # the first value is the header's; the sequence's last value is one below the sentinel
        if vals[0] != first or vals[-1] > nxt or (c == (len(h) >> 1) - 2 and vals[-1] != nxt - 1):
            raise self._bad(c)
        if self._strict and m > 1 and bool((vals[1:] <= vals[:-1]).any()):
            raise self._bad(c)
        vals.flags.writeable = False
        if len(self._cache) >= self._cache_max:
            self._cache.clear()
        self._cache[c] = vals
        return vals

    def at(self, j: int) -> int:
        """Y_j."""
        if not 0 <= j < self._n:
            raise IndexError(j)
        return int(self.chunk(j >> _SHIFT)[j & (CHUNK - 1)])

    def slice(self, s: int, e: int) -> np.ndarray:
        """Y_s … Y_{e−1} (int64)."""
        if s >= e:
            return np.zeros(0, dtype=np.int64)
        c0, c1 = s >> _SHIFT, (e - 1) >> _SHIFT
        if c0 == c1:
            return self.chunk(c0)[s - (c0 << _SHIFT) : e - (c0 << _SHIFT)]
        if c1 - c0 < 8:
            block = np.concatenate([self.chunk(c) for c in range(c0, c1 + 1)])
        else:
            block = self._decode(c0, c1 + 1)
        return block[s - (c0 << _SHIFT) : e - (c0 << _SHIFT)]

    def lower_bound(self, y: int, s: int, e: int) -> int:
        """The first j in [s, e) with Y_j ≥ y (e if none): a search over chunk heads, then one chunk."""
        if s >= e:
            return s
        c0, c1 = s >> _SHIFT, (e - 1) >> _SHIFT
        # the last chunk in [c0, c1] whose first value is < y holds the answer or ends before it
        lo, hi = c0, c1 + 1
        h = self._h
        while lo < hi:
            mid = (lo + hi) >> 1
            if h[2 * mid] < y:
                lo = mid + 1
            else:
                hi = mid
        c = lo - 1
        if c < c0:
            return s
        vals = self.chunk(c)
        base = c << _SHIFT
        a = max(s - base, 0)
        b = min(e - base, len(vals))
        k = a + int(np.searchsorted(vals[a:b], y, side="left"))
        return base + k

    def take(self, idx: np.ndarray) -> np.ndarray:
        """Y at every index of ``idx`` (int64); decodes each touched chunk once."""
        idx = np.asarray(idx, dtype=np.int64)
        if len(idx) == 0:
            return np.zeros(0, dtype=np.int64)
        if int(idx.min()) < 0 or int(idx.max()) >= self._n:
            raise IndexError("Elias-Fano index out of range")
        ch = idx >> _SHIFT
        c0, c1 = int(ch.min()), int(ch.max())
        if c1 - c0 < 8:
            block = np.concatenate([self.chunk(c) for c in range(c0, c1 + 1)])
            return block[idx - (c0 << _SHIFT)]
        used = np.unique(ch)
        if len(used) <= 16:  # a few chunks far apart: each from the cache
            out = np.empty(len(idx), dtype=np.int64)
            for c in used.tolist():
                sel = ch == c
                out[sel] = self.chunk(c)[idx[sel] - (c << _SHIFT)]
            return out
        return self._decode(c0, c1 + 1)[idx - (c0 << _SHIFT)]

    def all(self) -> np.ndarray:
        """Every value (int64): the whole stream decoded at once (verification, export, prune)."""
        return self._decode(0, (self._n + CHUNK - 1) >> _SHIFT)

    def _decode(self, c0: int, c1: int) -> np.ndarray:
        """The values of chunks c0 … c1−1, vectorised (long ranges and whole sequences; the cache is not used)."""
        if c1 <= c0:
            return np.zeros(0, dtype=np.int64)
        n = min(self._n, c1 << _SHIFT) - (c0 << _SHIFT)
        h = self._head[2 * c0 : 2 * c1 + 2].astype(np.int64)
        first, off = h[0::2], h[1::2]
        cs = np.arange(c0, c1, dtype=np.int64)
        m = np.minimum(CHUNK, self._n - (cs << _SHIFT))
        step = first[1:] - first[:-1]
        low, size = ef_chunk_bits(np.maximum(step, 0), m)
        if bool((step < 0).any()) or not np.array_equal(size, np.diff(off)) or int(off[-1]) > int(self._head[-1]):
            raise ModelFormatError(f"{self._where}: {self._label} chunk headers do not match their sizes")
        b0 = int(off[0]) >> 3
        raw = self._stream[b0 : ((int(off[-1]) + 7) >> 3) + EF_PAD]
        off = off - 8 * b0
        ch = np.arange(n, dtype=np.int64) >> _SHIFT
        i = np.arange(n, dtype=np.int64) - (ch << _SHIFT)
        lw = low[ch]
        # low parts: the bytes from each value's first low bit, as many as the widest needs
        # (7 + ℓ bits, at most 8 bytes: the stream's zero padding keeps every read inside it)
        start = off[ch] + i * lw
        at = start >> 3
        nb = min((int(lw.max(initial=0)) + 14) // 8, 8)
        word = np.zeros(n, dtype=np.uint64)
        for k in range(nb):
            word |= raw[np.minimum(at + k, len(raw) - 1)].astype(np.uint64) << np.uint64(8 * k)
        lo = ((word >> (start & 7).astype(np.uint64)) & ((np.uint64(1) << lw.astype(np.uint64)) - np.uint64(1))).astype(np.int64)
        # high parts: a mask of every chunk's high region, its set bits in order are the values' (m_c per chunk)
        hstart = off[:-1] + m * low
        lengths = np.column_stack([m * low, off[1:] - hstart]).reshape(-1)
        region = np.repeat(np.tile(np.array([False, True]), c1 - c0), lengths)
        bits = np.unpackbits(raw, bitorder="little")[int(off[0]) : int(off[-1])].astype(bool)
        ones = np.flatnonzero(bits & region) + int(off[0])
        if len(ones) != n:
            raise ModelFormatError(f"{self._where}: {self._label} high bits hold {len(ones)} values, expected {n}")
        hi = ones - hstart[ch] - i
        if len(hi) and int(hi.min()) < 0:
            raise ModelFormatError(f"{self._where}: {self._label} high bits do not match the chunk sizes")
        vals = first[:-1][ch] + ((hi << lw) | lo)
        over = (vals > first[1:][ch]) | ((i == 0) & (vals != first[:-1][ch]))
        if bool(over.any()):
            raise self._bad(c0 + (int(np.flatnonzero(over)[0]) >> _SHIFT))
        if c1 == (len(self._head) >> 1) - 1 and n and vals[-1] != first[-1] - 1:
            raise self._bad(c1 - 1)
        if self._strict and n > 1 and bool((vals[1:] <= vals[:-1]).any()):
            raise ModelFormatError(f"{self._where}: {self._label} is not strictly increasing")
        return vals


class PrefixSums:
    """Values x₀ … x_{m−1} stored as the sequence of their prefix sums: x_i = P_{i+1} − P_i.

    Read by index like an array (two reads of the sequence, usually one cached chunk), so
    a vocabulary-sized table need not be decoded when a file is opened; ``all`` decodes it.
    """

    def __init__(self, where: str, label: str, ef: ChunkedEF) -> None:
        self._where, self._label, self._ef = where, label, ef

    def __len__(self) -> int:
        return max(len(self._ef) - 1, 0)

    def first(self) -> int:
        """P₀ (0 in a valid file)."""
        return self._ef.first()

    def __getitem__(self, i: int) -> int:
        if not 0 <= i < len(self):
            raise IndexError(i)
        x = self._ef.at(i + 1) - self._ef.at(i)
        if x < 0 or x > _U32:
            raise ModelFormatError(f"{self._where}: damaged model data: {self._label} holds a value outside 32 bits")
        return x

    def all(self) -> np.ndarray:
        x = np.diff(self._ef.all())
        if len(x) and (int(x.min()) < 0 or int(x.max()) > _U32):
            raise ModelFormatError(f"{self._where}: damaged model data: {self._label} holds a value outside 32 bits")
        return x
