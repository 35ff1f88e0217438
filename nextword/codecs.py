"""How one level's stored values become section arrays, and how a query reads them back.

The store lays out n-grams (rows of successors per context); a *codec* owns only the
numbers stored beside them. The file records the codec by name and version in META
(``"codec": {"name": ..., "version": ...}`` and, for ``quant``, ``"bits"``; formats 1.4 and 1.5); a reader refuses a codec it
does not know, by name. Each level's values live in sections whose tags the store
chooses (``CNTS``/``BIGI``/``BIGC`` for the bigram level, ``TVAL``/``TBGI``/``TBGC`` for
the trigram level), so one codec class serves every level.

``exact`` stores the integer values themselves (raw counts for Jelinek-Mercer, adjusted
counts for Kneser-Ney): one byte per n-gram, 255 marking an escape whose full value sits
in a sorted side table (index, value). ``quant`` (format 1.5, issue 15) stores each value
as a q-bit code into a codebook fitted per level (:func:`fit_codebook`); the build
replaces the values by their decoded ones (:meth:`Codec.quantize`) before anything else
is derived from them, so either way the view yields integer values that the estimator
turns into α and γ at query time, and the file describes one consistent model
(docs/SEAMS.md, "The codec seam"; docs/FORMAT.md §7.12, §7.17).
"""

from __future__ import annotations

import bisect
from abc import ABC, abstractmethod
from typing import ClassVar, Final

import numpy as np

from .errors import InvalidArgumentError, ModelFormatError

__all__ = [
    "Codec", "ValueView", "ExactCodec", "EXACT", "QuantCodec", "QUANT_BITS", "DEFAULT_QUANT_BITS", "COUNT_ESCAPE",
    "codec_named", "codec_for_bits", "CODECS", "fit_codebook", "ones_bitmap", "ONES_BLOCK",
]

#: the one-byte value that says "look the value up in the escape table"
COUNT_ESCAPE: Final = 255
_U32_MAX: Final = 0xFFFFFFFF

#: a section as the store writes it: tag, element type (None = raw bytes), contents
Section = tuple[bytes, "np.dtype | None", "bytes | np.ndarray"]


class ValueView(ABC):
    """Query-side access to one level's stored values, by n-gram index."""

    @abstractmethod
    def at(self, i: int) -> int:
        """The value of n-gram ``i`` (raises ModelFormatError when the file is damaged)."""

    @abstractmethod
    def slice(self, s: int, e: int) -> list[int]:
        """The values of n-grams ``s .. e-1`` as Python ints."""

    @abstractmethod
    def take(self, idx: np.ndarray) -> np.ndarray:
        """The values of the n-grams at ``idx`` (int64)."""

    @abstractmethod
    def all(self) -> np.ndarray:
        """Every value (int64); reads the whole level (verification, export)."""


class Codec(ABC):
    """Stored values of one level ↔ its sections (tags chosen by the store)."""

    name: ClassVar[str]
    version: int  # a class constant, except where one class reads several versions (quant 1 and 2)
    @abstractmethod
    def encode(self, tags: tuple[bytes, bytes, bytes], values: np.ndarray) -> list[Section]:
        """The sections holding ``values`` (int, ≥ 1, in n-gram order)."""

    @abstractmethod
    def section_types(self, tags: tuple[bytes, bytes, bytes]) -> dict[bytes, str]:
        """Tag → element type ("u1", "u4") of every section :meth:`encode` writes."""

    @abstractmethod
    def check(self, where: str, arrays: dict[str, np.ndarray], tags: tuple[bytes, bytes, bytes], n: int) -> None:
        """Lengths and the cheap checks done on every load (raise ModelFormatError)."""

    @abstractmethod
    def decode(self, where: str, arrays: dict[str, np.ndarray], tags: tuple[bytes, bytes, bytes], n: int | None = None) -> ValueView:
        """The query-side view over the mapped sections (no copy of the n-gram-sized ones).

        ``n``: the level's number of values (a packed codec's last byte may hold unused slots).
        """

    def meta(self) -> dict[str, object]:
        """What META records about the codec."""
        return {"name": self.name, "version": self.version}

    def quantize(self, values: np.ndarray) -> np.ndarray:
        """The values a file of this codec stores for ``values`` (int64; the identity when exact).

        The build replaces a level's values by these *before* it computes context totals,
        n₁/n₂/n₃₊ and skybands, so the file describes one consistent model (the quantised
        one), whose contexts sum to 1 by the estimator's own algebra (docs/SEAMS.md).
        """
        return np.asarray(values, dtype=np.int64)

    def check_full(self, where: str, arrays: dict[str, np.ndarray], tags: tuple[bytes, bytes, bytes]) -> None:
        """Every entry (verify=True); the default checks nothing beyond :meth:`check`."""


