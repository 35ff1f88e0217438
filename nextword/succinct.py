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

__all__ = ["CHUNK", "EF_PAD", "ChunkedEF", "ef_encode", "ef_chunk_bits", "ef_check_headers"]

#: values per chunk (a power of two; fixed for version 1 of the layout)
CHUNK: Final = 64
_SHIFT: Final = 6
#: zero bytes after the last chunk, so a reader may load 8 bytes at any bit offset inside the stream
EF_PAD: Final = 8
_U32: Final = 0xFFFFFFFF


def _low_bits(r: np.ndarray, m: np.ndarray) -> np.ndarray:
    """L = ⌊log₂(⌊r / m⌋)⌋ for ⌊r / m⌋ ≥ 1, else 0 (integer arithmetic, no float rounding)."""
    q = r // np.maximum(m, 1)
    out = np.zeros(len(q), dtype=np.int64)
    for k in range(1, 64):
        hit = q >= (np.int64(1) << k)
        if not hit.any():
            break
        out[hit] = k
    return out


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


def ef_check_headers(where: str, label: str, head: np.ndarray, stream: np.ndarray, n: int, *, strict: bool) -> None:
    """Every check that needs only the headers (run on every load; O(chunks), numpy).

    After these, every chunk's bits lie inside the stream, so a decoder reads in bounds;
    the values inside a chunk are checked as they are decoded.
    """
    c = (n + CHUNK - 1) >> _SHIFT
    if len(head) != 2 * (c + 1):
        raise ModelFormatError(f"{where}: {label} has {len(head)} header entries, expected {2 * (c + 1)} for {n} values")
    h = head.astype(np.int64)
    first, off = h[0::2], h[1::2]
    if off[0] != 0 or bool((np.diff(off) < 0).any()):
        raise ModelFormatError(f"{where}: {label} chunk offsets do not start at 0 and increase")
    step = np.diff(first)
    if bool((step < 0).any()) or (strict and n and bool((step[:-1] < CHUNK).any())):
        raise ModelFormatError(f"{where}: {label} chunk first values are not increasing")
    if n == 0 and first[0] != 0:
        raise ModelFormatError(f"{where}: {label} is empty but ends at {first[0]}")
    m = np.minimum(CHUNK, n - (np.arange(c, dtype=np.int64) << _SHIFT))
    _, size = ef_chunk_bits(step, m)
    if c and not np.array_equal(size, np.diff(off)):
        bad = int(np.flatnonzero(size != np.diff(off))[0])
        raise ModelFormatError(f"{where}: {label} chunk {bad} has {int(off[bad + 1] - off[bad])} bits, its values need {int(size[bad])}")
    want = ((int(off[-1]) + 7) >> 3) + EF_PAD
    if len(stream) != want:
        raise ModelFormatError(f"{where}: {label} stream has {len(stream)} bytes, expected {want}")
    tail = stream[int(off[-1]) >> 3 :]
    if int(off[-1]) & 7:
        if int(tail[0]) >> (int(off[-1]) & 7):
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

    def __init__(self, where: str, label: str, head: np.ndarray, stream: np.ndarray, n: int, *, cache: int = 2048) -> None:
        self._where, self._label, self._n = where, label, n
        h = head.astype(np.int64)
        self._first = h[0::2]
        self._off = h[1::2]
        self._first_l: list[int] = self._first.tolist()
        self._stream = stream
        self._cache: dict[int, np.ndarray] = {}
        self._cache_max = cache

    def __len__(self) -> int:
        return self._n

    def first(self) -> int:
        """Y₀ (0 for an empty sequence): the first chunk's header value."""
        return self._first_l[0]

    def end(self) -> int:
        """Y_{N−1} + 1 (0 for an empty sequence): the sentinel header value."""
        return self._first_l[-1]

    def _bad(self, c: int) -> ModelFormatError:
        return ModelFormatError(f"{self._where}: {self._label} chunk {c} does not decode to its values")

    def chunk(self, c: int) -> np.ndarray:
        """The values of chunk ``c`` (int64, read-only)."""
        got = self._cache.get(c)
        if got is not None:
            return got
        first, nxt = self._first_l[c], self._first_l[c + 1]
        m = min(CHUNK, self._n - (c << _SHIFT))
        o0, o1 = int(self._off[c]), int(self._off[c + 1])
        r = nxt - first
        q = r // m
        low = q.bit_length() - 1 if q else 0
        raw = np.unpackbits(self._stream[o0 >> 3 : (o1 + 7) >> 3], bitorder="little")[o0 & 7 : (o0 & 7) + (o1 - o0)]
        ones = np.flatnonzero(raw[m * low :])
        if len(ones) != m:
            raise self._bad(c)
        vals = ones - np.arange(m)
        if low:
            vals <<= low
            vals |= raw[: m * low].reshape(m, low).astype(np.int64) @ (np.int64(1) << np.arange(low, dtype=np.int64))
        vals += first
        if vals[-1] > nxt:
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
        fl = self._first_l
        while lo < hi:
            mid = (lo + hi) >> 1
            if fl[mid] < y:
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
        else:
            block = self._decode(c0, c1 + 1)
        return block[idx - (c0 << _SHIFT)]

    def all(self) -> np.ndarray:
        """Every value (int64): the whole stream decoded at once (verification, export, prune)."""
        return self._decode(0, (self._n + CHUNK - 1) >> _SHIFT)

    def _decode(self, c0: int, c1: int) -> np.ndarray:
        """The values of chunks c0 … c1−1, vectorised (long ranges; the cache is not used)."""
        if c1 <= c0:
            return np.zeros(0, dtype=np.int64)
        n = min(self._n, c1 << _SHIFT) - (c0 << _SHIFT)
        cs = np.arange(c0, c1, dtype=np.int64)
        first, off = self._first[c0 : c1 + 1], self._off[c0 : c1 + 1]
        m = np.minimum(CHUNK, self._n - (cs << _SHIFT))
        low, _ = ef_chunk_bits(first[1:] - first[:-1], m)
        b0 = int(off[0]) >> 3
        bits = np.unpackbits(self._stream[b0 : (int(off[-1]) + 7) >> 3], bitorder="little")
        off = off - 8 * b0
        ch = np.arange(n, dtype=np.int64) >> _SHIFT
        i = np.arange(n, dtype=np.int64) - (ch << _SHIFT)
        lw = low[ch]
        start = off[ch] + i * lw
        lo = np.zeros(n, dtype=np.int64)
        for k in range(int(lw.max())):
            sel = lw > k
            lo[sel] |= bits[start[sel] + k].astype(np.int64) << k
        # high parts: the set bits of each chunk's unary region, in order
        hstart = off[:-1] + m * low
        hend = off[1:]
        mark = np.zeros(len(bits) + 1, dtype=np.int64)
        np.add.at(mark, hstart, 1)
        np.add.at(mark, hend, -1)
        inside = np.cumsum(mark[:-1]) > 0
        ones = np.flatnonzero((bits == 1) & inside)
        if len(ones) != n:
            raise ModelFormatError(f"{self._where}: {self._label} high bits hold {len(ones)} values, expected {n}")
        owner = np.searchsorted(hstart, ones, side="right") - 1
        if not np.array_equal(owner, ch):
            raise ModelFormatError(f"{self._where}: {self._label} high bits do not match the chunk sizes")
        hi = ones - hstart[ch] - i
        vals = first[:-1][ch] + ((hi << lw) | lo)
        over = vals > first[1:][ch]
        if bool(over.any()):
            raise self._bad(c0 + (int(np.flatnonzero(over)[0]) >> _SHIFT))
        return vals