class _ExactView(ValueView):
    def __init__(self, where: str, small: np.ndarray, esc_i: np.ndarray, esc_v: np.ndarray) -> None:
        self._where = where
        self._small = small
        self._mv = memoryview(np.ascontiguousarray(small)).cast("B")  # type: ignore[arg-type]
        self._esc_i = esc_i
        self._esc_v = esc_v
        self._mv_i = memoryview(np.ascontiguousarray(esc_i, dtype=np.uint32)).cast("B").cast("I")  # type: ignore[arg-type]
        self._mv_v = memoryview(np.ascontiguousarray(esc_v, dtype=np.uint32)).cast("B").cast("I")  # type: ignore[arg-type]

    def _escaped(self, i: int) -> int:
        j = bisect.bisect_left(self._mv_i, i)
        if j >= len(self._mv_i) or self._mv_i[j] != i:
            raise ModelFormatError(f"{self._where}: escaped value without an entry at n-gram {i}")
        return self._mv_v[j]  # type: ignore[no-any-return]

    def at(self, i: int) -> int:
        c: int = self._mv[i]
        return self._escaped(i) if c == COUNT_ESCAPE else c

    def slice(self, s: int, e: int) -> list[int]:
        out: list[int] = self._mv[s:e].tolist()
        if COUNT_ESCAPE in out:
            j = out.index(COUNT_ESCAPE)
            while True:
                out[j] = self._escaped(s + j)
                try:
                    j = out.index(COUNT_ESCAPE, j + 1)
                except ValueError:
                    break
        return out

    def take(self, idx: np.ndarray) -> np.ndarray:
        c = self._small[idx].astype(np.int64)
        esc = np.flatnonzero(c == COUNT_ESCAPE)
        if len(esc):
            where = np.asarray(idx, dtype=np.int64)[esc]
            at = np.searchsorted(self._esc_i, where)
            if int(at.max()) >= len(self._esc_i) or not bool(np.all(self._esc_i[at] == where)):
                raise ModelFormatError(f"{self._where}: escaped value without an entry")
            c[esc] = self._esc_v[at]
        return c

    def all(self) -> np.ndarray:
        c = self._small.astype(np.int64)
        c[self._esc_i.astype(np.int64)] = self._esc_v
        return c


class ExactCodec(Codec):
    """Integer values as one byte each; 255 escapes to a sorted (index u32, value u32) table."""

    name: ClassVar[str] = "exact"
    version: int = 1

    def encode(self, tags: tuple[bytes, bytes, bytes], values: np.ndarray) -> list[Section]:
        v = np.asarray(values)
        if len(v) and (int(v.min()) < 0 or int(v.max()) > _U32_MAX):
            raise InvalidArgumentError("stored values must lie in [0, 2**32)")
        small = np.empty(len(v), dtype=np.uint8)
        np.minimum(v, COUNT_ESCAPE, out=small, casting="unsafe")
        esc_i = np.flatnonzero(small == COUNT_ESCAPE).astype(np.uint32)
        esc_v = np.asarray(v[esc_i], dtype=np.uint32)
        u1, u4 = np.dtype("<u1"), np.dtype("<u4")
        return [(tags[0], u1, small), (tags[1], u4, esc_i), (tags[2], u4, esc_v)]

    def section_types(self, tags: tuple[bytes, bytes, bytes]) -> dict[bytes, str]:
        return {tags[0]: "u1", tags[1]: "u4", tags[2]: "u4"}

    def check(self, where: str, arrays: dict[str, np.ndarray], tags: tuple[bytes, bytes, bytes], n: int) -> None:
        small, esc_i, esc_v = (arrays[t.decode()] for t in tags)
        names = [t.decode() for t in tags]
        if len(small) != n:
            raise ModelFormatError(f"{where}: section {names[0]} holds {len(small)} entries, expected {n}")
        if len(esc_i) != len(esc_v):
            raise ModelFormatError(f"{where}: sections {names[1]} and {names[2]} differ in length")
        if len(esc_i) and (int(esc_i[-1]) >= n or int(esc_v.min()) < COUNT_ESCAPE):
            raise ModelFormatError(f"{where}: sections {names[1]}/{names[2]} are inconsistent")

    def check_full(self, where: str, arrays: dict[str, np.ndarray], tags: tuple[bytes, bytes, bytes]) -> None:
        """Every entry (verify=True): no zero value, escapes exactly where 255 is stored."""
        small, esc_i = arrays[tags[0].decode()], arrays[tags[1].decode()]
        names = [t.decode() for t in tags]
        if len(small) and int(small.min()) == 0:
            raise ModelFormatError(f"{where}: section {names[0]} holds a zero value")
        if len(esc_i) > 1 and bool(np.any(esc_i[1:] <= esc_i[:-1])):
            raise ModelFormatError(f"{where}: section {names[1]} is not increasing")
        if not np.array_equal(np.flatnonzero(small == COUNT_ESCAPE), esc_i):
            raise ModelFormatError(f"{where}: sections {names[0]} and {names[1]} disagree")

    def decode(self, where: str, arrays: dict[str, np.ndarray], tags: tuple[bytes, bytes, bytes], n: int | None = None) -> ValueView:
        small, esc_i, esc_v = (arrays[t.decode()] for t in tags)
        return _ExactView(where, small, esc_i, esc_v)


#: code widths the quantised codec offers (2 at least: 1 and 2 keep codes of their own,
#: and values >= 3 need one more); a code spans at most two bytes, so a read is one or two
#: byte loads, a shift and a mask
QUANT_BITS: Final = (2, 3, 4, 5, 6, 7, 8)
#: the width ``--quantize`` suggests (measured by bench/bench_quant.py on the 5M-word corpus: 5 bits
#: cost 0.4-0.5% perplexity against exact values, 4 bits 1.3-1.9%; see bench/RESULTS.md)
DEFAULT_QUANT_BITS: Final = 5
_LLOYD_ROUNDS: Final = 30


def fit_codebook(values: np.ndarray, bits: int, *, method: str = "lloyd") -> np.ndarray:
    """At most 2**bits increasing integers (≥ 1) to stand for ``values`` (ints ≥ 1).

    1 and 2 keep codes of their own (Kneser-Ney's discount classes and its n₁, n₂ read
    them, so the quantised model keeps its discounts' meaning), every value ≥ 3 maps to
    a representative ≥ 3. The other codes split the values ≥ 3 into contiguous bins in
    the log domain, weighting each distinct value by the tokens it stands for
    (multiplicity × value), i.e. minimising Σ tokens · (log â − log a)², the first-order
    change of the training log-likelihood. ``method`` "quantile" stops at the initial
    equal-weight bins; "lloyd" then runs Lloyd's iterations (bench/bench_quant.py
    measures both). A level with at most 2**bits distinct values is kept exactly.
    """
    v = np.asarray(values, dtype=np.int64)
    if len(v) and int(v.min()) < 1:
        raise InvalidArgumentError("quantised values must be >= 1")
    if method not in ("lloyd", "quantile"):
        raise InvalidArgumentError(f"codebook method must be 'lloyd' or 'quantile', got {method!r}")
    uniq, mult = np.unique(v, return_counts=True)
    n_codes = 1 << bits
    if len(uniq) <= n_codes:
        return uniq
    fixed = uniq[uniq < 3]
    big, big_m = uniq[uniq >= 3], mult[uniq >= 3]
    m = n_codes - len(fixed)
    x = np.log(big.astype(np.float64))
    w = big_m.astype(np.float64) * big
    # initial bins: equal shares of the weight (weighted quantiles), cut between distinct values
    cum = np.cumsum(w)
    cuts = np.searchsorted(cum, cum[-1] * np.arange(1, m) / m, side="right")
    cuts = np.unique(np.clip(cuts, 1, len(big) - 1))
    bounds = (x[cuts - 1] + x[cuts]) / 2.0
    for _ in range(_LLOYD_ROUNDS if method == "lloyd" else 0):
        bin_of = np.searchsorted(bounds, x, side="right")
        sw = np.bincount(bin_of, weights=w, minlength=len(bounds) + 1)
        cent = np.bincount(bin_of, weights=w * x, minlength=len(bounds) + 1)[sw > 0] / sw[sw > 0]
        new = (cent[1:] + cent[:-1]) / 2.0
        if len(new) == len(bounds) and np.array_equal(new, bounds):
            break
        bounds = new
    bin_of = np.searchsorted(bounds, x, side="right")
    sw = np.bincount(bin_of, weights=w, minlength=len(bounds) + 1)
    used = np.flatnonzero(sw > 0)
    cent = np.bincount(bin_of, weights=w * x, minlength=len(bounds) + 1)[used] / sw[used]
    lo = np.array([big[bin_of == b].min() for b in used])
    hi = np.array([big[bin_of == b].max() for b in used])
    rep = np.clip(np.rint(np.exp(cent)).astype(np.int64), lo, hi)
    return np.unique(np.concatenate([fixed, rep]))


def _nearest(codebook: np.ndarray, values: np.ndarray) -> np.ndarray:
    """Index of each value's codebook entry: 1 and 2 their own, a value ≥ 3 the nearest entry ≥ 3 in the log domain.

    The nearest entry in the log domain is the bin Lloyd's step assigns (its boundaries
    are the midpoints of neighbouring log centroids); ties go to the smaller entry.
    """
    v = np.asarray(values, dtype=np.int64)
    out = np.searchsorted(codebook, v)  # exact for 1 and 2 (always in the codebook when present)
    first = int(np.searchsorted(codebook, 3))
    big = codebook[first:]
    sel = np.flatnonzero(v >= 3)
    if len(sel) and len(big):
        x = v[sel]
        hi = np.minimum(np.searchsorted(big, x), len(big) - 1)
        lo = np.maximum(hi - 1, 0)
        lv = np.log(x.astype(np.float64))
        take_lo = np.abs(lv - np.log(big[lo].astype(np.float64))) <= np.abs(np.log(big[hi].astype(np.float64)) - lv)
        out[sel] = first + np.where(take_lo, lo, hi)
    return out


class _QuantView(ValueView):
    def __init__(self, where: str, packed: np.ndarray, codebook: np.ndarray, bits: int, n: int) -> None:
        self._where = where
        self._packed = packed
        self._mv = memoryview(np.ascontiguousarray(packed)).cast("B")  # type: ignore[arg-type]
        self._cb = codebook.astype(np.int64)
        # the decoding table of every possible code: past the codebook, -1 (refused where read)
        self._cb_list: list[int] = self._cb.tolist() + [-1] * ((1 << bits) - len(self._cb))
        self._bits = bits
        self._mask = (1 << bits) - 1
        self._n = n
        self._last = len(packed) - 1

    def _bad(self, code: int) -> ModelFormatError:
        return ModelFormatError(f"{self._where}: value code {code} past the codebook of {len(self._cb)} entries")

    def at(self, i: int) -> int:
        if not 0 <= i < self._n:
            raise IndexError(i)
        q = self._bits
        bit = i * q
        sh = bit & 7
        w = self._mv[bit >> 3]
        if sh + q > 8:
            w |= self._mv[(bit >> 3) + 1] << 8
        v = self._cb_list[(w >> sh) & self._mask]
        if v < 0:
            raise self._bad((w >> sh) & self._mask)
        return v

    def _codes(self, idx: np.ndarray) -> np.ndarray:
        idx = np.asarray(idx, dtype=np.int64)
        if len(idx) and (int(idx.min()) < 0 or int(idx.max()) >= self._n):
            raise IndexError("value index out of range")
        bit = idx * self._bits
        at = bit >> 3
        w = self._packed[at].astype(np.int64) | (self._packed[np.minimum(at + 1, self._last)].astype(np.int64) << 8)
        c = (w >> (bit & 7)) & self._mask
        if len(c) and int(c.max()) >= len(self._cb):
            raise self._bad(int(c.max()))
        return c

    def slice(self, s: int, e: int) -> list[int]:
        if not 0 <= s <= e <= self._n:
            raise IndexError((s, e))
        if e - s > 96:
            out: list[int] = self._cb[self._codes(np.arange(s, e))].tolist()
            return out
        # a short run (the common case: a context's successors): its bytes as one Python
        # integer, the codes cut from it by shifts (no numpy call, no per-code branch)
        q, mask, cb = self._bits, self._mask, self._cb_list
        first = s * q
        x = int.from_bytes(self._mv[first >> 3 : (e * q + 7) >> 3], "little") >> (first & 7)
        res = [cb[(x >> j) & mask] for j in range(0, (e - s) * q, q)]
        if res and min(res) < 0:
            raise self._bad(-1)
        return res

    def take(self, idx: np.ndarray) -> np.ndarray:
        return self._cb[self._codes(idx)]  # type: ignore[no-any-return]

    def all(self) -> np.ndarray:
        return self._cb[self._codes(np.arange(self._n))]  # type: ignore[no-any-return]


#: n-grams per block of a ``quant`` version 2 level's ones bitmap: a u32 rank, then 64 bytes of bits
ONES_BLOCK: Final = 512
_BLOCK_BYTES: Final = 4 + ONES_BLOCK // 8
_POPCOUNT: Final = np.array([bin(i).count("1") for i in range(256)], dtype=np.int64)


class _QuantOnesView(ValueView):
    """``quant`` version 2: 1 where the ones bitmap says so, else the next code of the code stream."""

    def __init__(self, where: str, bitmap: np.ndarray, codes: np.ndarray, codebook: np.ndarray, bits: int, n: int,
                 n_codes: int) -> None:
        self._where = where
        self._bm = np.ascontiguousarray(bitmap, dtype=np.uint8)
        self._mvb = memoryview(self._bm).cast("B")  # type: ignore[arg-type]
        self._codes = _QuantView(where, np.ascontiguousarray(codes).view(np.uint8), codebook, bits, n_codes)
        self._n, self._m = n, n_codes
        # the ones before each byte of the bitmap within its block, for gathers (built on the first; 2 bytes
        # per 8 n-grams in memory)
        self._pre: np.ndarray | None = None

    def _bad(self) -> ModelFormatError:
        return ModelFormatError(f"{self._where}: damaged model data: a ones bitmap rank past the value codes")

    def _block(self, blk: int) -> tuple[int, int]:
        """(ones before block ``blk``, its 512 bits as one int)."""
        base = blk * _BLOCK_BYTES
        mv = self._mvb
        return int.from_bytes(mv[base : base + 4], "little"), int.from_bytes(mv[base + 4 : base + _BLOCK_BYTES], "little")

    def at(self, i: int) -> int:
        if not 0 <= i < self._n:
            raise IndexError(i)
        rank, word = self._block(i >> 9)
        off = i & (ONES_BLOCK - 1)
        if (word >> off) & 1:
            return 1
        j = i - rank - (word & ((1 << off) - 1)).bit_count()
        if not 0 <= j < self._m:
            raise self._bad()
        return self._codes.at(j)

    def slice(self, s: int, e: int) -> list[int]:
        if not 0 <= s <= e <= self._n:
            raise IndexError((s, e))
        if e - s > 96:
            out: list[int] = self._range(s, e).tolist()
            return out
        res: list[int] = []
        i = s
        while i < e:  # block by block (a short run lies in one or two)
            blk = i >> 9
            stop = min(e, (blk + 1) << 9)
            rank, word = self._block(blk)
            lo, hi = i & (ONES_BLOCK - 1), ((stop - 1) & (ONES_BLOCK - 1)) + 1
            j = i - rank - (word & ((1 << lo) - 1)).bit_count()
            run = (word >> lo) & ((1 << (hi - lo)) - 1)
            k = (hi - lo) - run.bit_count()  # codes in this piece
            if j < 0 or j + k > self._m:
                raise self._bad()
            vals = self._codes.slice(j, j + k)
            it = iter(vals)
            res += [1 if (run >> x) & 1 else next(it) for x in range(hi - lo)]
            i = stop
        return res

    def _range(self, s: int, e: int) -> np.ndarray:
        """Values s … e−1 at once: the covering blocks' bits unpacked, one read of the codes."""
        b0, b1 = s >> 9, (e - 1) >> 9
        blocks = self._bm[b0 * _BLOCK_BYTES : (b1 + 1) * _BLOCK_BYTES].reshape(-1, _BLOCK_BYTES)
        bits = np.unpackbits(blocks[:, 4:], axis=1, bitorder="little").reshape(-1)
        lo = s - (b0 << 9)
        ones_before = int(blocks[0, :4].view("<u4")[0]) + int(np.count_nonzero(bits[:lo]))
        zero = bits[lo : lo + (e - s)] == 0
        j0, k = s - ones_before, int(np.count_nonzero(zero))
        if j0 < 0 or j0 + k > self._m:
            raise self._bad()
        out = np.ones(e - s, dtype=np.int64)
        if k:
            out[zero] = self._codes.take(np.arange(j0, j0 + k))
        return out

    def take(self, idx: np.ndarray) -> np.ndarray:
        idx = np.asarray(idx, dtype=np.int64)
        if len(idx) == 0:
            return np.zeros(0, dtype=np.int64)
        if int(idx.min()) < 0 or int(idx.max()) >= self._n:
            raise IndexError("value index out of range")
        if len(idx) > 16 and int(idx[-1]) - int(idx[0]) == len(idx) - 1 and bool((np.diff(idx) == 1).all()):
            s, e = int(idx[0]), int(idx[-1]) + 1  # a run of entries (a row or a context)
            return self._range(s, e) if e - s > 96 else np.array(self.slice(s, e), dtype=np.int64)
        blk, off = idx >> 9, idx & (ONES_BLOCK - 1)
        bm = self._bm
        if self._pre is None:  # built on first use: the ones before each byte within its block (u16)
            body = bm.reshape(-1, _BLOCK_BYTES)[:, 4:]
            pre = np.zeros((len(body), _BLOCK_BYTES), dtype=np.uint16)
            np.cumsum(_POPCOUNT[body[:, :-1]], axis=1, out=pre[:, 5:], dtype=np.uint16)
            self._pre = pre.reshape(-1)
        byte_at = blk * _BLOCK_BYTES + 4 + (off >> 3)
        byte = bm[byte_at]
        bit = (byte >> (off & 7)) & 1
        rank = bm.view("<u4")[blk * (_BLOCK_BYTES // 4)].astype(np.int64)
        # ones before i in its block: whole bytes before it, then the low bits of its byte
        whole = self._pre[byte_at].astype(np.int64)
        part = _POPCOUNT[byte & ((1 << (off & 7)) - 1)]
        j = idx - rank - whole - part
        out = np.ones(len(idx), dtype=np.int64)
        nz = bit == 0
        if bool(nz.any()):
            jj = j[nz]
            if int(jj.min()) < 0 or int(jj.max()) >= self._m:
                raise self._bad()
            out[nz] = self._codes.take(jj)
        return out

    def all(self) -> np.ndarray:
        n = self._n
        blocks = self._bm.reshape(-1, _BLOCK_BYTES)[:, 4:]
        ones = np.unpackbits(blocks.reshape(-1), bitorder="little")[:n].astype(bool)
        out = np.ones(n, dtype=np.int64)
        k = int(np.count_nonzero(~ones))
        if k != self._m:
            raise self._bad()
        out[~ones] = self._codes.all()[:k] if k else out[:0]
        return out


class QuantCodec(Codec):
    """Values as ``bits``-bit codes into a per-level codebook of increasing integers.

    Sections (tags of the level): ``tags[0]`` u1, the codes as one little-endian bit
    stream (code i is bits i·bits … i·bits+bits−1, bit j of the stream being bit j mod 8
    of byte ⌊j/8⌋, least significant first), ⌈n·bits/8⌉ bytes, unused high bits of the
    last byte 0; ``tags[1]`` u4, the codebook (1 … 2**bits entries, strictly
    increasing, ≥ 1); ``tags[2]`` u4, empty. The decoded value of n-gram i is
    ``codebook[code(i)]``; the estimator turns decoded values into α and γ exactly as for
    the exact codec, and the context totals stored beside them (HIST, TLNV) are sums of
    decoded values, so each context sums to 1 (docs/SEAMS.md). The codebook is increasing,
    so dominance on codes is dominance on decoded values and the skybands, built from the
    decoded values, stay exact for the quantised model's own probabilities.
    """

    name: ClassVar[str] = "quant"
    version: int = 1

    def __init__(self, bits: int, *, method: str = "lloyd", ones: bool = False) -> None:
        if type(bits) is not int or bits not in QUANT_BITS:  # 5.0 would pass `in`, then fail as a shift
            raise InvalidArgumentError(f"quantisation bits must be one of {', '.join(map(str, QUANT_BITS))}, got {bits!r}")
        self.bits = bits
        self.method = method
        #: version 2: a ones bitmap (1 bit per n-gram, with a rank per 512) and codes only for the other values
        self.ones = ones
        self.version = 2 if ones else 1

    def meta(self) -> dict[str, object]:
        return {"name": self.name, "version": self.version, "bits": self.bits}

    def quantize(self, values: np.ndarray) -> np.ndarray:
        v = np.asarray(values, dtype=np.int64)
        if len(v) == 0:
            return v
        cb = fit_codebook(v, self.bits, method=self.method)
        return cb[_nearest(cb, v)]

    def packed_len(self, n: int) -> int:
        """Bytes of ``tags[0]`` for n values."""
        return (n * self.bits + 7) // 8

    def encode(self, tags: tuple[bytes, bytes, bytes], values: np.ndarray) -> list[Section]:
        v = np.asarray(values, dtype=np.int64)
        cb = np.unique(v)
        if len(cb) > (1 << self.bits):
            raise InvalidArgumentError(f"{len(cb)} distinct values do not fit {self.bits}-bit codes; quantize() them first")
        if len(v) and (int(cb[0]) < 1 or int(cb[-1]) > _U32_MAX):
            raise InvalidArgumentError("stored values must lie in [1, 2**32)")
        codes = np.searchsorted(cb, v).astype(np.uint8)
        u1, u4 = np.dtype("<u1"), np.dtype("<u4")
        if not self.ones:
            return [(tags[0], u1, self._pack(codes)), (tags[1], u4, cb.astype(np.uint32)), (tags[2], u4, np.zeros(0, np.uint32))]
        one = v == 1
        packed = self._pack(codes[~one])
        packed = np.concatenate([packed, np.zeros(-len(packed) % 4, np.uint8)]).view("<u4")
        return [(tags[0], u1, ones_bitmap(one)), (tags[1], u4, cb.astype(np.uint32)), (tags[2], u4, packed)]

    def _pack(self, codes: np.ndarray) -> np.ndarray:
        """The codes as one bit stream: code i at bits i·q … i·q+q−1, least significant bit first."""
        stream = ((codes[:, None] >> np.arange(self.bits, dtype=np.uint8)) & 1).astype(np.uint8).reshape(-1)
        return np.packbits(stream, bitorder="little")

    def section_types(self, tags: tuple[bytes, bytes, bytes]) -> dict[bytes, str]:
        return {tags[0]: "u1", tags[1]: "u4", tags[2]: "u4"}

    def check(self, where: str, arrays: dict[str, np.ndarray], tags: tuple[bytes, bytes, bytes], n: int) -> None:
        packed, cb, rest = (arrays[t.decode()] for t in tags)
        names = [t.decode() for t in tags]
        if self.ones:
            self._check_ones(where, names, packed, cb, rest, n)
            return
        if len(packed) != self.packed_len(n):
            raise ModelFormatError(f"{where}: section {names[0]} holds {len(packed)} bytes, expected {self.packed_len(n)} for {n} {self.bits}-bit codes")
        if not 1 <= len(cb) <= (1 << self.bits) and not (n == 0 and len(cb) == 0):
            raise ModelFormatError(f"{where}: section {names[1]} holds {len(cb)} codebook entries, expected 1 to {1 << self.bits}")
        if len(cb) and (int(cb[0]) < 1 or bool(np.any(cb[1:] <= cb[:-1]))):
            raise ModelFormatError(f"{where}: section {names[1]} is not a strictly increasing codebook of values >= 1")
        if len(rest):
            raise ModelFormatError(f"{where}: section {names[2]} must be empty for codec 'quant'")
        tail = n * self.bits % 8
        if tail and int(packed[-1]) >> tail:
            raise ModelFormatError(f"{where}: section {names[0]} has non-zero bits after the last code")

    def _check_ones(self, where: str, names: list[str], bitmap: np.ndarray, cb: np.ndarray, codes: np.ndarray, n: int) -> None:
        """Version 2 on load: the bitmap's length, the last block's rank and padding, the code stream's length."""
        blocks = (n + ONES_BLOCK - 1) // ONES_BLOCK
        if len(bitmap) != blocks * _BLOCK_BYTES:
            raise ModelFormatError(f"{where}: section {names[0]} holds {len(bitmap)} bytes, expected {blocks * _BLOCK_BYTES} for {n} n-grams")
        if not 1 <= len(cb) <= (1 << self.bits) and not (n == 0 and len(cb) == 0):
            raise ModelFormatError(f"{where}: section {names[1]} holds {len(cb)} codebook entries, expected 1 to {1 << self.bits}")
        if len(cb) and (int(cb[0]) < 1 or bool(np.any(cb[1:] <= cb[:-1]))):
            raise ModelFormatError(f"{where}: section {names[1]} is not a strictly increasing codebook of values >= 1")
        ones = 0
        if blocks:
            last = bitmap[(blocks - 1) * _BLOCK_BYTES :]
            bits = np.unpackbits(last[4:], bitorder="little")
            if bool(bits[n - (blocks - 1) * ONES_BLOCK :].any()):
                raise ModelFormatError(f"{where}: section {names[0]} has bits set after the last n-gram")
            ones = int(last[:4].view("<u4")[0]) + int(bits.sum())
            if int(bitmap[:4].view("<u4")[0]) != 0 or ones > n:
                raise ModelFormatError(f"{where}: section {names[0]} has ranks that do not start at 0 or exceed the n-grams")
        want = ((n - ones) * self.bits + 31) // 32
        if len(codes) != want:
            raise ModelFormatError(f"{where}: section {names[2]} holds {len(codes)} words, expected {want} for {n - ones} {self.bits}-bit codes")
        tail = (n - ones) * self.bits % 32
        if tail and int(codes[-1]) >> tail:
            raise ModelFormatError(f"{where}: section {names[2]} has non-zero bits after the last code")

    def n_codes(self, arrays: dict[str, np.ndarray], tags: tuple[bytes, bytes, bytes], n: int) -> int:
        """How many n-grams of the level have a code (version 2: those whose value is not 1)."""
        if not self.ones or n == 0:
            return n
        bitmap = arrays[tags[0].decode()]
        blocks = (n + ONES_BLOCK - 1) // ONES_BLOCK
        last = bitmap[(blocks - 1) * _BLOCK_BYTES :]
        return n - int(last[:4].view("<u4")[0]) - int(np.unpackbits(last[4:]).sum())

    def check_full(self, where: str, arrays: dict[str, np.ndarray], tags: tuple[bytes, bytes, bytes]) -> None:
        """Every code is inside the codebook, and (version 2) every block's rank is right (verify=True)."""
        if self.ones:
            bitmap = arrays[tags[0].decode()].reshape(-1, _BLOCK_BYTES)
            counts = np.unpackbits(bitmap[:, 4:], axis=1).sum(axis=1).astype(np.int64)
            ranks = bitmap[:, :4].copy().view("<u4").reshape(-1).astype(np.int64)
            if len(ranks) and not np.array_equal(ranks, np.concatenate([[0], np.cumsum(counts)[:-1]])):
                raise ModelFormatError(f"{where}: section {tags[0].decode()} has a block rank that is not the ones before it")
            self._check_codes(where, tags[2].decode(), np.ascontiguousarray(arrays[tags[2].decode()]).view(np.uint8),
                              arrays[tags[1].decode()])
            return
        self._check_codes(where, tags[0].decode(), arrays[tags[0].decode()], arrays[tags[1].decode()])

    def _check_codes(self, where: str, label: str, packed: np.ndarray, cb: np.ndarray) -> None:
        bits = np.unpackbits(np.asarray(packed, dtype=np.uint8), bitorder="little")
        slots = len(bits) // self.bits
        codes = bits[: slots * self.bits].reshape(slots, self.bits).astype(np.int64) @ (1 << np.arange(self.bits, dtype=np.int64))
        if len(codes) and int(codes.max()) >= len(cb):
            raise ModelFormatError(f"{where}: section {label} holds a code past the codebook")

    def decode(self, where: str, arrays: dict[str, np.ndarray], tags: tuple[bytes, bytes, bytes], n: int | None = None) -> ValueView:
        packed, cb, rest = (arrays[t.decode()] for t in tags)
        if self.ones:
            blocks = len(packed) // _BLOCK_BYTES
            total = blocks * ONES_BLOCK if n is None else n
            return _QuantOnesView(where, packed, rest, cb, self.bits, total, self.n_codes(arrays, tags, total))
        slots = len(packed) * 8 // self.bits
        return _QuantView(where, packed, cb, self.bits, slots if n is None else min(n, slots))


EXACT: Final = ExactCodec()
#: every codec a file may name (name → instance)
CODECS: Final[dict[str, Codec]] = {EXACT.name: EXACT, QuantCodec.name: QuantCodec(DEFAULT_QUANT_BITS)}


def ones_bitmap(one: np.ndarray) -> np.ndarray:
    """The ones bitmap of ``quant`` version 2: per block of 512 n-grams a u32 (little-endian) count of the
    ones before the block, then the block's 512 bits (bit j of the block = bit j mod 8 of its byte ⌊j/8⌋)."""
    one = np.asarray(one, dtype=bool)
    blocks = (len(one) + ONES_BLOCK - 1) // ONES_BLOCK
    bits = np.zeros(blocks * ONES_BLOCK, dtype=np.uint8)
    bits[: len(one)] = one
    body = np.packbits(bits, bitorder="little").reshape(blocks, ONES_BLOCK // 8)
    per = bits.reshape(blocks, ONES_BLOCK).sum(axis=1).astype(np.int64)
    ranks = (np.cumsum(per) - per).astype("<u4").view(np.uint8).reshape(blocks, 4)
    return np.concatenate([ranks, body], axis=1).reshape(-1)


def codec_for_bits(bits: int | None, *, ones: bool = False) -> Codec:
    """The codec a build uses: ``None`` → exact, else the quantised codec of that width (``ones``: version 2)."""
    return EXACT if bits is None else QuantCodec(bits, ones=ones)


def codec_named(where: str, spec: object) -> Codec:
    """The codec META's ``codec`` field names; ModelFormatError for one this library lacks."""
    if not isinstance(spec, dict):
        raise ModelFormatError(f"{where}: metadata field 'codec' is invalid: {spec!r}"[:200])
    name, version = spec.get("name"), spec.get("version")
    codec = CODECS.get(name) if isinstance(name, str) else None
    if codec is None:
        raise ModelFormatError(f"{where}: unknown value codec {name!r} (this library reads: {', '.join(CODECS)})"[:200])
    versions = (1, 2) if isinstance(codec, QuantCodec) else (codec.version,)
    if type(version) is not int or version not in versions:  # 1.0 or True is not a version number
        raise ModelFormatError(f"{where}: codec {name!r} version {version!r} is not supported (this library reads version "
                               f"{' and '.join(map(str, versions))})"[:200])
    if isinstance(codec, QuantCodec):
        bits = spec.get("bits")
        if type(bits) is not int or bits not in QUANT_BITS:  # 5.0 would pass `in`, then fail as a shift
            raise ModelFormatError(f"{where}: codec 'quant' with bits {bits!r} (this library reads {', '.join(map(str, QUANT_BITS))})"[:200])
        return QuantCodec(bits, ones=version == 2)
    return codec
